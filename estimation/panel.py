"""The account panel and the market-size table: reading through DuckDB, validation, level coding.

Panel columns (CSV with a header row, or Parquet), one row per account per period:

* ``account``: the account id (text or integer; personal data, never printed);
* ``period``: the period in the spec's ``model.period``: ``2024-01`` (month), ``2024-W05`` (ISO
  week), ``2024-Q1`` (quarter), ``2024`` (year), or any date inside it (``2024-01-31``; a DATE or
  TIMESTAMP column of a Parquet file), see :mod:`.periods`;
* one column named for the status axis (e.g. ``status``) holding a level of it other than the
  never-member level (the first non-member level, e.g. ``prospect``: people who never joined
  do not appear in a panel);
* one column per ``fixed`` axis and per ``chance`` axis (e.g. ``market``, ``engagement``),
  except a propensity band axis, which is derived from its covariates;
* the covariate columns a propensity band axis names (numbers; text for those it lists as
  ``categorical``, at most :data:`MAX_CATEGORIES` distinct values);
* optional ``revenue`` (money per period, a number >= 0).

Counters (tenure, periods since lapse) and cycles (calendar month) are *derived* from the
history by :mod:`.counts`, never read from a column. Consecutive periods of an account are
transitions; a gap in an account's history is an error (``gaps="error"``) or filled with the
former-member level (``gaps="non_member"``; chance axes and covariates unknown there).

Market-size table columns: ``market`` (levels of the spec's market axis: the fixed axis named
``market``, else the first fixed axis), ``size`` (addressable accounts), ``low`` and ``high``
(a plausible range, ``low <= size <= high``), optional ``period`` (as in the panel; then one row
per market and panel period). The market column may also be named after the market axis
(``country`` for a fixed axis named country).

Every table comes from a file or a database (:mod:`.sources`: a path, or a PostgreSQL URL with a
table or query); the validation below reads either through the same DuckDB SQL. Errors name the
file (or database and table), the data row (1-based, header not counted; for a CSV also the file
line, row + 1) and the column.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np

from stateworth.errors import PanelError
# parse_period and period_label are imported from here by simulate and fit as well
from stateworth.estimation.periods import index_sql, parse_period, period_label, period_problem
from stateworth.estimation.sources import Column, TableSource, reader_error, relation, release
from stateworth.rules.spec import Spec

GapPolicy = Literal["error", "non_member"]
GAP_POLICIES = ("error", "non_member")
#: Internal table names in the DuckDB connection.
CODED = "coded"
#: Distinct values a categorical covariate may take.
MAX_CATEGORIES = 50
CSV_SUFFIXES = (".csv", ".txt", ".tsv")


@dataclass(frozen=True)
class Layout:
    """How a spec's axes map onto panel columns and internal code columns ``g<i>`` (grid position)."""

    spec: Spec
    status: str
    market: str | None  # the fixed axis the market-size table refers to
    observed: tuple[str, ...]  # axes read from columns (fixed, status, chance without propensity)
    band: str | None  # the propensity band axis, derived
    covariates: tuple[str, ...]
    derived: tuple[str, ...]  # counters and cycles
    categorical: tuple[str, ...] = ()  # covariates that are categorical (coded 0.. in sorted order)

    @classmethod
    def of(cls, spec: Spec) -> "Layout":
        fixed = [n for n, a in spec.axes.items() if a.kind == "fixed"]
        market = "market" if "market" in fixed else (fixed[0] if fixed else None)
        band = next((n for n, a in spec.axes.items() if a.kind == "chance" and a.propensity is not None), None)
        observed = tuple(n for n in spec.grid_order
                         if spec.axes[n].kind in ("fixed", "status", "chance") and n != band)
        derived = tuple(n for n in spec.grid_order if spec.axes[n].kind in ("counter", "cycle"))
        cov = tuple(spec.axes[band].propensity.covariates) if band else ()
        cat = tuple(spec.axes[band].propensity.categorical) if band else ()
        return cls(spec, spec.status_axis, market, observed, band, cov, derived, cat)

    def col(self, axis: str) -> str:
        """The internal code column of an axis (engine-neutral identifier)."""
        return f"g{self.spec.grid_order.index(axis)}"

    def cov_col(self, i: int) -> str:
        return f"v{i}"

    @property
    def never_member(self) -> str:
        return self.spec.non_members[0]

    @property
    def former_levels(self) -> list[str]:
        return self.spec.non_members[1:]

    def code(self, axis: str, level: str) -> int:
        return self.spec.axis_levels(axis).index(level)


@dataclass
class Panel:
    """A validated, level-coded panel held in a DuckDB connection as table ``coded``.

    Columns of ``coded``: ``_row`` (data row in the file, 1-based; 0 for gap fill rows), ``account``,
    ``p`` (period index, :mod:`.periods`: ``12 * year + month - 1`` for months), ``g<i>`` (level code of axis at grid position i,
    for observed axes), ``v<j>`` (covariates, DOUBLE; a categorical one as the index of its
    value in ``cov_levels``), ``revenue`` (DOUBLE or NULL), and the
    account-history columns of :func:`sequence_sql` (previous and next row), computed once in
    the same pass that codes the file."""

    con: object  # duckdb.DuckDBPyConnection
    layout: Layout
    path: str
    rows: int
    accounts: int
    p_min: int
    p_max: int
    filled: int = 0  # rows added by the gap policy
    has_revenue: bool = False
    notes: list[str] = field(default_factory=list)
    cov_levels: dict[str, list[str]] = field(default_factory=dict)  # categorical covariate -> values

    @property
    def period(self) -> str:
        """The spec's period kind (month, week, quarter, year)."""
        return self.layout.spec.model.period

    def period_label(self, p: int) -> str:
        return period_label(p, self.period)


def row_where(path: str, row: int) -> str:
    """``file: row R`` for a data row, with the file line too for a CSV (``row R (line R + 1)``:
    the header is line 1)."""
    if Path(path).suffix.lower() in CSV_SUFFIXES:
        return f"{path}: row {row} (line {row + 1})"
    return f"{path}: row {row}"


def connect(threads: int | None = None):
    """An in-memory DuckDB connection. Insertion order is not preserved (sorts and window
    passes run about a third faster); every query whose order matters says ORDER BY, and a
    CSV's row numbers are fixed once when it is read (:func:`_source`)."""
    from stateworth.extras import need

    duckdb = need("duckdb", "fit", "reading a panel")
    con = duckdb.connect(":memory:")
    if threads:
        con.execute(f"SET threads = {int(threads)}")
    con.execute("SET preserve_insertion_order = false")
    return con


def _source(path: str | Path | TableSource, con, columns: dict[str, Column] | None = None) -> tuple[str, str]:
    """A DuckDB relation text with a 1-based data row number ``_row`` for a file or a database
    table (:func:`.sources.relation`); ``columns`` are what a database source reads."""
    return relation(path, con, columns)


def panel_columns(lay: Layout) -> dict[str, Column]:
    """The panel's columns and what each holds (what a database source reads and casts)."""
    cols = {"account": Column("id"), "period": Column("period")}
    cols.update({a: Column("level") for a in lay.observed})
    cols.update({c: Column("level" if c in lay.categorical else "number") for c in lay.covariates})
    cols["revenue"] = Column("number", required=False)
    return cols


MARKET_COLUMNS = {"market": Column("level"), "size": Column("number"), "low": Column("number"),
                  "high": Column("number"), "period": Column("period", required=False)}


def _columns(con, rel: str, path: str) -> dict[str, str]:
    import duckdb

    try:
        desc = con.execute(f"DESCRIBE SELECT * FROM {rel}").fetchall()
    except duckdb.Error as e:
        raise PanelError(f"cannot be read as a table ({reader_error(e)})", where=path) from None
    return {r[0]: r[1] for r in desc}


def _header_summary(have: list[str], expected: set[str]) -> str:
    """The header row described without its unknown names (a file without a header row has
    its first data row there): the count, the expected names found, the positions of others."""
    known = [c for c in have if c in expected]
    other = [i + 1 for i, c in enumerate(have) if c not in expected]
    parts = [f"the header row has {len(have)} column(s)"]
    if known:
        parts.append(f"named {', '.join(known)}")
    if other:
        shown = ", ".join(map(str, other[:12])) + (", ..." if len(other) > 12 else "")
        parts.append(f"{len(other)} with other names at position(s) {shown} (not shown)")
    text = "; ".join(parts)
    if not known:
        text += ("; is the header row missing? The first line must name the columns "
                 "(values of a first data row are never printed)")
    return text


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _lit(s: str) -> str:
    return "'" + s.replace("'", "''") + "'"


def _first(con, sql: str):
    return con.execute(sql).fetchone()


def _case_codes(col: str, levels: list[str]) -> str:
    whens = " ".join(f"WHEN {_lit(lv)} THEN {i}" for i, lv in enumerate(levels))
    return f"CASE CAST({col} AS VARCHAR) {whens} END"


def panel_problems(spec: Spec, path: str | TableSource, con=None) -> tuple[list[tuple[str, str]], object]:
    """Validate a panel file against a spec. Returns ``([(where, message)], connection)``; the
    connection holds view ``raw`` (the file with ``_row``) when the columns were found."""
    con = con or connect()
    lay = Layout.of(spec)
    rel, kind = _source(path, con, panel_columns(lay))
    path = str(path)
    cols = _columns(con, rel, path)
    need = ["account", "period"] + list(lay.observed) + list(lay.covariates)
    missing = [c for c in need if c not in cols]
    if missing:
        have = [c for c in cols if c != "_row"]
        expected = set(need) | {"revenue"}
        return [(path, f"missing required column(s) {', '.join(missing)}; {_header_summary(have, expected)} "
                       f"(see README 'Fitting from an account panel')")], con
    con.execute(f"CREATE OR REPLACE TEMP VIEW raw AS SELECT * FROM {rel}")
    probs: list[tuple[str, str]] = []

    checks: list[tuple[str, str, object]] = []

    def example(cond: str, column: str, msg) -> None:
        checks.append((cond, column, msg))

    def run_checks() -> None:
        # one scan counts every check; only failing checks look for their first row
        if not checks:
            return
        counts = _first(con, "SELECT " + ", ".join(f"count_if({c})" for c, _, _ in checks) + " FROM raw")
        for (cond, column, msg), n in zip(checks, counts):
            if not n:
                continue
            row = _first(con, f"SELECT _row, CAST({_q(column)} AS VARCHAR) FROM raw WHERE {cond} ORDER BY _row LIMIT 1")
            more = f" ({n:,} rows in all)" if n > 1 else ""
            probs.append((f"{row_where(path, row[0])}, column {column}", msg(row[1]) + more))
        checks.clear()

    for c in ["account", "period"] + list(lay.observed):
        example(f"{_q(c)} IS NULL", c, lambda v: "empty value; every row needs one")
    kind = spec.model.period
    example(f"{_q('period')} IS NOT NULL AND ({index_sql(_q('period'), cols['period'], kind)}) IS NULL", "period",
            lambda v: period_problem(v, kind))
    for ax in lay.observed:
        lv = spec.axis_levels(ax)
        allowed = ", ".join(_lit(x) for x in lv)
        example(f"{_q(ax)} IS NOT NULL AND CAST({_q(ax)} AS VARCHAR) NOT IN ({allowed})", ax,
                lambda v, ax=ax, lv=lv: f"not a level of {ax}; levels are {', '.join(lv)}")
    nm = lay.never_member
    example(f"CAST({_q(lay.status)} AS VARCHAR) = {_lit(nm)}", lay.status,
            lambda v: f"'{nm}' rows found: people who never joined do not appear in a panel (their joining "
                      f"comes from the market-size table); use a former-member level ({', '.join(lay.former_levels) or 'none declared'}) "
                      "for accounts that lapsed")
    for c in lay.covariates:
        if c in lay.categorical:
            example(f"{_q(c)} IS NULL OR TRIM(CAST({_q(c)} AS VARCHAR)) = ''", c,
                    lambda v: "empty value; a categorical covariate needs a value on every row")
            continue
        example(f"{_q(c)} IS NULL OR TRY_CAST({_q(c)} AS DOUBLE) IS NULL OR NOT isfinite(TRY_CAST({_q(c)} AS DOUBLE))", c,
                lambda v: "the covariate value is not a finite number")
    if "revenue" in cols:
        example(f"{_q('revenue')} IS NOT NULL AND TRIM(CAST({_q('revenue')} AS VARCHAR)) <> '' AND "
                f"TRY_CAST({_q('revenue')} AS DOUBLE) IS NULL", "revenue",
                lambda v: "revenue is not a number (money per period, e.g. 29.0)")
        example(f"TRY_CAST({_q('revenue')} AS DOUBLE) < 0 OR NOT isfinite(TRY_CAST({_q('revenue')} AS DOUBLE))", "revenue",
                lambda v: "revenue is negative or not finite; revenue is money received, >= 0")
    run_checks()
    return probs, con


def _coded_flags(con, lay: Layout, cols: dict[str, str]) -> bool:
    """True when the coded panel shows any problem :func:`panel_problems` reports (a NULL code
    is a missing value or an unknown level, a NULL period index an empty or malformed
    period): one scan of the coded table instead of one of the file, so a clean panel is read
    once. The detailed messages come from :func:`panel_problems` only when this says so."""
    conds = ["account IS NULL", "p IS NULL"] + [f"{lay.col(a)} IS NULL" for a in lay.observed]
    conds.append(f"{lay.col(lay.status)} = {lay.code(lay.status, lay.never_member)}")
    conds += [f"{lay.cov_col(j)} IS NULL" if c in lay.categorical else
              f"{lay.cov_col(j)} IS NULL OR NOT isfinite({lay.cov_col(j)})" for j, c in enumerate(lay.covariates)]
    conds.append("revenue < 0 OR NOT isfinite(revenue)")
    if any(_first(con, f"SELECT {', '.join(f'count_if({c})' for c in conds)} FROM {CODED}")):
        return True
    if "revenue" in cols and cols["revenue"].upper() in ("VARCHAR", "TEXT", "STRING"):
        return bool(_first(con, f"SELECT count_if({_q('revenue')} IS NOT NULL AND TRIM({_q('revenue')}) <> '' AND "
                                f"TRY_CAST({_q('revenue')} AS DOUBLE) IS NULL) FROM raw")[0])
    return False


W_ACCOUNT = "PARTITION BY account ORDER BY p"


def sequence_sql(lay: Layout, source: str, base: list[str]) -> str:
    """``base`` columns of ``source`` plus each row's neighbours in its account's history, from
    one window pass (PARTITION BY account ORDER BY p): ``_pp`` / ``_np`` the previous / next
    row's period (NULL at the ends), ``_sp`` the previous status code, ``_n<i>`` the next code of
    every observed random axis, ``_w<j>`` the next row's covariates, ``_f<i>`` the previous code
    of every fixed axis. Validation, first rows and the counting query all read these columns,
    so the panel is sorted by account once."""
    spec = lay.spec
    w = f"OVER ({W_ACCOUNT})"
    cols = [f"LAG(p) {w} AS _pp", f"LEAD(p) {w} AS _np", f"LAG({lay.col(lay.status)}) {w} AS _sp"]
    cols += [f"LEAD({lay.col(a)}) {w} AS _n{lay.col(a)[1:]}" for a in spec.draw_order if a in lay.observed]
    cols += [f"LEAD({lay.cov_col(j)}) {w} AS _w{j}" for j in range(len(lay.covariates))]
    cols += [f"LAG({lay.col(a)}) {w} AS _f{lay.col(a)[1:]}" for a in lay.observed if spec.axes[a].kind == "fixed"]
    return f"SELECT {', '.join(base)}, {', '.join(cols)} FROM {source}"


def history_problems(con, lay: Layout, path: str) -> tuple[list[tuple[str, str]], bool]:
    """Per-account history checks over the sequenced panel (one scan): a second row for the
    same account and period, a fixed axis that changes. Returns (problems, has gaps)."""
    fixed = [a for a in lay.observed if lay.spec.axes[a].kind == "fixed"]
    conds = ["_pp = p"] + [f"_f{lay.col(a)[1:]} <> {lay.col(a)}" for a in fixed] + ["p - _pp > 1"]
    counts = _first(con, f"SELECT {', '.join(f'count_if({c})' for c in conds)} FROM {CODED}")
    probs = []
    for k, (cond, n) in enumerate(zip(conds[:-1], counts[:-1])):
        if not n:
            continue
        row = _first(con, f"SELECT _row, p FROM {CODED} WHERE {cond} ORDER BY _row LIMIT 1")
        more = f" ({n:,} rows in all)" if n > 1 else ""
        if k == 0:
            probs.append((f"{row_where(path, row[0])}, columns account, period",
                          f"a second row for the same account and period {period_label(row[1], lay.spec.model.period)}; "
                          f"one row per account per {lay.spec.model.period}{more}"))
        else:
            a = fixed[k - 1]
            probs.append((f"{row_where(path, row[0])}, column {a}",
                          f"{a} changes within an account's history; {a} is a fixed axis and never changes{more}"))
    return probs, bool(counts[-1])


def gap_example(con) -> tuple[int, int, int] | None:
    """(row, previous period, period) of the first gap in an account's history, or None."""
    return _first(con, f"SELECT _row, _pp, p FROM {CODED} WHERE p - _pp > 1 ORDER BY _row LIMIT 1")


def load_panel(spec: Spec, path: str | Path | TableSource, *, gaps: GapPolicy = "error", con=None,
               until: int | None = None) -> Panel:
    """Validate and code a panel (see the module docstring). Raises :class:`PanelError` naming
    the file, row and column of the first problem (``problems`` lists all found).

    ``until``: keep only the periods up to and including this period index (the scale of
    :attr:`Panel.p_min`), as if the file ended there: a backtest's calibration months. Rows
    keep their file row numbers."""
    if gaps not in GAP_POLICIES:
        raise PanelError(f"unknown gap policy '{gaps}'; use one of {', '.join(GAP_POLICIES)}", where="gaps")
    src, path = path, str(path)
    con = con or connect()
    lay = Layout.of(spec)
    rel, _ = _source(src, con, panel_columns(lay))
    cols = _columns(con, rel, path)
    if any(c not in cols for c in ["account", "period"] + list(lay.observed) + list(lay.covariates)):
        raise _panel_error(panel_problems(spec, src, con)[0])
    con.execute(f"CREATE OR REPLACE TEMP VIEW raw AS SELECT * FROM {rel}")
    # code first, validate on the codes: a clean file is read once, a bad one twice
    sel = ["_row", "account", f"{index_sql(_q('period'), cols['period'], spec.model.period)} AS p"]
    for ax in lay.observed:
        sel.append(f"{_case_codes(_q(ax), spec.axis_levels(ax))} AS {lay.col(ax)}")
    cov_levels = {c: _categories(con, c, path) for c in lay.categorical}
    for i, c in enumerate(lay.covariates):
        if c in lay.categorical:
            sel.append(f"{_case_codes(_q(c), cov_levels[c])} AS {lay.cov_col(i)}")
        else:
            sel.append(f"TRY_CAST({_q(c)} AS DOUBLE) AS {lay.cov_col(i)}")
    has_rev = "revenue" in cols
    sel.append(f"TRY_CAST({_q('revenue')} AS DOUBLE) AS revenue" if has_rev else "CAST(NULL AS DOUBLE) AS revenue")
    base = [x.rsplit(" AS ", 1)[-1] for x in sel]
    coded = f"(SELECT {', '.join(sel)} FROM raw) c"
    if until is not None:
        # rows with an unreadable period stay, so that validation still reports them
        coded = f"(SELECT * FROM {coded} WHERE p IS NULL OR p <= {int(until)}) c"
    con.execute(f"CREATE OR REPLACE TEMP TABLE {CODED} AS " + sequence_sql(lay, coded, base))
    if _coded_flags(con, lay, cols):
        probs, _ = panel_problems(spec, src, con)
        if not probs:  # pragma: no cover - the two checks disagree: a bug, not bad input
            raise RuntimeError("panel flagged by the coded scan but no detailed problem found")
        raise _panel_error(probs)
    filled = 0
    hist, has_gaps = history_problems(con, lay, path)
    if hist:
        raise _panel_error(hist)
    gap = gap_example(con) if has_gaps else None
    if gap is not None:
        kind = spec.model.period
        if gaps == "error":
            raise PanelError(f"a gap in the account's history: no row for {period_label(gap[1] + 1, kind)}"
                             f"{'..' + period_label(gap[2] - 1, kind) if gap[2] - gap[1] > 2 else ''} before "
                             f"{period_label(gap[2], kind)}; add the missing {kind}s or fit with --gaps non_member "
                             "(a gap is then a former-member period)", where=f"{row_where(path, gap[0])}, column period")
        if not lay.former_levels:
            raise PanelError("gaps cannot be filled as non-member periods: the status axis has no former-member "
                             "level", where=f"{row_where(path, gap[0])}, column period")
        filled = fill_gaps(con, lay, base)
    n, acc, pmin, pmax = _first(con, f"SELECT count(*), count_if(_pp IS NULL), min(p), max(p) FROM {CODED}")
    if not n:
        raise PanelError("the panel has no data rows (a header row only, or an empty file); give at least one "
                         "row per account and period", where=path)
    # every check has passed: only ``coded`` is read from here on
    con.execute("DROP VIEW raw")
    release(con, rel)
    return Panel(con=con, layout=lay, path=path, rows=int(n), accounts=int(acc), p_min=int(pmin),
                 p_max=int(pmax), filled=filled, has_revenue=has_rev, cov_levels=cov_levels)


def _categories(con, column: str, path: str) -> list[str]:
    """The distinct non-empty values of a categorical covariate, in sorted order (the first is
    the reference level of the score)."""
    vals = [r[0] for r in con.execute(
        f"SELECT DISTINCT CAST({_q(column)} AS VARCHAR) AS v FROM raw WHERE {_q(column)} IS NOT NULL AND "
        f"TRIM(CAST({_q(column)} AS VARCHAR)) <> '' ORDER BY v LIMIT {MAX_CATEGORIES + 1}").fetchall()]
    if len(vals) > MAX_CATEGORIES:
        raise PanelError(f"the categorical covariate has more than {MAX_CATEGORIES} distinct values; group rare "
                         "values, or make it numeric and drop it from propensity.categorical", where=f"{path}: column {column}")
    return vals


def fill_gaps(con, lay: Layout, base: list[str]) -> int:
    """Insert a former-member row for every missing period inside an account's history (the
    first former-member level; chance axes, covariates and revenue unknown), then recompute
    the history columns. ``base``: the coded columns. Returns the number of rows added."""
    former = lay.code(lay.status, lay.former_levels[0])
    fixed = {lay.col(a) for a in lay.observed if lay.spec.axes[a].kind == "fixed"}
    out = []
    for c in base:
        if c == "_row":
            out.append("0 AS _row")
        elif c in ("account",) or c in fixed:
            out.append(c)
        elif c == "p":
            out.append("UNNEST(range(_pp + 1, p)) AS p")
        elif c == lay.col(lay.status):
            out.append(f"{former} AS {c}")
        else:
            out.append(f"NULL AS {c}")
    before = _first(con, f"SELECT count(*) FROM {CODED}")[0]
    con.execute(f"CREATE OR REPLACE TEMP TABLE _filled AS SELECT {', '.join(base)} FROM {CODED} UNION ALL "
                f"SELECT {', '.join(out)} FROM {CODED} WHERE p - _pp > 1")
    con.execute(f"CREATE OR REPLACE TEMP TABLE {CODED} AS " + sequence_sql(lay, "_filled", base))
    con.execute("DROP TABLE _filled")
    return int(_first(con, f"SELECT count(*) FROM {CODED}")[0] - before)


def _panel_error(probs: list[tuple[str, str]]) -> PanelError:
    where, msg = probs[0]
    if len(probs) > 1:
        msg += f" (and {len(probs) - 1} more problem(s); `stateworth check --panel` lists them all)"
    err = PanelError(msg, where=where)
    err.problems = [f"{w}: {m}" for w, m in probs]  # type: ignore[attr-defined]
    return err


# ---------------------------------------------------------------------------------------------
# market sizes


@dataclass(frozen=True)
class MarketSizes:
    """Addressable accounts by market level (and period): ``size``, ``low``, ``high`` are
    ``(M, T)`` over the market axis levels and the panel periods ``p_min..p_max``."""

    axis: str
    size: np.ndarray
    low: np.ndarray
    high: np.ndarray
    by_period: bool
    listed: np.ndarray | None = None  # (M,) bool: the market has a row in the table


def load_markets(spec: Spec, path: str | Path | TableSource, panel: Panel) -> MarketSizes:
    """Read and validate the market-size table against the spec and the coded panel."""
    probs = market_problems(spec, path, panel)
    if isinstance(probs, MarketSizes):
        return probs
    raise _panel_error(probs)


def market_problems(spec: Spec, path: str | TableSource, panel: Panel) -> list[tuple[str, str]] | MarketSizes:
    con, lay = panel.con, panel.layout
    src, path = path, str(path)
    if lay.market is None:
        return [(path, "the spec declares no fixed axis; a market-size table needs a market axis "
                       "(kind = \"fixed\", named market)")]
    rel, _ = _source(src, con, MARKET_COLUMNS)
    cols = _columns(con, rel, path)
    # the market column is named `market`, or after the market axis itself (`country`)
    mcol = lay.market if lay.market in cols else "market"
    named = "market" if lay.market == "market" else f"{lay.market} (or market)"
    missing = [c if c != "market" else named for c in (mcol, "size", "low", "high") if c not in cols]
    if missing:
        return [(path, f"missing required column(s) {', '.join(missing)}; columns are {named}, size, low, high "
                       "and optionally period")]
    con.execute(f"CREATE OR REPLACE TEMP VIEW mraw AS SELECT * FROM {rel}")
    by_period = "period" in cols
    rows = con.execute(f"SELECT _row, CAST({_q(mcol)} AS VARCHAR), CAST(size AS VARCHAR), CAST(low AS VARCHAR), "
                       f"CAST(high AS VARCHAR), {'CAST(period AS VARCHAR)' if by_period else 'NULL'} FROM mraw ORDER BY _row").fetchall()
    kind = spec.model.period
    levels = spec.axis_levels(lay.market)
    T = panel.p_max - panel.p_min + 1
    M = len(levels)
    size = np.full((M, T), np.nan)
    low = np.full((M, T), np.nan)
    high = np.full((M, T), np.nan)
    probs: list[tuple[str, str]] = []
    for r, mk, *vals, per in rows:
        where = row_where(path, r)
        if mk not in levels:
            probs.append((f"{where}, column {mcol}", f"not a level of {lay.market}; levels are {', '.join(levels)}"))
            continue
        nums = []
        for name, v in zip(("size", "low", "high"), vals):
            try:
                x = float(v)
                if not np.isfinite(x) or x < 0:
                    raise ValueError
                nums.append(x)
            except (TypeError, ValueError):
                probs.append((f"{where}, column {name}", f"{name} is not a count >= 0 of addressable accounts"))
        if len(nums) < 3:
            continue
        s, lo, hi = nums
        if not lo <= s <= hi:
            probs.append((f"{where}, columns low, size, high", f"need low <= size <= high (got {lo:g}, {s:g}, {hi:g})"))
            continue
        if by_period:
            try:
                t = parse_period(per, f"{where}, column period", kind) - panel.p_min
            except PanelError as e:
                probs.append((e.where, e.message))
                continue
            if not 0 <= t < T:
                continue  # a period outside the panel is not needed
            ts = [t]
        else:
            ts = list(range(T))
        i = levels.index(mk)
        if not np.isnan(size[i, ts[0]]):
            probs.append((f"{where}, column {mcol}", f"a second row for market '{mk}'"
                          + (f" and period {per}" if by_period else "")))
            continue
        size[i, ts], low[i, ts], high[i, ts] = s, lo, hi
    if probs:
        return probs
    seen = con.execute(f"SELECT {lay.col(lay.market)}, min(p) FROM {CODED} GROUP BY 1").fetchall()
    for code, pmin in seen:
        t = int(pmin) - panel.p_min
        if np.isnan(size[code]).all():
            probs.append((f"{path}, column {mcol}", f"market '{levels[code]}' appears in the panel ({panel.path}) but "
                          "has no row in the size table; add its addressable size"))
        elif np.isnan(size[code, t:]).any():
            bad = t + int(np.argmax(np.isnan(size[code, t:])))
            probs.append((f"{path}, column period", f"no size for market '{levels[code]}' in period "
                          f"{period_label(panel.p_min + bad, kind)}, which the panel covers"))
    if probs:
        return probs
    # tracked accounts by market and period must fit inside the addressable size
    firsts = con.execute(f"SELECT {lay.col(lay.market)}, p, count(*) FROM {CODED} WHERE _pp IS NULL "
                         "GROUP BY 1, 2").fetchall()
    tracked = np.zeros((M, T))
    for code, fp, n in firsts:
        tracked[code, int(fp) - panel.p_min] += n
    tracked = np.cumsum(tracked, axis=1)
    for which, arr in (("size", size), ("low", low)):
        over = np.nan_to_num(arr, nan=np.inf) < tracked
        if over.any():
            i, t = np.argwhere(over)[0]
            probs.append((f"{path}, column {which}", f"market '{levels[i]}' has {which} {arr[i, t]:g} but the panel already "
                          f"tracks {int(tracked[i, t]):,} accounts there by {period_label(panel.p_min + t, kind)}; the addressable "
                          "size counts every account that could join, members and former members included"))
    if probs:
        return probs
    fill = lambda a: np.where(np.isnan(a), 0.0, a)  # noqa: E731 - markets absent from the panel
    return MarketSizes(lay.market, fill(size), fill(low), fill(high), by_period, ~np.isnan(size).all(axis=1))


def check_panel(spec: Spec, panel_path: str | TableSource, markets_path: str | TableSource | None, *,
                gaps: GapPolicy = "error") -> list[str]:
    """The problems found reading a panel (and its market-size table) against a spec, as
    ``"file: row R, column C: what is wrong and what would be right"`` lines (empty = fine).
    The checks a fit adds on top (forbidden moves and joins, the propensity score, the join
    hazard's at-risk counts) are in :func:`stateworth.estimation.fit.check_fit_inputs`, which
    ``stateworth check --panel`` runs."""
    try:
        panel = load_panel(spec, panel_path, gaps=gaps)
    except PanelError as e:
        return list(getattr(e, "problems", [str(e)]))
    if markets_path is None:
        return []
    try:
        res = market_problems(spec, markets_path, panel)
    except PanelError as e:
        return [str(e)]
    return [] if isinstance(res, MarketSizes) else [f"{w}: {m}" for w, m in res]
