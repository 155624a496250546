"""Checkpoints: the run's carry on disk, identified by structural fingerprints.

A checkpoint is a NumPy ``.npz`` archive (read with ``allow_pickle=False``) holding ``meta``
(JSON: format, version, step, the key's kind, the history, and three fingerprints) and the
carry's leaves (the stepper's state, the controller's state, the flow time) plus the key.

A **fingerprint** describes an object by its structure and numbers, never by memory
addresses: a dataclass as its class (module and qualified name) and fields; numbers by value;
arrays by dtype, shape and a hash of their bytes; callables by module and qualified name;
tuples, lists and dicts element by element. Two runs in different processes with the same
configuration have equal fingerprints, so a resume works in a fresh process; a checkpoint
written by another stepper, controller, target or ensemble shape is refused with the paths
that differ (``stepper.friction: checkpoint 1.0, this run 2.0``).

The **target** is described by its layout (parameter names, shapes, supports), its terms,
its log-density functions (:func:`callable_fingerprint`: name, a hash of the code, and the
numbers, arrays and functions the code reads) and its data (structure, and each leaf's dtype,
shape and a hash of its bytes): a checkpoint of another target of the same shape is refused
(``target.data[0]: ...``, ``target.log_p['total'].code: ...``).

A run sharded over several processes writes one checkpoint per process (its path names the
process: :func:`~flowpost.engine._sharding.process_path`) holding that process's part of
each sharded leaf and the replicated leaves whole; the processes resume together, each from
its own file.

Files are written through a unique temporary in the destination's folder, renamed into place,
with a digest member (:mod:`flowpost.engine._files`). Loading checks every field's type, each
member's header against the metadata (before reading it), the digest, and that the step
count agrees with the history (the last window record's step, or a later roll-back's
``back_to``); anything else is refused as not a readable flowpost checkpoint.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import os
import types
from typing import TYPE_CHECKING, Any

import jax
import jax.numpy as jnp
import numpy as np

from ._files import DIGEST_MEMBER, Archive, atomic_write, committed_step, history_problem, is_int, is_shape, write_npz
from ._history import History
from ._sharding import from_local_part, local_part

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = [
    "callable_fingerprint",
    "differences",
    "fingerprint",
    "load_checkpoint",
    "save_checkpoint",
    "target_fingerprint",
]

CHECKPOINT_FORMAT = "flowpost-checkpoint"
CHECKPOINT_VERSION = 3  # 3: a digest member, the target's terms fingerprinted


def _callable_name(fn: Any) -> str:
    mod = getattr(fn, "__module__", None) or type(fn).__module__
    qual = getattr(fn, "__qualname__", None) or type(fn).__qualname__
    return f"{mod}.{qual}"


def fingerprint(obj: Any) -> Any:
    """A JSON-able structural description of ``obj`` (module docstring)."""
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return repr(float(obj))
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        fields = {f.name: fingerprint(obj.__dict__[f.name]) for f in dataclasses.fields(obj)}
        return {"class": _callable_name(type(obj)), "fields": fields}
    if isinstance(obj, (np.ndarray, jax.Array)) or (hasattr(obj, "__array__") and hasattr(obj, "dtype")):
        arr = np.asarray(obj)
        if arr.ndim == 0:
            return repr(arr.item())
        digest = hashlib.sha256(np.ascontiguousarray(arr).tobytes()).hexdigest()[:16]
        return {"array": str(arr.dtype), "shape": list(arr.shape), "sha256": digest}
    if isinstance(obj, dict):
        return {"dict": {str(k): fingerprint(v) for k, v in obj.items()}}
    if isinstance(obj, (tuple, list)):
        return {"sequence": [fingerprint(v) for v in obj]}
    if callable(obj):
        return {"callable": _callable_name(obj)}
    return {"object": _callable_name(type(obj)), "repr": repr(obj)}


def _flatten(fp: Any, path: str, out: dict[str, str]) -> None:
    if isinstance(fp, dict) and "class" in fp:
        out[f"{path} (class)"] = fp["class"]
        for k, v in fp["fields"].items():
            _flatten(v, f"{path}.{k}", out)
    elif isinstance(fp, dict) and "dict" in fp:
        for k, v in fp["dict"].items():
            _flatten(v, f"{path}[{k!r}]", out)
    elif isinstance(fp, dict) and "sequence" in fp:
        out[f"{path} (length)"] = str(len(fp["sequence"]))
        for i, v in enumerate(fp["sequence"]):
            _flatten(v, f"{path}[{i}]", out)
    else:
        out[path] = json.dumps(fp)


def differences(old: Any, new: Any, path: str) -> list[str]:
    """The paths at which two fingerprints differ, each with both values."""
    a: dict[str, str] = {}
    b: dict[str, str] = {}
    _flatten(old, path, a)
    _flatten(new, path, b)
    out = []
    for k in sorted(set(a) | set(b), key=lambda k: (k.count("."), k)):
        if a.get(k) != b.get(k):
            out.append(f"{k}: checkpoint {a.get(k, '(absent)')}, this run {b.get(k, '(absent)')}")
    return out


def _code_digest(code: types.CodeType, h: Any) -> None:
    h.update(code.co_code)
    h.update(repr((code.co_names, code.co_varnames, code.co_freevars)).encode())
    for c in code.co_consts:
        if isinstance(c, types.CodeType):
            _code_digest(c, h)
        elif isinstance(c, frozenset):  # its repr's order depends on string hashing
            h.update(repr(sorted(map(repr, c))).encode())
        else:
            h.update(repr(c).encode())


def _names_read(code: types.CodeType) -> set[str]:
    out = set(code.co_names)
    for c in code.co_consts:
        if isinstance(c, types.CodeType):
            out |= _names_read(c)
    return out


def _value_fingerprint(v: Any, depth: int) -> Any:
    """A value a log-density reads (closure cell, global, default): numbers and arrays by
    value, functions by their code, anything else by its type (never by an address)."""
    if v is None or isinstance(v, (bool, int, float, str, np.ndarray, np.generic, jax.Array)):
        try:
            return fingerprint(v)
        except (TypeError, ValueError):  # e.g. a typed PRNG key
            return {"object": _callable_name(type(v)), "dtype": str(getattr(v, "dtype", ""))}
    if isinstance(v, (tuple, list)) and len(v) <= 64:
        return {"sequence": [_value_fingerprint(e, depth) for e in v]}
    if isinstance(v, dict) and len(v) <= 64:
        return {"dict": {str(k): _value_fingerprint(e, depth) for k, e in v.items()}}
    if isinstance(v, types.ModuleType):
        return {"module": v.__name__}
    if callable(v) and depth < 3:
        return callable_fingerprint(v, depth + 1)
    return {"object": _callable_name(type(v))}


def callable_fingerprint(fn: Any, depth: int = 0) -> Any:
    """A user function by its module and qualified name, a hash of its code (bytecode,
    constants, names) and the numbers, arrays and functions it reads (closure cells,
    defaults, the module globals it names): two different log-densities of one name differ."""
    if isinstance(fn, functools.partial):
        fields = {"func": callable_fingerprint(fn.func, depth), "args": _value_fingerprint(list(fn.args), depth)}
        fields["keywords"] = _value_fingerprint(dict(fn.keywords), depth)
        return {"class": "functools.partial", "fields": fields}
    code = getattr(fn, "__code__", None)
    if not isinstance(code, types.CodeType):
        inner = getattr(fn, "__wrapped__", None)  # jax.jit, functools.wraps
        if inner is not None and inner is not fn and depth < 3:
            return callable_fingerprint(inner, depth + 1)
        return fingerprint(fn)
    h = hashlib.sha256()
    _code_digest(code, h)
    fields: dict[str, Any] = {"code": h.hexdigest()[:16]}
    for name, cell in zip(code.co_freevars, getattr(fn, "__closure__", None) or ()):
        try:
            fields[f"closure {name}"] = _value_fingerprint(cell.cell_contents, depth)
        except ValueError:  # an empty cell
            fields[f"closure {name}"] = None
    if getattr(fn, "__defaults__", None):
        fields["defaults"] = _value_fingerprint(list(fn.__defaults__), depth)
    if getattr(fn, "__kwdefaults__", None):
        fields["keyword defaults"] = _value_fingerprint(dict(fn.__kwdefaults__), depth)
    module_globals = getattr(fn, "__globals__", None) or {}
    for name in sorted(_names_read(code)):
        if name in module_globals and not isinstance(module_globals[name], types.ModuleType):
            fields[f"global {name}"] = _value_fingerprint(module_globals[name], depth)
    return {"class": _callable_name(fn), "fields": fields}


def target_fingerprint(target: Target) -> dict[str, Any]:
    """The target's layout (names, shapes, supports), its log-density terms (by
    :func:`callable_fingerprint`) and its data (structure, and each leaf's dtype, shape and a
    hash of its bytes)."""
    layout = target.bound_layout()
    slots = [{"name": s.name, "shape": list(s.shape), "support": s.support.describe()} for s in layout.slots]
    leaves, treedef = jax.tree_util.tree_flatten(target.data)
    fields = {
        "parameters": {"sequence": [{"dict": s} for s in slots]},
        "terms": {"sequence": list(target.term_names)},
        "log_p": {"dict": {name: callable_fingerprint(f) for name, f in target.term_functions}},
        "data": {"sequence": [fingerprint(leaf) for leaf in leaves]},
        "data_structure": str(treedef),
    }
    return {"class": "flowpost.Target", "fields": fields}


def _shapes(tree) -> list:
    """Each leaf's dtype and the shape of the part this process keeps (the whole leaf unless
    it is sharded over several processes: :func:`~flowpost.engine._sharding.local_part`)."""
    return [[str(np.dtype(a.dtype)), list(np.shape(local_part(a)))] for a in jax.tree_util.tree_leaves(tree)]


def _key_parts(key):
    typed = jnp.issubdtype(key.dtype, jax.dtypes.prng_key)
    return (np.asarray(jax.random.key_data(key)) if typed else np.asarray(key)), typed


def save_checkpoint(
    path: str | os.PathLike,
    carry: Any,
    step: int,
    key: jax.Array,
    history: History,
    identity: dict[str, Any],
    window: int,
) -> None:
    """Write the carry and everything needed to continue (module docstring), through a
    unique temporary in the same folder renamed onto ``path``."""
    leaves = jax.tree_util.tree_leaves(carry)
    kdata, typed = _key_parts(key)
    meta = {
        "format": CHECKPOINT_FORMAT,
        "version": CHECKPOINT_VERSION,
        "step": int(step),
        "typed_key": typed,
        "window": int(window),
        "history": history.to_json(),
        "identity": identity,
        "shapes": _shapes(carry),
        "n_leaves": len(leaves),
    }
    arrays: dict[str, Any] = {"meta": json.dumps(meta), "key": kdata}
    arrays.update({f"leaf_{i}": local_part(leaf) for i, leaf in enumerate(leaves)})  # this process's part
    atomic_write(path, lambda fh: write_npz(fh, arrays))


def _read_checkpoint(path: Any) -> tuple[dict[str, Any], list[np.ndarray], np.ndarray]:
    """The checkpoint's metadata, leaves and key data, every field and header checked
    against the metadata before an array is read, and the digest verified."""
    with Archive(path, "resume", "checkpoint") as ar:
        meta = ar.meta()
        ar.expect(meta, "format", lambda v: v == CHECKPOINT_FORMAT, repr(CHECKPOINT_FORMAT))
        ar.expect(meta, "version", lambda v: v == CHECKPOINT_VERSION, f"{CHECKPOINT_VERSION} (this version's format)")
        step = ar.expect(meta, "step", lambda v: is_int(v, 0), "a whole number >= 0")
        ar.expect(meta, "typed_key", lambda v: isinstance(v, bool), "true or false")
        ar.expect(meta, "window", lambda v: is_int(v, 1), "a whole number >= 1")
        n = ar.expect(meta, "n_leaves", lambda v: is_int(v, 0) and v <= 10_000, "a whole number >= 0")
        ar.expect(
            meta,
            "shapes",
            lambda v: (
                isinstance(v, list)
                and len(v) == n
                and all(isinstance(e, list) and len(e) == 2 and isinstance(e[0], str) and is_shape(e[1]) for e in v)
            ),
            f"a list of {n} [dtype, shape] pairs",
        )
        ar.expect(
            meta,
            "identity",
            lambda v: isinstance(v, dict) and {"stepper", "controller", "target"} <= set(v),
            "an object with the stepper, controller and target fingerprints",
        )
        problem = history_problem(meta.get("history"))
        if problem:
            raise ar.bad(problem)
        ar.require_members({"meta", "key", DIGEST_MEMBER} | {f"leaf_{i}" for i in range(n)})
        for i, (dtype, shape) in enumerate(meta["shapes"]):
            got_dtype, got_shape = ar.header(f"leaf_{i}")
            if str(got_dtype) != dtype or list(got_shape) != shape:
                raise ar.bad(
                    f"member 'leaf_{i}' is {got_dtype} of shape {got_shape}; the metadata says {dtype} "
                    f"of shape {tuple(shape)}"
                )
        kdtype, kshape = ar.header("key")
        if kdtype != np.uint32 or len(kshape) != 1 or not 1 <= kshape[0] <= 16:
            raise ar.bad(f"member 'key' should be PRNG key data (uint32, 1-d); it is {kdtype} of shape {kshape}")
        leaves = [ar.array(f"leaf_{i}") for i in range(n)]
        kdata = ar.array("key")
        ar.verify()
        at = committed_step(meta["history"])
        if at != step if at is not None else step != 0:
            raise ar.bad(f"metadata 'step' is {step} but its history ends at step {at}")
    return meta, leaves, kdata


def _restore(leaf: np.ndarray, like: Any) -> Any:
    """A leaf read back: this process's part made the global array again when ``like`` is
    sharded over several processes (per-process checkpoints), else a plain array."""
    if isinstance(like, jax.Array) and not like.is_fully_addressable:
        return from_local_part(leaf, like)
    return jnp.asarray(leaf, dtype=like.dtype)


def load_checkpoint(
    path: str | os.PathLike, carry_like: Any, identity: dict[str, Any]
) -> tuple[Any, int, jax.Array, History]:
    """Read a checkpoint for a run whose carry looks like ``carry_like`` and whose
    fingerprints are ``identity``; refuse an unreadable or inconsistent file (naming what is
    wrong) and a mismatch (naming what differs)."""
    meta, leaves, kdata = _read_checkpoint(path)
    diffs: list[str] = []
    try:
        for part in ("stepper", "controller", "target"):
            diffs += differences(meta["identity"].get(part), identity[part], part)
    except (KeyError, TypeError, AttributeError) as err:
        raise ValueError(
            f"resume: expected a flowpost checkpoint file; got '{os.fspath(path)}', which is not a readable "
            f"flowpost checkpoint file (malformed fingerprints: {err!r})"
        ) from None
    like_leaves, treedef = jax.tree_util.tree_flatten(carry_like)
    like_shapes = _shapes(carry_like)
    if meta["shapes"] != like_shapes:
        diffs.append(f"state: checkpoint leaves {meta['shapes']}, this run {like_shapes}")
    if diffs:
        raise ValueError(
            "resume: expected a checkpoint of this run's stepper, controller, target and "
            "ensemble shape; got one that differs in "
            + "; ".join(diffs[:8])
            + (f" (and {len(diffs) - 8} more)" if len(diffs) > 8 else "")
        )
    carry = jax.tree_util.tree_unflatten(treedef, [_restore(leaf, a) for leaf, a in zip(leaves, like_leaves)])
    try:
        key = jax.random.wrap_key_data(jnp.asarray(kdata)) if meta["typed_key"] else jnp.asarray(kdata)
    except (ValueError, TypeError) as err:
        raise ValueError(
            f"resume: expected a flowpost checkpoint file; got '{os.fspath(path)}', which is not a readable "
            f"flowpost checkpoint file (its key data {kdata.shape} is not a key: {err})"
        ) from None
    return carry, int(meta["step"]), key, History.from_json(meta["history"])
