r"""A likelihood that sums over data items, and its minibatch estimate of the score.

Declaration. With ``n`` data items ``y_1, ..., y_n`` (rows of in-memory arrays or of a
:class:`~flowpost.model.RowFile` on disk),

    log pi(theta) = log p(theta) + sum_{j=1}^n l(theta, y_j),

given either per item (``form="item"``: ``log_lik(theta, row)`` is ``l(theta, y_j)``) or per
batch (``form="batch"``: ``log_lik(theta, rows)`` returns the sum of ``l`` over the rows it
is given). As for every target, the flow moves unconstrained coordinates ``u`` with
``theta = T(u)`` and the log-Jacobian joins the prior.

Minibatch score. Draw ``b`` items ``j_1, ..., j_b`` uniformly **with replacement** from the
step's key (``jax.random.randint``); then

    g_hat(u) = grad log p(T(u)) + grad log J(u) + (n / b) sum_{k=1}^b grad_u l(T(u), y_{j_k})

is unbiased for the full score, ``E g_hat(u) = grad log pi(u)``, and its covariance is
``(n^2 / b) Cov_j(grad l(T(u), y_j))`` (the per-item gradients' population covariance).

Control variates ("Control variates for stochastic gradient MCMC" (Statistics and
Computing, 2019)). Around a reference point ``u_hat`` (a mode found by the inner solver,
:meth:`ItemSum.anchor`) with the full likelihood gradient ``G_hat = sum_j grad l(T(u_hat),
y_j)`` computed once,

    g_cv(u) = grad log p(T(u)) + grad log J(u) + G_hat
              + (n / b) sum_k [grad l(T(u), y_{j_k}) - grad l(T(u_hat), y_{j_k})]

is unbiased too, with covariance ``(n^2 / b) Cov_j(grad l(u, y_j) - grad l(u_hat, y_j))``:
of order ``(n^2 / b) |u - u_hat|^2`` instead of ``n^2 / b``, so near the posterior (where
``|u - u_hat|`` is of the order of a posterior sd, ``~ n^{-1/2}``) the variance is smaller by
a factor of order ``n``.

Variance reported. Each estimate comes with the estimated variance of each coordinate,
``(n^2 / b) s_k^2`` with ``s_k^2`` the sample variance (ddof 1) of the ``b`` per-item terms
(for ``form="batch"``: ``(n / b)^2 g s^2`` over ``g = groups`` equal groups of the batch);
steppers report its sum over coordinates, averaged over the particles, as the stat
``score_variance``.

Batches and the ensemble. ``batches="shared"`` (default): one batch per step for the whole
ensemble (``b`` rows read per step, the reference terms computed once): the gradient noise
is then common to the particles at a step, so the ensemble's spread at one time does not
show the noise's inflation of the variance (a particle's trajectory over time does); with
control variates that inflation is negligible. ``batches="per_particle"``: an independent
batch for each particle (``N b`` rows per step): independent chains.

Full-data evaluations. ``log_density``, ``score`` and ``value_and_score`` are the exact
full-data ones: the data are read in windows of ``chunk`` consecutive rows inside a
``lax.scan``, each window's value and gradient accumulated (a custom JVP carries the
accumulated gradient, so differentiating never stores the windows: memory ``O(N chunk)``).
They cost ``n`` item gradients per particle; the steppers of stochastic gradients never call
them (the start check of :func:`flowpost.run` does once, the monitor's discrepancy does on its
subset; see :mod:`flowpost.engine` (monitor)).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from .._validate import callable_value, choice, fail, integer
from ._data import RowFile, slice_rows, take_rows
from ._target import Layout, Target

__all__ = ["ItemSum", "ScoreEstimate", "figure_log_density", "score_estimate", "uses_minibatches"]

_MONITOR_SALT = 0xB47C4  # the monitor's fixed batch of rows is drawn with key(salt)


class ScoreEstimate(NamedTuple):
    """A score estimate at every particle: ``logp`` ``(N,)`` and ``score`` ``(N, d)``
    (unbiased), ``variance`` ``(N, d)`` (estimated variance of each coordinate of ``score``;
    zero for an exact score) and ``items`` (data-item gradients per particle, a scalar)."""

    logp: jax.Array
    score: jax.Array
    variance: jax.Array
    items: jax.Array


class ItemSum(Target):
    r"""A target whose log-likelihood is a sum over data items (module docstring).

    Parameters
    ----------
    log_lik : callable
        ``form="item"``: ``log_lik(theta, row) -> scalar``, one item's log-likelihood (``row``
        is one item of ``data``: the same pytree with the leading axis taken off).
        ``form="batch"``: ``log_lik(theta, rows) -> scalar``, the sum over the rows given.
    data : pytree
        Leaves are arrays (in memory) or :class:`~flowpost.model.RowFile` (on disk), all with
        the same leading item count ``n``.
    log_prior : callable, optional
        ``log_prior(theta) -> scalar``; ``None`` for a flat prior.
    batch : int
        Items per minibatch, ``1 <= b <= n`` (static).
    form : {"item", "batch"}
        How ``log_lik`` is written.
    batches : {"shared", "per_particle"}
        One batch per step for the ensemble, or one per particle (module docstring).
    chunk : int
        Rows per window of a full pass over the data (memory ``O(N chunk)``; static).
    groups : int
        ``form="batch"`` only: the batch is cut into this many equal groups to estimate the
        estimator's variance (``batch`` must be a multiple of it).
    support : mapping or support, optional
        As for :class:`~flowpost.Target`.

    Notes
    -----
    A registered JAX pytree: the in-memory arrays and the control-variate reference are
    traced leaves; the callables, the files, the sizes and the layout are static.
    """

    def __init__(
        self,
        log_lik: Callable[..., Any],
        data: Any,
        *,
        log_prior: Callable[[Any], Any] | None = None,
        batch: int = 1000,
        form: str = "item",
        batches: str = "shared",
        chunk: int = 8192,
        groups: int = 10,
        support: Any = None,
    ):
        callable_value("log_lik", log_lik, "a callable log_lik(theta, row) (or (theta, rows) for form='batch')")
        if log_prior is not None:
            callable_value("log_prior", log_prior, "a callable log_prior(theta)")
        form = choice("form", form, ("item", "batch"))
        batches = choice("batches", batches, ("shared", "per_particle"))
        leaves, treedef = jax.tree_util.tree_flatten(data, is_leaf=lambda v: isinstance(v, RowFile))
        if not leaves:
            raise fail("data", "a pytree of arrays or RowFile objects with a leading item axis", data, TypeError)
        arrays, files, where = [], [], []
        n = None
        for leaf in leaves:
            if isinstance(leaf, RowFile):
                size = len(leaf)
                where.append(("file", len(files)))
                files.append(leaf)
            else:
                if not isinstance(leaf, (jax.Array, np.ndarray)) or np.ndim(leaf) < 1:
                    raise fail("data", "arrays with a leading item axis, or RowFile objects", leaf, TypeError)
                size = int(np.shape(leaf)[0])
                where.append(("array", len(arrays)))
                arrays.append(leaf)
            if n is None:
                n = size
            elif size != n:
                raise fail("data", f"every leaf with the same number of items n={n}", f"a leaf with {size}")
        assert n is not None
        if n < 1:
            raise fail("data", "at least one item", n)
        batch = integer("batch", batch, minimum=1, maximum=n)
        chunk = integer("chunk", chunk, minimum=1)
        groups = integer("groups", groups, minimum=2)
        if form == "item":
            groups = batch
        elif batch % groups:
            raise fail("batch", f"a multiple of groups={groups} (form='batch')", batch)
        # Target's own slots: the checkpoint fingerprint reads term_functions; the support and
        # the layout are Target's.
        super().__init__(lambda theta: jnp.zeros(()), None, support)
        self._terms = (("likelihood", log_lik), ("prior", log_prior if log_prior is not None else _flat_prior))
        self._named = False
        self._log_lik, self._log_prior, self._form = log_lik, log_prior, form
        self._treedef, self._where, self._files = treedef, tuple(where), tuple(files)
        self.n, self.batch, self.batches, self.chunk, self.groups = n, batch, batches, min(chunk, n), groups
        self.data = tuple(arrays)
        self.reference: tuple[jax.Array, jax.Array, jax.Array] | None = None  # (u_hat, lik at u_hat, its gradient)
        self.anchor_report: Any = None  # the inner solver's report of anchor() (host side)

    # ----- pytree protocol ------------------------------------------------------------------
    def _aux(self) -> tuple[Any, ...]:
        return (
            self._terms,
            self._support,
            self.layout,
            self._log_lik,
            self._log_prior,
            self._form,
            self._treedef,
            self._where,
            self._files,
            (self.n, self.batch, self.batches, self.chunk, self.groups),
        )

    def tree_flatten(self) -> tuple[tuple[Any, ...], tuple[Any, ...]]:
        return (self.data, self.reference), self._aux()

    @classmethod
    def tree_unflatten(cls, aux: tuple[Any, ...], children: Sequence[Any]) -> ItemSum:
        obj = cls.__new__(cls)
        (obj._terms, obj._support, obj.layout, obj._log_lik, obj._log_prior, obj._form) = aux[:6]
        obj._treedef, obj._where, obj._files = aux[6:9]
        obj.n, obj.batch, obj.batches, obj.chunk, obj.groups = aux[9]
        obj._named = False
        obj.data, obj.reference = children
        obj.anchor_report = None
        return obj

    def _copy(self, **changes: Any) -> ItemSum:
        children, aux = self.tree_flatten()
        obj = ItemSum.tree_unflatten(aux, children)
        for k, v in changes.items():
            setattr(obj, k, v)
        return obj

    def _replace_layout(self, layout: Layout) -> ItemSum:
        if self.reference is not None and int(np.shape(self.reference[0])[0]) != layout.dim:
            raise fail(
                "init",
                f"particles of the anchored target's dimension {int(np.shape(self.reference[0])[0])}",
                f"dimension {layout.dim}",
            )
        return self._copy(layout=layout)

    def __repr__(self) -> str:
        names = self.layout.names if self.layout is not None else "unbound"
        cv = "anchored" if self.reference is not None else "no control variates"
        return f"ItemSum(n={self.n}, batch={self.batch}, {cv}, parameters={names})"

    # ----- the data ---------------------------------------------------------------------------
    def _leaf(self, i: int) -> Any:
        kind, j = self._where[i]
        return self._files[j] if kind == "file" else self.data[j]

    def _rows(self, idx: jax.Array) -> Any:
        """The data items at ``idx`` (any integer shape), as the data's pytree."""
        leaves = [take_rows(self._leaf(i), idx) for i in range(len(self._where))]
        return jax.tree_util.tree_unflatten(self._treedef, leaves)

    def _window(self, start: Any, size: int) -> Any:
        leaves = [slice_rows(self._leaf(i), start, size) for i in range(len(self._where))]
        return jax.tree_util.tree_unflatten(self._treedef, leaves)

    def draw_indices(self, key: jax.Array, n_particles: int) -> jax.Array:
        """The row indices a step draws with ``key``: ``(b,)`` for shared batches, ``(N, b)``
        per particle (uniform, with replacement). A run's batches are a function of its key."""
        shape = (self.batch,) if self.batches == "shared" else (n_particles, self.batch)
        return jax.random.randint(key, shape, 0, self.n)

    # ----- pieces on one particle -------------------------------------------------------------
    def _lik_sum(self, u: jax.Array, rows: Any) -> jax.Array:
        theta, _ = self.bound_layout().unflatten(u)
        if self._form == "item":
            vals = jax.vmap(lambda r: self._log_lik(theta, r))(rows)
            return jnp.sum(vals).astype(u.dtype)
        return jnp.asarray(self._log_lik(theta, rows)).astype(u.dtype)

    def _prior_one(self, u: jax.Array) -> jax.Array:
        theta, logj = self.bound_layout().unflatten(u)
        prior = jnp.zeros((), u.dtype) if self._log_prior is None else jnp.asarray(self._log_prior(theta), u.dtype)
        return prior + logj

    def full_likelihood(self, u: jax.Array) -> tuple[jax.Array, jax.Array]:
        """The exact log-likelihood ``sum_j l(T(u), y_j)`` at one particle and its gradient in
        ``u``, accumulated over windows of ``chunk`` rows (``n`` item gradients)."""
        c = self.chunk
        k_full, rest = divmod(self.n, c)
        grad = jax.value_and_grad(self._lik_sum)

        def body(acc, k):
            v, g = grad(u, self._window(k * c, c))
            return (acc[0] + v, acc[1] + g), None

        zero = (jnp.zeros((), u.dtype), jnp.zeros_like(u))
        (v, g), _ = jax.lax.scan(body, zero, jnp.arange(k_full, dtype=jnp.int32))
        if rest:
            v2, g2 = grad(u, self._window(k_full * c, rest))
            v, g = v + v2, g + g2
        return v, g

    def log_density_one(self, u: jax.Array) -> jax.Array:
        """The exact full-data ``log pi(u)`` at one particle; its derivative is the accumulated
        full-data gradient (a custom JVP: no window is stored for the backward pass)."""

        @jax.custom_jvp
        def likelihood(u):
            return self.full_likelihood(u)[0]

        @likelihood.defjvp
        def _jvp(primals, tangents):
            (p,), (t,) = primals, tangents
            v, g = self.full_likelihood(p)
            return v, jnp.dot(g, t)

        return self._prior_one(u) + likelihood(u)

    @property
    def term_names(self) -> tuple[str, ...]:
        return ("total",)

    def term_one(self, name: str, u: jax.Array) -> jax.Array:
        if name == "total":
            return self.log_density_one(u)
        raise ValueError(f"term: '{name}' is not a term of this target; terms are {self.term_names}")

    def _check_log_p(self, u0: jax.Array) -> None:
        layout = self.bound_layout()
        theta, _ = layout.unflatten(u0)
        m = 1 if self._form == "item" else min(self.batch, 2)
        rows = jax.eval_shape(lambda: self._rows(jnp.zeros((m,), jnp.int32)))
        one = jax.tree_util.tree_map(lambda a: jax.ShapeDtypeStruct(a.shape[1:], a.dtype), rows)
        try:
            out = jax.eval_shape(self._log_lik, theta, one if self._form == "item" else rows)
        except Exception as err:
            raise TypeError(
                f"log_lik: expected a function of (theta, {'row' if self._form == 'item' else 'rows'}) "
                f"returning a scalar; calling it on one particle of init failed with {type(err).__name__}: "
                f"{str(err).splitlines()[0] if str(err) else ''}"
            ) from err
        if getattr(out, "shape", None) != ():
            raise fail("log_lik", "a scalar for one item (or the sum over a batch)", f"shape {out.shape}")
        if self._log_prior is not None:
            p = jax.eval_shape(self._log_prior, theta)
            if getattr(p, "shape", None) != ():
                raise fail("log_prior", "a scalar log-density", f"shape {p.shape}")

    # ----- control variates ---------------------------------------------------------------------
    def anchor(self, start: Any, solver: Any = None) -> ItemSum:
        """A copy with control variates around the mode (module docstring).

        The mode is found by the inner solver (:func:`flowpost.numerics.minimise`, L-BFGS by
        default, on the exact full-data ``-log pi``) from ``start`` (one particle in the
        user's parametrisation, no leading axis); then the full likelihood and its gradient
        are computed there once. The solver's report is kept in ``anchor_report``. Cost:
        ``n`` item gradients per solver evaluation plus ``n`` for the reference.
        """
        from ..numerics import InnerSolver, minimise

        if solver is None:
            solver = InnerSolver(tol=1e-6 * self.n, max_iters=200)
        init = jax.tree_util.tree_map(lambda a: jnp.asarray(a)[None], start)
        bound, x = self.bind(init)
        u_hat, report = jax.jit(lambda s, t, u0: minimise(s, lambda u: -t.log_density_one(u), u0))(solver, bound, x[0])
        lik, grad = jax.jit(lambda t, u: t.full_likelihood(u))(bound, u_hat)
        out = self._copy(reference=(u_hat, lik, grad))
        out.anchor_report = jax.device_get(report)
        return out

    # ----- the estimator ----------------------------------------------------------------------
    def _group_terms(self, u: jax.Array, rows: Any) -> tuple[jax.Array, jax.Array]:
        """Values ``(g,)`` and gradients ``(g, d)`` of the likelihood on each group of rows."""
        g = self.groups
        grouped = jax.tree_util.tree_map(lambda a: a.reshape((g, a.shape[0] // g, *a.shape[1:])), rows)
        return jax.vmap(jax.value_and_grad(self._lik_sum), in_axes=(None, 0))(u, grouped)

    def _one_estimate(self, u, rows, ref_terms):
        vals, grads = self._group_terms(u, rows)
        if ref_terms is not None:
            ref_vals, ref_grads = ref_terms
            vals, grads = vals - ref_vals, grads - ref_grads
        scale = self.n / self.batch
        pv, pg = jax.value_and_grad(self._prior_one)(u)
        logp = pv + scale * jnp.sum(vals)
        score = pg + scale * jnp.sum(grads, axis=0)
        if self.reference is not None:
            logp = logp + self.reference[1]
            score = score + self.reference[2]
        var = scale**2 * self.groups * jnp.var(grads, axis=0, ddof=1)
        return logp, score, var

    def estimate(self, x: jax.Array, key: jax.Array) -> ScoreEstimate:
        """The minibatch estimate (with control variates once anchored) at every particle of
        ``x`` ``(N, d)``, from a batch drawn with ``key``."""
        n_part = x.shape[0]
        idx = self.draw_indices(key, n_part)
        rows = self._rows(idx)
        ref = self.reference
        b = self.batch
        if self.batches == "shared":
            ref_terms = None if ref is None else self._group_terms(ref[0], rows)
            logp, score, var = jax.vmap(lambda u: self._one_estimate(u, rows, ref_terms))(x)
            items = b + (0.0 if ref is None else b / n_part)
        else:

            def one(u, r):
                ref_terms = None if ref is None else self._group_terms(ref[0], r)
                return self._one_estimate(u, r, ref_terms)

            logp, score, var = jax.vmap(one)(x, rows)
            items = b * (1.0 if ref is None else 2.0)
        return ScoreEstimate(logp, score, var, jnp.asarray(items, x.dtype))

    def batch_log_density(self, x: jax.Array, idx: jax.Array) -> jax.Array:
        """``log p + logJ + (n/b) sum_k l(y_{idx_k})`` at every particle for given rows
        ``idx`` ``(b,)`` (no control variates): an unbiased estimate of ``log pi`` over draws
        of ``idx``."""
        rows = self._rows(idx)
        scale = self.n / idx.shape[0]
        return jax.vmap(lambda u: self._prior_one(u) + scale * self._lik_sum(u, rows))(x)


def _flat_prior(theta: Any) -> jax.Array:
    """The flat prior (``log p = 0``), the default of :class:`ItemSum`."""
    return jnp.zeros(())


jax.tree_util.register_pytree_node(ItemSum, ItemSum.tree_flatten, ItemSum.tree_unflatten)


def uses_minibatches(target: Any) -> bool:
    """Whether ``target`` estimates its score from minibatches (an :class:`ItemSum`)."""
    return isinstance(target, ItemSum)


def score_estimate(target: Target, x: jax.Array, key: jax.Array) -> ScoreEstimate:
    """The score steppers of stochastic gradients use: the minibatch estimate for an
    :class:`ItemSum`, the exact score (variance 0, no data items counted) otherwise."""
    if isinstance(target, ItemSum):
        return target.estimate(x, key)
    logp, score = target.value_and_score(x)
    return ScoreEstimate(logp, score, jnp.zeros_like(score), jnp.zeros((), x.dtype))


def figure_log_density(target: Target, x: jax.Array) -> jax.Array:
    """The log-density the monitor reports at every particle: exact for a plain target; for
    an :class:`ItemSum` the batch estimate on one fixed batch of ``batch`` rows (drawn once
    with a fixed key, so the figure is comparable between windows; cost ``N b`` item
    evaluations instead of ``N n``)."""
    if isinstance(target, ItemSum):
        idx = jax.random.randint(jax.random.key(_MONITOR_SALT), (target.batch,), 0, target.n)
        return target.batch_log_density(x, idx)
    return target.log_density(x)
