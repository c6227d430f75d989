"""Transition counts: one relational query over consecutive periods of each account.

The query reads a coded panel relation with columns ``account``, ``p`` (period index) and
``g<i>`` (level code of the axis at grid position ``i``, for axes observed or derived from
covariates) and returns, for every observed move ``state(t-1) -> state(t)`` with
``p(t) = p(t-1) + 1``, the current code of every grid axis, the next code of every random axis
and the number of such moves. Counters are derived inside the query from the status history
(see :func:`counter_sql`) and cycles from the period, never read from a column. Unknown codes
(NULL, e.g. gap fill rows) come out as -1.

The SQL uses only window functions (LAG, running SUM), CASE, LEAST, COALESCE and one GROUP BY
with unquoted lower-case identifiers, so the same text runs unchanged on DuckDB (the embedded
default) and on Spark SQL. Factor counts are then margins of this joint count table, taken in
numpy (:func:`factor_counts`); the joint table has at most (grid size) x (branching) rows.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stateworth.rules.factors import Factor
from stateworth.rules.panel import Layout

W = "PARTITION BY account ORDER BY p"
RUNNING = "ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW"


def _in(col: str, codes) -> str:
    codes = list(codes)
    if not codes:
        return "1 = 0"
    return f"{col} IN ({', '.join(str(int(c)) for c in codes)})"


def counter_start(spec, axis: str) -> int:
    """The counter level a never-member is taken to hold before joining: the cap when the
    counter advances for never-members (they have been one for a long time), else 0."""
    ax = spec.axes[axis]
    size = len(spec.axis_levels(axis))
    aw = ax.advance_while if ax.advance_while is not None else "always"
    nm = spec.non_members[0]
    adv = aw in ("non_member", "always") or (isinstance(aw, list) and nm in aw)
    return size - 1 if adv else 0


def counter_sql(spec, lay: Layout, axis: str, s: str, sp: str) -> tuple[str, str]:
    """SQL for a counter's reset flag and advance flag of a row, from the previous status
    ``sp`` (NULL at an account's first row: then the never-member level) and the status ``s``.

    With ``r`` the reset flags and ``a`` the advance flags along an account's history, the
    counter is ``min(cap, base + sum of a over the rows since the last reset, not counting reset
    rows)``, where base is :func:`counter_start` before any reset and 0 after; this equals
    iterating :func:`stateworth.rules.operator.counter_index` row by row."""
    ax = spec.axes[axis]
    st = spec.axis_levels(spec.status_axis)
    mem = [i for i, lv in enumerate(st) if lv in spec.members]
    non = [i for i, lv in enumerate(st) if lv not in spec.members]
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


def transitions_sql(spec, source: str, extra: tuple[str, ...] = ()) -> str:
    """A query whose rows are the panel rows with their derived counters and the next row's
    codes: columns ``account, p, np`` (the next row's period), ``q<i>`` (codes of every grid
    axis in this row: the move's current state), ``n<i>`` (the next row's codes of the random
    axes), plus the ``extra`` columns of ``source``. Three window passes, all over one window
    (PARTITION BY account ORDER BY p), none over a second partitioning."""
    lay = Layout.of(spec)
    grid = spec.grid_order
    s = lay.col(lay.status)
    observed = [lay.col(a) for a in grid if a not in lay.derived]
    counters = [a for a in lay.derived if spec.axes[a].kind == "counter"]
    cycles = [a for a in lay.derived if spec.axes[a].kind == "cycle"]
    leads = [f"LEAD({lay.col(a)}) OVER ({W}) AS n{lay.col(a)[1:]}" for a in spec.draw_order]
    cols0 = ["account", "p"] + observed + list(extra)
    ctes = [f"t0 AS (SELECT {', '.join(cols0)}, LEAD(p) OVER ({W}) AS np, {', '.join(leads)}"
            f"{f', LAG({s}) OVER ({W}) AS sp' if counters else ''} FROM {source})"]
    nexts = [f"n{lay.col(a)[1:]}" for a in spec.draw_order]
    carry = cols0 + ["np"] + nexts
    sums = []
    for a in counters:
        k = lay.col(a)
        r, adv = counter_sql(spec, lay, a, s, "sp")
        # running count of resets, and of advancing rows that are not resets
        sums += [f"{r} AS r_{k}", f"SUM({r}) OVER ({W} {RUNNING}) AS rr_{k}",
                 f"SUM(({adv}) * (1 - ({r}))) OVER ({W} {RUNNING}) AS aa_{k}"]
    if counters:
        ctes.append(f"t1 AS (SELECT {', '.join(carry)}, {', '.join(sums)} FROM t0)")
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
        cur = "t0"
    qs = []
    for a in grid:
        k = lay.col(a)
        if a in cycles:
            qs.append(f"p % {len(spec.axis_levels(a))} AS q{k[1:]}")
        else:
            qs.append(f"{k} AS q{k[1:]}")
    ctes.append(f"t3 AS (SELECT account, p, np, {', '.join(qs)}, {', '.join(nexts)}"
                f"{''.join(', ' + e for e in extra)} FROM {cur})")
    return "WITH " + ",\n".join(ctes) + "\nSELECT * FROM t3"


def count_sql(spec, source: str) -> str:
    """The transition-count query: one GROUP BY over consecutive periods of each account.

    Output columns: ``q<i>`` for every grid axis (current codes), ``n<i>`` for every random axis
    (next codes), ``n`` (moves); unknown codes are -1. Rows are in no particular order."""
    lay = Layout.of(spec)
    keys = [f"COALESCE(q{lay.col(a)[1:]}, -1) AS q{lay.col(a)[1:]}" for a in spec.grid_order]
    keys += [f"COALESCE(n{lay.col(a)[1:]}, -1) AS n{lay.col(a)[1:]}" for a in spec.draw_order]
    names = [k.split(" AS ")[1] for k in keys]
    body = transitions_sql(spec, source).replace("\nSELECT * FROM t3", "")
    return (f"{body}\nSELECT {', '.join(names)}, COUNT(*) AS n FROM (SELECT {', '.join(keys)} FROM t3 "
            f"WHERE np = p + 1) t4 GROUP BY {', '.join(names)}")


def first_rows_sql(spec, source: str) -> str:
    """Accounts by (market code, first period, first status code): the first joins and the
    tracked population behind the never-member join hazard."""
    lay = Layout.of(spec)
    m, s = lay.col(lay.market), lay.col(lay.status)
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
    cur = np.stack([np.asarray(cols[f"q{lay.col(a)[1:]}"], dtype=np.int64) for a in spec.grid_order], axis=1)
    nxt = np.stack([np.asarray(cols[f"n{lay.col(a)[1:]}"], dtype=np.int64) for a in spec.draw_order], axis=1)
    n = np.asarray(cols["n"], dtype=np.int64)
    keys = np.concatenate([cur, nxt], axis=1)
    order = np.lexsort(keys.T[::-1]) if len(n) else np.arange(0)
    return JointCounts(cur[order], nxt[order], n[order])


def count_duckdb(spec, con, source: str) -> JointCounts:
    """Run :func:`count_sql` on a DuckDB connection."""
    res = con.execute(count_sql(spec, source)).fetchnumpy()
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
