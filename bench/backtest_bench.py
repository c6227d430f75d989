"""Backtest benchmark: the time of ``stateworth backtest`` against one ``stateworth fit`` of the
same panel, and the coverage of its bands over simulated panels.

The panel is the example's (examples/fitness.toml, 20,000 addressable people, 24 months, seed 1;
cached under bench/out/), the holdout K = 6 months. Measured in one run:

* cold: ``stateworth fit`` and ``stateworth backtest --holdout 6`` each as a fresh process (what a
  user meets: imports and JAX compiles included), alternating, ``--repeats`` times each; the
  ratio of the medians is the headline figure (the backtest includes its own fit of the first
  18 months). One more backtest with ``-o DIR`` adds the page (charts);
* warm: in one process, after one untimed run of each, ``fit_panel`` and ``backtest``
  alternating ``--repeats`` times each on the same panel (medians; the backtest's phases are
  kept), and a fit and a backtest of each coverage panel (new data, as a user meets it: a
  repeated fit of the same panel finds its compiled reward computation cached);
* coverage: ``--panels`` panels simulated from the example with other seeds (the chain is
  right), each backtested (K = 6, 90 % bands): the share of holdout figures inside their bands,
  the verdict, the retention check's p-value; and each panel once more predicted with the tables
  it was drawn from instead of a fit (``backtest(..., model=)``), which shows the method's own
  calibration apart from the fit's.

Writes bench/out/backtest.json and prints a summary. ``python bench/backtest_bench.py --panels 4
--repeats 1`` for a quick run, ``--panels 0`` for the times alone.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
OUT = HERE / "out"
SPEC = ROOT / "examples" / "fitness.toml"
ACCOUNTS, PERIODS, HOLDOUT = 20_000, 24, 6


def panel_for(seed: int, directory: Path) -> tuple[Path, Path]:
    from stateworth.estimation.simulate import simulate_panel, write_simulation
    from stateworth.rules import load_spec

    path = directory / f"backtest_panel_{seed}.parquet"
    markets = directory / f"backtest_panel_{seed}.markets.csv"
    if not (path.is_file() and markets.is_file()):
        write_simulation(simulate_panel(load_spec(SPEC), ACCOUNTS, PERIODS, seed=seed), path)
    return path, markets


def cli(*args: str) -> float:
    exe = Path(sys.executable).with_name("stateworth")
    t = time.perf_counter()
    out = subprocess.run([str(exe), *args], capture_output=True, text=True, cwd=ROOT)
    s = time.perf_counter() - t
    if out.returncode != 0:
        raise SystemExit(f"{' '.join(args[:2])} failed:\n{out.stderr[-3000:]}")
    return s


def child_warm(panel: str, markets: str, repeats: str) -> dict:
    from stateworth.estimation.backtest import BacktestOptions, backtest
    from stateworth.estimation.fit import fit_panel
    from stateworth.rules import load_spec

    spec = load_spec(SPEC)
    runs = {"fit": lambda: fit_panel(spec, panel, markets),
            "backtest": lambda: backtest(spec, panel, markets, BacktestOptions(holdout=HOLDOUT))}
    out: dict = {"fit": [], "backtest": []}
    for fn in runs.values():
        fn()  # untimed: imports and first compiles
    phases = []
    for _ in range(int(repeats)):  # alternating, so that a slow spell of the machine hits both
        for name, fn in runs.items():
            t = time.perf_counter()
            res = fn()
            out[name].append(time.perf_counter() - t)
            if name == "backtest":
                phases.append(res["seconds"])
    out["backtest_phases"] = phases
    return out


def child_coverage(first_seed: int, panels: int, directory: str) -> dict:
    from stateworth.estimation.backtest import BacktestOptions, backtest
    from stateworth.estimation.fit import fit_panel
    from stateworth.rules import compile_model, load_spec

    spec = load_spec(SPEC)
    truth = compile_model(spec)
    rows = []
    for seed in range(first_seed, first_seed + panels):
        panel, markets = panel_for(seed, Path(directory))
        # a fit and a backtest of a panel this process has not seen (no compile cached for its tables)
        t = time.perf_counter()
        fit_panel(spec, panel, markets)
        fit_seconds = time.perf_counter() - t
        t = time.perf_counter()
        res = backtest(spec, panel, markets, BacktestOptions(holdout=HOLDOUT))
        seconds = time.perf_counter() - t
        # the same panel predicted with the tables it was drawn from: the method without the fit
        true = backtest(spec, panel, markets, BacktestOptions(holdout=HOLDOUT), model=truth)
        rows.append({"seed": seed, "seconds": seconds, "fit_seconds": fit_seconds, "phases": res["seconds"],
                     "figures": res["summary"]["figures"],
                     "coverage": res["summary"]["coverage"],
                     "coverage_with_true_tables": true["summary"]["coverage"],
                     "verdict_with_true_tables": true["verdict"]["verdict"],
                     "simulated_median_coverage": res["summary"]["simulated_coverage"]["median"],
                     "coverage_p_value": res["summary"]["simulated_coverage"]["p_value"],
                     "retention_p_value": (res["retention"] or {}).get("p_value"),
                     "verdict": res["verdict"]["verdict"],
                     "failing": [f["figure"] for f in res["verdict"]["failing"]]})
        print(f"seed {seed}: coverage {rows[-1]['coverage']:.3f}, {rows[-1]['verdict']}; with the true tables "
              f"{rows[-1]['coverage_with_true_tables']:.3f}", file=sys.stderr, flush=True)
    return {"panels": rows}


def run_child(kind: str, *args: str) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", kind, *args]
    out = subprocess.run(cmd, stdout=subprocess.PIPE, text=True, cwd=ROOT)
    if out.returncode != 0:
        raise SystemExit(f"{kind} failed")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--repeats", type=int, default=3, help="cold runs of fit and of backtest each (default 3)")
    ap.add_argument("--panels", type=int, default=20, help="simulated panels for the coverage (default 20)")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        kind, rest = args.child[0], args.child[1:]
        if kind == "warm":
            print(json.dumps(child_warm(*rest)))
        else:
            print(json.dumps(child_coverage(int(rest[0]), int(rest[1]), rest[2])))
        return
    from stateworth.files import write_json

    OUT.mkdir(parents=True, exist_ok=True)
    panel, markets = panel_for(1, OUT)
    fit_s, bt_s = [], []
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(args.repeats):
            fit_s.append(cli("fit", str(SPEC), "--panel", str(panel), "--markets", str(markets), "-o",
                             f"{tmp}/model{i}", "--quiet"))
            bt_s.append(cli("backtest", str(SPEC), "--panel", str(panel), "--markets", str(markets), "--holdout",
                            str(HOLDOUT), "--quiet"))
        page_s = cli("backtest", str(SPEC), "--panel", str(panel), "--markets", str(markets), "--holdout",
                     str(HOLDOUT), "--quiet", "-o", f"{tmp}/bt")
        warm = run_child("warm", str(panel), str(markets), str(args.repeats))
        cov = []
        if args.panels:
            with tempfile.TemporaryDirectory() as pdir:
                cov = run_child("coverage", "1001", str(args.panels), pdir)["panels"]
    wf, wb = statistics.median(warm["fit"]), statistics.median(warm["backtest"])
    res = {
        "panel": {"spec": "examples/fitness.toml", "accounts": ACCOUNTS, "periods": PERIODS, "holdout": HOLDOUT,
                  "seed": 1},
        "cpu_count": os.cpu_count(),
        "cold_seconds": {"fit": fit_s, "backtest": bt_s, "backtest_with_page": page_s},
        "cold_ratio_backtest_over_fit": statistics.median(bt_s) / statistics.median(fit_s),
        "warm_seconds": warm, "warm_ratio_backtest_over_fit": wb / wf,
    }
    if cov:
        covs = [r["coverage"] for r in cov]
        res["coverage"] = {
            "level": 0.9, "panels": len(cov), "mean": statistics.fmean(covs),
            "standard_error": statistics.stdev(covs) / len(covs) ** 0.5 if len(covs) > 1 else None,
            "min": min(covs), "max": max(covs),
            "mean_simulated_median": statistics.fmean(r["simulated_median_coverage"] for r in cov),
            "consistent": sum(r["verdict"] == "consistent" for r in cov),
            "mean_with_true_tables": statistics.fmean(r["coverage_with_true_tables"] for r in cov),
            "consistent_with_true_tables": sum(r["verdict_with_true_tables"] == "consistent" for r in cov),
            "by_panel": cov}
        nf = statistics.median(r["fit_seconds"] for r in cov)
        nb = statistics.median(r["seconds"] for r in cov)
        res["warm_new_panels"] = {"fit_median": nf, "backtest_median": nb, "ratio": nb / nf,
                                  "ratios": [r["seconds"] / r["fit_seconds"] for r in cov]}
    write_json(OUT / "backtest.json", res)
    print(f"cold, {args.repeats} runs each: fit {statistics.median(fit_s):.2f} s, backtest (K = {HOLDOUT}) "
          f"{statistics.median(bt_s):.2f} s: {res['cold_ratio_backtest_over_fit']:.2f}x; with the page "
          f"{page_s:.2f} s")
    print(f"warm, {args.repeats} runs each (medians): fit {wf:.2f} s, backtest {wb:.2f} s: "
          f"{res['warm_ratio_backtest_over_fit']:.2f}x")
    if not cov:
        return
    c = res["coverage"]
    print(f"coverage of 90 % bands over {c['panels']} simulated panels: mean {c['mean']:.3f} "
          f"(standard error {c['standard_error'] or 0:.3f}, range {c['min']:.3f}..{c['max']:.3f}; the simulated "
          f"holdouts' own median {c['mean_simulated_median']:.3f}); verdict consistent on {c['consistent']} of "
          f"{c['panels']}")
    w = res["warm_new_panels"]
    print(f"warm, a new panel each time ({c['panels']} panels, medians): fit {w['fit_median']:.2f} s, backtest "
          f"{w['backtest_median']:.2f} s: {w['ratio']:.2f}x")
    print(f"the same panels predicted with the tables they were drawn from (no fit): mean coverage "
          f"{c['mean_with_true_tables']:.3f}, consistent on {c['consistent_with_true_tables']} of {c['panels']}")


if __name__ == "__main__":
    main()
