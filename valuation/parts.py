"""A reward stream's Bellman reward as a function of the transition operator.

``r = base + scale * sum_j mask_j * (P cols_j)``: per-period cash plus the discounted expected
one-off amounts of the next status move (see :mod:`stateworth.rules.rewards`). Kept apart so that
a changed or drawn model's rewards follow from its own P without recompiling the stream.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stateworth.rules.rewards import period_cash, transition_amounts


@dataclass(frozen=True)
class RewardParts:
    """``r = base + scale * sum_j mask_j * (P cols_j)``: a stream's Bellman reward as a function of
    the operator (see rules/rewards.py). ``base`` ``(n,)``; ``cols``/``masks`` ``(n, m)`` with m the
    number of status levels that carry one-off amounts (m may be 0)."""

    base: np.ndarray
    cols: np.ndarray
    masks: np.ndarray
    scale: float


def reward_parts(model, stream: str) -> RewardParts:
    spec, grid, beta = model.spec, model.grid, model.beta
    st = None if stream == "member_months" else spec.rewards[stream]
    c = period_cash(spec, grid, st)
    a = transition_amounts(spec, st)
    codes = grid.codes()[grid.position(spec.status_axis)]
    rows = [i for i in range(a.shape[0]) if np.any(a[i] != 0)]
    cols = np.stack([a[i][codes] for i in rows], axis=1) if rows else np.zeros((grid.size, 0))
    masks = np.stack([(codes == i).astype(np.float64) for i in rows], axis=1) if rows else np.zeros((grid.size, 0))
    start = spec.model.discount.cash == "start"
    return RewardParts(base=c if start else beta * c, cols=cols, masks=masks, scale=beta)


def slice_parts(parts: RewardParts, states: np.ndarray) -> RewardParts:
    """The reward parts restricted to ``states`` (for a block sub-model)."""
    return RewardParts(base=parts.base[states], cols=parts.cols[states], masks=parts.masks[states], scale=parts.scale)
