"""Metropolis-adjusted Langevin (MALA): the Langevin proposal with an accept/reject step.

For every particle independently, with ``xi ~ N(0, I)`` and ``s = grad log pi``:

    proposal      y = x + h s(x) + sqrt(2 h) xi,          i.e.  q(y | x) = N(y; x + h s(x), 2 h I),
    log ratio     log a = log pi(y) - log pi(x) + log q(x | y) - log q(y | x),
    update        x' = y  if  log u < log a  (u ~ U(0, 1)),  else  x' = x.

Written out, ``log q(y | x) = -|y - x - h s(x)|^2 / (4 h) + const`` (the constant cancels in
the ratio; the code takes both terms from ``jax.scipy.stats.norm.logpdf``). The correction
makes ``pi`` exactly invariant for every step size ``h``, removing the ``O(h)`` bias of the
unadjusted chain (:class:`flowpost.Langevin`). A proposal whose log-density is NaN or
``-inf``, or whose score is not finite, is rejected. A proposal where ``log pi = +inf`` is
accepted, as the ratio ``+inf`` says: ``+inf`` is a defect of ``log_p``, and the run's monitor
then ends the run on it as it does for every stepper (:mod:`flowpost.engine` (monitor)).
There is no stability limit: a step that is too large only lowers the acceptance (the chain
then rarely moves), it cannot make the ensemble diverge.

The state keeps ``x``, ``log pi(x)`` and ``s(x)``, so one step costs a single
value-and-gradient evaluation, at the proposal.

Step size. The step ``h`` is an argument of every step, chosen by the run's step-size
controller (:mod:`flowpost.engine` (controllers)). With ``tune_steps > 0`` the stepper's
default controller is :class:`flowpost.AcceptanceTarget`: during the first ``tune_steps``
steps the log step size follows the stochastic-approximation recursion

    log h_{t+1} = log h_t + tune_gain * (t + 1)^(-0.6) * (abar_t - target_accept),
    abar_t = mean_i min(1, a_i)        (the stat "accept"),

which raises ``h`` while the acceptance exceeds the target and lowers it otherwise; the
decaying gains sum to infinity but their squares do not (exponent in (1/2, 1]), the usual
conditions of stochastic approximation. After ``tune_steps`` steps ``h`` is frozen at its last
value, so the chain from then on is a time-homogeneous MALA chain with ``pi`` invariant. The
default target 0.574 is the asymptotically optimal acceptance rate of "Optimal scaling of
discrete approximations to Langevin diffusions" (1998). The controller reports the tuned value
as ``"tuned_step_size"`` in the run's report. With ``tune_steps = 0`` the default controller is
a constant step at ``step_size``.

Source: "Exponential convergence of Langevin distributions and their discrete
approximations" (Bernoulli, 1996).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, ClassVar

import jax
import jax.numpy as jnp
from jax.scipy.stats import norm

from .._pytree import pytree_dataclass, unchecked
from .._validate import integer, open_unit, positive
from .base import ScoredState, Stepper

if TYPE_CHECKING:  # pragma: no cover
    from ..engine._controllers import Controller
    from ..model._target import Target

__all__ = ["MALA"]


def _log_q(to: jax.Array, frm: jax.Array, score_frm: jax.Array, h: jax.Array) -> jax.Array:
    """``log N(to; frm + h s(frm), 2 h I)`` per particle, ``(N,)``."""
    return jnp.sum(norm.logpdf(to, loc=frm + h * score_frm, scale=jnp.sqrt(2 * h)), axis=-1)


@pytree_dataclass
class MALA(Stepper):
    """Metropolis-adjusted Langevin stepper.

    Per particle, with ``s = grad log pi``, ``xi ~ N(0, I)`` and ``u ~ U(0, 1)``::

        y = x + h s(x) + sqrt(2h) xi,    q(y | x) = N(y; x + h s(x), 2h I)
        log a = log pi(y) - log pi(x) + log q(x | y) - log q(y | x)
        x' = y if log u < log a else x

    ``pi`` is exactly invariant for every ``h`` (no step-size bias, no stability limit: a
    large ``h`` only lowers the acceptance). With ``tune_steps > 0`` the run's default
    step-size controller is :class:`flowpost.AcceptanceTarget`, which adapts ``log h``
    towards ``target_accept`` for ``tune_steps`` steps and then freezes it. Source:
    "Exponential convergence of Langevin distributions and their discrete approximations"
    (Bernoulli, 1996); the default target 0.574 from "Optimal scaling of discrete
    approximations to Langevin diffusions" (1998).

    Parameters
    ----------
    step_size : float
        Step ``h`` of the Langevin proposal (the initial value of the run's step-size
        controller; the initial value of the tuning when ``tune_steps > 0``).
    tune_steps : int
        Number of initial steps during which ``log h`` is adapted towards
        ``target_accept`` (0: no tuning, a constant step). The step size is frozen afterwards.
    target_accept : float
        Target mean acceptance probability for the tuning, in (0, 1).
    tune_gain : float
        Gain of the stochastic-approximation update (module docstring), positive and finite.

    Notes
    -----
    Stats per step: ``"accept"`` (mean over particles of the acceptance probability
    ``min(1, a_i)``, a lower-variance estimate of the acceptance rate; averaged over a window)
    and ``"grad_evals"`` (1; summed). With tuning the run's report holds the tuned step as
    ``"tuned_step_size"`` (from the controller).
    """

    step_size: float = 1e-2
    tune_steps: int = 0
    target_accept: float = 0.574
    tune_gain: float = 1.0

    stochastic = True
    reductions: ClassVar[dict[str, str]] = {"accept": "mean", "grad_evals": "sum"}

    def __post_init__(self):
        object.__setattr__(self, "step_size", positive("step_size", self.step_size))
        object.__setattr__(self, "tune_steps", integer("tune_steps", self.tune_steps, minimum=0))
        object.__setattr__(self, "target_accept", open_unit("target_accept", self.target_accept))
        object.__setattr__(self, "tune_gain", positive("tune_gain", self.tune_gain))

    def default_controller(self) -> Controller:
        """Acceptance targeting from ``step_size`` when ``tune_steps > 0``, else a constant
        step at ``step_size``."""
        from ..engine._controllers import AcceptanceTarget, Constant  # the engine imports the steppers

        if self.tune_steps > 0:
            return unchecked(
                AcceptanceTarget,
                h=self.step_size,
                accept=self.target_accept,
                adapt_steps=self.tune_steps,
                gain=self.tune_gain,
            )
        return unchecked(Constant, h=self.step_size)

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> ScoredState:
        logp, score = target.value_and_score(x)
        return ScoredState(x=x, logp=logp, score=score)

    def advance(self, target: Target, state: ScoredState, key: jax.Array, h: jax.Array) -> tuple[ScoredState, dict]:
        x, logp, score = state.x, state.logp, state.score
        dtype = x.dtype
        h = jnp.asarray(h, dtype)
        k_noise, k_unif = jax.random.split(key)
        xi = jax.random.normal(k_noise, x.shape, dtype)
        y = x + h * score + jnp.sqrt(2 * h) * xi
        logp_y, score_y = target.value_and_score(y)

        log_ratio = logp_y - logp + _log_q(x, y, score_y, h) - _log_q(y, x, score, h)
        ok = jnp.isfinite(logp_y) & jnp.all(jnp.isfinite(score_y), axis=-1)
        log_ratio = jnp.where(ok & ~jnp.isnan(log_ratio), log_ratio, -jnp.inf)
        # log pi(y) = +inf: the ratio is +inf (accepted), and the monitor reports the defect of log_p
        log_ratio = jnp.where((logp_y == jnp.inf) & jnp.isfinite(logp), jnp.inf, log_ratio)
        log_u = jnp.log(jax.random.uniform(k_unif, logp.shape, dtype))
        accept = log_u < log_ratio
        prob = jnp.exp(jnp.minimum(log_ratio, 0.0))

        new = ScoredState(
            x=jnp.where(accept[:, None], y, x),
            logp=jnp.where(accept, logp_y, logp),
            score=jnp.where(accept[:, None], score_y, score),
        )
        return new, {"accept": jnp.mean(prob), "grad_evals": jnp.ones((), dtype)}
