"""The backtest on a page: charts and an HTML section for a backtest result.

A backtest result is the JSON-ready dict of :func:`stateworth.estimation.backtest.backtest`
(written as ``backtest.json``). :func:`charts` draws the accounts by status and market observed
against predicted with their bands, and the retention curves; :func:`section_html` lays out
the section (used by ``stateworth backtest -o DIR``, whose ``backtest.html`` is this section
alone, and by ``stateworth report MODEL_DIR --backtest FILE``, which adds it to the report);
:func:`write_backtest` writes the directory atomically. Layout helpers come from
:mod:`stateworth.clients.report`.
"""

from __future__ import annotations

import html
import json
import math
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from stateworth.errors import ArtifactError


def load_result(path: str | Path) -> dict:
    """Read a ``backtest.json``; ArtifactError names the file when it is not one."""
    from stateworth.estimation.backtest import FORMAT

    p = Path(path)
    if p.is_dir():
        p = p / "backtest.json"
    try:
        doc = json.loads(p.read_text())
    except FileNotFoundError:
        raise ArtifactError("no such file; give the backtest.json that `stateworth backtest -o DIR` wrote",
                            where=str(p)) from None
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise ArtifactError(f"is not valid JSON ({e}); rerun the backtest", where=str(p)) from None
    if not isinstance(doc, dict) or doc.get("format") != FORMAT:
        raise ArtifactError(f"is not a backtest result (format {FORMAT!r} expected); give the backtest.json that "
                            "`stateworth backtest -o DIR` wrote", where=str(p))
    return doc


# ---------------------------------------------------------------------------------------------
# charts


def chart_counts(res: Mapping[str, Any]) -> bytes | None:
    """Accounts by status level and market: the calibration months observed, the holdout
    observed against the prediction and its band, one small panel per figure."""
    from stateworth.clients.report import _plt, _thousands

    series = [s for s in res["figures"] if s["figure"] == "accounts"]
    if not series:
        return None
    plt = _plt()
    ncol = min(4, len(series))
    nrow = math.ceil(len(series) / ncol)
    height = 2.7 * nrow + 1.2
    fig, axes = plt.subplots(nrow, ncol, figsize=(3.6 * ncol + 0.6, height), squeeze=False)
    for k, s in enumerate(series):
        ax = axes[k // ncol][k % ncol]
        hist = s.get("history") or {"periods": [], "observed": []}
        nh = len(hist["observed"])
        xh = np.arange(nh)
        xk = np.arange(nh, nh + len(s["observed"]))
        band = np.asarray(s["band"], dtype=float)
        ax.plot(xh, hist["observed"], color="0.55", lw=1.3, label="observed (calibration)")
        ax.fill_between(xk, band[:, 0], band[:, 1], color="C0", alpha=0.25, lw=0,
                        label=f"{res['level']:.0%} band")
        ax.plot(xk, s["predicted"], color="C0", lw=2, label="predicted")
        ins = np.asarray(s["inside"], dtype=bool)
        obs = np.asarray(s["observed"], dtype=float)
        ax.plot(xk[ins], obs[ins], "o", color="C2", ms=4, label="observed, inside")
        ax.plot(xk[~ins], obs[~ins], "X", color="C3", ms=6, label="observed, outside")
        ax.axvline(nh - 0.5, color="0.3", ls=":", lw=1)
        ax.set_title(s["label"], fontsize=11)
        ax.yaxis.set_major_formatter(_thousands())
        labels = list(hist["periods"]) + list(s["periods"])
        ticks = np.arange(0, len(labels), max(1, len(labels) // 4))
        ax.set_xticks(ticks, [labels[i] for i in ticks], fontsize=8)
    for k in range(len(series), nrow * ncol):
        axes[k // ncol][k % ncol].set_visible(False)
    handles, labels = [], []
    for ax in axes.flat:
        for h, lab in zip(*ax.get_legend_handles_labels()):
            if lab not in labels:
                handles.append(h)
                labels.append(lab)
    fig.legend(handles, labels, loc="lower center", ncol=len(labels), frameon=False, bbox_to_anchor=(0.5, 0.0))
    fig.suptitle(f"Accounts by status and market: holdout {res['holdout_periods'][0]}..{res['holdout_periods'][-1]} "
                 "predicted from the calibration fit (dotted line: the cut-off)", fontsize=13)
    # fixed margins: tight layouts measure every tick label twice and took ~4x as long at 15 panels
    fig.subplots_adjust(left=0.06, right=0.99, top=1 - 0.95 / height, bottom=0.75 / height, wspace=0.28, hspace=0.5)
    return _save(fig)


def _save(fig) -> bytes:
    import io

    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    plt.close(fig)
    return buf.getvalue()


def chart_retention(res: Mapping[str, Any]) -> bytes | None:
    """Share of joiners still a member k periods after joining: Kaplan-Meier against the
    chain's curve and band."""
    from stateworth.clients.report import _plt, _png

    r = res.get("retention")
    if not r:
        return None
    plt = _plt()
    fig, ax = plt.subplots(figsize=(8.5, 4.6))
    # everyone is a member at joining (duration 0)
    k = np.concatenate([[0], r["durations"]])
    band = np.vstack([[1.0, 1.0], np.asarray(r["band"], dtype=float)])
    ax.fill_between(k, 100 * band[:, 0], 100 * band[:, 1], color="C0", alpha=0.25, lw=0,
                    label=f"{res['level']:.0%} band (simulated cohorts)")
    ax.plot(k, 100 * np.concatenate([[1.0], r["predicted"]]), color="C0", lw=2,
            label="predicted by the calibration chain")
    ax.plot(k, 100 * np.concatenate([[1.0], r["observed"]]), "o-", color="C3", lw=1.4, ms=3.5,
            label="observed (Kaplan-Meier)")
    g = r["largest_gap"]
    ax.annotate(f"largest gap: {100 * g['gap']:+.1f} points", (g["duration"], 100 * g["observed"]),
                xytext=(10, -22), textcoords="offset points", fontsize=9,
                arrowprops={"arrowstyle": "->", "color": "0.3"})
    ax.set_xlabel("periods after first joining")
    ax.set_ylabel("share still a member (%)")
    ax.set_title(f"Retention of the {r['joiners']:,} accounts that joined {r['cohorts'][0]}..{r['cohorts'][1]}")
    ax.legend(frameon=False, loc="upper right")
    fig.tight_layout()
    return _png(fig)


CHARTS = {"backtest_counts": chart_counts, "backtest_retention": chart_retention}


def charts(res: Mapping[str, Any]) -> dict[str, bytes | None]:
    return {name: fn(res) for name, fn in CHARTS.items()}


# ---------------------------------------------------------------------------------------------
# page


def _num(x: float, unit: str) -> str:
    return f"{x:,.2f}" if unit not in ("accounts",) else f"{x:,.0f}"


def section_html(res: Mapping[str, Any], pngs: Mapping[str, bytes | None]) -> str:
    """The backtest's HTML section (a ``<section>`` with its own heading)."""
    from stateworth.clients.report import _img, _table

    e = html.escape
    L = res["level"]
    sm, v = res["summary"], res["verdict"]
    sc = sm["simulated_coverage"]
    rows = [[s["label"], f"{len(s['inside']) - s['outside']} of {len(s['inside'])}",
             "-" if s["mape"] is None else f"{100 * s['mape']:.1f} %",
             "-" if not sum(s["predicted"]) else f"{sum(s['observed']) / sum(s['predicted']):.3f}", s["unit"]]
            for s in res["figures"]]
    detail = []
    for s in res["figures"]:
        for per, o, p, b, ins in zip(s["periods"], s["observed"], s["predicted"], s["band"], s["inside"]):
            detail.append([s["label"], per, _num(o, s["unit"]), _num(p, s["unit"]),
                           f"[{_num(b[0], s['unit'])}, {_num(b[1], s['unit'])}]", "yes" if ins else "NO"])
    r = res.get("retention")
    if r:
        g = r["largest_gap"]
        ret = (f"<p>{r['joiners']:,} accounts first joined in {e(r['cohorts'][0])}..{e(r['cohorts'][1])} (the "
               f"calibration months after the first). Largest gap {g['duration']} period(s) after joining: observed "
               f"{100 * g['observed']:.1f} %, predicted {100 * g['predicted']:.1f} % (band {100 * g['band'][0]:.1f} % to "
               f"{100 * g['band'][1]:.1f} %); {sum(r['inside'])} of {len(r['inside'])} durations inside the band. "
               f"{e(r['note'])}.</p>" + _img("backtest_retention", pngs.get("backtest_retention"), "retention"))
        ret += _table(["periods after joining", "at risk", "observed", "predicted", "band"],
                      [[k, f"{n:,.0f}", f"{100 * o:.1f} %", f"{100 * p:.1f} %", f"[{100 * b[0]:.1f} %, {100 * b[1]:.1f} %]"]
                       for k, n, o, p, b in zip(r["durations"], r["at_risk"], r["observed"], r["predicted"], r["band"])],
                      [True, True, True, True, True])
    else:
        ret = "<p>No accounts joined in the calibration months after the first period: no retention check.</p>"
    failing = "".join(
        f"<li>{e(f['figure'])}: {f['outside']} of {f['of']} periods outside the band"
        + (f", observed / predicted {f['observed_over_predicted']:.2f}" if f["observed_over_predicted"] else "")
        + "</li>" for f in v["failing"])
    reasons = "".join(f"<li>{e(x)}</li>" for x in v["reasons"])
    notes = "".join(f"<li>{e(x)}</li>" for x in res["notes"])
    return f"""
<section id="backtest">
<h2>Backtest: does the chain predict a holdout it did not see?</h2>
<p class="note">spec {e(res['model']['name'])}, panel {e(res['panel']['file'])}: fitted on
{e(res['calibration'][0])}..{e(res['calibration'][1])} (calibration model version
<code>{e(res['model']['version'])}</code>), {res['holdout']} holdout periods
{e(res['holdout_periods'][0])}..{e(res['holdout_periods'][-1])} predicted from the population at the cut-off
({res['start']['tracked']:,} tracked accounts, {res['start']['never_members']:,} never-members).</p>
<div class="caution"><strong>Verdict: {e(v['verdict'])}.</strong> Rule: {e(v['rule'])}.
{f'<ul>{reasons}</ul>' if reasons else ''}{f'Figures most often outside their bands (at a {L:.0%} level about {1 - L:.0%} of figures fall outside by chance):<ul>{failing}</ul>' if failing else ''}</div>
<p>Coverage: {sm['inside']} of {sm['figures']} holdout figures inside their {L:.0%} bands ({100 * sm['coverage']:.1f} %;
binomial standard error {100 * sm['binomial_se']:.1f} points); the chain's own simulated holdouts reach a median
of {100 * sc['median']:.1f} % and a 1st percentile of {100 * sc['q01']:.1f} %. Bands: {e(res['method'])}.</p>
{_img('backtest_counts', pngs.get('backtest_counts'), 'accounts by status and market')}
{_table(['figure', f'inside {L:.0%} band', 'mean abs % error', 'observed / predicted', 'unit'], rows,
        [False, True, True, True, False])}
<h3>Retention by join cohort</h3>
{ret}
<h3>Every holdout figure</h3>
{_table(['figure', 'period', 'observed', 'predicted', f'{L:.0%} band', 'inside'], detail,
        [False, False, True, True, True, False])}
{f'<ul class="note">{notes}</ul>' if notes else ''}
<p class="note">{e(res['caution'])}</p>
</section>
"""


def page_html(res: Mapping[str, Any], pngs: Mapping[str, bytes | None]) -> str:
    """The backtest section as a self-contained page."""
    from stateworth.clients.report import _CSS

    title = f"stateworth backtest: {html.escape(res['model']['name'])}"
    return (f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>{title}</title>"
            f"<style>{_CSS}</style></head><body><h1>{title}</h1>{section_html(res, pngs)}</body></html>\n")


def write_backtest(res: Mapping[str, Any], out_dir: str | Path) -> Path:
    """Write ``out_dir`` atomically: ``backtest.json``, ``backtest.html`` (self-contained),
    ``charts/*.png``. Returns the page's path."""
    from stateworth.files import atomic_dir

    out_dir = Path(out_dir)
    pngs = charts(res)
    page = page_html(res, pngs)
    with atomic_dir(out_dir) as tmp:
        (tmp / "charts").mkdir()
        for name, png in pngs.items():
            if png is not None:
                (tmp / "charts" / f"{name}.png").write_bytes(png)
        (tmp / "backtest.json").write_text(json.dumps(res, indent=1, default=float) + "\n")
        (tmp / "backtest.html").write_text(page, encoding="utf-8")
    return out_dir / "backtest.html"
