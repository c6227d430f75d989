"""``stateworth init``: write a commented starter spec for the user's plans and markets."""

from __future__ import annotations

import argparse

NAME = "init"
HELP = "write a commented starter spec for your plans and markets"
DESCRIPTION = """Write a starter model spec (TOML) with one comment per key: a market axis, a tenure
counter, an optional calendar month, the status axis (never-members, former members, your plans,
with neighbour-only plan moves), an engagement band, and a revenue stream. The spec has no
probability tables: `stateworth fit` estimates them from your account panel. Refuses to overwrite
an existing file unless --force.

example:
  stateworth init --plans basic,plus --markets north,south -o my.toml
  stateworth init --plans basic,plus,premium --markets north,south --prices 19,29,45 \\
      --bands low,medium,high --seasonal -o my.toml
  stateworth check my.toml
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--plans", required=True, help="member plans, cheapest first, comma-separated (e.g. basic,plus)")
    p.add_argument("--markets", required=True, help="markets, comma-separated (e.g. north,south)")
    p.add_argument("--prices", help="price per period of each plan, same order as --plans (e.g. 19,29)")
    p.add_argument("--bands", default="low,medium,high",
                   help="engagement bands, lowest first (default low,medium,high)")
    p.add_argument("--tenure-cap", type=int, default=12,
                   help="tenure counts member periods up to this cap (default 12)")
    p.add_argument("--seasonal", action="store_true", help="add a calendar-month axis for seasonality")
    p.add_argument("--name", default="my-model", help="model name (default my-model)")
    p.add_argument("--currency", default="EUR", help="currency code of the reward streams (default EUR)")
    p.add_argument("--rate", type=float, default=0.10, help="annual discount rate (default 0.10; finance's call)")
    p.add_argument("-o", "--output", required=True, help="where to write the spec (.toml)")
    p.add_argument("--force", action="store_true", help="overwrite an existing file")


def _names(raw: str, option: str) -> list[str]:
    import re

    from stateworth.errors import SpecError

    names = [x.strip() for x in raw.split(",") if x.strip()]
    if not names:
        raise SpecError("give at least one name, comma-separated", where=option)
    for n in names:
        if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_-]*", n):
            raise SpecError(f"'{n}' is not a usable level name; use letters, digits, '_' or '-', "
                            "starting with a letter", where=option)
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise SpecError(f"duplicated name(s) {', '.join(dup)}", where=option)
    return names


def _list(xs: list[str]) -> str:
    return "[" + ", ".join(f'"{x}"' for x in xs) + "]"


def starter_spec(plans: list[str], markets: list[str], prices: list[float] | None, bands: list[str],
                 tenure_cap: int, seasonal: bool, name: str, currency: str, rate: float) -> str:
    """The text of a starter spec (TOML with comments). Pure: no files touched."""
    reserved = {"prospect", "lapsed"}
    clash = sorted(reserved & set(plans))
    if clash:
        from stateworth.errors import SpecError
        raise SpecError(f"plan name(s) {', '.join(clash)} are used for the non-member levels; rename the plan",
                        where="--plans")
    status = ["prospect", "lapsed"] + plans
    given = ["market"] + (["month"] if seasonal else []) + ["status", "engagement"]
    lines: list[str] = []
    w = lines.append
    w("# stateworth model spec: a starter written by `stateworth init`. Edit freely; `stateworth check` lists")
    w("# every problem with its key and what would be right. Probability tables are left out on purpose:")
    w("# `stateworth fit` estimates them from your account panel (see README, \"Spec reference\").")
    w("")
    w("[model]")
    w(f'name = "{name}"')
    w(f'currency = "{currency}"')
    w('period = "month"         # one step of the chain; also week, quarter or year')
    w(f"discount = {{ annual_rate = {rate!r}, cash = \"start\" }}   # the rate and cash timing are finance's call")
    w("")
    w("[axes.market]            # fixed: a customer never changes market; pure conditioning")
    w('kind = "fixed"')
    w(f"levels = {_list(markets)}")
    w("")
    w(f"[axes.tenure]            # counter: member periods so far, 0 in the joining period, capped at {tenure_cap}")
    w('kind = "counter"')
    w(f"size = {tenure_cap + 1}")
    w('advance_while = "member"')
    w('reset_on = ["join", "lapse"]')
    if seasonal:
        w("")
        w("[axes.month]             # cycle: calendar month, for seasonal joining and lapsing")
        w('kind = "cycle"')
        w('levels = ["jan", "feb", "mar", "apr", "may", "jun", "jul", "aug", "sep", "oct", "nov", "dec"]')
    w("")
    w("[axes.status]            # the one status axis: non-member levels first, then the plans")
    w('kind = "status"')
    w(f"levels = {_list(status)}   # prospect: never joined; lapsed: a former member")
    w(f"members = {_list(plans)}")
    w(f"given = {_list(given)}   # what next period's status depends on")
    w("# Allowed moves: join onto any plan, lapse, or change to a neighbouring plan. Narrow these to your")
    w("# business rules; probability fitted or written on a forbidden move is an error.")
    w(f"moves.prospect = {_list(['prospect'] + plans)}")
    w(f"moves.lapsed = {_list(['lapsed'] + plans)}")
    for i, plan in enumerate(plans):
        nxt = ["lapsed"] + plans[max(0, i - 1):i + 2]
        w(f"moves.{plan} = {_list(nxt)}")
    w("# A plan not sold in some markets:  not_sold = { PLAN = [\"MARKET\"] }")
    w("")
    w("[axes.engagement]        # chance: usage band, drawn after status and depending on the new status")
    w('kind = "chance"')
    w(f"levels = {_list(bands)}")
    w('given = ["next.status", "engagement"]')
    w("# Bands move at most one step a period; widen if your data says otherwise.")
    for i, b in enumerate(bands):
        w(f"moves.{b} = {_list(bands[max(0, i - 1):i + 2])}")
    w("# Written tables (instead of fitting) look like this; later rows override earlier ones:")
    w("# [[axes.engagement.table]]")
    w('# when = { "next.status" = ["prospect", "lapsed"] }')
    w(f"# probs = {{ {bands[0]} = 1.0 }}")
    w("")
    w("[rewards.revenue]        # money per member period, in the model's currency")
    w('description = "subscription revenue net of fees and taxes"')
    if prices is not None:
        w("price = { " + ", ".join(f"{p} = {float(v)!r}" for p, v in zip(plans, prices)) + " }")
    else:
        w("# price: fill in each plan's price per period (a table by market is also allowed), e.g.")
        w("# price = { " + ", ".join(f"{p} = 10.0" for p in plans) + " }")
        w("price = {}")
    w("fees_share = 0.0         # payment fees and taxes as a share of price, e.g. 0.07")
    w("# costs = { engagement = { ... } }   # cost per member period by band")
    w("# on_join = -10.0                    # one-off amount in the joining period (a first-period discount)")
    w("# `member_months` (1 per member period) is always available as a stream.")
    return "\n".join(lines) + "\n"


def run(args: argparse.Namespace) -> int:
    from pathlib import Path

    from stateworth.errors import SpecError

    plans = _names(args.plans, "--plans")
    markets = _names(args.markets, "--markets")
    bands = _names(args.bands, "--bands")
    prices = None
    if args.prices is not None:
        try:
            prices = [float(x) for x in args.prices.split(",")]
        except ValueError:
            raise SpecError(f"'{args.prices}' is not a comma-separated list of numbers", where="--prices") from None
        if len(prices) != len(plans):
            raise SpecError(f"{len(prices)} price(s) for {len(plans)} plan(s); give one per plan, same order",
                            where="--prices")
    if args.tenure_cap < 1:
        raise SpecError(f"must be at least 1 (got {args.tenure_cap})", where="--tenure-cap")
    if not (0.0 < args.rate < 1.0):
        raise SpecError(f"an annual rate strictly between 0 and 1, e.g. 0.10 (got {args.rate})", where="--rate")
    out = Path(args.output)
    if out.exists() and not args.force:
        raise SpecError("file exists; pick another name or pass --force to overwrite", where=str(out))
    text = starter_spec(plans, markets, prices, bands, args.tenure_cap, args.seasonal, args.name,
                        args.currency, args.rate)
    # the starter must itself be a valid spec: parse it before writing
    import tomllib

    from stateworth.rules import parse_spec
    parse_spec(tomllib.loads(text), source=str(out))
    from stateworth.files import write_text
    write_text(out, text)
    print(f"wrote {out}: {len(plans)} plan(s), {len(markets)} market(s), {len(bands)} engagement band(s)")
    print(f"next: edit the moves and rewards, then `stateworth check {out}` and "
          f"`stateworth fit {out} --panel PANEL --markets SIZES`")
    return 0
