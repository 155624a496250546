"""pytest plugin: flowpost's test kit as fixtures for a user's own test suite.

The plugin is registered under the ``pytest11`` entry point ``flowpost``, so it is active in
every pytest session of an environment where flowpost is installed; nothing needs to be
added to ``conftest.py``. Check with ``python -m pytest --fixtures | grep fp_``. Every
fixture name starts with ``fp_`` so that it does not collide with a project's own fixtures.

Fixtures
--------
``fp_key``
    A fixed PRNG key, ``jax.random.key(seed)`` with ``seed`` from ``--flowpost-seed``
    (default 0). The same in every test, so a failure reproduces.

``fp_score_check``
    A :class:`ScoreCheck`: ``fp_score_check(log_p, Region.drawn(prior_draw), data=...)`` (or
    the keyword shortcut ``fp_score_check(log_p, data=..., around=... or sampler=...)``)
    compares the autodiff score of ``log_p`` with central finite differences in float64 (one
    Richardson refinement; see :mod:`flowpost.testing.checks`) at the points of the
    :class:`~flowpost.testing.Region` (``--flowpost-score-points`` of them, default 16,
    unless the region sets ``num_points``; drawn with ``fp_key`` unless it sets ``key``) and
    raises ``AssertionError`` naming the worst parameter when the relative error exceeds the
    tolerance (``--flowpost-score-tol``, default ``1e-4``; a correct gradient gives about
    ``1e-9``, a wrong factor of two ``0.5``). Returns the :class:`ScoreAgreement`;
    ``check=False`` returns it without asserting.

``fp_health_check``
    A :class:`HealthCheck`: ``fp_health_check(log_p, Region.near(point), data=...,
    exchangeable=True)`` (or ``around=point``) runs, on the region's points (16 unless it
    sets ``num_points``; drawn with ``fp_key`` unless it sets ``key``), every health check of
    :func:`flowpost.testing.check_health` (scalar output, finite on the region, ``jit`` agrees
    with eager, ``vmap`` agrees with a loop, deterministic, and, when ``exchangeable=True``,
    invariance under a permutation of the data rows) and raises
    ``AssertionError`` listing every failed check. Returns the :class:`HealthReport`;
    ``check=False`` returns it without asserting.

``fp_sbc``
    A :class:`CalibrationRun`: ``fp_sbc(log_p, prior_draw, simulate, stepper, init,
    support=...)`` runs simulation-based calibration (:func:`flowpost.testing.calibrate`) with
    small defaults meant for continuous integration: ``n_datasets`` 100
    (``--flowpost-sbc-datasets``), ``steps`` 500 (``--flowpost-sbc-steps``), ``bins`` 5
    (``--flowpost-sbc-bins``), and fails when an element's chi-square p-value is below
    ``alpha`` 0.01 (``--flowpost-sbc-alpha``), with the rank counts and a reading of their
    shape (U shape, hump, slope) in the message. Arguments given in the call win over these
    defaults. ``fp_sbc.draws`` is a number of particles that suits the bins
    (``10 * bins - 1``) and ``fp_sbc.tile(point)`` repeats one point that many times, to
    build ``init``. Returns the :class:`CalibrationReport`; ``check=False`` returns it
    without asserting.

``fp_moments``
    A :class:`MomentCheck`: ``fp_moments(draws, mean, cov)`` asserts that the ensemble's
    mean and covariance are within ``threshold`` Monte-Carlo standard errors of the reference
    (``--flowpost-moment-z``, default 4.5; a correct ensemble fails a single comparison with
    probability about 7e-6 at 4.5, two-sided normal tail). ``draws`` may be a
    :class:`flowpost.Result` (its ``particles`` are used), an ``(N, d)`` array or a pytree of
    arrays with leading axis ``N``. ``fp_moments.against(model, data, draws)`` takes the
    reference from a closed-form family. Returns the :class:`MomentZScores`.

``fp_reference_families``
    The closed-form families :data:`flowpost.testing.CLOSED_FORM_MODELS` as a tuple of classes
    that also answers attribute look-ups by class name
    (``fp_reference_families.GammaPoisson``).

``fp_each_reference_model``
    Parametrised: a test that asks for it runs once per closed-form family, each time with an
    instance of the family with default hyper-parameters (ids are the class names).

Command-line options and ini keys
---------------------------------
Every option can also be set in the project's pytest configuration under the ini key of the
same name with underscores (``flowpost_score_tol = 1e-5`` in ``[tool.pytest.ini_options]``);
the command line wins over the ini file, which wins over the built-in default.

=============================  =======  ==========================================
option                         default  meaning
=============================  =======  ==========================================
``--flowpost-seed``            0        seed of ``fp_key``
``--flowpost-score-tol``       1e-4     largest relative score error accepted
``--flowpost-score-points``    16       points of the score check
``--flowpost-sbc-datasets``    100      simulated datasets of ``fp_sbc``
``--flowpost-sbc-steps``       500      steps of the flow per dataset
``--flowpost-sbc-bins``        5        rank bins of the chi-square test
``--flowpost-sbc-alpha``       0.01     p-value below which calibration fails
``--flowpost-moment-z``        4.5      standard errors allowed by ``fp_moments``
=============================  =======  ==========================================

A bad value stops pytest with a usage error naming the option.

The objects behind the fixtures (:class:`ScoreCheck`, :class:`HealthCheck`,
:class:`CalibrationRun`, :class:`MomentCheck`, :class:`ReferenceFamilies`) and
:func:`describe_rank_shape` can also be imported from this module and built by hand.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Literal

import pytest

if TYPE_CHECKING:  # pragma: no cover - these modules (and JAX) are imported when a check runs
    import jax

    from ..steppers.base import Stepper
    from .calibration import CalibrationReport
    from .checks import HealthReport, ScoreAgreement
    from .moments import MomentZScores
    from .references import ClosedFormModel
    from .region import Region

__all__ = [
    "CalibrationRun",
    "HealthCheck",
    "MomentCheck",
    "ReferenceFamilies",
    "ScoreCheck",
    "Settings",
    "describe_rank_shape",
]


# ----------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class Settings:
    """The plugin's resolved settings (command line, then ini file, then default)."""

    seed: int = 0
    score_tol: float = 1e-4
    score_points: int = 16
    sbc_datasets: int = 100
    sbc_steps: int = 500
    sbc_bins: int = 5
    sbc_alpha: float = 0.01
    moment_z: float = 4.5


def _positive_int(text: str) -> int:
    value = int(text)
    if value < 1:
        raise ValueError
    return value


def _non_negative_int(text: str) -> int:
    value = int(text)
    if value < 0:
        raise ValueError
    return value


def _positive_float(text: str) -> float:
    value = float(text)
    if not 0 < value < float("inf"):
        raise ValueError
    return value


def _probability(text: str) -> float:
    value = float(text)
    if not 0 < value < 1:
        raise ValueError
    return value


_EXPECTED = {
    _positive_int: "a positive integer",
    _non_negative_int: "a non-negative integer",
    _positive_float: "a finite positive number",
    _probability: "a number strictly between 0 and 1",
}

_MIN_BINS = 2

# (field of Settings, command-line flag, parser, help text)
_OPTIONS: tuple[tuple[str, str, Callable[[str], Any], str], ...] = (
    ("seed", "--flowpost-seed", _non_negative_int, "seed of the fp_key fixture (default 0)"),
    (
        "score_tol",
        "--flowpost-score-tol",
        _positive_float,
        "largest relative error between autodiff and finite-difference scores accepted by "
        "fp_score_check (default 1e-4)",
    ),
    (
        "score_points",
        "--flowpost-score-points",
        _positive_int,
        "points at which fp_score_check compares the scores (default 16)",
    ),
    (
        "sbc_datasets",
        "--flowpost-sbc-datasets",
        _positive_int,
        "simulated datasets per fp_sbc calibration (default 100)",
    ),
    ("sbc_steps", "--flowpost-sbc-steps", _positive_int, "steps of the flow per dataset in fp_sbc (default 500)"),
    ("sbc_bins", "--flowpost-sbc-bins", _positive_int, "rank bins of fp_sbc's chi-square test (default 5)"),
    (
        "sbc_alpha",
        "--flowpost-sbc-alpha",
        _probability,
        "p-value below which fp_sbc reports a calibration failure (default 0.01)",
    ),
    (
        "moment_z",
        "--flowpost-moment-z",
        _positive_float,
        "Monte-Carlo standard errors allowed by fp_moments (default 4.5)",
    ),
)

_SETTINGS_KEY = pytest.StashKey[Settings]()


def _ini_type(parse: Callable[[str], Any]) -> Literal["string"]:
    """Ini keys are declared as strings and parsed here, so that a bad value gets this
    plugin's message naming the key whatever pytest's version (pytest 9.2 checks typed keys
    itself, with a message that does not name the key)."""
    return "string"


def pytest_addoption(parser: pytest.Parser) -> None:
    group = parser.getgroup("flowpost", "flowpost test kit (fixtures fp_*)")
    for name, flag, parse, help_text in _OPTIONS:
        group.addoption(flag, action="store", default=None, dest=f"flowpost_{name}", help=help_text)
        parser.addini(f"flowpost_{name}", help=help_text, type=_ini_type(parse), default=None)


def _resolve(config: pytest.Config) -> Settings:
    values: dict[str, Any] = {}
    for name, flag, parse, _ in _OPTIONS:
        ini = f"flowpost_{name}"
        raw = config.getoption(ini, default=None)
        source = flag
        if raw is None:
            source = f"ini key {ini}"
            try:
                raw = config.getini(ini)
            except (ValueError, TypeError) as exc:
                raise pytest.UsageError(f"{source}: expected {_EXPECTED[parse]} ({exc})") from None
        if raw is None or (isinstance(raw, str) and raw.strip() == ""):
            continue
        try:
            values[name] = parse(str(raw).strip())
        except ValueError:
            raise pytest.UsageError(f"{source}: expected {_EXPECTED[parse]}; got {raw!r}") from None
    settings = Settings(**values)
    if settings.sbc_bins < _MIN_BINS:
        raise pytest.UsageError(
            f"--flowpost-sbc-bins (or ini flowpost_sbc_bins): expected at least {_MIN_BINS} bins; "
            f"got {settings.sbc_bins}"
        )
    if settings.sbc_datasets < settings.sbc_bins:
        raise pytest.UsageError(
            f"--flowpost-sbc-datasets (or ini flowpost_sbc_datasets): expected at least as many "
            f"datasets as bins ({settings.sbc_bins}); got {settings.sbc_datasets}"
        )
    return settings


def pytest_configure(config: pytest.Config) -> None:
    config.stash[_SETTINGS_KEY] = _resolve(config)


def pytest_report_header(config: pytest.Config) -> list[str] | None:
    if config.option.verbose <= 0 or _SETTINGS_KEY not in config.stash:
        return None
    s = config.stash[_SETTINGS_KEY]
    return [
        f"flowpost test kit: seed {s.seed}, score tolerance {s.score_tol:g} at {s.score_points} points, "
        f"SBC {s.sbc_datasets} datasets x {s.sbc_steps} steps in {s.sbc_bins} bins (alpha {s.sbc_alpha:g}), "
        f"moments within {s.moment_z:g} standard errors"
    ]


def _settings(request: pytest.FixtureRequest) -> Settings:
    config = request.config
    if _SETTINGS_KEY not in config.stash:  # pragma: no cover - configure always runs first
        config.stash[_SETTINGS_KEY] = _resolve(config)
    return config.stash[_SETTINGS_KEY]


# ----------------------------------------------------------------------------- helpers given to tests
class ScoreCheck:
    """Callable score check with the session's tolerance, number of points and key (fixture
    ``fp_score_check``).

    ``check(log_p, region=None, *, data=None, tolerance=None, step=1e-5, atol=None,
    compiled=True, check=True, **where)``: arguments as in
    :func:`flowpost.testing.score_agreement`. The region is a
    :class:`~flowpost.testing.Region` or its fields as keywords (``around=`` /
    ``sampler=``, ``scale=``, ``num_points=``, ``key=``); a region that leaves
    ``num_points`` or ``key`` unset gets the session's (``--flowpost-score-points``,
    ``fp_key``), and ``tolerance=None`` takes ``--flowpost-score-tol``.
    """

    def __init__(self, tolerance: float, num_points: int, key: jax.Array):
        from .._validate import integer, positive

        self.tolerance = positive("tolerance", tolerance)
        self.num_points = integer("num_points", num_points, minimum=1)
        self.key = key

    def __call__(
        self,
        log_p: Callable[..., Any],
        region: Region | None = None,
        *,
        data: Any = None,
        tolerance: float | None = None,
        step: float = 1e-5,
        atol: float | None = None,
        compiled: bool = True,
        check: bool = True,
        **where: Any,
    ) -> ScoreAgreement:
        from .checks import assert_score_matches, score_agreement
        from .region import Region

        region = Region.from_keywords(where, region=region, caller="fp_score_check")
        region = region.with_defaults(num_points=self.num_points, key=self.key)
        kwargs = dict(data=data, step=step, atol=atol, compiled=compiled)
        if not check:
            return score_agreement(log_p, region, **kwargs)
        return assert_score_matches(
            log_p, region, tolerance=self.tolerance if tolerance is None else tolerance, **kwargs
        )


class HealthCheck:
    """Callable health checks with the session's key (fixture ``fp_health_check``).

    ``check(log_p, region=None, *, data=None, exchangeable=False, check=True, **where)``:
    arguments as in :func:`flowpost.testing.check_health`. The region is a
    :class:`~flowpost.testing.Region` or its fields as keywords (``around=`` /
    ``sampler=``, ``scale=``, ``num_points=`` (default 16), ``key=``); a region that leaves
    ``key`` unset gets the session's (``fp_key``).
    """

    def __init__(self, key: jax.Array):
        self.key = key

    def __call__(
        self,
        log_p: Callable[..., Any],
        region: Region | None = None,
        *,
        data: Any = None,
        exchangeable: bool = False,
        check: bool = True,
        **where: Any,
    ) -> HealthReport:
        from .checks import check_health
        from .region import Region

        region = Region.from_keywords(where, region=region, caller="fp_health_check")
        report = check_health(log_p, region.with_defaults(key=self.key), data=data, exchangeable=exchangeable)
        if check:
            report.assert_passed()
        return report


def describe_rank_shape(counts: Any) -> str:
    """A reading of one rank histogram in words: U shape, hump, slope, or none of these.

    With ``M`` ranks in ``B`` bins (expected ``e = M / B`` per bin), the *slope* is
    ``(upper half - lower half) / M`` and the *edge excess* is
    ``(first + last - 2 e) / M``; the larger of the two in size names the shape. Ranks count
    the draws below the true value, so high ranks mean draws below the truth.
    """
    import numpy as np

    c = np.asarray(counts, dtype=float)
    m, b = c.sum(), c.size
    if m <= 0 or b < 2:
        return "no ranks"
    half = b // 2
    slope = (c[b - half :].sum() - c[:half].sum()) / m
    edges = (c[0] + c[-1] - 2 * m / b) / m if b >= 3 else 0.0
    if abs(edges) >= abs(slope):
        if edges > 0:
            return (
                "U shape: the true values fall in the tails of the draws too often, so the draws "
                "are too narrow (overconfident), e.g. a simulator noisier than the likelihood assumes"
            )
        return (
            "hump: the true values sit in the middle of the draws too often, so the draws are "
            "too wide (underconfident), e.g. a simulator less noisy than the likelihood assumes"
        )
    if slope > 0:
        return "slope up to high ranks: the draws tend to lie below the true values (biased low)"
    return "slope down to low ranks: the draws tend to lie above the true values (biased high)"


class CalibrationRun:
    """Simulation-based calibration with the session's small defaults (fixture ``fp_sbc``).

    ``run(log_p, prior_draw, simulate, stepper, init, *, support=None, n_datasets=None,
    steps=None, bins=None, alpha=None, batch=25, key=None, check=True)``: arguments as in
    :func:`flowpost.testing.calibrate`; ``None`` takes the session's value. With
    ``check=True`` an element whose p-value is below ``alpha`` (or runs that ended with
    non-finite particles) raise ``AssertionError``.

    Attributes
    ----------
    n_datasets, steps, bins : int
    alpha : float
    draws : int
        ``10 * bins - 1`` particles: ``draws + 1`` rank values fall evenly into the bins.
    """

    def __init__(self, n_datasets: int, steps: int, bins: int, alpha: float, key: jax.Array):
        from .._validate import integer, open_unit

        self.n_datasets = integer("n_datasets", n_datasets, minimum=1)
        self.steps = integer("steps", steps, minimum=1)
        self.bins = integer("bins", bins, minimum=_MIN_BINS)
        self.alpha = open_unit("alpha", alpha)
        self.key = key

    @property
    def draws(self) -> int:
        return 10 * self.bins - 1

    def tile(self, point: Any, n: int | None = None) -> Any:
        """``init`` with ``n`` (default :attr:`draws`) copies of one point (a pytree without
        the particle axis), every leaf as a float array of shape ``(n, *leaf.shape)``."""
        import jax
        import jax.numpy as jnp

        from .._validate import integer

        n = self.draws if n is None else integer("n", n, minimum=1)

        def rep(leaf):
            arr = jnp.asarray(leaf)
            if not jnp.issubdtype(arr.dtype, jnp.floating):
                arr = arr.astype(jnp.result_type(float))
            return jnp.broadcast_to(arr, (n, *arr.shape))

        return jax.tree_util.tree_map(rep, point)

    def __call__(
        self,
        log_p: Callable[..., Any],
        prior_draw: Callable[[jax.Array], Any],
        simulate: Callable[[jax.Array, Any], Any],
        stepper: Stepper,
        init: Any,
        *,
        support: Any = None,
        n_datasets: int | None = None,
        steps: int | None = None,
        bins: int | None = None,
        alpha: float | None = None,
        batch: int = 25,
        key: jax.Array | None = None,
        check: bool = True,
    ) -> CalibrationReport:
        from .._validate import open_unit
        from .calibration import calibrate

        alpha = self.alpha if alpha is None else open_unit("alpha", alpha)
        report = calibrate(
            log_p,
            prior_draw,
            simulate,
            stepper,
            init,
            key=self.key if key is None else key,
            n_datasets=self.n_datasets if n_datasets is None else n_datasets,
            steps=self.steps if steps is None else steps,
            bins=self.bins if bins is None else bins,
            support=support,
            batch=batch,
        )
        if check and not report.passed(alpha):
            failing = [n for n, p in report.p_values.items() if not p >= alpha]
            lines = [f"simulation-based calibration failed (alpha {alpha:g}):"]
            for i, name in enumerate(report.names):
                if name in failing:
                    lines.append(
                        f"- {name}: p = {report.p_values[name]:.3g}, rank counts "
                        f"{report.counts[i].tolist()}; looks like a "
                        f"{describe_rank_shape(report.counts[i])}"
                    )
            if report.nonfinite_runs:
                lines.append(
                    f"- {report.nonfinite_runs} of {report.ranks.shape[0]} runs ended with "
                    "non-finite particles (step size too large, or log_p not finite)"
                )
            lines.append(str(report))
            raise AssertionError("\n".join(lines))
        return report


class MomentCheck:
    """Moment assertions with the session's threshold (fixture ``fp_moments``).

    ``check(draws, mean, cov=None, *, n_eff=None, threshold=None,
    variance_error="empirical", names=None, check=True)``: arguments as in
    :func:`flowpost.testing.assert_moments_match`; ``draws`` may be a flowpost ``Result``.
    """

    def __init__(self, threshold: float):
        from .._validate import positive

        self.threshold = positive("threshold", threshold)

    @staticmethod
    def _draws(draws):
        """A run's result gives its particles; anything else is taken as the draws."""
        from ..engine import Result

        return draws.particles if isinstance(draws, Result) else draws

    def __call__(
        self,
        draws: Any,
        mean: Any,
        cov: Any = None,
        *,
        n_eff: Any = None,
        threshold: float | None = None,
        variance_error: str = "empirical",
        names: Any = None,
        check: bool = True,
    ) -> MomentZScores:
        from .moments import assert_moments_match, moment_zscores

        draws = self._draws(draws)
        if not check:
            return moment_zscores(draws, mean, cov, n_eff=n_eff, variance_error=variance_error, names=names)
        return assert_moments_match(
            draws,
            mean,
            cov,
            threshold=self.threshold if threshold is None else threshold,
            n_eff=n_eff,
            variance_error=variance_error,
            names=names,
        )

    def against(self, model: ClosedFormModel, data: Any, draws: Any, **kwargs: Any) -> MomentZScores:
        """Compare ``draws`` with the closed-form posterior mean and covariance of ``model``
        (a :class:`flowpost.testing.ClosedFormModel`) given ``data``; keywords as for a call."""
        if not (hasattr(model, "posterior_mean") and hasattr(model, "posterior_cov")):
            raise TypeError(
                f"model: expected a closed-form family instance with posterior_mean and "
                f"posterior_cov (see flowpost.testing.CLOSED_FORM_MODELS); got {type(model).__name__}"
            )
        return self(draws, model.posterior_mean(data), model.posterior_cov(data), **kwargs)


class ReferenceFamilies(tuple):
    """The closed-form families as a tuple of classes, also reachable by class name."""

    def __getattr__(self, name: str):
        for cls in self:
            if cls.__name__ == name:
                return cls
        known = ", ".join(c.__name__ for c in self)
        raise AttributeError(f"no closed-form family named {name!r}; known: {known}")


# ----------------------------------------------------------------------------- fixtures
@pytest.fixture
def fp_key(request: pytest.FixtureRequest):
    """A fixed PRNG key, ``jax.random.key(--flowpost-seed)`` (default seed 0)."""
    import jax

    return jax.random.key(_settings(request).seed)


@pytest.fixture
def fp_score_check(request: pytest.FixtureRequest, fp_key) -> ScoreCheck:
    """Score check: autodiff against float64 finite differences, tolerance from
    ``--flowpost-score-tol`` (default 1e-4). See :class:`ScoreCheck`."""
    s = _settings(request)
    return ScoreCheck(s.score_tol, s.score_points, fp_key)


@pytest.fixture
def fp_health_check(fp_key) -> HealthCheck:
    """Health checks of a log-density (scalar, finite, jit, vmap, deterministic, exchangeable
    rows). See :class:`HealthCheck`."""
    return HealthCheck(fp_key)


@pytest.fixture
def fp_sbc(request: pytest.FixtureRequest, fp_key) -> CalibrationRun:
    """Simulation-based calibration with small CI defaults (``--flowpost-sbc-datasets``,
    ``--flowpost-sbc-steps``, ``--flowpost-sbc-bins``, ``--flowpost-sbc-alpha``); returns the
    report. See :class:`CalibrationRun`."""
    s = _settings(request)
    return CalibrationRun(s.sbc_datasets, s.sbc_steps, s.sbc_bins, s.sbc_alpha, fp_key)


@pytest.fixture
def fp_moments(request: pytest.FixtureRequest) -> MomentCheck:
    """Moment assertions in Monte-Carlo standard errors, threshold from
    ``--flowpost-moment-z`` (default 4.5). See :class:`MomentCheck`."""
    return MomentCheck(_settings(request).moment_z)


@pytest.fixture
def fp_reference_families() -> ReferenceFamilies:
    """The closed-form families (``flowpost.testing.CLOSED_FORM_MODELS``), also by class name."""
    from .references import CLOSED_FORM_MODELS

    return ReferenceFamilies(CLOSED_FORM_MODELS)


@pytest.fixture
def fp_each_reference_model(request: pytest.FixtureRequest):
    """Parametrised over the closed-form families: an instance with default hyper-parameters."""
    return request.param()


def pytest_generate_tests(metafunc: pytest.Metafunc) -> None:
    if "fp_each_reference_model" in metafunc.fixturenames:
        from .references import CLOSED_FORM_MODELS

        metafunc.parametrize(
            "fp_each_reference_model",
            list(CLOSED_FORM_MODELS),
            indirect=True,
            ids=[cls.__name__ for cls in CLOSED_FORM_MODELS],
        )
