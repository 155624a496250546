"""The target: a user's log-density over a pytree, seen by steppers as a function on ``R^d``.

A user writes ``log_p(theta)`` or ``log_p(theta, data)`` where ``theta`` is a pytree (a
dict of scalars and arrays, or one array) and the result is a scalar, the log posterior
density up to an unknown constant. :class:`Target` flattens one particle's pytree into a
vector, maps constrained parameters to the real line (see :mod:`flowpost.support`) and adds
the log-Jacobian, so that steppers only ever see

    log pi(u) = log_p(T(u)) + log |det dT/du|,     u in R^d,

and its score ``grad_u log pi(u)`` (by autodiff), vmapped over an ``(N, d)`` ensemble.

A ``Target`` is a registered JAX pytree: the data are its leaves (so new data do not cause a
recompilation and a run can be ``vmap``-ped over datasets) while the log-density, the
supports and the parameter layout are static.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, TypeVar

import jax
import jax.numpy as jnp
import numpy as np

from .._validate import callable_value, fail
from ._labels import ROOT_NAME, coordinate_labels, element_labels, path_label
from ._support import Real, as_support
from ._user_code import check_arity, check_data, explain_call_error

__all__ = ["Layout", "Target", "as_target"]


@dataclass(frozen=True)
class _Slot:
    name: str
    shape: tuple[int, ...]
    support: Real
    start: int
    size: int


@dataclass(frozen=True)
class Layout:
    """Static description of one particle: parameter names, shapes, supports and where each
    one's unconstrained coordinates sit in the flat vector."""

    treedef: Any
    slots: tuple[_Slot, ...]
    dim: int

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.slots)

    def element_names(self) -> list[str]:
        """One label per constrained scalar, e.g. ``sigma``, ``w[0]``, ``m[1,2]``
        (:mod:`flowpost.model._labels`)."""
        out: list[str] = []
        for s in self.slots:
            out.extend(element_labels(s.name, s.shape))
        return out

    def coordinate_names(self) -> list[str]:
        """One label per unconstrained coordinate (simplex parameters lose one entry)."""
        out: list[str] = []
        for s in self.slots:
            out.extend(coordinate_labels(s.name, s.shape, s.size))
        return out

    def unflatten(self, u: jax.Array) -> tuple[Any, jax.Array]:
        """Unconstrained vector ``(d,)`` -> (constrained pytree, log-Jacobian)."""
        leaves, logj = [], jnp.zeros((), u.dtype)
        for s in self.slots:
            piece = u[s.start : s.start + s.size]
            leaves.append(s.support.forward(piece, s.shape))
            logj = logj + s.support.log_jacobian(piece)
        return jax.tree_util.tree_unflatten(self.treedef, leaves), logj

    def flatten(self, theta: Any) -> jax.Array:
        """Constrained pytree (one particle) -> unconstrained vector ``(d,)``."""
        leaves = self.treedef.flatten_up_to(theta)
        parts = [s.support.inverse(jnp.asarray(leaf)) for s, leaf in zip(self.slots, leaves)]
        return jnp.concatenate([jnp.atleast_1d(p) for p in parts])


def _build_layout(init: Any, support: dict[str, Real]) -> tuple[Layout, int]:
    leaves_with_path, treedef = jax.tree_util.tree_flatten_with_path(init)
    if not leaves_with_path:
        raise fail("init", "a pytree of arrays with a leading particle axis", init, TypeError)
    n = 0  # the particle count N, read from the first leaf
    slots, start = [], 0
    names = []
    for path, leaf in leaves_with_path:
        name = path_label(path)
        arr = _init_leaf(name, leaf, init)
        if not names:
            n = arr.shape[0]
            if n < 1:
                raise ValueError(f"init: expected at least one particle (a leading axis N >= 1); got N=0 for '{name}'")
        elif arr.shape[0] != n:
            raise ValueError(
                f"init: expected every leaf to share the leading particle axis N; got N={n} for "
                f"'{names[0]}' and N={arr.shape[0]} for '{name}'"
            )
        names.append(name)
        shape = tuple(int(s) for s in arr.shape[1:])
        sup = support.get(name, Real())
        size = sup.free_size(shape)
        slots.append(_Slot(name, shape, sup, start, size))
        start += size
    unknown = set(support) - set(names)
    if unknown:
        raise ValueError(f"support: expected names among the parameters of init {names}; got {sorted(unknown)}")
    return Layout(treedef, tuple(slots), start), n


def _init_leaf(name: str, leaf: Any, init: Any) -> Any:
    """One leaf of ``init``, checked: real numbers (float32 / float64, or integers, which take
    the default float) with a leading particle axis."""
    arr = leaf if isinstance(leaf, jax.Array) else np.asarray(leaf)
    dtype = arr.dtype
    if not (jnp.issubdtype(dtype, jnp.floating) or jnp.issubdtype(dtype, jnp.integer)) or dtype == np.bool_:
        raise TypeError(f"init: expected real-valued particles; got dtype {dtype} for '{name}'")
    if jnp.issubdtype(dtype, jnp.floating) and dtype.itemsize < 4:
        raise TypeError(
            f"init: expected float32 or float64 particles (16-bit floats cannot resolve the steps of "
            f"a flow); got dtype {dtype} for '{name}' (cast with .astype(jnp.float32))"
        )
    if arr.ndim < 1:
        hint = (
            " (a Python list or tuple is a pytree of its items: pass one array, jnp.asarray(init))"
            if isinstance(init, (list, tuple))
            else ""
        )
        raise ValueError(
            "init: expected every leaf to have a leading particle axis, shape (N, ...); got "
            f"'{name}' of shape {tuple(arr.shape)}{hint}"
        )
    return arr


class _NotAnArray(Exception):
    """Raised while tracing when ``log_p`` returns something that is not a number or an array."""


_T = TypeVar("_T", bound="Target")


class Target:
    """A log-density over a pytree of parameters, ready for particle steppers.

    Parameters
    ----------
    log_p : callable or mapping of callables
        ``log_p(theta)`` or, when ``data`` is given, ``log_p(theta, data)``, returning a scalar:
        the log posterior density up to a constant. A mapping ``{name: callable}`` declares the
        log-density as a sum of named terms (e.g. ``{"likelihood": f, "prior": g}``), which
        splitting steppers can treat separately.
    data : pytree, optional
        Passed as the second argument of ``log_p``. Its arrays are traced, not baked into the
        compiled code.
    support : mapping or support, optional
        Constraints per parameter name (``{"sigma": fp.Positive(), "p": fp.Simplex(),
        "rho": fp.Interval(-1, 1)}``); nested dicts use dotted names ("a.b"). For a plain array
        parameter pass one support object. Unnamed parameters are unconstrained.

    Notes
    -----
    Inside, a particle is a vector ``u`` in ``R^d`` and the log-density is
    ``log_p(T(u)) + log|det dT/du|``; everything a user sees (result particles, summaries) is
    mapped back through ``T``. When the support makes ``T`` non-trivial and terms are named,
    the log-Jacobian appears as its own term named ``"jacobian"``.
    """

    def __init__(
        self,
        log_p: Callable[..., Any] | Mapping[str, Callable[..., Any]],
        data: Any = None,
        support: Any = None,
        *,
        _layout: Layout | None = None,
    ):
        if isinstance(log_p, Mapping):
            if not log_p:
                raise fail("log_p", "a callable or a non-empty mapping {name: callable}", dict(log_p))
            for k, f in log_p.items():
                if not isinstance(k, str):
                    raise fail("log_p", "term names that are strings", k, TypeError)
                callable_value(f"log_p['{k}']", f, "a callable log-density term")
            self._terms = tuple(log_p.items())
        elif callable(log_p) and not isinstance(log_p, type):
            self._terms = (("total", log_p),)
        else:
            raise fail("log_p", "a callable or a mapping of callables", log_p, TypeError)
        self._named = isinstance(log_p, Mapping)
        for k, f in self._terms:
            check_arity("log_p" if not self._named else f"log_p['{k}']", f, data is not None)
        check_data(data)
        self.data = data
        if support is None:
            sup = {}
        elif isinstance(support, Mapping):
            sup = {str(k): as_support(v) for k, v in support.items()}
        else:
            sup = {ROOT_NAME: as_support(support)}
        self._support = tuple(sorted(sup.items()))
        self.layout = _layout

    # ----- pytree protocol ------------------------------------------------------------
    def _aux(self) -> tuple[Any, ...]:
        return (self._terms, self._named, self._support, self.layout)

    def tree_flatten(self) -> tuple[tuple[Any], tuple[Any, ...]]:
        return (self.data,), self._aux()

    @classmethod
    def tree_unflatten(cls, aux: tuple[Any, ...], children: Sequence[Any]) -> Target:
        obj = cls.__new__(cls)
        obj._terms, obj._named, obj._support, obj.layout = aux
        obj.data = children[0]
        return obj

    def _replace_layout(self: _T, layout: Layout) -> _T:
        obj = Target.__new__(type(self))
        obj._terms, obj._named, obj._support = self._terms, self._named, self._support
        obj.data, obj.layout = self.data, layout
        return obj

    def __repr__(self):
        names = self.layout.names if self.layout is not None else "unbound"
        return f"Target(terms={[k for k, _ in self._terms]}, parameters={names})"

    # ----- binding to a particle structure ------------------------------------------------
    @property
    def support(self) -> dict:
        return dict(self._support)

    def bind(self: _T, init: Any) -> tuple[_T, jax.Array]:
        """Fix the parameter layout from ``init`` (pytree with leading axis N) and return the
        bound target and the unconstrained ``(N, d)`` starting ensemble.

        Raises clear errors when ``init`` is malformed, outside the support, or does not
        match what ``log_p`` reads; when ``log_p`` does not return a scalar; or when it
        cannot be differentiated.
        """
        layout, n = _build_layout(init, dict(self._support))
        bound = self._replace_layout(layout)
        leaves = layout.treedef.flatten_up_to(init)
        dtypes = [jnp.asarray(l).dtype for l in leaves]
        dtype = jnp.result_type(*[d if jnp.issubdtype(d, jnp.floating) else jnp.float32 for d in dtypes])
        for s, leaf in zip(layout.slots, leaves):
            inside = np.asarray(jax.vmap(s.support.contains)(jnp.asarray(leaf, dtype)))
            bad = ~inside.reshape(n, -1).all(axis=1)
            if bad.any():
                raise ValueError(
                    f"init: expected particles inside the support of '{s.name}' ({s.support.describe()}); "
                    f"got {int(bad.sum())} of {n} particles with '{s.name}' outside it or non-finite "
                    f"(first bad particle index {int(np.argmax(bad))})"
                )
        cast = jax.tree_util.tree_unflatten(layout.treedef, [jnp.asarray(l, dtype) for l in leaves])
        x = jax.vmap(layout.flatten)(cast)
        bound._check_log_p(x[0])
        return bound, x

    def _check_log_p(self, u0: jax.Array) -> None:
        layout = self.bound_layout()
        shapes = {s.name: s.shape for s in layout.slots}
        for name, f in self._terms:
            label = "log_p" if not self._named else f"log_p['{name}']"

            def one(u, f=f):
                theta, _ = layout.unflatten(u)
                out = self._call(f, theta)
                if not isinstance(out, (jax.Array, np.ndarray, np.generic, float, int)) or isinstance(out, bool):
                    raise _NotAnArray(out)
                return out

            try:
                out = jax.eval_shape(one, u0)
            except _NotAnArray as err:
                raise fail(label, "a floating-point scalar (a JAX array of shape ())", err.args[0], TypeError) from None
            except Exception as err:  # user code failed on a particle of the init structure
                raise explain_call_error(label, err, shapes, self.data, "init", "one particle of init") from err
            if getattr(out, "shape", None) != ():
                raise ValueError(f"{label}: expected a scalar log-density (shape ()); got shape {tuple(out.shape)}")
            if not jnp.issubdtype(out.dtype, jnp.floating):
                raise TypeError(f"{label}: expected a floating-point scalar log-density; got dtype {out.dtype}")
            try:
                jax.eval_shape(jax.grad(one), u0)
            except Exception as err:
                raise TypeError(
                    f"{label}: expected a log-density JAX can differentiate (written with jax.numpy, "
                    f"without numpy conversions or Python control flow on values); got "
                    f"{type(err).__name__}: {str(err).splitlines()[0] if str(err) else ''}"
                ) from err

    # ----- log-density on one particle ------------------------------------------------------
    def _call(self, f, theta):
        return f(theta) if self.data is None else f(theta, self.data)

    def bound_layout(self) -> Layout:
        """The layout of a bound target; refuses an unbound one."""
        if self.layout is None:
            raise ValueError(
                "target: expected a Target bound to a parameter layout (target.bind(init) returns one); "
                "got an unbound Target"
            )
        return self.layout

    @property
    def dim(self) -> int:
        """Number of unconstrained coordinates ``d``."""
        return self.bound_layout().dim

    @property
    def term_names(self) -> tuple[str, ...]:
        """Names of the log-density's terms (``("total",)`` for a single callable), plus
        ``"jacobian"`` when terms are named and some parameter is constrained."""
        names = tuple(k for k, _ in self._terms)
        if self._named and self._constrained():
            names = (*names, "jacobian")
        return names

    @property
    def term_functions(self) -> tuple[tuple[str, Callable[..., Any]], ...]:
        """The user's log-density callables by term name (``(("total", log_p),)`` for one)."""
        return tuple(self._terms)

    def _constrained(self) -> bool:
        return any(type(s.support) is not Real for s in self.bound_layout().slots)

    def log_density_one(self, u: jax.Array) -> jax.Array:
        """``log_p(T(u)) + log|det dT/du|`` for one particle ``u`` of shape ``(d,)``."""
        theta, logj = self.bound_layout().unflatten(u)
        total = logj
        for _, f in self._terms:
            total = total + self._call(f, theta)
        return total

    def term_one(self, name: str, u: jax.Array) -> jax.Array:
        """One named term at one particle (``"jacobian"`` gives the log-Jacobian)."""
        theta, logj = self.bound_layout().unflatten(u)
        if name == "jacobian":
            return logj
        for k, f in self._terms:
            if k == name:
                out = self._call(f, theta)
                if not self._named:
                    out = out + logj
                return out
        raise ValueError(f"term: '{name}' is not a term of this target; terms are {self.term_names}")

    # ----- vectorised over an (N, d) ensemble ------------------------------------------------
    def log_density(self, x: jax.Array) -> jax.Array:
        """Log-density at every particle: ``(N, d) -> (N,)``."""
        return jax.vmap(self.log_density_one)(x)

    def score(self, x: jax.Array) -> jax.Array:
        """Score ``grad_u log pi(u)`` at every particle: ``(N, d) -> (N, d)``."""
        return jax.vmap(jax.grad(self.log_density_one))(x)

    def value_and_score(self, x: jax.Array) -> tuple[jax.Array, jax.Array]:
        """Log-density and score together (one autodiff pass): ``(N,), (N, d)``."""
        return jax.vmap(jax.value_and_grad(self.log_density_one))(x)

    def term_value_and_score(self, name: str, x: jax.Array) -> tuple[jax.Array, jax.Array]:
        """A named term's value and gradient at every particle."""
        return jax.vmap(jax.value_and_grad(lambda u: self.term_one(name, u)))(x)

    # ----- user-space views -------------------------------------------------------------------
    def constrain(self, x: jax.Array) -> Any:
        """Unconstrained ``(N, d)`` ensemble -> the user's pytree with leading axis N."""
        layout = self.bound_layout()
        return jax.vmap(lambda u: layout.unflatten(u)[0])(x)

    def unconstrain(self, theta: Any) -> jax.Array:
        """The user's pytree with leading axis N -> unconstrained ``(N, d)``."""
        return jax.vmap(self.bound_layout().flatten)(theta)

    def constrained_matrix(self, x: jax.Array) -> jax.Array:
        """Constrained values as an ``(N, k)`` matrix, one column per element name."""
        tree = self.constrain(x)
        leaves = self.bound_layout().treedef.flatten_up_to(tree)
        n = x.shape[0]
        return jnp.concatenate([jnp.reshape(l, (n, -1)) for l in leaves], axis=1)


jax.tree_util.register_pytree_node(Target, Target.tree_flatten, Target.tree_unflatten)


def as_target(obj: Any) -> Target:
    """Accept a :class:`Target` or a bare log-density callable."""
    if isinstance(obj, Target):
        return obj
    if (callable(obj) and not isinstance(obj, type)) or isinstance(obj, Mapping):
        return Target(obj)
    raise fail("target", "a flowpost.Target or a log-density callable", obj, TypeError)
