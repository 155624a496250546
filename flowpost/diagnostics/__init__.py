"""Diagnostics that read an ensemble: the kernel Stein discrepancy, R-hat and ESS, and a kernel
two-sample test between two ensembles."""

from __future__ import annotations

from ._flatness import ScoreFlatness as ScoreFlatness
from ._flatness import score_flatness as score_flatness
from ._mixing import MIN_DRAWS_PER_CHAIN as MIN_DRAWS_PER_CHAIN
from ._mixing import ThinnedTrail as ThinnedTrail
from ._mixing import autocorrelation as autocorrelation
from ._mixing import average_ranks as average_ranks
from ._mixing import bulk_ess as bulk_ess
from ._mixing import ess as ess
from ._mixing import plain_split_rhat as plain_split_rhat
from ._mixing import rank_normalise as rank_normalise
from ._mixing import split_rhat as split_rhat
from ._mixing import split_rhat_and_bulk_ess as split_rhat_and_bulk_ess
from ._stein import squared_stein_discrepancy as squared_stein_discrepancy
from ._stein import stein_discrepancy as stein_discrepancy
from ._stein import stein_kernel as stein_kernel
from ._two_sample import Agreement as Agreement
from ._two_sample import agreement_test as agreement_test

__all__ = [
    "MIN_DRAWS_PER_CHAIN",
    "Agreement",
    "ScoreFlatness",
    "ThinnedTrail",
    "agreement_test",
    "autocorrelation",
    "average_ranks",
    "bulk_ess",
    "ess",
    "plain_split_rhat",
    "rank_normalise",
    "score_flatness",
    "split_rhat",
    "split_rhat_and_bulk_ess",
    "squared_stein_discrepancy",
    "stein_discrepancy",
    "stein_kernel",
]
