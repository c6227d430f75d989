"""`stateworth report`: the page's figures, its files, and that it renders in headless Chromium
with every chart loaded."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from browser import ensure_chromium, image_check

MINI = Path(__file__).resolve().parent / "data" / "mini_fitness.toml"


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """A model dir with a diagnostics.json (with an identifier-like field) and its report."""
    from stateworth.clients.cli import main
    from stateworth.rules import compile_model, load_spec, save_model

    root = tmp_path_factory.mktemp("report")
    model = compile_model(load_spec(MINI), source=str(MINI))
    diag = {"overlap": [{"cell": "market=south status=prospect", "share": 0.012, "ok": False}],
            "balance": [{"band": "1", "covariate": "age", "smd": 0.04}],
            "account_ids_seen": ["A-123-SECRET"], "prior_dominated_cells": 3}
    save_model(model, root / "model", files={"diagnostics.json": diag})
    assert main(["report", str(root / "model"), "-o", str(root / "out")]) == 0
    return root


def test_report_files_and_figures(built):
    out = built / "out"
    data = json.loads((out / "report.json").read_text())
    assert sorted(p.name for p in (out / "charts").iterdir()) == [
        "acquisition.png", "marginal.png", "plan_upgrade.png", "value_by_tenure.png"]
    for png in (out / "charts").iterdir():
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    acq = data["acquisition"]["rows"]
    # plus is not sold in south: no acquisition onto it there, nor an upgrade to it
    assert {(r["market"], r["plan"]) for r in acq} == {("north", "basic"), ("north", "plus"), ("south", "basic")}
    assert {(r["market"], r["from"], r["to"]) for r in data["plan_upgrade"]} == {("north", "basic", "plus")}
    for r in acq:
        # honest = member value - prospect value; the member-value shortcut overstates it
        assert r["member_value"] - r["prospect_value"] == pytest.approx(r["honest"], rel=1e-9)
        assert 0 < r["honest"] < r["member_value"] and r["ratio"] > 1
    series = data["value_by_tenure"]["series"]
    assert {(s["market"], s["plan"]) for s in series} == {("north", "basic"), ("north", "plus"), ("south", "basic")}
    assert all(len(s["value"]) == 4 and all(v is not None for v in s["value"]) for s in series)
    assert data["solve"]["status"] == "converged"


def test_report_page_text(built):
    import html

    page = html.unescape((built / "out" / "report.html").read_text())
    for needle in ("not accounting figures", "finance's call", "causal assumptions", "Value by tenure",
                   "naive", "plan upgrade", "Marginal value", "Fit diagnostics", "Solve statistics",
                   "overlap", "balance", "prior dominated cells"):
        assert needle.lower() in page.lower(), needle
    assert "A-123-SECRET" not in page and "account_ids" not in page
    assert "A-123-SECRET" not in (built / "out" / "report.json").read_text()
    assert 'src="data:image/png;base64,' in page and page.count("<img ") == 4


def test_report_renders_every_image_in_chromium(built):
    binary = ensure_chromium()
    imgs = image_check(built / "out" / "report.html", binary)
    assert len(imgs) == 4
    assert all(i["complete"] and i["width"] > 200 and i["height"] > 200 for i in imgs), imgs


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


def test_pool_marginal_sums_over_cycle_cells_and_ranks():
    from stateworth.clients.report import pool_marginal
    from stateworth.valuation import MarginalEntry

    e = [MarginalEntry("status", {"market": "n", "month": m, "status": "lapsed"}, "basic", p, v, 0.0)
         for m, p, v in (("jan", 0.02, 3.0), ("feb", 0.01, 2.0))]
    e.append(MarginalEntry("status", {"market": "s", "month": "jan", "status": "lapsed"}, "basic", 0.03, -6.0, 0.0))
    pooled = pool_marginal(e, ["month"])
    assert [(g["cell"]["market"], g["cells"], g["per_point"]) for g in pooled] == [("s", 1, -6.0), ("n", 2, 5.0)]
    assert pooled[1]["probability_range"] == [0.01, 0.02] and "month" not in pooled[1]["cell"]
    assert len(pool_marginal(e, [])) == 3
