"""What a valuation query returns: a figure with its unit, model version, stream and interval.

Every answer is a dataclass with a ``to_dict()`` that is JSON-ready (plain floats, lists and
strings), which is what the gRPC server and the command line serialise. Money figures are in the
model's currency (a discounted sum of money per period); ``member_months`` figures are in
member-months. ``interval`` is a percentile interval ``(lo, hi)`` over the posterior draws of the
factor tables at ``level`` (e.g. 0.9), or ``None`` when the model carries no draws.

All figures are model-based estimates under the causal assumptions of the state grid (moves are
unconfounded given the state); they are not accounting figures, and the discount rate and the
policy behind the tables are finance's call.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from stateworth.caution import CAUTION  # noqa: F401  (re-exported: every answer carries it)


def draws_needed(level: float) -> int:
    """Fewest draws for an equal-tailed percentile interval at ``level``: ``2 / (1 - level)``, so
    that each tail of ``(1 - level) / 2`` holds at least one draw (20 at 90 %, 40 at 95 %, 200
    at 99 %). Fewer, and an end of the interval is the extreme draw itself, whatever the level
    (common practice, no source; Efron & Tibshirani 1993 advise far more draws, ~1,000, for
    percentile intervals to settle)."""
    return int(np.ceil(2.0 / (1.0 - float(level)) - 1e-9))


def percentile_interval(samples: np.ndarray, level: float, axis: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Equal-tailed percentile interval of ``samples`` along ``axis``: the ``(1 - level) / 2`` and
    ``(1 + level) / 2`` quantiles (Efron & Tibshirani's percentile method). Refused (QueryError,
    field ``level``) with fewer draws than :func:`draws_needed`."""
    a = np.asarray(samples, dtype=np.float64)
    need = draws_needed(level)
    if a.shape[axis] < need:
        from stateworth.errors import QueryError

        raise QueryError(f"a {level:.0%} interval needs at least {need} posterior draws (2 / (1 - level)) and the "
                         f"model has {a.shape[axis]}; ask a lower level or refit with more draws", field="level")
    lo = np.quantile(a, (1.0 - level) / 2.0, axis=axis)
    hi = np.quantile(a, (1.0 + level) / 2.0, axis=axis)
    return lo, hi


def _json(x: Any) -> Any:
    """Numpy scalars and arrays -> plain Python (for JSON)."""
    if isinstance(x, dict):
        return {str(k): _json(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_json(v) for v in x]
    if isinstance(x, np.ndarray):
        return _json(x.tolist())
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, float) and not np.isfinite(x):
        return None
    return x


def _interval(iv: tuple[float, float] | None) -> list[float] | None:
    return None if iv is None else [float(iv[0]), float(iv[1])]


@dataclass(frozen=True)
class Answer:
    """One figure: the value of a state, a contrast, a cohort-weighted contrast or a campaign.

    ``value``: money (``unit`` = the model's currency) or member-months, discounted to the start
    of the current period (over ``horizon`` periods when set, else the infinite horizon).
    ``interval``: percentile interval at ``level`` over the model's posterior draws, or None.
    ``details``: the parts the figure is made of (e.g. ``before``/``after`` values, per-market
    figures), JSON-ready."""

    kind: str
    value: float
    unit: str
    version: str
    stream: str
    interval: tuple[float, float] | None = None
    level: float = 0.9
    horizon: int | None = None
    details: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "value": float(self.value), "unit": self.unit, "version": self.version,
                "stream": self.stream, "interval": _interval(self.interval),
                "level": float(self.level) if self.interval is not None else None,
                "horizon": self.horizon, "details": _json(self.details), "caution": CAUTION}


@dataclass(frozen=True)
class ChangeResult:
    """The exact effect of a change to a factor table, re-solved.

    ``delta``: ``(n,)`` change of the value function per state, V_changed - V (money or
    member-months). ``weighted``: mu . delta for the cohort weights (mu normalised to sum 1), or
    None without weights. ``interval``: percentile interval of ``weighted`` over the draws (the
    same change applied to each draw); ``state_interval``: per-state ``(lo (n,), hi (n,))``.
    ``change``: the change as applied (cell, old and new probabilities). ``stats``: the warm
    re-solve's iterations, operator applies and residual."""

    delta: np.ndarray
    weighted: float | None
    unit: str
    version: str
    changed_version: str
    stream: str
    interval: tuple[float, float] | None = None
    level: float = 0.9
    state_interval: tuple[np.ndarray, np.ndarray] | None = None
    change: dict[str, Any] = field(default_factory=dict)
    stats: dict[str, Any] = field(default_factory=dict)

    @property
    def value(self) -> float | None:
        """The headline figure: the cohort-weighted change (None without weights)."""
        return self.weighted

    def to_dict(self, states: bool = False) -> dict[str, Any]:
        """JSON-ready summary; ``states=True`` adds the per-state deltas (n numbers)."""
        d = {"kind": "transition_change", "value": None if self.weighted is None else float(self.weighted),
             "unit": self.unit, "version": self.version, "changed_version": self.changed_version,
             "stream": self.stream, "interval": _interval(self.interval),
             "level": float(self.level) if self.interval is not None else None,
             "max_abs_delta": float(np.max(np.abs(self.delta))) if self.delta.size else 0.0,
             "change": _json(self.change), "stats": _json(self.stats), "caution": CAUTION}
        if states:
            d["delta"] = _json(self.delta)
            if self.state_interval is not None:
                d["delta_interval"] = [_json(self.state_interval[0]), _json(self.state_interval[1])]
        return d


@dataclass(frozen=True)
class MarginalEntry:
    """One factor-table entry and what a small change to it is worth.

    ``cell``: the given levels (spec names, e.g. ``{"next.status": "solo", "engagement": "light"}``);
    ``to``: the next level of ``axis``; ``probability``: its current value. ``per_point``: d(mu . V)
    per +0.01 of this probability with the row's other allowed entries scaled down in proportion
    (money or member-months per percentage point); ``gradient``: the raw partial derivative
    dJ/dT of the unconstrained table entry (per unit probability)."""

    axis: str
    cell: dict[str, str]
    to: str
    probability: float
    per_point: float
    gradient: float

    def to_dict(self) -> dict[str, Any]:
        return {"axis": self.axis, "cell": dict(self.cell), "to": self.to, "probability": float(self.probability),
                "per_point": float(self.per_point), "gradient": float(self.gradient)}


@dataclass(frozen=True)
class MarginalResult:
    """Marginal value of transitions for J = mu . V (mu the cohort weights, normalised to sum 1).

    ``objective``: J. ``adjoint``: lambda ``(n,)``, solving (I - beta P^T) lambda = mu (lambda_i is
    the discounted expected number of visits to state i from the cohort). ``values``: V ``(n,)``.
    dJ/dP_ij = beta lambda_i V_j (see :meth:`d_transition`). ``gradients``: per random axis, dJ/dT
    with T the factor table (same shape as the table). ``entries``: the ``top`` entries ranked by
    ``|per_point|``."""

    objective: float
    unit: str
    version: str
    stream: str
    beta: float
    entries: list[MarginalEntry]
    gradients: dict[str, np.ndarray]
    adjoint: np.ndarray
    values: np.ndarray
    interval: tuple[float, float] | None = None
    level: float = 0.9

    @property
    def value(self) -> float:
        return self.objective

    def d_transition(self, i: int, j: int) -> float:
        """dJ/dP_ij = beta lambda_i V_j for one transition of the explicit chain (state i -> j)."""
        return float(self.beta * self.adjoint[int(i)] * self.values[int(j)])

    def to_dict(self) -> dict[str, Any]:
        return {"kind": "marginal", "value": float(self.objective), "unit": self.unit, "version": self.version,
                "stream": self.stream, "interval": _interval(self.interval),
                "level": float(self.level) if self.interval is not None else None,
                "entries": [e.to_dict() for e in self.entries], "caution": CAUTION}


@dataclass(frozen=True)
class ReadoutResult:
    """Experiment read-out: two fitted models (control and treatment arms, same spec).

    ``value``: treatment minus control cohort-weighted value mu . V (money or member-months).
    ``interval``: percentile interval of that difference over independently paired draws of the
    two arms (both arms' uncertainty). ``control``/``treatment``: each arm's weighted value and
    interval; ``long_run``: per arm the long-run member share and expected member-months
    (see :meth:`Valuer.long_run`)."""

    value: float
    unit: str
    version: str
    stream: str
    control_value: float
    treatment_value: float
    interval: tuple[float, float] | None = None
    level: float = 0.9
    control_interval: tuple[float, float] | None = None
    treatment_interval: tuple[float, float] | None = None
    long_run: dict[str, dict[str, Any]] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"kind": "readout", "value": float(self.value), "unit": self.unit, "version": self.version,
                "stream": self.stream, "interval": _interval(self.interval),
                "level": float(self.level) if self.interval is not None else None,
                "control": {"value": float(self.control_value), "interval": _interval(self.control_interval)},
                "treatment": {"value": float(self.treatment_value), "interval": _interval(self.treatment_interval)},
                "long_run": _json(self.long_run), "caution": CAUTION}
