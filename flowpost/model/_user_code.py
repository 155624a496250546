"""Checks of what a user hands to :class:`~flowpost.Target` (the log-density and its data),
and the explanation of an error raised inside the user's ``log_p``.

A failure inside ``log_p`` is reported against the argument at fault, in the one message
format of :mod:`flowpost._validate` (``name: expected ...; got ...``), with the original
exception chained:

- ``data`` when ``log_p(theta, data)`` is given no data, when data are given to a
  ``log_p(theta)`` (both found from the signature before anything is traced), or when a
  leaf of the data is not numeric (a string, an object);
- ``log_p`` when it branches in Python on a traced value or converts one to NumPy / a
  Python number (JAX's tracer errors; the message carries JAX's own text and link and says
  what to write instead), or when it raises anything else;
- ``init`` when the error is a missing key or an index out of range: the particles do not
  have the parameters or the shapes that ``log_p`` reads.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .._validate import describe, fail

__all__ = ["check_arity", "check_data", "describe_data", "explain_call_error", "nonfinite_data"]

_TRACER_ERRORS = (
    jax.errors.ConcretizationTypeError,
    jax.errors.TracerArrayConversionError,
    jax.errors.TracerIntegerConversionError,
)

_JAX_HINT = (
    "write log_p with jax.numpy only: jnp.where(cond, a, b) or jax.lax.cond instead of a Python "
    "if/while on a value, jnp functions instead of np.asarray / float() / int() on a value (log_p "
    "runs under jax.jit, jax.grad and jax.vmap, where values are traced)"
)


def check_data(data: Any) -> None:
    """Refuse data whose leaves are not numeric (they become traced arrays inside the
    compiled step): a string, bytes, an object array."""
    if data is None:
        return
    leaves, _ = jax.tree_util.tree_flatten_with_path(data)
    for path, leaf in leaves:
        label = _data_label(path)
        if isinstance(leaf, (bool, int, float, complex)):
            continue
        if not isinstance(leaf, (jax.Array, np.ndarray, np.generic)):  # a tracer is a jax.Array
            raise TypeError(
                "data: expected a pytree of numeric arrays or numbers (convert tables and other "
                f"containers with jnp.asarray); got {describe(leaf)} at {label}"
            )
        dtype = leaf.dtype
        if jnp.issubdtype(dtype, jax.dtypes.prng_key):
            continue
        if not (np.issubdtype(dtype, np.number) or np.issubdtype(dtype, np.bool_)):
            raise TypeError(
                "data: expected a pytree of numeric arrays or numbers (log_p's data are traced "
                "arrays; keep strings and other objects out of data, e.g. in a closure); got "
                f"{describe(leaf)} of dtype {dtype} at {label}"
            )


def _data_label(path: Any) -> str:
    return "data" + jax.tree_util.keystr(tuple(path))


def nonfinite_data(data: Any) -> list[str]:
    """Names of the data leaves holding NaN or infinite values (concrete leaves only)."""
    if data is None:
        return []
    out = []
    for path, leaf in jax.tree_util.tree_flatten_with_path(data)[0]:
        try:
            arr = np.asarray(leaf)
        except Exception:  # a tracer: nothing to say
            continue
        if np.issubdtype(arr.dtype, np.inexact) and not np.all(np.isfinite(arr)):
            n = int(np.sum(~np.isfinite(arr)))
            out.append(f"{_data_label(path)} ({n} non-finite value{'s' if n > 1 else ''})")
    return out


def describe_data(data: Any) -> str:
    """The data's leaves and shapes, for a message."""
    if data is None:
        return "no data"
    parts = []
    for path, leaf in jax.tree_util.tree_flatten_with_path(data)[0]:
        parts.append(f"{_data_label(path)}: {tuple(np.shape(leaf))}")
    return "data of shapes {" + ", ".join(parts) + "}"


def _accepts(sig: inspect.Signature, n: int) -> bool:
    try:
        sig.bind(*([None] * n))
    except TypeError:
        return False
    return True


def check_arity(label: str, f: Callable[..., Any], has_data: bool) -> None:
    """``log_p(theta)`` without data, ``log_p(theta, data)`` with data: refuse a mismatch,
    found from the signature (callables without one are left to the first call)."""
    try:
        sig = inspect.signature(f)
    except (TypeError, ValueError):
        return
    if has_data and not _accepts(sig, 2) and _accepts(sig, 1):
        raise TypeError(
            f"data: expected no data for {label}, which takes one argument log_p(theta) (define "
            "log_p(theta, data) to receive data); got data"
        )
    if not has_data and not _accepts(sig, 1) and _accepts(sig, 2):
        raise fail(
            "data",
            f"the data that {label} reads as its second argument log_p(theta, data) "
            "(pass data=..., as in fp.Target(log_p, data=...))",
            None,
            TypeError,
        )


def _jax_text(err: BaseException) -> str:
    lines = [ln.strip() for ln in str(err).splitlines() if ln.strip()]
    first = lines[0] if lines else type(err).__name__
    link = next((ln for ln in lines if ln.startswith("See https://")), "")
    return first + (f" ({link})" if link else "")


def explain_call_error(
    label: str, err: BaseException, shapes: Any, data: Any, points: str = "init", what: str = "one particle"
) -> Exception:
    """The exception (not raised) that explains ``err``, raised while calling the user's
    ``log_p`` (named ``label``) on ``what`` (one particle of ``points``) with parameter
    ``shapes``."""
    where = f"{what} with parameters {shapes} and {describe_data(data)}"
    if isinstance(err, _TRACER_ERRORS):
        return TypeError(
            f"{label}: expected a function JAX can trace; got {type(err).__name__} when calling it on "
            f"{where}: {_jax_text(err)}. Hint: {_JAX_HINT}"
        )
    text = f"{type(err).__name__}: {str(err).splitlines()[0] if str(err) else ''}".rstrip(": ")
    if isinstance(err, (KeyError, IndexError)):
        return ValueError(
            f"{points}: expected {'particles' if points == 'init' else 'points'} with the parameters and "
            f"shapes {label} reads; got {text} "
            f"when calling {label} on {where}"
        )
    return ValueError(f"{label}: expected a function that runs on {where}; got {text} raised inside {label}")
