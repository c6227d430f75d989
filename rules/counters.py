"""Counters: deterministic axes that age by one a period and reset on status events.

A counter (tenure, periods since lapse) moves with the status: from level ``c``, when the
status moves ``st -> st'``, it resets to 0 if the move is one of its ``reset_on`` events
(join: non-member -> member; lapse: member -> non-member; change: any change of level),
else advances to ``min(c + 1, size - 1)`` if the *next* status satisfies its
``advance_while``, else stays. These maps serve the operator, counting from a panel,
simulation and the preconditioner alike.
"""

from __future__ import annotations

import numpy as np


def counter_flags(spec, axis: str) -> tuple[np.ndarray, np.ndarray]:
    """``(reset[st, st'], adv[st'])`` of counter ``axis`` over status codes: the move
    ``st -> st'`` resets it (events join: non-member -> member, lapse: member -> non-member,
    change: any status change), and it advances while the *next* status is ``st'``
    (``advance_while``; default always)."""
    ax = spec.axes[axis]
    st_levels = spec.axis_levels(spec.status_axis)
    member = spec.member_flags()
    aw = ax.advance_while if ax.advance_while is not None else "always"
    if aw == "member":
        adv = member
    elif aw == "non_member":
        adv = ~member
    elif aw == "always":
        adv = np.ones(len(st_levels), dtype=bool)
    else:
        adv = np.array([lv in aw for lv in st_levels])
    S = len(st_levels)
    reset = np.zeros((S, S), dtype=bool)
    for ev in ax.reset_on or []:
        if ev == "join":
            reset |= (~member)[:, None] & member[None, :]
        elif ev == "lapse":
            reset |= member[:, None] & (~member)[None, :]
        elif ev == "change":
            reset |= ~np.eye(S, dtype=bool)
    return reset, adv


def counter_index(spec, axis: str) -> np.ndarray:
    """``idx[c, st, st']``: the next level of counter ``axis`` from level ``c`` when the status
    moves ``st -> st'``: 0 on a reset (:func:`counter_flags`); otherwise +1 (capped at the last
    level) while the next status advances it, else unchanged."""
    size = len(spec.axis_levels(axis))
    reset, adv = counter_flags(spec, axis)
    S = len(adv)
    c = np.arange(size)[:, None, None]
    nxt = np.where(adv[None, None, :], np.minimum(c + 1, size - 1), c)
    nxt = np.broadcast_to(nxt, (size, S, S)).astype(np.int32)
    nxt[:, reset] = 0
    return nxt


def counter_start(spec, axis: str) -> int:
    """The counter level a never-member is taken to hold before joining: the cap when the
    counter advances for never-members (they have been one for a long time), else 0."""
    ax = spec.axes[axis]
    size = len(spec.axis_levels(axis))
    aw = ax.advance_while if ax.advance_while is not None else "always"
    nm = spec.non_members[0]
    adv = aw in ("non_member", "always") or (isinstance(aw, list) and nm in aw)
    return size - 1 if adv else 0
