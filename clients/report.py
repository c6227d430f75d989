"""The analyst's report: one self-contained HTML page with charts and tables for one model.

The figures are the valuation layer's: :func:`stateworth.valuation.summary.report_summary` asks
the page's questions of the model's solved results and returns JSON-ready data (written as
``report.json``). This module only lays that out: :func:`collect` adds the model directory's fit
diagnostics (identifier-like fields left out) and the page's assumptions and cautions;
:mod:`stateworth.clients.charts` draws the charts; :func:`render_html` fills the jinja2 template
``templates/report.html.j2`` (autoescaped: every value from the data is escaped) with every chart
embedded as a PNG data URI, so the page is one file that can be mailed or archived; the PNGs are
also written to ``charts/`` beside it. :func:`build_report` does it all and writes the directory
atomically.

A result computed outside the valuation layer plugs in as an extra section (the backtest:
observed against predicted, ``build_report(..., backtest=FILE)``): its result under its key in
:data:`stateworth.valuation.summary.EXTRA_SECTIONS` (``extra``), the module drawing its charts in
:data:`EXTRA_CHARTS`, and its template ``templates/<key>.html.j2``, which the page includes when
the data hold that key.

No account identifiers appear anywhere: a model holds tables, not accounts, and fields of
``diagnostics.json`` whose names look like identifiers are left out.
"""

from __future__ import annotations

import base64
import json
import math
from pathlib import Path
from typing import Any, Mapping, Sequence

from stateworth.caution import CAUTION_LINE
from stateworth.errors import ArtifactError
from stateworth.files import atomic_dir

ASSUMPTIONS = [
    "Moves between states are unconfounded given the state: two customers in the same cell (plan, "
    "engagement band, tenure, market, and any propensity band) are assumed to move with the same "
    "probabilities whatever else differs between them. Where the overlap and balance diagnostics "
    "flag cells, that reading is weak.",
    "The chain is time-homogeneous apart from its declared cycles: the fitted period-to-period "
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
#: rows of a list in diagnostics.json shown on the page (the rest stay in the file)
MAX_ROWS = 60
#: extra section -> the module that draws its charts (``charts(result) -> {name: PNG or None}``)
EXTRA_CHARTS = {"backtest": "stateworth.clients.backtest_page"}


def clean(doc: Any) -> Any:
    """diagnostics.json without identifier-like fields."""
    if isinstance(doc, Mapping):
        return {str(k): clean(v) for k, v in doc.items()
                if not any(w in str(k).lower() for w in _ID_WORDS)}
    if isinstance(doc, list):
        return [clean(v) for v in doc]
    return doc


def collect(valuer, stream: str | None = None, diagnostics: Mapping[str, Any] | None = None,
            top: int = 12, level: float = 0.9, progress: bool = False,
            extra: Mapping[str, Any] | None = None, sensitivity: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """Everything the page shows, as a JSON-ready dict: the valuation layer's summary
    (:func:`~stateworth.valuation.summary.report_summary`) plus the fit diagnostics (cleaned),
    the assumptions and the cautions."""
    from tqdm import tqdm

    from stateworth.valuation.summary import SECTIONS, report_summary

    bar = tqdm(total=len(SECTIONS), desc="report", unit="part", disable=not progress, leave=False)
    try:
        data = report_summary(valuer.solved, stream, top=top, level=level, extra=extra,
                              on_step=lambda _name: bar.update(1), sensitivity=sensitivity)
    finally:
        bar.close()
    joins = (diagnostics or {}).get("joins") if isinstance(diagnostics, Mapping) else None
    data["acquisition"]["band_assumption"] = (joins or {}).get("band_assumption") if isinstance(joins, Mapping) \
        else None
    data["diagnostics"] = clean(diagnostics) if diagnostics is not None else None
    data["diagnostics_summary"] = fit_summary(diagnostics)
    data["assumptions"] = ASSUMPTIONS
    data["cautions"] = CAUTIONS
    return data


# ---------------------------------------------------------------------------------------------
# what the template shows of diagnostics.json


def _cell_text(cell: Any) -> str:
    if isinstance(cell, Mapping):
        return ", ".join(f"{k}={v}" for k, v in cell.items())
    return str(cell)


def _scalar(v: Any) -> Any:
    return json.dumps(v) if isinstance(v, (Mapping, list)) else v


def fit_summary(diag: Any) -> str | None:
    """The fit's readable summary (``stateworth.estimation.diagnostics.summary_text``: counts, never
    an identifier) of a diagnostics.json as ``stateworth fit`` writes it; None for another layout."""
    if not isinstance(diag, Mapping) or not all(k in diag for k in ("panel", "overlap", "prior", "joins")):
        return None
    try:
        from stateworth.estimation.diagnostics import summary_text

        return summary_text(dict(diag))
    except Exception:  # noqa: BLE001 - the summary is a convenience; the tables carry the content
        return None


def fit_diagnostics_view(diag: Mapping[str, Any]) -> dict[str, Any] | None:
    """The sections of a ``stateworth fit`` diagnostics.json as rows for the template; None when the
    file has another layout. Overlap cells are listed by their share of the observed moves, largest
    first."""
    if not all(k in diag for k in ("panel", "overlap", "prior", "joins")):
        return None
    o = diag["overlap"]
    listed = sorted(o.get("listed") or [], key=lambda x: -float(x.get("share", 0.0)))
    overlap = {"factor": o.get("factor", "status"), "cells_failing": int(o.get("cells_failing", 0)),
               "share_failing": float(o.get("share_failing", 0.0)),
               "cells_without_moves": int(o.get("cells_without_moves", 0)),
               "rows": [[_cell_text(x.get("cell")), x.get("missing"), x.get("moves"), float(x.get("share", 0.0))]
                        for x in listed]}
    prop = diag.get("propensity")
    balance = None
    if prop:
        terms = list(prop.get("terms", prop["covariates"]))
        balance = {"axis": prop["axis"], "terms": terms, "rule": prop.get("smd_rule", 0.1),
                   "unbalanced": list(prop.get("unbalanced") or []),
                   "rows": [[b, list(row)] for b, row in zip(prop["bands"], prop["smd_by_band"])]}
    prior = [[p["factor"], float(p["strength"]), p["cells"], p["cells_with_moves"], p.get("prior_dominated"),
              float(p.get("share_prior_dominated", 0.0))] for p in diag["prior"]]
    j = diag["joins"]
    joins = None
    if j.get("hazard"):
        raw = j.get("hazard_raw") or {}
        joins = {"raw": bool(raw), "note": j.get("band_assumption"),
                 "rows": [[m, raw.get(m), h, j["hazard_high_size"][m], j["hazard_low_size"][m],
                           (j.get("first_joins") or {}).get(m)] for m, h in j["hazard"].items()]}
    return {"overlap": overlap, "balance": balance, "prior": prior, "joins": joins,
            "warnings": list(diag.get("warnings") or [])}


def generic_diagnostics_view(diag: Any) -> list[dict[str, Any]]:
    """Any other diagnostics.json as blocks: lists of records as tables, flat mappings as item/value
    tables, deeper structures as JSON text, scalars as one line."""
    if not isinstance(diag, Mapping):
        return [{"kind": "pre", "title": "diagnostics", "text": json.dumps(diag, indent=2)[:6000]}]
    blocks: list[dict[str, Any]] = []
    for key, val in diag.items():
        title = str(key).replace("_", " ")
        if isinstance(val, list) and val and all(isinstance(v, Mapping) for v in val):
            cols = list(dict.fromkeys(k for v in val for k in v))
            rows = [[_scalar(v.get(c)) for c in cols] for v in val[:MAX_ROWS]]
            blocks.append({"kind": "table", "title": title, "headers": cols, "rows": rows,
                           "more": max(len(val) - MAX_ROWS, 0)})
        elif isinstance(val, Mapping) and val and all(not isinstance(v, (Mapping, list)) for v in val.values()):
            blocks.append({"kind": "table", "title": title, "headers": ["item", "value"],
                           "rows": [[k, _scalar(v)] for k, v in val.items()], "more": 0})
        elif isinstance(val, (Mapping, list)):
            blocks.append({"kind": "pre", "title": title, "text": json.dumps(val, indent=2)[:6000]})
        else:
            blocks.append({"kind": "scalar", "title": title, "value": _scalar(val)})
    return blocks


# ---------------------------------------------------------------------------------------------
# the page


def _num(x: Any, digits: int = 2) -> str:
    if x is None or isinstance(x, bool):
        return "-" if x is None else str(x)
    if isinstance(x, float):
        return f"{x:,.{digits}f}" if math.isfinite(x) else "-"
    if isinstance(x, int):
        return f"{x:,}"
    return str(x)


def _sci(x: Any, digits: int = 2) -> str:
    """Scientific notation for residuals and tolerances: ``4.09e-12``."""
    if x is None:
        return "-"
    try:
        v = float(x)
    except (TypeError, ValueError):
        return str(x)
    return f"{v:.{digits}e}" if math.isfinite(v) else "-"


def _pct(x: Any, digits: int = 1) -> str:
    return "-" if x is None else f"{100 * float(x):.{digits}f} %"


def _iv(iv: Sequence[float] | None, digits: int = 2) -> str:
    return "-" if not iv else f"[{iv[0]:,.{digits}f}, {iv[1]:,.{digits}f}]"


def _prob(entry: Mapping[str, Any]) -> str:
    lo, hi = entry.get("probability_range") or (entry["probability"], entry["probability"])
    return f"{lo:.4f}" if abs(hi - lo) < 5e-5 else f"{lo:.4f} to {hi:.4f}"


def _amount(x: Any, unit: str) -> str:
    """A figure in its unit: whole accounts, else two decimals."""
    return _num(float(x), 0 if unit == "accounts" else 2)


def _mix(landing: Sequence[Mapping[str, Any]] | None) -> str:
    """A landing mix as ``engagement: light 60%, none 40%`` (one axis named once), or
    ``engagement=light band=2 30%, ...`` over several axes."""
    if not landing:
        return "-"
    axes = list(dict.fromkeys(k for item in landing for k in item["levels"] if k != "other"))
    parts = []
    for item in landing:
        lv = item["levels"]
        if "other" in lv:
            text = "other"
        elif len(axes) == 1:
            text = str(lv[axes[0]])
        else:
            text = " ".join(f"{k}={v}" for k, v in lv.items())
        parts.append(f"{text} {100 * item['share']:.0f}%")
    return (f"{axes[0]}: " if len(axes) == 1 else "") + ", ".join(parts)


def _environment():
    from stateworth.extras import need

    jinja2 = need("jinja2", "report", "the report page")

    env = jinja2.Environment(loader=jinja2.PackageLoader("stateworth.clients", "templates"), autoescape=True,
                             undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                             keep_trailing_newline=True)
    env.filters.update({"num": _num, "sci": _sci, "pct": _pct, "iv": _iv, "prob": _prob, "mix": _mix,
                        "cell": _cell_text, "amount": _amount})
    return env


def render_template(name: str, data: Mapping[str, Any], charts: Mapping[str, bytes | None], **more: Any) -> str:
    """Fill ``templates/<name>`` with ``data`` and the charts as data URIs (autoescaped)."""
    return _environment().get_template(name).render(data=data, charts={k: data_uri(v) for k, v in charts.items()},
                                                    **more)


def data_uri(png: bytes | None) -> str | None:
    return None if png is None else "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def render_html(data: Mapping[str, Any], charts: Mapping[str, bytes | None]) -> str:
    """The page. ``charts``: name -> PNG bytes (or None where there is nothing to draw)."""
    diag = data.get("diagnostics")
    fit_view = fit_diagnostics_view(diag) if isinstance(diag, Mapping) else None
    generic = None if diag is None or fit_view is not None else generic_diagnostics_view(diag)
    return render_template("report.html.j2", data, charts, fit=fit_view, generic=generic,
                           extra_sections=[k for k in _extra_keys() if data.get(k)])


def _extra_keys() -> tuple[str, ...]:
    from stateworth.valuation.summary import EXTRA_SECTIONS

    return EXTRA_SECTIONS


def draw_charts(data: Mapping[str, Any]) -> dict[str, bytes | None]:
    """Every chart of :data:`stateworth.clients.charts.CHARTS` for the data, and those of each
    extra section the data hold (:data:`EXTRA_CHARTS`)."""
    import importlib

    from stateworth.clients.charts import CHARTS

    out = {name: fn(data) for name, fn in CHARTS.items()}
    for key, module in EXTRA_CHARTS.items():
        if data.get(key) is not None:
            out.update(importlib.import_module(module).charts(data[key]))
    return out


def size_range(valuer, model_dir: Path) -> dict[str, Any] | None:
    """The model solved (point values) at the low and high market sizes, from the status tables
    ``stateworth fit`` stores as ``sensitivity.size_low/high.table.<status axis>``; None when the
    model holds none."""
    from stateworth.rules import load_model
    from stateworth.valuation.solved import solve_model

    if not Path(model_dir).is_dir():
        return None
    model = valuer.model
    _, extra = load_model(model_dir)
    st = model.spec.status_axis
    keys = {k: f"sensitivity.size_{k}.table.{st}" for k in ("low", "high")}
    if not all(v in extra for v in keys.values()):
        return None
    out = {}
    for k, v in keys.items():
        s = solve_model(model.with_tables({st: extra[v]}), draws=False, longrun=False, reach=False,
                        streams=valuer.streams)
        s.reachable = valuer.solved.reachable  # the same rules: the same reachable states
        out[k] = s
    return out


def build_report(model_dir: str | Path, out_dir: str | Path, *, stream: str | None = None,
                 valuer=None, top: int = 12, level: float = 0.9, progress: bool = False,
                 backtest: str | Path | None = None, extra: Mapping[str, Any] | None = None) -> Path:
    """Solve (unless ``valuer`` is given), collect, draw and write ``out_dir`` atomically:
    ``report.html`` (self-contained), ``charts/*.png``, ``report.json``. Returns the page's path.
    ``backtest``: a ``backtest.json`` from ``stateworth backtest -o DIR``, shown as a section of its
    own (observed against predicted with bands, retention by join cohort); ``extra``: results of
    the extra sections by key, as they are.

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
    if model_dir.is_dir():
        from stateworth.rules.artifact import model_files
        model_dir = model_files(model_dir)  # one version's files, even if a new one is published meanwhile
    if backtest is not None:
        from stateworth.clients.backtest_page import load_result
        # read before the solve: a wrong file fails fast
        extra = {**(extra or {}), "backtest": load_result(backtest)}
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
    data = collect(valuer, stream=stream, diagnostics=diagnostics, top=top, level=level, progress=progress,
                   sensitivity=size_range(valuer, model_dir),
                   extra=extra)
    charts = draw_charts(data)
    page = render_html(data, charts)

    with atomic_dir(out_dir) as tmp:
        (tmp / "charts").mkdir()
        for name, png in charts.items():
            if png is not None:
                (tmp / "charts" / f"{name}.png").write_bytes(png)
        (tmp / "report.json").write_text(json.dumps(data, indent=2, default=float))
        (tmp / "report.html").write_text(page, encoding="utf-8")
    return out_dir / "report.html"
