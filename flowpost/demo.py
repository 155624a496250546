"""Embedded demo: how fast does a studio kiln cool?

An invented scenario. A pottery studio logs its kiln's temperature every 20 minutes for
eight hours after switching it off at 1000 degrees C. The law of cooling says the
temperature relaxes exponentially towards the room's ambient temperature,

    T(t) = T_room + (T_0 - T_room) * exp(-k t),

with cooling-rate constant ``k`` (per hour, positive). The thermocouple reads with Gaussian
noise of scale ``sigma`` (positive). We estimate ``k``, ``T_room`` and ``sigma`` from the log,
with weakly informative priors:

    log k ~ N(log 0.3, 1),   T_room ~ N(20, 15^2),   sigma ~ Gamma(2, scale=5).

The log itself is generated here with a fixed seed (true k = 0.42 / h, T_room = 24 C,
sigma = 6 C), so the demo needs no files.
"""

from __future__ import annotations

import os
import sys
from typing import Any

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np

T0 = 1000.0
TRUE = {"k": 0.42, "room": 24.0, "sigma": 6.0}


def kiln_log(seed: int = 2024, hours: float = 8.0, every_minutes: float = 20.0) -> tuple[np.ndarray, np.ndarray]:
    """Generated temperature log: times (h) and readings (C)."""
    rng = np.random.default_rng(seed)
    t = np.arange(every_minutes / 60, hours + 1e-9, every_minutes / 60)
    temp = TRUE["room"] + (T0 - TRUE["room"]) * np.exp(-TRUE["k"] * t)
    return t.astype(np.float32), (temp + rng.normal(0, TRUE["sigma"], t.shape)).astype(np.float32)


def cooling_log_p(theta: dict[str, jax.Array], data: tuple[jax.Array, jax.Array]) -> jax.Array:
    """Log posterior of the cooling model (up to a constant)."""
    t, temp = data
    k, room, sigma = theta["k"], theta["room"], theta["sigma"]
    mean = room + (T0 - room) * jnp.exp(-k * t)
    log_lik = jnp.sum(jst.norm.logpdf(temp, mean, sigma))
    # log-normal prior on k written as a normal on log k plus the density's 1/k factor
    log_prior = (
        jst.norm.logpdf(jnp.log(k), jnp.log(0.3), 1.0)
        - jnp.log(k)
        + jst.norm.logpdf(room, 20.0, 15.0)
        + jst.gamma.logpdf(sigma, 2.0, scale=5.0)
    )
    return log_lik + log_prior


def main(argv: list[str] | None = None) -> int:
    import flowpost as fp

    argv = list(sys.argv[1:] if argv is None else argv)
    out_png = argv[0] if argv else "kiln_fit.png"
    t, temp = kiln_log()
    target = fp.Target(
        cooling_log_p, data=(jnp.asarray(t), jnp.asarray(temp)), support={"k": fp.Positive(), "sigma": fp.Positive()}
    )
    n = 400
    # start at the prior's centre with a small jitter: the ensemble-preconditioned flow needs
    # spread in every direction to move (a constant start would never leave it), and grows
    # its spread to the posterior's by itself; a start much wider than the posterior would
    # make its first steps too large in the narrow directions
    kk, kr, ks = jax.random.split(jax.random.key(1), 3)
    init = {
        "k": 0.3 * jnp.exp(1e-3 * jax.random.normal(kk, (n,))),
        "room": 20.0 + 1e-2 * jax.random.normal(kr, (n,)),
        "sigma": 10.0 * jnp.exp(1e-3 * jax.random.normal(ks, (n,))),
    }
    # affine-invariant ensemble Langevin: the three parameters live on very different scales
    # (k is pinned to about 1%, the room temperature only to a few degrees)
    stepper = fp.EnsembleLangevin(step_size=0.05)
    print(f"Kiln cooling log: {len(t)} readings over {t[-1]:.1f} h. Fitting with {stepper!r}, {n} particles.")
    result = fp.run(target, stepper, init, key=jax.random.key(0), steps=3000, window=250, progress=True)
    print()
    print(result.summary())
    print("\nMonitor trace (one row per window of 250 steps):")
    recorded = result.history.keys()  # a list of column names (iterating a History yields its rows)
    names = [
        k for k in ("step", "mean_logp", "centre_drift", "spread_drift", "ksd", "accept", "grad_evals") if k in recorded
    ]
    print(result.history.table(names))
    print(f"\nTrue values used to generate the log: k = {TRUE['k']}, room = {TRUE['room']}, sigma = {TRUE['sigma']}")
    _plot(result, t, temp, out_png)
    return 0 if result.ok else 1


def draw_fit(ax: Any, particles: dict[str, Any], t: np.ndarray, temp: np.ndarray) -> None:
    """Draw the fitted cooling curves on a matplotlib ``ax``: the 90 % band and the median of
    ``room + (T0 - room) exp(-k t)`` across the particles, and the kiln log's readings."""
    grid = np.linspace(0, float(t[-1]), 200)
    room, k = np.asarray(particles["room"])[:, None], np.asarray(particles["k"])[:, None]
    curves = room + (T0 - room) * np.exp(-k * grid)
    lo, mid, hi = np.quantile(curves, [0.05, 0.5, 0.95], axis=0)
    ax.fill_between(grid, lo, hi, alpha=0.3, label="90% band of the fitted curve")
    ax.plot(grid, mid, label="posterior median curve")
    ax.scatter(t, temp, s=10, color="k", label="kiln log")
    ax.set_xlabel("hours since switch-off")
    ax.set_ylabel("temperature (C)")
    ax.legend()


def _plot(result, t, temp, path):
    from .engine import atomic_write

    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        print("(matplotlib not installed: no plot; pip install 'flowpost[plot]')")
        return
    fig, ax = plt.subplots(figsize=(6, 4))
    draw_fit(ax, result.particles, t, temp)
    fig.tight_layout()
    kind = os.path.splitext(path)[1].lstrip(".").lower() or "png"
    atomic_write(path, lambda fh: fig.savefig(fh, format=kind, dpi=100))  # a temporary, renamed
    plt.close(fig)
    print(f"Plot of the fit saved to {os.path.abspath(path)}")
    run_path = os.path.splitext(path)[0] + "_run.png"
    fig = result.plot(params=["k", "room", "sigma"], pair=("k", "room"))
    atomic_write(run_path, lambda fh: fig.savefig(fh, format="png", dpi=80))
    plt.close(fig)
    print(f"Picture of the run (monitor curves, marginals) saved to {os.path.abspath(run_path)}")
