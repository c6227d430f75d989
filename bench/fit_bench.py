"""Fit benchmark: panel rows per second of ``fit_panel`` next to a plain pandas groupby of the
same transition counts, in the same run, each in its own process (peak memory is its own).

A panel of at least ``--rows`` rows (default 10 million) is simulated once from
examples/fitness.toml (cached under bench/out/); then

* ``fit``: the whole fit (read and validate the Parquet panel, count moves with the one GROUP BY,
  market sizes, posterior tables with 100 draws, compile), wall time and peak RSS;
* ``counts``: the counting query alone on DuckDB;
* ``pandas``: read the same Parquet file with pandas, sort, shift within accounts, derive the
  tenure counter with grouped cumulative sums, and count with ``groupby().size()``; its counts
  are checked equal to the DuckDB ones;
* ``postgres`` (when a PostgreSQL server can be run: tests/pgserver.py, Debian's binaries): the
  same panel loaded with COPY into a table as a user would keep it (bigint accounts, date
  periods, text levels, numeric revenue) on a throwaway local server, then ``read``: the rows
  through the ADBC driver into Arrow alone, and ``fit_pg``: the whole fit from the table, its
  model version checked equal to the Parquet fit's. The server runs on the same cores as the
  fit (a loopback connection), so these times include the server's work.

Writes bench/out/fit.json and prints a table. ``python bench/fit_bench.py --rows 1000000``
for a quick run; ``--no-postgres`` leaves the database out.
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


def cpu_s() -> float:
    """CPU seconds of this process (all threads): steadier than wall time on a busy machine."""
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


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


def _db_sources(url: str):
    from stateworth.estimation.sources import source_of

    return source_of(url, "panel", option="--panel"), source_of(url, "markets", option="--markets")


def child_fit(panel: str, markets: str | None = None) -> dict:
    """The whole fit from the Parquet file, or (a URL alone) from tables panel and markets."""
    from stateworth.rules import load_spec
    from stateworth.estimation.fit import FitOptions, fit_panel

    spec = load_spec(SPEC)
    if markets is None:
        panel, markets = _db_sources(panel)
    c0, t0 = cpu_s(), time.perf_counter()
    res = fit_panel(spec, panel, markets, FitOptions(draws=100))
    t = time.perf_counter() - t0
    return {"seconds": t, "cpu_seconds": cpu_s() - c0, "rows": res.diagnostics["panel"]["rows"],
            "moves": res.joint.total, "version": res.model.version, "peak_mb": peak_mb()}


def child_read_pg(url: str) -> dict:
    from stateworth.estimation.panel import Layout, panel_columns
    from stateworth.estimation.sources import read_arrow
    from stateworth.rules import load_spec

    panel, _ = _db_sources(url)
    c0, t0 = cpu_s(), time.perf_counter()
    t = read_arrow(panel, panel_columns(Layout.of(load_spec(SPEC))))
    return {"seconds": time.perf_counter() - t0, "cpu_seconds": cpu_s() - c0, "rows": t.num_rows,
            "arrow_mb": t.nbytes / 2 ** 20, "peak_mb": peak_mb()}


def server_cpu_s(server) -> float:
    """CPU seconds the server has used: the postmaster's own and its ended children's
    (each connection's backend is a child that ends when the client disconnects)."""
    pid = int((server.root / "data" / "postmaster.pid").read_text().split()[0])
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return sum(int(x) for x in fields[11:15]) / os.sysconf("SC_CLK_TCK")  # utime stime cutime cstime


def run_child_on_server(server, kind: str, *args: str) -> dict:
    before = server_cpu_s(server)
    out = run_child(kind, *args)
    time.sleep(1.0)  # the backend has ended; let the postmaster reap it
    return {**out, "server_cpu_seconds": server_cpu_s(server) - before}


def load_postgres(server, panel: Path, markets: str) -> float:
    """The Parquet panel into table ``panel`` (and the sizes into ``markets``) with COPY from CSV;
    returns the seconds COPY and VACUUM ANALYZE took (the CSV export not counted)."""
    import duckdb

    csv = OUT / "fit_panel_pg.csv"
    con = duckdb.connect()
    con.execute(f"COPY (SELECT account, CAST(period AS VARCHAR) || '-01' AS period, market, status, engagement, "
                f"round(revenue, 2) AS revenue FROM read_parquet('{panel}')) TO '{csv}' (HEADER, DELIMITER ',')")
    con.close()
    server.execute("CREATE TABLE panel (account bigint, period date, market text, status text, engagement text, "
                   "revenue numeric(12, 2))", "CREATE TABLE markets (market text, size bigint, low numeric, high numeric)")
    t0 = time.perf_counter()
    server.copy_csv("panel", csv)
    server.copy_csv("markets", Path(markets))
    server.execute("VACUUM ANALYZE panel")
    secs = time.perf_counter() - t0
    csv.unlink()
    return secs


def bench_postgres(panel: Path, markets: str, parquet_version: str) -> dict:
    """Start a throwaway server, load the panel, time the read and the fit from it."""
    sys.path.insert(0, str(ROOT / "tests"))
    from pgserver import PASSWORD, PostgresServer, find_bindir

    bindir, why = find_bindir()
    if bindir is None:
        return {"skipped": why}
    with PostgresServer(bindir) as server:
        load_s = load_postgres(server, panel, markets)
        os.environ["PGPASSWORD"] = PASSWORD  # the children's, through libpq
        url = server.url()
        read = run_child_on_server(server, "read_pg", url)
        fit = run_child_on_server(server, "fit", url)
    rows = fit["rows"]
    return {"copy_load_seconds": load_s, "read": {**read, "rows_per_second": rows / read["seconds"]},
            "fit": {**fit, "rows_per_second": rows / fit["seconds"]},
            "same_version_as_parquet": fit["version"] == parquet_version}


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
    ap.add_argument("--no-postgres", action="store_true", help="leave out the PostgreSQL read and fit")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        kind, rest = args.child[0], args.child[1:]
        fn = {"fit": child_fit, "counts": child_counts, "pandas": child_pandas, "read_pg": child_read_pg}[kind]
        print(json.dumps(fn(*rest)))
        return
    OUT.mkdir(parents=True, exist_ok=True)
    load0 = os.getloadavg()[0]  # other work on the machine stretches wall times; CPU seconds less so
    t0 = time.perf_counter()
    panel = make_panel(args.rows)
    markets = str(panel).replace(".parquet", ".markets.csv")
    sim_s = time.perf_counter() - t0
    counts = run_child("counts", str(panel))
    fit = run_child("fit", str(panel), markets)
    pd_ = run_child("pandas", str(panel))
    pg = None if args.no_postgres else bench_postgres(panel, markets, fit["version"])
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
        "postgres": pg,
        "load_average_start": load0, "load_average_end": os.getloadavg()[0],
    }
    if pg and "fit" in pg:
        res["ratio_fit_postgres_vs_parquet_seconds"] = pg["fit"]["seconds"] / fit["seconds"]
    (OUT / "fit.json").write_text(json.dumps(res, indent=2))
    print(f"panel: {rows:,} rows, {fit['moves']:,} moves ({os.cpu_count()} cores, load average "
          f"{res['load_average_start']:.1f} at the start, {res['load_average_end']:.1f} at the end)")
    print(f"{'step':<34}{'seconds':>9}{'rows/s':>14}{'peak MB':>10}{'CPU s':>8}")
    print(f"{'stateworth fit (whole)':<34}{fit['seconds']:>9.2f}{rows / fit['seconds']:>14,.0f}{fit['peak_mb']:>10.0f}"
          f"{fit['cpu_seconds']:>8.1f}")
    lc = counts["seconds_load_validate"] + counts["seconds_count"]
    print(f"{'  read+validate+count (DuckDB)':<34}{lc:>9.2f}{rows / lc:>14,.0f}{counts['peak_mb']:>10.0f}")
    print(f"{'  count query alone':<34}{counts['seconds_count']:>9.2f}{rows / counts['seconds_count']:>14,.0f}{'':>10}")
    print(f"{'pandas read+sort+shift+groupby':<34}{pd_['seconds']:>9.2f}{rows / pd_['seconds']:>14,.0f}{pd_['peak_mb']:>10.0f}")
    if pg and "fit" in pg:
        f2, r2 = pg["fit"], pg["read"]
        print(f"{'stateworth fit from PostgreSQL':<34}{f2['seconds']:>9.2f}{rows / f2['seconds']:>14,.0f}{f2['peak_mb']:>10.0f}"
              f"{f2['cpu_seconds']:>8.1f} + server {f2['server_cpu_seconds']:.1f}")
        print(f"{'  read via ADBC into Arrow alone':<34}{r2['seconds']:>9.2f}{rows / r2['seconds']:>14,.0f}{r2['peak_mb']:>10.0f}"
              f"{r2['cpu_seconds']:>8.1f} + server {r2['server_cpu_seconds']:.1f}")
        print(f"{'  (load with COPY, not in the fit)':<34}{pg['copy_load_seconds']:>9.2f}"
              f"{rows / pg['copy_load_seconds']:>14,.0f}{'':>10}")
    elif pg:
        print(f"PostgreSQL left out: {pg['skipped']}")
    print(f"pandas counts identical to DuckDB's: {pd_['same_counts_as_duckdb']}; whole fit is "
          f"{res['speedup_fit_vs_pandas_counts']:.1f}x the pandas counting alone")
    if pg and "fit" in pg:
        print(f"fit from PostgreSQL: {res['ratio_fit_postgres_vs_parquet_seconds']:.2f}x the Parquet fit's time, "
              f"same model version: {pg['same_version_as_parquet']}")


if __name__ == "__main__":
    main()
