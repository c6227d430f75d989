"""Fit a spec's factor tables from an account panel: panel -> counts -> tables -> compiled model.

Steps: read and validate the panel and the market-size table (:mod:`.panel`); fit the
propensity score and cut its bands (:mod:`.propensity`) when the spec declares a band axis;
count moves with one GROUP BY (:mod:`.counts`); check the counts against the move rules; turn
counts into posterior-mean tables with draws (:mod:`.estimate`), the never-member rows of the
status factor coming from the join hazard (:mod:`.joins`); compile. Nothing is written here;
:func:`fit_to_dir` writes the artifact atomically once everything has succeeded.

Conventions for cells the panel cannot show:

* status factor, current status = never-member: from the join hazard per market (and cycle);
* chance factors at status / next status = never-member: never-members are not in the panel,
  so they borrow the moves of the former-member levels (a never-member's engagement moves like
  a former member's).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Literal

import numpy as np

from stateworth.caution import CAUTION_LINE
from stateworth.errors import PanelError
from stateworth.rules.compiled import CompiledModel, compile_model
from stateworth.estimation.counts import (JointCounts, count_duckdb, factor_counts, first_rows_sql, transitions_sql)
from stateworth.estimation.diagnostics import overlap_report, prior_report, summary_text
from stateworth.estimation.estimate import FactorFit, allowed_mask, posterior
from stateworth.rules.factors import Factor, factors_of, move_mask, plans_without_way_in, unreachable_plan_warning
from stateworth.estimation.joins import (first_row_table, hazard_summary, join_counts, prospect_rows,
                                        raw_hazard_by_band, used_hazard)
from stateworth.estimation.panel import CODED, Panel, load_markets, load_panel, row_where
from stateworth.estimation.propensity import SMD_BALANCED, Design, band_cuts, band_of, band_sql, fit_logit, smd_by_band
from stateworth.estimation.sources import TableSource, as_source
from stateworth.rules.spec import Spec

#: Fewest posterior draws a fit stores (0 = none): an equal-tailed percentile interval at level L
#: needs 2 / (1 - L) draws for each tail to hold one (stateworth.valuation.answer.draws_needed),
#: 20 at the 90 % every command shows by default.
MIN_DRAWS = 20
#: Rows used for the logistic fit at most (every k-th panel row beyond that).
LOGIT_MAX_ROWS = 1_000_000
ENGINES = ("duckdb", "spark")


@dataclass(frozen=True)
class FitOptions:
    """``strength``: prior strength alpha (pseudo-moves, every level) or ``"auto"`` (each
    parent cell's from its marginal likelihood, :mod:`.estimate`); ``forbidden``: a move the rules forbid is an ``"error"`` or is ``"drop"``-ped with a
    count; ``gaps``: a gap in an account's history is an ``"error"`` or a ``"non_member"``
    period; ``draws``: posterior draws of every table (0 = none); ``seed`` for the draws;
    ``engine``: where the counting query runs, the embedded DuckDB (default) or Spark SQL
    (:mod:`.spark`; identical counts, hence the same model hash); ``until``: fit on the periods
    up to and including this period index only (``Panel.p_min`` scale), as if the panel ended
    there: the calibration months of a backtest (:mod:`.backtest`)."""

    strength: float | Literal["auto"] = "auto"
    forbidden: Literal["error", "drop"] = "error"
    gaps: Literal["error", "non_member"] = "error"
    draws: int = 100
    seed: int = 0
    engine: Literal["duckdb", "spark"] = "duckdb"
    threads: int | None = None
    until: int | None = None


@dataclass
class FitResult:
    model: CompiledModel
    diagnostics: dict
    fits: dict[str, FactorFit]
    joint: JointCounts
    extra: dict[str, np.ndarray] = field(default_factory=dict)


def _progress(enabled: bool, total: int):
    from tqdm import tqdm

    return tqdm(total=total, disable=not enabled, unit="step", desc="fit", leave=False)


def fit_panel(spec: Spec, panel_path: str | Path | TableSource, markets_path: str | Path | TableSource,
              options: FitOptions = FitOptions(), *, source: str = "<spec>", progress: bool = False,
              population: str | Path | None = None) -> FitResult:
    """Fit every factor of ``spec`` from the panel and the market-size table (see module doc);
    each a file or a database table (:class:`.sources.TableSource`). ``population``: a sample of
    the addressable population that places never-members in propensity bands
    (:mod:`.population`)."""
    _check_options(options)
    from stateworth.estimation.panel import connect

    bar = _progress(progress, 6)
    inp = _inputs(spec, panel_path, markets_path, options, connect(options.threads), bar, population=population)
    assert inp is not None  # without a problem list, _inputs raises instead
    panel, sizes, joint, first, diag_prop = inp.panel, inp.sizes, inp.joint, inp.first, inp.propensity
    bar.set_description("fit: tables")
    rng = np.random.default_rng(options.seed)
    factors = factors_of(spec)
    fits: dict[str, FactorFit] = {}
    extra: dict[str, np.ndarray] = {}
    skips: dict[str, np.ndarray] = {}
    jdiag = {}
    for f in factors:
        C = factor_counts(spec, joint, f)
        if f.axis == spec.status_axis:
            fit, skip, jdiag, ext = _status_factor(spec, panel, f, C, first, sizes, options, rng, inp.population)
            extra.update(ext)
        else:
            C = _borrow_never_member(spec, f, C)
            fit = posterior(C, allowed_mask(spec, f), options.strength, options.draws, rng, axis=f.axis)
            skip = None
        fits[f.axis] = fit
        skips[f.axis] = skip
    bar.update()
    bar.set_description("fit: compile")
    tables = {a: ft.table for a, ft in fits.items()}
    draws = {a: ft.draws for a, ft in fits.items() if ft.draws is not None}
    metadata = {"fitted_from": {"panel": as_source(panel_path).name, "markets": as_source(markets_path, "--markets").name,
                                **({"population": os.path.basename(str(population))} if population is not None else {}),
                                "rows": panel.rows, "accounts": panel.accounts,
                                "periods": [panel.period_label(panel.p_min), panel.period_label(panel.p_max)]},
                "fit_options": {"strength": options.strength, "forbidden": options.forbidden, "gaps": options.gaps,
                                "draws": options.draws, "seed": options.seed}}
    # the engine is not part of the metadata: both engines must give the same model (hash)
    if diag_prop:
        metadata["propensity"] = {k: diag_prop[k] for k in ("axis", "covariates", "terms", "levels", "coef", "cuts")}
    model = compile_model(spec, tables, source=source, metadata=metadata, draws=draws)
    bar.update()
    bar.close()
    st_f = next(f for f in factors if f.axis == spec.status_axis)
    diag = {
        "model": spec.model.name, "version": model.version,
        "panel": {"rows": panel.rows, "accounts": panel.accounts, "period": panel.period,
                  "first_period": panel.period_label(panel.p_min), "last_period": panel.period_label(panel.p_max),
                  "moves": joint.total, "gap_rows_filled": panel.filled},
        "forbidden_dropped": inp.dropped,
        "prior": [prior_report(spec, f, fits[f.axis], skips[f.axis]) for f in factors],
        "overlap": overlap_report(spec, st_f, fits[spec.status_axis], skips[spec.status_axis]),
        "joins": jdiag,
        "warnings": inp.warnings,
        "propensity": diag_prop,
        "revenue": _revenue(spec, panel) if panel.has_revenue else None,
        "caution": CAUTION_LINE,
    }
    return FitResult(model=model, diagnostics=diag, fits=fits, joint=joint, extra=extra)


def fit_to_dir(spec: Spec, panel_path, markets_path, out_dir, options: FitOptions = FitOptions(), *,
               source: str = "<spec>", progress: bool = False, population: str | Path | None = None,
               before_publish: Callable[[FitResult, Path], None] | None = None) -> FitResult:
    """:func:`fit_panel`, then write the artifact (``diagnostics.json`` inside, and a readable
    ``diagnostics.txt``) to ``out_dir``. ``before_publish(result, tmp)`` may add to the directory
    before it appears (the command line stores the solved values there). Nothing is written if
    fitting fails."""
    from stateworth.rules.artifact import save_model

    res = fit_panel(spec, panel_path, markets_path, options, source=source, progress=progress, population=population)
    # the readable summary goes in with the rest: a model directory appears whole or not at all
    save_model(res.model, out_dir, extra=res.extra, files={"diagnostics.json": res.diagnostics},
               texts={"diagnostics.txt": summary_text(res.diagnostics) + "\n"},
               before_publish=None if before_publish is None else (lambda tmp: before_publish(res, tmp)))
    return res


def check_fit_inputs(spec: Spec, panel_path: str | Path, markets_path: str | Path | None,
                     options: FitOptions = FitOptions(draws=0),
                     population: str | Path | None = None) -> tuple[list[str], list[str]]:
    """``(problems, warnings)``: every problem :func:`fit_panel` would refuse the panel (and the
    market-size table, when given) for, as ``"where: what"`` lines, found by the same checks
    (``stateworth check --panel``); and the warnings the fit would report. Runs everything
    up to the estimation: reading and coding, the market sizes, the propensity score, the
    move counts against the move rules, the first joins and the join hazard's at-risk counts."""
    _check_options(options)
    from stateworth.estimation.panel import connect

    problems: list[str] = []
    inp = _inputs(spec, panel_path, markets_path, options, connect(options.threads), None, problems,
                  population=population)
    return problems, (inp.warnings if inp is not None else [])


@dataclass
class _Inputs:
    """The checked inputs of a fit: the coded panel, the market sizes, the move counts (forbidden
    moves dropped when the options say so) and the first-row table."""

    panel: Panel
    sizes: object  # MarketSizes, or None when checking without a market-size table
    joint: JointCounts | None
    first: np.ndarray | None
    propensity: dict | None
    dropped: int
    warnings: list[str]
    population: object = None  # a scored population sample (.population), or None


_FAILED = object()


def _inputs(spec: Spec, panel_path, markets_path, options: FitOptions, con, bar,
            problems: list[str] | None = None, population: str | Path | None = None) -> _Inputs | None:
    """Read, code and check everything a fit needs before estimating. Without ``problems`` the
    first problem raises (:func:`fit_panel`); with a list, every problem found is appended and
    the checks go on as far as the inputs allow (:func:`check_fit_inputs`), returning None when
    the panel itself could not be read."""

    def attempt(fn):
        try:
            return fn()
        except PanelError as e:
            if problems is None:
                raise
            problems.extend(getattr(e, "problems", None) or [str(e)])
            return _FAILED

    def stage(name: str) -> None:
        if bar is not None:
            bar.set_description(f"fit: {name}")

    def done() -> None:
        if bar is not None:
            bar.update()

    status = spec.status_axis
    if status not in (spec.axes[status].given or []):
        attempt(lambda: _raise(PanelError(f"axes.{status}.given must include '{status}' (the current status) to fit "
                                          "from a panel", where="spec")))
    stage("read panel")
    panel = attempt(lambda: load_panel(spec, panel_path, gaps=options.gaps, con=con, until=options.until))
    if panel is _FAILED:
        return None
    done()
    stage("market sizes")
    sizes = None
    if markets_path is not None:
        sizes = attempt(lambda: load_markets(spec, markets_path, panel))
        sizes = None if sizes is _FAILED else sizes
    done()
    lay = panel.layout
    warnings = _reach_warnings(spec, panel)
    source_rel, diag_prop, band_expr = CODED, None, None
    if lay.band:
        stage("propensity")
        prop = attempt(lambda: _propensity(spec, panel))
        if prop is _FAILED:
            return _Inputs(panel, sizes, None, None, None, 0, warnings)
        band_expr, next_band_expr, diag_prop = prop
        bc = lay.col(lay.band)
        con.execute(f"CREATE OR REPLACE TEMP VIEW banded AS SELECT *, {band_expr} AS {bc}, {next_band_expr} AS _n{bc[1:]} "
                    f"FROM {CODED}")
        source_rel = "banded"
    done()
    stage("count moves")
    if options.engine == "spark":
        from stateworth.estimation.spark import count_spark

        joint, first_rows = count_spark(spec, panel, band_expr, lay.col(lay.band) if lay.band else None)
    else:
        joint = count_duckdb(spec, con, source_rel)
        first_rows = con.execute(first_rows_sql(spec, source_rel, sequenced=True)).fetchall()
    done()
    dropped = 0
    for axis in spec.draw_order:
        res = attempt(lambda axis=axis: _check_moves(spec, panel, joint, source_rel, options.forbidden, axes=[axis]))
        if res is not _FAILED:
            joint, n = res
            dropped += n
    pop = None
    if population is not None and sizes is not None:
        got = attempt(lambda: _population(spec, panel, sizes, str(population), diag_prop, source_rel))
        if got is not _FAILED:
            pop, first_rows = got
    first = first_row_table(panel, first_rows, len(spec.axis_levels(lay.band)) if pop is not None else 1)
    res = attempt(lambda: _check_joins(spec, panel, first, options.forbidden))
    if res is not _FAILED:
        first, n = res
        dropped += n
    if sizes is not None:
        pooled = first.sum(axis=1, keepdims=True)
        for which in ("size", "low", "high"):
            if attempt(lambda which=which: join_counts(panel, pooled, getattr(sizes, which), which)) is _FAILED:
                break  # the same first rows fail alike at every size
    return _Inputs(panel, sizes, joint, first, diag_prop, dropped, warnings, pop)


def _reach_warnings(spec: Spec, panel: Panel) -> list[str]:
    """Plans no move rule leads into (:func:`plans_without_way_in`) that no panel row holds
    either: their values would be those of states nobody reaches."""
    closed = plans_without_way_in(spec)
    if not closed:
        return []
    lay = panel.layout
    held = {int(r[0]) for r in panel.con.execute(f"SELECT DISTINCT {lay.col(lay.status)} FROM {CODED}").fetchall()
            if r[0] is not None}
    return [unreachable_plan_warning(spec, plan, "and no panel row holds it") for plan in closed
            if lay.code(lay.status, plan) not in held]


def _check_options(options: FitOptions) -> None:
    if options.draws < 0 or 0 < options.draws < MIN_DRAWS:
        raise PanelError(f"{options.draws} draws: give 0 (no intervals) or at least {MIN_DRAWS}; a 90 % percentile "
                         f"interval, the level shown by default, needs 2 / (1 - 0.9) = {MIN_DRAWS} draws so that each "
                         "tail holds one", where="--draws")
    if options.engine not in ENGINES:
        raise PanelError(f"unknown engine '{options.engine}'; use one of {', '.join(ENGINES)}", where="--engine")
    if options.forbidden not in ("error", "drop"):
        raise PanelError(f"forbidden = '{options.forbidden}'; use error or drop", where="forbidden")
    if options.strength != "auto" and not (isinstance(options.strength, (int, float)) and options.strength > 0):
        raise PanelError(f"prior strength {options.strength!r}: give a number > 0 or auto", where="--strength")


# ---------------------------------------------------------------------------------------------


def _propensity(spec: Spec, panel: Panel) -> tuple[str, str, dict]:
    """(band of this row, band of the account's next row, diagnostics) as SQL over the
    covariate columns and their next-row copies ``_w<j>``."""
    lay = panel.layout
    con = panel.con
    cols = [lay.cov_col(i) for i in range(len(lay.covariates))]
    mem = [lay.code(lay.status, m) for m in spec.members]
    n = con.execute(f"SELECT count(*) FROM {CODED} WHERE {cols[0]} IS NOT NULL").fetchone()[0]
    k = max(1, -(-n // LOGIT_MAX_ROWS))
    sample = con.execute(f"SELECT _row, {', '.join(cols)}, CASE WHEN {lay.col(lay.status)} IN ({', '.join(map(str, mem))}) "
                         f"THEN 1 ELSE 0 END AS y FROM {CODED} WHERE {cols[0]} IS NOT NULL AND _row % {k} = 0").fetchnumpy()
    # the engine returns rows in any order; the fit's sums (hence its last bits) must not depend on it
    order = np.argsort(np.asarray(sample["_row"]), kind="stable")
    sample = {c: np.asarray(v)[order] for c, v in sample.items()}
    design = Design.of(lay.covariates, panel.cov_levels)
    x = design.matrix(np.column_stack([np.asarray(sample[c], dtype=np.float64) for c in cols]))
    y = np.asarray(sample["y"], dtype=np.float64)
    fit = fit_logit(x, y, design.names, where=f"{panel.path}: columns {', '.join(lay.covariates)}")
    B = len(spec.axis_levels(lay.band))
    eta = fit.eta(x)
    cuts = band_cuts(eta, B)
    band = band_of(eta, cuts)
    smd = smd_by_band(x, y, band, B)
    unbalanced = [c for j, c in enumerate(design.names) if np.nanmax(np.abs(smd[:, j])) >= SMD_BALANCED] \
        if np.isfinite(smd).any() else []
    diag = {"axis": lay.band, "covariates": list(lay.covariates), "terms": list(design.names),
            "levels": {c: list(v) for c, v in panel.cov_levels.items()}, "bands": spec.axis_levels(lay.band),
            "coef": [float(c) for c in fit.coef], "se": [float(s) for s in fit.se], "iterations": fit.iterations,
            "converged": fit.converged, "cuts": [float(c) for c in cuts], "rows_used": int(len(y)),
            "smd_by_band": [[None if not np.isfinite(v) else float(v) for v in row] for row in smd],
            "smd_rule": SMD_BALANCED, "unbalanced": unbalanced,
            "note": "score = logistic P(member | covariates) over panel rows (members and former members); "
                    "coef and smd_by_band follow terms (intercept first in coef); a categorical covariate "
                    "enters as indicators against its first value"}
    nxt = [f"_w{j}" for j in range(len(cols))]
    return (band_sql(fit, design.sql(cols), cuts, null_col=cols[0]),
            band_sql(fit, design.sql(nxt), cuts, null_col=nxt[0]), diag)


def _population(spec: Spec, panel: Panel, sizes, path: str, prop: dict | None, source: str):
    """The scored population sample and the first-row counts by band ``(m, fp, s, b, n)``."""
    from stateworth.estimation.population import load_population

    lay = panel.layout
    status = spec.status_axis
    if not lay.band or prop is None:
        raise PanelError("a population sample places never-members in propensity bands, and the spec declares no "
                         "band axis (a chance axis with propensity = { covariates = [...] })", where="--population")
    if lay.band not in (spec.axes[status].given or []):
        raise PanelError(f"axes.{status}.given does not list the band '{lay.band}', so joining cannot depend on it; "
                         f"add it there or fit without --population", where="--population")
    design = Design.of(lay.covariates, panel.cov_levels)
    coef, cuts = np.asarray(prop["coef"]), np.asarray(prop["cuts"])
    # the same score and cuts as the panel's band (fit.eta's arithmetic)
    score = lambda x: band_of(coef[0] + design.matrix(x) @ coef[1:], cuts)  # noqa: E731
    pop = load_population(spec, path, panel, sizes, score)
    bc = lay.col(lay.band)
    m, s_ = lay.col(lay.market), lay.col(lay.status)
    rows = panel.con.execute(f"SELECT {m}, p, {s_}, {bc}, COUNT(*) FROM {source} WHERE _pp IS NULL "
                             f"GROUP BY {m}, p, {s_}, {bc}").fetchall()
    if any(r[3] is None for r in rows):
        raise PanelError("an account's first row has no band (its covariates are missing)",
                         where=f"{panel.path}: columns {', '.join(lay.covariates)}")
    return pop, rows


def _mask_codes(spec: Spec, axis: str, joint: JointCounts) -> np.ndarray:
    """Bool (J,): the move of ``axis`` in each joint row is allowed (unknown codes pass)."""
    dims, mask = move_mask(spec, axis)
    grid, draw = list(spec.grid_order), list(spec.draw_order)
    cols = [joint.cur[:, grid.index(d)] for d in dims[:-1]] + [joint.nxt[:, draw.index(axis)]]
    ok = np.ones(len(joint.n), dtype=bool)
    known = np.all([c >= 0 for c in cols], axis=0) if cols else ok
    idx = tuple(np.where(known, c, 0) for c in cols)
    ok = np.where(known, mask[idx], True)
    return ok


def _check_moves(spec, panel: Panel, joint: JointCounts, source: str, policy: str,
                 axes: list[str] | None = None) -> tuple[JointCounts, int]:
    """Moves of ``axes`` (default: every random axis) the move rules forbid: an error naming an
    example row, or dropped with their count."""
    keep = np.ones(len(joint.n), dtype=bool)
    for axis in axes if axes is not None else spec.draw_order:
        ok = _mask_codes(spec, axis, joint)
        if ok.all():
            continue
        j = int(np.argmax(~ok))
        if policy == "error":
            raise _forbidden_error(spec, panel, joint, j, axis, int(joint.n[~ok].sum()), source)
        keep &= ok
    dropped = int(joint.n[~keep].sum())
    return JointCounts(joint.cur[keep], joint.nxt[keep], joint.n[keep]), dropped


def _forbidden_error(spec, panel: Panel, joint: JointCounts, j: int, axis: str, total: int, source: str) -> PanelError:
    lay = panel.layout
    grid, draw = list(spec.grid_order), list(spec.draw_order)
    conds = ["np = p + 1"]
    for i, a in enumerate(grid):
        if joint.cur[j, i] >= 0:
            conds.append(f"q{lay.col(a)[1:]} = {int(joint.cur[j, i])}")
    for r, a in enumerate(draw):
        if joint.nxt[j, r] >= 0:
            conds.append(f"n{lay.col(a)[1:]} = {int(joint.nxt[j, r])}")
    sql = transitions_sql(spec, source, extra=("_row",), sequenced=True)
    row = panel.con.execute(f"SELECT _row FROM ({sql}) x WHERE {' AND '.join(conds)} ORDER BY _row LIMIT 1").fetchone()
    frm = spec.axis_levels(axis)[joint.cur[j, grid.index(axis)]]
    to = spec.axis_levels(axis)[joint.nxt[j, draw.index(axis)]]
    ctx = ", ".join(f"{a}={spec.axis_levels(a)[joint.cur[j, grid.index(a)]]}" for a in grid
                    if spec.axes[a].kind == "fixed")
    where = f"{row_where(panel.path, row[0]) if row else panel.path}, column {axis}"
    return PanelError(f"the move {axis} {frm} -> {to} ({ctx}) from this row to the account's next {panel.period} is forbidden by the spec's move rules "
                      f"({total:,} such moves in the panel); correct the data, allow the move in axes.{axis}.moves / "
                      "not_sold, or fit with --drop-forbidden to drop them with a count", where=where)


def _check_joins(spec, panel: Panel, first: np.ndarray, policy: str) -> tuple[np.ndarray, int]:
    """First joins into plans the rules forbid from the never-member level (or in a market)."""
    lay = panel.layout
    nm = lay.code(lay.status, lay.never_member)
    allowed = _prospect_allowed(spec, lay.market)  # (M, S)
    bad = (first[:, :, 1:, :] > 0) & ~allowed[:, None, None, :]  # first: (M, bands, T, S)
    if not bad.any():
        return first, 0
    if policy == "drop":
        out = first.copy()
        n = int(out[:, :, 1:, :][bad].sum())
        out[:, :, 1:, :][bad] = 0
        return out, n
    m, _, t, s = np.argwhere(bad)[0]
    row = panel.con.execute(
        f"SELECT _row FROM (SELECT _row, p, {lay.col(lay.market)} AS m, {lay.col(lay.status)} AS s, ROW_NUMBER() OVER "
        f"(PARTITION BY account ORDER BY p) AS rn FROM {CODED}) f WHERE rn = 1 AND m = {m} AND s = {s} "
        f"AND p = {panel.p_min + t + 1} ORDER BY _row LIMIT 1").fetchone()
    st = spec.axis_levels(lay.status)
    return first, _raise(PanelError(
        f"an account's first row (its join) is in {st[s]} in market {spec.axis_levels(lay.market)[m]}, a move from "
        f"{st[nm]} the spec's move rules forbid; correct the data, allow it in axes.{lay.status}.moves, or fit with "
        "--drop-forbidden", where=f"{row_where(panel.path, row[0]) if row else panel.path}, column {lay.status}"))


def _raise(err: Exception):
    raise err


def _prospect_allowed(spec, market: str) -> np.ndarray:
    """(M, S) allowed next status from the never-member level in each market."""
    status = spec.status_axis
    dims, mask = move_mask(spec, status)
    nm = spec.axis_levels(status).index(spec.non_members[0])
    M = len(spec.axis_levels(market))
    out = np.ones((M, mask.shape[-1]), dtype=bool)
    for mi in range(M):
        idx = []
        for d in dims[:-1]:
            if d == status:
                idx.append(nm)
            elif d == market:
                idx.append(mi)
            else:
                idx.append(slice(None))
        sub = mask[tuple(idx)]
        out[mi] = sub.reshape(-1, mask.shape[-1]).all(axis=0)
    return out


def _status_factor(spec, panel: Panel, f: Factor, C: np.ndarray, first: np.ndarray, sizes, options: FitOptions, rng,
                   population=None):
    """The status factor: panel moves for members and former members; the never-member rows
    from the join hazard (by band when ``population`` is a scored :class:`.population.PopulationSample`
    and the status factor is given the band). Returns (fit, skip mask of never-member cells,
    joins diagnostics, extras)."""
    lay = panel.layout
    status = spec.status_axis
    nm = lay.code(status, lay.never_member)
    allowed = allowed_mask(spec, f)
    fit = posterior(C, allowed, options.strength, options.draws, rng, axis=status)
    given = list(f.given)
    if status not in given:
        raise PanelError(f"axes.{status}.given must include '{status}' (the current status) to fit from a panel",
                         where="spec")
    pos = given.index(status)
    skip = np.zeros(f.shape[:-1], dtype=bool)
    skip[(slice(None),) * pos + (nm,)] = True
    m_levels = spec.axis_levels(lay.market)
    allowed_p = _prospect_allowed(spec, lay.market)  # (M, S)
    market_given = lay.market in given
    by_band = population is not None and lay.band in given
    M, B = len(m_levels), (len(spec.axis_levels(lay.band)) if by_band else 1)
    shares = population.shares(M, B) if by_band else None
    first = first if by_band else first.sum(axis=1, keepdims=True)

    def rows_of(which: str, sh, n_draws: int, r):
        jc = join_counts(panel, first, getattr(sizes, which), which, sh, population.path if by_band else None)
        counts = jc.counts if market_given else jc.counts.sum(axis=0, keepdims=True)
        al = np.broadcast_to((allowed_p if market_given else allowed_p.all(axis=0, keepdims=True))[:, None, None, :],
                             counts.shape)
        return jc, posterior(counts, al, options.strength, n_draws, r, axis=f"{status}:{lay.never_member}")

    rows_by = {which: rows_of(which, shares, options.draws if which == "size" and not by_band else 0, rng)
               for which in ("size", "low", "high")}
    jc, jf = rows_by["size"]
    dims = [lay.market, lay.band if by_band else None, jc.cycle_axis]
    sel = (slice(None),) * pos + (nm,)
    table = fit.table.copy()
    table[sel] = prospect_rows(dims, jf.table, f)[sel]
    fit.table = table
    if fit.draws is not None:
        if by_band:
            # each draw: the sample's band mix by the Bayesian bootstrap, then the hazard given it
            sd = population.share_draws(M, B, options.draws, rng)
            rows_d = np.stack([rows_of("size", sd[d], 1, rng)[1].draws[0] for d in range(options.draws)])
        else:
            rows_d = jf.draws
        d = fit.draws.copy()
        d[(slice(None),) + sel] = prospect_rows(dims, rows_d, f)[(slice(None),) + sel]
        fit.draws = d
    extra = {}
    for which in ("low", "high"):
        t = table.copy()
        t[sel] = prospect_rows(dims, rows_by[which][1].table, f)[sel]
        extra[f"sensitivity.size_{which}.table.{status}"] = t
    names = [lay.market, lay.band, jc.cycle_axis]  # the join rows' dimensions; pooling skips those of size 1
    jdiag = {"market_axis": lay.market, "cycle_axis": jc.cycle_axis, "strength": jf.strength,
             "strengths": list(jf.strengths), "pooling": [names[i] for i in jf.pooling],
             "hazard": used_hazard(jc, jf.table, nm, m_levels),
             "hazard_raw": hazard_summary(jc, m_levels),
             "hazard_low_size": used_hazard(rows_by["low"][0], rows_by["low"][1].table, nm, m_levels),
             "hazard_high_size": used_hazard(rows_by["high"][0], rows_by["high"][1].table, nm, m_levels),
             "first_joins": {lv: int(jc.joins[i].sum()) for i, lv in enumerate(m_levels)},
             "sizes_by_period": sizes.by_period,
             "note": "never-member rows of the status factor: first joins / (size - accounts already tracked) per "
                     "cell (hazard_raw), shrunk towards the pooled rate by the hierarchical prior (hazard: what the "
                     "model uses, at-risk weighted over the market's cells); extra arrays sensitivity.size_low/high "
                     "hold the status table at the low/high sizes"}
    if lay.band and lay.band in given:
        bands = spec.axis_levels(lay.band)
        if by_band:
            jdiag["by_band"] = {
                "population": os.path.basename(population.path), "rows": int(len(population.weight)),
                "shares": {lv: {b: float(shares[i, j]) for j, b in enumerate(bands)} for i, lv in enumerate(m_levels)},
                "hazard": {lv: {b: used_hazard(jc, jf.table, nm, m_levels, band=j)[lv] for j, b in enumerate(bands)}
                           for lv in m_levels},
                "hazard_raw": raw_hazard_by_band(jc, m_levels, bands)}
        else:
            jdiag["band_assumption"] = (f"no population sample (--population), so per-band acquisition values assume "
                                        f"that never-members' joining does not depend on the propensity band "
                                        f"('{lay.band}'); a sample of the addressable population estimates it by band")
    return fit, skip, jdiag, extra


def _borrow_never_member(spec, f: Factor, C: np.ndarray) -> np.ndarray:
    """Never-members are not in the panel: their cells of a chance factor take the moves of the
    former-member levels (summed)."""
    status = spec.status_axis
    st = spec.axis_levels(status)
    nm = st.index(spec.non_members[0])
    former = [st.index(lv) for lv in spec.non_members[1:]]
    if not former:
        return C
    out = C.copy()
    for i, g in enumerate(f.given):
        base = g[5:] if g.startswith("next.") else g
        if base != status:
            continue
        src = np.take(out, former, axis=i).sum(axis=i)
        idx = [slice(None)] * out.ndim
        idx[i] = nm
        if out[tuple(idx)].sum() == 0:
            out[tuple(idx)] = src
    return out


def _revenue(spec, panel: Panel) -> dict:
    lay = panel.layout
    st = spec.axis_levels(lay.status)
    rows = panel.con.execute(f"SELECT {lay.col(lay.status)}, avg(revenue), count(revenue) FROM {CODED} "
                             f"WHERE revenue IS NOT NULL GROUP BY 1").fetchall()
    return {"mean_per_period_by_status": {st[int(s)]: float(a) for s, a, n in rows if n},
            "note": "observed revenue per panel row (money per period); compare with the spec's reward streams"}
