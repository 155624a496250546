"""Shared numerics: kernels, bandwidth rules, blocked pairwise sums, kernel densities,
whitening, the optax inner solver and proximal maps (:mod:`flowpost.numerics.prox`)."""

from __future__ import annotations

from . import prox as prox
from ._density import grad_log_kde as grad_log_kde
from ._density import log_kde as log_kde
from ._inner import FIRST_ORDER_METHODS as FIRST_ORDER_METHODS
from ._inner import InnerSolver as InnerSolver
from ._inner import SolveReport as SolveReport
from ._inner import minimise as minimise
from ._kernels import DEFAULT_MEDIAN_POINTS as DEFAULT_MEDIAN_POINTS
from ._kernels import IMQ as IMQ
from ._kernels import RBF as RBF
from ._kernels import RadialKernel as RadialKernel
from ._kernels import median_distance as median_distance
from ._kernels import normal_reference_bandwidth as normal_reference_bandwidth
from ._pairwise import DEFAULT_BLOCK as DEFAULT_BLOCK
from ._pairwise import PARTICLE_AXIS as PARTICLE_AXIS
from ._pairwise import interaction_means as interaction_means
from ._pairwise import kernel_sums as kernel_sums
from ._pairwise import map_row_blocks as map_row_blocks
from ._pairwise import pairwise_sqdist as pairwise_sqdist
from ._pairwise import particle_shards as particle_shards
from ._pairwise import random_batch_sums as random_batch_sums
from ._whitening import Whitening as Whitening
from ._whitening import whiten as whiten

__all__ = [
    "DEFAULT_BLOCK",
    "DEFAULT_MEDIAN_POINTS",
    "FIRST_ORDER_METHODS",
    "IMQ",
    "PARTICLE_AXIS",
    "RBF",
    "InnerSolver",
    "RadialKernel",
    "SolveReport",
    "Whitening",
    "grad_log_kde",
    "interaction_means",
    "kernel_sums",
    "log_kde",
    "map_row_blocks",
    "median_distance",
    "minimise",
    "normal_reference_bandwidth",
    "pairwise_sqdist",
    "particle_shards",
    "prox",
    "random_batch_sums",
    "whiten",
]
