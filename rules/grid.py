"""The state grid and its level index: axis name <-> level names <-> flat state index.

The grid is the Cartesian product of the axes in :attr:`Spec.grid_order` (fixed, then counters
and cycles, then random axes in draw order), flattened in C order: the last axis varies fastest.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from stateworth.errors import QueryError


@dataclass(frozen=True)
class Axis:
    name: str
    kind: str
    levels: tuple[str, ...]

    @property
    def size(self) -> int:
        return len(self.levels)


@dataclass(frozen=True)
class Grid:
    """The axes of a model's state grid, in grid order. ``size`` states in all."""

    axes: tuple[Axis, ...]

    @classmethod
    def from_spec(cls, spec) -> "Grid":
        return cls(tuple(Axis(n, spec.axes[n].kind, tuple(spec.axis_levels(n))) for n in spec.grid_order))

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(a.name for a in self.axes)

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(a.size for a in self.axes)

    @property
    def size(self) -> int:
        return int(np.prod(self.shape, dtype=np.int64))

    def position(self, name: str) -> int:
        try:
            return self.names.index(name)
        except ValueError:
            raise QueryError(f"unknown axis '{name}'; axes are {', '.join(self.names)}", field=name) from None

    def axis(self, name: str) -> Axis:
        return self.axes[self.position(name)]

    def level_index(self, name: str, level: str | int) -> int:
        ax = self.axis(name)
        if isinstance(level, str):
            if level in ax.levels:
                return ax.levels.index(level)
            raise QueryError(f"'{level}' is not a level of {name}; levels are {', '.join(ax.levels)}",
                             field=name)
        if isinstance(level, (int, np.integer)) and 0 <= int(level) < ax.size:
            return int(level)
        raise QueryError(f"level {level!r} is out of range for {name} (0..{ax.size - 1})", field=name)

    def flat_index(self, coords: Mapping[str, str | int]) -> int:
        """Flat index of the state with the given level on *every* axis."""
        unknown = [k for k in coords if k not in self.names]
        if unknown:
            raise QueryError(f"unknown axis '{unknown[0]}'; axes are {', '.join(self.names)}", field=unknown[0])
        missing = [n for n in self.names if n not in coords]
        if missing:
            raise QueryError(f"no level given for axis '{missing[0]}'; a state needs one level on every axis "
                             f"({', '.join(self.names)})", field=missing[0])
        idx = [self.level_index(n, coords[n]) for n in self.names]
        return int(np.ravel_multi_index(idx, self.shape))

    def flat_indices(self, columns: Mapping[str, Sequence[int]]) -> np.ndarray:
        """Vectorised: integer level codes per axis (equal-length arrays) -> flat indices."""
        idx = [np.asarray(columns[n], dtype=np.int64) for n in self.names]
        return np.ravel_multi_index(idx, self.shape)

    def coords(self, flat: int) -> dict[str, str]:
        if not (0 <= int(flat) < self.size):
            raise QueryError(f"state index {flat} is out of range (0..{self.size - 1})", field="state")
        pos = np.unravel_index(int(flat), self.shape)
        return {a.name: a.levels[int(i)] for a, i in zip(self.axes, pos)}

    def codes(self) -> list[np.ndarray]:
        """Per-axis level codes of every state, each ``(size,)``, in flat order."""
        return [c.reshape(-1) for c in np.indices(self.shape, dtype=np.int32)]

    def describe(self) -> list[dict]:
        return [{"name": a.name, "kind": a.kind, "levels": list(a.levels)} for a in self.axes]
