"""The report's charts: PNG images for a page or a slide deck, drawn with matplotlib (Agg).

Each ``chart_*`` function takes the report's data (:func:`stateworth.valuation.summary.
report_summary`, JSON-ready) and returns PNG bytes, or None when there is nothing to draw. The
images stand on their own when pasted into a deck: 200 dpi; the model, its version, the stream
and its unit, the interval level and a short caution printed under every chart and written into
the PNG's text chunks (``Title``, ``Source``, ``Description``, ``Disclaimer``); legends sit outside
the plotting area so they never cover a bar or a line; a plan that is not sold in a market is
named where its bars or line would be, not left as a silent gap.

Importing this module loads no matplotlib; the first chart does (Agg, never a window).
"""

from __future__ import annotations

import io
import math
from typing import Any, Callable, Mapping

from stateworth.caution import CAUTION, CAUTION_SHORT

DPI = 200
#: height of the stamp under each chart (three lines of small text)
FOOTER_INCHES = 0.55
#: the narrowest chart, in inches: the stamp's caution line fits on it
MIN_WIDTH = 8.0
#: colours by role: the honest figure, the member-value shortcut, one period of cash, prospects
HONEST, MEMBER, ONE_PERIOD, PROSPECT = "#1b7f5a", "#c0504d", "#7f7f7f", "#555555"
POSITIVE, NEGATIVE = "#1b7f5a", "#c0504d"


def _plt():
    from stateworth.extras import need

    matplotlib = need("matplotlib", "report", "the report's charts")

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 10, "axes.titlesize": 11.5, "axes.labelsize": 10,
                         "legend.fontsize": 9.5, "figure.dpi": 100, "axes.grid": True, "grid.alpha": 0.3,
                         "axes.spines.top": False, "axes.spines.right": False, "axes.axisbelow": True})
    return plt


def thousands():
    """A tick formatter with thousands separators and no decimals: ``1,750``."""
    from matplotlib.ticker import FuncFormatter

    return FuncFormatter(lambda v, _: f"{v:,.0f}")


def stamp_lines(data: Mapping[str, Any]) -> list[str]:
    """The lines printed under every chart: the model, version, stream and unit, intervals, caution."""
    m = data["model"]
    if m["draws"]:
        iv = f"{data['level']:.0%} intervals over {m['draws']} posterior draws"
        if data.get("interval_note"):  # "no intervals: 5 posterior draws, fewer than the 20 ..."
            iv = f"{data['level']:.0%} intervals, {data['interval_note'].split(';')[0]}"
    else:
        iv = "no intervals (the model has no posterior draws)"
    return [f"{m['name']} \u00b7 model version {m['version']} \u00b7 stream {data['stream']} ({data['unit']})", iv,
            CAUTION_SHORT]


def _figure(width: float, height: float):
    """A figure of ``width`` x ``height`` inches of chart plus the stamp's strip under it:
    ``(figure, chart)``, ``chart`` the subfigure every chart draws in (its axes, legend, title).
    Two subfigures under one constrained layout, so the stamp never meets a legend or a label."""
    plt = _plt()
    fig = plt.figure(figsize=(width, height + FOOTER_INCHES), layout="constrained")
    chart, foot = fig.subfigures(2, 1, height_ratios=[height, FOOTER_INCHES])
    fig._stateworth_foot = foot  # noqa: SLF001 - kept for _finish
    return fig, chart


def _finish(fig, data: Mapping[str, Any], title: str) -> bytes:
    """Stamp the figure (text in its bottom strip, and PNG text chunks) and return the PNG."""
    lines = stamp_lines(data)
    fig._stateworth_foot.text(0.006, 0.5, "\n".join(lines), ha="left", va="center", fontsize=7.5, color="0.3",
                              linespacing=1.5)
    m = data["model"]
    meta = {"Title": title, "Source": f"stateworth model {m['name']} version {m['version']}",
            "Description": f"{lines[0]}; {lines[1]}", "Disclaimer": CAUTION,
            "Software": "stateworth report (matplotlib)"}
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata=meta, facecolor="white")
    import matplotlib.pyplot as plt

    plt.close(fig)
    return buf.getvalue()


def _capped(levels: list[str], counter: bool) -> list[str]:
    """Tick labels of a counter: the last level is its cap ("12+": 12 or more)."""
    return [f"{lv}+" if counter and k == len(levels) - 1 else str(lv) for k, lv in enumerate(levels)]


def chart_value_by_tenure(data: Mapping[str, Any]) -> bytes | None:
    """One panel per market: V by tenure for each plan with its interval band (bars per plan when the
    model has no counter axis), the prospect's value as a dashed line with its band; plans not sold
    there named in the panel's title."""
    sec = data["value_by_tenure"]
    series = sec["series"]
    if not any(s["sold"] for s in series):
        return None
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    markets = list(dict.fromkeys(s["market"] for s in series))
    ncol = min(2, len(markets))
    nrow = math.ceil(len(markets) / ncol)
    fig, sub = _figure(max(5.0 * ncol + 0.4, MIN_WIDTH), 3.3 * nrow + 0.9)
    axes = sub.subplots(nrow, ncol, sharey=True, squeeze=False)
    unit = data["unit"]
    plans = list(dict.fromkeys(s["plan"] for s in series))
    colours = {p: f"C{i}" for i, p in enumerate(plans)}
    prospect = {p["market"]: p for p in sec["prospect"]}
    axis_name = sec["axis"]
    levels = series[0]["tenure"]
    x = list(range(len(levels)))
    for k, m in enumerate(markets):
        ax = axes[k // ncol][k % ncol]
        missing = []
        bars = []
        for s in series:
            if s["market"] != m:
                continue
            if not s["sold"]:
                missing.append(f"{s['plan']}: {s['short']}")
                continue
            if axis_name is None:  # no counter: one figure per plan
                bars.append(s)
                continue
            y = [math.nan if v is None else v for v in s["value"]]
            ax.plot(x, y, marker="o", ms=2.5, lw=1.8, color=colours[s["plan"]])
            if any(iv for iv in s["interval"]):
                lo = [math.nan if iv is None else iv[0] for iv in s["interval"]]
                hi = [math.nan if iv is None else iv[1] for iv in s["interval"]]
                ax.fill_between(x, lo, hi, color=colours[s["plan"]], alpha=0.18, lw=0)
        p = prospect.get(m)
        if p is not None:
            ax.axhline(p["value"], color=PROSPECT, ls="--", lw=1.3)
            if p["interval"]:
                ax.axhspan(p["interval"][0], p["interval"][1], color=PROSPECT, alpha=0.10, lw=0)
        title = str(m) if m is not None else "all"
        if missing:
            title += "\n(" + "; ".join(missing) + ")"
        ax.set_title(title)
        if axis_name is None:
            for i, s in enumerate(bars):
                iv = s["interval"][0]
                err = [[max(s["value"][0] - iv[0], 0.0)], [max(iv[1] - s["value"][0], 0.0)]] if iv else None
                ax.bar(i, s["value"][0], 0.6, color=colours[s["plan"]], yerr=err, capsize=3, ecolor="0.2")
            ax.set_xticks(range(len(bars)), [s["plan"] for s in bars])
            ax.set_xlim(-0.7, max(len(bars), 1) - 0.3)
            ax.grid(axis="x", visible=False)
            ax.set_xlabel("plan")
        else:
            ax.set_xticks(x, _capped(levels, True))
            if len(x) > 16:
                for lab in ax.get_xticklabels()[1::2]:
                    lab.set_visible(False)
            ax.set_xlabel(f"{axis_name} ({data['model']['period']}s)")
        if k % ncol == 0:
            ax.set_ylabel(f"value V ({unit})")
        ax.yaxis.set_major_formatter(thousands())
    # once every panel is drawn: the shared scale then holds every market's lines and bands
    axes[0][0].set_ylim(bottom=0)
    for k in range(len(markets), nrow * ncol):
        axes[k // ncol][k % ncol].set_visible(False)
    shown = [p for p in plans if any(s["plan"] == p and s["sold"] for s in series)]
    handles = [Line2D([], [], color=colours[p], marker="o", ms=3, lw=1.8, label=p) if axis_name
               else Patch(color=colours[p], label=p) for p in shown]
    if sec["prospect"]:
        handles.append(Line2D([], [], color=PROSPECT, ls="--", lw=1.3, label="prospect (non-member)"))
    if data["model"]["draws"]:
        handles.append(Patch(color="0.5", alpha=0.25, label=f"{data['level']:.0%} interval"))
    sub.legend(handles=handles, loc="outside lower center", ncol=len(handles), frameon=False)
    by = f" by {axis_name}," if axis_name else ""
    sub.suptitle(f"Value of a member{by} per plan and market ({data['stream']}, {unit})")
    return _finish(fig, data, f"Value{by.rstrip(',')} per plan and market")


def _not_sold_marks(ax, xs: list[float], texts: list[str], top: float) -> None:
    for x, t in zip(xs, texts):
        ax.text(x, top * 0.02, t, rotation=90, ha="center", va="bottom", fontsize=8.5, style="italic", color="0.35")


def chart_acquisition(data: Mapping[str, Any]) -> bytes | None:
    """Per market and plan: the honest acquisition value (with its interval) beside the member-value
    shortcut and one period of cash; a plan not sold there is named in its slot."""
    rows = data["acquisition"]["rows"]
    if not any(r["sold"] for r in rows):
        return None
    labels = [f"{r['market']}\n{r['plan']}" if r["market"] is not None else r["plan"] for r in rows]
    x = list(range(len(rows)))
    wdt = 0.27
    fig, sub = _figure(max(MIN_WIDTH + 0.5, 1.0 * len(rows) + 2.5), 4.6)
    ax = sub.subplots()
    sold = [r for r in rows if r["sold"]]
    xs = [i for i, r in enumerate(rows) if r["sold"]]
    honest = [r["honest"] for r in sold]
    err = None
    if all(r["interval"] for r in sold):
        err = [[max(r["honest"] - r["interval"][0], 0.0) for r in sold],
               [max(r["interval"][1] - r["honest"], 0.0) for r in sold]]
    ax.bar([i - wdt for i in xs], honest, wdt, color=HONEST, yerr=err, capsize=3, ecolor="0.2",
           label="honest: V(after) - V(prospect)" + (f" ({data['level']:.0%} interval)" if err else ""))
    ax.bar(xs, [r["member_value"] for r in sold], wdt, color=MEMBER, alpha=0.85,
           label='naive: V(after) alone')
    ax.bar([i + wdt for i in xs], [r["one_period"] for r in sold], wdt, color=ONE_PERIOD,
           label='naive: one period of cash')
    top = max(max(r["member_value"] for r in sold), max(honest),
              max((r["interval"][1] for r in sold if r["interval"]), default=0.0), 1e-9)
    _not_sold_marks(ax, [i for i, r in enumerate(rows) if not r["sold"]],
                    [r["short"] for r in rows if not r["sold"]], top)
    ax.set_xticks(x, labels)
    ax.set_xlim(-0.6, len(rows) - 0.4)
    blocked = data["acquisition"].get("not_joinable") or []
    ax.set_xlabel("market and plan joined" + (f" ({', '.join(blocked)}: not joined directly under the move rules)"
                                              if blocked else ""))
    ax.set_ylabel(f"value of one acquisition ({data['unit']})")
    ax.yaxis.set_major_formatter(thousands())
    ax.set_ylim(0, top * 1.05)
    ax.grid(axis="x", visible=False)
    ax.set_title(f"Value of an acquisition by market and plan, beside the naive figures ({data['stream']})")
    sub.legend(loc="outside lower center", ncol=3, frameon=False)
    return _finish(fig, data, "Value of an acquisition")


def chart_upgrade(data: Mapping[str, Any]) -> bytes | None:
    """Per market: the value of each allowed move to a later plan per member (with its interval);
    a move whose plans are not sold there is named in its slot."""
    rows = data["plan_upgrade"]["rows"]
    if not any(r["sold"] for r in rows):
        return None
    moves = list(dict.fromkeys(f"{r['from']} \u2192 {r['to']}" for r in rows))
    markets = list(dict.fromkeys(r["market"] for r in rows))
    fig, sub = _figure(max(MIN_WIDTH, 1.5 * len(markets) + 2.5), 4.2)
    ax = sub.subplots()
    wdt = min(0.8 / max(1, len(moves)), 0.45)
    top = max(abs(r["value"]) for r in rows if r["sold"]) or 1.0
    for j, mv in enumerate(moves):
        xs, ys, lo, hi, gaps, gap_text = [], [], [], [], [], []
        for i, m in enumerate(markets):
            r = next((r for r in rows if r["market"] == m and f"{r['from']} \u2192 {r['to']}" == mv), None)
            if r is None:
                continue
            xpos = i + (j - (len(moves) - 1) / 2) * wdt
            if not r["sold"]:
                gaps.append(xpos)
                gap_text.append(r["short"])
                continue
            xs.append(xpos)
            ys.append(r["value"])
            lo.append(max(r["value"] - r["interval"][0], 0.0) if r["interval"] else 0.0)
            hi.append(max(r["interval"][1] - r["value"], 0.0) if r["interval"] else 0.0)
        ax.bar(xs, ys, wdt, label=mv, color=f"C{j}", yerr=[lo, hi] if any(lo) or any(hi) else None, capsize=3,
               ecolor="0.2")
        _not_sold_marks(ax, gaps, gap_text, top)
    ax.axhline(0, color="0.2", lw=0.8)
    ax.set_xticks(range(len(markets)), ["all" if m is None else str(m) for m in markets])
    ax.set_xlim(-0.6, len(markets) - 0.4)
    ax.grid(axis="x", visible=False)
    ax.set_ylabel(f"value per member ({data['unit']})")
    ax.yaxis.set_major_formatter(thousands())
    ax.set_title(f"Value of a plan upgrade per member, members in their long-run mix ({data['stream']})")
    sub.legend(title="plan move" + (f" (whiskers: {data['level']:.0%} interval)" if data["model"]["draws"] else ""),
               loc="outside lower center", ncol=min(len(moves), 4), frameon=False)
    return _finish(fig, data, "Value of a plan upgrade")


def chart_marginal(data: Mapping[str, Any]) -> bytes | None:
    """The ranked marginal values as horizontal bars, labelled ``rank. short label`` (the full
    formula of each rank is in the table under the chart), with the value at each bar's end."""
    sec = data["marginal"]
    entries = sec["entries"]
    if not entries:
        return None
    labels = [f"{e['rank']}. {e['short']}" for e in entries][::-1]
    vals = [e["per_point"] for e in entries][::-1]
    fig, sub = _figure(max(MIN_WIDTH, 9.5), 0.36 * len(entries) + 1.6)
    ax = sub.subplots()
    y = list(range(len(vals)))
    ax.barh(y, vals, color=[POSITIVE if v >= 0 else NEGATIVE for v in vals], height=0.62)
    ax.set_yticks(y, labels, fontsize=9)
    ax.axvline(0, color="0.2", lw=0.8)
    span = max(abs(v) for v in vals) or 1.0
    lo, hi = min(min(vals), 0.0), max(max(vals), 0.0)
    ax.set_xlim(lo - 0.22 * span * (lo < 0), hi + 0.22 * span * (hi > 0) + 1e-12)
    for yy, v in zip(y, vals):
        ax.text(v + (0.012 * span if v >= 0 else -0.012 * span), yy, f"{v:+,.2f}", va="center",
                ha="left" if v >= 0 else "right", fontsize=8.5)
    ax.grid(axis="y", visible=False)
    ax.set_xlabel(f"change of the population's value per customer for +1 point ({data['unit']})")
    pooled = sec.get("pooled_over") or []
    sub.suptitle("Marginal value of transitions: +1 percentage point on one table entry"
                 + (f" (in every {', '.join(pooled)} at once)" if pooled else ""))
    return _finish(fig, data, "Marginal value of transitions")


#: name -> chart function; another section adds its charts here (their names are the PNG files)
CHARTS: dict[str, Callable[[Mapping[str, Any]], bytes | None]] = {
    "value_by_tenure": chart_value_by_tenure, "acquisition": chart_acquisition,
    "plan_upgrade": chart_upgrade, "marginal": chart_marginal}
