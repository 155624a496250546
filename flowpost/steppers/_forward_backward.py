r"""Forward-backward (Wasserstein proximal gradient): explicit on the potential, implicit on the entropy.

``KL(mu | pi) = E_mu[-log pi] + E_mu[log mu]``. One step of length ``h`` is

    forward:   x_i <- x_i + h grad log pi(x_i)                         (potential, explicit)
    backward:  mu <- argmin_nu  E_nu[log nu] + W2(nu, mu)^2 / (2h)       (negative entropy, JKO)

Source: "Wasserstein proximal gradient" (NeurIPS 2020). The backward step is the proximal
map of the negative entropy in the Wasserstein-2 metric; two ways to compute it:

``entropy="gaussian"`` (default), closed form
    The ensemble is treated as the Gaussian ``N(m, C)`` with its own mean and covariance
    (``C = (1/N) sum_i (x_i - m)(x_i - m)^T``, the covariance of the particle measure) and
    ``C = V diag(s^2) V^T``. The proximal map of the entropy of a Gaussian keeps the mean and
    eigenvectors and maps each standard deviation ``s -> s' = (s + sqrt(s^2 + 4h)) / 2``
    (the positive root of ``s'^2 - s s' - h = 0``, the optimality condition
    ``s' - s = h / s'``); particles move by the optimal transport map between the two
    Gaussians,

        x <- m + V diag(s'/s) V^T (x - m),     s'/s = (1 + sqrt(1 + 4h/s^2)) / 2.

    For a Gaussian target ``N(mu, S)`` the step is exact at the target: with ``a = h/s2`` along
    an eigen-direction of ``S`` with variance ``s2``, the forward step maps the standard
    deviation ``sqrt(s2)`` to ``(1 - a) sqrt(s2)`` and ``sqrt((1-a)^2 s2 + 4h) = (1 + a) sqrt(s2)``,
    so the backward step gives back ``sqrt(s2)`` (for ``h < s2``): no step-size bias, unlike
    unadjusted Langevin. Needs ``N > d`` (a full-rank covariance) and one ``d x d`` symmetric
    eigendecomposition per step. The ensemble moves deterministically; its shape beyond the
    first two moments is carried along, so the scheme is exact for Gaussian targets started
    from Gaussian ensembles and an approximation otherwise.

``entropy="kernel"``, numerical
    For non-Gaussian ensembles: the entropy of the new ensemble ``Y`` is estimated with a
    Gaussian kernel density of ``Y`` itself and the step solves, warm-started at ``Y = X``,

        min_Y  sum_i log mu_hat_Y(y_i) + sum_i |y_i - x_i|^2 / (2h),
        mu_hat_Y(y) = (1/N) sum_j N(y; y_j, b^2 I)

    (``N`` times the per-particle average form, same minimiser) with the inner optax solver
    (:func:`flowpost.inner.minimise`) over all ``N d`` coordinates at once. The density is
    built in the whitened coordinates of ``X`` (:func:`flowpost.kernels.whiten`; the kernel
    then follows the ensemble's covariance) and the bandwidth ``b`` is fixed for the step
    (``bandwidth``, or the normal-reference rule of :func:`flowpost.kernels.normal_reference_bandwidth`
    on the whitened ``X``). Kernel sums are blocked (memory ``O(N block)``). The kernel
    density smooths the ensemble, which biases the stationary spread by a relative
    ``O(b^2)``.

Both are built as :class:`~flowpost.steppers.Split` schemes (``Explicit()`` then the
entropy part, Lie order), so the entropy parts :class:`GaussianEntropy` and
:class:`KernelEntropy` (steppers of the one protocol) can also be used in a user's own
composition.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import jax
import jax.numpy as jnp

from .._pytree import pytree_dataclass, static, unchecked
from .._validate import choice, fail, integer, positive
from ..numerics import DEFAULT_BLOCK, InnerSolver, log_kde, minimise, normal_reference_bandwidth, whiten
from ._parts import Explicit, Part, PositionState, _PositionPart
from ._solver_defaults import check_solver
from ._split import Recipe, Split, compose

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = ["ForwardBackward", "GaussianEntropy", "KernelEntropy"]

_HIGHEST = jax.lax.Precision.HIGHEST

_INNER = {"grad_evals": "sum", "inner_iters": "mean", "inner_residual": "max", "inner_capped": "sum"}


@pytree_dataclass
class GaussianEntropy(Part):
    """Closed-form Wasserstein proximal step of the negative entropy for a Gaussian ensemble.

    Over time ``t``: ``x <- m + V diag(s'/s) V^T (x - m)`` with ``C = V diag(s^2) V^T`` the
    ensemble covariance (``1/N``) and ``s' = (s + sqrt(s^2 + 4t)) / 2`` (module docstring).
    Needs ``N > d``. Source: "Wasserstein proximal gradient" (NeurIPS 2020).
    """

    fraction: float = 1.0

    stochastic = False
    reductions = {"grad_evals": "sum"}

    def __post_init__(self):
        self._check_fraction()

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> PositionState:
        n, d = x.shape
        if n <= d:
            raise ValueError(
                f"init: expected more particles than dimensions (N > d) for the closed-form Gaussian "
                f"entropy step's full-rank ensemble covariance; got N={n}, d={d} (use more particles "
                "or entropy='kernel')"
            )
        return PositionState(x=x)

    def advance(
        self, target: Target, state: Any, key: jax.Array, h: jax.Array
    ) -> tuple[PositionState, dict[str, jax.Array]]:
        x = state.x
        n = x.shape[0]
        m = jnp.mean(x, axis=0)
        xc = x - m
        cov = jnp.matmul(xc.T, xc, precision=_HIGHEST) / n
        cov = 0.5 * (cov + cov.T)
        vecs, w = jax.lax.linalg.eigh(cov, symmetrize_input=False, sort_eigenvalues=False)
        w = jnp.maximum(w, jnp.finfo(x.dtype).tiny)
        ratio = 0.5 * (1.0 + jnp.sqrt(1.0 + 4.0 * h / w))
        z = jnp.matmul(xc, vecs, precision=_HIGHEST) * ratio
        x_new = m + jnp.matmul(z, vecs.T, precision=_HIGHEST)
        return PositionState(x=x_new), {"grad_evals": jnp.zeros((), x.dtype)}


@pytree_dataclass
class KernelEntropy(_PositionPart):
    """Wasserstein proximal step of the negative entropy with a kernel-density inner solve.

    Solves ``min_Y sum_i log mu_hat_Y(y_i) + sum_i |y_i - x_i|^2 / (2t)`` warm-started at
    ``Y = X`` (module docstring).

    Parameters
    ----------
    bandwidth : float, optional
        Kernel bandwidth in whitened coordinates (traced); default: normal-reference rule.
    whitened : bool
        Build the kernel density in the whitened coordinates of ``X`` (default) or in the
        original coordinates.
    solver : InnerSolver
        Inner solver over all ``N d`` coordinates.
    block : int
        Rows per block of the kernel sums.
    fraction : float
        Share of the step.
    """

    bandwidth: float | None = None
    whitened: bool = static(default=True)
    solver: InnerSolver = InnerSolver(tol=1e-4, max_iters=100)
    block: int = static(default=DEFAULT_BLOCK)
    fraction: float = 1.0

    stochastic = False
    reductions = _INNER

    def __post_init__(self):
        self._check_fraction()
        if self.bandwidth is not None:
            object.__setattr__(self, "bandwidth", positive("bandwidth", self.bandwidth))
        check_solver("solver", self.solver)
        if self.solver is None:
            raise fail("solver", "an InnerSolver", None, TypeError)
        integer("block", self.block, minimum=1)
        if not isinstance(self.whitened, bool):
            raise fail("whitened", "True or False", self.whitened, TypeError)

    def advance(
        self, target: Target, state: Any, key: jax.Array, h: jax.Array
    ) -> tuple[PositionState, dict[str, jax.Array]]:
        x = state.x
        x0 = jax.lax.stop_gradient(x)
        if self.whitened:
            to_z = whiten(x0).apply
        else:

            def to_z(a):
                return a

        z0 = to_z(x0)
        if self.bandwidth is None:
            b = jax.lax.stop_gradient(normal_reference_bandwidth(z0))
        else:
            b = jnp.asarray(self.bandwidth, x.dtype)

        def objective(y):
            zy = to_z(y)
            ent = jnp.sum(log_kde(zy, zy, b, block=self.block))
            return ent + jnp.sum((y - x0) ** 2) / (2 * h)

        y, rep = minimise(self.solver, objective, x0)
        stats = {
            "grad_evals": jnp.zeros((), x.dtype),  # the inner solve never evaluates the score
            "inner_iters": rep.iters.astype(x.dtype),
            "inner_residual": rep.residual.astype(x.dtype),
            "inner_capped": rep.capped.astype(x.dtype),
        }
        return PositionState(x=y), stats


@pytree_dataclass
class ForwardBackward(Recipe):
    """Wasserstein proximal gradient stepper: a forward step on the potential, then the
    backward (JKO) step of the negative entropy::

        x <- x + h grad log pi(x);     mu <- argmin_nu E_nu[log nu] + W2(nu, mu)^2 / (2h)

    With ``entropy="gaussian"`` the backward step is the closed form for a Gaussian ensemble
    (per eigen-direction ``s -> (s + sqrt(s^2 + 4h)) / 2``) and a Gaussian target is an exact
    fixed point (no step-size bias for ``h L < 1``). Source: "Wasserstein proximal gradient"
    (NeurIPS 2020).

    Parameters
    ----------
    step_size : float
        Step ``h``. For the exactness on Gaussian targets, ``h`` below the smallest variance
        of the target (``h L < 1``).
    entropy : {"gaussian", "kernel"}
        Closed-form Gaussian entropy step (needs ``N > d``) or the kernel-density inner solve.
    bandwidth : float, optional
        Kernel bandwidth for ``entropy="kernel"`` (whitened coordinates).
    solver : InnerSolver, optional
        Inner solver for ``entropy="kernel"``.

    Statistics: ``grad_evals`` (1 per step); with ``entropy="kernel"`` also ``inner_iters``,
    ``inner_residual`` and ``inner_capped`` of the joint solve.
    """

    step_size: float = 1e-2
    entropy: str = static(default="gaussian")
    bandwidth: float | None = None
    solver: InnerSolver | None = None

    stochastic = False
    needs_spread = "full_rank"  # flowpost.run refuses a start this step cannot leave (base.py)
    reductions = _INNER

    def __post_init__(self):
        object.__setattr__(self, "step_size", positive("step_size", self.step_size))
        choice("entropy", self.entropy, ("gaussian", "kernel"))
        if self.entropy == "gaussian" and (self.bandwidth is not None or self.solver is not None):
            raise fail(
                "bandwidth / solver",
                "None with entropy='gaussian' (they are used with entropy='kernel' only)",
                (self.bandwidth, self.solver),
            )
        if self.bandwidth is not None:
            object.__setattr__(self, "bandwidth", positive("bandwidth", self.bandwidth))
        check_solver("solver", self.solver)

    @property
    def scheme(self) -> Split:
        """The equivalent splitting ``Split((Explicit(), GaussianEntropy() or KernelEntropy()))``."""
        if self.entropy == "gaussian":
            back = unchecked(GaussianEntropy)
        else:
            kw = {} if self.solver is None else {"solver": self.solver}
            back = unchecked(KernelEntropy, bandwidth=self.bandwidth, **kw)
        return compose((unchecked(Explicit), back))
