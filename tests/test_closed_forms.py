"""Closed forms from docs/references.md, solved through a spec (spec -> compile -> solve).

Each check names its source and how the reference value was obtained.
"""

from __future__ import annotations

import numpy as np
import pytest

from stateworth.rules import compile_model, parse_spec
from stateworth.solver import solve


def retention_spec(r: float, i: float, m: float, cash: str = "start") -> dict:
    """Member with retention r a period, lost for good (no re-join), margin m per member period;
    one period is one year so that i is the per-period rate."""
    return {
        "model": {"name": "retention", "period": "year", "discount": {"annual_rate": i, "cash": cash}},
        "axes": {"status": {
            "kind": "status", "levels": ["lost", "member"], "members": ["member"], "given": ["status"],
            "moves": {"lost": ["lost"], "member": ["lost", "member"]},
            "table": [{"when": {"status": "lost"}, "probs": {"lost": 1.0}},
                      {"when": {"status": "member"}, "probs": {"lost": 1.0 - r, "member": r}}]}},
        "rewards": {"margin": {"price": {"member": m}}},
    }


# Gupta & Lehmann, "Managing Customers as Investments" (2005); also J. Interactive Marketing
# 17(1), 2003: margin multiple r / (1 + i - r). The two-decimal values below are those listed in
# docs/references.md, "computed from the published formula (the printed table is recalled from
# memory)".
GUPTA_LEHMANN = [
    (0.10, 0.60, 1.20), (0.10, 0.70, 1.75), (0.10, 0.80, 2.67), (0.10, 0.90, 4.50),
    (0.12, 0.80, 2.50), (0.12, 0.90, 4.09), (0.14, 0.80, 2.35), (0.16, 0.80, 2.22), (0.16, 0.90, 3.46),
]


@pytest.mark.parametrize("i,r,table_value", GUPTA_LEHMANN)
def test_retention_margin_multiple(i, r, table_value):
    m = 100.0
    model = compile_model(parse_spec(retention_spec(r, i, m)))
    v = solve(model, "margin", method="dense").value("margin")
    member = model.grid.flat_index({"status": "member"})
    lost = model.grid.flat_index({"status": "lost"})
    # Gupta & Lehmann (2005): start-of-period cash, V = m (1 + i) / (1 + i - r), so V/m - 1 is
    # the multiple r / (1 + i - r); computed from the published formula.
    closed = m * (1 + i) / (1 + i - r)
    assert v[member] == pytest.approx(closed, rel=1e-10)
    assert v[member] / m - 1 == pytest.approx(r / (1 + i - r), rel=1e-10)
    assert abs(v[lost]) <= 1e-12 * m  # lost for good: worth nothing (up to rounding of the LU solve)
    # the two-decimal table of docs/references.md (computed there from the same formula)
    assert abs(v[member] / m - 1 - table_value) <= 0.005 + 1e-12


def test_retention_margin_multiple_end_of_period_cash():
    """Cash at the end of each period: every amount is discounted once more, V = m / (1 + i - r)
    (same geometric series as above, Gupta & Lehmann 2005; computed from the published formula)."""
    i, r, m = 0.12, 0.85, 40.0
    model = compile_model(parse_spec(retention_spec(r, i, m, cash="end")))
    v = solve(model, "margin", method="dense").value("margin")
    assert v[model.grid.flat_index({"status": "member"})] == pytest.approx(m / (1 + i - r), rel=1e-10)


def test_rate_conversion():
    # docs/references.md "rate conversion", standard finance (arithmetic): 10 % a year is
    # 1.10^(1/12) - 1 = 0.0079741 a month, beta = 0.9920889 (both printed to 7 decimals there).
    spec = parse_spec(two_state_spec(0.1, 0.1, 1.0))
    assert spec.beta == pytest.approx(1.10 ** (-1 / 12), rel=1e-15)
    assert abs(spec.beta - 0.9920889) < 5e-8
    assert abs(1 / spec.beta - 1 - 0.0079741) < 5e-8
    # other periods: the rate is spread over the periods of a year
    for period, k in (("week", 52), ("quarter", 4), ("year", 1)):
        d = two_state_spec(0.1, 0.1, 1.0)
        d["model"]["period"] = period
        assert parse_spec(d).beta == pytest.approx(1.10 ** (-1 / k), rel=1e-15)


def two_state_spec(p: float, c: float, m: float, markets: dict[str, float] | None = None) -> dict:
    """Non-member joins with probability p, member churns with probability c, margin m a month.
    With ``markets`` (level -> margin) a fixed market axis carries the price, and a tenure
    counter that no table reads rides along: neither may change the two-state values."""
    spec = {
        "model": {"name": "two-state", "discount": {"annual_rate": 0.10, "cash": "start"}},
        "axes": {"status": {
            "kind": "status", "levels": ["non_member", "member"], "members": ["member"], "given": ["status"],
            "table": [{"when": {"status": "non_member"}, "probs": {"non_member": 1 - p, "member": p}},
                      {"when": {"status": "member"}, "probs": {"non_member": c, "member": 1 - c}}]}},
        "rewards": {"margin": {"price": {"member": m}}},
    }
    if markets:
        spec["axes"] = {"market": {"kind": "fixed", "levels": list(markets)},
                        "tenure": {"kind": "counter", "size": 4, "advance_while": "member",
                                   "reset_on": ["join", "lapse"]},
                        **spec["axes"]}
        spec["rewards"]["margin"]["price"] = {"member": dict(markets)}
    return spec


def two_state_closed_form(p: float, c: float, m: float, b: float) -> tuple[float, float]:
    # docs/references.md "member / non-member two-state chain", derived from the geometric
    # series (join p, churn c, margin m, start-of-period cash); computed from that formula:
    # V_M = m (1 - b (1 - p)) / ((1 - b (1 - c)) (1 - b (1 - p)) - b^2 c p),
    # V_N = b p V_M / (1 - b (1 - p)).
    vm = m * (1 - b * (1 - p)) / ((1 - b * (1 - c)) * (1 - b * (1 - p)) - b * b * c * p)
    vn = b * p * vm / (1 - b * (1 - p))
    return vn, vm


@pytest.mark.parametrize("p,c", [(0.02, 0.05), (0.005, 0.03), (0.3, 0.5)])
def test_two_state_chain(p, c):
    m = 30.0
    model = compile_model(parse_spec(two_state_spec(p, c, m)))
    vn, vm = two_state_closed_form(p, c, m, model.beta)
    g = model.grid
    for method, tol in (("dense", 1e-10), ("gmres", 1e-13)):
        v = solve(model, "margin", method=method, tol=tol).value("margin")
        assert v[g.flat_index({"status": "member"})] == pytest.approx(vm, rel=1e-10), method
        assert v[g.flat_index({"status": "non_member"})] == pytest.approx(vn, rel=1e-10), method
    # member-months: the same chain with m = 1
    mm = solve(model, "member_months", method="dense").value("member_months")
    assert mm[g.flat_index({"status": "member"})] == pytest.approx(two_state_closed_form(p, c, 1.0, model.beta)[1],
                                                                   rel=1e-10)


def test_two_state_chain_hand_arithmetic():
    """The closed form itself against the Bellman equations solved by hand (2 x 2):
    V_N = b ((1-p) V_N + p V_M), V_M = m + b (c V_N + (1-c) V_M)."""
    p, c, m, b = 0.04, 0.07, 12.0, 0.99
    A = np.array([[1 - b * (1 - p), -b * p], [-b * c, 1 - b * (1 - c)]])
    vn, vm = np.linalg.solve(A, [0.0, m])
    assert two_state_closed_form(p, c, m, b) == pytest.approx((vn, vm), rel=1e-12)


def test_two_state_chain_with_fixed_axis_and_counter():
    """The compiler on a bigger grid: each market's values are the two-state closed form with that
    market's margin, whatever the tenure."""
    p, c = 0.02, 0.05
    markets = {"east": 20.0, "west": 35.0, "hills": 50.0}
    model = compile_model(parse_spec(two_state_spec(p, c, 0.0, markets)))
    assert model.n_states == 3 * 4 * 2
    v = solve(model, "margin", method="dense").value("margin")
    g = model.grid
    for mk, m in markets.items():
        vn, vm = two_state_closed_form(p, c, m, model.beta)
        for t in range(4):
            assert v[g.flat_index({"market": mk, "tenure": t, "status": "member"})] == pytest.approx(vm, rel=1e-10)
            assert v[g.flat_index({"market": mk, "tenure": t, "status": "non_member"})] == pytest.approx(vn, rel=1e-10)
