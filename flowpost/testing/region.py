"""Where a check looks: one value, :class:`Region`, for the points at which the test kit
evaluates a log-density.

A region is either *near* a point or *drawn* from a sampler:

near
    ``Region.near(point, scale)``: the points are Gaussian perturbations of the pytree
    ``point``,

        x_j = point + scale * z_j,      z_j ~ N(0, I),   j = 1..n,

    one standard normal per element, drawn with a NumPy generator seeded by the raw bits of
    ``key`` (cheap, and nothing is compiled per leaf shape). Leaves keep their floating
    dtype; Python scalars and integer leaves take JAX's default float (float32 unless x64 is
    enabled).
drawn
    ``Region.drawn(sampler)``: the points are ``x_j = sampler(k_j)`` with
    ``(k_1, ..., k_n) = jax.random.split(key, n)``, for a user function ``sampler(key) ->
    theta`` (a prior draw, say, so that a check looks where the posterior may wander).

``n`` is the region's ``num_points`` or, when that is ``None``, the default of the check
that uses the region (16 for the score check and :func:`~flowpost.testing.check_health`, 32
for :func:`~flowpost.testing.assert_finite_on_region`, 8 for
:func:`~flowpost.testing.assert_vmap_matches_loop`). ``key`` defaults to
``jax.random.key(0)``, so the same region always gives the same points.

The checks also take the region's fields as loose keywords (``around=``, ``sampler=``,
``scale=``, ``num_points=``, ``key=``), a shortcut turned into a :class:`Region` by
:meth:`Region.from_keywords`.

This module imports JAX only when a region is built from a key or a pytree, or its points
are drawn: the pytest plugin, loaded by every pytest run, imports it without paying for JAX.
"""

from __future__ import annotations

import dataclasses
import difflib
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from .._validate import callable_value, fail, instance, integer, non_negative

if TYPE_CHECKING:  # pragma: no cover - for editors and type checkers
    import jax

__all__ = ["REGION_KEYWORDS", "Region", "default_key"]

#: The loose keywords that :meth:`Region.from_keywords` turns into a region (its fields).
REGION_KEYWORDS: tuple[str, ...] = ("around", "sampler", "scale", "num_points", "key")


def default_key() -> jax.Array:
    """The key of a region (or a check) given none: ``jax.random.key(0)``."""
    import jax

    return jax.random.key(0)


def _key_bits(key) -> np.ndarray:
    """The raw bits of a jax PRNG key (new-style typed key or legacy uint32 array)."""
    import jax
    import jax.numpy as jnp

    if jnp.issubdtype(key.dtype, jax.dtypes.prng_key):
        key = jax.random.key_data(key)
    return np.asarray(key, dtype=np.uint32).ravel()


_KEY_EXPECTED = "a jax PRNG key (jax.random.key(seed)) or None"


def _check_key(key) -> Any:
    """A single jax PRNG key: a typed key of shape () or a legacy raw uint32 key (1-d)."""
    if key is None:
        return None
    import jax
    import jax.numpy as jnp

    if isinstance(key, jax.Array) and jnp.issubdtype(key.dtype, jax.dtypes.prng_key):
        if key.shape != ():
            raise fail("key", "a single PRNG key (shape ()), not a batch of keys", key)
        return key
    if isinstance(key, (jax.Array, np.ndarray)) and key.dtype == np.uint32 and key.ndim == 1 and key.shape[0] >= 2:
        return key  # a legacy raw key, jax.random.PRNGKey(seed)
    raise fail("key", _KEY_EXPECTED, key, TypeError)


@dataclass(frozen=True, eq=False)
class Region:
    """Where a check evaluates a log-density: near a point, or drawn from a sampler.

    Build one with :meth:`near` or :meth:`drawn` (or directly, giving exactly one of
    ``around`` and ``sampler``). The points, for ``n`` of them (``num_points``, or the
    check's own default when ``None``), are

        x_j = around + scale * z_j,   z_j ~ N(0, I)       (near ``around``), or
        x_j = sampler(k_j),   (k_1..k_n) = jax.random.split(key, n)   (drawn),

    see :mod:`flowpost.testing.region`. The same region gives the same points every time.

    Attributes
    ----------
    around : pytree or None
        The point to perturb (a dict of scalars/arrays, or a plain array), with at least one
        leaf.
    sampler : callable or None
        ``sampler(key) -> theta`` (a pytree shaped like the parameters).
    scale : float
        Standard deviation of the perturbations around ``around`` (finite, ``>= 0``; ``0``
        repeats the point). Not used by a drawn region.
    num_points : int or None
        Number of points (``>= 1``); ``None`` leaves it to the check.
    key : jax PRNG key or None
        The key the points are drawn with; ``None`` is ``jax.random.key(0)``.

    Raises
    ------
    ValueError
        Both or neither of ``around`` and ``sampler``; a non-finite or negative ``scale``; a
        ``num_points`` below 1; an ``around`` without leaves.
    TypeError
        A ``sampler`` that is not callable, a ``num_points`` that is not an integer
        (``2.5``, ``True``), a ``scale`` that is not a number, a ``key`` that is not a jax key.
    """

    around: Any = None
    sampler: Callable[[Any], Any] | None = None
    scale: float = 0.1
    num_points: int | None = None
    key: Any = None

    def __post_init__(self) -> None:
        if (self.around is None) == (self.sampler is None):
            got = "neither" if self.around is None else "both"
            raise ValueError(
                "around, sampler: expected exactly one of around (a pytree to perturb, "
                "Region.near(point)) or sampler (a function key -> pytree, "
                f"Region.drawn(sampler)); got {got}"
            )
        if self.sampler is not None:
            callable_value("sampler", self.sampler, "a callable key -> pytree", nargs=1)
        else:
            import jax

            leaves = jax.tree_util.tree_leaves(self.around)
            if not leaves:
                raise fail("around", "a pytree with at least one array leaf", self.around)
            for leaf in leaves:
                try:
                    kind = np.asarray(leaf).dtype
                except Exception:  # not convertible to an array at all
                    kind = np.dtype(object)
                if not (np.issubdtype(kind, np.floating) or np.issubdtype(kind, np.integer) or kind == np.bool_):
                    raise fail("around", "a pytree of real numbers (float or integer arrays)", leaf, TypeError)
        object.__setattr__(self, "scale", non_negative("scale", self.scale))
        if self.num_points is not None:
            object.__setattr__(self, "num_points", integer("num_points", self.num_points, minimum=1))
        _check_key(self.key)

    # ------------------------------------------------------------------ constructors
    @classmethod
    def near(
        cls,
        point: Any,
        scale: float = 0.1,
        num_points: int | None = None,
        key: jax.Array | None = None,
    ) -> Region:
        """Points ``point + scale * z``, ``z ~ N(0, I)``, around the pytree ``point``."""
        if point is None:
            raise fail("point", "a pytree to perturb (a dict of scalars/arrays, or an array)", point, TypeError)
        return cls(around=point, scale=scale, num_points=num_points, key=key)

    @classmethod
    def drawn(
        cls,
        sampler: Callable[[Any], Any],
        num_points: int | None = None,
        key: jax.Array | None = None,
    ) -> Region:
        """Points ``sampler(k_j)`` for keys ``k_j`` split from ``key``."""
        if sampler is None:
            raise fail("sampler", "a callable key -> pytree", sampler, TypeError)
        return cls(sampler=sampler, num_points=num_points, key=key)

    @classmethod
    def from_keywords(
        cls,
        where: Mapping[str, Any],
        *,
        region: Region | None = None,
        caller: str = "region",
    ) -> Region:
        """The region of a check called with ``region=`` or with loose keywords.

        The one place where the keyword shortcut ``around=, sampler=, scale=, num_points=,
        key=`` (:data:`REGION_KEYWORDS`) becomes a :class:`Region`: a check collects its
        unknown keywords in ``**where`` and passes them here with its ``region`` argument.

        Parameters
        ----------
        where : mapping
            The loose keywords (possibly empty).
        region : Region, optional
            The region given explicitly; refused together with loose keywords.
        caller : str
            Name of the check, for messages.

        Raises
        ------
        TypeError
            A keyword that is not a region keyword (named, with a close match when there is
            one), ``region`` together with loose keywords, or a ``region`` that is not a
            :class:`Region`.
        """
        unknown = [k for k in where if k not in REGION_KEYWORDS]
        if unknown:
            hints = []
            for k in unknown:
                close = difflib.get_close_matches(k, REGION_KEYWORDS, n=1)
                hints.append(repr(k) + (f" (did you mean {close[0]!r}?)" if close else ""))
            raise TypeError(
                f"{caller}: expected keywords of {caller} or of its region "
                f"({', '.join(REGION_KEYWORDS)}); got unknown keyword{'s' if len(unknown) > 1 else ''} "
                + ", ".join(hints)
            )
        if region is not None:
            if where:
                loose = ", ".join(f"{k}=" for k in where)
                raise TypeError(
                    f"region, {', '.join(where)}: expected either region= or the keywords "
                    f"{', '.join(k + '=' for k in REGION_KEYWORDS)}, not both; got region= and {loose}"
                )
            return instance("region", region, cls, "a Region (Region.near(point) or Region.drawn(sampler)) or None")
        return cls(**where)

    # ------------------------------------------------------------------ use
    def with_defaults(self, *, num_points: int | None = None, key: jax.Array | None = None) -> Region:
        """A copy whose unset ``num_points`` / ``key`` (``None``) take the values given here
        (the pytest fixtures fill in the session's number of points and key this way)."""
        changes = {}
        if self.num_points is None and num_points is not None:
            changes["num_points"] = num_points
        if self.key is None and key is not None:
            changes["key"] = key
        return dataclasses.replace(self, **changes) if changes else self

    def key_or_default(self) -> jax.Array:
        """The key the points are drawn with: ``key``, or ``jax.random.key(0)``."""
        return default_key() if self.key is None else self.key

    def points(self, default_num_points: int) -> list:
        """The region's points: ``num_points`` (or ``default_num_points`` when that is
        ``None``) pytrees, drawn as described in the class docstring.

        Parameters
        ----------
        default_num_points : int
            The check's own number of points, used when ``num_points`` is ``None``.

        Returns
        -------
        list of pytrees
            Perturbations of ``around`` (NumPy leaves, dtype of each leaf kept) or draws of
            ``sampler``.
        """
        import jax
        import jax.numpy as jnp

        n = integer("default_num_points", default_num_points, minimum=1) if self.num_points is None else self.num_points
        key = self.key_or_default()
        if self.sampler is not None:
            return [self.sampler(k) for k in jax.random.split(key, n)]
        leaves, treedef = jax.tree_util.tree_flatten(self.around)
        rng = np.random.default_rng(_key_bits(key))
        bases = []
        default = np.dtype(jnp.result_type(float))  # float32 unless x64 is enabled
        for leaf in leaves:
            arr = np.asarray(leaf)
            if isinstance(leaf, (bool, int, float)) or not np.issubdtype(arr.dtype, np.floating):
                arr = arr.astype(default)  # Python scalars and integers take JAX's default float
            bases.append(arr)
        scale = self.scale
        return [
            jax.tree_util.tree_unflatten(
                treedef,
                [(b + scale * rng.standard_normal(b.shape)).astype(b.dtype) for b in bases],
            )
            for _ in range(n)
        ]
