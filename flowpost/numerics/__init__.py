"""Shared numerics: kernels, bandwidth rules, blocked pairwise sums, kernel densities,
whitening, the optax inner solver and proximal maps (:mod:`flowpost.numerics.prox`)."""
from __future__ import annotations

from ._kernels import (
    DEFAULT_MEDIAN_POINTS as DEFAULT_MEDIAN_POINTS,
    RBF as RBF,
    IMQ as IMQ,
    RadialKernel as RadialKernel,
    median_distance as median_distance,
    normal_reference_bandwidth as normal_reference_bandwidth,
)
from ._pairwise import (
    DEFAULT_BLOCK as DEFAULT_BLOCK,
    pairwise_sqdist as pairwise_sqdist,
    map_row_blocks as map_row_blocks,
    kernel_sums as kernel_sums,
    random_batch_sums as random_batch_sums,
    interaction_means as interaction_means,
)
from ._density import (
    log_kde as log_kde,
    grad_log_kde as grad_log_kde,
)
from ._whitening import (
    Whitening as Whitening,
    whiten as whiten,
)
from ._inner import (
    InnerSolver as InnerSolver,
    SolveReport as SolveReport,
    minimise as minimise,
    FIRST_ORDER_METHODS as FIRST_ORDER_METHODS,
)
from . import prox as prox

__all__ = ['DEFAULT_BLOCK', 'DEFAULT_MEDIAN_POINTS', 'RBF', 'IMQ', 'RadialKernel', 'median_distance', 'normal_reference_bandwidth', 'pairwise_sqdist', 'map_row_blocks', 'kernel_sums', 'random_batch_sums', 'interaction_means', 'log_kde', 'grad_log_kde', 'Whitening', 'whiten', 'InnerSolver', 'SolveReport', 'minimise', 'FIRST_ORDER_METHODS', 'prox']
