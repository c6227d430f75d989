"""Where a table input comes from: a file (CSV or Parquet) or a PostgreSQL database.

Every table a command reads (the account panel, the market-size table, a population sample)
is named the same way: a file path, or a database URL ``postgresql://USER@HOST:PORT/DB`` with a
table (``--panel-table``) or a query (``--panel-query``). :func:`source_of` turns those three
option values into a :class:`TableSource`; :func:`relation` makes it a relation of a DuckDB
connection with a 1-based row number ``_row``, so the validation and counting SQL that read a
file read a database table unchanged; :func:`read_arrow` gives the rows as an Arrow table.

Database rows are read through the ADBC PostgreSQL driver (``adbc-driver-postgresql``: libpq
and the binary COPY protocol, straight into Arrow columns). Only the columns a caller names are
read, each cast on the server to the type the validation expects (:data:`KINDS`):

* ``id`` (an account): text, varchar, char, integer types as they are; uuid as text;
* ``period``: date and timestamp as they are; timestamptz as the local timestamp of the
  session's time zone (what ``psql`` shows); text as it is (``YYYY-MM``);
* ``level`` (a level of an axis): text and integers as they are, anything else (enum, char,
  boolean) as its text;
* ``number``: integers and floating point as they are; numeric and money as double precision.

A column of another type (text revenue, an integer period) is an error naming it and its
PostgreSQL type. The password comes only from libpq's own mechanisms, ``PGPASSWORD`` or the
password file (``~/.pgpass``, ``PGPASSFILE``); a URL that carries one is refused. Errors name
the database (URL without password), the table or the option of the query, and the column; a
server message is repeated only for errors of the statement's text or of access (SQLSTATE
classes 08, 25, 28, 3D, 3F, 42), never for errors about a value (class 22 names the value).
The session is read-only: a query with a side effect is refused by the server.

Row numbers of a database source count the rows in the order the server sent them (a table's
physical order; give a query with ORDER BY for a fixed order).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import Literal, Mapping
from urllib.parse import parse_qsl, unquote, urlsplit

from stateworth.errors import PanelError

Kind = Literal["id", "period", "level", "number"]
#: What a caller may ask of a column (see the module docstring).
KINDS: tuple[str, ...] = ("id", "period", "level", "number")
SCHEMES = ("postgresql", "postgres")
#: Seconds libpq waits for a server before giving up (unless the URL says connect_timeout).
CONNECT_TIMEOUT_S = 10
#: SQLSTATE classes whose server message names no stored value and is repeated to the user.
_SAFE_CLASSES = ("08", "25", "28", "3D", "3F", "42")
_TEXT = ("text", "varchar", "bpchar", "name", "citext")
_INTS = ("int2", "int4", "int8")
_FLOATS = ("float4", "float8")
_IDENT = r'(?:[A-Za-z_][A-Za-z0-9_$]*|"(?:[^"]|"")+")'
_TABLE_RE = re.compile(rf"^{_IDENT}(?:\.{_IDENT})?$")
_URL_RE = re.compile(r"^[A-Za-z][A-Za-z0-9+.-]*://")


class SourceError(PanelError):
    """A table input cannot be read: a database unreachable or refusing, a table or query
    missing, a column missing or of the wrong type, no rows."""


@dataclass(frozen=True)
class Column:
    """A column a caller reads: its :data:`KINDS` entry and whether it must be present."""

    kind: Kind
    required: bool = True


@dataclass(frozen=True)
class TableSource:
    """A table input: ``location`` is a file path or a ``postgresql://`` URL; with a URL exactly
    one of ``table`` (``NAME`` or ``SCHEMA.NAME``, a view as well) and ``query`` (a SELECT).
    ``option`` is the command-line option that named it (``--panel``), used in messages.
    ``str()`` is the label errors name."""

    location: str
    table: str | None = None
    query: str | None = None
    option: str = "--panel"

    @property
    def is_database(self) -> bool:
        return bool(_URL_RE.match(self.location))

    @property
    def database(self) -> str:
        """The URL without password or parameters: ``postgresql://USER@HOST:PORT/DB``."""
        u = urlsplit(self.location)
        user = f"{unquote(u.username)}@" if u.username else ""
        return f"{u.scheme}://{user}{u.netloc.rsplit('@', 1)[-1]}{u.path}"

    @property
    def label(self) -> str:
        if not self.is_database:
            return self.location
        what = f"table {self.table}" if self.table else f"query of {self.option}-query"
        return f"{self.database} ({what})"

    @property
    def name(self) -> str:
        """A short name for the model's metadata: a file's base name, else the label."""
        return Path(self.location).name if not self.is_database else self.label

    def __str__(self) -> str:
        return self.label


def source_of(location: str | Path | TableSource | None, table: str | None = None, query: str | None = None, *,
              option: str = "--panel") -> TableSource | None:
    """The :class:`TableSource` of a file path, or of a database URL with a table or a query.
    None when nothing is given. :class:`SourceError` (naming the option) for a combination
    that cannot work and for a URL with a password in it."""
    if isinstance(location, TableSource):
        return location
    if location is None:
        if table is not None or query is not None:
            given = f"{option}-table" if table is not None else f"{option}-query"
            raise SourceError(f"{given} reads from a database: give {option} postgresql://USER@HOST:PORT/DB too",
                              where=given)
        return None
    src = TableSource(str(location), table, query, option)
    if not src.is_database:
        if table is not None or query is not None:
            raise SourceError(f"{option} names a file; {option}-table and {option}-query go with a database URL "
                              f"({option} postgresql://USER@HOST:PORT/DB)", where=option)
        return src
    u = urlsplit(src.location)
    if u.scheme.lower() not in SCHEMES:
        raise SourceError(f"'{u.scheme}://' databases are not read; give a PostgreSQL URL postgresql://USER@HOST:PORT/DB "
                          "or a CSV or Parquet file", where=option)
    if u.password is not None or any("password" in k.lower() for k, _ in parse_qsl(u.query)):
        raise SourceError("the database URL holds a password; remove it (postgresql://USER@HOST:PORT/DB) and give "
                          "the password in PGPASSWORD or in the password file ~/.pgpass "
                          "(HOST:PORT:DB:USER:PASSWORD, mode 0600)", where=option)
    if (table is None) == (query is None):
        raise SourceError(f"a database URL needs a table or a query: {option}-table TABLE (a table or view) or "
                          f"{option}-query \"SELECT ...\" (one of the two)", where=option)
    if table is not None and not _TABLE_RE.match(table.strip()):
        raise SourceError(f"'{table}' is not a table name: give NAME or SCHEMA.NAME (double-quote a mixed-case "
                          f"name: '\"Panel\"'), or select with {option}-query", where=f"{option}-table")
    if query is not None and not query.strip().rstrip(";").strip():
        raise SourceError("the query is empty; give a SELECT that returns the table's columns",
                          where=f"{option}-query")
    return TableSource(src.location, table.strip() if table else None,
                       query.strip().rstrip(";").strip() if query else None, option)


def as_source(x: str | Path | TableSource, option: str = "--panel") -> TableSource:
    """A path, a URL (an error: a URL needs a table or query) or a source, as a source."""
    src = source_of(x, option=option)
    assert src is not None
    return src


# ---------------------------------------------------------------------------------------------
# DuckDB relations


def relation(source: str | Path | TableSource, con, columns: Mapping[str, Column] | None = None) -> tuple[str, str]:
    """``(relation text, kind)``: the source as a relation of DuckDB connection ``con`` with a
    1-based data row number ``_row`` before its columns; kind is ``parquet``, ``csv`` or
    ``database``. A database source reads ``columns`` (all of its columns when None) once per
    connection: a second call returns the rows registered by the first."""
    src = as_source(source)
    if not src.is_database:
        return file_relation(src.location, con)
    name = f"_db_{abs(hash((src, tuple(sorted((columns or {}).items()))))) % 10 ** 12}"
    if not con.execute("SELECT view_name FROM duckdb_views() WHERE view_name = ?", [name]).fetchall():
        import numpy as np
        import pyarrow as pa

        t = read_arrow(src, columns)
        con.register(name, t.add_column(0, "_row", pa.array(np.arange(1, t.num_rows + 1, dtype=np.int64))))
    return name, "database"


def release(con, rel: str) -> None:
    """Free the rows behind a relation from :func:`relation` once nothing reads them again: a
    database source's Arrow table, a CSV's temporary table (a Parquet file holds none)."""
    if rel.startswith("_db_"):
        con.unregister(rel)
    elif rel.startswith("_csv_"):
        con.execute(f"DROP TABLE IF EXISTS {rel}")


def file_relation(path: str, con) -> tuple[str, str]:
    """A DuckDB relation text for a CSV/Parquet file, with a 1-based data row number ``_row``.
    Parquet row numbers come from the reader; a CSV is read once into a temporary table with
    insertion order preserved for that statement, so its row numbers are the file's."""
    p = Path(path)
    if not p.is_file():
        raise PanelError("no such file; give the path to a CSV or Parquet file", where=str(path))
    lit = "'" + str(p).replace("'", "''") + "'"
    suffix = p.suffix.lower()
    if suffix in (".parquet", ".pq"):
        return f"(SELECT file_row_number + 1 AS _row, * EXCLUDE (file_row_number) FROM read_parquet({lit}, file_row_number = true))", "parquet"
    if suffix in (".csv", ".txt", ".tsv"):
        import duckdb

        name = f"_csv_{abs(hash(str(p.resolve()))) % 10 ** 12}"
        order = con.execute("SELECT current_setting('preserve_insertion_order')").fetchone()[0]
        con.execute("SET preserve_insertion_order = true")
        try:
            con.execute(f"CREATE OR REPLACE TEMP TABLE {name} AS SELECT row_number() OVER () AS _row, * "
                        f"FROM read_csv({lit}, header = true, all_varchar = true)")
        except duckdb.Error as e:
            raise PanelError(f"cannot be read as CSV ({reader_error(e)}); check the delimiter, the quoting and that "
                             "every row has as many fields as the header row", where=str(path)) from None
        finally:
            con.execute(f"SET preserve_insertion_order = {'true' if order else 'false'}")
        return name, "csv"
    raise PanelError(f"unknown file type '{p.suffix}'; use .csv or .parquet", where=str(path))


# ---------------------------------------------------------------------------------------------
# PostgreSQL through ADBC


def read_arrow(source: str | Path | TableSource, columns: Mapping[str, Column] | None = None):
    """The rows of a source as an Arrow table: for a database, the named ``columns`` that it has
    (all when None), typed as in the module docstring; for a file, every column as the file
    holds it (a CSV's types as pyarrow infers them). :class:`SourceError` for a server that cannot be reached or refuses, a missing
    table, a failing query, a missing required column, a column of the wrong type, no rows."""
    src = as_source(source)
    if not src.is_database:
        import pyarrow.csv
        import pyarrow.parquet as pq

        p = Path(src.location)
        if not p.is_file():
            raise PanelError("no such file; give the path to a CSV or Parquet file", where=src.location)
        return pq.read_table(p) if p.suffix.lower() in (".parquet", ".pq") else pyarrow.csv.read_csv(p)
    dbapi = _driver(src)
    import adbc_driver_manager

    inner = src.query if src.query is not None else f"SELECT * FROM {src.table}"
    # the query on lines of its own: a trailing -- comment in it ends before the closing parenthesis
    wrapped = f"(\n{inner}\n) AS _sw_source"
    with _connect(dbapi, src) as conn:
        with conn.cursor() as cur:
            # reading never writes: the session refuses any statement that would
            _execute(cur, "SET SESSION CHARACTERISTICS AS TRANSACTION READ ONLY", src)
            _execute(cur, f"SELECT * FROM {wrapped} LIMIT 0", src)
            have = {f.name: _pg_type(f) for f in cur.fetch_arrow_table().schema}
            sel = _select_list(src, have, columns)
            _execute(cur, f"SELECT {', '.join(sel)} FROM {wrapped}", src)
            try:
                table = cur.fetch_arrow_table()
            except adbc_driver_manager.Error as e:
                raise _statement_error(e, src) from None
    if table.num_rows == 0:
        what = "the table is empty" if src.table else "the query returned no rows"
        raise SourceError(f"{what}; a {src.option[2:]} needs at least one row", where=src.label)
    return table


def _driver(src: TableSource):
    try:
        import adbc_driver_postgresql.dbapi as dbapi
    except ImportError:
        raise SourceError("reading from PostgreSQL needs the adbc-driver-postgresql package: "
                          "pip install 'stateworth[db]' (or pip install adbc-driver-postgresql)",
                          where=src.option) from None
    return dbapi


def _connect(dbapi, src: TableSource):
    u = urlsplit(src.location)
    url = src.location
    if "connect_timeout" not in dict(parse_qsl(u.query)):
        url += ("&" if u.query else "?") + f"connect_timeout={CONNECT_TIMEOUT_S}"
    try:
        return dbapi.connect(url, autocommit=True)
    except dbapi.Error as e:  # the driver manager's Error
        raise _connect_error(e, src) from None

def reader_error(e: Exception) -> str:
    """What the file reader objected to, without its text: the engine quotes lines of the file,
    which may hold account identifiers. Keeps the kind of error and the line number."""
    text = str(e)
    first = text.splitlines()[0] if text else ""
    kind = first.split(":", 1)[0].strip() if ":" in first else "unreadable"
    line = re.search(r"\bline:?\s*(\d+)", text, flags=re.IGNORECASE)
    why = "; the file is not UTF-8 text" if "utf-8" in text.lower() or "unicode" in text.lower() else ""
    return f"{kind[:60]}" + (f" at line {line.group(1)}" if line else "") + why



def _connect_error(e: Exception, src: TableSource) -> SourceError:
    text = str(e)
    u = urlsplit(src.location)
    user = unquote(u.username) if u.username else "(the login name)"
    if "password authentication failed" in text:
        msg = (f"the server refused the password of user {user}; set the right one in PGPASSWORD or the "
               "password file ~/.pgpass (HOST:PORT:DB:USER:PASSWORD)")
    elif "no password supplied" in text:
        msg = (f"the server asks for the password of user {user}; give it in PGPASSWORD or the password "
               "file ~/.pgpass (HOST:PORT:DB:USER:PASSWORD), never in the URL")
    else:
        # libpq: 'connection to server at "HOST", port P failed: REASON' or a reason alone
        line = next((x for x in text.splitlines() if x.strip()), text)
        reason = line.split(" failed: ", 1)[-1].strip() if " failed: " in line else line.split(": ", 1)[-1]
        reason = reason.removeprefix("FATAL:").strip()
        hint = "; check the host, the port and that the server runs and accepts TCP/IP connections" \
            if ("refused" in reason or "translate host" in reason or "timeout" in reason.lower()
                or "No such file" in reason) else ""
        msg = f"cannot connect to the database: {reason}{hint}"
    return SourceError(msg, where=f"{src.database} ({src.option})")


def _execute(cur, sql: str, src: TableSource) -> None:
    import adbc_driver_manager

    try:
        cur.execute(sql)
    except adbc_driver_manager.Error as e:
        raise _statement_error(e, src) from None


def _statement_error(e: Exception, src: TableSource) -> SourceError:
    state = getattr(e, "sqlstate", None) or ""
    details = dict((k.decode(errors="replace"), v.decode(errors="replace"))
                   for k, v in (getattr(e, "details", None) or []) if isinstance(k, bytes) and isinstance(v, bytes))
    primary = details.get("PG_DIAG_MESSAGE_PRIMARY", "")
    if state == "42P01" and src.table:
        msg = (f"no table or view {src.table} in this database (or user {unquote(urlsplit(src.location).username or '')} "
               "cannot see it); check the name, its schema (SCHEMA.NAME) and the grants")
    elif state[:2] in _SAFE_CLASSES and primary:
        msg = f"the database refused the {'query' if src.query else 'read'}: {primary} (SQLSTATE {state})"
    elif state:
        # class 22 and others may quote a stored value (an account): the code says enough
        msg = (f"the database failed while running the {'query' if src.query else 'read'} (SQLSTATE {state}; "
               "the server's message is not shown, as it may quote a value); run it in psql to see where")
    else:
        msg = f"the database failed while running the {'query' if src.query else 'read'} ({e.__class__.__name__})"
    return SourceError(msg, where=src.label)


def _pg_type(field) -> str:
    md = field.metadata or {}
    t = md.get(b"POSTGRESQL:type") or md.get(b"ADBC:postgresql:typname")
    return t.decode() if t else str(field.type)


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


_WANTS = {  # what a kind needs, and an example cast
    "id": ("text or an integer type", "::text"),
    "period": ("a date, a timestamp or text YYYY-MM", "::date"),
    "level": ("text", "::text"),
    "number": ("a number type (numeric, integer, double precision)", "::numeric"),
}


def _cast(kind: str, pgtype: str) -> str | None:
    """The server-side cast that gives a column of ``pgtype`` the shape a ``kind`` expects:
    '' for none, None when the type does not fit the kind."""
    if kind == "id":
        return "" if pgtype in _INTS or pgtype in ("text", "varchar") else "::text" if pgtype in _TEXT + ("uuid",) else None
    if kind == "period":
        if pgtype in ("date", "timestamp") or pgtype in ("text", "varchar"):
            return ""
        return "::timestamp" if pgtype == "timestamptz" else "::text" if pgtype in _TEXT else None
    if kind == "level":
        return "" if pgtype in _INTS or pgtype in ("text", "varchar") else "::text"
    if kind == "number":
        if pgtype in _INTS or pgtype in _FLOATS:
            return ""
        return "::float8" if pgtype == "numeric" else "::numeric::float8" if pgtype == "money" else None
    raise ValueError(f"unknown column kind {kind!r}; one of {KINDS}")


def _select_list(src: TableSource, have: Mapping[str, str], columns: Mapping[str, Column] | None) -> list[str]:
    if columns is None:
        return [_q(c) for c in have]
    missing = [c for c, col in columns.items() if col.required and c not in have]
    if missing:
        listed = ", ".join(have) or "none"
        raise SourceError(f"missing required column(s) {', '.join(missing)}; the {'table' if src.table else 'query'} "
                          f"has {listed} (rename in a view or with AS in {src.option}-query)",
                          where=f"{src.label}, column {missing[0]}" if len(missing) == 1 else src.label)
    sel, wrong = [], []
    for c, col in columns.items():
        if c not in have:
            continue
        cast = _cast(col.kind, have[c])
        if cast is None:
            wrong.append((c, have[c], col.kind))
            continue
        sel.append(f"{_q(c)}{cast} AS {_q(c)}" if cast else _q(c))
    if wrong:
        c, t, k = wrong[0]
        more = "".join(f"; column {c2} is {t2}, needs {_WANTS[k2][0]}" for c2, t2, k2 in wrong[1:])
        raise SourceError(f"column {c} is of type {t}; it needs {_WANTS[k][0]} (cast it in a view or in "
                          f"{src.option}-query, e.g. {c}{_WANTS[k][1]} AS {c}){more}", where=f"{src.label}, column {c}")
    return sel
