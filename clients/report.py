"""The analyst's report: one self-contained HTML page with PNG charts and tables.

:func:`collect` asks a :class:`~stateworth.valuation.Valuer` the questions the page shows and
returns a JSON-ready dict (also written as ``report.json``); :func:`render` draws the charts
(matplotlib, Agg backend) and writes ``report.html`` with every chart embedded as a PNG data URI,
so the page is one file that can be mailed or archived; the PNGs are also written to ``charts/``
beside it. :func:`build_report` does both and writes the directory atomically.

The figures are the valuation layer's; this module only picks the states and cohorts, averages
for display, and lays the page out. Cohorts:

* members: the model's long-run state mix (``Valuer.stationary``) restricted to the cells shown
  (a plan in a market at a tenure), so months and engagement bands weigh as often as they occur;
* prospects (never-members) are transient in the chain (nobody becomes a prospect again), so
  they have no long-run weight: the page uses a stated prospect profile instead: counters at 0,
  each chance axis at its most common level among non-members in the long run, the calendar
  (cycle axes) with equal weight.

No account identifiers appear anywhere: a model holds tables, not accounts, and fields of
``diagnostics.json`` whose names look like identifiers are left out.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from stateworth.caution import CAUTION_LINE
from stateworth.errors import ArtifactError, QueryError
from stateworth.files import atomic_dir

ASSUMPTIONS = [
    "Moves between states are unconfounded given the state: two customers in the same cell (plan, "
    "engagement band, tenure, market, and any propensity band) are assumed to move with the same "
    "probabilities whatever else differs between them. Where the overlap and balance diagnostics "
    "flag cells, that reading is weak.",
    "The chain is time-homogeneous apart from its declared cycles: the fitted month-to-month "
    "probabilities are assumed to hold in the future.",
    "Never-member join rates rest on the addressable market sizes given to the fit, which are "
    "inputs with a range, not observations.",
    "Values are discounted sums to the start of the current period at the spec's annual rate and "
    "cash timing; the infinite horizon is used unless a figure says otherwise.",
]
CAUTIONS = [
    CAUTION_LINE,
    "The discount rate and the policy behind the transition tables (prices, offers, plan rules) are "
    "finance's call: change them and the figures change.",
    "Intervals (where shown) reflect sampling uncertainty of the fitted tables only, not doubts about "
    "the state grid or the assumptions above.",
]
#: keys of diagnostics.json that are never shown (identifier-like)
_ID_WORDS = ("account", "customer_id", "user_id", "member_id", "email", "name_of")

# ---------------------------------------------------------------------------------------------
# questions


def _axes_of(spec, kinds: Iterable[str]) -> list[str]:
    kinds = set(kinds)
    return [n for n, a in spec.axes.items() if a.kind in kinds]


def _nan_div(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(b > 0, a / np.where(b > 0, b, 1.0), np.nan)


def prospect_profile(valuer, pi: np.ndarray, market_axis: str | None, market: str | None) -> list[dict[str, str]]:
    """The prospect states the page averages over (equal weights): status at the first non-member
    level, counters at 0, each chance axis at its most common level among non-members in the
    long run (in the market), every combination of cycle levels."""
    import itertools

    model = valuer.model
    spec, grid = model.spec, model.grid
    st = spec.status_axis
    codes = grid.codes()
    non_member_idx = [grid.level_index(st, lv) for lv in spec.non_members]
    mask = np.isin(codes[grid.position(st)], non_member_idx)
    if market_axis is not None:
        mask &= codes[grid.position(market_axis)] == grid.level_index(market_axis, market)
    base: dict[str, str] = {st: spec.non_members[0]}
    if market_axis is not None:
        base[market_axis] = market
    for ax in grid.axes:
        if ax.name in base:
            continue
        if ax.kind == "counter":
            base[ax.name] = ax.levels[0]
        elif ax.kind in ("chance", "status"):
            w = np.bincount(codes[grid.position(ax.name)][mask], weights=pi[mask], minlength=ax.size)
            base[ax.name] = ax.levels[int(np.argmax(w))] if w.sum() > 0 else ax.levels[0]
        elif ax.kind == "fixed":
            base[ax.name] = ax.levels[0]
    cycles = [ax for ax in grid.axes if ax.kind == "cycle"]
    out = []
    for combo in itertools.product(*[ax.levels for ax in cycles]):
        s = dict(base)
        s.update({ax.name: lv for ax, lv in zip(cycles, combo)})
        out.append({a: s[a] for a in grid.names})
    return out


def _mean_answer(answers: Sequence[Any]) -> dict[str, Any]:
    vals = [a.value for a in answers]
    lo = [a.interval[0] for a in answers if a.interval is not None]
    hi = [a.interval[1] for a in answers if a.interval is not None]
    # the mean of the per-state interval ends is conservative for the mean figure; said on the page
    return {"value": float(np.mean(vals)),
            "interval": [float(np.mean(lo)), float(np.mean(hi))] if len(lo) == len(answers) and lo else None}


def _sold(spec, plan: str, market_axis: str | None, market: str | None) -> bool:
    from stateworth.rules.spec import not_sold_pairs

    return not any(p == plan and f == market_axis and lv == market for p, f, lv in not_sold_pairs(spec))


def _upgrade_moves(spec) -> list[tuple[str, str]]:
    """(from plan, to plan) pairs of allowed moves to a later (dearer) plan."""
    st = spec.axes[spec.status_axis]
    members = spec.members
    out = []
    for i, a in enumerate(members):
        allowed = st.moves.get(a, members) if st.moves else members
        out.extend((a, b) for b in members[i + 1:] if b in allowed)
    return out


def cycle_axes(model) -> list[str]:
    return [ax.name for ax in model.grid.axes if ax.kind == "cycle"]


def pool_marginal(entries: Iterable[Any], pool: Sequence[str]) -> list[dict[str, Any]]:
    """Marginal entries (:class:`~stateworth.valuation.MarginalEntry`) that differ only in the
    given axes (of their cells), pooled and ranked by ``|per_point|``.

    Raising a probability by one point in every pooled cell at once changes J, to first order,
    by the sum of the cells' per-point values; ``probability`` is their mean, with
    ``probability_range`` and ``cells`` (how many were pooled)."""
    drop = set(pool)
    groups: dict[tuple, dict[str, Any]] = {}
    for e in entries:
        cell = {k: v for k, v in e.cell.items() if k not in drop}
        key = (e.axis, tuple(sorted(cell.items())), e.to)
        g = groups.setdefault(key, {"axis": e.axis, "cell": cell, "to": e.to, "per_point": 0.0, "probs": []})
        g["per_point"] += float(e.per_point)
        g["probs"].append(float(e.probability))
    out = [{"axis": g["axis"], "cell": g["cell"], "to": g["to"], "probability": float(np.mean(g["probs"])),
            "probability_range": [min(g["probs"]), max(g["probs"])], "cells": len(g["probs"]),
            "per_point": g["per_point"]} for g in groups.values()]
    return sorted(out, key=lambda g: -abs(g["per_point"]))


def collect(valuer, stream: str | None = None, diagnostics: Mapping[str, Any] | None = None,
            top: int = 12, progress: bool = False, sensitivity: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """Everything the page shows, as a JSON-ready dict (money in the model's currency).
    ``sensitivity``: ``{"low": valuer, "high": valuer}`` solved at the ends of the market-size
    range (point values only); each acquisition figure is then shown at both."""
    from tqdm import tqdm

    model = valuer.model
    spec, grid = model.spec, model.grid
    stream = stream or valuer.streams[0]
    if stream not in valuer.streams:
        raise QueryError(f"unknown reward stream '{stream}'; streams are {', '.join(valuer.streams)}", field="stream")
    unit = valuer.unit(stream)
    st = spec.status_axis
    fixed = _axes_of(spec, ["fixed"])
    market_axis = fixed[0] if fixed else None
    markets = list(grid.axis(market_axis).levels) if market_axis else [None]
    counters = _axes_of(spec, ["counter"])
    tenure_axis = counters[0] if counters else None
    codes = grid.codes()
    steps = ["long-run mix", "value by tenure", "acquisition", "plan upgrade", "marginal values"]
    bar = tqdm(total=len(steps), desc="report", unit="part", disable=not progress, leave=False)

    def step():
        bar.update(1)

    pi = np.asarray(valuer.stationary(), dtype=np.float64)
    V = np.asarray(valuer.values(np.arange(grid.size), stream), dtype=np.float64)
    step()

    data: dict[str, Any] = {
        "model": {"name": model.name, "version": valuer.version, "states": int(model.n_states),
                  "currency": model.currency, "period": spec.model.period,
                  "annual_rate": spec.model.discount.annual_rate, "cash": spec.model.discount.cash,
                  "beta": float(model.beta), "streams": list(valuer.streams),
                  "axes": grid.describe(), "draws": int(valuer.n_draws)},
        "stream": stream, "unit": unit,
        "stream_description": (spec.rewards[stream].description if stream in spec.rewards else
                               "one per member period (discounted member-months)"),
    }

    # value by tenure, per plan and market: pi-weighted over the other axes
    by_tenure: list[dict[str, Any]] = []
    keep = [a for a in (market_axis, tenure_axis, st) if a]
    shape = grid.shape
    Vg, Pg = V.reshape(shape), pi.reshape(shape)
    drop = tuple(i for i, n in enumerate(grid.names) if n not in keep)
    num = (Vg * Pg).sum(axis=drop)
    den = Pg.sum(axis=drop)
    # numerical noise of the long-run solve leaves ~1e-17 on unreachable cells: treat as none
    mean = _nan_div(num, np.where(den > 1e-12 * max(float(den.max()), 1e-300), den, 0.0))
    order = [n for n in grid.names if n in keep]
    for m in markets:
        for plan in spec.members:
            if not _sold(spec, plan, market_axis, m):
                continue
            idx: list[Any] = []
            for n in order:
                if n == market_axis:
                    idx.append(grid.level_index(market_axis, m))
                elif n == st:
                    idx.append(grid.level_index(st, plan))
                else:
                    idx.append(slice(None))
            series = np.atleast_1d(mean[tuple(idx)])
            if not np.any(np.isfinite(series)):
                continue
            by_tenure.append({"market": m, "plan": plan,
                              "tenure": list(grid.axis(tenure_axis).levels) if tenure_axis else ["all"],
                              "value": [None if not math.isfinite(x) else float(x) for x in series]})
    data["value_by_tenure"] = {"axis": tenure_axis, "series": by_tenure}
    step()

    # acquisition by market beside the naive figures
    joinable = [p for p in (spec.axes[st].moves.get(spec.non_members[0], spec.members) if spec.axes[st].moves
                            else spec.members) if p in spec.members]
    acq: list[dict[str, Any]] = []
    prospects: dict[str, list[dict[str, str]]] = {}
    for m in markets:
        profile = prospect_profile(valuer, pi, market_axis, m)
        prospects[str(m)] = profile
        pv = [valuer.value(s, stream=stream) for s in profile]
        for plan in joinable:
            if not _sold(spec, plan, market_axis, m):
                continue
            honest = [valuer.acquisition(s, plan, stream=stream) for s in profile]
            naive = [valuer.naive_comparison(s, plan, stream=stream) for s in profile]
            h = _mean_answer(honest)
            mv = float(np.mean([n["member_value"] for n in naive]))
            sens = {f"honest_{k}_size": float(np.mean([sv.acquisition(s, plan, stream=stream).value for s in profile]))
                    for k, sv in (sensitivity or {}).items()}
            acq.append({"market": m, "plan": plan, "honest": h["value"], "interval": h["interval"], **sens,
                        "prospect_value": float(np.mean([a.value for a in pv])),
                        "member_value": mv,
                        "one_period": float(np.mean([n["one_period"] for n in naive])),
                        "ratio": mv / h["value"] if h["value"] > 0 else None})
    p0 = next(iter(prospects.values()))[0] if prospects else {}
    joins = (diagnostics or {}).get("joins") if isinstance(diagnostics, Mapping) else None
    data["acquisition"] = {"rows": acq, "size_range": bool(sensitivity),
                           "band_assumption": (joins or {}).get("band_assumption") if isinstance(joins, Mapping) else None,
                           "profile": {k: v for k, v in p0.items()
                                       if grid.axis(k).kind not in ("cycle", "fixed")},
                           "cycles": [ax.name for ax in grid.axes if ax.kind == "cycle"]}
    step()

    # plan upgrades: members on plan a in a market (long-run mix) moved to plan b
    upg: list[dict[str, Any]] = []
    for m in markets:
        for a, b in _upgrade_moves(spec):
            if not (_sold(spec, a, market_axis, m) and _sold(spec, b, market_axis, m)):
                continue
            mask = codes[grid.position(st)] == grid.level_index(st, a)
            if market_axis:
                mask &= codes[grid.position(market_axis)] == grid.level_index(market_axis, m)
            w = np.where(mask, pi, 0.0)
            if w.sum() <= 0:
                continue
            ans = valuer.cohort_contrast(w / w.sum(), {st: b}, stream=stream)
            upg.append({"market": m, "from": a, "to": b, "value": float(ans.value),
                        "interval": None if ans.interval is None else [float(x) for x in ans.interval]})
    data["plan_upgrade"] = upg
    step()

    # ranked marginal transition values for the long-run population. One entry per calendar
    # cell would fill the ranking with the same move twelve times, so entries that differ only
    # in cycle axes are pooled: raising the probability in every one of those cells at once is
    # worth, to first order, the sum of their per-point values.
    mres = valuer.marginal(pi, stream=stream, top=10**9)
    cycles = cycle_axes(model)
    data["marginal"] = {"objective": float(mres.objective), "pooled_over": cycles,
                        "entries": pool_marginal(mres.entries, cycles)[:top]}
    step()
    bar.close()

    data["solve"] = valuer.solution.stats()
    data["diagnostics"] = _clean(diagnostics) if diagnostics is not None else None
    data["assumptions"] = ASSUMPTIONS
    data["cautions"] = CAUTIONS
    return data


def _clean(doc: Any) -> Any:
    """diagnostics.json without identifier-like fields."""
    if isinstance(doc, Mapping):
        return {str(k): _clean(v) for k, v in doc.items()
                if not any(w in str(k).lower() for w in _ID_WORDS)}
    if isinstance(doc, list):
        return [_clean(v) for v in doc]
    return doc


# ---------------------------------------------------------------------------------------------
# charts


def _plt():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 11, "axes.titlesize": 13, "axes.labelsize": 11,
                         "legend.fontsize": 10, "figure.dpi": 100, "axes.grid": True,
                         "grid.alpha": 0.3, "axes.spines.top": False, "axes.spines.right": False})
    return plt


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    import matplotlib.pyplot as plt

    plt.close(fig)
    return buf.getvalue()


def chart_value_by_tenure(data: Mapping[str, Any]) -> bytes | None:
    series = data["value_by_tenure"]["series"]
    if not series:
        return None
    plt = _plt()
    markets = list(dict.fromkeys(s["market"] for s in series))
    ncol = min(2, len(markets))
    nrow = math.ceil(len(markets) / ncol)
    fig, axes = plt.subplots(nrow, ncol, figsize=(5.2 * ncol + 0.6, 3.6 * nrow + 0.6), sharey=True, squeeze=False)
    unit = data["unit"]
    prospect = {r["market"]: r["prospect_value"] for r in data["acquisition"]["rows"]}
    plans = list(dict.fromkeys(s["plan"] for s in series))
    colours = {p: f"C{i}" for i, p in enumerate(plans)}
    axis_name = data["value_by_tenure"]["axis"] or "tenure"
    for k, m in enumerate(markets):
        ax = axes[k // ncol][k % ncol]
        for s in series:
            if s["market"] != m:
                continue
            x = [int(t) if str(t).isdigit() else i for i, t in enumerate(s["tenure"])]
            y = [np.nan if v is None else v for v in s["value"]]
            ax.plot(x, y, marker="o", ms=3, lw=2, color=colours[s["plan"]], label=s["plan"])
        if m in prospect:
            ax.axhline(prospect[m], color="0.35", ls="--", lw=1.5, label="prospect (non-member)")
        ax.set_title(f"{m}" if m is not None else "all")
        ax.set_xlabel(f"{axis_name} ({data['model']['period']}s as a member)")
        if k % ncol == 0:
            ax.set_ylabel(f"value V ({unit}, discounted)")
        ax.yaxis.set_major_formatter(_thousands())
    for k in range(len(markets), nrow * ncol):
        axes[k // ncol][k % ncol].set_visible(False)
    handles, labels = axes[0][0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="lower center", ncol=len(labels), frameon=False, bbox_to_anchor=(0.5, -0.04))
    fig.suptitle(f"Value of a member by {axis_name}, per plan and market ({data['stream']}, {unit})",
                 fontsize=14)
    fig.tight_layout(rect=(0, 0.04, 1, 1))
    return _png(fig)


def _thousands():
    from matplotlib.ticker import FuncFormatter

    return FuncFormatter(lambda v, _: f"{v:,.0f}")


def chart_acquisition(data: Mapping[str, Any]) -> bytes | None:
    rows = data["acquisition"]["rows"]
    if not rows:
        return None
    plt = _plt()
    labels = [f"{r['market']}\n{r['plan']}" if r["market"] is not None else r["plan"] for r in rows]
    x = np.arange(len(rows))
    wdt = 0.27
    fig, ax = plt.subplots(figsize=(max(7.0, 1.0 * len(rows) + 2.5), 4.6))
    honest = [r["honest"] for r in rows]
    err = None
    if all(r["interval"] for r in rows):
        err = np.array([[r["honest"] - r["interval"][0] for r in rows], [r["interval"][1] - r["honest"] for r in rows]])
    ax.bar(x - wdt, honest, wdt, label="honest: V(member) - V(prospect)", color="C2", yerr=err, capsize=3)
    ax.bar(x, [r["member_value"] for r in rows], wdt, label='naive: "member value" V(member)', color="C3", alpha=0.8)
    ax.bar(x + wdt, [r["one_period"] for r in rows], wdt, label='naive: "one period of price"', color="C7")
    ax.set_xticks(x, labels)
    ax.set_ylabel(f"value of one acquisition ({data['unit']})")
    ax.set_xlabel("market and plan joined")
    ax.yaxis.set_major_formatter(_thousands())
    ax.set_title(f"Value of an acquisition by market beside the naive figures ({data['stream']})")
    top = max(max(r["member_value"] for r in rows), max(honest), 1e-9)
    ax.set_ylim(0, top * 1.28)  # headroom for the legend above the bars
    ax.legend(loc="upper center", ncol=3, frameon=False, fontsize=9.5)
    fig.tight_layout()
    return _png(fig)


def chart_upgrade(data: Mapping[str, Any]) -> bytes | None:
    rows = data["plan_upgrade"]
    if not rows:
        return None
    plt = _plt()
    moves = list(dict.fromkeys(f"{r['from']} -> {r['to']}" for r in rows))
    markets = list(dict.fromkeys(r["market"] for r in rows))
    fig, ax = plt.subplots(figsize=(max(7.0, 1.4 * len(markets) + 3), 4.4))
    wdt = 0.8 / max(1, len(moves))
    for j, mv in enumerate(moves):
        xs, ys, lo, hi = [], [], [], []
        for i, m in enumerate(markets):
            r = next((r for r in rows if r["market"] == m and f"{r['from']} -> {r['to']}" == mv), None)
            if r is None:
                continue
            xs.append(i + (j - (len(moves) - 1) / 2) * wdt)
            ys.append(r["value"])
            lo.append(r["value"] - r["interval"][0] if r["interval"] else 0.0)
            hi.append(r["interval"][1] - r["value"] if r["interval"] else 0.0)
        ax.bar(xs, ys, wdt, label=mv, color=f"C{j}", yerr=[lo, hi] if any(lo) or any(hi) else None, capsize=3)
    ax.axhline(0, color="0.2", lw=0.8)
    ax.set_xticks(np.arange(len(markets)), [str(m) for m in markets])
    ax.set_xlabel("market")
    ax.set_ylabel(f"value of the upgrade per member ({data['unit']})")
    ax.yaxis.set_major_formatter(_thousands())
    ax.set_title(f"Value of a plan upgrade, members in their long-run mix ({data['stream']})")
    ax.legend(title="plan move", frameon=False)
    fig.tight_layout()
    return _png(fig)


def entry_label(e: Mapping[str, Any]) -> str:
    cell = ", ".join(f"{k}={v}" for k, v in e["cell"].items())
    return f"P({e['axis']}'={e['to']} | {cell})"


def chart_marginal(data: Mapping[str, Any]) -> bytes | None:
    entries = data["marginal"]["entries"]
    if not entries:
        return None
    plt = _plt()
    labels = [entry_label(e) for e in entries][::-1]
    vals = [e["per_point"] for e in entries][::-1]
    fig, ax = plt.subplots(figsize=(10.5, 0.42 * len(entries) + 1.8))
    ax.barh(np.arange(len(vals)), vals, color=["C2" if v >= 0 else "C3" for v in vals])
    ax.set_yticks(np.arange(len(vals)), labels, fontsize=9)
    ax.axvline(0, color="0.2", lw=0.8)
    ax.set_xlabel(f"change of the population's value per customer, per +1 point ({data['unit']})")
    pooled = data["marginal"].get("pooled_over") or []
    fig.suptitle("Marginal value of transitions: +1 percentage point on one table entry"
                 + (f"\n(in every {', '.join(pooled)} at once)" if pooled else ""), fontsize=13)
    fig.tight_layout()
    return _png(fig)


CHARTS = {"value_by_tenure": chart_value_by_tenure, "acquisition": chart_acquisition,
          "plan_upgrade": chart_upgrade, "marginal": chart_marginal}


# ---------------------------------------------------------------------------------------------
# page

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,Helvetica,Arial,sans-serif;max-width:1100px;
margin:2em auto;padding:0 1em;color:#1d1d1f;line-height:1.45}
h1{font-size:1.7em;margin-bottom:.2em}h2{margin-top:1.8em;border-bottom:1px solid #ddd;padding-bottom:.2em}
table{border-collapse:collapse;margin:.6em 0 1em}th,td{padding:.25em .7em;border-bottom:1px solid #eee}
th{text-align:left;background:#f5f5f7}td.n{text-align:right;font-variant-numeric:tabular-nums}
img{max-width:100%;height:auto;border:1px solid #eee;margin:.4em 0}
.caution{background:#fff8e1;border-left:4px solid #f0b400;padding:.6em 1em;margin:1em 0}
.note{color:#555;font-size:.92em}code{background:#f5f5f7;padding:0 .25em}
"""


def _fmt(x: Any, digits: int = 2) -> str:
    if x is None:
        return "-"
    if isinstance(x, float):
        if not math.isfinite(x):
            return "-"
        return f"{x:,.{digits}f}"
    return str(x)


def _table(headers: Sequence[str], rows: Sequence[Sequence[Any]], numeric: Sequence[bool] | None = None) -> str:
    numeric = numeric or [False] * len(headers)
    out = ["<table><thead><tr>" + "".join(f"<th>{html.escape(str(h))}</th>" for h in headers) + "</tr></thead><tbody>"]
    for r in rows:
        out.append("<tr>" + "".join(
            f"<td class=\"n\">{html.escape(_fmt(c))}</td>" if n else f"<td>{html.escape(_fmt(c))}</td>"
            for c, n in zip(r, numeric)) + "</tr>")
    out.append("</tbody></table>")
    return "\n".join(out)


def _prob(x: Mapping[str, Any]) -> str:
    lo, hi = x.get("probability_range") or (x["probability"], x["probability"])
    return f"{lo:.4f}" if abs(hi - lo) < 5e-5 else f"{lo:.4f} to {hi:.4f}"


def _iv(iv: Sequence[float] | None) -> str:
    return "-" if not iv else f"[{iv[0]:,.2f}, {iv[1]:,.2f}]"


def _img(name: str, png: bytes | None, alt: str) -> str:
    if png is None:
        return f"<p class=\"note\">(no chart: nothing to show for {html.escape(alt)})</p>"
    uri = "data:image/png;base64," + base64.b64encode(png).decode("ascii")
    return f"<img id=\"chart-{name}\" src=\"{uri}\" alt=\"{html.escape(alt)}\">"


def _cell_text(cell: Mapping[str, Any]) -> str:
    return ", ".join(f"{k}={v}" for k, v in cell.items())


def _fit_diagnostics_html(diag: Mapping[str, Any]) -> str | None:
    """The sections of a ``stateworth fit`` diagnostics.json; None if it has another layout."""
    if not all(k in diag for k in ("panel", "overlap", "prior", "joins")):
        return None
    e = html.escape
    parts = []
    try:
        from stateworth.estimation.diagnostics import summary_text
        parts.append(f"<pre>{e(summary_text(dict(diag)))}</pre>")
    except Exception:  # noqa: BLE001 - the summary is a convenience; the tables below carry the content
        pass
    o = diag["overlap"]
    listed = o.get("listed") or []
    parts.append(f"<h3>Overlap</h3><p>{o.get('cells_failing', 0):,} cells of the {e(str(o.get('factor', 'status')))} "
                 f"factor show moves but none into a member or none into a non-member status "
                 f"({100 * float(o.get('share_failing', 0.0)):.2f} % of the observed moves); "
                 f"{o.get('cells_without_moves', 0):,} cells have no moves at all (their rows come from the prior). "
                 "A contrast that starts in such a cell leans on the model rather than on data.</p>")
    if listed:
        rows = [[_cell_text(x["cell"]), x.get("missing"), x.get("moves"), f"{100 * float(x.get('share', 0)):.3f} %"]
                for x in listed]
        parts.append(_table(["cell", "no moves into", "moves", "share of moves"], rows, [False, False, True, True])
                     + (f"<p class=\"note\">the first {len(listed)} of {o.get('cells_failing', 0):,} cells</p>"
                        if o.get("cells_failing", 0) > len(listed) else ""))
    prop = diag.get("propensity")
    parts.append("<h3>Balance by propensity band</h3>")
    if prop:
        rows = [[b] + [None if v is None else f"{v:+.3f}" for v in row]
                for b, row in zip(prop["bands"], prop["smd_by_band"])]
        parts.append(f"<p>Standardised mean difference of each covariate between members and former members "
                     f"within each band of '{e(prop['axis'])}'; |SMD| below {prop.get('smd_rule', 0.1)} is commonly "
                     f"read as balanced. Unbalanced: {e(', '.join(prop.get('unbalanced') or []) or 'none')}.</p>"
                     + _table(["band"] + list(prop.get("terms", prop["covariates"])), rows,
                              [False] + [True] * len(prop.get("terms", prop["covariates"]))))
    else:
        parts.append("<p>The spec has no propensity band axis, so no balance check was made: the causal "
                     "reading rests on the other axes alone capturing what drives membership.</p>")
    parts.append("<h3>Where the prior dominated</h3>")
    rows = [[p_["factor"], f"{float(p_['strength']):.3g}", p_["cells"], p_["cells_with_moves"],
             p_.get("prior_dominated"), f"{100 * float(p_.get('share_prior_dominated', 0.0)):.2f} %"]
            for p_ in diag["prior"]]
    parts.append("<p>Cells with fewer observed moves than the prior strength (pseudo-moves) are mostly their "
                 "parent cell's distribution.</p>"
                 + _table(["factor", "prior strength", "cells", "cells with moves", "prior-dominated cells",
                           "their share of moves"], rows, [False, True, True, True, True, True]))
    j = diag["joins"]
    if j.get("hazard"):
        raw = j.get("hazard_raw") or {}
        rows = [[m, None if m not in raw else f"{raw[m]:.5f}", f"{h:.5f}", f"{j['hazard_high_size'][m]:.5f}",
                 f"{j['hazard_low_size'][m]:.5f}", (j.get("first_joins") or {}).get(m)] for m, h in j["hazard"].items()]
        parts.append("<h3>Never-member join rates</h3><p>Raw: first joins / (addressable size - accounts already "
                     "tracked), per month. Used: the rate the model uses, the raw counts shrunk towards the rate "
                     "pooled over " + e(", ".join(j.get("pooling") or []) or "the cells") + " by the hierarchical "
                     "prior (at-risk weighted over the market's cells). The range comes from the market-size range "
                     "given to the fit.</p>"
                     + _table(["market", "raw join rate", "join rate used", "used at the high size",
                               "used at the low size", "first joins"], rows, [False, True, True, True, True, True]))
        if j.get("band_assumption"):
            parts.append(f"<p class=\"note\">{e(j['band_assumption'])}.</p>")
    return "\n".join(parts)


def _diagnostics_html(diag: Any) -> str:
    if isinstance(diag, Mapping):
        known = _fit_diagnostics_html(diag)
        if known is not None:
            return known
    if diag is None:
        return ("<p><strong>No fit diagnostics:</strong> this model directory has no "
                "<code>diagnostics.json</code> (it was not fitted from a panel, e.g. it was compiled from "
                "written tables). Overlap, balance and prior-dominance cannot be judged; treat the causal "
                "reading with extra care.</p>")
    parts = []
    if not isinstance(diag, Mapping):
        return f"<pre>{html.escape(json.dumps(diag, indent=2))}</pre>"
    for key, val in diag.items():
        title = key.replace("_", " ")
        if isinstance(val, list) and val and all(isinstance(v, Mapping) for v in val):
            cols = list(dict.fromkeys(k for v in val for k in v))
            rows = [[_scalar(v.get(c)) for c in cols] for v in val[:60]]
            numeric = [all(isinstance(v.get(c), (int, float)) and not isinstance(v.get(c), bool)
                           for v in val[:60] if v.get(c) is not None) for c in cols]
            more = f"<p class=\"note\">({len(val) - 60} more rows in diagnostics.json)</p>" if len(val) > 60 else ""
            parts.append(f"<h3>{html.escape(title)}</h3>" + _table(cols, rows, numeric) + more)
        elif isinstance(val, Mapping) and val and all(not isinstance(v, (Mapping, list)) for v in val.values()):
            rows = [[k, _scalar(v)] for k, v in val.items()]
            parts.append(f"<h3>{html.escape(title)}</h3>" + _table(["item", "value"], rows, [False, True]))
        elif isinstance(val, (Mapping, list)):
            parts.append(f"<h3>{html.escape(title)}</h3><pre>{html.escape(json.dumps(val, indent=2)[:6000])}</pre>")
        else:
            parts.append(f"<p><strong>{html.escape(title)}:</strong> {html.escape(_fmt(_scalar(val), 4))}</p>")
    return "\n".join(parts) or "<p>diagnostics.json is empty.</p>"


def _scalar(v: Any) -> Any:
    if isinstance(v, (Mapping, list)):
        return json.dumps(v)
    return v


def render_html(data: Mapping[str, Any], charts: Mapping[str, bytes | None]) -> str:
    """The page. ``charts``: name -> PNG bytes (or None where there is nothing to draw)."""
    m = data["model"]
    unit = data["unit"]
    e = html.escape
    sized = bool(data["acquisition"].get("size_range"))
    rows_acq = [[r["market"], r["plan"], r["honest"], _iv(r["interval"])]
                + ([f"{_fmt(r.get('honest_high_size'))} .. {_fmt(r.get('honest_low_size'))}"] if sized else [])
                + [r["prospect_value"], r["member_value"],
                 r["one_period"], None if r["ratio"] is None else f"{r['ratio']:.1f}x"]
                for r in data["acquisition"]["rows"]]
    size_note = (" The interval carries the sampling uncertainty of the fitted tables at the given market sizes; "
                 "the market sizes are inputs, not data, so their range is shown beside it as a sensitivity: the "
                 "honest value refitted at the high and at the low size (more never-members at risk make each "
                 "one less likely to join, so a prospect is worth less and an acquisition more)." if sized else "")
    band_note = data["acquisition"].get("band_assumption")
    prof = ", ".join(f"{k}={v}" for k, v in data["acquisition"]["profile"].items())
    cyc = ", ".join(data["acquisition"]["cycles"])
    rows_upg = [[r["market"], f"{r['from']} -> {r['to']}", r["value"], _iv(r["interval"])]
                for r in data["plan_upgrade"]]
    rows_mg = [[i + 1, entry_label(x), _prob(x), x.get("cells", 1), x["per_point"]]
               for i, x in enumerate(data["marginal"]["entries"])]
    pooled = data["marginal"].get("pooled_over") or []
    pooled_note = (f" Entries that differ only in {', '.join(pooled)} are pooled: the row is the value of +1 point "
                   f"in all of those cells at once (the sum of their per-point values)." if pooled else "")
    s = data["solve"]
    rows_solve = [[k.replace("_", " "), _scalar(s.get(k))] for k in
                  ("method", "status", "iterations", "operator_applies", "residual", "bound", "seconds",
                   "states", "streams") if k in s]
    rows_solve.append(["posterior draws solved", m["draws"]])
    axes_rows = [[a["name"], a["kind"], len(a["levels"]), ", ".join(a["levels"][:14]) +
                  (" ..." if len(a["levels"]) > 14 else "")] for a in m["axes"]]
    tenure_axis = data["value_by_tenure"]["axis"] or "tenure"
    interval_note = ("Intervals are percentile intervals over the model's posterior draws; for averages over "
                     "several states the interval ends are averaged too (a conservative width)."
                     if m["draws"] else
                     "No intervals: this model carries no posterior draws of its tables (fit with draws to "
                     "get them).")
    body = f"""
<h1>stateworth report: {e(m['name'])}</h1>
<p class="note">model version <code>{e(m['version'])}</code> &middot; {m['states']:,} states &middot;
stream <strong>{e(data['stream'])}</strong> ({e(data['stream_description'] or '')}) in {e(unit)} &middot;
discount {m['annual_rate']:.1%} a year, beta {m['beta']:.6f} a {e(m['period'])}, cash at the {e(m['cash'])} of
each period</p>
<div class="caution"><strong>Read with care.</strong> {' '.join(e(c) for c in data['cautions'])}</div>

<h2>Value by {e(tenure_axis)} for each plan and market</h2>
<p>V(s): the expected discounted sum of the stream from a state on, for a member on each plan at each
{e(tenure_axis)}, averaged over the other axes (calendar month, engagement) in the mix the model
reaches in the long run. The dashed line is a prospect (never-member) in the same market: a
non-member is worth something too, because many join later anyway.</p>
{_img('value_by_tenure', charts.get('value_by_tenure'), 'value by tenure')}

<h2>The value of an acquisition, beside the naive figures</h2>
<p>The honest value of acquiring a prospect is V(member) - V(prospect). The usual shortcuts are the
"member value" V(member) alone (which ignores that the prospect would often have joined later
anyway) and "one period of price" (which ignores that members stay). Prospect profile: {e(prof)};
averaged with equal weight over {e(cyc) or 'no cycle axis'}.{e(size_note)}</p>
{f'<p class="note"><strong>Per-band values:</strong> {e(band_note)}.</p>' if band_note else ''}
{_img('acquisition', charts.get('acquisition'), 'acquisition by market')}
{_table(['market', 'plan joined', f'honest value ({unit})', 'interval']
        + ([f'at the high .. low market size ({unit})'] if sized else [])
        + [f'V(prospect) ({unit})', f'naive member value ({unit})', f'naive one period ({unit})',
           'member value / honest'],
        rows_acq, [False, False, True, True] + ([True] if sized else []) + [True, True, True, True])}

<h2>The value of a plan upgrade</h2>
<p>V(member on the dearer plan) - V(member), at the same other coordinates (counters reset where the
spec resets them on a change of plan), averaged over the members on the cheaper plan in their
long-run mix in each market. Pricing systems use this figure to bound an upgrade offer.</p>
{_img('plan_upgrade', charts.get('plan_upgrade'), 'plan upgrade')}
{_table(['market', 'plan move', f'value per member ({unit})', 'interval'], rows_upg, [False, False, True, True])}

<h2>Marginal value of transitions</h2>
<p>For J = the value of the long-run population per customer ({_fmt(data['marginal']['objective'])} {e(unit)}),
one adjoint solve prices every transition: dJ/dP<sub>ij</sub> = &beta; &lambda;<sub>i</sub> V<sub>j</sub>.
Each row is what +1 percentage point on one factor-table entry is worth (the other allowed entries
of its row scaled down in proportion).{e(pooled_note)} These are local slopes: use
<code>stateworth change</code> for the exact effect of a finite change.</p>
{_img('marginal', charts.get('marginal'), 'marginal values')}
{_table(['rank', 'transition', 'probability', 'cells', f'per +1 point ({unit})'], rows_mg,
        [True, False, True, True, True])}

<h2>Fit diagnostics</h2>
<p>Overlap (every conditioning cell shows moves into member and non-member next status), balance
(standardised mean differences of covariates within propensity bands; below 0.1 is commonly read
as balanced) and where the prior dominated sparse cells.</p>
{_diagnostics_html(data['diagnostics'])}

<h2>Solve statistics</h2>
{_table(['item', 'value'], rows_solve, [False, True])}
<p class="note">{e(interval_note)}</p>

<h2>The model</h2>
{_table(['axis', 'kind', 'levels', 'level names'], axes_rows, [False, False, True, False])}

<h2>Assumptions and cautions</h2>
<ul>{''.join(f'<li>{e(a)}</li>' for a in data['assumptions'])}</ul>
<ul>{''.join(f'<li>{e(c)}</li>' for c in data['cautions'])}</ul>
"""
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>stateworth report: {e(m['name'])}</title><style>{_CSS}</style></head>"
            f"<body>{body}</body></html>\n")


def _size_range(valuer, model_dir: Path) -> dict[str, Any] | None:
    """Point-only valuers of the model at the low and high market sizes (the status tables
    ``stateworth fit`` stores as ``sensitivity.size_low/high.table.<status axis>``), or None."""
    if not model_dir.is_dir() or not (model_dir / "manifest.json").is_file():
        return None
    from stateworth.rules import load_model
    from stateworth.valuation import Valuer

    model = valuer.model
    _, extra = load_model(model_dir)
    st = model.spec.status_axis
    keys = {k: f"sensitivity.size_{k}.table.{st}" for k in ("low", "high")}
    if not all(v in extra for v in keys.values()):
        return None
    return {k: Valuer.build(model.with_tables({st: extra[v]}), draws=False, streams=valuer.streams)
            for k, v in keys.items()}


def build_report(model_dir: str | Path, out_dir: str | Path, *, stream: str | None = None,
                 valuer=None, top: int = 12, progress: bool = False) -> Path:
    """Solve (unless ``valuer`` is given), collect, draw and write ``out_dir`` atomically:
    ``report.html`` (self-contained), ``charts/*.png``, ``report.json``. Returns the page's path.

    ``out_dir`` may be missing, empty, or an earlier report (replaced); anything else is refused
    with an ArtifactError so that no unrelated folder is overwritten."""
    model_dir, out_dir = Path(model_dir), Path(out_dir)
    if out_dir.exists():
        if not out_dir.is_dir():
            raise ArtifactError("exists and is not a directory; give a directory for the report", where=str(out_dir))
        entries = [p.name for p in out_dir.iterdir()]
        if entries and "report.html" not in entries:
            raise ArtifactError("exists, is not empty and holds no earlier report; pick a new directory",
                                where=str(out_dir))
    if valuer is None:
        from stateworth.clients.commands._common import load_valuer
        valuer = load_valuer(str(model_dir))
    diagnostics = None
    dpath = model_dir / "diagnostics.json"
    if model_dir.is_dir() and dpath.is_file():
        try:
            diagnostics = json.loads(dpath.read_text())
        except (json.JSONDecodeError, UnicodeDecodeError) as e:
            raise ArtifactError(f"diagnostics.json is not valid JSON ({e}); refit or remove it",
                                where=str(model_dir)) from None
    data = collect(valuer, stream=stream, diagnostics=diagnostics, top=top, progress=progress,
                   sensitivity=_size_range(valuer, model_dir))
    charts = {name: fn(data) for name, fn in CHARTS.items()}
    page = render_html(data, charts)

    with atomic_dir(out_dir) as tmp:
        (tmp / "charts").mkdir()
        for name, png in charts.items():
            if png is not None:
                (tmp / "charts" / f"{name}.png").write_bytes(png)
        (tmp / "report.json").write_text(json.dumps(data, indent=2, default=float))
        (tmp / "report.html").write_text(page, encoding="utf-8")
    return out_dir / "report.html"
