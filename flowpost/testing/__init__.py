"""flowpost's test kit for users' own log-densities (and for flowpost's own tests).

- Where to check: :class:`Region` (``Region.near(point, scale)`` or
  ``Region.drawn(sampler)``), taken by the score and health checks below, which also accept
  its fields as keywords (``around=``, ``sampler=``, ``scale=``, ``num_points=``, ``key=``).
- Score checks: :func:`score_agreement`, :func:`assert_score_matches` (autodiff against
  central finite differences in float64).
- Health checks: :func:`check_health` and the ``assert_*`` helpers (scalar output, finite on
  a region, jit and vmap agree, deterministic, exchangeable data rows).
- Simulation-based calibration: :func:`calibrate`.
- Closed-form reference families: :data:`CLOSED_FORM_MODELS` (normal-normal, beta-binomial,
  gamma-Poisson, Dirichlet-multinomial, Bayesian linear regression).
- Moment assertions in Monte-Carlo standard errors: :func:`moment_zscores`,
  :func:`assert_moments_match`.
- A pytest plugin with fixtures (:mod:`flowpost.testing.plugin`).
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # pragma: no cover - for editors and type checkers
    from .calibration import CalibrationReport as CalibrationReport
    from .calibration import calibrate as calibrate
    from .checks import HealthReport as HealthReport
    from .checks import ScoreAgreement as ScoreAgreement
    from .checks import assert_deterministic as assert_deterministic
    from .checks import assert_exchangeable_rows as assert_exchangeable_rows
    from .checks import assert_finite_on_region as assert_finite_on_region
    from .checks import assert_jit_matches_eager as assert_jit_matches_eager
    from .checks import assert_scalar_output as assert_scalar_output
    from .checks import assert_score_matches as assert_score_matches
    from .checks import assert_vmap_matches_loop as assert_vmap_matches_loop
    from .checks import check_health as check_health
    from .checks import points_near as points_near
    from .checks import score_agreement as score_agreement
    from .moments import MomentZScores as MomentZScores
    from .moments import assert_moments_match as assert_moments_match
    from .moments import moment_zscores as moment_zscores
    from .references import CLOSED_FORM_MODELS as CLOSED_FORM_MODELS
    from .references import BetaBinomial as BetaBinomial
    from .references import ClosedFormModel as ClosedFormModel
    from .references import DirichletMultinomial as DirichletMultinomial
    from .references import GammaPoisson as GammaPoisson
    from .references import LinearRegressionKnownNoise as LinearRegressionKnownNoise
    from .references import NormalKnownVariance as NormalKnownVariance
    from .region import Region as Region

# public name -> module that defines it (kept as text here: importing the modules would load JAX)
# fmt: off
_NAMES = {
    "calibration": "calibrate CalibrationReport",
    "checks": "HealthReport ScoreAgreement assert_deterministic assert_exchangeable_rows assert_finite_on_region "
              "assert_jit_matches_eager assert_scalar_output assert_score_matches assert_vmap_matches_loop "
              "check_health points_near score_agreement",
    "moments": "MomentZScores assert_moments_match moment_zscores",
    "references": "CLOSED_FORM_MODELS BetaBinomial ClosedFormModel DirichletMultinomial GammaPoisson "
                  "LinearRegressionKnownNoise NormalKnownVariance",
    "region": "Region",
}
# fmt: on
_WHERE = {name: module for module, names in _NAMES.items() for name in names.split()}


def __getattr__(name: str):
    """Import on first use (PEP 562): the pytest plugin lives in this package and is loaded
    by every pytest run, which should not pay for JAX unless a fixture is used."""
    if name not in _WHERE:
        raise AttributeError(f"module 'flowpost.testing' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{_WHERE[name]}", __name__), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_WHERE))


# fmt: off
__all__ = [
    "CLOSED_FORM_MODELS", "BetaBinomial", "CalibrationReport", "ClosedFormModel", "DirichletMultinomial",
    "GammaPoisson", "HealthReport", "LinearRegressionKnownNoise", "MomentZScores", "NormalKnownVariance", "Region",
    "ScoreAgreement", "assert_deterministic", "assert_exchangeable_rows", "assert_finite_on_region",
    "assert_jit_matches_eager", "assert_moments_match", "assert_scalar_output", "assert_score_matches",
    "assert_vmap_matches_loop", "calibrate", "check_health", "moment_zscores", "points_near", "score_agreement",
]
# fmt: on
