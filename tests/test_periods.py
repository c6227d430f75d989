"""Periods of a panel (months, ISO weeks, quarters, years): labels and dates read alike in Python
(market-size tables, --start) and in the SQL that codes a panel, and against ISO 8601 and pandas."""

from __future__ import annotations

import datetime as dt

import duckdb
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from stateworth.errors import PanelError
from stateworth.estimation.periods import KINDS, date_index, index_sql, parse_period, period_label

TEXTS = ["2024-01", "2024-12", "2024-13", "2024-00", "2024-W01", "2024-W52", "2024-W53", "2026-W53", "2020-W53",
         "2024-w05", "2024-Q1", "2024-Q4", "2024-Q5", "2024", "0999", "2024-01-31", "2024-12-30", "2021-01-03",
         "2024-02-30", "2024-01-31 08:00:00", "2024-01-31T08:00:00Z", "2024-01-31 08:00:00+02:00", " 2024-02 ",
         "2024/03", "Jan 2024", "", "x"]


def _sql(con, text: str, kind: str, ctype: str = "VARCHAR"):
    return con.execute(f"SELECT {index_sql('x', ctype, kind)} FROM (SELECT CAST(? AS {ctype}) AS x)", [text]).fetchone()[0]


@pytest.mark.parametrize("kind", KINDS)
def test_sql_and_python_accept_the_same_texts(kind):
    con = duckdb.connect()
    for text in TEXTS:
        try:
            p = parse_period(text, "here", kind)
        except PanelError:
            p = None
        assert _sql(con, text, kind) == p, (kind, text)
        if p is not None:
            assert parse_period(period_label(p, kind), "here", kind) == p


@settings(max_examples=60, deadline=None)
@given(st.dates(min_value=dt.date(1900, 1, 1), max_value=dt.date(2200, 12, 31)))
def test_a_date_is_the_period_it_falls_in(d):
    con = duckdb.connect()
    iso = d.isocalendar()
    # reference: ISO 8601 week dates as Python's datetime implements them (docs/references.md)
    assert period_label(date_index(d, "week"), "week") == f"{iso.year:04d}-W{iso.week:02d}"
    assert period_label(date_index(d, "month"), "month") == d.strftime("%Y-%m")
    assert period_label(date_index(d, "quarter"), "quarter") == f"{d.year:04d}-Q{(d.month - 1) // 3 + 1}"
    assert period_label(date_index(d, "year"), "year") == f"{d.year:04d}"
    for kind in KINDS:
        p = date_index(d, kind)
        # a DATE column, a TIMESTAMP column and the date as CSV text are the same period
        assert _sql(con, d.isoformat(), kind, "DATE") == p
        assert _sql(con, f"{d.isoformat()} 13:45:00", kind, "TIMESTAMP") == p
        assert _sql(con, d.isoformat(), kind) == p
        assert parse_period(d.isoformat(), "here", kind) == p


@settings(max_examples=40, deadline=None)
@given(st.dates(min_value=dt.date(1900, 1, 1), max_value=dt.date(2200, 12, 31)),
       st.dates(min_value=dt.date(1900, 1, 1), max_value=dt.date(2200, 12, 31)))
def test_consecutive_periods_against_pandas(a, b):
    # reference: pandas.Period ordinals count periods from 1970 (weeks Monday to Sunday, freq
    # "W-SUN"); their differences are the number of periods between two dates (docs/references.md)
    for kind, freq in (("week", "W-SUN"), ("month", "M"), ("quarter", "Q"), ("year", "Y")):
        expect = pd.Period(b, freq).ordinal - pd.Period(a, freq).ordinal
        assert date_index(b, kind) - date_index(a, kind) == expect


def test_iso_week_examples():
    # ISO 8601 week dates near New Year (recalled from memory, re-checked with Python's
    # datetime.date.isocalendar; docs/references.md): a week belongs to the year of its Thursday
    for day, week in (("2008-12-29", "2009-W01"), ("2010-01-03", "2009-W53"), ("2005-01-01", "2004-W53"),
                      ("2007-12-31", "2008-W01"), ("2021-01-03", "2020-W53")):
        assert period_label(parse_period(day, "here", "week"), "week") == week
        assert parse_period(week, "here", "week") == parse_period(day, "here", "week")
    # 2020 has 53 weeks, 2025 has 52: week 53 of 2025 is no week
    assert parse_period("2020-W53", "here", "week") + 1 == parse_period("2021-W01", "here", "week")
    with pytest.raises(PanelError, match="not a valid week"):
        parse_period("2025-W53", "here", "week")


@pytest.mark.parametrize("kind,text,found", [
    ("month", "2024-W05", "an ISO week YYYY-Www"), ("week", "2024-05", "a month YYYY-MM"),
    ("quarter", "2024-05", "a month YYYY-MM"), ("year", "2024-Q2", "a quarter YYYY-Qn")])
def test_the_wrong_period_is_named(kind, text, found):
    with pytest.raises(PanelError) as ei:
        parse_period(text, "sizes.csv: row 2 (line 3), column period", kind)
    msg = str(ei.value)
    assert msg.startswith("sizes.csv: row 2 (line 3), column period: holds " + found)
    assert f"model.period is '{kind}'" in msg and "or a date YYYY-MM-DD" in msg and "\n" not in msg
