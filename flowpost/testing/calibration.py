"""Simulation-based calibration (SBC) of a model and a stepper.

"Validating Bayesian inference algorithms with simulation-based calibration" (2018): if
``theta* ~ prior``, ``y ~ p(y | theta*)`` and ``theta_1..theta_L`` are draws from the
posterior ``p(theta | y)``, then the rank of ``theta*`` among the draws,

    r = #{ l : theta_l < theta* }  in {0, ..., L},

is uniformly distributed on ``{0, ..., L}`` (for every scalar function of theta; here each
constrained element). A simulator that disagrees with the likelihood, a wrong score, or an
inaccurate stepper shows up as non-uniform ranks: a U shape (posteriors too narrow), a hump
(too wide), a slope (biased).

Here the L draws are the particles of one ensemble run per simulated dataset. The M runs
are batched: the whole flow for one dataset is a pure function (:func:`flowpost.evolve`)
which is ``vmap``-ped over datasets in chunks of ``batch`` (``lax.map`` with a batch size), so
a useful SBC (a few hundred datasets, a hundred particles each) compiles once and runs in
minutes on two cores. Uniformity of the binned ranks is tested per element with Pearson's
chi-square test from ``scipy.stats.chisquare``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from functools import partial
from typing import TYPE_CHECKING, Any

import jax
import jax.numpy as jnp
import numpy as np
import scipy.stats

from .._validate import callable_value, integer, prng_key
from ..engine._driver import evolve
from ..model._target import Target
from ..steppers.base import Stepper, check_stepper

if TYPE_CHECKING:  # pragma: no cover - matplotlib is optional
    from matplotlib.figure import Figure

__all__ = ["CalibrationReport", "calibrate"]


@partial(jax.jit, static_argnames=("steps", "batch"))
def _ranks(stepper, controller, steps, batch, template, x0, datas, truths, keys):
    """Ranks of the true values among each dataset's final particles, all datasets in one
    compiled function (``lax.map`` over chunks of ``batch`` vmapped datasets); compiled once
    per (stepper structure, controller structure, steps, batch, model, shapes): the stepper's
    and controller's numbers are traced."""
    target_def = jax.tree_util.tree_structure(template)

    def one(args):
        data, truth, k = args
        tgt = jax.tree_util.tree_unflatten(target_def, jax.tree_util.tree_leaves(data))
        state = evolve(stepper, tgt, x0, k, steps, controller)
        draws = tgt.constrained_matrix(state.x)
        return jnp.sum(draws < truth[None, :], axis=0), jnp.all(jnp.isfinite(draws))

    return jax.lax.map(one, (datas, truths, keys), batch_size=batch)


@dataclass
class CalibrationReport:
    """Ranks, their histograms and the uniformity test per constrained element.

    Attributes
    ----------
    names : list of str
        Element names (``"mu"``, ``"w[1]"``...).
    ranks : ndarray (M, k)
        Rank of the true value among the L particles, per dataset and element.
    counts : ndarray (k, bins)
        Histogram of the ranks, ``bins`` equal groups of ``(L + 1) / bins`` rank values.
    p_values : dict
        Pearson chi-square p-value for uniform counts, per element.
    n_draws : int
        L, the particles per dataset.
    """

    names: list[str]
    ranks: np.ndarray
    counts: np.ndarray
    p_values: dict[str, float]
    n_draws: int
    nonfinite_runs: int = 0
    notes: list[str] = field(default_factory=list)

    def passed(self, alpha: float = 0.01) -> bool:
        """True when no element's p-value is below ``alpha`` (no Bonferroni correction; pass a
        smaller ``alpha`` for many elements)."""
        return all(p >= alpha for p in self.p_values.values()) and self.nonfinite_runs == 0

    def worst(self) -> tuple[str, float]:
        name = min(self.p_values, key=lambda k: self.p_values[k])
        return name, self.p_values[name]

    def __str__(self):
        lines = [
            f"simulation-based calibration: {self.ranks.shape[0]} datasets, {self.n_draws} draws each, "
            f"{self.counts.shape[1]} bins"
        ]
        for i, n in enumerate(self.names):
            lines.append(f"  {n:<14} p = {self.p_values[n]:.4f}   counts {self.counts[i].tolist()}")
        if self.nonfinite_runs:
            lines.append(f"  {self.nonfinite_runs} runs ended with non-finite particles (excluded)")
        return "\n".join(lines)

    def plot(self) -> Figure:
        """Rank histograms with the 99% band of a uniform histogram (binomial quantiles);
        needs matplotlib."""
        import matplotlib.pyplot as plt

        k, bins = self.counts.shape
        m = self.counts.sum(axis=1)[0] if k else 0
        fig, axes = plt.subplots(1, k, figsize=(3 * k, 2.6), squeeze=False)
        lo, hi = scipy.stats.binom.ppf([0.005, 0.995], m, 1 / bins)
        for ax, name, c in zip(axes[0], self.names, self.counts):
            ax.axhspan(lo, hi, color="grey", alpha=0.3)
            ax.bar(np.arange(bins), c, width=0.9)
            ax.set_title(f"{name} (p={self.p_values[name]:.3f})", fontsize=9)
            ax.set_xlabel("rank bin")
        fig.tight_layout()
        return fig


def calibrate(
    log_p: Callable[..., Any],
    prior_draw: Callable[[jax.Array], Any],
    simulate: Callable[[jax.Array, Any], Any],
    stepper: Stepper,
    init: Any,
    *,
    key: jax.Array,
    n_datasets: int = 200,
    steps: int = 500,
    bins: int = 10,
    support: Any = None,
    batch: int = 16,
) -> CalibrationReport:
    """Run simulation-based calibration.

    Parameters
    ----------
    log_p : callable
        ``log_p(theta, data)``, the model's log posterior density as in :class:`flowpost.Target`.
    prior_draw : callable
        ``prior_draw(key) -> theta``: one draw from the prior, written in JAX (it is vmapped).
    simulate : callable
        ``simulate(key, theta) -> data``: one dataset from the model, written in JAX.
    stepper : stepper
        The stepper under test (e.g. ``flowpost.MALA(step_size=0.1)``).
    init : pytree
        Starting particles (leading axis L, the number of draws), the same for every dataset.
        ``L + 1`` must be divisible by ``bins``.
    key : PRNG key
    n_datasets : int
        M, the number of simulated datasets.
    steps : int
        Steps of the flow per dataset.
    bins : int
        Rank bins for the chi-square test; ``M / bins`` should be at least 5.
    support : optional
        Constraints, as for :class:`flowpost.Target`.
    batch : int
        Datasets advanced together in one vmapped chunk (memory grows with it).

    Returns
    -------
    CalibrationReport
    """
    check_stepper(stepper)
    callable_value("log_p", log_p, "a callable log_p(theta, data)", nargs=2)
    callable_value("prior_draw", prior_draw, "a callable prior_draw(key) -> theta", nargs=1)
    callable_value("simulate", simulate, "a callable simulate(key, theta) -> data", nargs=2)
    prng_key("key", key)
    n_datasets = integer("n_datasets", n_datasets, minimum=1)
    steps = integer("steps", steps, minimum=0)
    bins = integer("bins", bins, minimum=2)
    batch = integer("batch", batch, minimum=1)
    if n_datasets < bins:
        raise ValueError(f"n_datasets: expected at least as many datasets as bins ({bins}); got {n_datasets}")
    k_prior, k_data, k_run = jax.random.split(key, 3)
    thetas = jax.vmap(prior_draw)(jax.random.split(k_prior, n_datasets))
    datas = jax.vmap(simulate)(jax.random.split(k_data, n_datasets), thetas)

    example = jax.tree_util.tree_map(lambda a: a[0], datas)
    bound, x0 = Target(log_p, data=example, support=support).bind(init)
    n_draws = int(x0.shape[0])
    if (n_draws + 1) % bins:
        raise ValueError(
            f"init: expected a number of particles L with L + 1 divisible by bins = {bins} "
            f"(e.g. L = {bins * max(1, (n_draws + 1) // bins) - 1}); got L = {n_draws}"
        )
    layout = bound.bound_layout()
    true_mat = jax.vmap(lambda th: jnp.concatenate([jnp.reshape(l, (-1,)) for l in layout.treedef.flatten_up_to(th)]))(
        thetas
    )
    run_keys = jax.random.split(k_run, n_datasets)
    controller = stepper.default_controller()
    ranks, finite = _ranks(stepper, controller, steps, int(batch), bound, x0, datas, true_mat, run_keys)
    ranks, finite = np.asarray(ranks), np.asarray(finite)
    names = layout.element_names()
    ok = ranks[finite]
    width = (n_draws + 1) // bins
    counts = (
        np.stack([np.bincount(ok[:, j] // width, minlength=bins) for j in range(ranks.shape[1])])
        if ok.size
        else np.zeros((len(names), bins), int)
    )
    p_values = {
        n: float(scipy.stats.chisquare(counts[j]).pvalue) if ok.shape[0] else float("nan") for j, n in enumerate(names)
    }
    return CalibrationReport(
        names=names, ranks=ranks, counts=counts, p_values=p_values, n_draws=n_draws, nonfinite_runs=int((~finite).sum())
    )
