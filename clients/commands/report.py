"""``stateworth report MODEL_DIR -o OUT_DIR``: the analyst's HTML report with charts and tables."""

from __future__ import annotations

import argparse

NAME = "report"
HELP = "write a self-contained HTML report (charts and tables) for a model"
DESCRIPTION = """Write OUT_DIR/report.html: one self-contained page (charts embedded as PNG) with the
value by tenure for each plan and market (with intervals), the value of an acquisition by market
beside the naive "member value" and "one period" figures and the mix joiners land in, the value of
a plan upgrade, the ranked marginal transition values, the long-run member share, the fit
diagnostics (from the model's diagnostics.json when it was fitted from a panel), the solve
statistics, and the model's assumptions and cautions. Where a plan is not sold in a market the
page says so in its place. The charts (200 dpi, each stamped with the model version, stream,
unit and a caution, ready for a slide) are also written to OUT_DIR/charts/, the figures to
OUT_DIR/report.json.

With --backtest FILE (a backtest.json from `stateworth backtest -o DIR`) the page also shows the
backtest: observed against predicted holdout figures with their bands, retention by join cohort.

example:
  stateworth report demo-out/models/fitted -o out/report
  stateworth report demo-out/models/fitted -o out/report-margin --stream margin --level 0.8
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", help="a compiled model directory (or a spec with written tables)")
    p.add_argument("-o", "--output", required=True, help="the report directory to write (replaced if it "
                                                         "holds an earlier report)")
    p.add_argument("--stream", default=None, help="reward stream (default: the spec's first stream)")
    p.add_argument("--top", type=int, default=12, help="marginal transition values to list (default 12)")
    p.add_argument("--level", type=float, default=0.9,
                   help="interval level over the posterior draws, in (0, 1) (default 0.9)")
    p.add_argument("--backtest", default=None, metavar="FILE",
                   help="add a backtest's section: the backtest.json written by `stateworth backtest -o DIR`")


def run(args: argparse.Namespace) -> int:
    import sys

    from stateworth.clients.report import build_report
    from stateworth.errors import QueryError
    from stateworth.valuation.lookups import check_level

    if args.top < 1:
        raise QueryError(f"--top must be at least 1 (got {args.top})", field="top")
    level = check_level(args.level)
    page = build_report(args.model, args.output, stream=args.stream, top=args.top, level=level,
                        progress=sys.stderr.isatty(), backtest=args.backtest)
    print(f"wrote {page} (charts in {page.parent / 'charts'}, figures in {page.parent / 'report.json'})")
    return 0
