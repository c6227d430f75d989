"""``stateworth readout CONTROL TREATMENT``: an experiment's value difference with an interval."""

from __future__ import annotations

import argparse

from stateworth.clients.commands import _common as c

NAME = "readout"
HELP = "experiment read-out: two fitted models (control, treatment) -> value difference with interval"
DESCRIPTION = """Read out an experiment by its value: fit the same spec on the control arm's panel and on
the treatment arm's, then compare mu . V between the two models for a cohort (default every state
in the control model's long-run mix). The interval pairs posterior draws of the two arms, so both
arms' uncertainty enters; without draws there is no interval. Beside it, each arm's long-run
member share and expected member-months.

example:
  stateworth readout demo-out/models/experiment-control demo-out/models/experiment-treatment --cohort status=solo,duo,studio
  stateworth readout demo-out/models/experiment-control demo-out/models/experiment-treatment --stream margin --json
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("control", help="the control arm's compiled model directory")
    p.add_argument("treatment", help="the treatment arm's compiled model directory (same spec)")
    p.add_argument("--seed", type=int, default=0, help="seed of the random pairing of draws (default 0)")
    c.add_cohort_arguments(p)
    c.add_stream_arguments(p, horizon=False)


def run(args: argparse.Namespace) -> int:
    from stateworth.clients.tables import interval, money, percent, print_table
    from stateworth.valuation import readout

    level = c.check_level(args.level)
    control = c.load_valuer(args.control, quiet=args.json)
    treatment = c.load_valuer(args.treatment, quiet=args.json)
    stream = c.default_stream(control, args.stream)
    selection = c.parse_selection(args.cohort)
    weights = c.cohort_weights(control, selection, args.basis)
    res = readout(control, treatment, weights, stream=stream, level=level, seed=args.seed)
    if args.json:
        c.print_json(res.to_dict())
        return 0
    print(f"read-out, stream {stream} ({res.unit}): control version {control.version}, "
          f"treatment version {treatment.version}")
    print(f"cohort: {c.describe_state({k: ','.join(v) for k, v in selection.items()}) or 'every state'} "
          f"({args.basis} weights of the control model)")
    print_table(["arm", "cohort value per customer", f"{level:.0%} interval"],
                [["control", money(res.control_value), interval(res.control_interval)],
                 ["treatment", money(res.treatment_value), interval(res.treatment_interval)],
                 ["treatment - control", money(res.value), interval(res.interval)]])
    lr = res.long_run or {}
    if lr:
        rows = []
        for arm in ("control", "treatment"):
            d = lr.get(arm, {})
            rows.append([arm, percent(d.get("member_share")), money(d.get("expected_member_months"))])
        print_table(["arm", "long-run member share", "expected member-months"], rows)
    if res.interval is None:
        print("(no interval: the models carry no posterior draws; fit with draws to get one)")
    print(c.CAUTION_LINE)
    return 0
