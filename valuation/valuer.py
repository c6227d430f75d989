"""The :class:`Valuer`: one model's solved results and every query on them, behind one name.

The queries are families of functions over a :class:`~stateworth.valuation.solved.Solved` (values
of every stream, of every posterior draw, and the long-run mix): :mod:`.lookups` (values of
states), :mod:`.contrasts` (acquisition, plan change, win-back, engagement, any two states),
:mod:`.cohorts` (cohort contrasts, campaigns), :mod:`.changes` (exact transition changes),
:mod:`.marginal` (adjoint marginal values), :mod:`.longrun` (long-run mix), :mod:`.summary` (the
report's answers). A Valuer holds one
Solved and the small caches those functions share (finite horizons in the Solved, weighted long-run
mixes, reward parts of changed cells), and forwards to them; it adds no mathematics.

``Valuer.build(model)`` solves; ``Valuer.open(model_dir)`` reads the values stored with the model
(:mod:`.stored`) and solves only when there are none (or they do not match the model).
Contrasts are differences V(after) - V(before) of one chain's value function: the honest value of
moving a customer, as opposed to the value of the destination state alone. Intervals are
percentile intervals over the draws, the contrast taken within each draw.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from stateworth.valuation import changes, cohorts, contrasts, longrun, lookups
from stateworth.valuation import states as st
from stateworth.valuation.answer import Answer, ChangeResult, MarginalResult
from stateworth.valuation.change import TransitionChange
from stateworth.valuation.solved import Settings, Solved, solve_model

Coords = Mapping[str, "str | int"]


class Valuer:
    """Solved value functions of one compiled model, answering valuation queries from memory.

    Attributes: ``solved`` (the :class:`Solved`), ``model``, ``version``, ``streams``,
    ``has_intervals``, ``n_draws``, ``solve_stats`` / ``draw_stats`` (the solves' statistics),
    ``source`` ("solved" now, or "stored ..." when read from the model directory)."""

    def __init__(self, solved: Solved) -> None:
        self.solved = solved
        self._stationary: dict = {}
        self._parts: dict = {}

    # ---- construction ----------------------------------------------------------------------
    @classmethod
    def build(cls, model, *, tol: float = 1e-10, draws: bool = True, streams: Sequence[str] | None = None,
              chunk: int | None = None, draw_tol: float = 1e-8, longrun: bool = True) -> "Valuer":
        """Solve every reward stream of ``model`` (or ``streams``) to relative residual ``tol``, and
        with ``draws`` every posterior draw the model carries to ``draw_tol`` (``tol`` where that
        is looser), and the long-run mix (see :func:`.solved.solve_model`)."""
        del chunk  # the draws' method picks its own batching
        return cls(solve_model(model, settings=Settings(tol=tol, draw_tol=draw_tol), streams=streams, draws=draws,
                               longrun=longrun))

    @classmethod
    def open(cls, model_dir: str | Path, model=None, *, settings: Settings = Settings(), store: bool = True,
             note: Callable[[str], None] | None = None) -> "Valuer":
        """The Valuer of a compiled model directory from its stored values; when there are none,
        or they do not match the model (``note`` is told why, in one line), solve and, with
        ``store``, store them (``note`` is told when the directory cannot be written)."""
        from stateworth.rules.artifact import load_model
        from stateworth.valuation import stored

        model = load_model(model_dir)[0] if model is None else model
        try:
            return cls(stored.load(model_dir, model, settings))
        except FileNotFoundError:
            pass
        except stored.StoredValuesError as e:
            if note:
                note(f"stored values not used: {e}; solving again")
        v = cls(solve_model(model, settings=settings))
        if store:
            try:
                stored.save(model_dir, v.solved)
            except OSError as e:
                if note:
                    note(f"could not store the solved values in {model_dir} ({e.strerror or e}); "
                         "the next query will solve again")
        return v

    # ---- metadata -------------------------------------------------------------------------
    @property
    def model(self):
        return self.solved.model

    @property
    def version(self) -> str:
        return self.solved.version

    @property
    def streams(self) -> tuple[str, ...]:
        return self.solved.streams

    @property
    def tol(self) -> float:
        return self.solved.settings.tol

    @property
    def has_intervals(self) -> bool:
        return self.solved.draws is not None

    @property
    def n_draws(self) -> int:
        return self.solved.n_draws

    @property
    def source(self) -> str:
        return self.solved.source

    @property
    def solve_stats(self) -> dict:
        return dict(self.solved.stats.get("point") or {})

    @property
    def draw_stats(self) -> dict:
        return dict(self.solved.stats.get("draws") or {})

    def unit(self, stream: str) -> str:
        """``"member-months"`` for the member_months stream, else the model's currency."""
        return self.solved.unit(stream)

    # ---- states and lookups ---------------------------------------------------------------
    def index(self, coords: Coords) -> int:
        """Flat index of a full coordinate (any state of the grid; queries refuse unreachable ones)."""
        return lookups.index(self.solved, coords, reachable=False)

    def index_many(self, columns: Mapping[str, Sequence[str | int]]) -> np.ndarray:
        """Per axis an equal-length sequence of level names (or codes) -> ``(m,)`` flat indices."""
        return st.index_many(self.model.grid, columns)

    def coords(self, state: int) -> dict[str, str]:
        return lookups.coords(self.solved, state)

    def counterpart(self, coords: Coords, status: str, **levels: str) -> dict[str, str]:
        return contrasts.counterpart(self.solved, coords, status, **levels)

    def values(self, states: np.ndarray, stream: str, horizon: int | None = None) -> np.ndarray:
        return lookups.values(self.solved, states, stream, horizon)

    def draw_values(self, states: np.ndarray, stream: str, horizon: int | None = None) -> np.ndarray | None:
        return lookups.draw_values(self.solved, states, stream, horizon)

    def value(self, coords: Coords, stream: str = "revenue", horizon: int | None = None,
              level: float = 0.9) -> Answer:
        return lookups.value(self.solved, coords, stream, horizon, level)

    # ---- contrasts ------------------------------------------------------------------------
    def contrast(self, before: Coords, after: Coords, stream: str = "revenue", horizon: int | None = None,
                 level: float = 0.9, kind: str = "contrast") -> Answer:
        return contrasts.contrast(self.solved, before, after, stream, horizon, level, kind)

    def acquisition(self, coords: Coords, plan: str, stream: str = "revenue", horizon: int | None = None,
                    level: float = 0.9) -> Answer:
        return contrasts.acquisition(self.solved, coords, plan, stream, horizon, level)

    def plan_change(self, coords: Coords, to_plan: str, stream: str = "revenue", horizon: int | None = None,
                    level: float = 0.9) -> Answer:
        return contrasts.plan_change(self.solved, coords, to_plan, stream, horizon, level)

    def win_back(self, coords: Coords, to_plan: str, stream: str = "revenue", horizon: int | None = None,
                 level: float = 0.9) -> Answer:
        return contrasts.win_back(self.solved, coords, to_plan, stream, horizon, level)

    def engagement_change(self, coords: Coords, axis: str, to_level: str, stream: str = "revenue",
                          horizon: int | None = None, level: float = 0.9) -> Answer:
        return contrasts.engagement_change(self.solved, coords, axis, to_level, stream, horizon, level)

    def naive_comparison(self, coords: Coords, plan: str, stream: str = "revenue") -> dict[str, Any]:
        return contrasts.naive_comparison(self.solved, coords, plan, stream)

    # ---- cohorts --------------------------------------------------------------------------
    def weights_vector(self, weights: Any) -> np.ndarray:
        return cohorts.weights_vector(self.solved, weights)

    def cohort_contrast(self, weights: Any, after: Callable[[dict[str, str]], Mapping[str, str]] | Mapping[str, str],
                        stream: str = "revenue", horizon: int | None = None, level: float = 0.9) -> Answer:
        return cohorts.cohort_contrast(self.solved, weights, after, stream, horizon, level)

    def joiner_mix(self, market_axis: str, market: str) -> np.ndarray:
        return cohorts.joiner_mix(self.solved, market_axis, market)

    def campaign(self, joins_by_market: Mapping[str, float], plan: str, stream: str = "revenue", *,
                 weights: Any = None, axis: str | None = None, horizon: int | None = None,
                 level: float = 0.9) -> Answer:
        return cohorts.campaign(self.solved, joins_by_market, plan, stream, weights=weights, axis=axis,
                                horizon=horizon, level=level)

    # ---- changes and marginal values -------------------------------------------------------
    def transition_change(self, change: TransitionChange, stream: str = "revenue", weights: Any = None,
                          level: float = 0.9) -> ChangeResult:
        return changes.transition_change(self.solved, change, stream, weights, level, parts_cache=self._parts)

    def marginal(self, weights: Any, stream: str = "revenue", top: int = 20, level: float = 0.9) -> MarginalResult:
        from stateworth.valuation.marginal import marginal

        return marginal(self.solved, weights, stream, top, level)

    # ---- long run --------------------------------------------------------------------------
    def stationary(self, fixed_weights: Mapping[str, float] | np.ndarray | None = None) -> np.ndarray:
        return longrun.stationary(self.solved, fixed_weights, self._stationary)

    def long_run(self, weights: Any = None, fixed_weights: Mapping[str, float] | np.ndarray | None = None,
                 level: float = 0.9) -> dict[str, Any]:
        return longrun.long_run(self.solved, weights, fixed_weights, level, self._stationary)

    # ---- the report's answers ----------------------------------------------------------------
    def summary(self, stream: str | None = None, top: int = 12, level: float = 0.9,
                extra: Mapping[str, Any] | None = None) -> dict[str, Any]:
        """Every figure the report shows, JSON-ready (:func:`.summary.report_summary`)."""
        from stateworth.valuation.summary import report_summary

        return report_summary(self.solved, stream, top=top, level=level, extra=extra)
