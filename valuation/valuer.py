"""The :class:`Valuer`: one compiled model, its solved value functions, and the queries on them.

``Valuer.build(model)`` solves ``(I - beta P) V = r`` for every reward stream (money per period
in, money out: V(s) is the expected discounted sum of the stream from state s, cash timing as the
spec states) and, when ``model.draws`` holds posterior draws of factor tables, solves every draw
in one batched computation (see :mod:`.draws`). Queries are then lookups and differences of these
arrays; only transition changes, marginal values, finite horizons and the long-run mix solve
again (and cache what they can).

Contrasts are differences V(after) - V(before) of one chain's value function: the honest value
of moving a customer, as opposed to the value of the destination state alone. Intervals are
percentile intervals over the draws, the contrast taken within each draw.
"""

from __future__ import annotations

import dataclasses
import threading
import time
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from stateworth.errors import QueryError
from stateworth.rules.rewards import period_cash
from stateworth.solver import solve
from stateworth.valuation import states as st
from stateworth.valuation.answer import CAUTION, Answer, ChangeResult, MarginalResult, percentile_interval
from stateworth.valuation.change import TransitionChange, apply_change, describe_change
from stateworth.rules.compiled import content_hash
from stateworth.valuation.block import restrict, slice_table, touched
from stateworth.valuation.draws import DENSE_MAX as DRAWS_DENSE_MAX
from stateworth.valuation.draws import (draw_rewards, horizon_draws, reward_parts, rewards_for_draws, rewards_on,
                                        slice_parts, solve_draws, stacked_tables)
from stateworth.valuation.marginal import ranked_entries, table_gradients
from stateworth.valuation.stationary import stationary_distribution

Coords = Mapping[str, "str | int"]


def _check_level(level: float) -> float:
    try:
        x = float(level)
    except (TypeError, ValueError):
        raise QueryError(f"interval level must be a number in (0, 1) (got {level!r})", field="level") from None
    if not 0.0 < x < 1.0:
        raise QueryError(f"interval level must lie strictly between 0 and 1, e.g. 0.9 (got {x})", field="level")
    return x


class Valuer:
    """Solved value functions of one compiled model, answering valuation queries from memory.

    Attributes: ``model`` (the CompiledModel), ``version`` (``model.version``), ``streams``
    (reward streams solved, in order), ``solution`` (the solver's Solution for the point
    model: ``values`` ``(n, k)``), ``has_intervals`` (True when draws were solved),
    ``n_draws``, ``draw_stats`` (the batched draw solve's statistics). Build with :meth:`build`."""

    def __init__(self, model, solution, draw_values: np.ndarray | None, tol: float,
                 draw_tables: dict[str, np.ndarray] | None = None, draw_stats: dict | None = None) -> None:
        self.model = model
        self.solution = solution
        self.streams: tuple[str, ...] = tuple(solution.streams)
        self.tol = float(tol)
        self._values = np.asarray(solution.values, dtype=np.float64)
        self._columns = {s: np.ascontiguousarray(self._values[:, j]) for j, s in enumerate(self.streams)}
        self._draws = None if draw_values is None else np.asarray(draw_values, dtype=np.float64)
        self._draw_tables = draw_tables or {}
        self.draw_stats = draw_stats or {}
        self._horizons: dict[int, np.ndarray] = {}
        self._horizon_draws: dict[int, np.ndarray] = {}
        self._stationary: dict[Any, np.ndarray] = {}
        # (stream, block) -> reward parts on the block's states (see draws.py); blocks are few
        # (one per selection of fixed levels), and slicing the full grid's parts is ~5-10 ms
        self._parts: dict[tuple, Any] = {}

    @classmethod
    def build(cls, model, *, tol: float = 1e-10, draws: bool = True,
              streams: Sequence[str] | None = None, chunk: int | None = None,
              draw_tol: float = 1e-8) -> "Valuer":
        """Solve every reward stream of ``model`` (or ``streams``) to relative residual ``tol``.

        Posterior draws are solved to ``draw_tol`` (default 1e-8; ``tol`` where that is looser):
        an interval is a percentile over draws whose spread is many orders of magnitude
        above that, and each decade of tolerance costs GMRES iterations on every draw.

        With ``draws`` and a non-empty ``model.draws`` ({axis: (D, *table shape)}), also solve
        the D drawn models (each draw replaces the tables of the axes it names) in one batched
        computation, ``chunk`` draws vectorised at a time (default: as many as memory allows),
        warm-started from the point solution and sharing its preconditioner (see
        :func:`.draws.solve_draws`). Raises QueryError on an unknown stream or draws of the wrong
        shape."""
        names = tuple(model.rewards) if streams is None else tuple(streams)
        if not names:
            raise QueryError("no reward stream to solve", field="streams")
        for s in names:
            model.reward(s)  # QueryError naming the streams
        sol = solve(model, list(names), tol=tol)
        dv, tabs, stats = None, None, None
        if draws and model.draws:
            tabs, D = stacked_tables(model)
            if D:
                t0 = time.perf_counter()
                # each chunk's rewards from its own tables: one chunk's drawn tables in memory at a time
                parts = [reward_parts(model, s) for s in names]
                dv, stats = solve_draws(model, tabs, lambda t: rewards_for_draws(model.operator, t, parts),
                                        sol.values, tol=max(tol, draw_tol), batch=chunk)
                stats["seconds"] = time.perf_counter() - t0
        return cls(model, sol, dv, tol, tabs, stats)

    # ---- metadata -------------------------------------------------------------------------
    @property
    def version(self) -> str:
        return self.model.version

    @property
    def has_intervals(self) -> bool:
        return self._draws is not None

    @property
    def n_draws(self) -> int:
        return 0 if self._draws is None else int(self._draws.shape[0])

    def unit(self, stream: str) -> str:
        """``"member-months"`` for the member_months stream, else the model's currency."""
        self._col(stream)
        return self.model.unit(stream)

    def _col(self, stream: str) -> int:
        if stream in self.streams:
            return self.streams.index(stream)
        if stream in self.model.rewards:
            raise QueryError(f"stream '{stream}' was not solved for this model; build the Valuer with it "
                             f"(solved: {', '.join(self.streams)})", field="stream")
        raise QueryError(f"unknown reward stream '{stream}'; streams are {', '.join(self.streams)}", field="stream")

    # ---- states ---------------------------------------------------------------------------
    def index(self, coords: Coords) -> int:
        """Flat state index of a full coordinate (one level on every axis). QueryError names an
        unknown axis or level, or a missing axis."""
        if not isinstance(coords, Mapping):
            raise QueryError(f"a state is a mapping axis -> level; got {type(coords).__name__}", field="coords")
        return self.model.grid.flat_index(coords)

    def index_many(self, columns: Mapping[str, Sequence[str | int]]) -> np.ndarray:
        """Vectorised :meth:`index`: per axis an equal-length sequence of level names (or codes)
        -> ``(m,)`` int64 flat indices."""
        return st.index_many(self.model.grid, columns)

    def coords(self, state: int) -> dict[str, str]:
        """The levels of one state (inverse of :meth:`index`)."""
        return self.model.grid.coords(int(state))

    def counterpart(self, coords: Coords, status: str, **levels: str) -> dict[str, str]:
        """The state a status event leads to, at the same date: ``status`` replaced, each counter
        reset to 0 when the event (join, lapse or change of status) is in its ``reset_on``, else
        unchanged; cycles, fixed and chance axes unchanged unless given in ``levels``."""
        i = self.index(coords)
        moved = st.moved_states(self.model.spec, self.model.grid, np.array([i]),
                                {self.model.spec.status_axis: status, **levels})
        return self.coords(int(moved[0]))

    # ---- lookups --------------------------------------------------------------------------
    def _states(self, states) -> np.ndarray:
        s = np.asarray(states)
        if s.size == 0:
            return np.zeros(0, dtype=np.int64)
        if s.dtype.kind not in "iu":
            raise QueryError("states must be integer flat indices (use index_many for level names)", field="states")
        s = s.astype(np.int64, copy=False).reshape(-1)
        n = self.model.n_states
        if s.size and (s.min() < 0 or s.max() >= n):
            bad = s[(s < 0) | (s >= n)][0]
            raise QueryError(f"state index {int(bad)} is out of range (0..{n - 1})", field="states")
        return s

    def _horizon_values(self, horizon: int) -> np.ndarray:
        h = int(horizon)
        if h < 0:
            raise QueryError(f"horizon must be a non-negative number of periods (got {horizon})", field="horizon")
        if h not in self._horizons:
            self._horizons[h] = np.asarray(solve(self.model, list(self.streams), horizon=h).values)
        return self._horizons[h]

    def values(self, states: np.ndarray, stream: str, horizon: int | None = None) -> np.ndarray:
        """V at flat ``states`` ``(m,)`` -> ``(m,)`` (money or member-months). ``horizon``: the
        H-period value, solved on first use and cached."""
        j = self._col(stream)
        s = self._states(states)
        if horizon is None:
            return self._columns[stream][s]
        return self._horizon_values(horizon)[s, j]

    def draw_values(self, states: np.ndarray, stream: str, horizon: int | None = None) -> np.ndarray | None:
        """V at ``states`` under each posterior draw: ``(D, m)``, or None without draws."""
        j = self._col(stream)
        s = self._states(states)
        if self._draws is None:
            return None
        if horizon is None:
            return self._draws[:, s, j]
        h = int(horizon)
        self._horizon_values(h)  # validates
        if h not in self._horizon_draws:
            rhs = draw_rewards(self.model, self._draw_tables, self.streams)
            self._horizon_draws[h] = horizon_draws(self.model, self._draw_tables, rhs, h)
        return self._horizon_draws[h][:, s, j]

    def _answer(self, kind: str, states_w: list[tuple[np.ndarray, np.ndarray]], stream: str,
                horizon: int | None, level: float, details: dict) -> Answer:
        """sum over (states, weights) pairs of w . V(states), with the same sum per draw."""
        level = _check_level(level)
        val = sum(float(np.dot(w, self.values(s, stream, horizon))) for s, w in states_w)
        interval = None
        if self._draws is not None:
            d = sum(self.draw_values(s, stream, horizon) @ w for s, w in states_w)
            lo, hi = percentile_interval(d, level)
            interval = (float(lo), float(hi))
        return Answer(kind=kind, value=val, unit=self.unit(stream), version=self.version, stream=stream,
                      interval=interval, level=level, horizon=None if horizon is None else int(horizon),
                      details=details)

    def value(self, coords: Coords, stream: str = "revenue", horizon: int | None = None,
              level: float = 0.9) -> Answer:
        """V(s) of one state, with a percentile interval at ``level`` when the model has draws."""
        i = self.index(coords)
        return self._answer("value", [(np.array([i]), np.ones(1))], stream, horizon, level,
                            {"state": self.coords(i)})

    # ---- contrasts ------------------------------------------------------------------------
    def contrast(self, before: Coords, after: Coords, stream: str = "revenue", horizon: int | None = None,
                 level: float = 0.9, kind: str = "contrast") -> Answer:
        """V(after) - V(before). The two states must agree on every fixed axis (QueryError names
        the axis otherwise): a fixed axis never changes, so no move can cross it."""
        b, a = self.index(before), self.index(after)
        cb, ca = self.coords(b), self.coords(a)
        st.check_same_fixed(self.model.grid, cb, ca)
        ans = self._answer(kind, [(np.array([a, b]), np.array([1.0, -1.0]))], stream, horizon, level,
                           {"before": cb, "after": ca})
        vb = float(self.values(np.array([b]), stream, horizon)[0])
        ans.details.update({"before_value": vb, "after_value": vb + ans.value})
        return ans

    def _status_of(self, coords: Coords) -> dict[str, str]:
        return self.coords(self.index(coords))

    def _check_plan(self, plan: str, what: str = "plan") -> None:
        spec = self.model.spec
        if plan not in spec.members:
            raise QueryError(f"'{plan}' is not a plan; plans are {', '.join(spec.members)}", field=what)

    def acquisition(self, coords: Coords, plan: str, stream: str = "revenue", horizon: int | None = None,
                    level: float = 0.9) -> Answer:
        """Value of acquiring a non-member: V(member counterpart on ``plan``) - V(non-member state).
        The counterpart is :meth:`counterpart` with the join event (tenure-like counters reset as
        the spec's ``reset_on`` says). QueryError if ``coords`` is a member, ``plan`` is not a
        plan, or ``plan`` is not sold at the state's fixed levels."""
        spec = self.model.spec
        c = self._status_of(coords)
        if c[spec.status_axis] in spec.members:
            raise QueryError(f"an acquisition starts from a non-member state; {spec.status_axis}={c[spec.status_axis]} "
                             f"is a plan (non-member levels: {', '.join(spec.non_members)})", field=spec.status_axis)
        self._check_plan(plan)
        st.check_sold(spec, c, plan)
        return self.contrast(c, self.counterpart(c, plan), stream, horizon, level, kind="acquisition")

    def plan_change(self, coords: Coords, to_plan: str, stream: str = "revenue", horizon: int | None = None,
                    level: float = 0.9) -> Answer:
        """Upgrade or downgrade of a member: V(same state on ``to_plan``) - V(state), counters reset
        where the spec resets them on a change of status."""
        spec = self.model.spec
        c = self._status_of(coords)
        cur = c[spec.status_axis]
        if cur not in spec.members:
            raise QueryError(f"a plan change starts from a member state; {spec.status_axis}={cur} is not a plan "
                             f"(plans: {', '.join(spec.members)})", field=spec.status_axis)
        self._check_plan(to_plan, "to_plan")
        if to_plan == cur:
            raise QueryError(f"the state is already on plan '{cur}'; choose another plan", field="to_plan")
        st.check_sold(spec, c, to_plan)
        return self.contrast(c, self.counterpart(c, to_plan), stream, horizon, level, kind="plan_change")

    def win_back(self, coords: Coords, to_plan: str, stream: str = "revenue", horizon: int | None = None,
                 level: float = 0.9) -> Answer:
        """Winning back a former member: like :meth:`acquisition`, but the state's status must be
        a former-member level (a non-member level that members can move into)."""
        spec = self.model.spec
        c = self._status_of(coords)
        former = st.former_member_levels(spec)
        if c[spec.status_axis] not in former:
            raise QueryError(f"a win-back starts from a former member; {spec.status_axis}={c[spec.status_axis]} is not "
                             f"one (former-member levels: {', '.join(former) or 'none'})", field=spec.status_axis)
        self._check_plan(to_plan, "to_plan")
        st.check_sold(spec, c, to_plan)
        return self.contrast(c, self.counterpart(c, to_plan), stream, horizon, level, kind="win_back")

    def engagement_change(self, coords: Coords, axis: str, to_level: str, stream: str = "revenue",
                          horizon: int | None = None, level: float = 0.9) -> Answer:
        """Lifting (or lowering) a chance axis such as an engagement band: V(state with ``axis`` at
        ``to_level``) - V(state)."""
        grid = self.model.grid
        ax = grid.axis(axis)
        if ax.kind != "chance":
            raise QueryError(f"axis '{axis}' is a {ax.kind} axis; an engagement change moves a chance axis "
                             f"({', '.join(a.name for a in grid.axes if a.kind == 'chance') or 'none'})", field="axis")
        c = self._status_of(coords)
        grid.level_index(axis, to_level)
        after = dict(c)
        after[axis] = to_level
        return self.contrast(c, after, stream, horizon, level, kind="engagement_change")

    # ---- cohorts --------------------------------------------------------------------------
    def weights_vector(self, weights: Any) -> np.ndarray:
        """Cohort weights -> ``(n,)`` normalised to sum 1. QueryError on negative, non-finite or
        all-zero weights, naming the entry."""
        return st.weights_vector(self.model.grid, weights)

    def _after_states(self, src: np.ndarray, after) -> np.ndarray:
        grid, spec = self.model.grid, self.model.spec
        if isinstance(after, Mapping):
            for k, lv in after.items():
                grid.level_index(k, lv)
            moved = st.moved_states(spec, grid, src, dict(after))
            if spec.status_axis in after:
                codes = np.stack(np.unravel_index(moved, grid.shape), axis=1)
                for plan, fax, flevel in _not_sold(spec):
                    if after[spec.status_axis] == plan:
                        hit = codes[:, grid.position(fax)] == grid.level_index(fax, flevel)
                        if hit.any():
                            raise QueryError(f"plan '{plan}' is not sold in {fax}={flevel}, where some of the cohort "
                                             "lives; restrict the weights or choose another plan", field="after")
            return moved
        if callable(after):
            out = np.empty(len(src), dtype=np.int64)
            for k, s in enumerate(src):
                cb = self.coords(int(s))
                ca = after(dict(cb))
                j = self.index(ca)
                st.check_same_fixed(grid, cb, self.coords(j))
                out[k] = j
            return out
        raise QueryError("'after' must be a mapping axis -> level or a function of a state's coordinates", field="after")

    def cohort_contrast(self, weights: Any, after: Callable[[dict[str, str]], Mapping[str, str]] | Mapping[str, str],
                        stream: str = "revenue", horizon: int | None = None, level: float = 0.9) -> Answer:
        """mu . (V(after(s)) - V(s)) for cohort weights mu (normalised to sum 1). ``after`` maps a
        state's coordinates to the state after the move, or is a mapping of axis -> level applied
        to every state (a status change moves counters as :meth:`counterpart` does)."""
        w = self.weights_vector(weights)
        src = np.flatnonzero(w)
        dst = self._after_states(src, after)
        ans = self._answer("cohort_contrast", [(dst, w[src]), (src, -w[src])], stream, horizon, level,
                           {"states": int(src.size)})
        before = float(np.dot(w[src], self.values(src, stream, horizon)))
        ans.details.update({"before_value": before, "after_value": before + ans.value})
        return ans

    def joiner_mix(self, market_axis: str, market: str) -> np.ndarray:
        """Default source mix of acquisitions in one market, ``(n,)`` summing to 1: never-member
        states with every counter at 0, weighted by their one-period probability of joining (a
        uniform never-member population filtered by who joins)."""
        spec, grid = self.model.spec, self.model.grid
        never = st.never_member_levels(spec) or list(spec.non_members)
        codes = grid.codes()
        mask = np.isin(codes[grid.position(spec.status_axis)],
                       [grid.level_index(spec.status_axis, x) for x in never])
        mask &= codes[grid.position(market_axis)] == grid.level_index(market_axis, market)
        for ax in grid.axes:
            if ax.kind == "counter":
                mask &= codes[grid.position(ax.name)] == 0
        member = np.isin(codes[grid.position(spec.status_axis)],
                         [grid.level_index(spec.status_axis, x) for x in spec.members]).astype(np.float64)
        import jax.numpy as jnp
        join = np.asarray(self.model.operator.mv(jnp.asarray(member)))
        w = np.where(mask, np.clip(join, 0.0, None), 0.0)
        if not w.sum() > 0:
            w = mask.astype(np.float64)
        if not w.sum() > 0:
            raise QueryError(f"no never-member states in {market_axis}={market}", field="joins_by_market")
        return w / w.sum()

    def campaign(self, joins_by_market: Mapping[str, float], plan: str, stream: str = "revenue", *,
                 weights: Any = None, axis: str | None = None, horizon: int | None = None,
                 level: float = 0.9) -> Answer:
        """Value of a campaign: sum over markets of incremental joins x value per acquisition.

        ``axis``: the fixed axis whose levels key ``joins_by_market`` (default the first fixed
        axis). Value per acquisition in a market: the acquisition contrast onto ``plan`` averaged
        over the joiners' source states: ``weights`` restricted to the market, or by default
        :meth:`joiner_mix`. Source states must be non-members."""
        spec, grid = self.model.spec, self.model.grid
        fixed = [a.name for a in grid.axes if a.kind == "fixed"]
        if axis is None:
            if not fixed:
                raise QueryError("the model has no fixed axis to key joins by; give joins for the whole grid "
                                 "as cohort weights instead", field="axis")
            axis = fixed[0]
        elif axis not in fixed:
            raise QueryError(f"'{axis}' is not a fixed axis; fixed axes are {', '.join(fixed) or 'none'}", field="axis")
        self._check_plan(plan)
        if not joins_by_market:
            raise QueryError("no joins given; map market levels to incremental joins", field="joins_by_market")
        base_w = None if weights is None else self.weights_vector(weights)
        codes = grid.codes()
        fpos = grid.position(axis)
        member_codes = [grid.level_index(spec.status_axis, x) for x in spec.members]
        parts: list[tuple[np.ndarray, np.ndarray]] = []
        per_market = {}
        for market, joins in joins_by_market.items():
            grid.level_index(axis, market)
            try:
                j = float(joins)
            except (TypeError, ValueError):
                raise QueryError(f"joins for {axis}={market} is not a number ({joins!r})",
                                 field=f"joins_by_market.{market}") from None
            if not np.isfinite(j):
                raise QueryError(f"joins for {axis}={market} is not finite", field=f"joins_by_market.{market}")
            st.check_sold(spec, {axis: market}, plan)
            if base_w is None:
                w = self.joiner_mix(axis, market)
            else:
                w = np.where(codes[fpos] == grid.level_index(axis, market), base_w, 0.0)
                if not w.sum() > 0:
                    raise QueryError(f"the weights give no mass to {axis}={market}", field="weights")
                w = w / w.sum()
            src = np.flatnonzero(w)
            if np.isin(codes[grid.position(spec.status_axis)][src], member_codes).any():
                raise QueryError("acquisition weights must cover non-member states only", field="weights")
            dst = st.moved_states(spec, grid, src, {spec.status_axis: plan})
            per = self._answer("acquisition", [(dst, w[src]), (src, -w[src])], stream, horizon, level, {})
            per_market[market] = {"joins": j, "value_per_acquisition": per.value,
                                  "interval": None if per.interval is None else list(per.interval)}
            parts += [(dst, j * w[src]), (src, -j * w[src])]
        ans = self._answer("campaign", parts, stream, horizon, level,
                           {"axis": axis, "plan": plan, "markets": per_market})
        return ans

    def naive_comparison(self, coords: Coords, plan: str, stream: str = "revenue") -> dict[str, Any]:
        """The shortcut figures beside the honest one, for a non-member state and a plan:
        ``member_value`` V(s+) (the usual lifetime-value shortcut), ``honest`` V(s+) - V(s),
        ``one_period`` the stream's cash in one member period at s+, ``gap_ratio`` member_value /
        honest, plus unit, version and a caution."""
        acq = self.acquisition(coords, plan, stream)
        after = self.index(acq.details["after"])
        spec = self.model.spec
        one = float(period_cash(spec, self.model.grid,
                                None if stream == "member_months" else spec.rewards[stream])[after])
        member_value = float(acq.details["after_value"])
        honest = float(acq.value)
        out = {"state": acq.details["before"], "member_state": acq.details["after"], "stream": stream,
               "unit": acq.unit, "version": self.version, "member_value": member_value, "honest": honest,
               "non_member_value": float(acq.details["before_value"]), "one_period": one,
               "gap_ratio": member_value / honest if honest != 0 else None,
               "honest_interval": None if acq.interval is None else list(acq.interval), "level": acq.level,
               "caution": CAUTION + ("; 'member_value' ignores that a non-member may join later anyway and "
                                     "'one_period' ignores that members stay")}
        return out

    # ---- changes and marginal values -------------------------------------------------------
    def transition_change(self, change: TransitionChange, stream: str = "revenue", weights: Any = None,
                          level: float = 0.9) -> ChangeResult:
        """Exact effect of ``change`` (see :mod:`.change`): re-solve the changed model warm from the
        current values; per-state delta and, with ``weights``, the cohort-weighted delta; with
        draws, the same change applied to every draw and re-solved in one batch for intervals.

        Only the fixed cells the change is conditioned on are re-solved (``when`` naming levels of
        a fixed axis the factor is given): P is block-diagonal over fixed cells, so every other
        state's delta is exactly zero. ``stats["states_resolved"]`` says how many states that was."""
        level = _check_level(level)
        j = self._col(stream)
        w = None if weights is None else self.weights_vector(weights)
        if not isinstance(change, TransitionChange):
            raise QueryError("change must be a TransitionChange", field="change")
        new = apply_change(self.model, change)
        t0 = time.perf_counter()
        model, spec = self.model, self.model.spec
        tables = {**model.tables, change.axis: new}
        # only the fixed cells the change is conditioned on can move (P is block-diagonal there)
        # the changed model's version is a hash of every table (~10 ms for the 14 MB status table
        # at 3.6e5 states); hashlib lets go of the interpreter lock, so it runs beside the solve
        version_box: list[str] = []
        hasher = threading.Thread(target=lambda: version_box.append(content_hash(spec, tables)[:12]),
                                  name="stateworth-change-hash", daemon=True)
        hasher.start()
        block = touched(model, change.axis, change.when)
        key = (stream, tuple((a, tuple(lv.tolist())) for a, lv in sorted(block.levels.items())))
        parts = self._parts.get(key)
        if parts is None:
            full = self._parts.get((stream, None))
            if full is None:
                full = self._parts[(stream, None)] = reward_parts(model, stream)
            parts = full if block.full else slice_parts(full, block.states)
            if len(self._parts) < 64:
                self._parts[key] = parts
        sub = restrict(model, block, tables, {})
        r_sub = np.asarray(rewards_on(sub.operator, [parts]))
        sub = dataclasses.replace(sub, rewards={stream: r_sub[:, 0]})
        old = self._values[block.states, j]
        # dense LU only where it is cheap; the solver's own threshold is for cold solves
        method = "gmres" if sub.n_states > DRAWS_DENSE_MAX else "auto"
        sol = solve(sub, r_sub, tol=self.tol, x0=old[:, None], method=method)
        seconds = time.perf_counter() - t0
        delta = np.zeros(model.n_states)
        delta[block.states] = sol.values[:, 0] - old
        weighted = None if w is None else float(np.dot(w, delta))
        stats = {"seconds": seconds, "warm_start": True, "states_resolved": int(block.states.size),
                 **{k: v for k, v in sol.stats().items() if k in ("method", "iterations", "operator_applies",
                                                                    "residual")}}
        interval = state_iv = None
        if self._draws is not None:
            t1 = time.perf_counter()
            D = self.n_draws
            tabs = dict(self._draw_tables)
            if change.axis in tabs:
                tabs[change.axis] = np.stack([apply_change(model, change, {change.axis: tabs[change.axis][d]},
                                                           what=f"posterior draw {d}: ") for d in range(D)])
            else:
                tabs[change.axis] = np.broadcast_to(new, (D,) + new.shape)
            factors = {f.axis: f for f in model.factors}
            tabs = {a: slice_table(model, factors[a], t, block, lead=1) for a, t in tabs.items()}
            rhs = rewards_for_draws(sub.operator, tabs, [parts])
            xd, dstats = solve_draws(sub, tabs, rhs, sol.values, tol=self.tol)
            dd = np.zeros((D, model.n_states))
            dd[:, block.states] = xd[:, :, 0] - self._draws[:, block.states, j]
            lo, hi = percentile_interval(dd, level)
            state_iv = (lo, hi)
            if w is not None:
                wlo, whi = percentile_interval(dd @ w, level)
                interval = (float(wlo), float(whi))
            stats["draws"] = {**dstats, "seconds": time.perf_counter() - t1}
        hasher.join()
        changed_version = version_box[0] if version_box else content_hash(spec, tables)[:12]
        return ChangeResult(delta=delta, weighted=weighted, unit=self.unit(stream), version=self.version,
                            changed_version=changed_version, stream=stream, interval=interval, level=level,
                            state_interval=state_iv, change=describe_change(self.model, change), stats=stats)

    def marginal(self, weights: Any, stream: str = "revenue", top: int = 20, level: float = 0.9) -> MarginalResult:
        """Marginal values for J = mu . V: one adjoint solve (I - beta P^T) lambda = mu gives
        dJ/dP_ij = beta lambda_i V_j, and, chained through the factor product (a vector-Jacobian
        product of the operator), dJ/dT for every factor-table entry; ``top`` entries ranked by the
        value of +1 point with proportional renormalisation. With draws, ``interval`` is J's."""
        level = _check_level(level)
        j = self._col(stream)
        if int(top) < 1:
            raise QueryError(f"top must be at least 1 (got {top})", field="top")
        mu = self.weights_vector(weights)
        adj = solve(self.model, mu, transpose=True, tol=self.tol)
        lam = adj.values[:, 0]
        v = self._values[:, j]
        grads = table_gradients(self.model, lam, v, reward_parts(self.model, stream))
        entries = ranked_entries(self.model, grads, int(top))
        interval = None
        if self._draws is not None:
            lo, hi = percentile_interval(self._draws[:, :, j] @ mu, level)
            interval = (float(lo), float(hi))
        return MarginalResult(objective=float(np.dot(mu, v)), unit=self.unit(stream), version=self.version,
                              stream=stream, beta=self.model.beta, entries=entries, gradients=grads, adjoint=lam,
                              values=v, interval=interval, level=level)

    # ---- long run --------------------------------------------------------------------------
    def _block_weights(self, fixed_weights) -> np.ndarray | None:
        grid = self.model.grid
        fixed = [a for a in grid.axes if a.kind == "fixed"]
        F = int(np.prod([a.size for a in fixed], dtype=np.int64)) if fixed else 1
        if fixed_weights is None:
            return np.ones(F)
        if isinstance(fixed_weights, Mapping):
            if len(fixed) != 1:
                raise QueryError("fixed_weights by level needs exactly one fixed axis; give an array over the "
                                 f"{F} fixed cells instead", field="fixed_weights")
            w = np.zeros(F)
            for k, v in fixed_weights.items():
                w[grid.level_index(fixed[0].name, k)] = float(v)
        else:
            w = np.asarray(fixed_weights, dtype=np.float64).reshape(-1)
            if w.size != F:
                raise QueryError(f"fixed_weights has {w.size} entries; the model has {F} fixed cells", field="fixed_weights")
        if not np.all(np.isfinite(w)) or (w < 0).any() or not w.sum() > 0:
            raise QueryError("fixed_weights must be finite, non-negative and not all zero", field="fixed_weights")
        return w

    def stationary(self, fixed_weights: Mapping[str, float] | np.ndarray | None = None) -> np.ndarray:
        """Long-run state distribution pi ``(n,)`` (pi P = pi, sum 1), members and non-members.
        Fixed axes split the chain into blocks; each block's stationary distribution is weighted
        by ``fixed_weights`` (level of the single fixed axis -> weight, or an array over fixed
        cells; default equal)."""
        w = self._block_weights(fixed_weights)
        key = tuple(np.round(w / w.sum(), 15))
        if key not in self._stationary:
            self._stationary[key] = stationary_distribution(self.model.operator, w)
        return self._stationary[key].copy()

    def long_run(self, weights: Any = None, fixed_weights: Mapping[str, float] | np.ndarray | None = None,
                 level: float = 0.9) -> dict[str, Any]:
        """``member_share``: long-run share of periods spent as a member (pi over member states);
        ``member_share_by_plan``; ``expected_member_months``: mu . V_member_months, the discounted
        expected member-months from the cohort ``weights`` (default pi), with an interval when
        the model has draws and member_months was solved."""
        level = _check_level(level)
        spec, grid = self.model.spec, self.model.grid
        pi = self.stationary(fixed_weights)
        status = grid.codes()[grid.position(spec.status_axis)]
        by_plan = {p: float(pi[status == grid.level_index(spec.status_axis, p)].sum()) for p in spec.members}
        mu = pi if weights is None else self.weights_vector(weights)
        interval = None
        if "member_months" in self.streams:
            mm = float(np.dot(mu, self._columns["member_months"]))
            if self._draws is not None:
                lo, hi = percentile_interval(self._draws[:, :, self.streams.index("member_months")] @ mu, level)
                interval = [float(lo), float(hi)]
        else:
            mm = float(np.dot(mu, solve(self.model, "member_months", tol=self.tol).values[:, 0]))
        return {"member_share": float(sum(by_plan.values())), "member_share_by_plan": by_plan,
                "non_member_share_by_level": {x: float(pi[status == grid.level_index(spec.status_axis, x)].sum())
                                              for x in spec.non_members},
                "expected_member_months": mm, "expected_member_months_interval": interval,
                "level": level, "unit": "member-months", "version": self.version, "caution": CAUTION}


def _not_sold(spec):
    from stateworth.rules.spec import not_sold_pairs
    return not_sold_pairs(spec)
