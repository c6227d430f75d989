"""Transition counts: one relational query over consecutive periods of each account.

The query reads a coded panel relation with columns ``account``, ``p`` (period index) and
``g<i>`` (level code of the axis at grid position ``i``, for axes observed or derived from
covariates) and returns, for every observed move ``state(t-1) -> state(t)`` with
``p(t) = p(t-1) + 1``, the current code of every grid axis, the next code of every random axis
and the number of such moves. Counters are derived inside the query from the status history
(see :func:`counter_sql`) and cycles from the period, never read from a column. Unknown codes
(NULL, e.g. gap fill rows) come out as -1.

The SQL uses only window functions (LAG, LEAD, running SUM / MIN / MAX), CASE, LEAST, COALESCE and one GROUP BY
with unquoted lower-case identifiers, so the same text runs unchanged on DuckDB (the embedded
default) and on Spark SQL. Factor counts are then margins of this joint count table, taken in
numpy (:func:`factor_counts`); the joint table has at most (grid size) x (branching) rows.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stateworth.rules.factors import Factor
from stateworth.rules.counters import counter_flags, counter_start  # noqa: F401  (counter_start re-exported)
from stateworth.estimation.panel import Layout

W = "PARTITION BY account ORDER BY p"
RUNNING = "ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW"


def _in(col: str, codes) -> str:
    codes = list(codes)
    if not codes:
        return "1 = 0"
    return f"{col} IN ({', '.join(str(int(c)) for c in codes)})"


def counter_sql(spec, lay: Layout, axis: str, s: str, sp: str) -> tuple[str, str]:
    """SQL for a counter's reset flag and advance flag of a row, from the previous status
    ``sp`` (NULL at an account's first row: then the never-member level) and the status ``s``.

    With ``r`` the reset flags and ``a`` the advance flags along an account's history, the
    counter is ``min(cap, base + sum of a over the rows since the last reset, not counting reset
    rows)``, where base is :func:`counter_start` before any reset and 0 after; this equals
    iterating :func:`stateworth.rules.counters.counter_index` row by row."""
    ax = spec.axes[axis]
    st = spec.axis_levels(spec.status_axis)
    flags = spec.member_flags()
    mem = [int(i) for i in np.flatnonzero(flags)]
    non = [int(i) for i in np.flatnonzero(~flags)]
    prev = f"COALESCE({sp}, {lay.code(spec.status_axis, spec.non_members[0])})"
    parts = []
    for ev in ax.reset_on or []:
        if ev == "join":
            parts.append(f"({_in(prev, non)} AND {_in(s, mem)})")
        elif ev == "lapse":
            parts.append(f"({_in(prev, mem)} AND {_in(s, non)})")
        elif ev == "change":
            parts.append(f"({prev} <> {s})")
    reset = f"CASE WHEN {' OR '.join(parts)} THEN 1 ELSE 0 END" if parts else "0"
    aw = ax.advance_while if ax.advance_while is not None else "always"
    if aw == "member":
        adv_codes = mem
    elif aw == "non_member":
        adv_codes = non
    elif aw == "always":
        adv_codes = list(range(len(st)))
    else:
        adv_codes = [st.index(x) for x in aw]
    adv = f"CASE WHEN {_in(s, adv_codes)} THEN 1 ELSE 0 END"
    return reset, adv


def steady_between_resets(spec, axis: str) -> bool:
    """True when a counter advances at a constant rate between its resets: every status move
    ``x -> y`` that does not reset it keeps the advance flag (``adv(x) == adv(y)``). Then, with
    consecutive periods, the counter is ``min(cap, adv * (p - p_last_reset))`` (before any reset
    ``min(cap, base + adv * (p - p_first + 1))``), which needs one running MAX instead of two
    window passes. Holds for tenure (reset on join and lapse, advance while member) and any
    counter that resets on every change; months-since-lapse without a join reset does not."""
    reset, adv = counter_flags(spec, axis)
    same = adv[:, None] == adv[None, :]
    return bool(np.all(reset | same))


def packed_codes(spec) -> list[tuple[str, int, int]]:
    """The codes the counting query packs into one integer key ``k``: ``(column, size, stride)``
    for every observed grid axis (``q<i>``) and every random axis' next code (``n<i>``); a code
    c (-1 = unknown) adds ``(c + 1) * stride``. Packing makes the window pass carry one column
    instead of one per axis (a third less time on DuckDB). Empty when the key would not fit in
    a signed 62-bit integer (then the columns are carried as they are)."""
    lay = Layout.of(spec)
    cols = [(f"q{lay.col(a)[1:]}", len(spec.axis_levels(a)) + 1) for a in spec.grid_order if a not in lay.derived]
    cols += [(f"n{lay.col(a)[1:]}", len(spec.axis_levels(a)) + 1) for a in spec.draw_order]
    out, stride = [], 1
    for c, size in cols:
        out.append((c, size, stride))
        stride *= size
    return out if stride < 2 ** 62 else []


def transitions_sql(spec, source: str, extra: tuple[str, ...] = (), general: bool = False,
                    sequenced: bool = False, pack: bool = False) -> str:
    """A query whose rows are the panel rows with their derived counters and the next row's
    codes: columns ``account, p, np`` (the next row's period), ``q<i>`` (codes of every grid
    axis in this row: the move's current state), ``n<i>`` (the next row's codes of the random
    axes), plus the ``extra`` columns of ``source``. Periods of an account must be consecutive
    (the panel loader guarantees it: gaps are an error or filled).

    All window functions run over one window (PARTITION BY account ORDER BY p): one pass for
    LEAD / LAG; counters then need one more pass (a running MAX of the last reset period) when
    every counter is :func:`steady_between_resets`, else two (running sums of reset and advance
    flags, then the running sum at the last reset). ``general=True`` forces the two-pass form
    (the tests check that both agree). ``sequenced=True``: ``source`` already carries the
    neighbour columns of :func:`stateworth.estimation.panel.sequence_sql` (``_np``, ``_sp``,
    ``_n<i>`` for every random axis), so the LEAD / LAG pass is read, not recomputed.
    ``pack=True`` (with :func:`packed_codes` non-empty): the observed ``q<i>`` and all ``n<i>``
    come out packed in one column ``k`` instead."""
    lay = Layout.of(spec)
    grid = spec.grid_order
    s = lay.col(lay.status)
    observed = [lay.col(a) for a in grid if a not in lay.derived]
    counters = [a for a in lay.derived if spec.axes[a].kind == "counter"]
    cycles = [a for a in lay.derived if spec.axes[a].kind == "cycle"]
    leads = [f"LEAD({lay.col(a)}) OVER ({W}) AS n{lay.col(a)[1:]}" for a in spec.draw_order]
    cols0 = ["account", "p"] + observed + list(extra)
    if sequenced:
        ctes = [f"t0 AS (SELECT {', '.join(cols0)}, _np AS np, "
                + ", ".join(f"_n{lay.col(a)[1:]} AS n{lay.col(a)[1:]}" for a in spec.draw_order)
                + f", _sp AS sp FROM {source})"]
    else:
        ctes = [f"t0 AS (SELECT {', '.join(cols0)}, LEAD(p) OVER ({W}) AS np, {', '.join(leads)}"
                f"{f', LAG({s}) OVER ({W}) AS sp' if counters else ''} FROM {source})"]
    nexts = [f"n{lay.col(a)[1:]}" for a in spec.draw_order]
    carry = cols0 + ["np"] + nexts
    packing = packed_codes(spec) if pack else []
    if packing:
        names = {f"q{c[1:]}": c for c in observed}
        terms = [f"CAST(COALESCE({names.get(c, c)}, -1) + 1 AS BIGINT) * {stride}" for c, _, stride in packing]
        ctes.append(f"tk AS (SELECT account, p, np, {s}{', sp' if counters else ''}, {' + '.join(terms)} AS k"
                    f"{''.join(', ' + e for e in extra)} FROM t0)")
        carry = ["account", "p", "np", s, "k"] + list(extra)
        first = "tk"
    else:
        first = "t0"
    steady = not general and all(steady_between_resets(spec, a) for a in counters)
    if counters and steady:
        lasts = [f"MIN(p) OVER ({W} {RUNNING}) AS p_first"]
        for a in counters:
            k = lay.col(a)
            r, adv = counter_sql(spec, lay, a, s, "sp")
            lasts += [f"MAX(CASE WHEN {r} = 1 THEN p END) OVER ({W} {RUNNING}) AS lr_{k}", f"{adv} AS a_{k}"]
        ctes.append(f"t1 AS (SELECT {', '.join(carry)}, {', '.join(lasts)} FROM {first})")
        vals = []
        for a in counters:
            k = lay.col(a)
            cap = len(spec.axis_levels(a)) - 1
            vals.append(f"LEAST({cap}, CASE WHEN lr_{k} IS NULL THEN {counter_start(spec, a)} + a_{k} * (p - p_first + 1) "
                        f"ELSE a_{k} * (p - lr_{k}) END) AS {k}")
        ctes.append(f"t2 AS (SELECT {', '.join(carry)}, {', '.join(vals)} FROM t1)")
        cur = "t2"
    elif counters:
        sums = []
        for a in counters:
            k = lay.col(a)
            r, adv = counter_sql(spec, lay, a, s, "sp")
            # running count of resets, and of advancing rows that are not resets
            sums += [f"{r} AS r_{k}", f"SUM({r}) OVER ({W} {RUNNING}) AS rr_{k}",
                     f"SUM(({adv}) * (1 - ({r}))) OVER ({W} {RUNNING}) AS aa_{k}"]
        ctes.append(f"t1 AS (SELECT {', '.join(carry)}, {', '.join(sums)} FROM {first})")
        vals = []
        for a in counters:
            k = lay.col(a)
            cap = len(spec.axis_levels(a)) - 1
            # the running sum at the last reset row (it is non-decreasing, so a running max)
            last = f"MAX(CASE WHEN r_{k} = 1 THEN aa_{k} END) OVER ({W} {RUNNING})"
            vals.append(f"LEAST({cap}, CASE WHEN rr_{k} = 0 THEN {counter_start(spec, a)} + aa_{k} "
                        f"ELSE aa_{k} - {last} END) AS {k}")
        ctes.append(f"t2 AS (SELECT {', '.join(carry)}, {', '.join(vals)} FROM t1)")
        cur = "t2"
    else:
        cur = first
    qs = []
    for a in grid:
        k = lay.col(a)
        if a in cycles:
            qs.append(f"p % {len(spec.axis_levels(a))} AS q{k[1:]}")
        elif not packing or a in lay.derived:
            qs.append(f"{k} AS q{k[1:]}")
    outs = ["k"] if packing else nexts
    ctes.append(f"t3 AS (SELECT account, p, np, {', '.join(qs + outs)}"
                f"{''.join(', ' + e for e in extra)} FROM {cur})")
    return "WITH " + ",\n".join(ctes) + "\nSELECT * FROM t3"


def count_sql(spec, source: str, general: bool = False, sequenced: bool = False) -> str:
    """The transition-count query: one GROUP BY over consecutive periods of each account.

    Output columns: ``k`` (the packed observed and next codes, :func:`packed_codes`; when
    packing does not fit, ``q<i>`` of the observed axes and ``n<i>`` of every random axis
    instead), ``q<i>`` of every counter and cycle, ``n`` (moves); unknown codes are -1. Rows
    are in no particular order; :func:`joint_from_columns` decodes them."""
    lay = Layout.of(spec)
    packing = packed_codes(spec)
    keys = [f"COALESCE(q{lay.col(a)[1:]}, -1) AS q{lay.col(a)[1:]}" for a in spec.grid_order
            if not packing or a in lay.derived]
    if packing:
        keys.append("k AS k")
    else:
        keys += [f"COALESCE(n{lay.col(a)[1:]}, -1) AS n{lay.col(a)[1:]}" for a in spec.draw_order]
    names = [k.split(" AS ")[1] for k in keys]
    body = transitions_sql(spec, source, general=general, sequenced=sequenced, pack=True).replace("\nSELECT * FROM t3", "")
    return (f"{body}\nSELECT {', '.join(names)}, COUNT(*) AS n FROM (SELECT {', '.join(keys)} FROM t3 "
            f"WHERE np = p + 1) t4 GROUP BY {', '.join(names)}")


def first_rows_sql(spec, source: str, sequenced: bool = False) -> str:
    """Accounts by (market code, first period, first status code): the first joins and the
    tracked population behind the never-member join hazard."""
    lay = Layout.of(spec)
    m, s = lay.col(lay.market), lay.col(lay.status)
    if sequenced:
        return f"SELECT {m} AS m, p AS fp, {s} AS s, COUNT(*) AS n FROM {source} WHERE _pp IS NULL GROUP BY {m}, p, {s}"
    return (f"SELECT {m} AS m, p AS fp, {s} AS s, COUNT(*) AS n FROM (SELECT account, p, {m}, {s}, "
            f"ROW_NUMBER() OVER ({W}) AS rn FROM {source}) f WHERE rn = 1 GROUP BY {m}, p, {s}")


@dataclass(frozen=True)
class JointCounts:
    """The joint count table: ``cur[j, i]`` code of grid axis i before move j, ``nxt[j, r]`` code
    of random axis r (draw order) after it (-1 = unknown), ``n[j]`` moves."""

    cur: np.ndarray  # (J, n_grid_axes) int64
    nxt: np.ndarray  # (J, n_random_axes) int64
    n: np.ndarray  # (J,) int64

    @property
    def total(self) -> int:
        return int(self.n.sum())


def joint_from_columns(spec, cols: dict[str, np.ndarray]) -> JointCounts:
    """Assemble a :class:`JointCounts` from the query's output columns (any engine), in a
    canonical row order so that results from different engines compare row for row."""
    lay = Layout.of(spec)
    if "k" in cols:
        k = np.asarray(cols["k"], dtype=np.int64)
        cols = dict(cols)
        for c, size, stride in packed_codes(spec):
            cols[c] = (k // stride) % size - 1
    cur = np.stack([np.asarray(cols[f"q{lay.col(a)[1:]}"], dtype=np.int64) for a in spec.grid_order], axis=1)
    nxt = np.stack([np.asarray(cols[f"n{lay.col(a)[1:]}"], dtype=np.int64) for a in spec.draw_order], axis=1)
    n = np.asarray(cols["n"], dtype=np.int64)
    keys = np.concatenate([cur, nxt], axis=1)
    order = np.lexsort(keys.T[::-1]) if len(n) else np.arange(0)
    return JointCounts(cur[order], nxt[order], n[order])


def count_duckdb(spec, con, source: str, general: bool = False) -> JointCounts:
    """Run :func:`count_sql` on a DuckDB connection over the sequenced panel table (or a view
    of it that adds the band's codes ``g<i>`` and ``_n<i>``)."""
    res = con.execute(count_sql(spec, source, general=general, sequenced=True)).fetchnumpy()
    return joint_from_columns(spec, {k: np.asarray(v) for k, v in res.items()})


def factor_counts(spec, joint: JointCounts, factor: Factor) -> np.ndarray:
    """Counts ``C[given..., next]`` of one factor: a margin of the joint table over the moves
    where every axis the factor uses is known."""
    grid = list(spec.grid_order)
    draw = list(spec.draw_order)
    cols = []
    for g in factor.given:
        if g.startswith("next."):
            cols.append(joint.nxt[:, draw.index(g[5:])])
        else:
            cols.append(joint.cur[:, grid.index(g)])
    cols.append(joint.nxt[:, draw.index(factor.axis)])
    ok = np.ones(len(joint.n), dtype=bool)
    for c in cols:
        ok &= c >= 0
    flat = np.ravel_multi_index([c[ok] for c in cols], factor.shape) if cols else np.zeros(ok.sum(), dtype=np.int64)
    out = np.bincount(flat, weights=joint.n[ok], minlength=int(np.prod(factor.shape)))
    return out.reshape(factor.shape)
