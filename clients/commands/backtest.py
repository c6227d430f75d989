"""``stateworth backtest SPEC --panel P --markets S --holdout K``: does the fitted chain predict?"""

from __future__ import annotations

import argparse

from stateworth.clients.commands._sources import add_table_arguments

NAME = "backtest"
HELP = "fit on all but the last K periods, predict them, and compare (with retention by join cohort)"
DESCRIPTION = """Out-of-time check of the chain: fit the spec on the panel's first periods exactly as
`fit` would (same options), start from the population at the cut-off (tracked accounts in their
states, never-members from the market sizes), predict the last K periods with the fitted chain, and
compare with what the panel shows there: accounts by status level and market, joins, lapses and
revenue per period, each with a band at --level from simulated holdouts (multinomial flows of the
same population under posterior draws of the tables: the chain's own randomness and the tables'
uncertainty). Also the Kaplan-Meier retention of the accounts that joined in the calibration
months beside the chain's curve for the same joiners. Prints the coverage of the bands, the mean
absolute percentage error per figure and a verdict with its rule. -o DIR writes backtest.json and
a self-contained backtest.html (charts in DIR/charts); `stateworth report MODEL_DIR --backtest
DIR/backtest.json` adds the same section to a model's report. Nothing is written on an error.

example:
  stateworth simulate examples/fitness.toml --accounts 20000 --periods 24 -o out/panel.parquet
  stateworth backtest examples/fitness.toml --panel out/panel.parquet --markets out/panel.markets.csv --holdout 6 -o out/backtest
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="the model spec (TOML)")
    add_table_arguments(p, "panel",
                        "account panel (.csv or .parquet, or a database table; see README 'Fitting from an account panel')",
                        required=True)
    add_table_arguments(p, "markets", "market-size table (market, size, low, high[, period])", required=True)
    p.add_argument("--holdout", required=True, type=int, metavar="K",
                   help="periods held out at the panel's end (at least 1, fewer than the panel's periods minus 2)")
    p.add_argument("--level", type=float, default=0.9, help="band level, strictly between 0 and 1 (default 0.9)")
    p.add_argument("--replicates", type=int, default=100,
                   help="simulated holdouts (and retention cohorts) behind the bands (default 100, at least 20)")
    p.add_argument("-o", "--output", default=None,
                   help="directory for backtest.json and backtest.html (replaced if it holds an earlier backtest)")
    p.add_argument("--json", action="store_true", help="print the result as JSON (for scripts)")
    p.add_argument("--strength", default="auto",
                   help="prior strength in pseudo-moves per cell, or auto (empirical Bayes; default), as for fit")
    p.add_argument("--drop-forbidden", action="store_true",
                   help="drop moves the spec's rules forbid instead of failing, as for fit")
    p.add_argument("--gaps", default="error", choices=["error", "non_member"],
                   help="a missing month inside an account's history: an error (default) or a former-member month")
    p.add_argument("--draws", type=int, default=100,
                   help="posterior draws of every table (default 100); the bands carry their spread")
    p.add_argument("--seed", type=int, default=0, help="seed of the posterior draws and the simulation (default 0)")
    p.add_argument("--engine", default="duckdb", choices=["duckdb", "spark"],
                   help="where the fit's counting query runs, as for fit")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _check_output(path: str | None) -> None:
    from pathlib import Path

    from stateworth.errors import ArtifactError

    if path is None:
        return
    out = Path(path)
    if out.exists():
        if not out.is_dir():
            raise ArtifactError("exists and is not a directory; give a directory for the backtest", where=str(out))
        entries = [q.name for q in out.iterdir()]
        if entries and "backtest.json" not in entries:
            raise ArtifactError("exists, is not empty and holds no earlier backtest; pick a new directory",
                                where=str(out))


def summary_text(res: dict) -> str:
    """The readable summary of a backtest result (:func:`stateworth.estimation.backtest.backtest`)."""
    from stateworth.clients.tables import format_table

    L = res["level"]
    cal, hold = res["calibration"], res["holdout_periods"]
    st = res["start"]
    lines = [f"backtest of '{res['model']['name']}': fit on {cal[0]}..{cal[1]}, holdout {hold[0]}..{hold[-1]} "
             f"({res['holdout']} periods); calibration model version {res['model']['version']}",
             f"start at {st['period']}: {st['tracked']:,} tracked accounts, {st['never_members']:,} never-members "
             "(market sizes less the accounts tracked)"]
    rows = []
    for s in res["figures"]:
        obs, pred = sum(s["observed"]), sum(s["predicted"])
        rows.append([s["label"], f"{len(s['inside']) - s['outside']} of {len(s['inside'])}",
                     "-" if s["mape"] is None else f"{100 * s['mape']:.1f} %",
                     "-" if not pred else f"{obs / pred:.3f}", s["unit"]])
    lines.append(format_table(["figure", f"inside {L:.0%} band", "mean abs % error", "observed / predicted",
                               "unit"], rows, align=["l", "r", "r", "r", "l"]))
    sm = res["summary"]
    sc = sm["simulated_coverage"]
    lines.append(f"coverage: {sm['inside']} of {sm['figures']} figures inside their {L:.0%} bands ({sm['coverage']:.1%}; "
                 f"binomial standard error {sm['binomial_se']:.1%}); simulated holdouts: median {sc['median']:.1%}, "
                 f"1st percentile {sc['q01']:.1%}")
    r = res["retention"]
    if r:
        g = r["largest_gap"]
        lines.append(f"retention of {r['joiners']:,} accounts that joined {r['cohorts'][0]}..{r['cohorts'][1]}: share "
                     f"still a member {r['durations'][-1]} period(s) after joining observed {r['observed'][-1]:.1%}, predicted "
                     f"{r['predicted'][-1]:.1%}; largest gap {g['duration']} period(s) after joining: observed "
                     f"{g['observed']:.1%}, "
                     f"predicted {g['predicted']:.1%} (band {g['band'][0]:.1%} to {g['band'][1]:.1%})")
    else:
        lines.append("retention: no accounts joined in the calibration months after the first period")
    v = res["verdict"]
    lines.append(f"verdict: {v['verdict'].upper()}")
    for reason in v["reasons"]:
        lines.append(f"  - {reason}")
    if v["failing"]:
        lines.append("figures most often outside their bands: " + "; ".join(
            f"{f['figure']} ({f['outside']} of {f['of']} periods outside"
            + (f", observed / predicted {f['observed_over_predicted']:.2f}" if f["observed_over_predicted"] else "")
            + ")" for f in v["failing"]))
    lines.append(f"rule: {v['rule']}")
    lines.append(f"bands: {res['method']}")
    for note in res["notes"]:
        lines.append(f"note: {note}")
    lines.append(res["caution"])
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    import sys

    from stateworth.clients.commands._common import print_json
    from stateworth.errors import PanelError
    from stateworth.estimation.backtest import BacktestOptions, backtest, check_options
    from stateworth.estimation.fit import FitOptions
    from stateworth.rules import load_spec

    if args.strength == "auto":
        strength = "auto"
    else:
        try:
            strength = float(args.strength)
        except ValueError:
            raise PanelError(f"'{args.strength}' is not a number; give pseudo-moves > 0 or auto",
                             where="--strength") from None
    if args.draws < 0:
        raise PanelError("give 0 or more draws", where="--draws")
    fit = FitOptions(strength=strength, forbidden="drop" if args.drop_forbidden else "error", gaps=args.gaps,
                     draws=args.draws, seed=args.seed, engine=args.engine)
    options = BacktestOptions(holdout=args.holdout, level=args.level, replicates=args.replicates, seed=args.seed,
                              fit=fit)
    check_options(options)
    _check_output(args.output)
    spec = load_spec(args.spec)
    from stateworth.clients.commands._sources import table_source

    res = backtest(spec, table_source(args, "panel"), table_source(args, "markets"), options, source=args.spec,
                   progress=not args.quiet and sys.stderr.isatty())
    page = None
    if args.output:
        from stateworth.clients.backtest_page import write_backtest

        page = write_backtest(res, args.output)
    if args.json:
        print_json(res)
    else:
        print(summary_text(res))
        if page:
            print(f"wrote {page} (figures in {page.parent / 'backtest.json'}, charts in {page.parent / 'charts'})")
    return 0
