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

Files are written to a unique temporary name in the target folder and renamed into place.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import os
import tempfile
from collections.abc import Callable
from typing import TYPE_CHECKING, Any, BinaryIO

import jax
import jax.numpy as jnp
import numpy as np

from ._history import History

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = [
    "atomic_write",
    "differences",
    "fingerprint",
    "load_checkpoint",
    "save_checkpoint",
    "target_fingerprint",
]

CHECKPOINT_FORMAT = "flowpost-checkpoint"
CHECKPOINT_VERSION = 2


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


def target_fingerprint(target: Target) -> dict[str, Any]:
    """The target's layout (names, shapes, supports), its terms and a hash of its data."""
    layout = target.bound_layout()
    slots = [{"name": s.name, "shape": list(s.shape), "support": s.support.describe()} for s in layout.slots]
    data = [fingerprint(leaf) for leaf in jax.tree_util.tree_leaves(target.data)]
    return {
        "parameters": {"sequence": [{"dict": s} for s in slots]},
        "terms": {"sequence": list(target.term_names)},
        "data": {"sequence": data},
    }


def _shapes(tree) -> list:
    return [[str(np.asarray(a).dtype), list(np.shape(a))] for a in jax.tree_util.tree_leaves(tree)]


def atomic_write(path: str | os.PathLike, write: Callable[[BinaryIO], object]) -> None:
    """Call ``write(file_object)`` on a unique temporary file in ``path``'s folder, then rename
    it to ``path`` (the old file stays whole until the rename)."""
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".flowpost-", suffix=".part", dir=folder)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


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
    """Write the carry and everything needed to continue (module docstring)."""
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
    # Any: numpy's stub would match the unpacked arrays against savez's allow_pickle: bool
    arrays: dict[str, Any] = {f"leaf_{i}": np.asarray(leaf) for i, leaf in enumerate(leaves)}

    def write(fh):
        np.savez(fh, meta=np.array(json.dumps(meta)), key=kdata, **arrays)

    atomic_write(path, write)


def load_checkpoint(
    path: str | os.PathLike, carry_like: Any, identity: dict[str, Any]
) -> tuple[Any, int, jax.Array, History]:
    """Read a checkpoint for a run whose carry looks like ``carry_like`` and whose
    fingerprints are ``identity``; refuse a mismatch naming what differs."""
    try:
        with np.load(path, allow_pickle=False) as f:
            meta = json.loads(str(f["meta"]))
            if not isinstance(meta, dict) or meta.get("format") != CHECKPOINT_FORMAT:
                raise ValueError("not a flowpost checkpoint")
            if meta.get("version") != CHECKPOINT_VERSION:
                raise ValueError(f"checkpoint format version {meta.get('version')!r}, expected {CHECKPOINT_VERSION}")
            leaves = [f[f"leaf_{i}"] for i in range(int(meta["n_leaves"]))]
            kdata = f["key"]
    except FileNotFoundError:
        raise FileNotFoundError(f"resume: expected an existing checkpoint file; got '{path}' (no such file)") from None
    except (OSError, KeyError, ValueError, EOFError, TypeError) as err:
        raise ValueError(f"resume: expected a readable flowpost checkpoint; got '{path}' ({err})") from err
    diffs: list[str] = []
    for part in ("stepper", "controller", "target"):
        diffs += differences(meta["identity"].get(part), identity[part], part)
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
    carry = jax.tree_util.tree_unflatten(
        treedef, [jnp.asarray(leaf, dtype=a.dtype) for leaf, a in zip(leaves, like_leaves)]
    )
    key = jax.random.wrap_key_data(jnp.asarray(kdata)) if meta["typed_key"] else jnp.asarray(kdata)
    return carry, int(meta["step"]), key, History.from_json(meta["history"])
