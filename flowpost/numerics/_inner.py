r"""Inner minimisation for implicit steppers, built on optax.

Implicit (backward) steps -- the JKO step, the proximal Langevin step, the
numerical proximal map of a splitting scheme -- each solve a small smooth
problem

.. math::

    x^\star = \operatorname*{arg\,min}_x f(x)

at every outer step, usually warm-started at the current particle. This
module holds one solver for all of them:

* :class:`InnerSolver` -- a frozen configuration that is a JAX pytree: the
  numbers ``tol``, ``max_iters`` and ``learning_rate`` are traced leaves (a new
  tolerance or iteration cap never recompiles, and a sweep over them can be
  vmapped), the structural choices ``method``, ``memory_size`` and
  ``linesearch_steps`` are static;
* :func:`minimise` -- runs the optax optimiser inside
  :func:`jax.lax.while_loop` and returns the minimiser together with a
  :class:`SolveReport`.

Stopping rule
-------------
The residual is the **absolute max-abs (infinity) norm of the gradient**,

.. math::

    r(x) = \lVert \nabla f(x) \rVert_\infty = \max_i |\partial_i f(x)|,

taken over all leaves of the pytree ``x``. The loop stops at the first
iterate with :math:`r(x_k) \le \mathrm{tol}`, when ``max_iters`` updates
have been made, when the residual or the value :math:`f(x_k)` is not
finite (NaN/inf: continuing would not help; ``converged`` and ``capped`` are
then false), or, with a line search, after ``STALL_PATIENCE`` iterations in a
row that lowered neither the value nor the best residual (the rounding floor;
reported as ``capped``). The tolerance is absolute, so
it has to be matched to the scale of ``f`` and to the precision: in float32
the gradient itself carries a rounding error of roughly
:math:`10^{-7}\,\lVert\text{terms of } f\rVert`, so a ``tol`` far below that
cannot be met and the loop runs to the cap.

Under :func:`jax.vmap` (one problem per particle) the batched while-loop runs
until every problem has stopped, but each problem's carry is frozen once its
own stopping rule holds, so ``iters``, ``residual`` and ``grad_evals`` are
per problem.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import optax

from .._pytree import pytree_dataclass, static
from .._validate import callable_value, choice, fail, instance, integer, non_negative, positive

__all__ = ["FIRST_ORDER_METHODS", "InnerSolver", "SolveReport", "minimise"]

PyTree = Any

#: First-order optax optimisers that :class:`InnerSolver` accepts besides
#: ``"lbfgs"``; each needs a ``learning_rate``.
FIRST_ORDER_METHODS: dict[str, Callable[..., optax.GradientTransformationExtraArgs]] = {
    "adam": optax.adam,
    "sgd": optax.sgd,
    "rmsprop": optax.rmsprop,
}


@pytree_dataclass
class InnerSolver:
    r"""Configuration of the inner minimiser (a frozen pytree).

    ``tol``, ``max_iters`` and ``learning_rate`` are traced leaves: a solver can
    be passed to a jitted function as an ordinary argument, and changing one of
    these numbers does not recompile. ``method``, ``memory_size`` and
    ``linesearch_steps`` are static (they choose the optimiser and the shapes of
    its state). ``learning_rate=None`` is an empty subtree, so switching between
    a fixed rate and the line search changes the structure (and recompiles).

    Parameters
    ----------
    method : str
        ``"lbfgs"`` (default): limited-memory BFGS, ``optax.lbfgs``, with the
        zoom line search (sufficient decrease and curvature conditions,
        "Numerical Optimization" (2006), algorithms 3.5-3.6). The line
        search's final value and gradient are reused for the next iteration
        via ``optax.value_and_grad_from_state``.
        ``"adam"``, ``"sgd"``, ``"rmsprop"``: a plain first-order optax
        optimiser with a fixed ``learning_rate`` (one value-and-gradient
        evaluation per iteration).
    tol : float
        Absolute tolerance on the max-abs gradient norm
        :math:`\max_i |\partial_i f(x)|`; finite and >= 0.
    max_iters : int
        Maximum number of optimiser updates (>= 0).
    learning_rate : float or None
        For ``"lbfgs"``: ``None`` lets the line search choose the step
        (recommended); a number scales the L-BFGS direction by it instead.
        Required (finite, > 0) for the first-order methods.
    memory_size : int
        Number of stored curvature pairs for L-BFGS (>= 1).
    linesearch_steps : int
        Maximum number of trial points (each one value-and-gradient
        evaluation) per zoom line search (>= 1).

    Raises
    ------
    TypeError
        A value of the wrong kind (a string, a bool, a float where an integer
        belongs).
    ValueError
        A number out of range, ``nan`` or ``inf``, or an unknown ``method``.

    Examples
    --------
    >>> import jax
    >>> solver = InnerSolver(tol=1e-5, max_iters=100)
    >>> jax.tree_util.tree_leaves(solver)
    [1e-05, 100]
    >>> solver == InnerSolver(tol=1e-5, max_iters=100)
    True
    """

    method: str = static(default="lbfgs")
    tol: float = 1e-6
    max_iters: int = 50
    learning_rate: float | None = None
    memory_size: int = static(default=10)
    linesearch_steps: int = static(default=20)

    def __post_init__(self) -> None:
        # Runs on user values only (JAX rebuilds the pytree without __init__);
        # numbers are normalised to Python float / int so equal configs are equal.
        method = choice("method", self.method, ("lbfgs", *FIRST_ORDER_METHODS))
        object.__setattr__(self, "method", method)
        object.__setattr__(self, "tol", non_negative("tol", self.tol))
        object.__setattr__(self, "max_iters", integer("max_iters", self.max_iters, minimum=0))
        object.__setattr__(self, "memory_size", integer("memory_size", self.memory_size, minimum=1))
        object.__setattr__(self, "linesearch_steps", integer("linesearch_steps", self.linesearch_steps, minimum=1))
        if self.learning_rate is None:
            if method != "lbfgs":
                raise fail("learning_rate", f"a positive finite number for method={method!r}", None)
        else:
            object.__setattr__(self, "learning_rate", positive("learning_rate", self.learning_rate))

    @property
    def uses_linesearch(self) -> bool:
        """True when the zoom line search is active (L-BFGS without a fixed rate)."""
        return self.method == "lbfgs" and self.learning_rate is None

    def optimiser(self) -> optax.GradientTransformation:
        """Build the optax gradient transformation this configuration describes.

        Works with traced leaves: optax takes the learning rate as a scalar
        (``optax.scale_by_learning_rate`` inside ``optax.lbfgs``, ``optax.adam`` and
        the others), never as a Python number it branches on.
        """
        return self._build(self.learning_rate)

    def _build(self, learning_rate: Any) -> optax.GradientTransformationExtraArgs:
        if self.method == "lbfgs":
            if learning_rate is None:
                # Quasi-Newton directions are scaled so that a unit step is
                # the natural first trial ("one"), as in optax.lbfgs's default.
                search = optax.scale_by_zoom_linesearch(
                    max_linesearch_steps=self.linesearch_steps,
                    initial_guess_strategy="one",
                )
                return optax.lbfgs(memory_size=self.memory_size, linesearch=search)
            return optax.lbfgs(
                learning_rate=learning_rate,
                memory_size=self.memory_size,
                linesearch=None,
            )
        return FIRST_ORDER_METHODS[self.method](learning_rate=learning_rate)


class SolveReport(NamedTuple):
    """What :func:`minimise` reports besides the minimiser (a pytree of arrays).

    Attributes
    ----------
    iters : int32 array
        Number of optimiser updates made.
    residual : float array
        Max-abs gradient norm at the returned point (same dtype as ``x0``).
    converged : bool array
        ``residual <= tol``.
    capped : bool array
        Stopped above ``tol`` because ``max_iters`` was reached or the solve
        stalled (no progress for ``STALL_PATIENCE`` line-search iterations).
    grad_evals : int32 array
        Value-and-gradient evaluations of ``fun`` made by the solver for this
        problem: one at ``x0``, plus for L-BFGS with line search the number
        of trial points of every line search (read from the optax state,
        ``info.num_linesearch_steps``) plus one for every re-evaluation that
        ``optax.value_and_grad_from_state`` makes when the stored value is not
        finite; for the other methods one per iteration. Under ``jax.vmap``
        this is the count of the unbatched problem: the batched program may
        compute more (branches of a batched ``cond`` are both evaluated) but
        the extra results are discarded.
    """

    iters: jax.Array
    residual: jax.Array
    converged: jax.Array
    capped: jax.Array
    grad_evals: jax.Array


def minimise(solver: InnerSolver, fun: Callable[[PyTree], jax.Array], x0: PyTree) -> tuple[PyTree, SolveReport]:
    r"""Minimise a smooth scalar function with optax inside a ``while_loop``.

    Iterates :math:`x_{k+1} = x_k + u_k` with the optax updates :math:`u_k`
    of ``solver`` until :math:`\max_i |\partial_i f(x_k)| \le \mathrm{tol}`
    or ``k = max_iters`` (see the module docstring for the exact rule).

    Parameters
    ----------
    solver : InnerSolver
        Configuration. A pytree: its numbers (``tol``, ``max_iters``,
        ``learning_rate``) may be traced, e.g. when the solver is an ordinary
        argument of a jitted function; its method and memory sizes are static.
    fun : callable
        ``fun(x) -> scalar``, differentiable with :func:`jax.grad`. Extra data
        (the particle being stepped, the step size) are closed over; inside a
        ``jax.vmap`` the closure may capture batched values.
    x0 : pytree of floating arrays
        Starting point; the result has the same structure, shapes and dtypes.

    Returns
    -------
    x : pytree
        Final iterate.
    report : SolveReport
        Iterations, final residual, convergence flags and evaluation count.

    Raises
    ------
    TypeError
        If ``solver`` is not an :class:`InnerSolver`, ``fun`` is not callable,
        or ``x0`` has a non-floating leaf.
    ValueError
        If ``x0`` has no leaves or ``fun(x0)`` is not a real scalar.

    Notes
    -----
    The function is traceable but not compiled by itself; call it inside
    :func:`jax.jit` for speed (``solver`` may be passed as an ordinary argument:
    a new tolerance or cap does not recompile) -- eager calls pay the op-by-op
    cost of the set-up.

    Examples
    --------
    >>> import jax.numpy as jnp
    >>> x, rep = minimise(InnerSolver(tol=1e-5), lambda x: jnp.sum((x - 2.0) ** 2),
    ...                   jnp.zeros(3))
    >>> bool(rep.converged)
    True
    """
    instance("solver", solver, InnerSolver, "an InnerSolver")
    callable_value("fun", fun, "a callable fun(x) -> scalar")
    x0 = jax.tree.map(jnp.asarray, x0)
    leaves = jax.tree.leaves(x0)
    if not leaves:
        raise fail("x0", "a pytree with at least one array leaf", x0)
    for leaf in leaves:
        if not jnp.issubdtype(leaf.dtype, jnp.floating):
            raise TypeError(f"x0: expected floating-point leaves; got a leaf of dtype {leaf.dtype}")
    out = jax.eval_shape(fun, x0)
    if not hasattr(out, "shape") or out.shape != () or not jnp.issubdtype(out.dtype, jnp.floating):
        shape = getattr(out, "shape", type(out).__name__)
        dtype = getattr(out, "dtype", "")
        raise ValueError(
            f"fun: expected a function returning a real floating-point scalar (shape ()); got shape {shape} {dtype}"
        )

    return _solve(solver, fun, x0)


def _solve(solver: InnerSolver, fun: Callable[[PyTree], jax.Array], x0: PyTree):
    # Not wrapped in jax.jit here: ``fun`` is usually a fresh closure (often
    # over traced values), which a static-argument cache would keep alive.
    # Call minimise under the caller's jit for speed.
    leaves = jax.tree.leaves(x0)
    # Value dtype: that of the first leaf (optax stores the line-search value
    # in this dtype too); the objective is cast to it so the loop carry is
    # dtype-stable.
    vdtype = leaves[0].dtype

    def objective(x):
        return jnp.asarray(fun(x)).astype(vdtype)

    # The numbers of the solver may be tracers (a solver passed as an ordinary jit
    # argument); they are cast to the value dtype so they never promote the carry.
    lr = None if solver.learning_rate is None else jnp.asarray(solver.learning_rate, vdtype)
    opt = solver._build(lr)
    tol = jnp.asarray(solver.tol, vdtype)
    max_iters = solver.max_iters

    def residual_of(g):
        return jnp.max(jnp.stack([jnp.max(jnp.abs(l)).astype(vdtype) for l in jax.tree.leaves(g)]))

    uses_ls = bool(solver.uses_linesearch)
    if uses_ls:
        value_and_grad = optax.value_and_grad_from_state(objective)

        def evaluate(x: Any, state: Any) -> tuple[jax.typing.ArrayLike, Any, jax.Array]:
            # value_and_grad_from_state reuses the line search's value and
            # gradient; it recomputes only when the stored value is not finite
            # (always the case for the initial state, whose value is +inf).
            stored = optax.tree.get(state, "value")
            fresh = (~jnp.isfinite(stored)).astype(jnp.int32)
            value, grad = value_and_grad(x, state=state)
            return value, grad, fresh

        def ls_evals(state):
            return jnp.asarray(optax.tree.get(state, "num_linesearch_steps"), jnp.int32)

    else:
        plain = jax.value_and_grad(objective)

        def evaluate(x: Any, state: Any) -> tuple[jax.typing.ArrayLike, Any, jax.Array]:
            value, grad = plain(x)
            return value, grad, jnp.ones((), jnp.int32)

        def ls_evals(state):
            return jnp.zeros((), jnp.int32)

    state0 = opt.init(x0)
    value0, grad0, n0 = evaluate(x0, state0)
    zero = jnp.zeros((), jnp.int32)
    carry0 = (x0, state0, value0, grad0, zero, n0, residual_of(grad0), zero)

    def keep_going(carry):
        _, _, value, grad, k, _, _, idle = carry
        r = residual_of(grad)
        # A NaN residual compares false, so the loop also stops on a
        # non-finite gradient; it stops on a non-finite value too, and after
        # STALL_PATIENCE iterations without progress (see below).
        return (r > tol) & (k < max_iters) & jnp.isfinite(value) & (idle < STALL_PATIENCE)

    def step(carry):
        x, state, value, grad, k, n, best, idle = carry
        updates, state = opt.update(grad, state, x, value=value, grad=grad, value_fn=objective)
        x = optax.apply_updates(x, updates)
        x = jax.tree.map(lambda new, old: new.astype(old.dtype), x, x0)
        n = n + ls_evals(state)
        new_value, grad, fresh = evaluate(x, state)
        # Progress: a lower value or a smaller gradient than any seen so far. At the rounding
        # floor of float32 the line search fails again and again without either; the loop
        # then stops after STALL_PATIENCE such iterations instead of running to the cap at
        # full line-search cost (the solve is reported as capped: above tolerance).
        r = residual_of(grad)
        # (Only with a line search: first-order optimisers such as adam are not monotone.)
        progress = (new_value < value) | (r < best) | (not uses_ls)
        idle = jnp.where(progress, 0, idle + 1)
        return (x, state, new_value, grad, k + 1, n + fresh, jnp.minimum(best, r), idle)

    x, _, _, grad, k, n, _, idle = jax.lax.while_loop(keep_going, step, carry0)
    r = residual_of(grad)
    converged = r <= tol
    return x, SolveReport(
        iters=k,
        residual=r,
        converged=converged,
        capped=(~converged) & ((k >= max_iters) | (idle >= STALL_PATIENCE)),
        grad_evals=n,
    )


STALL_PATIENCE = 5  # iterations without progress after which a solve stops (reported capped)
