"""``stateworth check SPEC``: validate a spec (and, with --panel, a panel) and report every problem."""

from __future__ import annotations

import argparse

from stateworth.clients.commands._sources import add_table_arguments
import sys

NAME = "check"
HELP = "validate a spec (and a panel): every problem at once, with where and how to fix it"
DESCRIPTION = """Validate a model spec and compile it (tables, move rules, grid size).

Every problem is listed with its key path and what would be right; exit 1 if any.
With --panel (and --markets) the account panel is checked against the spec too, by every check
`stateworth fit` runs before it estimates (levels, periods, histories, market sizes, moves and
joins the move rules forbid), so a panel check passes exactly when fit would accept the panel.
Panels are files, or tables in a PostgreSQL database (--panel postgresql://USER@HOST:PORT/DB
--panel-table TABLE). Warnings (a plan nothing can move into and no data holds) are printed but
do not fail.

example:
  stateworth check examples/fitness.toml
  stateworth check examples/fitness.toml --panel demo-out/panel/fitted.parquet --markets demo-out/panel/fitted.markets.csv
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="the model spec (TOML)")
    add_table_arguments(p, "panel", "an account panel (CSV or Parquet) to check against the spec")
    add_table_arguments(p, "markets", "the market-size table that goes with --panel")
    p.add_argument("--gaps", default="error", choices=["error", "non_member"],
                   help="a missing period inside an account's history: an error (default) or a former-member "
                        "period, as for `stateworth fit`")
    p.add_argument("--json", action="store_true", help="print the result as JSON")


def run(args: argparse.Namespace) -> int:
    import json

    from stateworth.errors import StateworthError
    from stateworth.rules import compile_model, load_spec

    problems: list[str] = []
    warnings: list[str] = []
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
                               streams=list(model.streams))
            else:
                from stateworth.rules.compiled import check_size
                check_size(spec, args.spec)
                summary.update(note="factor tables come from a panel (`stateworth fit`)")
        except StateworthError as e:
            problems.append(str(e))
        try:
            from stateworth.clients.commands._sources import table_source

            panel, markets = table_source(args, "panel"), table_source(args, "markets")
        except StateworthError as e:
            problems.append(str(e))
            panel = markets = None
        if panel is not None:
            try:
                from stateworth.estimation.fit import FitOptions, check_fit_inputs  # estimation layer

                found, warned = check_fit_inputs(spec, panel, markets, FitOptions(draws=0, gaps=args.gaps))
                problems.extend(found)
                warnings.extend(warned)
            except StateworthError as e:
                problems.append(str(e))
        else:
            from stateworth.rules.factors import plans_without_way_in, unreachable_plan_warning

            warnings.extend(unreachable_plan_warning(spec, plan, "and no panel was given to show it holds customers")
                            for plan in plans_without_way_in(spec))
    summary["problems"] = problems
    summary["warnings"] = [f"{args.spec}: {w}" for w in warnings]
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        for w in summary["warnings"]:
            print(f"warning: {w}", file=sys.stderr)
        if problems:
            for pr in problems:
                print(f"problem: {pr}", file=sys.stderr)
            print(f"{len(problems)} problem(s) found", file=sys.stderr)
        else:
            extra = f", {summary['states']:,} states, version {summary['version']}" if "states" in summary else ""
            print(f"{args.spec}: ok{extra}")
    return 1 if problems else 0
