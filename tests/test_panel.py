"""Panel and market-size table: every kind of bad input is an error naming file, row and column;
counters derived from the history match the spec's counter index map."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pandas as pd
import pytest

from stateworth.errors import PanelError
from stateworth.rules import load_spec
from stateworth.estimation.counts import count_duckdb, counter_start
from stateworth.estimation.fit import FitOptions, fit_panel, fit_to_dir
from stateworth.rules.counters import counter_index
from stateworth.estimation.panel import check_panel, load_markets, load_panel
from stateworth.estimation.simulate import simulate_panel, write_simulation

SPEC = Path(__file__).parent / "data" / "mini_fitness.toml"


@pytest.fixture(scope="module")
def spec():
    return load_spec(SPEC)


@pytest.fixture(scope="module")
def files(spec, tmp_path_factory):
    d = tmp_path_factory.mktemp("panel")
    sim = simulate_panel(spec, 600, 8, seed=3)
    p, m = write_simulation(sim, d / "panel.csv")
    return pd.read_csv(p, dtype=str), pd.read_csv(m), d


def _write(df: pd.DataFrame, d: Path, name: str) -> str:
    path = d / name
    df.to_csv(path, index=False)
    return str(path)


def _err(spec, panel, markets=None, **kw) -> PanelError:
    with pytest.raises(PanelError) as ei:
        pan = load_panel(spec, panel, **kw)
        if markets is not None:
            load_markets(spec, markets, pan)
    return ei.value


def test_clean_panel_loads(spec, files):
    df, mk, d = files
    p = _write(df, d, "ok.csv")
    m = _write(mk, d, "ok.markets.csv")
    pan = load_panel(spec, p)
    assert pan.rows == len(df) and pan.accounts == df["account"].nunique()
    assert load_markets(spec, m, pan).size.shape[0] == 2
    assert check_panel(spec, p, m) == []


def test_missing_column(spec, files):
    df, _, d = files
    p = _write(df.drop(columns=["engagement"]), d, "missing.csv")
    e = _err(spec, p)
    assert "missing.csv" in str(e) and "engagement" in str(e)


def test_unknown_level(spec, files):
    df, _, d = files
    bad = df.copy()
    bad.loc[5, "engagement"] = "medium"
    e = _err(spec, _write(bad, d, "level.csv"))
    assert "level.csv: row 6 (line 7), column engagement" in str(e) and "low, high" in str(e)
    assert "medium" not in str(e)  # the row and column are named, the value never (it could be an identifier)


def test_a_file_without_a_header_row_is_described_by_positions_and_counts(spec, files):
    df, _, d = files
    path = d / "nohead.csv"
    df.to_csv(path, index=False, header=False)
    e = _err(spec, str(path))
    msg = str(e)
    assert "missing required column(s) account, period" in msg
    assert "the header row has 6 column(s); 6 with other names at position(s) 1, 2, 3, 4, 5, 6 (not shown)" in msg
    assert "is the header row missing?" in msg
    assert df.iloc[0]["period"] not in msg  # the first data row, taken for a header, is not printed
    named = d / "renamed.csv"
    df.rename(columns={"engagement": "band", "period": "month"}).to_csv(named, index=False)
    msg = str(_err(spec, str(named)))
    assert "missing required column(s) period, engagement" in msg
    assert "named account, market, status, revenue; 2 with other names at position(s) 2, 5 (not shown)" in msg


@pytest.mark.parametrize("kind", ["csv", "parquet"])
def test_a_panel_without_data_rows_is_a_user_error(spec, files, kind):
    df, _, d = files
    path = d / f"empty.{kind}"
    if kind == "csv":
        df.iloc[:0].to_csv(path, index=False)
    else:
        df.iloc[:0].to_parquet(path)
    e = _err(spec, str(path))
    assert f"empty.{kind}" in str(e) and "no data rows" in str(e)
    assert check_panel(spec, str(path), None) == [str(e)]


def test_never_member_rows_refused(spec, files):
    df, _, d = files
    bad = df.copy()
    bad.loc[2, "status"] = "prospect"
    e = _err(spec, _write(bad, d, "prospect.csv"))
    assert "row 3 (line 4), column status" in str(e) and "never joined" in str(e)


def test_duplicate_account_period(spec, files):
    df, _, d = files
    bad = pd.concat([df, df.iloc[[10]]], ignore_index=True)
    e = _err(spec, _write(bad, d, "dup.csv"))
    assert f"row {len(bad)} (line {len(bad) + 1}), columns account, period" in str(e) and "same account and period" in str(e)
    assert df.iloc[10]["account"] not in str(e).split("row")[0]  # no account id printed


def test_unparsable_period(spec, files):
    df, _, d = files
    bad = df.copy()
    bad.loc[7, "period"] = "2024/03"
    e = _err(spec, _write(bad, d, "period.csv"))
    assert "row 8 (line 9), column period" in str(e) and "YYYY-MM" in str(e) and "2024/03" not in str(e)


def test_gap_policy(spec, files):
    df, mk, d = files
    # drop a middle row of an account with a long history -> a gap
    counts = df.groupby("account")["period"].count()
    acc = counts[counts >= 4].index[0]
    rows = df.index[df["account"] == acc]
    bad = df.drop(index=rows[1])
    p = _write(bad, d, "gap.csv")
    e = _err(spec, p)
    assert "gap.csv: row" in str(e) and "column period" in str(e) and "non_member" in str(e)
    pan = load_panel(spec, p, gaps="non_member")
    assert pan.filled == 1 and pan.rows == len(df)
    m = _write(mk, d, "gap.markets.csv")
    res = fit_panel(spec, p, m, FitOptions(gaps="non_member", draws=0))
    assert res.diagnostics["panel"]["gap_rows_filled"] == 1


@pytest.mark.parametrize("value,word", [("-3.5", "negative"), ("lots", "not a number")])
def test_bad_revenue(spec, files, value, word):
    df, _, d = files
    bad = df.copy()
    bad.loc[4, "revenue"] = value
    e = _err(spec, _write(bad, d, "rev.csv"))
    assert "row 5 (line 6), column revenue" in str(e) and word in str(e)


def test_market_missing_from_size_table(spec, files):
    df, mk, d = files
    p = _write(df, d, "m1.csv")
    m = _write(mk[mk["market"] != "south"], d, "m1.markets.csv")
    e = _err(spec, p, m)
    assert "m1.markets.csv, column market" in str(e) and "'south'" in str(e)


def test_market_size_smaller_than_accounts(spec, files):
    df, mk, d = files
    p = _write(df, d, "m2.csv")
    small = mk.copy()
    small.loc[small["market"] == "north", ["size", "low"]] = 5
    e = _err(spec, p, _write(small, d, "m2.markets.csv"))
    assert "m2.markets.csv, column size" in str(e) and "already tracks" in str(e)


def test_market_table_bad_rows(spec, files):
    df, mk, d = files
    p = _write(df, d, "m3.csv")
    bad = mk.copy()
    bad.loc[1, "high"] = 1  # high below size
    e = _err(spec, p, _write(bad, d, "m3.markets.csv"))
    assert "m3.markets.csv: row 2 (line 3), columns low, size, high" in str(e)


def test_check_panel_lists_problems(spec, files):
    df, mk, d = files
    bad = df.copy()
    bad.loc[1, "engagement"] = "medium"
    bad.loc[3, "revenue"] = "-1"
    probs = check_panel(spec, _write(bad, d, "many.csv"), None)
    assert len(probs) == 2 and any("column engagement" in x for x in probs) and any("column revenue" in x for x in probs)


def test_no_partial_model_when_fit_fails(spec, files, tmp_path):
    df, mk, d = files
    p = _write(df, d, "np.csv")
    m = _write(mk[mk["market"] != "south"], d, "np.markets.csv")
    out = tmp_path / "model"
    with pytest.raises(PanelError):
        fit_to_dir(spec, p, m, out, FitOptions(draws=0))
    assert not out.exists() and list(tmp_path.iterdir()) == []


def _counters_match_history(spec, df: pd.DataFrame, path: str) -> None:
    """The counter the SQL derives equals iterating the spec's counter index map row by row
    (rows of an account in period order; ``df`` sorted by period within each account)."""
    pan = load_panel(spec, path)
    joint = count_duckdb(spec, pan.con, "coded")
    grid = spec.grid_order
    ti, si = grid.index("tenure"), grid.index("status")
    idx = counter_index(spec, "tenure")
    st = spec.axis_levels("status")
    expect: dict[tuple[int, int], int] = {}
    for _, g in df.groupby("account", sort=False):
        prev_s, c = st.index("prospect"), counter_start(spec, "tenure")
        prev_c = None
        for s in g["status"].map(st.index):
            c = int(idx[c, prev_s, s])
            if prev_c is not None:
                expect[(prev_c, prev_s)] = expect.get((prev_c, prev_s), 0) + 1
            prev_c, prev_s = c, s
    got: dict[tuple[int, int], int] = {}
    for row, n in zip(joint.cur, joint.n):
        got[(int(row[ti]), int(row[si]))] = got.get((int(row[ti]), int(row[si])), 0) + int(n)
    assert got == expect


def test_counters_derived_from_history(spec, files):
    df, _, d = files
    _counters_match_history(spec, df.sort_values(["account", "period"]), _write(df, d, "ctr.csv"))


# ---------------------------------------------------------------------------------------------
# periods other than months: the panel takes the spec's period

WEEKLY = Path(__file__).parent / "data" / "mini_weekly.toml"


@pytest.fixture(scope="module")
def weekly(tmp_path_factory):
    wspec = load_spec(WEEKLY)
    d = tmp_path_factory.mktemp("weekly")
    sim = simulate_panel(wspec, 600, 10, seed=4)
    p, m = write_simulation(sim, d / "weekly.csv")
    return wspec, pd.read_csv(p, dtype=str), pd.read_csv(m), d


def test_weekly_panel_given_to_a_monthly_spec(spec, weekly):
    _, df, _, d = weekly
    assert df["period"].iloc[0] == "2024-W01"
    e = _err(spec, _write(df, d, "weeks.csv"))
    msg = str(e)
    assert msg.startswith(f"{d / 'weeks.csv'}: row 1 (line 2), column period: holds an ISO week YYYY-Www, but the "
                          "spec's model.period is 'month': give a month YYYY-MM (e.g. 2024-01) or a date YYYY-MM-DD")
    assert f"({len(df):,} rows in all)" in msg and "\n" not in msg


def test_monthly_panel_given_to_a_weekly_spec(weekly, files):
    wspec = weekly[0]
    df, _, d = files
    e = _err(wspec, _write(df, d, "months.csv"))
    assert str(e).startswith(f"{d / 'months.csv'}: row 1 (line 2), column period: holds a month YYYY-MM, but the "
                             "spec's model.period is 'week': give an ISO week YYYY-Www (e.g. 2024-W05) or a date")


def _joint(spec, path):
    pan = load_panel(spec, path)
    j = count_duckdb(spec, pan.con, "coded")
    return pan, j


def test_dates_are_read_as_the_period_they_fall_in(weekly):
    """A weekly panel written with ISO week labels, with a date inside each week (CSV text), as a
    Parquet DATE column and as a Parquet TIMESTAMP column: the same periods, the same counts."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    wspec, df, _, d = weekly
    ref, jref = _joint(wspec, _write(df, d, "labels.csv"))
    # the Wednesday of each ISO week, as text
    day = df["period"].map(lambda w: dt.date.fromisocalendar(int(w[:4]), int(w[6:8]), 3))
    as_text = df.assign(period=day.map(lambda x: x.isoformat()))
    tab = pa.Table.from_pandas(df.drop(columns=["period"]), preserve_index=False)
    as_date = tab.append_column("period", pa.array(list(day), type=pa.date32()))
    as_time = tab.append_column("period", pa.array([dt.datetime.combine(x, dt.time(18, 30)) for x in day],
                                                   type=pa.timestamp("us")))
    pq.write_table(as_date, d / "dates.parquet")
    pq.write_table(as_time, d / "times.parquet")
    for path in (_write(as_text, d, "dates.csv"), str(d / "dates.parquet"), str(d / "times.parquet")):
        pan, j = _joint(wspec, path)
        assert (pan.p_min, pan.p_max, pan.rows) == (ref.p_min, ref.p_max, ref.rows)
        assert pan.period_label(pan.p_min) == "2024-W01" and pan.period_label(pan.p_max) == "2024-W10"
        assert (j.cur == jref.cur).all() and (j.nxt == jref.nxt).all() and (j.n == jref.n).all()


@pytest.mark.parametrize("period,first,last", [("quarter", "2024-Q1", "2025-Q2"), ("year", "2024", "2029")])
def test_quarterly_and_yearly_panels(tmp_path, period, first, last):
    from stateworth.rules import parse_spec
    import tomllib

    qspec = parse_spec(tomllib.loads(SPEC.read_text().replace('period = "month"', f'period = "{period}"')))
    sim = simulate_panel(qspec, 400, 6, seed=5)
    p, m = write_simulation(sim, tmp_path / "panel.parquet")
    pan = load_panel(qspec, str(p))
    assert (pan.period_label(pan.p_min), pan.period_label(pan.p_max)) == (first, last)
    assert load_markets(qspec, str(m), pan).size.shape == (2, 6)
    # a date in the period reads as the period, a monthly label does not
    df = pd.read_parquet(p)
    df["period"] = df["period"].astype(str)
    ok = df.copy()
    ok.loc[0, "period"] = f"{first[:4]}-01-15"
    assert df.loc[0, "period"] == first and load_panel(qspec, _write(ok, tmp_path, "ok.csv")).rows == len(df)
    bad = df.copy()
    bad.loc[0, "period"] = "2024-01"
    e = _err(qspec, _write(bad, tmp_path, "bad.csv"))
    assert "bad.csv: row 1 (line 2), column period: holds a month YYYY-MM" in str(e)
    assert f"model.period is '{period}'" in str(e)


def test_market_sizes_by_week(weekly):
    wspec, df, mk, d = weekly
    p = _write(df, d, "wk.csv")
    pan = load_panel(wspec, p)
    weeks = [pan.period_label(t) for t in range(pan.p_min, pan.p_max + 1)]
    rows = [dict(r, period=w) for r in mk.to_dict("records") for w in weeks]
    sizes = load_markets(wspec, _write(pd.DataFrame(rows), d, "wk.markets.csv"), pan)
    assert sizes.by_period and sizes.size.shape == (2, len(weeks))
    rows[3]["period"] = "2024-02"
    e = _err(wspec, p, _write(pd.DataFrame(rows), d, "wk2.markets.csv"))
    assert "wk2.markets.csv: row 4 (line 5), column period: holds a month YYYY-MM" in str(e)


def test_market_column_named_after_the_axis(tmp_path):
    from stateworth.rules import parse_spec
    import tomllib

    cspec = parse_spec(tomllib.loads(SPEC.read_text().replace("market", "country")))
    sim = simulate_panel(cspec, 400, 5, seed=6)
    p, m = write_simulation(sim, tmp_path / "c.csv")
    mk = pd.read_csv(m)
    pan = load_panel(cspec, str(p))
    by_country = _write(mk.rename(columns={"market": "country"}), tmp_path, "country.csv")
    assert load_markets(cspec, by_country, pan).size.tolist() == load_markets(cspec, str(m), pan).size.tolist()
    e = _err(cspec, str(p), _write(mk.rename(columns={"market": "region"}), tmp_path, "region.csv"))
    assert "missing required column(s) country (or market)" in str(e)
    bad = mk.rename(columns={"market": "country"})
    bad.loc[1, "country"] = "east"
    e = _err(cspec, str(p), _write(bad, tmp_path, "east.csv"))
    assert "east.csv: row 2 (line 3), column country: not a level of country" in str(e) and "'east'" not in str(e)


def test_weeks_across_new_year(weekly):
    """ISO weeks run on across a year of 53 weeks (2020-W53, then 2021-W01): consecutive, no gap;
    the counters derived from the history still equal the spec's counter map."""
    wspec, _, _, d = weekly
    sim = simulate_panel(wspec, 500, 8, seed=7, start="2020-W50")
    p, _ = write_simulation(sim, d / "newyear.csv")
    df = pd.read_csv(p, dtype=str)
    assert sorted(df["period"].unique()) == ["2020-W50", "2020-W51", "2020-W52", "2020-W53", "2021-W01",
                                             "2021-W02", "2021-W03", "2021-W04"]
    pan = load_panel(wspec, str(p))
    assert pan.p_max - pan.p_min == 7 and pan.filled == 0
    order = {w: i for i, w in enumerate(sorted(df["period"].unique()))}
    _counters_match_history(wspec, df.sort_values(["account", "period"], key=lambda c: c.map(order) if c.name == "period" else c),
                            str(p))
