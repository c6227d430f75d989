"""``stateworth check SPEC``: validate a spec (and, with --panel, a panel) and report every problem."""

from __future__ import annotations

import argparse

from stateworth.clients.commands._sources import add_table_arguments
import sys

NAME = "check"
HELP = "validate a spec (and a panel): every problem at once, with where and how to fix it"
DESCRIPTION = """Validate a model spec and compile it (tables, move rules, grid size).

Every problem is listed with its key path and what would be right; exit 1 if any.
With --panel (and --markets) the account panel is checked against the spec too: files, or
tables in a PostgreSQL database (--panel postgresql://USER@HOST:PORT/DB --panel-table TABLE).

example:
  stateworth check examples/fitness.toml
  stateworth check examples/fitness.toml --panel postgresql://analyst@db.example:5432/crm --panel-table panel \\
      --markets postgresql://analyst@db.example:5432/crm --markets-table market_sizes
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="the model spec (TOML)")
    add_table_arguments(p, "panel", "an account panel (CSV or Parquet) to check against the spec")
    add_table_arguments(p, "markets", "the market-size table that goes with --panel")
    p.add_argument("--json", action="store_true", help="print the result as JSON")


def run(args: argparse.Namespace) -> int:
    import json

    from stateworth.errors import StateworthError
    from stateworth.rules import compile_model, load_spec

    problems: list[str] = []
    summary: dict = {"spec": args.spec}
    try:
        spec = load_spec(args.spec)
    except StateworthError as e:
        problems.extend(getattr(e, "problems", [str(e)]))
        spec = None
    if spec is not None:
        has_tables = all(spec.axes[a].table for a in spec.draw_order)
        try:
            if has_tables:
                model = compile_model(spec, source=args.spec)
                summary.update(states=model.n_states, version=model.version, beta=model.beta,
                               streams=list(model.rewards))
            else:
                from stateworth.rules.compiled import check_size
                check_size(spec, args.spec)
                summary.update(note="factor tables come from a panel (`stateworth fit`)")
        except StateworthError as e:
            problems.append(str(e))
        try:
            from stateworth.clients.commands._sources import table_source

            panel, markets = table_source(args, "panel"), table_source(args, "markets")
            if panel is not None:
                from stateworth.estimation.panel import check_panel  # estimation layer
                problems.extend(check_panel(spec, panel, markets))
        except StateworthError as e:
            problems.append(str(e))
    summary["problems"] = problems
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        if problems:
            for pr in problems:
                print(f"problem: {pr}", file=sys.stderr)
            print(f"{len(problems)} problem(s) found", file=sys.stderr)
        else:
            extra = f", {summary['states']:,} states, version {summary['version']}" if "states" in summary else ""
            print(f"{args.spec}: ok{extra}")
    return 1 if problems else 0
