"""Frozen dataclasses that are JAX pytrees: numbers traced, structure static.

``@pytree_dataclass`` turns a class into a frozen dataclass registered with JAX. Its fields
are **leaves** (traced inside ``jit``: a step size, a friction, a tolerance, a nested pytree
such as a kernel) unless declared with :func:`static` (hashed into the compiled program's
cache key: a block size, an order, a form, a user callable). Changing a leaf's value never
recompiles; changing a static field does.

JAX rebuilds such an object from traced leaves without calling ``__init__``, so the checks in
``__post_init__`` run on the user's values only, never on tracers.
"""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING, Any, TypeVar

import jax

if TYPE_CHECKING:  # typing.dataclass_transform is 3.11+; the checker reads typing_extensions' stub
    from typing_extensions import dataclass_transform
else:

    def dataclass_transform(**_: Any):
        return lambda f: f


__all__ = ["leaf_names", "pytree_dataclass", "static", "static_names", "unchecked"]

T = TypeVar("T")

_STATIC = "flowpost_static"


def static(default: Any = dataclasses.MISSING, **kwargs: Any) -> Any:
    """A dataclass field that is part of the pytree's static structure.

    Pass the default by keyword (``static(default=512)``): type checkers read
    :func:`pytree_dataclass` as a dataclass transform whose field specifiers are
    ``dataclasses.field`` and this function, and see a default only when it is named."""
    meta = dict(kwargs.pop("metadata", {}) or {})
    meta[_STATIC] = True
    if default is dataclasses.MISSING:
        return dataclasses.field(metadata=meta, **kwargs)
    return dataclasses.field(default=default, metadata=meta, **kwargs)


def leaf_names(cls: type) -> tuple[str, ...]:
    """Names of the fields that are traced leaves."""
    return tuple(f.name for f in dataclasses.fields(cls) if not f.metadata.get(_STATIC))


def static_names(cls: type) -> tuple[str, ...]:
    """Names of the fields that are static structure."""
    return tuple(f.name for f in dataclasses.fields(cls) if f.metadata.get(_STATIC))


@dataclass_transform(frozen_default=True, field_specifiers=(dataclasses.field, static))
def pytree_dataclass(cls: type[T]) -> type[T]:
    """Make ``cls`` a frozen dataclass and register it as a JAX pytree (module docstring)."""
    if "__dataclass_fields__" not in cls.__dict__:
        cls = dataclasses.dataclass(frozen=True)(cls)
    data = leaf_names(cls)
    meta = static_names(cls)

    def flatten_with_keys(obj):
        children = [(jax.tree_util.GetAttrKey(n), obj.__dict__[n]) for n in data]
        return children, tuple(obj.__dict__[n] for n in meta)

    def flatten(obj):
        return [obj.__dict__[n] for n in data], tuple(obj.__dict__[n] for n in meta)

    def unflatten(aux, children):
        obj = object.__new__(cls)
        for n, v in zip(data, children):
            object.__setattr__(obj, n, v)
        for n, v in zip(meta, aux):
            object.__setattr__(obj, n, v)
        return obj

    jax.tree_util.register_pytree_with_keys(cls, flatten_with_keys, unflatten, flatten)
    return cls


def unchecked(cls: type[T], **values: Any) -> T:
    """Build an instance of a pytree dataclass from already-validated (possibly traced)
    values, without calling ``__init__`` / ``__post_init__``; missing fields take their
    defaults. For recipes that assemble their parts inside traced code."""
    obj = object.__new__(cls)
    for f in dataclasses.fields(cls):  # type: ignore[arg-type]
        if f.name in values:
            v = values.pop(f.name)
        elif f.default is not dataclasses.MISSING:
            v = f.default
        elif f.default_factory is not dataclasses.MISSING:
            v = f.default_factory()
        else:
            raise TypeError(f"{cls.__name__}: field '{f.name}' has no value and no default")
        object.__setattr__(obj, f.name, v)
    if values:
        raise TypeError(f"{cls.__name__}: unknown fields {sorted(values)}")
    return obj
