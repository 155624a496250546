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

_WHERE = {
    "calibrate": "calibration", "CalibrationReport": "calibration",
    **{n: "checks" for n in (
        "HealthReport", "ScoreAgreement", "assert_deterministic", "assert_exchangeable_rows",
        "assert_finite_on_region", "assert_jit_matches_eager", "assert_scalar_output",
        "assert_score_matches", "assert_vmap_matches_loop", "check_health", "points_near",
        "score_agreement")},
    "Region": "region",
    **{n: "moments" for n in ("MomentZScores", "assert_moments_match", "moment_zscores")},
    **{n: "references" for n in (
        "CLOSED_FORM_MODELS", "BetaBinomial", "ClosedFormModel", "DirichletMultinomial", "GammaPoisson",
        "LinearRegressionKnownNoise", "NormalKnownVariance")},
}


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


__all__ = [
    "CLOSED_FORM_MODELS",
    "BetaBinomial",
    "CalibrationReport",
    "ClosedFormModel",
    "DirichletMultinomial",
    "GammaPoisson",
    "HealthReport",
    "LinearRegressionKnownNoise",
    "MomentZScores",
    "NormalKnownVariance",
    "Region",
    "ScoreAgreement",
    "assert_deterministic",
    "assert_exchangeable_rows",
    "assert_finite_on_region",
    "assert_jit_matches_eager",
    "assert_moments_match",
    "assert_scalar_output",
    "assert_score_matches",
    "assert_vmap_matches_loop",
    "calibrate",
    "check_health",
    "moment_zscores",
    "points_near",
    "score_agreement",
]
