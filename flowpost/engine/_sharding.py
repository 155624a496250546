r"""Sharded runs: the particle axis over a 1-D device mesh, with JAX's own runtime.

``flowpost.run(..., devices=jax.devices())`` (a sequence of devices or a 1-D
:class:`jax.sharding.Mesh`) builds a mesh of ``P`` devices whose one axis is named
``"particles"`` (:data:`flowpost.numerics.PARTICLE_AXIS`) and places

* the ensemble and every per-particle leaf of the stepper's state (a leaf whose leading
  length is ``N``: the protocol puts the particle axis first) with
  ``NamedSharding(mesh, P("particles"))``: each device holds ``N / P`` particles;
* everything else (the data inside the target, the stepper's and the controller's numbers,
  the flow time) replicated, ``NamedSharding(mesh, P())``.

The run is traced and run inside :func:`jax.set_mesh`, so the compiled windows are
partitioned by XLA over the mesh (the layout is not a guess: a leaf placed on the wrong
axis would still compute the same numbers, only with more communication). What each kind of
step costs:

* independent steppers (Langevin, MALA, kinetic, proximal and implicit Langevin): no
  communication inside a step. The noise is ``jax.random`` over the whole ``(N, d)`` array;
  with ``jax_threefry_partitionable`` (JAX's default since 0.5) its values do not depend on the
  sharding, so the particles are bit-identical to the one-device run;
* interacting steppers: the pairwise sums of :mod:`flowpost.numerics` visit the other
  shards (SVGD and BlobFlow's kernel sums by ring passing, memory ``O(block * N / P)`` per
  device; kernel densities, the Stein discrepancy and EnsembleLangevin's noise by an
  all-gather of positions and scores, ``O(N d + block * N)`` per device; see
  :mod:`flowpost.numerics` (pairwise)); their means, covariances and bandwidths are
  reductions over the sharded axis, which XLA turns into all-reduces;
* the monitor's figures (moments, mean log-density, Stein discrepancy on its subset) are
  reductions too: every device ends with the same replicated figures.

Several processes (one per host): every process calls ``jax.distributed.initialize`` first,
then runs the same script with the same ``init`` (the whole ensemble, in host memory) and
``devices=jax.devices()`` (all processes' devices): each process's devices hold its shard.
Checkpoints are written per process (``run.npz`` becomes ``run.process-0-of-2.npz``, ...,
each holding that process's shards and the replicated leaves) and resume together from
the same ``resume=`` path; the final state is gathered (``process_allgather``) so that the
:class:`~flowpost.Result` of every process, process 0's included, holds all particles.
See the docs page ``docs/sharding.md`` for the launch.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Sequence
from contextlib import AbstractContextManager, nullcontext
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from jax.sharding import Mesh, NamedSharding, PartitionSpec

from .._validate import fail
from ..numerics import PARTICLE_AXIS

__all__ = [
    "ParticleSharding",
    "as_particle_sharding",
    "from_local_part",
    "host_copy",
    "in_particle_mesh",
    "local_part",
    "process_path",
]


class ParticleSharding:
    """A 1-D mesh over the particle axis and the two placements of a sharded run.

    Parameters
    ----------
    mesh : jax.sharding.Mesh
        One axis, named :data:`~flowpost.numerics.PARTICLE_AXIS`.
    """

    def __init__(self, mesh: Mesh):
        self.mesh = mesh
        self.size = int(mesh.devices.size)
        self.rows = NamedSharding(mesh, PartitionSpec(PARTICLE_AXIS))
        self.replicated = NamedSharding(mesh, PartitionSpec())

    def context(self) -> AbstractContextManager[Any]:
        """The mesh made current (:func:`jax.set_mesh`) for tracing and running the run."""
        return jax.set_mesh(self.mesh)

    def check_count(self, n: int) -> None:
        """Refuse an ensemble that the mesh cannot split evenly."""
        if n % self.size:
            raise ValueError(
                f"init: expected a number of particles divisible by the {self.size} devices of "
                f"devices= (each device holds N / {self.size}); got N={n}"
            )

    def place(self, tree: Any, n: int) -> Any:
        """Every array leaf whose leading length is ``n`` sharded over the particle axis,
        every other leaf replicated (module docstring)."""

        def put(leaf: Any) -> Any:
            if not hasattr(leaf, "shape") or not hasattr(leaf, "dtype"):
                return leaf
            rows = len(leaf.shape) >= 1 and leaf.shape[0] == n
            return _put(leaf, self.rows if rows else self.replicated)

        return jax.tree_util.tree_map(put, tree)


def _put(leaf: Any, sharding: NamedSharding) -> Any:
    """``leaf`` laid out with ``sharding``. Within one process: :func:`jax.device_put`. Over
    several processes (devices this process cannot address): an array already global is
    resharded by a compiled identity (every process runs it); a host value (the same on every
    process: the user's ``init``, a key) is cut into this process's shards
    (:func:`jax.make_array_from_callback`); PRNG keys travel as their key data."""
    if sharding.is_fully_addressable:
        return jax.device_put(leaf, sharding)
    if isinstance(leaf, jax.Array) and not leaf.is_fully_addressable:
        if leaf.sharding == sharding:
            return leaf
        return jax.jit(lambda a: a, out_shardings=sharding)(leaf)
    if jnp.issubdtype(leaf.dtype, jax.dtypes.prng_key):
        data = _put(jax.random.key_data(leaf), sharding)
        return jax.random.wrap_key_data(data, impl=jax.random.key_impl(leaf))
    host = np.asarray(leaf)
    return jax.make_array_from_callback(host.shape, sharding, lambda index: host[index])


def as_particle_sharding(devices: Any) -> ParticleSharding | None:
    """``None`` for ``devices=None``; else the :class:`ParticleSharding` of a non-empty
    sequence of distinct JAX devices or of a 1-D :class:`~jax.sharding.Mesh` (its devices, in
    its order, on an axis named :data:`~flowpost.numerics.PARTICLE_AXIS`)."""
    if devices is None:
        return None
    expected = "a sequence of JAX devices such as jax.devices(), or a 1-D jax.sharding.Mesh"
    if isinstance(devices, Mesh):
        if devices.devices.ndim != 1:
            raise fail("devices", "a 1-D mesh (the particle axis only)", f"a mesh of shape {devices.devices.shape}")
        found = list(devices.devices.tolist())
    elif isinstance(devices, Sequence) and not isinstance(devices, (str, bytes)):
        found = list(devices)
    else:
        raise fail("devices", expected, devices, TypeError)
    if not found or not all(isinstance(d, jax.Device) for d in found):
        raise fail("devices", expected, devices, TypeError)
    if len({d.id for d in found}) != len(found):
        raise fail("devices", "distinct devices", [d.id for d in found])
    mesh = Mesh(np.array(found), (PARTICLE_AXIS,), axis_types=(jax.sharding.AxisType.Auto,))
    return ParticleSharding(mesh)


def mesh_context(sharding: ParticleSharding | None) -> AbstractContextManager[Any]:
    """The mesh context of a sharded run, or a context that does nothing."""
    return nullcontext() if sharding is None else sharding.context()


def in_particle_mesh(fn: Callable[..., Any]) -> Callable[..., Any]:
    """Run ``fn`` (a function with a keyword argument ``devices``) with the mesh of
    ``devices`` made current, so that everything it traces sees the sharded particle axis."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        with mesh_context(as_particle_sharding(kwargs.get("devices"))):
            return fn(*args, **kwargs)

    return wrapper


def host_copy(tree: Any) -> Any:
    """``tree`` with every array that this process cannot read whole (sharded over several
    processes) gathered from all processes (:func:`jax.experimental.multihost_utils.
    process_allgather`); single-process arrays are returned as they are."""
    from jax.experimental import multihost_utils

    def get(leaf: Any) -> Any:
        if isinstance(leaf, jax.Array) and not leaf.is_fully_addressable and not leaf.is_fully_replicated:
            return multihost_utils.process_allgather(leaf, tiled=True)
        return leaf

    return jax.tree_util.tree_map(get, tree)


def local_part(leaf: Any) -> np.ndarray:
    """What this process holds of ``leaf``: the whole array when it can read it, else its
    shards along the leading axis in order (the part a per-process checkpoint keeps)."""
    if not isinstance(leaf, jax.Array) or leaf.is_fully_addressable or leaf.is_fully_replicated:
        return np.asarray(leaf)
    seen: dict[int, np.ndarray] = {}
    for shard in leaf.addressable_shards:
        start = shard.index[0].start if shard.index and isinstance(shard.index[0], slice) else 0
        seen.setdefault(int(start or 0), np.asarray(shard.data))
    return np.concatenate([seen[k] for k in sorted(seen)], axis=0)


def from_local_part(part: np.ndarray, like: Any) -> Any:
    """The global array of ``like``'s sharding whose local part is ``part`` (the inverse of
    :func:`local_part`)."""
    if isinstance(like, jax.Array) and not like.is_fully_addressable and not like.is_fully_replicated:
        return jax.make_array_from_process_local_data(like.sharding, part, like.shape)
    if isinstance(like, jax.Array):
        return jax.device_put(part.astype(like.dtype), like.sharding)
    return part


def process_path(path: Any) -> Any:
    """The checkpoint path of this process: ``path`` itself, unchanged and unchecked, with one
    process (its checks are the caller's), else ``stem.process-K-of-N.suffix``."""
    count = jax.process_count()
    if count == 1:
        return path
    path = Path(path)
    return path.with_name(f"{path.stem}.process-{jax.process_index()}-of-{count}{path.suffix}")
