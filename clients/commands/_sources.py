"""Command-line options for a table input: a file, or a database table or query.

Not a command itself (the leading underscore keeps the dispatcher from listing it). A table
input NAME (panel, markets, population) takes three options: ``--NAME FILE|URL``, and with a
database URL ``--NAME-table TABLE`` or ``--NAME-query SQL``. :func:`add_table_arguments` adds
them; :func:`table_source` turns the parsed values into a
:class:`stateworth.estimation.sources.TableSource` (or None when the input is not given).
"""

from __future__ import annotations

import argparse

URL_HELP = ("or a PostgreSQL URL postgresql://USER@HOST:PORT/DB with --{name}-table or --{name}-query "
            "(the password from PGPASSWORD or ~/.pgpass, never in the URL)")


def add_table_arguments(p: argparse.ArgumentParser, name: str, file_help: str, *, required: bool = False) -> None:
    """``--NAME``, ``--NAME-table``, ``--NAME-query``; ``file_help`` says what the file holds."""
    p.add_argument(f"--{name}", required=required, metavar="FILE|URL",
                   help=f"{file_help}; {URL_HELP.format(name=name)}")
    p.add_argument(f"--{name}-table", metavar="TABLE", default=None,
                   help=f"with a database URL in --{name}: the table or view to read (NAME or SCHEMA.NAME)")
    p.add_argument(f"--{name}-query", metavar="SQL", default=None,
                   help=f"with a database URL in --{name}: a SELECT returning the columns (instead of --{name}-table)")


def table_source(args: argparse.Namespace, name: str):
    """The :class:`~stateworth.estimation.sources.TableSource` the options name, or None."""
    from stateworth.estimation.sources import source_of

    attr = name.replace("-", "_")
    return source_of(getattr(args, attr), getattr(args, f"{attr}_table", None), getattr(args, f"{attr}_query", None),
                     option=f"--{name}")
