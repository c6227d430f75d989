"""`stateworth demo` end to end on the small test spec: models, server queries, report, summary.

The full fitness-class demo is what `make demo` runs (minutes); this runs the same code path on
the 64-state spec so that it stays within the test budget."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from help_examples import DEMO_OUT, demo_inputs
from stateworth.clients.cli import main

MINI = Path(__file__).resolve().parent / "data" / "mini_fitness.toml"


def test_demo_end_to_end_with_server(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--spec", str(MINI), "-o", str(out), "--accounts", "3000"]) == 0
    printed = capsys.readouterr().out
    summary = json.loads((out / "summary.json").read_text())
    a = summary["answers"]
    # the server answered every question a pricing system, a product team and a read-out ask
    for key in ("upgrade_one", "upgrade_cohort", "acquisition", "engagement_lift", "readout"):
        assert key in a
    # the honest acquisition figure is below the member-value shortcut; an upgrade to the dearer plan pays
    assert 0 < a["acquisition"]["value"] < a["naive"]["member_value"]
    assert a["upgrade_cohort"]["value"] > 0
    # the treatment arm is the lift the product team asked about: with exact arms (tables from the
    # spec) the read-out and the transition change are the same figure; fitted arms add noise
    ro, lift = a["readout"]["difference"]["value"], a["engagement_lift"]["value"]
    if summary["tables"].startswith("tables written in the spec"):
        assert ro == pytest.approx(lift, rel=1e-6)
    else:
        assert abs(ro) < 1e6 and abs(lift) < 1e6
    assert (out / "report" / "report.html").is_file()
    assert "server stopped (exit status 0)" in printed
    assert "What the figures mean" in printed and "report:" in printed and "not accounting figures" in printed
    page = (out / "report" / "report.html").read_text()
    if not summary["tables"].startswith("tables written in the spec"):
        # a fitted model: the report shows the fit's diagnostics, not the "absent" note
        assert "Overlap" in page and "Where the prior dominated" in page and "join rates" in page
        assert "No fit diagnostics" not in page
    log = (out / "server.log").read_text()
    assert '"event":"serving"' in log.replace(" ", "")
    # every path of the demo's output that a command's help example reads is there
    wanted = demo_inputs()
    assert wanted and all((out / Path(rel).relative_to(DEMO_OUT)).exists() for rel in wanted), sorted(wanted)


def test_demo_refuses_unrelated_output_folder(tmp_path, capsys):
    busy = tmp_path / "busy"
    busy.mkdir()
    (busy / "keep.txt").write_text("mine")
    assert main(["demo", "--spec", str(MINI), "-o", str(busy), "--no-server"]) == 1
    assert "not an earlier demo output" in capsys.readouterr().err
    assert (busy / "keep.txt").read_text() == "mine"
