"""Fit benchmark: panel rows per second of ``fit_panel`` next to a plain pandas groupby of the
same transition counts, in the same run, each in its own process (peak memory is its own).

A panel of at least ``--rows`` rows (default 10 million) is simulated once from
examples/fitness.toml (cached under bench/out/); then

* ``fit``: the whole fit (read and validate the Parquet panel, count moves with the one GROUP BY,
  market sizes, posterior tables with 100 draws, compile), wall time and peak RSS;
* ``counts``: the counting query alone on DuckDB;
* ``pandas``: read the same Parquet file with pandas, sort, shift within accounts, derive the
  tenure counter with grouped cumulative sums, and count with ``groupby().size()``; its counts
  are checked equal to the DuckDB ones.

Writes bench/out/fit.json and prints a table. ``python bench/fit_bench.py --rows 1000000``
for a quick run.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
OUT = HERE / "out"
SPEC = ROOT / "examples" / "fitness.toml"
ROWS_PER_PERSON = 4.6  # fitness demo, 24 months: rows a simulated person contributes on average


def peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def make_panel(rows: int) -> Path:
    from stateworth.rules import load_spec
    from stateworth.estimation.simulate import simulate_panel, write_simulation

    path = OUT / f"fit_panel_{rows}.parquet"
    if path.is_file():
        return path
    spec = load_spec(SPEC)
    people = int(rows / ROWS_PER_PERSON * 1.02) + 1
    while True:
        sim = simulate_panel(spec, people, 24, seed=1)
        if sim.panel.num_rows >= rows:
            break
        people = int(people * rows / sim.panel.num_rows * 1.02) + 1
    write_simulation(sim, path)
    return path


def child_fit(panel: str, markets: str) -> dict:
    from stateworth.rules import load_spec
    from stateworth.estimation.fit import FitOptions, fit_panel

    spec = load_spec(SPEC)
    t0 = time.perf_counter()
    res = fit_panel(spec, panel, markets, FitOptions(draws=100))
    t = time.perf_counter() - t0
    return {"seconds": t, "rows": res.diagnostics["panel"]["rows"], "moves": res.joint.total,
            "version": res.model.version, "peak_mb": peak_mb()}


def child_counts(panel: str) -> dict:
    from stateworth.rules import load_spec
    from stateworth.estimation.counts import count_duckdb
    from stateworth.estimation.panel import load_panel

    spec = load_spec(SPEC)
    t0 = time.perf_counter()
    pan = load_panel(spec, panel)
    t1 = time.perf_counter()
    joint = count_duckdb(spec, pan.con, "coded")
    t2 = time.perf_counter()
    np.save(OUT / "fit_counts_duckdb.npy", np.column_stack([joint.cur, joint.nxt, joint.n]))
    return {"seconds_load_validate": t1 - t0, "seconds_count": t2 - t1, "rows": pan.rows, "moves": joint.total,
            "peak_mb": peak_mb()}


def child_pandas(panel: str) -> dict:
    import pandas as pd

    from stateworth.rules import load_spec
    from stateworth.estimation.counts import counter_start, joint_from_columns
    from stateworth.estimation.panel import Layout

    spec = load_spec(SPEC)
    lay = Layout.of(spec)
    t0 = time.perf_counter()
    df = pd.read_parquet(panel)
    per = df["period"].astype(str)
    df["p"] = per.str[:4].astype(np.int64) * 12 + per.str[5:7].astype(np.int64) - 1
    for a in lay.observed:
        df[a] = pd.Categorical(df[a].astype(str), categories=spec.axis_levels(a)).codes.astype(np.int64)
    df = df.sort_values(["account", "p"], kind="stable").reset_index(drop=True)
    g = df.groupby("account", sort=False)
    st = spec.status_axis
    df["pp"] = g["p"].shift()
    df["sp"] = g[st].shift()
    levels = spec.axis_levels(st)
    member = spec.member_flags()
    nm = levels.index(spec.non_members[0])
    sp = df["sp"].fillna(nm).to_numpy(np.int64)
    s = df[st].to_numpy(np.int64)
    out_cols = {}
    for a in lay.derived:
        ax = spec.axes[a]
        size = len(spec.axis_levels(a))
        if ax.kind == "cycle":
            df[a] = df["p"] % size
            continue
        reset = np.zeros(len(df), dtype=bool)
        for ev in ax.reset_on or []:
            if ev == "join":
                reset |= ~member[sp] & member[s]
            elif ev == "lapse":
                reset |= member[sp] & ~member[s]
            elif ev == "change":
                reset |= sp != s
        aw = ax.advance_while or "always"
        adv = {"member": member, "non_member": ~member, "always": np.ones_like(member)}.get(aw) if isinstance(aw, str) \
            else np.isin(np.arange(len(levels)), [levels.index(x) for x in aw])
        df["_r"] = reset.astype(np.int64)
        df["_a"] = (adv[s] & ~reset).astype(np.int64)
        df["_seg"] = df.groupby("account", sort=False)["_r"].cumsum()
        base = np.where(df["_seg"].to_numpy() == 0, counter_start(spec, a), 0)
        df[a] = np.minimum(size - 1, base + df.groupby(["account", "_seg"], sort=False)["_a"].cumsum().to_numpy())
    g = df.groupby("account", sort=False)
    for i, a in enumerate(spec.grid_order):
        k = lay.col(a)[1:]
        if spec.axes[a].kind == "cycle":
            out_cols[f"q{k}"] = df["pp"] % len(spec.axis_levels(a))
        elif spec.axes[a].kind == "fixed":
            out_cols[f"q{k}"] = df[a]
        else:
            out_cols[f"q{k}"] = g[a].shift()
    for a in spec.draw_order:
        out_cols[f"n{lay.col(a)[1:]}"] = df[a]
    t = pd.DataFrame(out_cols)
    t = t[(df["pp"] == df["p"] - 1).to_numpy()].astype(np.int64)
    counts = t.groupby(list(t.columns), sort=False).size().reset_index(name="n")
    secs = time.perf_counter() - t0
    joint = joint_from_columns(spec, {c: counts[c].to_numpy() for c in counts.columns})
    ref = np.load(OUT / "fit_counts_duckdb.npy")
    same = bool(np.array_equal(ref, np.column_stack([joint.cur, joint.nxt, joint.n])))
    return {"seconds": secs, "rows": int(len(df)), "moves": int(joint.total), "same_counts_as_duckdb": same,
            "peak_mb": peak_mb()}


def run_child(kind: str, *args: str) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", kind, *args]
    out = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT)
    if out.returncode != 0:
        raise SystemExit(f"{kind} failed:\n{out.stderr[-3000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=10_000_000, help="panel rows at least (default 10 million)")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        kind, rest = args.child[0], args.child[1:]
        fn = {"fit": child_fit, "counts": child_counts, "pandas": child_pandas}[kind]
        print(json.dumps(fn(*rest)))
        return
    OUT.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    panel = make_panel(args.rows)
    markets = str(panel).replace(".parquet", ".markets.csv")
    sim_s = time.perf_counter() - t0
    counts = run_child("counts", str(panel))
    fit = run_child("fit", str(panel), markets)
    pd_ = run_child("pandas", str(panel))
    rows = fit["rows"]
    res = {
        "panel_rows": rows, "moves": fit["moves"], "cpu_count": os.cpu_count(),
        "simulate_seconds_or_cached": sim_s,
        "fit": {**fit, "rows_per_second": rows / fit["seconds"]},
        "duckdb_load_validate_count": {**counts, "rows_per_second_count_only": rows / counts["seconds_count"],
                                       "rows_per_second_load_and_count": rows / (counts["seconds_load_validate"]
                                                                                 + counts["seconds_count"])},
        "pandas_groupby": {**pd_, "rows_per_second": rows / pd_["seconds"]},
        "speedup_fit_vs_pandas_counts": pd_["seconds"] / fit["seconds"],
        "speedup_counts_vs_pandas_counts": pd_["seconds"] / (counts["seconds_load_validate"] + counts["seconds_count"]),
    }
    (OUT / "fit.json").write_text(json.dumps(res, indent=2))
    print(f"panel: {rows:,} rows, {fit['moves']:,} moves ({os.cpu_count()} cores)")
    print(f"{'step':<34}{'seconds':>9}{'rows/s':>14}{'peak MB':>10}")
    print(f"{'stateworth fit (whole)':<34}{fit['seconds']:>9.2f}{rows / fit['seconds']:>14,.0f}{fit['peak_mb']:>10.0f}")
    lc = counts["seconds_load_validate"] + counts["seconds_count"]
    print(f"{'  read+validate+count (DuckDB)':<34}{lc:>9.2f}{rows / lc:>14,.0f}{counts['peak_mb']:>10.0f}")
    print(f"{'  count query alone':<34}{counts['seconds_count']:>9.2f}{rows / counts['seconds_count']:>14,.0f}{'':>10}")
    print(f"{'pandas read+sort+shift+groupby':<34}{pd_['seconds']:>9.2f}{rows / pd_['seconds']:>14,.0f}{pd_['peak_mb']:>10.0f}")
    print(f"pandas counts identical to DuckDB's: {pd_['same_counts_as_duckdb']}; whole fit is "
          f"{res['speedup_fit_vs_pandas_counts']:.1f}x the pandas counting alone")


if __name__ == "__main__":
    main()
