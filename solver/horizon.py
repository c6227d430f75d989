"""Finite-horizon values: ``V_H = sum_{t<H} beta^t P^t r`` (H applications of P).

This is the "24-month value" of a state: the discounted cash of the next H periods only.
"""

from __future__ import annotations

from typing import Callable

import jax
import jax.numpy as jnp


def horizon_values(apply: Callable, r: jax.Array, beta: float, horizon: int) -> jax.Array:
    """Backward recursion ``V_0 = 0, V_{h+1} = r + beta P V_h``; returns ``V_H``, shape of ``r``."""
    return jax.lax.fori_loop(0, horizon, lambda _, v: r + beta * apply(v), jnp.zeros_like(r))
