"""A finite change to one factor table, renormalised within the move rules.

A :class:`TransitionChange` names a random axis, the cells of its factor (``when``: given axis
-> level or levels, spec names such as ``"next.status"``; an omitted given axis means every
level), the next level ``to`` whose probability moves, and ``delta`` (in probability, so 0.03 is
"+3 points"). In every selected cell the entry ``T[cell, to]`` becomes ``p + delta`` and the other
*allowed* entries of the row are scaled by ``(1 - p - delta) / (1 - p)`` so the row still sums to
one and forbidden moves keep probability zero. A change that would leave ``[0, 1]``, that targets
a forbidden move, or that needs mass from a row with none to give is refused with a
:class:`~stateworth.errors.QueryError` naming the cell.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np


@dataclass(frozen=True)
class TransitionChange:
    """``+delta`` on ``P(axis' = to | when)`` for the cells ``when`` selects (see module doc)."""

    axis: str
    to: str
    delta: float
    when: Mapping[str, str | Sequence[str]] = field(default_factory=dict)

    def describe(self) -> str:
        cells = ", ".join(f"{k}={v if isinstance(v, str) else '|'.join(v)}" for k, v in self.when.items())
        return f"{self.delta:+.4g} on P({self.axis}'={self.to} | {cells or 'every cell'})"


def apply_change(model, change: TransitionChange, tables: Mapping[str, np.ndarray] | None = None) -> np.ndarray:
    """The changed factor table of ``change.axis`` (``tables`` default: the model's).

    Returns the new table (same shape); raises QueryError on an unknown axis, given axis or
    level, a forbidden move, or a probability pushed outside [0, 1]."""
    raise NotImplementedError
