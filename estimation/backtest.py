"""Out-of-time backtest of a fitted chain: calibration and holdout periods, retention by join cohort.

The customer-base literature validates a model by fitting it on a calibration period and
predicting a holdout period it did not see (Schmittlein, Morrison & Colombo 1987; Fader, Hardie
& Lee 2005; see docs/references.md). Here, for a panel of T periods and a holdout of K:

1. **Fit** on the first T - K periods exactly as ``stateworth fit`` would (:func:`fit_panel`
   with :attr:`FitOptions.until` at the cut-off period c).
2. **Start** from the state of the population at c: every account the panel tracks at c in
   its state (counters derived from its history; a gap-filled month's unknown chance levels
   spread like the known accounts of the same status and other coordinates), and the market's
   never-members, size(m, c) - accounts tracked by c, at the never-member level with counters at
   their never-member start, spread over the other fixed and chance axes like the market's
   former members at c (a propensity band evenly: the fit's join rates do not depend on it).
3. **Predict** the K holdout periods: the expected figures push the start forward with the
   fitted (posterior mean) chain, ``x_k = P^T x_{k-1}``; the bands come from R simulated
   holdouts, each moving the same finite population with multinomial flows
   (:mod:`.flows`) under one posterior draw of the tables, so they carry both the chain's own
   randomness and the tables' uncertainty. A band at level L is the ((1 - L)/2, (1 + L)/2)
   quantiles of the simulated figure. This is simulation, not a moment approximation.
4. **Compare** per holdout period: accounts by status level (each plan and former-member level)
   and market, joins (non-member -> member moves, first joins included), lapses (member ->
   non-member), and revenue where the panel has it (predicted: expected accounts by status
   and market times the mean revenue per account of that status and market in the
   calibration months).
5. **Retention** of the accounts that first joined in the calibration months (not the panel's
   first period: those are left-censored): the Kaplan-Meier share still a member k periods
   after joining, followed to the panel's end, beside the chain's curve for the same joiners
   (:mod:`.survival`), with bands from simulated cohorts (same start states and follow-up).

The verdict (:data:`VERDICT_RULE`) tests the coverage against the coverage of the simulated
holdouts themselves (figures of one holdout move together, so a binomial count of independent
figures would overstate what a right chain guarantees), and the retention curve's largest
standardised gap against the simulated cohorts'.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from stateworth.estimation.sources import TableSource, as_source
from stateworth.caution import CAUTION_LINE
from stateworth.errors import PanelError
from stateworth.estimation.counts import counter_start, transitions_sql
from stateworth.estimation.fit import FitOptions, fit_panel
from stateworth.estimation.flows import CHUNK_ROWS, Groups, chain_maps, flow_chain, merge, replicate, step
from stateworth.estimation.panel import CODED, Panel, connect, load_markets, load_panel
from stateworth.estimation.survival import expected_curve, kaplan_meier, member_survival, product_limit
from stateworth.rules.spec import Spec

FORMAT = "stateworth.backtest/1"
#: the one-sided test level of the verdict
ALPHA = 0.01
#: durations on the retention curve: those with at least this many joiners observed at risk
MIN_AT_RISK = 10
#: failing figures named in the verdict at most
NAMED = 5
VERDICT_RULE = (
    "consistent when (1) the share of holdout figures inside their bands is not lower than in 99% of the "
    "chain's own simulated holdouts (a one-sided test at 1%; simulated holdouts keep the way figures of one "
    "holdout move together, which a binomial count of independent figures would not) and (2) the observed "
    "retention curve's largest standardised gap from the prediction is not larger than in 99% of the simulated "
    "cohorts; otherwise misfit, naming the figures most often outside their bands")


@dataclass(frozen=True)
class BacktestOptions:
    """``holdout``: periods K held out at the panel's end; ``level``: band level in (0, 1);
    ``replicates``: simulated holdouts R, and as many simulated retention cohorts (100 let the
    verdict's 1 % tests resolve their level); ``seed`` of the simulation; ``fit``: the
    fit's options (:class:`FitOptions`; its ``until`` is set by the backtest)."""

    holdout: int
    level: float = 0.9
    replicates: int = 100
    seed: int = 0
    fit: FitOptions = field(default_factory=FitOptions)


def check_options(options: BacktestOptions) -> None:
    """One-line errors for options that cannot work, before anything is read."""
    if not isinstance(options.holdout, (int, np.integer)) or options.holdout < 1:
        raise PanelError(f"--holdout {options.holdout}: hold out at least 1 period", where="--holdout")
    if not (0.0 < float(options.level) < 1.0):
        raise PanelError(f"--level {options.level}: a band level lies strictly between 0 and 1, e.g. 0.9",
                         where="--level")
    if options.replicates < 20:
        raise PanelError(f"--replicates {options.replicates}: simulate at least 20 holdouts (default 100)",
                         where="--replicates")


# ---------------------------------------------------------------------------------------------
# the panel side


def _members_sql(spec: Spec, col: str, member: bool) -> str:
    flags = spec.member_flags()
    codes = [int(i) for i in np.flatnonzero(flags if member else ~flags)]
    return f"{col} IN ({', '.join(map(str, codes))})" if codes else "FALSE"


def _relation(panel: Panel, model) -> str:
    """The coded panel with a propensity band's codes (``g<i>`` and its next ``_n<i>``) computed
    from the calibration fit's stored score, as the fit computes them; the coded table itself
    when the spec has no band axis."""
    lay = panel.layout
    if not lay.band:
        return CODED
    from stateworth.estimation.propensity import Design, LogitFit, band_sql

    meta = model.metadata["propensity"]
    coef = np.asarray(meta["coef"], dtype=np.float64)
    fit = LogitFit(tuple(meta["terms"]), coef, np.zeros_like(coef), 0, True)
    design = Design.of(tuple(meta["covariates"]), {c: list(v) for c, v in meta["levels"].items()})
    cols = [lay.cov_col(i) for i in range(len(lay.covariates))]
    nxt = [f"_w{j}" for j in range(len(cols))]
    cuts = np.asarray(meta["cuts"], dtype=np.float64)
    bc = lay.col(lay.band)
    panel.con.execute(f"CREATE OR REPLACE TEMP VIEW bt_banded AS SELECT *, "
                      f"{band_sql(fit, design.sql(cols), cuts, null_col=cols[0])} AS {bc}, "
                      f"{band_sql(fit, design.sql(nxt), cuts, null_col=nxt[0])} AS _n{bc[1:]} FROM {CODED}")
    return "bt_banded"


def _codes(res: dict, A: int) -> np.ndarray:
    return np.stack([np.asarray(res[f"q{i}"], dtype=np.int64) for i in range(A)], axis=1)


def _rows_needed(spec: Spec, panel: Panel, rel: str, cut: int) -> None:
    """One pass of the counter derivation over the panel, keeping the rows the start and the
    join cohorts need (the cut-off period; first rows of the calibration months) as table
    ``bt_rows`` with the grid codes ``q<i>`` of each."""
    tsql = transitions_sql(spec, rel, extra=("_pp",), sequenced=True)
    panel.con.execute(f"CREATE OR REPLACE TEMP TABLE bt_rows AS SELECT * FROM ({tsql}) t WHERE p = {cut} OR "
                      f"(_pp IS NULL AND p > {panel.p_min} AND p <= {cut})")


def _states_at(spec: Spec, panel: Panel, cut: int) -> tuple[np.ndarray, np.ndarray]:
    """Tracked accounts at the cut-off by state: ``(codes (G, A), n (G,))``, -1 = unknown."""
    A = len(spec.grid_order)
    q = ", ".join(f"COALESCE(q{i}, -1) AS q{i}" for i in range(A))
    res = panel.con.execute(f"SELECT {q}, count(*) AS n FROM bt_rows WHERE p = {cut} "
                            f"GROUP BY ALL ORDER BY ALL").fetchnumpy()
    return _codes(res, A), np.asarray(res["n"], dtype=np.int64)


def _joiners(spec: Spec, panel: Panel, rel: str, cut: int) -> dict[str, np.ndarray]:
    """Accounts whose first row lies in the calibration months after the first panel period,
    grouped by join state, join period, duration to the first non-member row (or to the last
    row) and whether that was a lapse."""
    lay = panel.layout
    A = len(spec.grid_order)
    s = lay.col(lay.status)
    q = ", ".join(f"q{i}" for i in range(A))
    res = panel.con.execute(
        f"SELECT {q}, t.p AS jp, COALESCE(a.lp, a.lastp) - t.p AS d, a.lp IS NOT NULL AS ev, count(*) AS n "
        f"FROM bt_rows t JOIN (SELECT account, min(p) AS jp, max(p) AS lastp, "
        f"min(CASE WHEN {_members_sql(spec, s, False)} THEN p END) AS lp FROM {rel} GROUP BY account) a "
        f"ON t.account = a.account AND t.p = a.jp WHERE t._pp IS NULL AND t.p > {panel.p_min} AND t.p <= {cut} "
        f"GROUP BY ALL ORDER BY ALL").fetchnumpy()
    return {"codes": _codes(res, A), "jp": np.asarray(res["jp"], dtype=np.int64),
            "d": np.asarray(res["d"], dtype=np.int64), "ev": np.asarray(res["ev"], dtype=bool),
            "n": np.asarray(res["n"], dtype=np.int64)}


@dataclass(frozen=True)
class Observed:
    """Figures from the panel for every period after the first (``p_min + 1 .. p_max``):
    ``counts (T - 1, S, M)`` accounts by status and market, ``joins``/``lapses`` ``(T - 1,)``,
    ``revenue`` ``(T - 1,)`` (None without revenue). The first period is left out: its
    accounts are left-censored, so its joins are unknown."""

    counts: np.ndarray
    joins: np.ndarray
    lapses: np.ndarray
    revenue: np.ndarray | None


def _observed(spec: Spec, panel: Panel) -> Observed:
    lay = panel.layout
    s, m = lay.col(lay.status), lay.col(lay.market)
    S, M = len(spec.axis_levels(lay.status)), len(spec.axis_levels(lay.market))
    T = panel.p_max - panel.p_min
    p0 = panel.p_min + 1
    counts = np.zeros((T, S, M))
    revenue = np.zeros(T)
    for p, st, mk, n, rev in panel.con.execute(
            f"SELECT p, {s}, {m}, count(*), sum(revenue) FROM {CODED} WHERE p >= {p0} GROUP BY ALL").fetchall():
        counts[int(p) - p0, int(st), int(mk)] += n
        revenue[int(p) - p0] += rev or 0.0
    joins, lapses = np.zeros(T), np.zeros(T)
    mem, non = _members_sql(spec, s, True), _members_sql(spec, s, False)
    for p, j, lp in panel.con.execute(
            f"SELECT p, count_if({mem} AND (_pp IS NULL OR {_members_sql(spec, '_sp', False)})), "
            f"count_if({non} AND {_members_sql(spec, '_sp', True)}) FROM {CODED} WHERE p >= {p0} GROUP BY p").fetchall():
        joins[int(p) - p0], lapses[int(p) - p0] = j, lp
    return Observed(counts, joins, lapses, revenue if panel.has_revenue else None)


def _revenue_rates(spec: Spec, panel: Panel, cut: int) -> tuple[np.ndarray | None, str | None]:
    """Mean revenue per account ``(S, M)`` by status and market over the calibration months, or
    (None, why) when the holdout cannot be compared on revenue."""
    if not panel.has_revenue:
        return None, None
    lay = panel.layout
    s, m = lay.col(lay.status), lay.col(lay.market)
    missing = panel.con.execute(f"SELECT count(*) FROM {CODED} WHERE p > {cut} AND {_members_sql(spec, s, True)} "
                                "AND revenue IS NULL").fetchone()[0]
    if missing:
        return None, (f"revenue left out: {missing:,} member rows of the holdout have no revenue, so the panel's "
                      "revenue per period is incomplete")
    S, M = len(spec.axis_levels(lay.status)), len(spec.axis_levels(lay.market))
    tot, cnt = np.zeros((S, M)), np.zeros((S, M))
    for st, mk, r, n in panel.con.execute(f"SELECT {s}, {m}, sum(revenue), count(revenue) FROM {CODED} "
                                          f"WHERE p <= {cut} AND revenue IS NOT NULL GROUP BY ALL").fetchall():
        tot[int(st), int(mk)], cnt[int(st), int(mk)] = r, n
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = np.where(cnt > 0, tot / np.where(cnt > 0, cnt, 1), np.nan)
        by_status = np.where(cnt.sum(1) > 0, tot.sum(1) / np.where(cnt.sum(1) > 0, cnt.sum(1), 1), 0.0)
    # a (status, market) the calibration months never show takes its status's mean elsewhere
    return np.where(np.isnan(rate), by_status[:, None], rate), None


# ---------------------------------------------------------------------------------------------
# the start


def _spread(total: int, weights: np.ndarray) -> np.ndarray:
    """``total`` people over ``weights`` in whole numbers (largest remainders)."""
    w = np.asarray(weights, dtype=np.float64)
    share = total * w / w.sum()
    out = np.floor(share).astype(np.int64)
    rest = int(total - out.sum())
    if rest > 0:
        out[np.argsort(-(share - out), kind="stable")[:rest]] += 1
    return out


def _impute(codes: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    """Rows with unknown codes (-1: a gap-filled month's chance axes) spread over the known
    rows that agree with them on every known axis, in proportion to their counts (the lowest
    level where none agrees). Returns (codes, n, accounts imputed)."""
    unknown = (codes < 0).any(axis=1)
    if not unknown.any():
        return codes, n, 0
    known_c, known_n = codes[~unknown], n[~unknown]
    out_c, out_n = [known_c], [known_n]
    for c, k in zip(codes[unknown], n[unknown]):
        free = c < 0
        match = (known_c[:, ~free] == c[~free]).all(axis=1) if len(known_c) else np.zeros(0, dtype=bool)
        if match.any():
            parts = _spread(int(k), known_n[match])
            rows = known_c[match].copy()
            rows[:, ~free] = c[~free]
            keep = parts > 0
            out_c.append(rows[keep])
            out_n.append(parts[keep])
        else:
            row = np.where(free, 0, c)
            out_c.append(row[None])
            out_n.append(np.array([k]))
    return np.concatenate(out_c), np.concatenate(out_n), int(n[unknown].sum())


def _never_members(spec: Spec, panel: Panel, model, codes: np.ndarray, n: np.ndarray, never: np.ndarray,
                   cut: int) -> tuple[np.ndarray, np.ndarray]:
    """Never-member groups at the cut-off: ``never[m]`` people in market m (see module doc)."""
    lay = panel.layout
    grid = model.grid
    names = list(grid.names)
    st_pos, m_pos = names.index(lay.status), names.index(lay.market)
    nm = lay.code(lay.status, lay.never_member)
    former = [lay.code(lay.status, lv) for lv in lay.former_levels]
    free = [i for i, a in enumerate(grid.axes) if (a.kind == "fixed" and i != m_pos) or
            (a.kind == "chance" and a.name != lay.band)]
    band_pos = names.index(lay.band) if lay.band else None
    base = np.zeros(len(names), dtype=np.int64)
    base[st_pos] = nm
    for i, a in enumerate(grid.axes):
        if a.kind == "counter":
            base[i] = counter_start(spec, a.name)
        elif a.kind == "cycle":
            base[i] = cut % a.size
    out_c, out_n = [], []
    for mk, total in enumerate(never):
        if total <= 0:
            continue
        sel = (codes[:, m_pos] == mk) & np.isin(codes[:, st_pos], former)
        if sel.any() and free:
            combos, inv = np.unique(codes[sel][:, free], axis=0, return_inverse=True)
            w = np.bincount(inv.reshape(-1), weights=n[sel])
        else:
            combos, w = np.zeros((1, len(free)), dtype=np.int64), np.ones(1)
        if band_pos is not None:
            B = grid.axes[band_pos].size
            combos = np.repeat(combos, B, axis=0)
            bands = np.tile(np.arange(B), len(w))
            w = np.repeat(w, B) / B
        parts = _spread(int(total), w)
        rows = np.tile(base, (len(w), 1))
        rows[:, m_pos] = mk
        rows[:, free] = combos
        if band_pos is not None:
            rows[:, band_pos] = bands
        keep = parts > 0
        out_c.append(rows[keep])
        out_n.append(parts[keep])
    if not out_c:
        return np.zeros((0, len(names)), dtype=np.int64), np.zeros(0, dtype=np.int64)
    return np.concatenate(out_c), np.concatenate(out_n)


# ---------------------------------------------------------------------------------------------
# comparison


def _chunks(reps: int, groups: int):
    """Replicates ``[lo, hi)`` simulated together: about :data:`CHUNK_ROWS` group rows at once
    (a group splits into a few rows within a period before they merge again)."""
    size = max(1, min(reps, CHUNK_ROWS // max(1, 4 * groups)))
    for lo in range(0, reps, size):
        yield lo, min(reps, lo + size)


def _quantiles(sims: np.ndarray, level: float) -> tuple[np.ndarray, np.ndarray]:
    """Band ends along axis 0 (replicates): the (1 - L)/2 and (1 + L)/2 quantiles, each a value
    some simulated holdout took (no interpolation between counts)."""
    a = (1.0 - level) / 2.0
    return (np.quantile(sims, a, axis=0, method="inverted_cdf"),
            np.quantile(sims, 1.0 - a, axis=0, method="inverted_cdf"))


def _mape(obs: np.ndarray, pred: np.ndarray) -> float | None:
    ok = obs != 0
    return float(np.mean(np.abs(obs[ok] - pred[ok]) / np.abs(obs[ok]))) if ok.any() else None


def _zs(obs: np.ndarray, sims: np.ndarray) -> np.ndarray:
    """Distance of the observed figure from the simulated ones' median in their standard
    deviations (a floor of half a unit keeps a figure the simulation never varies finite)."""
    sd = np.maximum(sims.std(axis=0), 0.5)
    return (obs - np.median(sims, axis=0)) / sd


def _f(x) -> float | None:
    return None if x is None or not np.isfinite(x) else float(x)


@dataclass(frozen=True)
class _Start:
    """The population at the cut-off as groups, with what the result reports about it."""

    groups: Groups
    tracked: int
    never: np.ndarray  # (M,) never-members by market
    imputed: int


def _start(spec: Spec, panel: Panel, model, chain, rel: str, sizes, cut: int) -> _Start:
    lay = panel.layout
    codes, n = _states_at(spec, panel, cut)
    codes, n, imputed = _impute(codes, n)
    M = len(spec.axis_levels(lay.market))
    tracked = np.zeros(M, dtype=np.int64)
    for mk, c in panel.con.execute(f"SELECT {lay.col(lay.market)}, count(*) FROM {CODED} WHERE _pp IS NULL "
                                   f"AND p <= {cut} GROUP BY 1").fetchall():
        tracked[int(mk)] = c
    never = np.rint(sizes.size[:, cut - panel.p_min]).astype(np.int64) - tracked
    nc, nn = _never_members(spec, panel, model, codes, n, never, cut)
    flat = np.ravel_multi_index(np.concatenate([codes, nc]).T, model.grid.shape)
    zeros = np.zeros(len(flat), dtype=np.int64)
    groups = merge(chain, Groups(flat, zeros, zeros, np.concatenate([n, nn])), 1)
    return _Start(groups, int(n.sum()), never, imputed)


def _expected(pull, push, start: Groups, n_states: int, member: np.ndarray, cell: np.ndarray, K: int,
              cells: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Expected accounts by (status, market) cell ``(K, cells)``, joins and lapses ``(K,)`` when
    the start is pushed forward with the point chain: ``x_k = P^T x_(k-1)``; the moves of period
    k are ``x_(k-1) . ((1 - m) * P m)`` (joins) and ``x_(k-1) . (m * P (1 - m))`` (lapses)."""
    join_p = (1.0 - member) * pull(member)
    lapse_p = member * pull(1.0 - member)
    x = np.bincount(start.state, weights=start.n, minlength=n_states)
    counts, joins, lapses = np.zeros((K, cells)), np.zeros(K), np.zeros(K)
    for k in range(K):
        joins[k], lapses[k] = x @ join_p, x @ lapse_p
        x = push(x)
        counts[k] = np.bincount(cell, weights=x, minlength=cells)
    return counts, joins, lapses


def _simulated(chain, start: Groups, cell: np.ndarray, K: int, R: int, cells: int,
               rng) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """R simulated holdouts: accounts by cell ``(R, K, cells)``, joins and lapses ``(R, K)``;
    replicate r moves under table set r mod D."""
    counts, joins, lapses = np.zeros((R, K, cells)), np.zeros((R, K)), np.zeros((R, K))
    for lo, hi in _chunks(R, len(start.n)):
        r = hi - lo
        groups = replicate(start, r)
        for k in range(K):
            groups, flows = step(chain, groups, (lo + np.arange(r)) % chain.n_tables, r, rng)
            joins[lo:hi, k], lapses[lo:hi, k] = flows.joins, flows.lapses
            key = groups.rep * cells + cell[groups.state]
            counts[lo:hi, k] = np.bincount(key, weights=groups.n, minlength=r * cells).reshape(r, cells)
    return counts, joins, lapses


def _figure(kind: str, label: str, unit: str, full: np.ndarray, pred: np.ndarray, sims: np.ndarray, K: int,
            level: float, periods: list[str], before: list[str], **extra) -> dict:
    """One figure's holdout periods: observed (the last K of ``full``), predicted, band, inside,
    mean absolute percentage error; ``_sims`` and ``_obs`` are dropped before the result is
    returned."""
    o = full[-K:]
    lo, hi = _quantiles(sims, level)
    inside = (o >= lo) & (o <= hi)
    return {"figure": kind, "label": label, "unit": unit, **extra, "periods": periods,
            "history": {"periods": before, "observed": [float(v) for v in full[:-K]]},
            "observed": [float(v) for v in o], "predicted": [float(v) for v in pred],
            "band": [[float(a), float(b)] for a, b in zip(lo, hi)], "inside": [bool(v) for v in inside],
            "outside": int((~inside).sum()), "mape": _mape(o, pred),
            "mean_abs_z": float(np.mean(np.abs(_zs(o, sims)))), "_sims": sims, "_obs": o}


def _coverage(series: list[dict]) -> tuple[np.ndarray, np.ndarray]:
    """Inside flags of the observed figures ``(F,)`` and of each simulated holdout against the
    same bands ``(R, F)``."""
    obs = np.concatenate([np.asarray(s["inside"]) for s in series])
    sims = np.concatenate([(s["_sims"] >= np.asarray(s["band"])[:, 0]) & (s["_sims"] <= np.asarray(s["band"])[:, 1])
                           for s in series], axis=1)
    return obs, sims


def _verdict(series: list[dict], coverage: float, nfig: int, sim_cov: np.ndarray, p_cov: float,
             retention: dict | None, K: int) -> dict:
    """Verdict by :data:`VERDICT_RULE`, its reasons, and the figures most often outside their
    bands (ties broken by the mean standardised distance)."""
    ranked = sorted((s for s in series if s["outside"]), key=lambda s: (-s["outside"], -s["mean_abs_z"]))
    failing = [{"figure": s["label"], "outside": s["outside"], "of": K, "mean_abs_z": s["mean_abs_z"],
                "observed_over_predicted": _f(np.sum(s["_obs"]) / np.sum(s["predicted"]))
                if np.sum(s["predicted"]) else None} for s in ranked[:NAMED]]
    reasons = []
    if p_cov < ALPHA:
        reasons.append(f"coverage {coverage:.0%} of {nfig} figures is lower than in {1 - p_cov:.1%} of the simulated "
                       f"holdouts (their median {np.median(sim_cov):.0%})")
    if retention is not None and retention["p_value"] < ALPHA:
        g = retention["largest_gap"]
        reasons.append(f"retention {g['duration']} period(s) after joining: observed {g['observed']:.1%}, predicted "
                       f"{g['predicted']:.1%} (band {g['band'][0]:.1%} to {g['band'][1]:.1%}), a gap larger than in "
                       f"{1 - retention['p_value']:.1%} of the simulated cohorts")
    return {"verdict": "misfit" if reasons else "consistent", "rule": VERDICT_RULE, "alpha": ALPHA,
            "reasons": reasons, "failing": failing}


def _read(spec: Spec, panel_path, markets_path, options: BacktestOptions) -> tuple[Panel, object, int]:
    """The whole panel, its market sizes and the cut-off period, after the checks that need the
    panel (holdout length, holdout periods without accounts, empty calibration periods)."""
    K = int(options.holdout)
    panel = load_panel(spec, panel_path, gaps=options.fit.gaps, con=connect(options.fit.threads))
    T = panel.p_max - panel.p_min + 1
    if K > T - 3:
        raise PanelError(f"--holdout {K}: the panel has {T} periods ({panel.period_label(panel.p_min)}.."
                         f"{panel.period_label(panel.p_max)}); hold out fewer than the periods minus 2 (at most "
                         f"{max(T - 3, 0)}), so that the calibration months show at least two moves", where="--holdout")
    cut = panel.p_max - K
    rows_by_p = dict(panel.con.execute(f"SELECT p, count(*) FROM {CODED} GROUP BY p").fetchall())
    empty = [p for p in range(cut + 1, panel.p_max + 1) if not rows_by_p.get(p)]
    if empty:
        raise PanelError(f"the holdout period {panel.period_label(empty[0])} has no accounts in the panel; every holdout "
                         "period needs rows to compare with (hold out fewer periods, or fill the missing months)",
                         where=f"{panel_path}: column period")
    if not any(rows_by_p.get(p) for p in range(panel.p_min, cut + 1)):
        raise PanelError("the calibration periods hold no accounts; hold out fewer periods", where="--holdout")
    return panel, load_markets(spec, markets_path, panel), cut


def backtest(spec: Spec, panel_path: "str | Path | TableSource", markets_path: "str | Path | TableSource",
             options: BacktestOptions, *,
             source: str = "<spec>", progress: bool = False, model=None) -> dict:
    """Fit on the calibration periods, predict the holdout, compare (see the module doc).
    Returns a JSON-ready dict (layout: ``FORMAT``; money in the spec's currency, counts in
    accounts, periods as the panel writes them; ``seconds`` times each phase). Raises
    :class:`PanelError` for a holdout that cannot work; writes nothing.

    ``model``: a compiled model of ``spec`` to predict with instead of fitting one (it must not
    have seen the holdout periods); the benchmark uses the tables a panel was simulated from,
    which separates the method's own calibration from the fit's."""
    from tqdm import tqdm

    check_options(options)
    K, L, R = int(options.holdout), float(options.level), int(options.replicates)
    seconds: dict[str, float] = {}
    clock = [time.perf_counter()]

    def phase(name: str) -> None:
        now = time.perf_counter()
        seconds[name] = now - clock[-1]
        clock.append(now)
        bar.update()

    bar = tqdm(total=7, desc="backtest", unit="step", disable=not progress, leave=False)
    panel, sizes, cut = _read(spec, panel_path, markets_path, options)
    phase("read")
    if model is None:
        model = fit_panel(spec, panel_path, markets_path, replace(options.fit, until=cut), source=source).model
    elif model.spec.canonical() != spec.canonical():
        raise PanelError("the model given to predict with has another spec than the backtest's", where="model")
    phase("fit")
    lay, grid = panel.layout, model.grid
    st_levels, m_levels = spec.axis_levels(lay.status), spec.axis_levels(lay.market)
    S, M = len(st_levels), len(m_levels)
    st_of, m_of = grid.codes()[grid.position(lay.status)], grid.codes()[grid.position(lay.market)]
    cell = st_of * M + m_of
    chain = flow_chain(model, draws=True)
    D = chain.n_tables
    rel = _relation(panel, model)
    _rows_needed(spec, panel, rel, cut)
    start = _start(spec, panel, model, chain, rel, sizes, cut)
    obs = _observed(spec, panel)
    rates, revenue_note = _revenue_rates(spec, panel, cut)
    joiners = _joiners(spec, panel, rel, cut)
    phase("start_and_observed")
    pull, push = chain_maps(model)
    pred_counts, pred_joins, pred_lapses = _expected(pull, push, start.groups, grid.size,
                                                     spec.member_flags()[st_of].astype(np.float64), cell, K, S * M)
    pred_counts = pred_counts.reshape(K, S, M)
    phase("expected")
    rng = np.random.default_rng(options.seed)
    sim_counts, sim_joins, sim_lapses = _simulated(chain, start.groups, cell, K, R, S * M, rng)
    sim_counts = sim_counts.reshape(R, K, S, M)
    phase("simulated_holdouts")

    periods = [panel.period_label(p) for p in range(cut + 1, panel.p_max + 1)]
    before = [panel.period_label(p) for p in range(panel.p_min + 1, cut + 1)]
    common = {"K": K, "level": L, "periods": periods, "before": before}
    series: list[dict] = []
    for si, lv in enumerate(st_levels):
        if si == lay.code(lay.status, lay.never_member):
            continue
        for mi, mk in enumerate(m_levels):
            o, p, sims = obs.counts[:, si, mi], pred_counts[:, si, mi], sim_counts[:, :, si, mi]
            if not (o[-K:].any() or p.any() or sims.any()):
                continue  # a plan not sold there: nothing to compare
            series.append(_figure("accounts", f"{lv} in {mk}", "accounts", o, p, sims, status=lv, market=mk, **common))
    series.append(_figure("joins", "joins", "accounts", obs.joins, pred_joins, sim_joins, **common))
    series.append(_figure("lapses", "lapses", "accounts", obs.lapses, pred_lapses, sim_lapses, **common))
    if obs.revenue is not None and rates is not None:
        series.append(_figure("revenue", "revenue", spec.model.currency, obs.revenue,
                              (pred_counts * rates[None]).sum(axis=(1, 2)),
                              (sim_counts * rates[None, None]).sum(axis=(2, 3)), **common))
    inside, sim_inside = _coverage(series)
    coverage = float(inside.mean())
    sim_cov = sim_inside.mean(axis=1)
    p_cov = float(np.mean(sim_cov <= coverage + 1e-12))
    phase("figures")
    retention = _retention(model, chain, pull, joiners, panel, L, R, rng)
    phase("retention")
    bar.close()
    verdict = _verdict(series, coverage, int(inside.size), sim_cov, p_cov, retention, K)
    for s_ in series:
        s_.pop("_sims")
        s_.pop("_obs")
    notes = []
    if D == 1:
        notes.append("the calibration model has no posterior draws (fit with --draws > 0): the bands carry the "
                     "chain's own randomness only, not the tables' uncertainty")
    if start.imputed:
        notes.append(f"{start.imputed:,} accounts at the cut-off had unknown levels (gap-filled months); they were "
                     "spread like the known accounts of the same status and coordinates")
    if revenue_note:
        notes.append(revenue_note)
    if sizes.by_period:
        notes.append("market sizes are read at the cut-off period; the chain keeps that never-member pool through "
                     "the holdout")
    seconds["total"] = clock[-1] - clock[0]
    return {
        "format": FORMAT,
        "model": {"name": model.name, "version": model.version, "states": int(model.n_states),
                  "currency": spec.model.currency, "draws": int(D if model.draws else 0), "source": source},
        "panel": {"file": as_source(panel_path).name, "markets": as_source(markets_path, "--markets").name,
                  "periods": [panel.period_label(panel.p_min), panel.period_label(panel.p_max)], "rows": panel.rows,
                  "accounts": panel.accounts},
        "holdout": K, "level": L, "replicates": R, "seed": options.seed,
        "calibration": [panel.period_label(panel.p_min), panel.period_label(cut)],
        "holdout_periods": periods,
        "method": ("expected figures: the start pushed forward with the calibration fit's posterior-mean chain; "
                   f"bands: {R} simulated holdouts, multinomial flows of the same finite population, each under one "
                   f"of {D} table sets (posterior draws), quantiles at {(1 - L) / 2:.3g} and {(1 + L) / 2:.3g}"),
        "start": {"period": panel.period_label(cut), "tracked": start.tracked, "never_members": int(start.never.sum()),
                  "imputed": start.imputed,
                  "never_members_by_market": {mk: int(v) for mk, v in zip(m_levels, start.never)}},
        "figures": series,
        "summary": {"figures": int(inside.size), "inside": int(inside.sum()), "coverage": coverage, "level": L,
                    "binomial_se": float(np.sqrt(L * (1 - L) / inside.size)),
                    "simulated_coverage": {"median": float(np.median(sim_cov)),
                                           "q01": float(np.quantile(sim_cov, ALPHA)), "p_value": p_cov},
                    "mape": {s_["label"]: s_["mape"] for s_ in series}},
        "retention": retention,
        "verdict": verdict,
        "notes": notes,
        "seconds": seconds,
        "caution": CAUTION_LINE,
    }


def _retention(model, chain, pull, joiners: dict, panel: Panel, level: float, R: int, rng) -> dict | None:
    """Kaplan-Meier retention of the calibration months' joiners beside the chain's curve and
    simulated cohorts' bands; None when nobody joined in the calibration months."""
    if not len(joiners["n"]):
        return None
    spec, grid = model.spec, model.grid
    d, ev, cnt, jp = joiners["d"], joiners["ev"], joiners["n"], joiners["jp"]
    # followed to the panel's end, or to the last row of an account whose rows stop earlier
    follow = np.where(ev, panel.p_max - jp, d)
    H = int(follow.max())
    km = kaplan_meier(d, ev, cnt, H)
    shown = np.flatnonzero(km.at_risk >= MIN_AT_RISK)
    if not len(shown):
        return None
    H = int(shown[-1]) + 1
    km = kaplan_meier(d, ev, cnt, H)
    flat = np.ravel_multi_index(joiners["codes"].T, grid.shape)
    names = list(grid.names)
    mem_state = spec.member_flags()[grid.codes()[names.index(spec.status_axis)]]
    s = member_survival(pull, mem_state, H)
    pred = expected_curve(s, flat, follow, cnt)
    # simulated cohorts: the same join states and follow-up, lapses leave
    tags = H + 1
    start = merge(chain, Groups(flat, np.zeros(len(cnt), dtype=np.int64), np.minimum(follow, H),
                                cnt.astype(np.int64)), 1, tags)
    at_risk, events = np.zeros((R, H)), np.zeros((R, H))
    for lo, hi in _chunks(R, len(start.n)):
        r = hi - lo
        groups = replicate(start, r)
        draw = (lo + np.arange(r)) % chain.n_tables
        for k in range(1, H + 1):
            groups = groups.take(np.flatnonzero(groups.tag >= k))
            at_risk[lo:hi, k - 1] = np.bincount(groups.rep, weights=groups.n, minlength=r)
            groups, flows = step(chain, groups, draw, r, rng, absorb_lapses=True, tags=tags)
            events[lo:hi, k - 1] = flows.lapses
    sims = product_limit(at_risk, events)  # (R, H)
    lo, hi = _quantiles(sims, level)
    sd = np.maximum(sims.std(axis=0), 1e-9)
    z_obs = (km.survival - pred.survival) / sd
    z_sim = np.abs((sims - pred.survival[None]) / sd[None]).max(axis=1)
    worst = int(np.argmax(np.abs(z_obs)))
    p_value = float(np.mean(z_sim >= abs(z_obs[worst]) - 1e-12))
    return {
        "cohorts": [panel.period_label(int(jp.min())), panel.period_label(int(jp.max()))], "joiners": int(cnt.sum()),
        "durations": list(range(1, H + 1)), "at_risk": [float(v) for v in km.at_risk],
        "events": [float(v) for v in km.events], "observed": [float(v) for v in km.survival],
        "predicted": [float(v) for v in pred.survival], "band": [[float(a), float(b)] for a, b in zip(lo, hi)],
        "inside": [bool(a <= o <= b) for o, a, b in zip(km.survival, lo, hi)],
        "largest_gap": {"duration": worst + 1, "observed": float(km.survival[worst]),
                        "predicted": float(pred.survival[worst]), "gap": float(km.survival[worst] - pred.survival[worst]),
                        "band": [float(lo[worst]), float(hi[worst])], "z": float(z_obs[worst])},
        "p_value": p_value,
        "note": (f"Kaplan-Meier share still a member k periods after first joining, accounts that joined in "
                 f"{panel.period_label(int(jp.min()))}..{panel.period_label(int(jp.max()))}, followed to the panel's end "
                 f"(durations with at least {MIN_AT_RISK} joiners at risk); predicted: the calibration chain's "
                 "product-limit curve for the same join states and follow-up; band: simulated cohorts"),
    }
