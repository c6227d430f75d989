"""``stateworth demo``: the fitness-class example end to end (panel, fit, solve, serve, query, report)."""

from __future__ import annotations

import argparse

NAME = "demo"
HELP = "run the invented fitness-class example end to end and write its report"
DESCRIPTION = """Run the fitness-class scenario (examples/fitness.toml, invented) end to end:

  1. check the spec;
  2. simulate an account panel from the spec's ground-truth tables and fit the model back
     from it (with posterior draws and diagnostics), plus the two arms of an experiment;
  3. solve every reward stream;
  4. start `stateworth serve` on a free loopback port (a subprocess);
  5. ask it what a pricing system (value of a plan upgrade), a product team (value of an
     engagement lift) and an experiment read-out would ask;
  6. write the HTML report; 7. stop the server; print what each figure means.

Everything goes under the output folder (default demo-out/), which is replaced.

example:
  stateworth demo
  stateworth demo -o /tmp/demo --accounts 20000
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("-o", "--output", default="demo-out", help="output folder (default demo-out/)")
    p.add_argument("--spec", default=None, help="the ground-truth spec (default examples/fitness.toml)")
    p.add_argument("--accounts", type=int, default=None, help="accounts per simulated panel (default: the simulator's)")
    p.add_argument("--seed", type=int, default=7, help="random seed of the simulation (default 7)")
    p.add_argument("--no-server", action="store_true", help="skip the server steps (answer in-process)")


def run(args: argparse.Namespace) -> int:
    from stateworth.clients.demo import run_demo

    return run_demo(output=args.output, spec=args.spec, accounts=args.accounts, seed=args.seed,
                    serve=not args.no_server)
