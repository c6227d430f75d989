"""Periods of a panel: the spec's ``model.period`` (month, week, quarter or year) as consecutive
integers, read from text labels or dates, in Python and as DuckDB SQL alike.

A panel row's period is the label of its period or any date inside it:

========  ==========================  ===========================================================
period    label                       index ``p`` (consecutive periods differ by 1)
========  ==========================  ===========================================================
month     ``2024-01``                 ``12 * year + month - 1``
week      ``2024-W05`` (ISO 8601)     weeks since the Monday that starts ISO week ``1970-W01``
                                      (1969-12-29)
quarter   ``2024-Q1``                 ``4 * year + quarter - 1``
year      ``2024``                    ``year``
========  ==========================  ===========================================================

A date (``2024-01-31``, optionally with a time ``2024-01-31 08:00:00``; a DATE or TIMESTAMP
column of a Parquet file) is read as the period it falls in: its month, its ISO week (whose
year may differ from the calendar year near New Year), its quarter or its year. A cycle axis
of ``C`` levels takes level ``p mod C``: for months January is 0 when C = 12, for quarters Q1
is 0 when C = 4; for weeks the level counts from ISO week 1970-W01 (so a 52-level cycle is not
the ISO week number, which reaches 53 in some years).

:func:`index_sql` and :func:`parse_period` accept the same texts and give the same index; the
tests compare them on every form.
"""

from __future__ import annotations

import datetime as dt
import re

from stateworth.errors import PanelError

KINDS = ("month", "week", "quarter", "year")
#: The Monday that starts ISO week 1970-W01: week index 0.
WEEK_ORIGIN = dt.date(1969, 12, 29)
#: A date, optionally with a time of day and a zone (the date as written is the one used).
DATE_RE = r"^[0-9]{4}-[0-9]{2}-[0-9]{2}([T ][0-9]{2}:[0-9]{2}(:[0-9]{2}(\.[0-9]+)?)?([+-][0-9]{2}(:?[0-9]{2})?|Z)?)?$"
LABEL_RE = {
    "month": r"^[0-9]{4}-(0[1-9]|1[0-2])$",
    "week": r"^[0-9]{4}-W(0[1-9]|[1-4][0-9]|5[0-3])$",
    "quarter": r"^[0-9]{4}-Q[1-4]$",
    "year": r"^[0-9]{4}$",
}
#: Looser shapes, to say which kind of period a refused text looks like.
SHAPE_RE = {
    "month": r"^[0-9]{4}-[0-9]{1,2}$",
    "week": r"^[0-9]{4}-W[0-9]{1,2}$",
    "quarter": r"^[0-9]{4}-Q[0-9]$",
    "year": r"^[0-9]{4}$",
}
EXAMPLE = {"month": "2024-01", "week": "2024-W05", "quarter": "2024-Q1", "year": "2024"}
NAME = {"month": "a month YYYY-MM", "week": "an ISO week YYYY-Www", "quarter": "a quarter YYYY-Qn",
        "year": "a year YYYY"}


def expected_form(kind: str) -> str:
    """What a period of this kind may be written as, for error messages."""
    return f"{NAME[kind]} (e.g. {EXAMPLE[kind]}) or a date YYYY-MM-DD (read as the {kind} it falls in)"


def date_index(d: dt.date, kind: str) -> int:
    """The index of the period of ``kind`` that date ``d`` falls in."""
    if kind == "month":
        return 12 * d.year + d.month - 1
    if kind == "quarter":
        return 4 * d.year + (d.month - 1) // 3
    if kind == "year":
        return d.year
    if kind == "week":
        return (d - WEEK_ORIGIN).days // 7
    raise ValueError(f"unknown period kind {kind!r}")


def period_label(p: int, kind: str = "month") -> str:
    """The label of period index ``p`` (``2024-01``, ``2024-W05``, ``2024-Q1``, ``2024``)."""
    if kind == "month":
        return f"{p // 12:04d}-{p % 12 + 1:02d}"
    if kind == "quarter":
        return f"{p // 4:04d}-Q{p % 4 + 1}"
    if kind == "year":
        return f"{p:04d}"
    if kind == "week":
        iso = (WEEK_ORIGIN + dt.timedelta(weeks=int(p))).isocalendar()
        return f"{iso.year:04d}-W{iso.week:02d}"
    raise ValueError(f"unknown period kind {kind!r}")


def _label_index(text: str, kind: str) -> int | None:
    """The index of a label of ``kind``, None when the text is not one (or names no such period,
    like 2025-W53: 2025 has 52 ISO weeks)."""
    if not re.match(LABEL_RE[kind], text):
        return None
    y = int(text[:4])
    if kind == "month":
        return 12 * y + int(text[5:7]) - 1
    if kind == "quarter":
        return 4 * y + int(text[6]) - 1
    if kind == "year":
        return y
    try:
        return date_index(dt.date.fromisocalendar(y, int(text[6:8]), 1), "week")
    except ValueError:
        return None


def _date(text: str) -> dt.date | None:
    if not re.match(DATE_RE, text):
        return None
    try:
        return dt.date.fromisoformat(text[:10])
    except ValueError:
        return None


def looks_like(text: str) -> str | None:
    """Which form a period text has: a kind, ``"date"``, or None (no form we know)."""
    t = (text or "").strip().upper()
    if re.match(r"^[0-9]{4}-[0-9]{2}-[0-9]{2}", t):
        return "date"
    return next((k for k in KINDS if re.match(SHAPE_RE[k], t)), None)


def period_problem(text: str | None, kind: str) -> str:
    """Why a period text is refused for a spec with ``model.period = kind`` (the text itself is
    not repeated: a message names the row and column, and says what was found and what is
    expected)."""
    found = looks_like(text or "")
    want = f"the spec's model.period is '{kind}': give {expected_form(kind)}"
    if found == "date":
        return f"not a valid date; {want}"
    if found == kind:
        return f"not a valid {kind} ({EXAMPLE[kind]} is one); {want}"
    if found is not None:
        return f"holds {NAME[found]}, but {want}"
    return f"not a period; {want}"


def parse_period(text: str | None, where: str, kind: str = "month") -> int:
    """The index of a period text: a label of ``kind`` or a date inside the period. Raises
    :class:`PanelError` at ``where`` otherwise."""
    t = (text or "").strip().upper()
    p = _label_index(t, kind)
    if p is None:
        d = _date(t)
        p = date_index(d, kind) if d is not None else None
    if p is None:
        raise PanelError(period_problem(text, kind), where=where)
    return p


def _date_index_sql(d: str, kind: str) -> str:
    if kind == "month":
        return f"(year({d}) * 12 + month({d}) - 1)"
    if kind == "quarter":
        return f"(year({d}) * 4 + quarter({d}) - 1)"
    if kind == "year":
        return f"year({d})"
    return f"CAST(floor(date_diff('day', DATE '{WEEK_ORIGIN.isoformat()}', {d}) / 7) AS BIGINT)"


def index_sql(column: str, column_type: str, kind: str) -> str:
    """DuckDB SQL for the period index of a (quoted) column: a DATE or TIMESTAMP column by the
    date it holds; any other by its text, a label of ``kind`` or a date. NULL when the value is
    none of these (the same texts :func:`parse_period` refuses)."""
    ctype = column_type.upper()
    if ctype.startswith("DATE") or ctype.startswith("TIMESTAMP"):
        return _date_index_sql(f"CAST({column} AS DATE)", kind)
    raw = f"CAST({column} AS VARCHAR)"
    t = f"upper(trim({raw}))"
    d = f"TRY_CAST(substr({t}, 1, 10) AS DATE)"
    as_date = f"CASE WHEN regexp_matches({t}, '{DATE_RE}') THEN {_date_index_sql(d, kind)} END"

    def label(x: str) -> str:
        y = f"CAST(substr({x}, 1, 4) AS INTEGER)"
        if kind == "month":
            return f"{y} * 12 + CAST(substr({x}, 6, 2) AS INTEGER) - 1"
        if kind == "quarter":
            return f"{y} * 4 + CAST(substr({x}, 7, 1) AS INTEGER) - 1"
        if kind == "year":
            return y
        w = f"CAST(substr({x}, 7, 2) AS INTEGER)"
        jan4 = f"make_date({y}, 1, 4)"
        monday = f"({jan4} - CAST(isodow({jan4}) - 1 AS INTEGER) + 7 * ({w} - 1))"
        # week 53 exists only in years whose 28 December falls in it
        return f"CASE WHEN {w} <= weekofyear(make_date({y}, 12, 28)) THEN {_date_index_sql(monday, 'week')} END"

    # a label as written is the common case: it is tested before any trimming or upper-casing
    return (f"CASE WHEN regexp_matches({raw}, '{LABEL_RE[kind]}') THEN {label(raw)} "
            f"WHEN regexp_matches({t}, '{LABEL_RE[kind]}') THEN {label(t)} ELSE {as_date} END")
