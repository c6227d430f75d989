"""The spec's rules on hand-made cases: written tables, moves, not_sold, fixed axes, counters,
cycles and factors given next values, checked entry by entry against hand computation."""

from __future__ import annotations

import numpy as np
import pytest

from stateworth.rules import compile_model, parse_spec
from stateworth.rules.counters import counter_index


def _state(model, **coords):
    return model.grid.flat_index(coords)


# ---- the bundled example (examples/fitness.toml), read as a user would ----

@pytest.fixture(scope="module")
def P(example_model):
    return example_model.csr()


def test_hand_computed_upgrade_entry(example_model, P):
    """solo with regular engagement in harbor, January, tenure 3 -> duo with keen engagement:
    status row 'solo, engagement regular/keen' gives duo 0.03; engagement given next status duo
    (a member) and regular gives keen 0.15; tenure ages to 4 (no join or lapse); month -> feb."""
    m = example_model
    s = _state(m, market="harbor", tenure=3, month="jan", status="solo", engagement="regular")
    t = _state(m, market="harbor", tenure=4, month="feb", status="duo", engagement="keen")
    assert P[s, t] == pytest.approx(0.03 * 0.15, rel=1e-14)


def test_hand_computed_lapse_entry(example_model, P):
    """solo who stopped coming (engagement none) lapses with 0.15; a lapsed member attends
    nothing; tenure resets to 0 on lapse; December wraps to January."""
    m = example_model
    s = _state(m, market="coast", tenure=5, month="dec", status="solo", engagement="none")
    t = _state(m, market="coast", tenure=0, month="jan", status="lapsed", engagement="none")
    assert P[s, t] == pytest.approx(0.15, rel=1e-14)
    assert P[s].sum() == pytest.approx(1.0, abs=1e-12)


def test_hand_computed_join_entry(example_model, P):
    """A prospect in January joins solo with 0.02 (the new-year row overrides the prospect row);
    engagement of a new member from none: light 0.6; tenure 0 in the month of joining."""
    m = example_model
    s = _state(m, market="upland", tenure=7, month="jan", status="prospect", engagement="none")
    t = _state(m, market="upland", tenure=0, month="feb", status="solo", engagement="light")
    assert P[s, t] == pytest.approx(0.02 * 0.6, rel=1e-14)
    # the same prospect in March uses the plain prospect row (solo 0.010)
    s = _state(m, market="upland", tenure=7, month="mar", status="prospect", engagement="none")
    t = _state(m, market="upland", tenure=0, month="apr", status="solo", engagement="light")
    assert P[s, t] == pytest.approx(0.010 * 0.6, rel=1e-14)


def _coords(m, P):
    coo = P.tocoo()
    g = m.grid
    cur = dict(zip(g.names, np.unravel_index(coo.row, g.shape)))
    nxt = dict(zip(g.names, np.unravel_index(coo.col, g.shape)))
    return g, cur, nxt


def test_studio_only_from_its_neighbour_and_not_in_delta(example_model, P):
    """moves: prospects reach studio only by upgrading from duo (never directly), solo cannot
    jump to studio; not_sold: no mass ever moves into studio in delta."""
    g, cur, nxt = _coords(example_model, P)
    st = g.axis("status").levels
    into_studio = nxt["status"] == st.index("studio")
    assert into_studio.any()
    assert not (into_studio & (cur["status"] == st.index("prospect"))).any()
    assert not (into_studio & (cur["status"] == st.index("solo"))).any()
    assert not (into_studio & (cur["market"] == g.axis("market").levels.index("delta"))).any()
    # and the neighbour move does carry mass
    assert (into_studio & (cur["status"] == st.index("duo"))).any()


def test_fixed_axis_never_changes_and_cycle_advances(example_model, P):
    g, cur, nxt = _coords(example_model, P)
    np.testing.assert_array_equal(cur["market"], nxt["market"])
    np.testing.assert_array_equal(nxt["month"], (cur["month"] + 1) % 12)


def test_engagement_moves_one_band_at_a_time(example_model, P):
    g, cur, nxt = _coords(example_model, P)
    assert np.abs(nxt["engagement"].astype(int) - cur["engagement"].astype(int)).max() == 1


# ---- written tables: override order, lists, defaults ----

def _table_spec(rows):
    return {
        "model": {"name": "rows", "discount": {"annual_rate": 0.1}},
        "axes": {"region": {"kind": "fixed", "levels": ["n", "s", "e"]},
                 "status": {"kind": "status", "levels": ["out", "in"], "members": ["in"],
                            "given": ["status", "region"], "table": rows}},
    }


def test_later_rows_override_and_lists_and_defaults():
    rows = [
        {"probs": {"out": 0.5, "in": 0.5}},  # no 'when': every cell
        {"when": {"status": "in"}, "probs": {"out": 0.1, "in": 0.9}},
        {"when": {"status": "in", "region": ["s", "e"]}, "probs": {"out": 0.2, "in": 0.8}},
        {"when": {"region": "e"}, "probs": {"in": 1.0}},  # levels left out have probability 0
    ]
    t = compile_model(parse_spec(_table_spec(rows))).tables["status"]  # (status, region, status')
    np.testing.assert_array_equal(t[0, 0], [0.5, 0.5])
    np.testing.assert_array_equal(t[0, 1], [0.5, 0.5])
    np.testing.assert_array_equal(t[1, 0], [0.1, 0.9])
    np.testing.assert_array_equal(t[1, 1], [0.2, 0.8])
    np.testing.assert_array_equal(t[0, 2], [0.0, 1.0])
    np.testing.assert_array_equal(t[1, 2], [0.0, 1.0])


def test_row_order_matters():
    rows = [{"when": {"status": "in", "region": "n"}, "probs": {"out": 0.3, "in": 0.7}},
            {"probs": {"out": 0.5, "in": 0.5}}]
    t = compile_model(parse_spec(_table_spec(rows))).tables["status"]
    np.testing.assert_array_equal(t[1, 0], [0.5, 0.5])  # the later default row wins


# ---- counters: ageing and resets, by hand ----

def _counter_spec(**counter):
    return parse_spec({
        "model": {"name": "c", "discount": {"annual_rate": 0.1}},
        "axes": {"k": {"kind": "counter", "size": 3, **counter},
                 "status": {"kind": "status", "levels": ["prospect", "lapsed", "solo", "duo"],
                            "members": ["solo", "duo"], "given": ["status"]}},
    })


P_, L_, S_, D_ = range(4)


def test_tenure_counter():
    """advance_while member, reset on join and lapse: +1 each member period, capped at 2."""
    idx = counter_index(_counter_spec(advance_while="member", reset_on=["join", "lapse"]), "k")
    assert idx.shape == (3, 4, 4)
    assert list(idx[:, S_, S_]) == [1, 2, 2]  # ages, capped at the last level
    assert list(idx[:, S_, D_]) == [1, 2, 2]  # a plan change is neither join nor lapse
    assert list(idx[:, P_, S_]) == [0, 0, 0]  # join
    assert list(idx[:, L_, D_]) == [0, 0, 0]  # re-join
    assert list(idx[:, D_, L_]) == [0, 0, 0]  # lapse
    assert list(idx[:, L_, L_]) == [0, 1, 2]  # holds while not a member
    assert list(idx[:, L_, P_]) == [0, 1, 2]


def test_months_since_lapse_counter():
    """advance_while non_member, reset on lapse: counts periods out, from 0 in the lapse month."""
    idx = counter_index(_counter_spec(advance_while="non_member", reset_on=["lapse"]), "k")
    assert list(idx[:, S_, L_]) == [0, 0, 0]  # lapse
    assert list(idx[:, L_, L_]) == [1, 2, 2]
    assert list(idx[:, L_, S_]) == [0, 1, 2]  # re-join: next status is a member, holds
    assert list(idx[:, S_, S_]) == [0, 1, 2]


def test_change_event_and_level_list():
    """reset on any status change; advance while the next status is duo (a list of levels)."""
    idx = counter_index(_counter_spec(advance_while=["duo"], reset_on=["change"]), "k")
    assert list(idx[:, D_, D_]) == [1, 2, 2]
    assert list(idx[:, S_, S_]) == [0, 1, 2]
    for a in range(4):
        for b in range(4):
            if a != b:
                assert list(idx[:, a, b]) == [0, 0, 0]


def test_counter_defaults_always_advance_never_reset():
    idx = counter_index(_counter_spec(), "k")
    assert (idx == np.minimum(np.arange(3) + 1, 2)[:, None, None]).all()


def test_counter_in_the_operator():
    """Through the compiled operator: tenure is 0 after joining and ages while a member."""
    spec = parse_spec({
        "model": {"name": "c", "discount": {"annual_rate": 0.1}},
        "axes": {"tenure": {"kind": "counter", "size": 3, "advance_while": "member", "reset_on": ["join"]},
                 "status": {"kind": "status", "levels": ["out", "in"], "members": ["in"], "given": ["status"],
                            "table": [{"when": {"status": "out"}, "probs": {"out": 0.75, "in": 0.25}},
                                      {"when": {"status": "in"}, "probs": {"out": 0.125, "in": 0.875}}]}},
    })
    m = compile_model(spec)
    P = m.csr().toarray()
    s = lambda t, st: _state(m, tenure=t, status=st)  # noqa: E731
    assert P[s(2, "out"), s(0, "in")] == 0.25  # join resets
    assert P[s(2, "out"), s(2, "out")] == 0.75  # holds while out
    assert P[s(1, "in"), s(2, "in")] == 0.875  # ages
    assert P[s(2, "in"), s(2, "in")] == 0.875  # capped
    assert P[s(1, "in"), s(1, "out")] == 0.125  # no reset on lapse here: holds (next status is out)


def test_factor_given_next_value():
    """A chance axis given next.status: its row is chosen by where the status goes, not where it
    was; P(s -> s') is the product of the two factors."""
    spec = parse_spec({
        "model": {"name": "n", "discount": {"annual_rate": 0.1}},
        "axes": {"status": {"kind": "status", "levels": ["out", "in"], "members": ["in"], "given": ["status"],
                            "table": [{"when": {"status": "out"}, "probs": {"out": 0.6, "in": 0.4}},
                                      {"when": {"status": "in"}, "probs": {"out": 0.3, "in": 0.7}}]},
                 "use": {"kind": "chance", "levels": ["lo", "hi"], "given": ["next.status", "use"],
                         "table": [{"when": {"next.status": "out"}, "probs": {"lo": 1.0}},
                                   {"when": {"next.status": "in", "use": "lo"}, "probs": {"lo": 0.5, "hi": 0.5}},
                                   {"when": {"next.status": "in", "use": "hi"}, "probs": {"lo": 0.2, "hi": 0.8}}]}},
    })
    m = compile_model(spec)
    P = m.csr().toarray()
    s = lambda st, u: _state(m, status=st, use=u)  # noqa: E731
    assert P[s("out", "hi"), s("in", "hi")] == pytest.approx(0.4 * 0.8)
    assert P[s("out", "hi"), s("out", "hi")] == 0.0
    assert P[s("in", "lo"), s("out", "lo")] == pytest.approx(0.3)
    assert P[s("in", "lo"), s("in", "hi")] == pytest.approx(0.7 * 0.5)
