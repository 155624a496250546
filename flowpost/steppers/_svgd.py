"""Stein variational gradient descent (SVGD): a kernel-smoothed, deterministic particle flow.

Each step moves every particle along the kernel-smoothed Stein direction

    phi(x) = (1/N) sum_j [ k(x_j, x) s(x_j) + grad_{x_j} k(x_j, x) ],     s = grad log pi,

    x_i <- x_i + h phi(x_i).

The first term drives particles up the (kernel-averaged) score; the second pushes them
apart and stands in for the entropy term of KL(mu | pi). ``phi`` is the steepest-descent
direction of KL in the unit ball of the kernel's reproducing-kernel Hilbert space.

Kernels (from :mod:`flowpost.numerics`):

* ``RBF()`` (default): ``k = exp(-|x - y|^2 / (2 b^2))`` with the median-heuristic bandwidth
  ``b^2 = med^2 / (2 log(N + 1))`` recomputed from the current ensemble at every step (``med``
  the median pairwise distance), or a fixed ``RBF(bandwidth=b)``;
* ``IMQ(scale=c, power=beta)``: ``k = (c^2 + |x - y|^2)^beta``.

The pairwise sums are computed in row blocks of ``block`` particles (memory
``O(block * N)``, never ``N x N``). With ``batch=p`` each particle interacts only with a
random batch of ``p`` particles per step ("Random batch methods for interacting particle
systems" (2020)), an unbiased estimate of ``phi`` at cost ``O(N p)``.

Stability. The step is explicit, and both terms of ``phi`` carry the kernel weights. For a
common shift of all particles the repulsion cancels (it is antisymmetric in the pair) and,
on a Gaussian target with largest curvature ``L`` (largest eigenvalue of ``Sigma^{-1}``), the
shift contracts by ``1 - h kbar L`` per step with ``kbar = (1/N) sum_j k(x_j, x_i)`` the mean
kernel value: the step is stable for ``h < 2 / (kbar L)``. The median-heuristic RBF has a
small ``kbar`` (its value at the median distance is ``1 / (N + 1)``), so steps well above the
``2 / L`` of forward Euler on the potential are stable. The other modes of the ensemble also
feel the repulsion, of curvature about ``kbar / b^2`` for a bandwidth ``b``; no closed-form
limit is claimed for them.

Finite ``N`` and the bandwidth bias the stationary ensemble: with few particles in high
dimension SVGD tends to under-estimate the spread, and its mode weights on a multimodal
target depend on the start and the bandwidth.

Minibatch scores: on a :class:`~flowpost.ItemSum` target the score ``s`` is the target's
unbiased minibatch estimate (with control variates once anchored), drawn with the step's key,
instead of the full-data score; ``phi`` is linear in ``s``, so the direction stays unbiased.

Source: "Stein variational gradient descent: a general purpose Bayesian inference
algorithm" (NeurIPS, 2016).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, ClassVar

import jax
import jax.numpy as jnp

from .._pytree import pytree_dataclass, static
from .._validate import fail, integer, positive
from ..model import score_estimate
from ..numerics import DEFAULT_BLOCK, IMQ, RBF, RadialKernel, interaction_means
from .base import ScoredState, Stepper

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = ["SVGD"]

_KERNEL_EXPECTED = "'rbf', 'imq' or a kernel instance such as flowpost.numerics.RBF() or IMQ()"


def _as_kernel(kernel: Any) -> RadialKernel:
    if isinstance(kernel, RadialKernel):
        return kernel
    if isinstance(kernel, str):
        name = kernel.lower()
        if name == "rbf":
            return RBF()
        if name == "imq":
            return IMQ()
        raise fail("kernel", _KERNEL_EXPECTED, kernel, ValueError)
    raise fail("kernel", _KERNEL_EXPECTED, kernel, TypeError)


@pytree_dataclass
class SVGD(Stepper):
    """Stein variational gradient descent stepper (deterministic).

    Every particle moves along the kernel-smoothed Stein direction, ``s = grad log pi``::

        phi(x) = (1/N) sum_j [ k(x_j, x) s(x_j) + grad_{x_j} k(x_j, x) ]
        x_i <- x_i + h phi(x_i)

    Explicit step: on a Gaussian target with largest curvature ``L`` it is stable for about
    ``h < 2 / (kbar L)``, ``kbar`` the mean kernel value ``(1/N) sum_j k(x_j, x_i)`` (small
    for the median-heuristic RBF, so steps well above ``2 / L`` work). Finite ``N`` and the
    bandwidth bias the stationary ensemble (it tends to under-estimate the spread). Source:
    "Stein variational gradient descent: a general purpose Bayesian inference algorithm"
    (NeurIPS, 2016); random batches: "Random batch methods for interacting particle systems"
    (2020).

    Parameters
    ----------
    step_size : float
        Step ``h`` of the explicit update ``x <- x + h phi(x)`` (the initial value of the
        run's step-size controller).
    kernel : RBF, IMQ, "rbf" or "imq"
        Kernel (a pytree: its numbers are traced); ``RBF()`` uses the median-heuristic
        bandwidth, recomputed each step.
    block : int
        Particles per row block in the pairwise sums (memory ``O(block * N)``; static).
    batch : int or None
        ``None``: all pairs. ``p``: random-batch interaction within batches of ``p``
        particles (``2 <= p <= N``), re-drawn each step (static).

    Notes
    -----
    Stats per step: ``"kernel_scale"`` (RBF bandwidth or IMQ ``c`` used; averaged over a
    window), ``"grad_evals"`` (1, summed; the score at the new ensemble is kept in the
    state for the next step), ``"item_grads"`` (data-item gradients per particle of a
    minibatch target, summed; 0 otherwise) and ``"score_variance"`` (the score estimator's
    variance summed over coordinates, mean over particles; 0 for an exact score).
    """

    step_size: float = 1e-2
    kernel: RadialKernel = RBF()
    block: int = static(default=DEFAULT_BLOCK)
    batch: int | None = static(default=None)

    stochastic = False  # deterministic (random batches aside): the monitor skips R-hat and ESS
    needs_spread = "coordinates"  # flowpost.run refuses a start this step cannot leave (base.py)
    reductions: ClassVar[dict[str, str]] = {
        "kernel_scale": "mean",
        "grad_evals": "sum",
        "item_grads": "sum",
        "score_variance": "mean",
    }

    def __post_init__(self):
        object.__setattr__(self, "step_size", positive("step_size", self.step_size))
        object.__setattr__(self, "kernel", _as_kernel(self.kernel))
        object.__setattr__(self, "block", integer("block", self.block, minimum=1))
        if self.batch is not None:
            object.__setattr__(self, "batch", integer("batch", self.batch, minimum=2))

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> ScoredState:
        n = x.shape[0]
        if n < 2:
            raise ValueError(f"init: expected at least 2 particles for SVGD (it interacts them); got N={n}")
        if self.batch is not None and self.batch > n:
            raise ValueError(f"batch: expected at most the number of particles N={n}; got {self.batch}")
        est = score_estimate(target, x, key)  # exact, or a minibatch estimate for a flowpost.ItemSum
        return ScoredState(x=x, logp=est.logp, score=est.score)

    def direction(self, x: jax.Array, score: jax.Array, key: jax.Array | None = None) -> tuple[jax.Array, jax.Array]:
        """The SVGD direction ``phi(x_i)`` for every particle and the kernel scale used."""
        scale = self.kernel.scale_for(x)
        kv, grad = interaction_means(self.kernel, x, score, batch=self.batch, key=key, block=self.block, scale=scale)
        return kv + grad, scale

    def advance(self, target: Target, state: ScoredState, key: jax.Array, h: jax.Array) -> tuple[ScoredState, dict]:
        x = state.x
        h = jnp.asarray(h, x.dtype)
        phi, scale = self.direction(x, state.score, key if self.batch is not None else None)
        x_new = x + h * phi
        # the next step's score: a minibatch estimate from a batch drawn with this step's key
        # (flowpost.ItemSum), the exact score otherwise (variance 0, no data items counted)
        est = score_estimate(target, x_new, jax.random.fold_in(key, 1))
        stats = {
            "kernel_scale": jnp.asarray(scale, x.dtype),
            "grad_evals": jnp.ones((), x.dtype),
            "item_grads": est.items,
            "score_variance": jnp.mean(jnp.sum(est.variance, axis=1)),
        }
        return ScoredState(x=x_new, logp=est.logp, score=est.score), stats
