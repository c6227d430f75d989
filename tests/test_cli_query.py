"""The analyst's query commands (value, compare, change, marginal, readout) on a 64-state model.

Figures are checked against the valuation layer they call (the commands must print what the
library answers) and against relations that hold for any chain (an acquisition is worth less
than the member value alone when the prospect is worth something).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from stateworth.clients.cli import main

MINI = Path(__file__).resolve().parent / "data" / "mini_fitness.toml"
PROSPECT = ["market=north", "tenure=0", "status=prospect", "engagement=low"]
MEMBER = ["market=north", "tenure=2", "status=basic", "engagement=low"]


@pytest.fixture(scope="module")
def mini(tmp_path_factory):
    """(model dir, treatment model dir, Valuer) for the mini spec; the treatment arm lifts the
    chance of staying on basic in the high band."""
    from stateworth.rules import compile_model, load_spec, save_model
    from stateworth.valuation import TransitionChange, Valuer, apply_change

    model = compile_model(load_spec(MINI), source=str(MINI))
    root = tmp_path_factory.mktemp("mini")
    save_model(model, root / "control")
    ch = TransitionChange(axis="engagement", to="high", delta=0.05, when={"next.status": "basic", "engagement": "low"})
    treated = model.with_tables({"engagement": apply_change(model, ch)})
    save_model(treated, root / "treatment")
    return root / "control", root / "treatment", Valuer.build(model)


def run_json(capsys, argv):
    rc = main(argv + ["--json"])
    out = capsys.readouterr().out
    assert rc == 0, out
    return json.loads(out)


def test_value_json_matches_library(mini, capsys):
    control, _, valuer = mini
    doc = run_json(capsys, ["value", str(control), *MEMBER, "--stream", "margin"])
    want = valuer.value(dict(p.split("=") for p in MEMBER), stream="margin")
    assert doc["value"] == pytest.approx(want.value, rel=1e-12)
    assert doc["unit"] == "EUR" and doc["stream"] == "margin" and "accounting" in doc["caution"]


def test_value_table_is_aligned_and_cautions(mini, capsys):
    control, _, _ = mini
    assert main(["value", str(control), *MEMBER, "--all-streams"]) == 0
    out = capsys.readouterr().out
    lines = [ln for ln in out.splitlines() if ln.startswith("  ")]
    header, rule, *rows = lines[:5]
    assert [r.split()[0] for r in rows] == ["revenue", "margin", "member_months"]
    # the value column ends at the same character in every row (right-aligned)
    ends = {ln.index(ln.split()[1]) + len(ln.split()[1]) for ln in rows}
    assert len(ends) == 1
    assert "not accounting figures" in out


def test_value_horizon_is_smaller_than_infinite(mini, capsys):
    control, _, _ = mini
    inf = run_json(capsys, ["value", str(control), *MEMBER])["value"]
    h12 = run_json(capsys, ["value", str(control), *MEMBER, "--horizon", "12"])["value"]
    assert 0 < h12 < inf


def test_compare_acquisition_shows_naive_figures(mini, capsys):
    control, _, valuer = mini
    doc = run_json(capsys, ["compare", str(control), "acquisition", *PROSPECT, "--plan", "basic"])
    coords = dict(p.split("=") for p in PROSPECT)
    want = valuer.acquisition(coords, "basic")
    assert doc["value"] == pytest.approx(want.value, rel=1e-12)
    naive = doc["naive"]
    # honest = member value - non-member value, and the prospect is worth something
    assert naive["member_value"] - naive["non_member_value"] == pytest.approx(doc["value"], rel=1e-10)
    assert 0 < doc["value"] < naive["member_value"]
    assert main(["compare", str(control), "acquisition", *PROSPECT, "--plan", "basic"]) == 0
    out = capsys.readouterr().out
    assert "naive: member value" in out and "one period of price" in out and "overstates" in out


@pytest.mark.parametrize("kind,extra,method,args", [
    ("plan-change", ["--plan", "plus"], "plan_change", ("plus",)),
    ("engagement", ["--to", "high"], "engagement_change", ("engagement", "high")),
])
def test_compare_kinds_match_library(mini, capsys, kind, extra, method, args):
    control, _, valuer = mini
    doc = run_json(capsys, ["compare", str(control), kind, *MEMBER, *extra])
    want = getattr(valuer, method)(dict(p.split("=") for p in MEMBER), *args)
    assert doc["value"] == pytest.approx(want.value, rel=1e-12)


def test_compare_states_uses_overrides(mini, capsys):
    control, _, valuer = mini
    doc = run_json(capsys, ["compare", str(control), "states", *MEMBER, "--after", "status=plus", "tenure=0"])
    before = dict(p.split("=") for p in MEMBER)
    after = dict(before, status="plus", tenure="0")
    assert doc["value"] == pytest.approx(valuer.contrast(before, after).value, rel=1e-12)


@pytest.mark.parametrize("argv,needle", [
    (["compare", "{m}", "acquisition", *PROSPECT], "--plan"),
    (["compare", "{m}", "acquisition", *MEMBER, "--plan", "basic"], "non-member"),
    (["compare", "{m}", "acquisition", "market=south", "tenure=0", "status=prospect", "engagement=low",
      "--plan", "plus"], "south"),
    (["value", "{m}", "market=north", "status=basic"], "tenure"),
    (["value", "{m}", "market=west", "tenure=0", "status=basic", "engagement=low"], "west"),
    (["value", "{m}", "marketnorth"], "AXIS=LEVEL"),
    (["value", "{m}", *MEMBER, "--stream", "profit"], "profit"),
    (["marginal", "{m}", "--cohort", "colour=red"], "colour"),
])
def test_bad_queries_exit_1_with_one_line(mini, capsys, argv, needle):
    control, _, _ = mini
    rc = main([a.replace("{m}", str(control)) for a in argv])
    err = capsys.readouterr().err
    assert rc == 1
    assert err.startswith("error: ") and needle in err and "Traceback" not in err


def test_change_matches_library_and_reports_cells(mini, capsys):
    from stateworth.clients.commands._common import cohort_weights
    from stateworth.valuation import TransitionChange

    control, _, valuer = mini
    doc = run_json(capsys, ["change", str(control), "--axis", "status", "--to", "lapsed", "--delta", "-0.01",
                            "--when", "status=basic", "--cohort", "status=basic,plus"])
    w = cohort_weights(valuer, {"status": ["basic", "plus"]})
    want = valuer.transition_change(TransitionChange("status", "lapsed", -0.01, {"status": "basic"}), weights=w)
    assert doc["value"] == pytest.approx(want.weighted, rel=1e-9)
    assert doc["value"] > 0  # fewer lapses from basic is worth money
    assert main(["change", str(control), "--axis", "status", "--to", "lapsed", "--delta", "-0.01",
                 "--when", "status=basic"]) == 0
    out = capsys.readouterr().out
    assert "by status" in out and "cohort-weighted change of value" in out


def test_marginal_ranked_by_size(mini, capsys):
    control, _, _ = mini
    doc = run_json(capsys, ["marginal", str(control), "--top", "5"])
    pp = [abs(e["per_point"]) for e in doc["entries"]]
    assert len(pp) == 5 and pp == sorted(pp, reverse=True)
    assert main(["marginal", str(control), "--top", "3"]) == 0
    out = capsys.readouterr().out
    assert "per +1 point" in out and out.count("P(") >= 3


def test_cohort_weights_follow_long_run_mix(mini):
    from stateworth.clients.commands._common import cohort_weights
    from stateworth.errors import QueryError

    _, _, valuer = mini
    w = cohort_weights(valuer, {"status": ["basic"], "market": ["north"]})
    pi = valuer.stationary()
    mask = np.asarray(w > 0)
    assert w.sum() == pytest.approx(1.0)
    np.testing.assert_allclose(w[mask], pi[mask] / pi[mask].sum(), rtol=1e-12)
    u = cohort_weights(valuer, {"status": ["basic"]}, basis="uniform")
    assert np.count_nonzero(u) == 2 * 4 * 2  # markets x tenure x engagement
    with pytest.raises(QueryError, match="no long-run weight"):
        cohort_weights(valuer, {"status": ["plus"], "market": ["south"]})  # plus is not sold in south


def test_readout_difference_of_arms(mini, capsys):
    control, treatment, _ = mini
    doc = run_json(capsys, ["readout", str(control), str(treatment), "--cohort", "status=basic"])
    assert doc["value"] == pytest.approx(doc["treatment"]["value"] - doc["control"]["value"], rel=1e-9)
    assert doc["value"] > 0  # more members move up to the high band, who lapse less
    assert main(["readout", str(control), str(treatment)]) == 0
    out = capsys.readouterr().out
    assert "treatment - control" in out and "long-run member share" in out


@pytest.mark.parametrize("opt, value", [("--log-flush-ms", "-5"), ("--threads", "0")])
def test_serve_refuses_bad_options_before_listening(tmp_path, capsys, opt, value):
    rc = main(["serve", str(tmp_path), "--port", "0", opt, value])
    err = capsys.readouterr().err
    assert rc == 1 and opt in err and "Traceback" not in err
