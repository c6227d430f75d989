"""The counter the counting query derives, in both SQL forms (one running MAX when a counter
advances steadily between resets, two running sums otherwise), against iterating the spec's
counter index map row by row over each account's history (the definition, common practice with
no source), for counters of every reset / advance kind."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from stateworth.rules import load_spec
from stateworth.estimation.counts import count_duckdb, counter_start, steady_between_resets
from stateworth.rules.counters import counter_index
from stateworth.estimation.panel import load_panel
from stateworth.estimation.simulate import simulate_panel, write_simulation

SPEC = Path(__file__).parent / "data" / "mini_fitness.toml"
TENURE = 'advance_while = "member"\nreset_on = ["join", "lapse"]\n'

# (advance_while, reset_on, steady between resets?)
CASES = [
    ('"member"', '["join", "lapse"]', True),  # tenure
    ('"non_member"', '["lapse"]', False),  # months since lapse: a re-join does not reset it
    ('"non_member"', '["join", "lapse"]', True),
    ('"always"', '["join"]', True),  # months since the first join
    ('"member"', '["join"]', False),  # tenure frozen while lapsed
    ('["plus"]', '["change"]', True),  # months on the plus plan
    ('["plus"]', '["join", "lapse"]', False),
]


@pytest.fixture(scope="module")
def panel_csv(tmp_path_factory):
    d = tmp_path_factory.mktemp("counts")
    spec = load_spec(SPEC)
    p, _ = write_simulation(simulate_panel(spec, 400, 10, seed=5), d / "panel.csv")
    return p, d


def _expected(spec, df: pd.DataFrame) -> dict[tuple[int, int], int]:
    idx = counter_index(spec, "tenure")
    st = spec.axis_levels("status")
    out: dict[tuple[int, int], int] = {}
    for _, g in df.sort_values(["account", "period"]).groupby("account"):
        prev_s, c, prev_c = st.index("prospect"), counter_start(spec, "tenure"), None
        for s in g["status"].map(st.index):
            c = int(idx[c, prev_s, s])
            if prev_c is not None:
                out[(prev_c, prev_s)] = out.get((prev_c, prev_s), 0) + 1
            prev_c, prev_s = c, s
    return out


@pytest.mark.parametrize("advance, reset, steady", CASES)
def test_counter_forms_match_row_iteration(panel_csv, advance, reset, steady):
    path, d = panel_csv
    text = SPEC.read_text()
    assert TENURE in text
    spec_path = d / f"spec_{abs(hash((advance, reset)))}.toml"
    spec_path.write_text(text.replace(TENURE, f"advance_while = {advance}\nreset_on = {reset}\n"))
    spec = load_spec(spec_path)
    assert steady_between_resets(spec, "tenure") is steady
    pan = load_panel(spec, path)
    df = pd.read_csv(path, dtype=str)
    expect = _expected(spec, df)
    grid = spec.grid_order
    ti, si = grid.index("tenure"), grid.index("status")
    for general in (False, True):
        joint = count_duckdb(spec, pan.con, "coded", general=general)
        got: dict[tuple[int, int], int] = {}
        for row, n in zip(joint.cur, joint.n):
            key = (int(row[ti]), int(row[si]))
            got[key] = got.get(key, 0) + int(n)
        assert got == expect, f"general={general}"
    assert len(set(k[0] for k in expect)) > 1  # the counter actually moves in this panel
