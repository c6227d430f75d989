"""`stateworth report`: the page's figures, its files, its charts (200 dpi, stamped with the model
version, stream, unit and the caution), notes where a plan is not sold, no identifier anywhere,
everything escaped, and that it renders in headless Chromium with every chart loaded."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

from browser import ensure_chromium, image_check, render
from stateworth.caution import CAUTION, CAUTION_SHORT

MINI = Path(__file__).resolve().parent / "data" / "mini_fitness.toml"
CHARTS = ["acquisition.png", "marginal.png", "plan_upgrade.png", "value_by_tenure.png"]
SECRET = "A-123-SECRET"


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """A model dir with a diagnostics.json (with an identifier-like field, and markup that must be
    escaped) and its report."""
    from stateworth.clients.cli import main
    from stateworth.rules import compile_model, load_spec, save_model

    root = tmp_path_factory.mktemp("report")
    model = compile_model(load_spec(MINI), source=str(MINI))
    diag = {"overlap": [{"cell": "market=south status=prospect", "share": 0.012, "ok": False}],
            "balance": [{"band": "1", "covariate": "age", "smd": 0.04}],
            "account_ids_seen": [SECRET], "prior_dominated_cells": 3,
            "note": "<script>alert('x')</script> & <b>bold</b>"}
    save_model(model, root / "model", files={"diagnostics.json": diag})
    assert main(["report", str(root / "model"), "-o", str(root / "out")]) == 0
    return root


def test_report_files_and_figures(built):
    out = built / "out"
    data = json.loads((out / "report.json").read_text())
    assert sorted(p.name for p in (out / "charts").iterdir()) == CHARTS
    for png in (out / "charts").iterdir():
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    rows = data["acquisition"]["rows"]
    # plus is not sold in south: a note in its place, no figure, and no upgrade to it there
    assert {(r["market"], r["plan"]) for r in rows if r["sold"]} == {("north", "basic"), ("north", "plus"),
                                                                    ("south", "basic")}
    gap = [r for r in rows if not r["sold"]]
    assert [(r["market"], r["plan"]) for r in gap] == [("south", "plus")]
    assert "not sold in market=south" in gap[0]["note"] and "honest" not in gap[0]
    upg = data["plan_upgrade"]["rows"]
    assert [(r["market"], r["from"], r["to"], r["sold"]) for r in upg] == [("north", "basic", "plus", True),
                                                                          ("south", "basic", "plus", False)]
    for r in rows:
        if not r["sold"]:
            continue
        # honest = member value - prospect value; the member-value shortcut overstates it
        assert r["member_value"] - r["prospect_value"] == pytest.approx(r["honest"], rel=1e-9)
        assert 0 < r["honest"] < r["member_value"] and r["ratio"] > 1
        # the landing mix is a distribution over the engagement levels
        assert sum(x["share"] for x in r["landing"]) == pytest.approx(1.0)
    series = data["value_by_tenure"]["series"]
    assert {(s["market"], s["plan"], s["sold"]) for s in series} == {
        ("north", "basic", True), ("north", "plus", True), ("south", "basic", True), ("south", "plus", False)}
    assert all(len(s["value"]) == 4 and all(v is not None for v in s["value"]) for s in series if s["sold"])
    assert data["solve"]["point"]["status"] == "converged"
    assert data["model"]["reachable_states"] < data["model"]["states"]
    assert data["backtest"] is None  # the slot another section fills


def test_report_page_text(built):
    import html

    raw = (built / "out" / "report.html").read_text()
    page = html.unescape(raw)
    for needle in ("not accounting figures", "finance's call", "causal assumptions", "Value by tenure",
                   "naive", "plan upgrade", "Marginal value", "Fit diagnostics", "Solve statistics",
                   "overlap", "balance", "prior dominated cells", "The long run",
                   "plan 'plus' is not sold in market=south"):
        assert needle.lower() in page.lower(), needle
    assert SECRET not in page and "account_ids" not in page
    assert SECRET not in (built / "out" / "report.json").read_text()
    assert 'src="data:image/png;base64,' in raw and raw.count("<img ") == 4
    # every value from the data is escaped: the markup in diagnostics.json arrives as text
    assert "<script>alert" not in raw and "&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt;" in raw
    assert "<b>bold</b>" not in raw
    # residuals in scientific notation
    assert re.search(r"residual \(max-norm, relative\)</td><td class=\"n\">\d\.\d\de-\d\d", raw)


def test_report_renders_every_image_in_chromium(built):
    binary = ensure_chromium()
    shown = render(built / "out" / "report.html", binary)
    imgs = shown["images"]
    assert sorted(i["id"] for i in imgs) == sorted(f"chart-{c[:-4]}" for c in CHARTS)
    # 200 dpi: the narrowest chart is at least 7 inches wide
    assert all(i["complete"] and i["width"] >= 1400 and i["height"] > 400 for i in imgs), imgs
    text = shown["text"]
    data = json.loads((built / "out" / "report.json").read_text())
    # what a reader sees: the version, the caution, the not-sold note in the tables, no identifier
    assert data["model"]["version"] in text and "not accounting figures" in text
    assert text.count("plan 'plus' is not sold in market=south") == 3  # by tenure, acquisition, upgrade
    assert SECRET not in text


def test_charts_carry_version_stream_unit_and_caution(built):
    """Read back with Pillow (a general-purpose image library): each PNG says at 200 dpi which
    model version, stream and unit it shows, and carries the caution."""
    from PIL import Image

    data = json.loads((built / "out" / "report.json").read_text())
    version = data["model"]["version"]
    for name in CHARTS:
        with Image.open(built / "out" / "charts" / name) as im:
            assert im.info["dpi"] == pytest.approx((200, 200), abs=0.5), name
            meta = im.text
        assert meta["Disclaimer"] == CAUTION, name
        assert version in meta["Source"] and f"stream revenue ({data['unit']})" in meta["Description"], name
        assert "no intervals" in meta["Description"], name  # the mini model has no posterior draws
        assert meta["Title"], name


def test_chart_stamp_lines_are_what_the_images_print():
    """The text printed under each chart: model, version, stream, unit, the intervals' basis, the caution."""
    from stateworth.clients.charts import stamp_lines

    data = {"model": {"name": "m", "version": "abc123", "draws": 5}, "stream": "margin", "unit": "EUR",
            "level": 0.9, "interval_note": "unreliable: 5 posterior draws, fewer than the 20 a 90% interval "
                                           "needs; fit with --draws 20 or more"}
    lines = stamp_lines(data)
    assert lines[0] == "m \u00b7 model version abc123 \u00b7 stream margin (EUR)"
    assert lines[1] == "90% intervals, unreliable: 5 posterior draws, fewer than the 20 a 90% interval needs"
    assert lines[2] == CAUTION_SHORT


def test_few_draws_show_the_interval_note(tmp_path):
    from PIL import Image

    from stateworth.clients.report import build_report
    from stateworth.valuation import Valuer
    from test_valuation import tiny_model

    valuer = Valuer.build(tiny_model(draws=5))
    page = build_report(tmp_path / "no-model-dir", tmp_path / "r", valuer=valuer)
    text = page.read_text()
    assert "no intervals: 5 posterior draws" in text
    assert "fit with --draws 20 or more" in text
    with Image.open(tmp_path / "r" / "charts" / "value_by_tenure.png") as im:
        assert "no intervals: 5 posterior draws" in im.text["Description"]
    data = json.loads((tmp_path / "r" / "report.json").read_text())
    # 5 draws cannot make a 90 % interval: the figures are shown without one
    for s in data["value_by_tenure"]["series"]:
        if s["sold"]:
            assert all(iv is None for iv in s["interval"])


def test_marginal_chart_labels_short_and_table_gives_the_formula(built):
    import html

    data = json.loads((built / "out" / "report.json").read_text())
    page = html.unescape((built / "out" / "report.html").read_text())
    entries = data["marginal"]["entries"]
    assert entries and all(len(e["short"]) < len(e["label"]) for e in entries)
    for e in entries:
        assert e["label"] in page and e["short"] in page


def test_fit_diagnostics_overlap_ordered_by_share(tmp_path):
    """A fit's diagnostics.json: overlap cells listed by their share of moves, largest first."""
    from stateworth.clients.report import render_html

    diag = {"panel": {"rows": 10, "accounts": 3, "first_period": "2024-01", "last_period": "2024-02", "moves": 7},
            "overlap": {"factor": "status", "cells_failing": 3, "share_failing": 0.6, "cells_without_moves": 1,
                        "listed": [{"cell": {"market": "a"}, "moves": 1, "share": 0.1, "missing": "member"},
                                   {"cell": {"market": "b"}, "moves": 4, "share": 0.4, "missing": "member"},
                                   {"cell": {"market": "c"}, "moves": 2, "share": 0.2, "missing": "non-member"}]},
            "prior": [{"factor": "status", "strength": 2.0, "cells": 4, "cells_with_moves": 3, "prior_dominated": 1,
                       "share_prior_dominated": 0.1}],
            "joins": {"hazard": {"a": 0.01}, "hazard_high_size": {"a": 0.008}, "hazard_low_size": {"a": 0.012},
                      "first_joins": {"a": 5}}}
    data = _minimal_data(diag)
    page = render_html(data, {})
    table = page[page.index('id="table-overlap"'):]
    table = table[:table.index("</table>")]
    assert [m.group(1) for m in re.finditer(r"<td>market=(\w)</td>", table)] == ["b", "c", "a"]
    assert "Never-member join rates" in page and "0.01200" in page


def _minimal_data(diag):
    """The report data of the mini model with ``diag`` as its diagnostics."""
    from stateworth.clients.report import collect
    from stateworth.rules import compile_model, load_spec
    from stateworth.valuation import Valuer

    valuer = Valuer.build(compile_model(load_spec(MINI), source=str(MINI)))
    return collect(valuer, diagnostics=diag, top=3)


def test_image_check_sees_a_broken_image(tmp_path):
    """The rendering check can fail: a page with a missing image reports width 0."""
    binary = ensure_chromium()
    page = tmp_path / "broken.html"
    page.write_text('<!DOCTYPE html><html><body><img id="gone" src="charts/missing.png"></body></html>')
    imgs = image_check(page, binary)
    assert imgs == [{"id": "gone", "complete": True, "width": 0, "height": 0}]


def test_report_without_diagnostics_says_so(tmp_path, capsys):
    from stateworth.clients.cli import main

    assert main(["report", str(MINI), "-o", str(tmp_path / "r")]) == 0
    page = (tmp_path / "r" / "report.html").read_text()
    assert "No fit diagnostics" in page


def test_report_refuses_unrelated_folder_and_replaces_old_report(built, tmp_path, capsys):
    from stateworth.clients.cli import main

    busy = tmp_path / "busy"
    busy.mkdir()
    (busy / "notes.txt").write_text("mine")
    assert main(["report", str(built / "model"), "-o", str(busy)]) == 1
    assert "no earlier report" in capsys.readouterr().err
    assert (busy / "notes.txt").read_text() == "mine"
    # an earlier report is replaced whole (atomically: no leftovers of the old one)
    old = built / "out"
    (old / "stale.txt").write_text("old")
    assert main(["report", str(built / "model"), "-o", str(old), "--stream", "margin"]) == 0
    assert not (old / "stale.txt").exists()
    assert json.loads((old / "report.json").read_text())["stream"] == "margin"
    assert not [p for p in old.parent.iterdir() if p.name.startswith(".out.")]
    assert main(["report", str(built / "model"), "-o", str(tmp_path / "x"), "--stream", "profit"]) == 1
    assert "unknown reward stream 'profit'" in capsys.readouterr().err
    assert main(["report", str(built / "model"), "-o", str(tmp_path / "y"), "--level", "1.5"]) == 1
    assert "interval level must lie strictly between 0 and 1" in capsys.readouterr().err
    assert not (tmp_path / "x").exists() and not (tmp_path / "y").exists()


def test_client_import_stays_light():
    """The gRPC client imports neither JAX, nor matplotlib, nor jinja2, nor DuckDB."""
    code = ("import sys, stateworth.clients.client; "
            "print([m for m in ('jax', 'matplotlib', 'jinja2', 'duckdb') if m in sys.modules])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
