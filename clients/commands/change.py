"""``stateworth change MODEL --axis A --to LEVEL --delta D [--when ...]``: an exact transition change."""

from __future__ import annotations

import argparse

from stateworth.clients.commands import _common as c

NAME = "change"
HELP = "exact value of changing a transition probability (which factor entry, by how much, which cells)"
DESCRIPTION = """The exact value of a change to the chain: P(AXIS' = TO | cells) moves by DELTA (0.03 is
+3 points) in every cell --when selects, the row's other allowed entries scaled in proportion;
the changed model is re-solved (warm-started) and the change of value is reported per state and
weighted over a cohort (default: every state in the long-run mix). A product team's "what is an
engagement lift worth" question.

example:
  stateworth change demo-out/models/fitted --axis engagement --to regular --delta 0.03 \\
      --when next.status=solo,duo,studio --when engagement=light --cohort status=solo,duo,studio
  stateworth change demo-out/models/fitted --axis status --to lapsed --delta -0.01 \\
      --when status=solo --cohort status=solo --stream margin --json
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    c.add_model_argument(p)
    p.add_argument("--axis", required=True, help="the random axis whose factor changes (e.g. engagement)")
    p.add_argument("--to", required=True, help="the next level whose probability moves (e.g. regular)")
    p.add_argument("--delta", type=float, required=True, help="change in probability: 0.03 = +3 points")
    p.add_argument("--when", action="append", metavar="GIVEN=LEVEL[,LEVEL]",
                   help="the factor's cells to change (repeatable; an omitted given axis means every level)")
    c.add_cohort_arguments(p)
    c.add_stream_arguments(p, horizon=False)


def run(args: argparse.Namespace) -> int:
    import numpy as np

    from stateworth.clients.tables import interval, money, print_table
    from stateworth.valuation import TransitionChange

    level = c.check_level(args.level)
    when = c.parse_selection(args.when, "when")
    valuer = c.load_valuer(args.model, quiet=args.json)
    stream = c.default_stream(valuer, args.stream)
    selection = c.parse_selection(args.cohort)
    weights = c.cohort_weights(valuer, selection, args.basis)
    change = TransitionChange(axis=args.axis, to=args.to, delta=args.delta,
                              when={k: (v[0] if len(v) == 1 else v) for k, v in when.items()})
    res = valuer.transition_change(change, stream=stream, weights=weights, level=level)
    if args.json:
        doc = res.to_dict()
        doc["figure"] = "exact: the chain re-solved with the changed probability (a finite change, not a slope)"
        doc["cohort_mix"] = c.cohort_mix(valuer, weights)
        c.print_json(doc)
        return 0
    print(c.header(valuer, stream))
    print(f"change: {change.describe()}")
    print("exact: the chain re-solved with the changed probability (a finite change; `stateworth marginal` "
          "gives slopes, which differ from this for changes that are not small)")
    print(f"cohort: {c.describe_state({k: ','.join(v) for k, v in selection.items()}) or 'every state'} "
          f"({args.basis} weights): {c.cohort_mix(valuer, weights)}")
    print_table(["figure", "value", f"{level:.0%} interval", "unit"],
                [["cohort-weighted change of value", money(res.weighted), interval(res.interval), res.unit],
                 ["largest change at one state", money(float(np.max(np.abs(res.delta)))), "", res.unit]])
    # the change by status level, averaged over the cohort's states on that level
    model = valuer.model
    st = model.spec.status_axis
    codes = model.grid.codes()[model.grid.position(st)]
    rows = []
    for i, lv in enumerate(model.grid.axis(st).levels):
        w = np.where(codes == i, weights, 0.0)
        if w.sum() > 0:
            rows.append([lv, money(float(w @ res.delta / w.sum())), f"{w.sum():.1%}"])
    if len(rows) > 1:
        print("by status (cohort-weighted):")
        print_table([st, "change of value", "cohort share"], rows)
    s = res.stats or {}
    if s:
        print("re-solve: " + ", ".join(f"{k} {v:.3g}" if isinstance(v, float) else f"{k} {v}"
                                       for k, v in s.items() if k in ("method", "iterations", "operator_applies",
                                                                       "residual", "seconds")))
    print(c.CAUTION_LINE)
    return 0
