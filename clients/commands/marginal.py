"""``stateworth marginal MODEL``: every transition's marginal value, ranked (one adjoint solve)."""

from __future__ import annotations

import argparse

from stateworth.clients.commands import _common as c

NAME = "marginal"
HELP = "rank the factor-table entries by the value of +1 point of probability (one adjoint solve)"
DESCRIPTION = """Marginal values of transitions for J = mu . V, the value of a cohort (weights mu; default
every state in the long-run mix). One adjoint solve (I - beta P^T) lambda = mu prices every
transition at once: dJ/dP_ij = beta lambda_i V_j. Each factor-table entry is ranked by what +1
percentage point on it is worth, the other allowed entries of its row scaled down in proportion.
Marginal figures are local: use `stateworth change` for the exact effect of a finite change.

example:
  stateworth marginal demo-out/models/fitted --top 10
  stateworth marginal demo-out/models/fitted --cohort status=solo,duo,studio --stream margin --json
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    c.add_model_argument(p)
    p.add_argument("--top", type=int, default=15, help="how many entries to list (default 15)")
    p.add_argument("--per-cycle", action="store_true",
                   help="list each calendar cell separately (default: entries that differ only in a cycle "
                        "axis such as month are pooled: +1 point in all of them at once)")
    c.add_cohort_arguments(p)
    c.add_stream_arguments(p, horizon=False)


def run(args: argparse.Namespace) -> int:
    from stateworth.clients.tables import money, print_table
    from stateworth.errors import QueryError

    if args.top < 1:
        raise QueryError(f"--top must be at least 1 (got {args.top})", field="top")
    valuer = c.load_valuer(args.model, draws=False, quiet=args.json)
    stream = c.default_stream(valuer, args.stream)
    selection = c.parse_selection(args.cohort)
    weights = c.cohort_weights(valuer, selection, args.basis)
    from stateworth.valuation.summary import cycle_axes, pool_marginal

    pool = [] if args.per_cycle else cycle_axes(valuer.solved)
    res = valuer.marginal(weights, stream=stream, top=10**9 if pool else args.top)
    entries = pool_marginal(res.entries, pool)[:args.top]
    if args.json:
        doc = res.to_dict()
        doc["entries"] = entries
        doc["pooled_over"] = pool
        doc["figure"] = "slope: d J / d probability, linear in the change (use change for an exact finite change)"
        doc["cohort_mix"] = c.cohort_mix(valuer, weights)
        c.print_json(doc)
        return 0
    print(c.header(valuer, stream))
    print(f"cohort: {c.describe_state({k: ','.join(v) for k, v in selection.items()}) or 'every state'} "
          f"({args.basis} weights); cohort value J = {money(res.objective)} {res.unit} per customer")
    print(f"J describes: {c.cohort_mix(valuer, weights)}"
          + (" (the long-run mix: never-members have joined or left by then)" if args.basis == "long-run" else ""))
    print("these are slopes (linear, for small changes); `stateworth change` re-solves the chain for the exact "
          "effect of a finite change")

    def prob(e):
        lo, hi = e["probability_range"]
        return f"{lo:.4f}" if hi - lo < 5e-5 else f"{lo:.4f}-{hi:.4f}"

    rows = [[i + 1, f"P({e['axis']}'={e['to']} | {c.describe_state(e['cell'])})", prob(e), e["cells"],
             money(e["per_point"])] for i, e in enumerate(entries)]
    print_table(["rank", "transition", "probability", "cells", f"per +1 point ({res.unit})"], rows)
    print("per +1 point: change of J when that probability rises by 0.01 in every state of the cell"
          + (f" (and in every {', '.join(pool)} at once)" if pool else "") + ".")
    print(c.CAUTION_LINE)
    return 0
