"""The report's answers (stateworth.valuation.summary) against independent computations.

Every figure of the summary is recomputed here another way: values by numpy.linalg.solve on the
explicit matrix, intervals from models rebuilt with each posterior draw's tables and solved one
by one, the rest from direct queries of the Valuer (the queries themselves are checked against
outside references in tests/test_valuation.py). A plan not sold in a market gets a note, never a
figure, and no section asks about a state no customer can be in.
"""

from __future__ import annotations

import numpy as np
import pytest

from stateworth.errors import QueryError
from stateworth.rules import compile_model, parse_spec
from stateworth.valuation import Valuer
from stateworth.valuation import summary as sm
from stateworth.valuation.answer import percentile_interval
from test_valuation import dirichlet_draws, exact_values, tiny_model

LEVEL = 0.9


def season_spec():
    """The tiny fitness grid with a two-level cycle (joining is seasonal), so that the prospect
    profile holds two states and every average runs over the cycle; duo not sold in upland."""
    return parse_spec({
        "model": {"name": "season-fitness", "currency": "EUR", "discount": {"annual_rate": 0.10, "cash": "start"}},
        "axes": {
            "market": {"kind": "fixed", "levels": ["harbor", "upland"]},
            "tenure": {"kind": "counter", "size": 3, "advance_while": "member", "reset_on": ["join", "lapse"]},
            "season": {"kind": "cycle", "levels": ["high", "low"]},
            "status": {"kind": "status", "levels": ["prospect", "lapsed", "solo", "duo"], "members": ["solo", "duo"],
                       "given": ["market", "season", "status", "engagement"], "not_sold": {"duo": ["upland"]},
                       "moves": {"prospect": ["prospect", "solo", "duo"], "lapsed": ["lapsed", "solo", "duo"],
                                 "solo": ["lapsed", "solo", "duo"], "duo": ["lapsed", "solo", "duo"]}},
            "engagement": {"kind": "chance", "levels": ["none", "light", "keen"],
                           "given": ["next.status", "engagement"]},
        },
        "rewards": {"revenue": {"price": {"solo": 29.0, "duo": 49.0}, "fees_share": 0.2, "on_join": -10.0}},
    }, source="test")


def season_tables(spec, seed: int = 3) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    P = np.zeros((2, 2, 4, 3, 4))
    for m in range(2):
        duo = m == 0
        for s in range(2):
            for e in range(3):
                j = rng.uniform(0.02, 0.05) * (2.0 if s == 0 else 1.0)
                P[m, s, 0, e] = [1 - j, 0, j * (0.7 if duo else 1.0), j * 0.3 if duo else 0.0]
                rj = rng.uniform(0.03, 0.07)
                P[m, s, 1, e] = [0, 1 - rj, rj * (0.6 if duo else 1.0), rj * 0.4 if duo else 0.0]
                c = rng.uniform(0.03, 0.09) * (1.3 - 0.2 * e)
                up = 0.03 if duo else 0.0
                P[m, s, 2, e] = [0, c, 1 - c - up, up]
                P[m, s, 3, e] = [0, c * 0.8, 0.05, 1 - c * 0.8 - 0.05] if duo else [0, c * 0.8, 1 - c * 0.8, 0]
    E = np.zeros((4, 3, 3))
    for s in range(4):
        for i in range(3):
            if s < 2:
                E[s, i, 0] = 1.0  # a non-member attends nothing
            else:
                E[s, i] = rng.dirichlet(np.ones(3) * 4)
    return {"status": P, "engagement": E}


@pytest.fixture(scope="module")
def season():
    """(valuer with 24 posterior draws, the drawn models solved one by one)."""
    spec = season_spec()
    tables = season_tables(spec)
    D = 24
    draws = dirichlet_draws(tables, D, conc=300.0, seed=5)
    model = compile_model(spec, tables, source="test", draws=draws)
    one_by_one = [Valuer.build(compile_model(spec, {a: draws[a][d] for a in draws}, source="test"), draws=False,
                               longrun=False) for d in range(D)]
    return Valuer.build(model), one_by_one


@pytest.fixture(scope="module")
def data(season):
    return sm.report_summary(season[0].solved, "revenue", top=8, level=LEVEL)


def _weights(valuer) -> np.ndarray:
    """The population: the long-run mix on the states the Valuer marks reachable."""
    pi = np.where(valuer.solved.reachable, valuer.stationary(), 0.0)
    pi = np.where(pi > 1e-12 * pi.max(), pi, 0.0)
    return pi / pi.sum()


def _codes(model):
    g = model.grid
    return {n: np.asarray(g.codes()[g.position(n)]) for n in g.names}


def test_value_by_tenure_equals_explicit_solve_and_drawn_models(season, data):
    valuer, drawn = season
    model = valuer.model
    # reference values: numpy.linalg.solve on the explicit matrix (docs/references.md,
    # general-purpose reference libraries)
    V = exact_values(model)
    pi = _weights(valuer)
    c = _codes(model)
    g = model.grid
    sec = data["value_by_tenure"]
    assert sec["axis"] == "tenure" and sec["weights"].startswith("long-run mix")
    checked = 0
    for s in sec["series"]:
        if not s["sold"]:
            continue
        for t in range(len(s["tenure"])):
            cell = ((c["market"] == g.level_index("market", s["market"]))
                    & (c["status"] == g.level_index("status", s["plan"])) & (c["tenure"] == t))
            w = np.where(cell, pi, 0.0)
            assert s["value"][t] == pytest.approx(float(w @ V / w.sum()), rel=1e-9)
            # the interval: the same weighted mean in each drawn model, percentile over the draws
            # (Efron & Tibshirani's percentile method, docs/references.md)
            per = [float(w @ v.values(np.arange(g.size), "revenue") / w.sum()) for v in drawn]
            lo, hi = percentile_interval(np.array(per), LEVEL)
            assert s["interval"][t] == pytest.approx([lo, hi], rel=1e-7)
            checked += 1
    assert checked == 3 * 3  # harbor solo, duo and upland solo at 3 tenure levels


def test_acquisition_equals_the_valuers_queries_averaged_over_the_profile(season, data):
    valuer, drawn = season
    sec = data["acquisition"]
    assert sec["cycles"] == ["season"] and sec["profile"] == {"tenure": "0", "status": "prospect", "engagement": "none"}
    sold = [r for r in sec["rows"] if r["sold"]]
    assert {(r["market"], r["plan"]) for r in sold} == {("harbor", "solo"), ("harbor", "duo"), ("upland", "solo")}
    for r in sold:
        profile = [{"market": r["market"], "tenure": "0", "season": s, "status": "prospect", "engagement": "none"}
                   for s in ("high", "low")]
        acq = [valuer.acquisition(p, r["plan"], "revenue") for p in profile]
        naive = [valuer.naive_comparison(p, r["plan"], "revenue") for p in profile]
        assert r["honest"] == pytest.approx(np.mean([a.value for a in acq]), rel=1e-9)
        assert r["prospect_value"] == pytest.approx(np.mean([valuer.value(p, "revenue").value for p in profile]),
                                                    rel=1e-9)
        assert r["member_value"] == pytest.approx(np.mean([n["member_value"] for n in naive]), rel=1e-9)
        assert r["one_period"] == pytest.approx(np.mean([n["one_period"] for n in naive]), rel=1e-9)
        assert r["member_value"] - r["prospect_value"] == pytest.approx(r["honest"], rel=1e-9)
        # the interval of the average: each drawn model's own acquisitions (its own landing mix),
        # averaged over the profile, percentile over the draws
        per = [np.mean([v.acquisition(p, r["plan"], "revenue").value for p in profile]) for v in drawn]
        assert r["interval"] == pytest.approx(list(percentile_interval(np.array(per), LEVEL)), rel=1e-7)
        # the landing mix: the Valuer's landing shares, averaged over the profile
        shares: dict[str, float] = {}
        for a in acq:
            for item in a.details["landing"]:
                key = item["levels"].get("engagement", "other")
                shares[key] = shares.get(key, 0.0) + item["share"] / len(acq)
        got = {item["levels"].get("engagement", "other"): item["share"] for item in r["landing"]}
        assert got == pytest.approx(shares, abs=1e-12)
    gap = [r for r in sec["rows"] if not r["sold"]]
    assert [(r["market"], r["plan"]) for r in gap] == [("upland", "duo")]
    assert "not sold in market=upland" in gap[0]["note"] and "honest" not in gap[0]
    assert sec["interval_note"] is None and data["interval_note"] is None


def test_plan_upgrade_equals_cohort_contrast(season, data):
    valuer, _ = season
    c = _codes(valuer.model)
    g = valuer.model.grid
    pi = _weights(valuer)
    rows = data["plan_upgrade"]["rows"]
    assert [(r["market"], r["from"], r["to"], r["sold"]) for r in rows] == [
        ("harbor", "solo", "duo", True), ("upland", "solo", "duo", False)]
    w = np.where((c["market"] == 0) & (c["status"] == g.level_index("status", "solo")), pi, 0.0)
    ans = valuer.cohort_contrast(w / w.sum(), {"status": "duo"}, "revenue", level=LEVEL)
    assert rows[0]["value"] == pytest.approx(ans.value, rel=1e-9)
    assert rows[0]["interval"] == pytest.approx(list(ans.interval), rel=1e-9)
    assert "not sold" in rows[1]["note"]


def test_marginal_and_long_run_equal_direct_queries(season, data):
    valuer, _ = season
    pi = _weights(valuer)
    V = exact_values(valuer.model)
    mg = data["marginal"]
    assert mg["objective"] == pytest.approx(float(pi @ V), rel=1e-9)
    direct = valuer.marginal(pi, "revenue", top=10**6, level=LEVEL)
    # entries that differ only in the season are pooled: their per-point values add up
    pooled: dict[tuple, float] = {}
    for e in direct.entries:
        key = (e.axis, tuple(sorted((k, v) for k, v in e.cell.items() if k != "season")), e.to)
        pooled[key] = pooled.get(key, 0.0) + e.per_point
    ranked = sorted(pooled.items(), key=lambda kv: -abs(kv[1]))[:8]
    got = [((e["axis"], tuple(sorted(e["cell"].items())), e["to"]), e["per_point"]) for e in mg["entries"]]
    assert [k for k, _ in got] == [k for k, _ in ranked]
    assert [v for _, v in got] == pytest.approx([v for _, v in ranked], rel=1e-9)
    assert all(e["cells"] == 2 and e["label"].startswith(f"P({e['axis']}'={e['to']} | ") for e in mg["entries"])
    assert [e["rank"] for e in mg["entries"]] == list(range(1, 9))
    assert mg["interval"] == pytest.approx(list(direct.interval), rel=1e-9)
    lr = data["long_run"]
    direct_lr = valuer.long_run(level=LEVEL)
    status = _codes(valuer.model)["status"]
    assert lr["member_share"] == pytest.approx(float(pi[status >= 2].sum()), rel=1e-9)
    assert lr["expected_member_months"] == pytest.approx(direct_lr["expected_member_months"], rel=1e-9)


def test_profile_and_averages_use_reachable_states_only(season):
    valuer, _ = season
    solved = valuer.solved
    for market in ("harbor", "upland"):
        prof = sm.prospect_profile(solved, market)
        assert prof.size == 2 and solved.reachable[prof].all()
    w, basis = sm.population(solved)
    assert not w[~solved.reachable].any() and w.sum() == pytest.approx(1.0)
    assert sm.plan_availability(solved, "upland", "duo")["sold"] is False
    assert sm.plan_availability(solved, "harbor", "duo")["sold"] is True


def test_plan_no_move_leads_to_is_noted():
    """A plan sold everywhere that no move rule leads into is 'never reached', not a figure."""
    tables = season_tables(season_spec())
    P = tables["status"].copy()
    P[..., 3] = 0.0  # nobody moves onto duo
    P = P / P.sum(axis=-1, keepdims=True)
    P[:, :, 3] = 0.0
    P[:, :, 3, :, 1] = 1.0  # the duo rows (no customer is ever there) lapse
    moves = {"prospect": ["prospect", "solo"], "lapsed": ["lapsed", "solo"], "solo": ["lapsed", "solo"],
             "duo": ["lapsed", "solo", "duo"]}
    spec = parse_spec({
        "model": {"name": "no-duo", "currency": "EUR", "discount": {"annual_rate": 0.10}},
        "axes": {
            "market": {"kind": "fixed", "levels": ["harbor", "upland"]},
            "tenure": {"kind": "counter", "size": 3, "advance_while": "member", "reset_on": ["join", "lapse"]},
            "season": {"kind": "cycle", "levels": ["high", "low"]},
            "status": {"kind": "status", "levels": ["prospect", "lapsed", "solo", "duo"], "members": ["solo", "duo"],
                       "given": ["market", "season", "status", "engagement"], "moves": moves},
            "engagement": {"kind": "chance", "levels": ["none", "light", "keen"],
                           "given": ["next.status", "engagement"]},
        },
        "rewards": {"revenue": {"price": {"solo": 29.0, "duo": 49.0}}},
    }, source="test")
    v = Valuer.build(compile_model(spec, {"status": P, "engagement": tables["engagement"]}, source="test"))
    out = sm.report_summary(v.solved, "revenue")
    duo = [s for s in out["value_by_tenure"]["series"] if s["plan"] == "duo"]
    assert duo and all(not s["sold"] and "no move the spec allows leads there" in s["note"] for s in duo)
    assert out["acquisition"]["not_joinable"] == ["duo"]
    assert out["plan_upgrade"]["rows"] == []  # solo -> duo is not an allowed move


def test_few_draws_carry_the_interval_note():
    valuer = Valuer.build(tiny_model(draws=5))
    out = sm.report_summary(valuer.solved, "revenue", top=3)
    prospect = {"market": "harbor", "tenure": "0", "status": "prospect", "engagement": "none"}
    # a query refuses the level (one line naming the field); the page shows its figures without
    # intervals and says why
    with pytest.raises(QueryError, match="at least 20 posterior draws") as e:
        valuer.acquisition(prospect, "solo", "revenue")
    assert e.value.field == "level"
    note = out["interval_note"]
    assert note.startswith("no intervals: 5 posterior draws")
    for name in ("value_by_tenure", "acquisition", "plan_upgrade", "marginal"):
        assert out[name]["interval_note"] == note
    assert all(r.get("interval") is None for r in out["acquisition"]["rows"])


def test_bad_arguments_and_the_extra_section_slot(season):
    solved = season[0].solved
    with pytest.raises(QueryError, match="unknown reward stream"):
        sm.report_summary(solved, "profit")
    with pytest.raises(QueryError, match="extra sections are backtest"):
        sm.report_summary(solved, extra={"forecast": {}})
    with pytest.raises(QueryError, match="top must be at least 1"):
        sm.marginal_ranked(solved, "revenue", top=0)
    out = sm.report_summary(solved, extra={"backtest": {"observed": 1.0}})
    assert out["backtest"] == {"observed": 1.0}
    assert sm.report_summary(solved)["backtest"] is None


def test_pool_marginal_sums_over_cycle_cells_and_ranks():
    from stateworth.valuation import MarginalEntry

    e = [MarginalEntry("status", {"market": "n", "month": m, "status": "lapsed"}, "basic", p, v, 0.0)
         for m, p, v in (("jan", 0.02, 3.0), ("feb", 0.01, 2.0))]
    e.append(MarginalEntry("status", {"market": "s", "month": "jan", "status": "lapsed"}, "basic", 0.03, -6.0, 0.0))
    pooled = sm.pool_marginal(e, ["month"])
    assert [(g["cell"]["market"], g["cells"], g["per_point"]) for g in pooled] == [("s", 1, -6.0), ("n", 2, 5.0)]
    assert pooled[1]["probability_range"] == [0.01, 0.02] and "month" not in pooled[1]["cell"]
    assert len(sm.pool_marginal(e, [])) == 3


def test_short_labels():
    e = {"axis": "status", "cell": {"market": "harbor", "status": "lapsed", "engagement": "none"}, "to": "duo"}
    assert sm.short_label(e, ["market"], "status") == "lapsed \u2192 duo \u00b7 harbor \u00b7 engagement none"
    assert sm.entry_label(e) == "P(status'=duo | market=harbor, status=lapsed, engagement=none)"
    stay = {**e, "to": "lapsed"}
    assert sm.short_label(stay, ["market"], "status").startswith("stays lapsed")
    eng = {"axis": "engagement", "cell": {"next.status": "solo", "engagement": "light"}, "to": "keen"}
    assert sm.short_label(eng, [], "status") == "light \u2192 keen \u00b7 next status solo"
