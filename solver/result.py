"""What a solve returns: values plus an explicit status and statistics, never a bare array."""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import IntEnum

import numpy as np

from stateworth.errors import ConvergenceError


class Status(IntEnum):
    """Result status; inside jitted loops it is carried as an int32."""

    CONVERGED = 0
    MAX_ITERATIONS = 1
    BREAKDOWN = 2
    NONFINITE = 3
    STAGNATED = 4


@dataclass
class Solution:
    """Value functions of one or more reward streams.

    ``values`` is ``(n, k)``: column j solves ``(I - beta P) V = r_j`` (or the transpose system,
    or the H-period sum). Units are those of the rewards (money per period in, money out).
    ``residual`` is the max-norm relative residual max_j ||A v_j - r_j||_inf / ||r_j||_inf;
    ``bound`` a max-norm error bound on V where the method gives one."""

    values: np.ndarray
    streams: tuple[str, ...]
    method: str
    status: Status
    iterations: int
    operator_applies: int
    residual: float
    bound: float | None
    seconds: float
    beta: float
    transpose: bool = False
    horizon: int | None = None
    notes: list[str] = field(default_factory=list)
    #: value iteration only: elementwise (lower, upper) McQueen-Porteus bracket on V, each (n, k)
    bracket: tuple[np.ndarray, np.ndarray] | None = None
    #: iterative methods: the most iterations one right-hand side took (``iterations`` sums them)
    iterations_per_column: int | None = None

    def value(self, stream: str | int = 0) -> np.ndarray:
        """The ``(n,)`` value function of one stream (by name or column)."""
        j = self.streams.index(stream) if isinstance(stream, str) else int(stream)
        return self.values[:, j]

    @property
    def converged(self) -> bool:
        return self.status == Status.CONVERGED

    def stats(self) -> dict:
        return {"method": self.method, "status": self.status.name.lower(), "iterations": int(self.iterations),
                "iterations_per_column": None if self.iterations_per_column is None else int(self.iterations_per_column),
                "operator_applies": int(self.operator_applies), "residual": float(self.residual),
                "bound": None if self.bound is None else float(self.bound), "seconds": float(self.seconds),
                "beta": float(self.beta), "transpose": self.transpose, "horizon": self.horizon,
                "states": int(self.values.shape[0]), "streams": list(self.streams), "notes": list(self.notes)}

    def raise_for_status(self, tol: float) -> "Solution":
        if self.status != Status.CONVERGED:
            what = {Status.MAX_ITERATIONS: "ran out of iterations",
                    Status.BREAKDOWN: "broke down (the system may be singular: beta = 1 needs a sub-stochastic P)",
                    Status.NONFINITE: "produced non-finite values (check rewards and beta)",
                    Status.STAGNATED: "stagnated (a restart cycle no longer reduced the residual: the "
                                      "float64 rounding floor of this system is above the tolerance)"}[self.status]
            raise ConvergenceError(
                f"{self.method} solver {what} after {self.iterations} iterations with relative residual "
                f"{self.residual:.3g} (asked for {tol:.3g}); raise max_iter, loosen tol, or try method='value_iteration'",
                stats=self.stats())
        return self
