"""Tests of the pytest plugin (flowpost.testing.plugin): generated test files that use the
fixtures are run by pytest's own ``pytester`` and their outcomes checked.

The main run goes through ``runpytest_subprocess`` (a fresh interpreter, as a user's CI would
start it); the others run in-process, which saves the interpreter start (seconds with JAX).
In-process runs are safe here because every JAX module they touch was imported already by
this file's import of the plugin: pytester removes modules first imported during an
in-process run when it ends. The
plugin is found through the ``pytest11`` entry point of the installed package, as in a user's
project: nothing is registered by hand.
"""

from __future__ import annotations

import textwrap

# The in-process runs below (pytester) restore sys.modules after each run; a compiled
# extension such as jaxlib must not be dropped and imported again (the process aborts), so
# everything the fixtures import is imported here first, outside the runs. flowpost's public
# names are lazy (PEP 562), so the plugin alone would not have imported them.
import jax  # noqa: F401
import pytest

import flowpost.steppers
import flowpost.testing.calibration
import flowpost.testing.checks
import flowpost.testing.moments
import flowpost.testing.references
import flowpost.testing.region  # noqa: F401
from flowpost.testing.plugin import describe_rank_shape

pytest_plugins = ["pytester"]

SUBPROCESS_TIMEOUT = 240  # seconds; the runs take a few seconds, this is only a guard

# A tiny user test file. The model is the normal mean with known unit noise and a N(0, 1)
# prior; its planted bugs (a custom derivative rule with a factor 2, a dropped first row, a
# simulator shifted by +3) must each be reported by the matching fixture.
USER_TESTS = """
import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np

import flowpost as fp

DATA = {"y": jnp.array([0.4, -0.2, 1.1, 0.3, 0.8, -0.5, 0.6, 0.2])}


def log_p(theta, data):
    return jst.norm.logpdf(theta["m"]) + jnp.sum(jst.norm.logpdf(data["y"], theta["m"], 1.0))


@jax.custom_jvp
def half_square(x):
    return 0.5 * x ** 2


@half_square.defjvp
def _half_square_jvp(primals, tangents):
    (x,), (dx,) = primals, tangents
    return half_square(x), 2.0 * x * dx  # planted bug: the derivative of x^2 / 2 is x


def log_p_wrong_gradient(theta, data):
    return -half_square(theta["m"]) + jnp.sum(jst.norm.logpdf(data["y"], theta["m"], 1.0))


def log_p_dropping_first_row(theta, data):
    return log_p(theta, {"y": data["y"][1:]})


def prior_draw(key):
    return {"m": jax.random.normal(key)}


def simulate(key, theta):
    return {"y": theta["m"] + jax.random.normal(key, (8,))}


def simulate_shifted(key, theta):
    return {"y": theta["m"] + 3.0 + jax.random.normal(key, (8,))}  # planted: data 3 too high


def test_score_correct(fp_score_check):
    report = fp_score_check(log_p, data=DATA, around={"m": 0.3})
    assert report.worst_error < 1e-6


def test_score_wrong(fp_score_check):
    fp_score_check(log_p_wrong_gradient, data=DATA, around={"m": 0.3})


def test_health_correct(fp_health_check):
    fp_health_check(log_p, data=DATA, around={"m": 0.3}, exchangeable=True)


def test_health_rows(fp_health_check):
    fp_health_check(log_p_dropping_first_row, data=DATA, around={"m": 0.3}, exchangeable=True)


def test_sbc_correct(fp_sbc):
    # posterior variance 1 / 9; Langevin h = 0.01, 300 steps = 27 relaxation times
    report = fp_sbc(log_p, prior_draw, simulate, fp.Langevin(step_size=0.01),
                    fp_sbc.tile({"m": 0.0}), steps=300)
    assert report.ranks.shape == (fp_sbc.n_datasets, 1)


def test_sbc_shifted(fp_sbc):
    fp_sbc(log_p, prior_draw, simulate_shifted, fp.Langevin(step_size=0.01),
           fp_sbc.tile({"m": 0.0}), steps=300)


def test_moments(fp_moments, fp_reference_families, fp_key):
    model = fp_reference_families.NormalKnownVariance()
    draws = model.draw_posterior(fp_key, {"y": DATA["y"]}, num=2000)
    fp_moments.against(model, {"y": DATA["y"]}, draws)


def test_moments_wrong(fp_moments, fp_reference_families, fp_key):
    model = fp_reference_families.NormalKnownVariance()
    draws = model.draw_posterior(fp_key, {"y": DATA["y"]}, num=2000)
    fp_moments.against(model, {"y": 2.0 * DATA["y"]}, draws)  # the reference of other data
"""


@pytest.fixture
def autoload(monkeypatch):
    # the plugin must be found through its entry point, as in a user's project
    monkeypatch.delenv("PYTEST_DISABLE_PLUGIN_AUTOLOAD", raising=False)


@pytest.mark.slow
def test_fixtures_on_a_user_file(pytester, autoload):
    pytester.makepyfile(test_user=USER_TESTS)
    # 20 datasets in 4 bins (39 draws each) keep the calibration runs to a second or two
    result = pytester.runpytest_subprocess(
        "-p",
        "no:cacheprovider",
        "--flowpost-sbc-datasets=20",
        "--flowpost-sbc-bins=4",
        timeout=SUBPROCESS_TIMEOUT,
    )
    result.assert_outcomes(passed=4, failed=4)
    result.stdout.fnmatch_lines(
        [
            "*AssertionError: score of log_p disagrees with finite differences: parameter 'm'*",
            "*AssertionError: log_p failed health checks:*",
            "*AssertionError: simulation-based calibration failed (alpha 0.01):*",
            "*AssertionError: 1 ensemble moment(s) beyond 4.5 standard errors:*",
        ],
        consecutive=False,
    )
    out = result.stdout.str()
    assert "- exchangeable: log_p changes when the 8 data rows are permuted" in out
    # every simulated dataset lies 3 above its true mean: the draws sit above the truth, all
    # ranks are 0, the first bin holds all 20
    assert "- m: p = " in out and "rank counts [20, 0, 0, 0]" in out
    assert "slope down to low ranks: the draws tend to lie above the true values" in out
    assert "- mean of mu: ensemble" in out


def test_score_tolerance_option(pytester, autoload):
    """The planted factor-2 derivative has a relative error of at most 2 by construction (the
    error divides by the larger of the two gradients), so a tolerance of 10 lets it through:
    the command-line value reaches the check."""
    pytester.makepyfile(test_user=USER_TESTS)
    # in-process: the JAX modules this needs are loaded already (see the module docstring)
    result = pytester.runpytest_inprocess("-p", "no:cacheprovider", "-k", "score", "--flowpost-score-tol=10")
    result.assert_outcomes(passed=2)


REGION_TESTS = """
import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

from flowpost.testing import Region, score_agreement

DATA = {"y": jnp.array([0.4, -0.2, 1.1, 0.3, 0.8, -0.5, 0.6, 0.2])}


def log_p(theta, data):
    return jst.norm.logpdf(theta["m"]) + jnp.sum(jst.norm.logpdf(data["y"], theta["m"], 1.0))


def prior_draw(key):
    return {"m": jax.random.normal(key)}


def test_score_with_a_region(fp_score_check, fp_key):
    report = fp_score_check(log_p, Region.drawn(prior_draw), data=DATA)
    assert report.worst_error < 1e-6
    assert report.num_points == 3  # --flowpost-score-points=3: the session fills num_points
    # ... and the key: the same points as the region drawn with fp_key
    same = score_agreement(log_p, Region.drawn(prior_draw, num_points=3, key=fp_key), data=DATA)
    np.testing.assert_array_equal(report.point_errors, same.point_errors)
    assert fp_score_check(log_p, region=Region.near({"m": 0.3}, num_points=5), data=DATA).num_points == 5
    keywords = fp_score_check(log_p, data=DATA, around={"m": 0.3}, check=False)
    region = fp_score_check(log_p, region=Region.near({"m": 0.3}), data=DATA, check=False)
    assert keywords.worst_error == region.worst_error
    assert np.array_equal(keywords.point["m"], region.point["m"])


def test_health_with_a_region(fp_health_check):
    report = fp_health_check(log_p, region=Region.near({"m": 0.3}, scale=0.2), data=DATA,
                             exchangeable=True)
    assert report.passed


def test_region_and_keywords_refused(fp_score_check, fp_health_check):
    with pytest.raises(TypeError, match="^region, around: expected either region="):
        fp_score_check(log_p, Region.near({"m": 0.3}), data=DATA, around={"m": 0.3})
    with pytest.raises(TypeError, match="^fp_health_check: expected keywords .*'scal'"):
        fp_health_check(log_p, data=DATA, around={"m": 0.3}, scal=0.2)
"""


def test_fixtures_accept_a_region(pytester, autoload):
    pytester.makepyfile(test_region=REGION_TESTS)
    # in-process: the JAX modules this needs are loaded already (see the module docstring)
    result = pytester.runpytest_inprocess("-p", "no:cacheprovider", "--flowpost-score-points=3")
    result.assert_outcomes(passed=3)


SETTINGS_TESTS = """
import jax
import numpy as np


def test_values(fp_key, fp_score_check, fp_sbc, fp_moments):
    assert (fp_score_check.tolerance, fp_score_check.num_points) == ({tol}, {points})
    assert (fp_sbc.n_datasets, fp_sbc.steps) == ({datasets}, {steps})
    assert (fp_sbc.bins, fp_sbc.alpha) == ({bins}, {alpha})
    assert fp_sbc.draws == 10 * {bins} - 1
    assert fp_moments.threshold == {z}
    assert np.array_equal(jax.random.key_data(fp_key), jax.random.key_data(jax.random.key({seed})))
    assert jax.tree_util.tree_map(np.shape, fp_sbc.tile({{"a": 1.0, "b": np.zeros(3)}})) == \\
        {{"a": ({draws},), "b": ({draws}, 3)}}
"""


def _settings_file(**v) -> str:
    return SETTINGS_TESTS.format(draws=10 * v["bins"] - 1, **v)


def test_defaults(pytester, autoload):
    pytester.makepyfile(
        test_settings=_settings_file(tol=1e-4, points=16, datasets=100, steps=500, bins=5, alpha=0.01, z=4.5, seed=0)
    )
    pytester.runpytest_inprocess("-p", "no:cacheprovider").assert_outcomes(passed=1)


def test_command_line_beats_ini(pytester, autoload):
    pytester.makeini(
        textwrap.dedent("""
        [pytest]
        flowpost_score_tol = 0.25
        flowpost_sbc_steps = 77
        flowpost_moment_z = 3.5
        """)
    )
    pytester.makepyfile(
        test_settings=_settings_file(tol=0.5, points=3, datasets=20, steps=77, bins=4, alpha=0.05, z=3.5, seed=5)
    )
    result = pytester.runpytest_inprocess(
        "-p",
        "no:cacheprovider",
        "--flowpost-score-tol=0.5",
        "--flowpost-score-points=3",
        "--flowpost-sbc-datasets=20",
        "--flowpost-sbc-bins=4",
        "--flowpost-sbc-alpha=0.05",
        "--flowpost-seed=5",
    )
    result.assert_outcomes(passed=1)


@pytest.mark.parametrize(
    "args, message",
    [
        (["--flowpost-sbc-alpha=2"], "--flowpost-sbc-alpha: expected a number strictly between 0 and 1; got '2'"),
        (["--flowpost-score-tol=-1"], "--flowpost-score-tol: expected a finite positive number; got '-1'"),
        (["--flowpost-sbc-datasets=many"], "--flowpost-sbc-datasets: expected a positive integer; got 'many'"),
        (["--flowpost-sbc-bins=1"], "--flowpost-sbc-bins (or ini flowpost_sbc_bins): expected at least 2 bins; got 1"),
        (
            ["--flowpost-sbc-datasets=3", "--flowpost-sbc-bins=4"],
            "--flowpost-sbc-datasets (or ini "
            "flowpost_sbc_datasets): expected at least as many datasets as bins (4); got 3",
        ),
    ],
)
def test_bad_options_are_usage_errors(pytester, autoload, args, message):
    pytester.makepyfile(test_nothing="def test_nothing():\n    pass\n")
    result = pytester.runpytest_inprocess("-p", "no:cacheprovider", *args)
    assert result.ret == pytest.ExitCode.USAGE_ERROR
    assert message in result.stderr.str()


def test_bad_ini_value_names_the_key(pytester, autoload):
    pytester.makeini("[pytest]\nflowpost_moment_z = zero\n")
    pytester.makepyfile(test_nothing="def test_nothing():\n    pass\n")
    result = pytester.runpytest_inprocess("-p", "no:cacheprovider")
    assert result.ret == pytest.ExitCode.USAGE_ERROR
    assert "ini key flowpost_moment_z: expected a finite positive number" in result.stderr.str()


def test_fixture_listing_help_and_header(pytester, autoload):
    pytester.makepyfile(test_nothing="def test_nothing():\n    pass\n")
    listing = pytester.runpytest_inprocess("-p", "no:cacheprovider", "--fixtures").stdout.str()
    for name in (
        "fp_key",
        "fp_score_check",
        "fp_health_check",
        "fp_sbc",
        "fp_moments",
        "fp_reference_families",
        "fp_each_reference_model",
    ):
        assert name in listing
    usage = pytester.runpytest_inprocess("-p", "no:cacheprovider", "--help").stdout.str()
    assert "--flowpost-sbc-datasets" in usage and "flowpost_score_tol" in usage
    verbose = pytester.runpytest_inprocess("-p", "no:cacheprovider", "-v", "--flowpost-sbc-steps=9")
    verbose.stdout.fnmatch_lines(["flowpost test kit: seed 0, * SBC 100 datasets x 9 steps in 5 bins*"])


def test_each_reference_model_is_parametrised(pytester, autoload):
    pytester.makepyfile(
        test_families="""
def test_family(fp_each_reference_model, fp_reference_families):
    assert isinstance(fp_each_reference_model, tuple(fp_reference_families))
"""
    )
    result = pytester.runpytest_inprocess("-p", "no:cacheprovider", "-v")
    result.assert_outcomes(passed=5)
    result.stdout.fnmatch_lines(
        [
            "*test_family?NormalKnownVariance? PASSED*",
            "*test_family?BetaBinomial? PASSED*",
            "*test_family?GammaPoisson? PASSED*",
            "*test_family?DirichletMultinomial? PASSED*",
            "*test_family?LinearRegressionKnownNoise? PASSED*",
        ]
    )


def test_families_by_name(pytester, autoload):
    pytester.makepyfile(
        test_families="""
import pytest
from flowpost.testing import CLOSED_FORM_MODELS, GammaPoisson


def test_names(fp_reference_families):
    assert tuple(fp_reference_families) == CLOSED_FORM_MODELS
    assert fp_reference_families.GammaPoisson is GammaPoisson
    with pytest.raises(AttributeError, match="no closed-form family named 'Poisson'"):
        fp_reference_families.Poisson
"""
    )
    pytester.runpytest_inprocess("-p", "no:cacheprovider").assert_outcomes(passed=1)


@pytest.mark.parametrize(
    "counts, start",
    [
        ([30, 10, 8, 12, 40], "U shape"),  # ends heavy
        ([5, 25, 40, 22, 8], "hump"),  # middle heavy
        ([5, 10, 20, 25, 40], "slope up to high ranks"),
        ([40, 25, 20, 10, 5], "slope down to low ranks"),
    ],
)
def test_rank_shape_words(counts, start):
    # the readings given in "Validating Bayesian inference algorithms with simulation-based
    # calibration" (2018): U shape = draws too narrow, hump = too wide, slope = biased
    assert describe_rank_shape(counts).startswith(start)
