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

Both are built as :class:`~flowpost.steppers.split.Split` schemes (``Explicit()`` then the
entropy part, Lie order), so the entropy parts :class:`GaussianEntropy` and
:class:`KernelEntropy` can also be used in a user's own composition.
"""
from __future__ import annotations

from dataclasses import dataclass
import jax
import jax.numpy as jnp

from ..inner import InnerSolver, minimise
from ..kernels import DEFAULT_BLOCK, log_kde, normal_reference_bandwidth, whiten
from .split import Explicit, Split, SplitState, SubStep, _check_fraction

__all__ = ["ForwardBackward", "GaussianEntropy", "KernelEntropy"]

_HIGHEST = jax.lax.Precision.HIGHEST


def _check_rank(target, x, owner):
    n, d = x.shape
    if n <= d:
        raise ValueError(
            f"{owner}: the closed-form Gaussian entropy step needs more particles than dimensions "
            f"(N > d) for a full-rank ensemble covariance; got N={n}, d={d}. Use more particles or "
            "entropy='kernel'."
        )


@dataclass(frozen=True)
class GaussianEntropy(SubStep):
    """Closed-form Wasserstein proximal step of the negative entropy for a Gaussian ensemble.

    Over time ``t``: ``x <- m + V diag(s'/s) V^T (x - m)`` with ``C = V diag(s^2) V^T`` the
    ensemble covariance and ``s' = (s + sqrt(s^2 + 4t)) / 2`` (module docstring). Needs
    ``N > d``.
    """

    fraction: float = 1.0

    def check(self, target, x):
        _check_rank(target, x, "GaussianEntropy")

    def apply(self, ctx, x, v, t, key):
        n = x.shape[0]
        m = jnp.mean(x, axis=0)
        xc = x - m
        cov = jnp.matmul(xc.T, xc, precision=_HIGHEST) / n
        cov = 0.5 * (cov + cov.T)
        vecs, w = jax.lax.linalg.eigh(cov, symmetrize_input=False, sort_eigenvalues=False)
        w = jnp.maximum(w, jnp.finfo(x.dtype).tiny)
        ratio = 0.5 * (1.0 + jnp.sqrt(1.0 + 4.0 * t / w))
        z = jnp.matmul(xc, vecs, precision=_HIGHEST) * ratio
        x_new = m + jnp.matmul(z, vecs.T, precision=_HIGHEST)
        return x_new, v, {"grad_evals": jnp.zeros((), x.dtype)}


@dataclass(frozen=True)
class KernelEntropy(SubStep):
    """Wasserstein proximal step of the negative entropy with a kernel-density inner solve.

    Solves ``min_Y sum_i log mu_hat_Y(y_i) + sum_i |y_i - x_i|^2 / (2t)`` warm-started at
    ``Y = X`` (module docstring).

    Parameters
    ----------
    bandwidth : float, optional
        Kernel bandwidth in whitened coordinates; default: normal-reference rule.
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
    whitened: bool = True
    solver: InnerSolver = InnerSolver(tol=1e-4, max_iters=100)
    block: int = DEFAULT_BLOCK
    fraction: float = 1.0

    def __post_init__(self):
        object.__setattr__(self, "fraction", _check_fraction("KernelEntropy", self.fraction))
        if self.bandwidth is not None:
            b = float(self.bandwidth)
            if not b > 0 or b == float("inf"):
                raise ValueError(f"KernelEntropy: bandwidth must be a positive number or None; got {self.bandwidth!r}")
            object.__setattr__(self, "bandwidth", b)
        if not isinstance(self.solver, InnerSolver):
            raise TypeError(f"KernelEntropy: solver must be a flowpost.inner.InnerSolver; got {type(self.solver).__name__}")
        if isinstance(self.block, bool) or not isinstance(self.block, int) or self.block < 1:
            raise ValueError(f"KernelEntropy: block must be a positive int; got {self.block!r}")

    def apply(self, ctx, x, v, t, key):
        x0 = jax.lax.stop_gradient(x)
        if self.whitened:
            wmap = whiten(x0)
            to_z = wmap.apply
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
            return ent + jnp.sum((y - x0) ** 2) / (2 * t)

        y, rep = minimise(self.solver, objective, x0)
        stats = {
            "grad_evals": jnp.zeros((), x.dtype),  # the inner solve never evaluates the score
            "inner_iters": rep.iters.astype(x.dtype),
            "inner_residual": rep.residual.astype(x.dtype),
            "inner_capped": rep.capped.astype(x.dtype),
        }
        return y, v, stats


@dataclass(frozen=True)
class ForwardBackward:
    """Wasserstein proximal gradient stepper (module docstring).

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
    entropy: str = "gaussian"
    bandwidth: float | None = None
    solver: InnerSolver | None = None

    def __post_init__(self):
        if self.entropy not in ("gaussian", "kernel"):
            raise ValueError(f"entropy: expected 'gaussian' or 'kernel'; got {self.entropy!r}")
        if self.entropy == "gaussian" and (self.bandwidth is not None or self.solver is not None):
            raise ValueError("bandwidth / solver: only used with entropy='kernel'")
        self.scheme  # validates step_size and the entropy part's options

    @property
    def scheme(self) -> Split:
        """The equivalent :class:`Split` scheme."""
        if self.entropy == "gaussian":
            back = GaussianEntropy()
        else:
            kw = {} if self.solver is None else {"solver": self.solver}
            back = KernelEntropy(bandwidth=self.bandwidth, **kw)
        return Split((Explicit(), back), step_size=self.step_size, order="lie")

    stochastic = False  # deterministic: the monitor skips R-hat and ESS

    def start(self, target, x, key) -> SplitState:
        return self.scheme.start(target, x, key)

    def advance(self, target, state: SplitState, key):
        return self.scheme.advance(target, state, key)
