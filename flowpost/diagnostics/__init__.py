"""Diagnostics that read an ensemble: the kernel Stein discrepancy, R-hat and ESS."""
from __future__ import annotations

from ._mixing import (
    MIN_DRAWS_PER_CHAIN as MIN_DRAWS_PER_CHAIN,
    ThinnedTrail as ThinnedTrail,
    autocorrelation as autocorrelation,
    bulk_ess as bulk_ess,
    ess as ess,
    plain_split_rhat as plain_split_rhat,
    rank_normalise as rank_normalise,
    split_rhat as split_rhat,
)
from ._stein import (
    squared_stein_discrepancy as squared_stein_discrepancy,
    stein_discrepancy as stein_discrepancy,
    stein_kernel as stein_kernel,
)

__all__ = [
    "MIN_DRAWS_PER_CHAIN", "ThinnedTrail", "autocorrelation", "bulk_ess", "ess", "plain_split_rhat",
    "rank_normalise", "split_rhat", "squared_stein_discrepancy", "stein_discrepancy", "stein_kernel"
]
