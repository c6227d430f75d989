"""The backtest on a page: charts and an HTML section for a backtest result.

A backtest result is the JSON-ready dict of :func:`stateworth.estimation.backtest.backtest`
(written as ``backtest.json``). :func:`charts` draws the accounts by status and market observed
against predicted with their bands, and the retention curves; :func:`section_html` lays out
the section (used by ``stateworth backtest -o DIR``, whose ``backtest.html`` is this section
alone, and by ``stateworth report MODEL_DIR --backtest FILE``, which adds it to the report);
:func:`write_backtest` writes the directory atomically. The section is the jinja2 template
``templates/backtest.html.j2`` (autoescaped), which the report includes when its data hold a
backtest; ``templates/backtest_page.html.j2`` makes it a page of its own. The charts carry the
caution and the calibration model's version in their PNG text chunks.
"""

from __future__ import annotations

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
    from stateworth.clients.charts import _plt, thousands

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
        ax.yaxis.set_major_formatter(thousands())
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
    return _save(fig, res, "Backtest: accounts by status and market")


def _save(fig, res: Mapping[str, Any], title: str) -> bytes:
    """The PNG, with the calibration model, its version and the caution in its text chunks."""
    import io

    import matplotlib.pyplot as plt

    from stateworth.caution import CAUTION

    m = res.get("model") or {}
    meta = {"Title": title, "Source": f"stateworth backtest of {m.get('name')} calibration model version "
                                      f"{m.get('version')}", "Disclaimer": CAUTION}
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, metadata=meta)
    plt.close(fig)
    return buf.getvalue()


def chart_retention(res: Mapping[str, Any]) -> bytes | None:
    """Share of joiners still a member k periods after joining: Kaplan-Meier against the
    chain's curve and band."""
    from stateworth.clients.charts import _plt

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
    return _save(fig, res, "Backtest: retention by join cohort")


CHARTS = {"backtest_counts": chart_counts, "backtest_retention": chart_retention}


def charts(res: Mapping[str, Any]) -> dict[str, bytes | None]:
    return {name: fn(res) for name, fn in CHARTS.items()}


# ---------------------------------------------------------------------------------------------
# page


def section_html(res: Mapping[str, Any], pngs: Mapping[str, bytes | None]) -> str:
    """The backtest's HTML section (a ``<section>`` with its own heading)."""
    from stateworth.clients.report import render_template

    return render_template("backtest.html.j2", {"backtest": res}, pngs)


def page_html(res: Mapping[str, Any], pngs: Mapping[str, bytes | None]) -> str:
    """The backtest section as a self-contained page."""
    from stateworth.clients.report import render_template

    return render_template("backtest_page.html.j2", {"backtest": res}, pngs)


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
