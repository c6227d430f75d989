"""``stateworth value MODEL AXIS=LEVEL ...``: the value of one state, for any reward stream."""

from __future__ import annotations

import argparse

from stateworth.clients.commands import _common as c

NAME = "value"
HELP = "the value V(s) of one state (axis=level pairs), any stream, optional horizon"
DESCRIPTION = """The value of one customer state: the expected discounted sum of a reward stream from
that state on, V(s), solved from (I - beta P) V = r. The state needs one level on every axis.
With posterior draws in the model (from `stateworth fit --draws`), a percentile interval too.

example:
  stateworth value demo-out/models/fitted market=harbor tenure=0 month=jan status=prospect engagement=none
  stateworth value demo-out/models/fitted market=harbor tenure=3 month=jan status=duo engagement=regular \\
      --stream margin --horizon 24 --json
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    c.add_model_argument(p)
    p.add_argument("state", nargs="+", metavar="AXIS=LEVEL", help="the state: one level on every axis")
    p.add_argument("--all-streams", action="store_true", help="value every reward stream")
    c.add_stream_arguments(p)


def run(args: argparse.Namespace) -> int:
    from stateworth.clients.tables import interval, money, print_table

    coords = c.parse_pairs(args.state)
    level = c.check_level(args.level)
    valuer = c.load_valuer(args.model, quiet=args.json)
    streams = list(valuer.streams) if args.all_streams else [c.default_stream(valuer, args.stream)]
    answers = [valuer.value(coords, stream=s, horizon=args.horizon, level=level) for s in streams]
    if args.json:
        c.print_json(answers[0].to_dict() if len(answers) == 1 else [a.to_dict() for a in answers])
        return 0
    hz = f" over the next {args.horizon} {valuer.model.spec.model.period}s" if args.horizon else ""
    print(f"model {valuer.model.name} version {valuer.version}: value of state {c.describe_state(coords)}{hz}")
    rows = [[a.stream, money(a.value), interval(a.interval), a.unit] for a in answers]
    print_table(["stream", "value", f"{level:.0%} interval", "unit"], rows)
    if not valuer.has_intervals:
        print("(no interval: the model carries no posterior draws; fit with draws to get one)")
    print(c.CAUTION_LINE)
    return 0
