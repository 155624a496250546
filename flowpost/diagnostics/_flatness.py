r"""A score that cannot be the gradient of ``log_p``: exactly zero, or the same vector, at
points that differ.

Given points ``x_1..x_n`` in ``R^d``, the values ``f_j = log_p(x_j)`` and the autodiff
scores ``g_j = grad log_p(x_j)``, coordinate ``k`` is

- **zero** when the points differ in it (``x_jk`` not all equal) and ``g_jk = 0`` exactly at
  every point: ``log_p`` is flat in that coordinate wherever it was looked at. That is what a
  ``jnp.round``, ``jnp.floor``, an integer cast or a comparison inside ``log_p`` gives (their
  derivative is zero almost everywhere), and also a parameter that ``log_p`` does not read
  (an improper flat direction). Every gradient flow moves particles by the score, so they
  random-walk (noise) or stand still (no noise) there;
- **constant** when the points differ in it, the score is not zero there and ``g_jk`` is the
  same number at every point: ``log_p`` is linear in that coordinate across the points
  (improper on the real line unless bounded elsewhere; also the mark of a rounding that
  leaves a linear term).

The score is **identically zero** (``identically_zero``) when it is 0 in every coordinate at
every point while the points differ, and **identically constant** (``identically_constant``)
when it is the same non-zero vector at every point: the cases that no smooth, proper
``log_p`` gives. A single zero coordinate can be legitimate (a redundant coordinate, such as
the last weight of a simplex written in full).

Both are exact (bitwise) comparisons, so a smooth ``log_p`` evaluated at distinct points
never triggers them; only points with finite values and scores are considered.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

__all__ = ["ScoreFlatness", "score_flatness"]


class ScoreFlatness(NamedTuple):
    """Outcome of :func:`score_flatness`: coordinate indices, and the spread of the values."""

    zero: tuple[int, ...]
    constant: tuple[int, ...]
    points: int
    value_range: tuple[float, float]
    identically_zero: bool = False
    identically_constant: bool = False

    @property
    def found(self) -> bool:
        return bool(self.zero or self.constant)


def score_flatness(points, values, scores) -> ScoreFlatness:
    """Coordinates where the score is exactly zero, or exactly constant, over points that
    differ there (module docstring). ``points`` and ``scores`` are ``(n, d)``, ``values``
    ``(n,)``; rows with a non-finite value or score are ignored, and fewer than two usable
    rows find nothing."""
    x = np.asarray(points, dtype=np.float64)
    f = np.asarray(values, dtype=np.float64).reshape(-1)
    g = np.asarray(scores, dtype=np.float64)
    ok = np.isfinite(f) & np.all(np.isfinite(g), axis=1) & np.all(np.isfinite(x), axis=1)
    x, f, g = x[ok], f[ok], g[ok]
    if x.shape[0] < 2:
        return ScoreFlatness((), (), int(x.shape[0]), (np.nan, np.nan))
    differ = np.any(x != x[:1], axis=0)
    zero = differ & np.all(g == 0.0, axis=0)
    constant = differ & ~zero & np.all(g == g[:1], axis=0)
    moved = bool(differ.any())
    return ScoreFlatness(
        tuple(int(k) for k in np.nonzero(zero)[0]),
        tuple(int(k) for k in np.nonzero(constant)[0]),
        int(x.shape[0]),
        (float(f.min()), float(f.max())),
        identically_zero=moved and bool(np.all(g == 0.0)),
        identically_constant=moved and bool(np.all(g == g[:1])) and not bool(np.all(g == 0.0)),
    )
