"""``stateworth simulate SPEC``: draw a synthetic account panel from a spec's written tables."""

from __future__ import annotations

import argparse

NAME = "simulate"
HELP = "draw a synthetic account panel (and its market-size table) from a spec's known tables"
DESCRIPTION = """Simulate an account panel from a spec whose factor tables are written out (the ground
truth): ACCOUNTS addressable people spread over the markets, all never-members at the start; those
who join enter the panel in the period they first join and stay in it after lapsing, so the panel
holds members and former members, and never-members never appear. A propensity band axis drives
joining and lapsing and its covariates measure it (they confound membership).

Periods are the spec's model.period: the panel's period column holds 2024-01 (month), 2024-W01
(ISO week), 2024-Q1 (quarter) or 2024 (year) labels. The panel goes to -o (.parquet, or .csv);
the market-size table (market, size, low, high: the true population per market, low/high at
-/+ 10 %) is written beside it as <stem>.markets.csv.
With --population-sample N (a spec with a propensity band axis) N people drawn at random from
everyone addressable, members and never-members alike, are written as <stem>.population.csv
(market and the band's covariates): what a survey would give `fit --population`.

example:
  stateworth simulate examples/fitness.toml --accounts 20000 --periods 24 --seed 1 -o out/panel.parquet
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="a spec (TOML) with written tables for every random axis")
    p.add_argument("--accounts", type=int, default=20000, help="addressable people to simulate (default 20000); "
                   "the panel holds those who join")
    p.add_argument("--periods", type=int, default=24,
                   help="periods to simulate, in the spec's model.period (default 24)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--start", default=None,
                   help="first panel period: a label of the spec's period (2024-01, 2024-W05, 2024-Q1, 2024) or a "
                        "date in it (default: the first period of 2024)")
    p.add_argument("--population-sample", type=int, default=0, metavar="N",
                   help="also write a sample of N addressable people (market, band covariates) as "
                        "<stem>.population.csv, for fit --population (needs a propensity band axis)")
    p.add_argument("-o", "--output", required=True, help="panel file to write (.parquet or .csv)")


def run(args: argparse.Namespace) -> int:
    from stateworth.errors import SpecError
    from stateworth.rules import load_spec
    from stateworth.estimation.simulate import simulate_panel, write_simulation

    if args.accounts < 1:
        raise SpecError(f"--accounts {args.accounts}: give a positive number of people", where="--accounts")
    if args.population_sample < 0:
        raise SpecError(f"--population-sample {args.population_sample}: give 0 (none) or a number of people",
                        where="--population-sample")
    if args.periods < 2:
        raise SpecError(f"--periods {args.periods}: give at least 2 periods", where="--periods")
    spec = load_spec(args.spec)
    missing = [a for a in spec.draw_order if not spec.axes[a].table]
    if missing:
        raise SpecError(f"no written table for {', '.join(missing)}; simulate draws from known tables "
                        "(write [[axes.X.table]] rows)", where=args.spec)
    sim = simulate_panel(spec, args.accounts, args.periods, args.seed, start=args.start,
                         sample=args.population_sample)
    panel, markets = write_simulation(sim, args.output)
    print(f"wrote {panel} ({sim.panel.num_rows:,} rows) and {markets} "
          f"({len(sim.population)} markets, {sum(sim.population.values()):,} addressable people)")
    if sim.sample is not None:
        from stateworth.estimation.simulate import population_path_for

        print(f"wrote {population_path_for(panel)} ({sim.sample.num_rows:,} people sampled from the addressable "
              "population)")
    return 0
