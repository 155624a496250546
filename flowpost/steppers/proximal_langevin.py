r"""Proximal Langevin for a smooth log-density plus a nonsmooth log-prior ``-g``.

The posterior is ``pi(x) ∝ exp(f(x) - g(x))``: ``f`` is the target's log-density (smooth: the
likelihood and any smooth prior terms), and ``g`` is given separately as a proximal term
from :mod:`flowpost.prox` (L1 / weighted L1 / group L1 penalties, the indicator of a box or
of the non-negative orthant, or a user map) whose proximal map
``prox_{lam g}(v) = argmin_x g(x) + |x - v|^2 / (2 lam)`` is known in closed form.

``variant="moreau"`` (default): Moreau-Yosida unadjusted Langevin. ``g`` is replaced by its
Moreau envelope ``g_lam(x) = min_y g(y) + |y - x|^2 / (2 lam)``, which is differentiable with
``grad g_lam(x) = (x - prox_{lam g}(x)) / lam`` and tends to ``g`` as ``lam -> 0``; the smoothed
density ``exp(f - g_lam)`` is sampled with unadjusted Langevin. With ``xi ~ N(0, I)``:

    x' = x + h grad f(x) - (h / lam) (x - prox_{lam g}(x)) + sqrt(2 h) xi.

``lam`` (``smoothing``) trades bias for stability: the stationary law targets
``exp(f - g_lam)``, whose distance to ``pi`` shrinks with ``lam`` (for ``g`` Lipschitz with
constant ``K``, ``0 <= g - g_lam <= lam K^2 / 2``), while the envelope's gradient has
Lipschitz constant ``1/lam``, so the explicit step needs roughly ``h < 2 / (L_f + 1/lam)``.
By default ``lam = h`` (a common choice, not a recommendation of the paper), which turns
the update into ``x' = prox_{h g}(x) + h grad f(x) + sqrt(2h) xi``.
Source: "Efficient Bayesian computation by proximal MCMC: when Langevin meets Moreau"
(SIAM J. Imaging Sci., 2018).

``variant="forward_prox"``: the plain forward-prox-noise splitting,
``x' = prox_{h g}(x + h grad f(x)) + sqrt(2 h) xi``. The stored ensemble is read right after
the proximal map (the same Markov chain, shifted by a sub-step: each step runs noise,
forward, prox), so every particle satisfies a constraint set exactly (a ``Box`` projection
keeps particles inside the box) and L1 maps produce exact zeros. Built as the
:class:`~flowpost.steppers.split.Split` scheme ``(HeatFlow(), Explicit(), Proximal(prox=g))``.
For an indicator ``g`` it is projected Langevin: "Finite-time analysis of projected
Langevin Monte Carlo" (NeurIPS 2015).

Both variants cost one score evaluation of ``f`` per step.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp

from ..prox import ProxTerm, UserProx
from .base import ParticleState, positive_number
from .split import Explicit, HeatFlow, Proximal, Split

__all__ = ["ProximalLangevin"]


@dataclass(frozen=True)
class ProximalLangevin:
    """Proximal (Moreau-Yosida) unadjusted Langevin; see the module docstring.

    Parameters
    ----------
    step_size : float
        Time step ``h``.
    prox : ProxTerm or callable
        The nonsmooth part ``g`` (``-log`` of the nonsmooth prior), e.g.
        ``flowpost.prox.L1Penalty(2.0)`` for a Laplace prior with rate 2, or
        ``flowpost.prox.Box(0.0, 1.0)`` for a constraint; a callable ``prox(v, h)`` for one
        point is wrapped in :class:`flowpost.prox.UserProx`.
    smoothing : float, optional
        Moreau-Yosida parameter ``lam > 0`` (``variant="moreau"`` only); default ``step_size``.
    variant : {"moreau", "forward_prox"}
        The smoothed explicit scheme or the forward-prox-noise splitting.
    """

    step_size: float = 1e-3
    prox: Any = None
    smoothing: float | None = None
    variant: str = "moreau"

    def __post_init__(self):
        _positive("step_size", self.step_size)
        if self.prox is None:
            raise ValueError(
                "prox: ProximalLangevin needs the nonsmooth part as a proximal term, e.g. "
                "flowpost.prox.L1Penalty(2.0) or flowpost.prox.Box(0.0, 1.0); got None"
            )
        if not isinstance(self.prox, ProxTerm):
            if callable(self.prox):
                object.__setattr__(self, "prox", UserProx(self.prox))
            else:
                raise TypeError(
                    "prox: expected a proximal term from flowpost.prox or a callable prox(v, h); "
                    f"got {type(self.prox).__name__}"
                )
        if self.variant not in ("moreau", "forward_prox"):
            raise ValueError(f"variant: expected 'moreau' or 'forward_prox'; got {self.variant!r}")
        if self.smoothing is not None:
            if self.variant != "moreau":
                raise ValueError("smoothing: only used with variant='moreau'")
            _positive("smoothing", self.smoothing)

    @property
    def lam(self) -> float:
        """The Moreau-Yosida parameter in use."""
        return float(self.step_size if self.smoothing is None else self.smoothing)

    @property
    def scheme(self) -> Split:
        """The :class:`Split` scheme of ``variant="forward_prox"``."""
        return Split((HeatFlow(), Explicit(), Proximal(prox=self.prox)), step_size=self.step_size, order="lie")

    def start(self, target, x, key):
        if self.variant == "forward_prox":
            return self.scheme.start(target, x, key)
        return ParticleState(x=x)

    def advance(self, target, state, key):
        if self.variant == "forward_prox":
            return self.scheme.advance(target, state, key)
        x = state.x
        h = jnp.asarray(self.step_size, x.dtype)
        lam = jnp.asarray(self.lam, x.dtype)
        drift = target.score(x) - (x - self.prox(x, lam)) / lam
        x_new = x + h * drift + jnp.sqrt(2 * h) * jax.random.normal(key, x.shape, x.dtype)
        return ParticleState(x=x_new), {"grad_evals": jnp.ones((), x.dtype)}


_positive = positive_number
