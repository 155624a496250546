r"""Predictive draws: a user function mapped over the particles of a result.

Given particles :math:`\theta_1, \dots, \theta_N` (the user's pytree, constrained space) and a
function :math:`f`, the predictive draws are

.. math::

    y_i = f(\theta_i, k_i), \qquad k_i = \mathrm{split}(k, N)_i, \qquad i = 1, \dots, N,

one independent key :math:`k_i` per particle derived from the user's key :math:`k`
(``jax.random.split``). When the particles approximate the posterior :math:`p(\theta \mid D)`
and :math:`f(\theta, k)` draws from the model :math:`p(y \mid \theta)`, the :math:`y_i` are
draws from the posterior predictive
:math:`p(y \mid D) = \int p(y \mid \theta)\, p(\theta \mid D)\, d\theta`; a deterministic
:math:`f(\theta)` (no key) gives the posterior of a derived quantity, such as a regression's
mean at new inputs. These draws are what a posterior predictive check compares with the data.

The function is ``vmap``-ped over blocks of ``block`` particles and the blocks are walked with
``lax.map`` (:func:`flowpost.numerics.map_row_blocks`), so peak memory is that of one block of
``block`` calls of :math:`f`, whatever :math:`N`; the whole map is compiled once.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp

from .._validate import callable_value, integer, prng_key
from ..numerics import map_row_blocks

__all__ = ["DEFAULT_PREDICTIVE_BLOCK", "predictive_draws"]

#: Particles per ``vmap``-ped block of :func:`predictive_draws`.
DEFAULT_PREDICTIVE_BLOCK: int = 256


def predictive_draws(
    particles: Any, fn: Callable[..., Any], key: Any = None, *, block: int = DEFAULT_PREDICTIVE_BLOCK
) -> Any:
    """``fn`` applied to every particle, vmapped in blocks; see the module docstring.

    Parameters
    ----------
    particles : pytree
        Every leaf with the leading particle axis ``N`` (as :attr:`Result.particles`).
    fn : callable
        ``fn(params, key)`` when ``key`` is given, ``fn(params)`` when it is ``None``; ``params``
        is one particle (the pytree without its leading axis) and ``key`` that particle's own
        PRNG key. It must be traceable by JAX and return a pytree of arrays (or numbers).
    key : JAX PRNG key, optional
        Split into one key per particle.
    block : int
        Particles per vmapped block (>= 1).

    Returns
    -------
    pytree
        ``fn``'s output structure, each leaf with the leading particle axis ``N``.
    """
    nargs = 1 if key is None else 2
    form = "a function fn(params)" if key is None else "a function fn(params, key)"
    callable_value("fn", fn, form + " (pass key=None for fn(params))" if key is not None else form, nargs=nargs)
    if key is not None:
        key = prng_key("key", key)
    block = integer("block", block, minimum=1)
    leaves = jax.tree.leaves(particles)
    if not leaves:
        raise ValueError("particles: expected a pytree with at least one array; got none")
    rows = jax.tree.map(jnp.asarray, particles)
    shapes = [leaf.shape for leaf in jax.tree.leaves(rows)]
    if any(len(s) < 1 for s in shapes) or len({s[0] for s in shapes}) != 1 or shapes[0][0] < 1:
        raise ValueError(
            f"particles: expected arrays sharing a leading particle axis of length >= 1; got shapes {shapes}"
        )
    n = int(shapes[0][0])

    def one_block(pair):
        tree, keys = pair
        return jax.vmap(fn)(tree) if keys is None else jax.vmap(fn)(tree, keys)

    args = (rows, None if key is None else jax.random.split(key, n))

    def mapped(a):
        return map_row_blocks(one_block, a, block=block)

    try:
        return jax.jit(mapped)(args)
    except (TypeError, ValueError) as err:
        kind = TypeError if isinstance(err, TypeError) else ValueError
        raise kind(
            f"fn: expected {form} that JAX can trace and vmap over particles, returning a pytree of "
            f"arrays; got an error while mapping it: {err}"
        ) from err
