"""Reward streams against hand computation on a tiny model (2 markets x 4 statuses x 2 bands).

The Bellman reward of a stream is ``r = c + beta E[a | s]`` with cash at the start of a period and
``r = beta (c + E[a | s])`` at its end, where ``c`` is the per-period cash (price by plan and
market, times 1 - fees_share, minus costs by the band level, in member periods) and ``a`` the
one-off amounts on status moves (on_join, on_lapse, on_move; they add up where they overlap).
"""

from __future__ import annotations

import copy
import itertools

import numpy as np
import pytest

from stateworth.rules import compile_model, parse_spec
from stateworth.solver import solve

STATUS = ["prospect", "lapsed", "basic", "plus"]
MEMBERS = {"basic", "plus"}
T = {  # status transition table, rows = current status, hand-written
    "prospect": {"prospect": 0.9, "basic": 0.1},
    "lapsed": {"lapsed": 0.8, "basic": 0.15, "plus": 0.05},
    "basic": {"lapsed": 0.1, "basic": 0.8, "plus": 0.1},
    "plus": {"lapsed": 0.05, "basic": 0.15, "plus": 0.8},
}
PRICE = {"basic": {"north": 10.0, "south": 10.0}, "plus": {"north": 20.0, "south": 25.0}}
FEES = 0.2
COSTS = {"low": 1.0, "high": 3.0}
ON_JOIN, ON_LAPSE = -5.0, 2.0
WIN_BACK = -4.0  # lapsed -> a plan
UPGRADE = 1.5  # basic -> plus

SPEC = {
    "model": {"name": "rewards", "discount": {"annual_rate": 0.10, "cash": "start"}},
    "axes": {
        "market": {"kind": "fixed", "levels": ["north", "south"]},
        "status": {"kind": "status", "levels": STATUS, "members": ["basic", "plus"], "given": ["status"],
                   "table": [{"when": {"status": s}, "probs": row} for s, row in T.items()]},
        "band": {"kind": "chance", "levels": ["low", "high"], "given": ["next.status"],
                 "table": [{"probs": {"low": 0.6, "high": 0.4}},
                           {"when": {"next.status": ["prospect", "lapsed"]}, "probs": {"low": 1.0}}]},
    },
    "rewards": {
        "revenue": {"price": {"basic": 10.0, "plus": {"north": 20.0, "south": 25.0}}, "fees_share": FEES},
        "margin": {"price": {"basic": 10.0, "plus": {"north": 20.0, "south": 25.0}}, "fees_share": FEES,
                   "costs": {"band": COSTS}},
        "offers": {"on_join": ON_JOIN, "on_lapse": ON_LAPSE,
                   "on_move": [{"from": ["lapsed"], "to": ["basic", "plus"], "amount": WIN_BACK},
                               {"from": ["basic"], "to": ["plus"], "amount": UPGRADE}]},
        "everything": {"price": {"basic": 10.0, "plus": {"north": 20.0, "south": 25.0}}, "fees_share": FEES,
                       "costs": {"band": COSTS}, "on_join": ON_JOIN, "on_lapse": ON_LAPSE,
                       "on_move": [{"from": ["lapsed"], "to": ["basic", "plus"], "amount": WIN_BACK}]},
    },
}


def amount(frm: str, to: str, stream: str) -> float:
    """The one-off amount of a status move, by hand."""
    if stream not in ("offers", "everything"):
        return 0.0
    a = 0.0
    if frm not in MEMBERS and to in MEMBERS:
        a += ON_JOIN
    if frm in MEMBERS and to not in MEMBERS:
        a += ON_LAPSE
    if frm == "lapsed" and to in MEMBERS:
        a += WIN_BACK
    if stream == "offers" and frm == "basic" and to == "plus":
        a += UPGRADE
    return a


def cash(market: str, status: str, band: str, stream: str) -> float:
    if status not in MEMBERS or stream == "offers":
        return 0.0
    c = PRICE[status][market] * (1 - FEES)
    if stream in ("margin", "everything"):
        c -= COSTS[band]
    return c


def expected(model, stream: str, timing: str) -> np.ndarray:
    b = model.beta
    out = np.zeros(model.n_states)
    for mk, s, bd in itertools.product(["north", "south"], STATUS, ["low", "high"]):
        c = cash(mk, s, bd, stream)
        ea = sum(p * amount(s, to, stream) for to, p in T[s].items())
        i = model.grid.flat_index({"market": mk, "status": s, "band": bd})
        out[i] = c + b * ea if timing == "start" else b * (c + ea)
    return out


@pytest.fixture(scope="module", params=["start", "end"])
def model(request):
    spec = copy.deepcopy(SPEC)
    spec["model"]["discount"]["cash"] = request.param
    return compile_model(parse_spec(spec)), request.param


@pytest.mark.parametrize("stream", ["revenue", "margin", "offers", "everything"])
def test_reward_vectors_by_hand(model, stream):
    m, timing = model
    np.testing.assert_allclose(m.rewards[stream], expected(m, stream, timing), rtol=0, atol=1e-12)


def test_price_by_plan_and_market_and_fees(model):
    m, timing = model
    g = m.grid
    scale = 1.0 if timing == "start" else m.beta
    r = m.rewards["revenue"]
    assert r[g.flat_index({"market": "south", "status": "plus", "band": "high"})] == pytest.approx(25 * 0.8 * scale)
    assert r[g.flat_index({"market": "north", "status": "plus", "band": "low"})] == pytest.approx(20 * 0.8 * scale)
    assert r[g.flat_index({"market": "north", "status": "basic", "band": "low"})] == pytest.approx(10 * 0.8 * scale)
    assert r[g.flat_index({"market": "north", "status": "lapsed", "band": "low"})] == 0.0


def test_costs_by_band_level(model):
    m, timing = model
    g = m.grid
    scale = 1.0 if timing == "start" else m.beta
    diff = m.rewards["revenue"] - m.rewards["margin"]
    for s, bd in itertools.product(STATUS, ["low", "high"]):
        i = g.flat_index({"market": "north", "status": s, "band": bd})
        assert diff[i] == pytest.approx((COSTS[bd] if s in MEMBERS else 0.0) * scale)


def test_one_off_amounts(model):
    """prospect: joins with 0.1 -> E[a] = 0.1 * on_join; lapsed: joins with 0.2, each join
    also a win-back; basic: lapses with 0.1, upgrades with 0.1."""
    m, timing = model
    g, b = m.grid, m.beta
    r = m.rewards["offers"]
    at = {s: r[g.flat_index({"market": "south", "status": s, "band": "low"})] for s in STATUS}
    assert at["prospect"] == pytest.approx(b * 0.1 * ON_JOIN)
    assert at["lapsed"] == pytest.approx(b * 0.2 * (ON_JOIN + WIN_BACK))
    assert at["basic"] == pytest.approx(b * (0.1 * ON_LAPSE + 0.1 * UPGRADE))
    assert at["plus"] == pytest.approx(b * 0.05 * ON_LAPSE)


def test_member_months(model):
    m, timing = model
    scale = 1.0 if timing == "start" else m.beta
    st = m.grid.codes()[m.grid.position("status")]
    want = np.where(np.isin(st, [STATUS.index("basic"), STATUS.index("plus")]), scale, 0.0)
    np.testing.assert_array_equal(m.rewards["member_months"], want)
    assert set(m.rewards) == {"revenue", "margin", "offers", "everything", "member_months"}


def test_end_of_period_cash_is_discounted_once_more():
    """Per-period cash at period end is worth beta times the same cash at period start; one-off
    amounts are paid on entering the new status (the start of the next period, which is the end
    of this one) and so are discounted once under either timing."""
    start = compile_model(parse_spec(SPEC))
    spec = copy.deepcopy(SPEC)
    spec["model"]["discount"]["cash"] = "end"
    end = compile_model(parse_spec(spec))
    per_period = ["revenue", "margin", "member_months"]
    vs = solve(start, per_period, method="dense").values
    ve = solve(end, per_period, method="dense").values
    np.testing.assert_allclose(ve, start.beta * vs, rtol=1e-10)
    np.testing.assert_allclose(end.rewards["offers"], start.rewards["offers"], rtol=0, atol=0)
