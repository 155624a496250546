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
:class:`~flowpost.steppers.Split` scheme ``(HeatFlow(), Explicit(), Proximal(prox=g))``.
For an indicator ``g`` it is projected Langevin: "Finite-time analysis of projected
Langevin Monte Carlo" (NeurIPS 2015).

Both variants cost one score evaluation of ``f`` per step, and both are splitting recipes:
``moreau`` is ``Split((MoreauDrift(prox, smoothing), HeatFlow()))``, ``forward_prox`` is
``Split((HeatFlow(), Explicit(), Proximal(prox=g)))``.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import jax
import jax.numpy as jnp

from .._pytree import pytree_dataclass, static, unchecked
from .._validate import choice, fail, positive
from ..numerics.prox import as_prox_term
from ._parts import Explicit, HeatFlow, PositionState, Proximal, _PositionPart
from ._split import Recipe, Split, compose

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = ["MoreauDrift", "ProximalLangevin"]


@pytree_dataclass
class MoreauDrift(_PositionPart):
    r"""Forward step on ``f - g_lam`` (``g_lam`` the Moreau envelope of a proximal term ``g``):

        x <- x + t [ grad f(x) - (x - prox_{lam g}(x)) / lam ],

    with ``lam = smoothing``, or ``lam = t`` (the time the part acts for) when ``smoothing``
    is ``None``. Source: "Efficient Bayesian computation by proximal MCMC: when Langevin meets
    Moreau" (SIAM J. Imaging Sci., 2018).
    """

    prox: Any = None
    smoothing: float | None = None
    fraction: float = 1.0

    stochastic = False
    reductions = {"grad_evals": "sum"}

    def __post_init__(self):
        object.__setattr__(self, "prox", as_prox_term("prox", self.prox))
        if self.smoothing is not None:
            object.__setattr__(self, "smoothing", positive("smoothing", self.smoothing))
        self._check_fraction()

    def advance(
        self, target: Target, state: Any, key: jax.Array, h: jax.Array
    ) -> tuple[PositionState, dict[str, jax.Array]]:
        x = state.x
        lam = h if self.smoothing is None else jnp.asarray(self.smoothing, x.dtype)
        drift = target.score(x) - (x - self.prox(x, lam)) / lam
        return PositionState(x=x + h * drift), {"grad_evals": jnp.ones((), x.dtype)}


@pytree_dataclass
class ProximalLangevin(Recipe):
    """Proximal (Moreau-Yosida) unadjusted Langevin for ``pi ∝ exp(f - g)`` with ``g``
    nonsmooth and given by its proximal map; see the module docstring.

    ``variant="moreau"``: ``x' = x + h grad f(x) - (h/lam)(x - prox_{lam g}(x)) + sqrt(2h) xi``
    (explicit: stable for roughly ``h < 2 / (L_f + 1/lam)``; biased towards
    ``exp(f - g_lam)``, by at most ``lam K^2 / 2`` in ``g`` for a ``K``-Lipschitz ``g``).
    ``variant="forward_prox"``: ``x' = prox_{h g}(x + h grad f(x)) + sqrt(2h) xi`` read right
    after the proximal map, so constraints hold exactly. Sources: "Efficient Bayesian
    computation by proximal MCMC: when Langevin meets Moreau" (SIAM J. Imaging Sci., 2018);
    "Finite-time analysis of projected Langevin Monte Carlo" (NeurIPS 2015).

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
        Moreau-Yosida parameter ``lam > 0`` (``variant="moreau"`` only); default: the step.
    variant : {"moreau", "forward_prox"}
        The smoothed explicit scheme or the forward-prox-noise splitting.
    """

    step_size: float = 1e-3
    prox: Any = None
    smoothing: float | None = None
    variant: str = static(default="moreau")

    stochastic = True
    reductions = Proximal.reductions

    def __post_init__(self):
        object.__setattr__(self, "step_size", positive("step_size", self.step_size))
        if self.prox is None:
            raise fail(
                "prox",
                "the nonsmooth part as a proximal term, e.g. flowpost.prox.L1Penalty(2.0) "
                "or flowpost.prox.Box(0.0, 1.0)",
                None,
            )
        object.__setattr__(self, "prox", as_prox_term("prox", self.prox))
        choice("variant", self.variant, ("moreau", "forward_prox"))
        if self.smoothing is not None:
            if self.variant != "moreau":
                raise fail(
                    "smoothing",
                    "None with variant='forward_prox' (it is used with variant='moreau' only)",
                    self.smoothing,
                )
            object.__setattr__(self, "smoothing", positive("smoothing", self.smoothing))

    @property
    def lam(self) -> float:
        """The Moreau-Yosida parameter in use (the step size unless ``smoothing`` is set)."""
        return float(self.step_size if self.smoothing is None else self.smoothing)

    @property
    def scheme(self) -> Split:
        """The equivalent splitting (module docstring)."""
        if self.variant == "forward_prox":
            return compose((unchecked(HeatFlow), unchecked(Explicit), unchecked(Proximal, prox=self.prox)))
        return compose((unchecked(MoreauDrift, prox=self.prox, smoothing=self.smoothing), unchecked(HeatFlow)))
