"""``stateworth compare MODEL KIND AXIS=LEVEL ...``: the value of a move, beside the naive figures."""

from __future__ import annotations

import argparse

from stateworth.clients.commands import _common as c

NAME = "compare"
HELP = "value of a move (acquisition, plan change, win-back, engagement, two states) beside naive figures"
DESCRIPTION = """The value of moving a customer from one state to another, V(after) - V(before): the
honest figure, because the customer in the 'before' state is worth something too (many
non-members join later anyway). For acquisitions and win-backs the shortcut figures are printed
beside it: the member value V(after) alone, and one period of price.

kinds:
  acquisition   a non-member joins --plan              (the state: a prospect)
  win-back      a former member re-joins --plan        (the state: a lapsed customer)
  plan-change   a member moves to --plan               (the state: a member)
  engagement    a chance axis (--axis, default engagement) moves to --to
  states        the state before, and --after AXIS=LEVEL ... overrides for the state after

example:
  stateworth compare demo-out/models/fitted acquisition market=harbor tenure=0 month=jan \\
      status=prospect engagement=none --plan solo
  stateworth compare demo-out/models/fitted plan-change market=upland tenure=4 month=mar \\
      status=solo engagement=regular --plan duo --stream margin
  stateworth compare demo-out/models/fitted engagement market=coast tenure=2 month=jan \\
      status=duo engagement=light --to regular
  stateworth compare demo-out/models/fitted states market=harbor tenure=0 month=jan status=prospect \\
      engagement=none --after status=duo --json
"""

KINDS = ("acquisition", "win-back", "plan-change", "engagement", "states")


def add_arguments(p: argparse.ArgumentParser) -> None:
    c.add_model_argument(p)
    p.add_argument("kind", choices=KINDS, help="which move: " + ", ".join(KINDS))
    p.add_argument("state", nargs="+", metavar="AXIS=LEVEL", help="the state before the move (every axis)")
    p.add_argument("--plan", help="the plan joined or moved to (acquisition, win-back, plan-change)")
    p.add_argument("--axis", default="engagement", help="the chance axis that moves (engagement kind)")
    p.add_argument("--to", help="the level the chance axis moves to (engagement kind)")
    p.add_argument("--after", nargs="+", metavar="AXIS=LEVEL", help="what differs in the state after (states kind)")
    c.add_stream_arguments(p)


def answer(valuer, args, coords, stream):
    """The valuation call for one kind. Returns (answer, naive-or-None)."""
    from stateworth.errors import QueryError

    kw = dict(stream=stream, horizon=args.horizon, level=args.level)
    if args.kind in ("acquisition", "win-back", "plan-change") and not args.plan:
        raise QueryError(f"the {args.kind} comparison needs --plan (one of {', '.join(valuer.model.spec.members)})",
                         field="plan")
    if args.kind == "acquisition":
        a = valuer.acquisition(coords, args.plan, **kw)
    elif args.kind == "win-back":
        a = valuer.win_back(coords, args.plan, **kw)
    elif args.kind == "plan-change":
        return valuer.plan_change(coords, args.plan, **kw), None
    elif args.kind == "engagement":
        if not args.to:
            raise QueryError("the engagement comparison needs --to (the level the axis moves to)", field="to")
        return valuer.engagement_change(coords, args.axis, args.to, **kw), None
    else:
        if not args.after:
            raise QueryError("the states comparison needs --after AXIS=LEVEL ... (what differs after the move)",
                             field="after")
        after = dict(coords)
        after.update(c.parse_pairs(args.after, "after"))
        return valuer.contrast(coords, after, **kw), None
    naive = None if args.horizon else valuer.naive_comparison(coords, args.plan, stream=stream)
    return a, naive


def run(args: argparse.Namespace) -> int:
    from stateworth.clients.tables import interval, money, print_table

    coords = c.parse_pairs(args.state)
    c.check_level(args.level)
    valuer = c.load_valuer(args.model, quiet=args.json)
    stream = c.default_stream(valuer, args.stream)
    a, naive = answer(valuer, args, coords, stream)
    if args.json:
        doc = a.to_dict()
        if naive is not None:
            doc["naive"] = naive
        c.print_json(doc)
        return 0
    print(c.header(valuer, stream, args.horizon))
    print(f"{args.kind} from {c.describe_state(coords)}"
          + (f" onto {args.plan}" if args.plan and args.kind != "engagement" else "")
          + (f", {args.axis} -> {args.to}" if args.kind == "engagement" else ""))
    rows = []
    d = a.details or {}
    if "before_value" in d and "after_value" in d:
        rows.append(["V(before)", money(d["before_value"]), "", a.unit])
        rows.append(["V(after)" + (": expected over the landing mix" if d.get("landing") else ""),
                     money(d["after_value"]), "", a.unit])
    if d.get("landing"):
        mixed = set(d["landing"][0]["levels"])
        fixed_part = {k: v for k, v in d["after"].items() if k not in mixed}
        parts = []
        for part in d["landing"]:
            levels = part["levels"]
            name = "the rest" if "other" in levels else " ".join(f"{k}={v}" for k, v in levels.items())
            parts.append(f"{name} {part['share']:.0%}")
        print(f"lands at {c.describe_state(fixed_part)}, mixed as the chain's joining rows say: {', '.join(parts)}")
    elif isinstance(d.get("after"), dict) and args.kind != "states":
        print(f"state after: {c.describe_state(d['after'])}")
    rows.append(["value of the move: V(after) - V(before)", money(a.value), interval(a.interval), a.unit])
    if naive is not None:
        rows.append(["naive: member value V(after) alone", money(naive.get("member_value")), "", a.unit])
        rows.append(["naive: one period of price", money(naive.get("one_period")), "", a.unit])
    print_table(["figure", "value", f"{args.level:.0%} interval", "unit"], rows)
    if naive is not None and naive.get("gap_ratio") is not None:
        print(f"the member-value shortcut overstates this move {naive['gap_ratio']:.1f} times: the customer "
              "before the move is worth something too")
    print(c.CAUTION_LINE)
    return 0
