"""Data larger than memory: rows of a ``.npy`` file read through a memory map.

A :class:`RowFile` names a ``.npy`` file whose leading axis counts data items (rows). The
file is never loaded whole: :meth:`RowFile.rows` reads the rows at given indices and
:meth:`RowFile.window` a contiguous range of them, each call through a fresh read-only
memory map that is closed again before the call returns, so the process holds no more of
the file than the rows of one call (the operating system's page cache may keep more, and
gives it back under memory pressure).

Inside a compiled step the rows are fetched **by a host callback** (``jax.pure_callback``):
the step draws the row indices from its own key on the device, the callback gathers those
rows from the file on the host, and the step goes on with them. A run's batches are thus a
function of the run's key alone (step ``t`` draws with ``fold_in(key, t)``): rerunning with
the same key reads the same rows. Full passes over the data (the exact log-density, the
reference score of the control variates, the monitor's discrepancy) read the file in
windows of ``chunk`` consecutive rows, one callback per window.

A ``RowFile`` is static structure in a target (its path, shape and dtype are hashed into
the compiled program's cache key); the rows it returns are ordinary traced arrays.
"""

from __future__ import annotations

import os
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .._validate import fail

__all__ = ["RowFile"]


class RowFile:
    """Rows of a ``.npy`` file on disk, read a batch at a time through a memory map.

    Parameters
    ----------
    path : str or path-like
        A ``.npy`` file (written with ``numpy.save``) whose first axis indexes data items;
        any trailing shape is one item's shape (``(n, p)``: each item a vector of ``p``).

    Notes
    -----
    Only the header is read on construction. :meth:`rows` reads ``len(idx)`` rows (sorted
    before reading so the file is visited in order); :meth:`window` reads a contiguous range.
    Both open a read-only memory map, copy the rows out and close the map again. Inside JAX
    code use :meth:`gather` and :meth:`read_window`, which call them from a host callback.
    """

    def __init__(self, path: str | os.PathLike):
        if not isinstance(path, (str, os.PathLike)):
            raise fail("path", "a path to a .npy file", path, TypeError)
        path = os.fspath(path)
        if not os.path.isfile(path):
            raise fail("path", "an existing .npy file", path, FileNotFoundError)
        try:
            probe = np.load(path, mmap_mode="r")
        except Exception as err:
            raise fail("path", "a .npy file written by numpy.save", path) from err
        if not isinstance(probe, np.memmap) or probe.ndim < 1:
            raise fail("path", "a .npy file holding one array with a leading item axis", path)
        if not (np.issubdtype(probe.dtype, np.number) or probe.dtype == np.bool_):
            raise fail("path", "a .npy file of numbers", f"{path} (dtype {probe.dtype})", TypeError)
        self.path = os.path.abspath(path)
        self.shape = tuple(int(s) for s in probe.shape)
        self.dtype = np.dtype(probe.dtype)
        del probe  # closes the map

    def __len__(self) -> int:
        return self.shape[0]

    @property
    def nbytes(self) -> int:
        """The size of the array on disk (without the header), in bytes."""
        return int(np.prod(self.shape)) * self.dtype.itemsize

    def __repr__(self) -> str:
        return f"RowFile({self.path!r}, shape={self.shape}, dtype={self.dtype})"

    def __hash__(self) -> int:
        return hash((self.path, self.shape, self.dtype.str))

    def __eq__(self, other: object) -> bool:
        return isinstance(other, RowFile) and (self.path, self.shape, self.dtype) == (
            other.path,
            other.shape,
            other.dtype,
        )

    # ----- host side ----------------------------------------------------------------------
    def rows(self, idx: Any) -> np.ndarray:
        """The rows at integer indices ``idx`` (any shape), shape ``idx.shape + item_shape``."""
        idx = np.asarray(idx, dtype=np.int64)
        flat = idx.reshape(-1)
        order = np.argsort(flat, kind="stable")
        mm = np.load(self.path, mmap_mode="r")
        try:
            got = np.asarray(mm[flat[order]])
        finally:
            del mm
        out = np.empty_like(got)
        out[order] = got
        return out.reshape(idx.shape + self.shape[1:])

    def window(self, start: Any, size: int) -> np.ndarray:
        """``size`` consecutive rows from row ``start`` (``start + size <= len(self)``)."""
        s = int(start)
        mm = np.load(self.path, mmap_mode="r")
        try:
            return np.array(mm[s : s + size])
        finally:
            del mm

    # ----- inside JAX code (host callbacks) ---------------------------------------------------
    def _struct(self, lead: tuple[int, ...]) -> jax.ShapeDtypeStruct:
        return jax.ShapeDtypeStruct(lead + self.shape[1:], self._device_dtype())

    def _device_dtype(self) -> np.dtype:
        # float64 rows arrive as float32 when JAX runs in 32 bits (its canonical dtype)
        return np.dtype(jax.dtypes.canonicalize_dtype(self.dtype))

    def gather(self, idx: jax.Array) -> jax.Array:
        """The rows at ``idx`` (an integer array, any shape), read by a host callback."""
        dt = self._device_dtype()
        return jax.pure_callback(
            lambda i: self.rows(i).astype(dt, copy=False), self._struct(tuple(idx.shape)), idx, vmap_method="sequential"
        )

    def read_window(self, start: jax.Array, size: int) -> jax.Array:
        """``size`` consecutive rows from the traced row ``start``, read by a host callback."""
        return jax.pure_callback(
            lambda s: self.window(s, size).astype(self._device_dtype(), copy=False),
            self._struct((size,)),
            start,
            vmap_method="sequential",
        )


def take_rows(source: Any, idx: jax.Array) -> jax.Array:
    """Rows ``idx`` of one data leaf: an in-memory array (``jnp.take``) or a :class:`RowFile`."""
    if isinstance(source, RowFile):
        return source.gather(idx)
    return jnp.take(source, idx, axis=0)


def slice_rows(source: Any, start: Any, size: int) -> jax.Array:
    """``size`` consecutive rows of one data leaf from row ``start`` (traced)."""
    if isinstance(source, RowFile):
        return source.read_window(jnp.asarray(start, jnp.int32), size)
    return jax.lax.dynamic_slice_in_dim(source, start, size, axis=0)
