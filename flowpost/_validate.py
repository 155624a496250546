"""Argument checks shared by every constructor and entry point, in one message format.

Every refusal reads ``name: expected <what>; got <value>`` and raises ``TypeError`` for a
value of the wrong kind (a string where a number belongs, a float where an integer belongs,
a class where an instance belongs) and ``ValueError`` for a value of the right kind outside
its range (a negative step, ``nan``, ``inf``). Nothing is coerced silently: ``150.9`` is not an
integer, ``"200"`` is not a number, ``True`` is not ``1``.

Numbers may be Python numbers, NumPy scalars or concrete 0-d NumPy / JAX arrays; they come
back as Python ``float`` / ``int``. The checks run when an object is built by the user, never
when JAX rebuilds a pytree from traced leaves.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable
from typing import Any

import numpy as np

__all__ = [
    "boolean",
    "callable_value",
    "choice",
    "describe",
    "fail",
    "instance",
    "integer",
    "non_negative",
    "open_unit",
    "positive",
    "prng_key",
    "real",
]


def describe(value: Any) -> str:
    """Short description of a value for an error message."""
    if isinstance(value, type):
        return f"the class {value.__name__} (not an instance)"
    if isinstance(value, (str, bool, int, float, type(None))):
        return repr(value)
    shape = getattr(value, "shape", None)
    if shape is not None and shape != ():
        return f"{type(value).__name__} of shape {tuple(shape)}"
    text = repr(value)
    if len(text) > 80:
        text = text[:77] + "..."
    return f"{text} ({type(value).__name__})"


def fail(name: str, expected: str, value: Any, kind: type[Exception] = ValueError) -> Exception:
    """The exception (not raised) for ``name`` with the expected form and the value got."""
    return kind(f"{name}: expected {expected}; got {describe(value)}")


def _as_float(name: str, value: Any, expected: str) -> float:
    if isinstance(value, (bool, np.bool_, str, bytes)):
        raise fail(name, expected, value, TypeError)
    if isinstance(value, numbers.Real):
        return float(value)
    shape = getattr(value, "shape", None)
    dtype = getattr(value, "dtype", None)
    if shape == () and dtype is not None:
        if not (np.issubdtype(dtype, np.floating) or np.issubdtype(dtype, np.integer)):
            raise fail(name, expected, value, TypeError)
        try:
            return float(np.asarray(value))
        except Exception:  # a tracer: not a concrete number
            raise fail(name, expected + " (a concrete number, not a traced value)", value, TypeError) from None
    raise fail(name, expected, value, TypeError)


def real(
    name: str,
    value: Any,
    *,
    low: float | None = None,
    high: float | None = None,
    low_open: bool = False,
    high_open: bool = False,
    expected: str | None = None,
) -> float:
    """A finite real number in ``[low, high]`` (ends open when asked), as ``float``."""
    if expected is None:
        lo = "" if low is None else (f"> {low:g}" if low_open else f">= {low:g}")
        hi = "" if high is None else (f"< {high:g}" if high_open else f"<= {high:g}")
        rng = " and ".join(p for p in (lo, hi) if p)
        expected = "a finite number" + (f" {rng}" if rng else "")
    v = _as_float(name, value, expected)
    if not math.isfinite(v):
        raise fail(name, expected, value)
    if low is not None and (v <= low if low_open else v < low):
        raise fail(name, expected, value)
    if high is not None and (v >= high if high_open else v > high):
        raise fail(name, expected, value)
    return v


def positive(name: str, value: Any) -> float:
    """A finite number > 0."""
    return real(name, value, low=0.0, low_open=True, expected="a positive finite number")


def non_negative(name: str, value: Any) -> float:
    """A finite number >= 0."""
    return real(name, value, low=0.0, expected="a finite number >= 0")


def open_unit(name: str, value: Any) -> float:
    """A number strictly between 0 and 1."""
    return real(
        name, value, low=0.0, high=1.0, low_open=True, high_open=True, expected="a number strictly between 0 and 1"
    )


def integer(name: str, value: Any, *, minimum: int | None = None, maximum: int | None = None) -> int:
    """An integer (Python or NumPy; never a float or a string) in ``[minimum, maximum]``."""
    rng = []
    if minimum is not None:
        rng.append(f">= {minimum}")
    if maximum is not None:
        rng.append(f"<= {maximum}")
    expected = "an integer" + (f" {' and '.join(rng)}" if rng else "")
    if isinstance(value, (bool, np.bool_)):
        raise fail(name, expected, value, TypeError)
    if isinstance(value, numbers.Integral):
        v = int(value)
    else:
        dtype = getattr(value, "dtype", None)
        if getattr(value, "shape", None) == () and dtype is not None and np.issubdtype(dtype, np.integer):
            v = int(np.asarray(value))
        else:
            raise fail(name, expected, value, TypeError)
    if (minimum is not None and v < minimum) or (maximum is not None and v > maximum):
        raise fail(name, expected, value)
    return v


def boolean(name: str, value: Any) -> bool:
    """``True`` or ``False`` (not 0 / 1, not a string)."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    raise fail(name, "True or False", value, TypeError)


def choice(name: str, value: Any, options: Iterable[str]) -> str:
    """One of a few strings."""
    opts = tuple(options)
    if isinstance(value, str) and value in opts:
        return value
    expected = "one of " + ", ".join(repr(o) for o in opts)
    raise fail(name, expected, value, TypeError if not isinstance(value, str) else ValueError)


def callable_value(name: str, value: Any, expected: str = "a callable", nargs: int | None = None) -> Any:
    """A callable that is not a class; with ``nargs``, one that accepts that many positional
    arguments (read from its signature, when it has one)."""
    if not (callable(value) and not isinstance(value, type)):
        raise fail(name, expected, value, TypeError)
    if nargs is not None:
        import inspect

        try:
            sig = inspect.signature(value)
        except (TypeError, ValueError):  # no signature to read (some builtins): the call will tell
            return value
        try:
            sig.bind(*([None] * nargs))
        except TypeError:
            plural = "s" if nargs != 1 else ""
            raise TypeError(
                f"{name}: expected {expected}, called with {nargs} positional argument{plural}; got "
                f"{describe(value)} with signature {sig}"
            ) from None
    return value


def instance(name: str, value: Any, cls: type | tuple[type, ...], expected: str) -> Any:
    """An instance of ``cls`` (a class passed instead of an instance is named as such)."""
    if isinstance(value, cls):
        return value
    raise fail(name, expected, value, TypeError)


def prng_key(name: str, value: Any) -> Any:
    """One JAX PRNG key: a typed key of shape ``()`` (``jax.random.key(0)``) or a raw
    ``uint32`` key of shape ``(2,)`` (``jax.random.PRNGKey(0)``); never a batch of keys, a
    float array or an integer seed."""
    import jax
    import jax.numpy as jnp

    expected = "one JAX PRNG key such as jax.random.key(0)"
    if not isinstance(value, jax.Array):
        raise fail(name, expected, value, TypeError)
    if jnp.issubdtype(value.dtype, jax.dtypes.prng_key):
        if value.shape == ():
            return value
        raise fail(name, expected + " (not a batch of keys)", value, TypeError)
    if value.dtype == jnp.uint32 and value.shape == (2,):
        return value
    raise fail(name, expected, value, TypeError)
