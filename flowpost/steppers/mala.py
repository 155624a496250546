"""Metropolis-adjusted Langevin (MALA): the Langevin proposal with an accept/reject step.

For every particle independently, with ``xi ~ N(0, I)`` and ``s = grad log pi``:

    proposal      y = x + h s(x) + sqrt(2 h) xi,          i.e.  q(y | x) = N(y; x + h s(x), 2 h I),
    log ratio     log a = log pi(y) - log pi(x) + log q(x | y) - log q(y | x),
    update        x' = y  if  log u < log a  (u ~ U(0, 1)),  else  x' = x.

Written out, ``log q(y | x) = -|y - x - h s(x)|^2 / (4 h) + const`` (the constant cancels in
the ratio; the code takes both terms from ``jax.scipy.stats.norm.logpdf``). The correction
makes ``pi`` exactly invariant for every step size ``h``, removing the ``O(h)`` bias of the
unadjusted chain (:class:`flowpost.steppers.langevin.Langevin`). A proposal whose
log-density or score is not finite is rejected.

The state keeps ``x``, ``log pi(x)`` and ``s(x)``, so one step costs a single
value-and-gradient evaluation, at the proposal.

Step-size tuning (optional, ``tune_steps > 0``). During the first ``tune_steps`` steps the
log step size follows a stochastic-approximation recursion driven by the
mean acceptance probability over the ensemble,

    log h_{t+1} = log h_t + gain * (t + 1)^(-0.6) * (abar_t - target_accept),
    abar_t = mean_i min(1, a_i),

which raises ``h`` while the acceptance exceeds the target and lowers it otherwise; the
decaying gains sum to infinity but their squares do not (exponent in (1/2, 1]), the usual
conditions of stochastic approximation. After ``tune_steps`` steps ``h`` is frozen at its last
value, so the chain from then on is a time-homogeneous MALA chain with ``pi`` invariant. The
default target 0.574 is the asymptotically optimal acceptance rate of "Optimal scaling of discrete
approximations to Langevin diffusions" (1998). The tuned value lives in the state (the
stepper's ``step_size`` is only the initial value) and is returned by :meth:`MALA.report`.

Source: "Exponential convergence of Langevin distributions and their discrete
approximations" (Bernoulli, 1996).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.stats import norm

from .base import positive_number

__all__ = ["MALA", "MALAState"]


class MALAState(NamedTuple):
    """Ensemble with its log-density and score, the current log step size and the step count."""

    x: jax.Array
    logp: jax.Array
    score: jax.Array
    log_step: jax.Array
    t: jax.Array


def _log_q(to: jax.Array, frm: jax.Array, score_frm: jax.Array, h: jax.Array) -> jax.Array:
    """``log N(to; frm + h s(frm), 2 h I)`` per particle, ``(N,)``."""
    return jnp.sum(norm.logpdf(to, loc=frm + h * score_frm, scale=jnp.sqrt(2 * h)), axis=-1)


@dataclass(frozen=True)
class MALA:
    """Metropolis-adjusted Langevin stepper.

    Parameters
    ----------
    step_size : float
        Step ``h`` of the Langevin proposal (the initial value when tuning).
    tune_steps : int
        Number of initial steps during which ``log h`` is adapted towards
        ``target_accept`` (0: no tuning). The step size is frozen afterwards.
    target_accept : float
        Target mean acceptance probability for the tuning, in (0, 1).
    tune_gain : float
        Gain of the stochastic-approximation update (see the module docstring).

    Notes
    -----
    Stats per step: ``"accept"`` (mean over particles of the acceptance probability
    ``min(1, a_i)``, a lower-variance estimate of the acceptance rate), ``"step_size"`` (the
    ``h`` used) and ``"grad_evals"`` (1). :meth:`report` gives ``{"tuned_step_size": h}``.
    """

    step_size: float = 1e-2
    tune_steps: int = 0
    target_accept: float = 0.574
    tune_gain: float = 1.0

    def __post_init__(self):
        positive_number("step_size", self.step_size)
        if isinstance(self.tune_steps, bool) or int(self.tune_steps) != self.tune_steps or self.tune_steps < 0:
            raise ValueError(f"tune_steps: must be a non-negative integer; got {self.tune_steps!r}")
        if not 0.0 < float(self.target_accept) < 1.0:
            raise ValueError(f"target_accept: must lie strictly between 0 and 1; got {self.target_accept}")
        if not float(self.tune_gain) > 0:
            raise ValueError(f"tune_gain: must be positive; got {self.tune_gain}")

    def start(self, target, x, key) -> MALAState:
        logp, score = target.value_and_score(x)
        return MALAState(
            x=x, logp=logp, score=score,
            log_step=jnp.log(jnp.asarray(self.step_size, x.dtype)),
            t=jnp.zeros((), jnp.int32),
        )

    def advance(self, target, state: MALAState, key):
        x, logp, score = state.x, state.logp, state.score
        dtype = x.dtype
        # without tuning the step is the configured one (so a halved step_size after a
        # roll-back takes effect); with tuning it is the adapted value carried in the state
        h = jnp.exp(state.log_step) if self.tune_steps > 0 else jnp.asarray(self.step_size, dtype)
        k_noise, k_unif = jax.random.split(key)
        xi = jax.random.normal(k_noise, x.shape, dtype)
        y = x + h * score + jnp.sqrt(2 * h) * xi
        logp_y, score_y = target.value_and_score(y)

        log_ratio = logp_y - logp + _log_q(x, y, score_y, h) - _log_q(y, x, score, h)
        ok = jnp.isfinite(logp_y) & jnp.all(jnp.isfinite(score_y), axis=-1)
        log_ratio = jnp.where(ok & ~jnp.isnan(log_ratio), log_ratio, -jnp.inf)
        log_u = jnp.log(jax.random.uniform(k_unif, logp.shape, dtype))
        accept = log_u < log_ratio
        prob = jnp.exp(jnp.minimum(log_ratio, 0.0))
        mean_prob = jnp.mean(prob)

        x_new = jnp.where(accept[:, None], y, x)
        logp_new = jnp.where(accept, logp_y, logp)
        score_new = jnp.where(accept[:, None], score_y, score)

        log_step = state.log_step
        if self.tune_steps > 0:
            t = state.t
            gain = jnp.asarray(self.tune_gain, dtype) * (t + 1).astype(dtype) ** -0.6
            tuned = log_step + gain * (mean_prob - jnp.asarray(self.target_accept, dtype))
            log_step = jnp.where(t < self.tune_steps, tuned, log_step)

        new = MALAState(x=x_new, logp=logp_new, score=score_new, log_step=log_step, t=state.t + 1)
        stats = {
            "accept": mean_prob,
            "step_size": h,
            "grad_evals": jnp.ones((), dtype),
        }
        return new, stats

    def report(self, state: MALAState) -> dict:
        """Host-side figures: the step size in use at the end of the run (the tuned value when
        ``tune_steps > 0``, else ``step_size``)."""
        if self.tune_steps == 0:
            return {"tuned_step_size": float(self.step_size)}
        return {"tuned_step_size": float(np.exp(np.asarray(state.log_step)))}
