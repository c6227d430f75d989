"""``stateworth report MODEL_DIR -o OUT_DIR``: the analyst's HTML report with charts and tables."""

from __future__ import annotations

import argparse

NAME = "report"
HELP = "write a self-contained HTML report (charts and tables) for a model"
DESCRIPTION = """Write OUT_DIR/report.html: one self-contained page (charts embedded as PNG) with the
value by tenure for each plan and market, the value of an acquisition by market beside the
naive "member value" and "one period of price" figures, the value of a plan upgrade, the ranked
marginal transition values, the fit diagnostics (from the model's diagnostics.json when it was
fitted from a panel), the solve statistics, and the model's assumptions and cautions. The
charts are also written to OUT_DIR/charts/, the figures to OUT_DIR/report.json.

With --backtest FILE (a backtest.json from `stateworth backtest -o DIR`) the page also shows the
backtest: observed against predicted holdout figures with their bands, retention by join cohort.

example:
  stateworth report demo-out/models/fitted -o out/report
  stateworth report demo-out/models/fitted -o out/report-margin --stream margin
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", help="a compiled model directory (or a spec with written tables)")
    p.add_argument("-o", "--output", required=True, help="the report directory to write (replaced if it "
                                                         "holds an earlier report)")
    p.add_argument("--stream", default=None, help="reward stream (default: the spec's first stream)")
    p.add_argument("--top", type=int, default=12, help="marginal transition values to list (default 12)")
    p.add_argument("--backtest", default=None, metavar="FILE",
                   help="add a backtest's section: the backtest.json written by `stateworth backtest -o DIR`")


def run(args: argparse.Namespace) -> int:
    import sys

    from stateworth.clients.report import build_report
    from stateworth.errors import QueryError

    if args.top < 1:
        raise QueryError(f"--top must be at least 1 (got {args.top})", field="top")
    page = build_report(args.model, args.output, stream=args.stream, top=args.top, progress=sys.stderr.isatty(),
                        backtest=args.backtest)
    print(f"wrote {page} (charts in {page.parent / 'charts'}, figures in {page.parent / 'report.json'})")
    return 0
