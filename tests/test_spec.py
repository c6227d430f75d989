"""Bad specs are refused with one clear error that names the file and the key path.

Each test starts from a small valid spec (written as TOML text or as a dict), breaks one thing,
and checks that :class:`~stateworth.errors.SpecError` (or, for the memory limit,
:class:`~stateworth.errors.GridTooLargeError`) is raised with a message that names the key path
and says what would be right.
"""

from __future__ import annotations

import copy
import math
import re

import numpy as np
import pytest

from stateworth.errors import GridTooLargeError, SpecError, StateworthError
from stateworth.rules import compile_model, estimate_bytes, load_spec, parse_spec
from stateworth.rules.factors import check_table, factors_of
from stateworth.rules.spec import ROW_SUM_TOLERANCE

GOOD_TOML = """
[model]
name = "tiny"
discount = { annual_rate = 0.10 }

[axes.market]
kind = "fixed"
levels = ["north", "south"]

[axes.status]
kind = "status"
levels = ["prospect", "basic", "plus"]
members = ["basic", "plus"]
given = ["status", "market"]
moves.prospect = ["prospect", "basic"]
not_sold = { plus = ["south"] }

[[axes.status.table]]
probs = { prospect = 0.1, basic = 0.8, plus = 0.1 }
[[axes.status.table]]
when = { market = "south" }
probs = { prospect = 0.1, basic = 0.9 }
[[axes.status.table]]
when = { status = "prospect" }
probs = { prospect = 0.9, basic = 0.1 }

[axes.band]
kind = "chance"
levels = ["low", "high"]
given = ["next.status"]
[[axes.band.table]]
probs = { low = 0.5, high = 0.5 }

[rewards.revenue]
price = { basic = 10.0, plus = 20.0 }
"""


def good() -> dict:
    import tomllib
    return tomllib.loads(GOOD_TOML)


def refused(data: dict, match: str) -> SpecError:
    with pytest.raises(SpecError, match=match) as info:
        parse_spec(data, source="spec.toml")
    err = info.value
    assert str(err).startswith("spec.toml: ")
    assert "\n" not in str(err), "errors are one line"
    return err


def test_good_spec_passes(tmp_path):
    path = tmp_path / "spec.toml"
    path.write_text(GOOD_TOML)
    spec = load_spec(path)
    assert spec.status_axis == "status"
    assert spec.members == ["basic", "plus"]
    assert spec.non_members == ["prospect"]
    assert spec.draw_order == ["status", "band"]
    assert spec.grid_order == ["market", "status", "band"]


def test_not_toml(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text("[model\nname = 'x'\n")
    with pytest.raises(SpecError, match=r"broken\.toml: not valid TOML") as info:
        load_spec(path)
    assert "\n" not in str(info.value)


def test_missing_file(tmp_path):
    with pytest.raises(SpecError, match=r"nope\.toml: no such file"):
        load_spec(tmp_path / "nope.toml")


@pytest.mark.parametrize("where,key", [
    (("model",), "nmae"),
    (("model", "discount"), "rate"),
    (("axes", "status"), "movse"),
    (("axes", "status", "table", 0), "wehn"),
    (("rewards", "revenue"), "prices"),
])
def test_unknown_keys(where, key):
    data = good()
    node = data
    for part in where:
        node = node[part]
    node[key] = 1
    path = ".".join(str(p) for p in where + (key,))
    refused(data, re.escape(path) + ": unknown key")


def test_every_problem_at_once():
    """A misspelt key, an unknown level in moves and a rate of 12: all three, not only the first."""
    data = good()
    data["axes"]["status"]["movse"] = {}
    data["axes"]["status"]["moves"]["prospect"] = ["prospect", "gold"]
    data["model"]["discount"]["annual_rate"] = 12
    err = refused(data, r"axes\.status\.movse: unknown key.*\(and 2 more problem\(s\); `stateworth check` lists them all\)")
    assert len(err.problems) == 3
    assert err.problems[0].startswith("spec.toml: axes.status.movse: unknown key")
    assert "spec.toml: axes.status.moves.prospect: 'gold' is not a level of status; levels are prospect, basic, plus" \
        in err.problems
    assert "spec.toml: model.discount.annual_rate: must lie strictly between 0 and 1 (got 12.0); write 10 % a year " \
           "as 0.10" in err.problems


def test_a_value_of_the_wrong_type_is_listed_with_the_unknown_keys():
    """A value pydantic refuses is listed with the unknown keys; the cross-reference checks wait
    for it (without the number in members, every mention of plus would look wrong)."""
    data = good()
    data["axes"]["status"]["members"] = ["basic", 3]
    data["axes"]["band"]["levles"] = ["low"]
    data["axes"]["status"]["moves"]["prospect"] = ["gold"]
    err = refused(data, r"axes\.status\.members\.1: .*valid string")
    assert len(err.problems) == 2 and "axes.band.levles: unknown key" in err.problems[1]


def test_a_misspelt_required_key_stops_the_cross_checks():
    """Without a required key the rest cannot be built; the problems pydantic found are listed."""
    data = good()
    data["model"]["nmae"] = data["model"].pop("name")
    data["axes"]["status"]["moves"]["prospect"] = ["gold"]
    err = refused(data, r"model\.name: required key is missing|model\.nmae: unknown key")
    assert sorted(p.split(": ")[1] for p in err.problems) == ["model.name", "model.nmae"]


def test_missing_required_key():
    data = good()
    del data["model"]["discount"]
    refused(data, r"model\.discount: required key is missing")


def test_wrong_kind_literal():
    data = good()
    data["axes"]["band"]["kind"] = "random"
    refused(data, r"axes\.band\.kind: .*'random'")


def test_unknown_axis_in_given():
    data = good()
    data["axes"]["status"]["given"] = ["status", "region"]
    refused(data, r"axes\.status\.given: unknown axis 'region'; axes are market, status, band")


def test_unknown_axis_in_next_given():
    data = good()
    data["axes"]["band"]["given"] = ["next.stauts"]
    refused(data, r"axes\.band\.given: unknown axis 'stauts' in 'next\.stauts'")


def test_next_of_a_non_random_axis():
    data = good()
    data["axes"]["band"]["given"] = ["next.market"]
    refused(data, r"axes\.band\.given: 'next\.market': only random axes")


def test_unknown_level_in_moves():
    data = good()
    data["axes"]["status"]["moves"]["prospect"] = ["prospect", "gold"]
    refused(data, r"axes\.status\.moves\.prospect: 'gold' is not a level of status; levels are prospect, basic, plus")


def test_unknown_from_level_in_moves():
    data = good()
    data["axes"]["status"]["moves"]["gold"] = ["prospect"]
    refused(data, r"axes\.status\.moves\.gold: 'gold' is not a level of status")


def test_unknown_level_in_table_when():
    data = good()
    data["axes"]["status"]["table"][2]["when"] = {"status": "prospekt"}
    refused(data, r"axes\.status\.table\[2\]\.when\.status: 'prospekt' is not a level of status")


def test_table_when_on_an_axis_not_given():
    data = good()
    data["axes"]["band"]["table"][0]["when"] = {"market": "north"}
    refused(data, r"axes\.band\.table\[0\]\.when\.market: 'market' is not in axes\.band\.given")


def test_unknown_level_in_table_probs():
    data = good()
    data["axes"]["band"]["table"][0]["probs"] = {"low": 0.5, "mid": 0.5}
    refused(data, r"axes\.band\.table\[0\]\.probs\.mid: 'mid' is not a level of band")


def test_unknown_level_in_not_sold():
    data = good()
    data["axes"]["status"]["not_sold"] = {"plus": {"market": ["west"]}}
    refused(data, r"axes\.status\.not_sold\.plus\.market: 'west' is not a level of market")


def test_not_sold_for_a_non_member():
    data = good()
    data["axes"]["status"]["not_sold"] = {"prospect": ["south"]}
    refused(data, r"axes\.status\.not_sold\.prospect: 'prospect' is not a member level")


def test_unknown_member_level():
    data = good()
    data["axes"]["status"]["members"] = ["basic", "premium"]
    refused(data, r"axes\.status\.members: 'premium' is not a level of status")


def test_every_level_a_member():
    data = good()
    data["axes"]["status"]["members"] = ["prospect", "basic", "plus"]
    refused(data, r"axes\.status\.members: every level is a member level")


def test_unknown_axis_and_level_in_rewards():
    data = good()
    data["rewards"]["revenue"]["costs"] = {"region": {"x": 1.0}}
    refused(data, r"rewards\.revenue\.costs\.region: unknown axis")
    data = good()
    data["rewards"]["revenue"]["costs"] = {"band": {"medium": 1.0}}
    refused(data, r"rewards\.revenue\.costs\.band\.medium: not a level of band")
    data = good()
    data["rewards"]["revenue"]["price"]["prospect"] = 3.0
    refused(data, r"rewards\.revenue\.price\.prospect: 'prospect' is not a member level")
    data = good()
    data["rewards"]["revenue"]["on_move"] = [{"from": ["prospect"], "to": ["platinum"], "amount": 1.0}]
    refused(data, r"rewards\.revenue\.on_move\[0\]\.to: 'platinum' is not a level of status")


def test_price_table_must_cover_the_levels_where_the_plan_is_sold():
    data = good()
    data["rewards"]["revenue"]["price"]["basic"] = {"north": 10.0}
    refused(data, r"rewards\.revenue\.price\.basic: no price for market level\(s\) south")
    # plus is not sold in south, so its price table may leave south out
    data = good()
    data["rewards"]["revenue"]["price"]["plus"] = {"north": 20.0}
    parse_spec(data)


def test_reserved_stream_name():
    data = good()
    data["rewards"]["member_months"] = {"price": {"basic": 1.0}}
    refused(data, r"rewards\.member_months: 'member_months' is built in")


def test_fees_share_outside_unit_interval():
    data = good()
    data["rewards"]["revenue"]["fees_share"] = 1.5
    refused(data, r"rewards\.revenue\.fees_share: a share in \[0, 1\)")


def test_factor_given_an_axis_drawn_later():
    data = good()
    data["axes"]["status"]["given"] = ["status", "market", "next.band"]
    refused(data, r"axes\.status\.given: 'next\.band' is drawn at or after status \(draw order status, band\)")
    # the same dependency is fine once band is drawn first
    data["model"]["draw_order"] = ["band", "status"]
    data["axes"]["band"]["given"] = []
    parse_spec(data)


def test_factor_given_its_own_next_value():
    data = good()
    data["axes"]["band"]["given"] = ["next.band"]
    refused(data, r"axes\.band\.given: 'next\.band' is drawn at or after band")


def test_draw_order_must_list_each_random_axis_once():
    data = good()
    data["model"]["draw_order"] = ["status"]
    refused(data, r"model\.draw_order: must list each random axis \(status and chance\) exactly once")


@pytest.mark.parametrize("value,match", [
    (-0.1, r"axes\.band\.table\[0\]\.probs\.low: probabilities must be finite and >= 0 \(got -0\.1\)"),
    (math.nan, r"axes\.band\.table\[0\]\.probs\.low: probabilities must be finite and >= 0 \(got nan\)"),
    (0.6, r"axes\.band\.table\[0\]\.probs: sums to 1\.1; a row must sum to 1 within 1e-09"),
])
def test_bad_probability_rows_in_the_spec(value, match):
    data = good()
    data["axes"]["band"]["table"][0]["probs"]["low"] = value
    refused(data, match)


def test_nan_probability_written_in_toml(tmp_path):
    path = tmp_path / "spec.toml"
    path.write_text(GOOD_TOML.replace("probs = { low = 0.5, high = 0.5 }", "probs = { low = nan, high = 0.5 }"))
    with pytest.raises(SpecError, match=r"axes\.band\.table\[0\]\.probs\.low: probabilities must be finite"):
        load_spec(path)


def test_row_sum_tolerance_is_as_stated():
    """Rows must sum to 1 within ROW_SUM_TOLERANCE = 1e-9 (absolute)."""
    assert ROW_SUM_TOLERANCE == 1e-9
    data = good()
    data["axes"]["band"]["table"][0]["probs"] = {"low": 0.5 + 4e-10, "high": 0.5}
    parse_spec(data)
    data["axes"]["band"]["table"][0]["probs"] = {"low": 0.5 + 3e-9, "high": 0.5}
    refused(data, r"axes\.band\.table\[0\]\.probs: sums to 1\.000000003")


@pytest.mark.parametrize("mutate,match", [
    (lambda t: t.__setitem__((0, 0), -0.25), r"negative probability -0\.25 at \(next\.status=prospect, next band=low\)"),
    (lambda t: t.__setitem__((1, 1), np.nan), r"non-finite entry at \(next\.status=basic, next band=high\)"),
    (lambda t: t.__setitem__((2, 0), 0.6), r"row \(next\.status=plus\) sums to 1\.1; rows must sum to 1 within 1e-09"),
])
def test_bad_probability_arrays(mutate, match):
    """Tables supplied as arrays (the estimation path) get the same checks, naming the cell."""
    spec = parse_spec(good())
    table = np.full((3, 2), 0.5)
    mutate(table)
    with pytest.raises(SpecError, match=r"axes\.band\.table: .*" + match):
        compile_model(spec, {"band": table}, source="spec.toml")


def test_table_array_of_the_wrong_shape():
    spec = parse_spec(good())
    with pytest.raises(SpecError, match=r"axes\.band\.table: table has shape \(2, 2\); expected \(3, 2\)"):
        compile_model(spec, {"band": np.full((2, 2), 0.5)}, source="spec.toml")


def test_table_for_an_unknown_axis():
    spec = parse_spec(good())
    with pytest.raises(SpecError, match=r"table for 'market', which is not a random axis"):
        compile_model(spec, {"market": np.ones(2)}, source="spec.toml")


def test_mass_on_a_forbidden_move_in_written_rows():
    """prospect may only move to prospect or basic; a row putting mass on plus is refused."""
    data = good()
    data["axes"]["status"]["table"][2]["probs"] = {"prospect": 0.9, "basic": 0.05, "plus": 0.05}
    spec = parse_spec(data)
    with pytest.raises(SpecError, match=r"spec\.toml: axes\.status\.table\[2\]\.probs: probability 0\.05 on a move the rules "
                                        r"forbid \(status=prospect, market=north, next status=plus\)"):
        compile_model(spec, source="spec.toml")


def test_mass_on_a_plan_not_sold():
    """plus is not sold in south: mass on moving there is refused, for any current status."""
    spec = parse_spec(good())
    f = next(f for f in factors_of(spec) if f.axis == "status")
    t = np.zeros(f.shape)
    t[...] = [0.0, 0.9, 0.1]
    t[0] = [0.9, 0.1, 0.0]  # prospect: allowed moves only
    with pytest.raises(SpecError, match=r"forbid \(status=basic, market=south, next status=plus\)"):
        check_table(spec, f, t, "spec.toml: axes.status.table")
    t[:, 1] = [0.0, 1.0, 0.0]
    t[0, 1] = [1.0, 0.0, 0.0]
    check_table(spec, f, t, "spec.toml: axes.status.table")


def test_no_row_covers_a_cell():
    data = good()
    data["axes"]["status"]["table"] = [data["axes"]["status"]["table"][2]]  # only the prospect row
    spec = parse_spec(data)
    with pytest.raises(SpecError, match=r"axes\.status\.table: no row covers the cell \(status=basic, market=north\)"):
        compile_model(spec, source="spec.toml")


def test_factor_without_any_table():
    data = good()
    del data["axes"]["band"]["table"]
    spec = parse_spec(data)  # valid: tables may come from a panel
    with pytest.raises(SpecError, match=r"axes\.band\.table: no probabilities for this factor"):
        compile_model(spec, source="spec.toml")


def test_more_than_one_status_axis():
    data = good()
    data["axes"]["band"]["kind"] = "status"
    data["axes"]["band"]["members"] = ["high"]
    refused(data, r"axes\.band\.kind: more than one status axis \(status, band\); exactly one is allowed")


def test_no_status_axis():
    data = good()
    data["axes"]["status"]["kind"] = "chance"
    del data["axes"]["status"]["members"]
    del data["axes"]["status"]["not_sold"]
    refused(data, r"axes: no axis has kind = \"status\"; exactly one is required")


def test_key_that_does_not_belong_to_the_kind():
    data = good()
    data["axes"]["market"]["given"] = ["status"]
    refused(data, r"axes\.market\.given: not used by a fixed axis; remove it")


def test_counter_rules_name_real_levels_and_events():
    data = good()
    data["axes"]["tenure"] = {"kind": "counter", "size": 3, "advance_while": ["basic", "gold"]}
    refused(data, r"axes\.tenure\.advance_while: 'gold' is not a level of status")
    data["axes"]["tenure"] = {"kind": "counter", "size": 3, "advance_while": "paying"}
    refused(data, r"axes\.tenure\.advance_while: 'paying' is not one of member, non_member, always")
    data["axes"]["tenure"] = {"kind": "counter", "size": 3, "reset_on": ["upgrade"]}
    refused(data, r"axes\.tenure\.reset_on: 'upgrade' is not an event; events are join, lapse, change")


def test_axis_needs_levels_or_size():
    data = good()
    data["axes"]["tenure"] = {"kind": "counter"}
    refused(data, r"axes\.tenure: give 'levels' \(a list of names\) or 'size' \(a count\)")
    data["axes"]["tenure"] = {"kind": "counter", "size": 2, "levels": ["a", "b", "c"]}
    refused(data, r"axes\.tenure\.size: 2 does not match the 3 levels")
    data["axes"]["tenure"] = {"kind": "counter", "levels": ["a", "a"]}
    refused(data, r"axes\.tenure\.levels: duplicated level\(s\) a")


@pytest.mark.parametrize("rate", [0.0, 1.0, 1.5, -0.05, math.inf, math.nan])
def test_discount_rate_outside_unit_interval(rate):
    data = good()
    data["model"]["discount"]["annual_rate"] = rate
    refused(data, r"model\.discount\.annual_rate: must lie strictly between 0 and 1 .*write 10 % a year as 0\.10")


def test_bad_cash_timing():
    data = good()
    data["model"]["discount"]["cash"] = "middle"
    refused(data, r"model\.discount\.cash: .*'middle'")


def test_all_problems_are_listed():
    data = good()
    data["model"]["discount"]["annual_rate"] = 2.0
    data["axes"]["status"]["moves"]["prospect"] = ["gold"]
    err = refused(data, r"and 1 more problem")
    assert len(err.problems) == 2
    assert all(p.startswith("spec.toml: ") for p in err.problems)


def huge_spec() -> dict:
    """About 1.2e9 states: far past any memory limit; only its levels are cheap to write."""
    data = good()
    data["axes"]["market"]["levels"] = ["north", "south"] + [f"m{i}" for i in range(398)]
    data["axes"]["tenure"] = {"kind": "counter", "size": 5000}
    data["axes"]["week"] = {"kind": "cycle", "size": 100}
    return data


def test_grid_over_the_memory_limit_is_refused_before_allocating(monkeypatch):
    spec = parse_spec(huge_spec())
    import stateworth.rules.compiled as compiled

    def must_not_run(*a, **k):
        raise AssertionError("compile allocated before checking the memory estimate")

    monkeypatch.setattr(compiled, "table_from_rows", must_not_run)
    with pytest.raises(GridTooLargeError, match=r"spec\.toml: the grid has 1,200,000,000 states and would need "
                                                r"about \d[\d,.]* GB, over the limit of 12\.0 GB") as info:
        compile_model(spec, source="spec.toml")
    assert isinstance(info.value, StateworthError)
    assert "STATEWORTH_MEMORY_LIMIT_GB" in str(info.value)


def test_memory_limit_is_configurable(monkeypatch):
    spec = parse_spec(good())
    need = estimate_bytes(spec)
    assert need > 0
    with pytest.raises(GridTooLargeError, match=r"the grid has 12 states"):
        compile_model(spec, memory_limit=need - 1)
    compile_model(spec, memory_limit=need)
    monkeypatch.setenv("STATEWORTH_MEMORY_LIMIT_GB", str(need / 2 / 1024**3))
    with pytest.raises(GridTooLargeError, match=r"over the limit of 0\.0 GB"):
        compile_model(spec)
    monkeypatch.setenv("STATEWORTH_MEMORY_LIMIT_GB", "1")
    compile_model(spec)


def test_parse_does_not_mutate_input():
    data = good()
    before = copy.deepcopy(data)
    parse_spec(data)
    assert data == before


def test_long_level_lists_are_shortened_in_messages():
    data = huge_spec()
    data["axes"]["status"]["not_sold"] = {"plus": {"market": ["west"]}}
    err = refused(data, r"'west' is not a level of market; levels are north, south, m0, .*, \.\.\. m397 \(400 in all\)")
    assert len(str(err)) < 300
