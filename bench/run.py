"""``make bench``: the solve benchmark (and the other areas' benchmarks when present).

For each reference size (bench/models.py) it solves to 1e-8 max-norm relative residual with
stateworth and, in the same run, with scipy spsolve, scipy GMRES and BiCGStab on the explicit
CSR matrix and numpy power iteration. Each solver runs in its own process (peak memory is its
own). A reference is skipped, and said so, where its time extrapolated from the smaller sizes
would exceed 5 minutes. It also measures memory bandwidth (a large numpy copy) and compares the
operator apply with its bandwidth floor (bytes an apply must read and write / bandwidth).

Writes bench/out/solve.json and prints a table. Options: --sizes 10k,100k --skip-others

Then (unless --skip-others) the other benchmarks, each in its own process: the cold/warm
benchmark (bench/cold_bench.py: fresh processes as a user meets them, beside the plain scipy
script, on fitted, generator and family models; bench/out/cold.json), fit, valuation, serving.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
from pathlib import Path


HERE = Path(__file__).resolve().parent
OUT = HERE / "out"
LIMIT_S = 300.0
REFS = ["spsolve", "gmres", "bicgstab", "power"]
# growth exponents used to extrapolate a reference's time to the next size (conservative)
GROWTH = {"spsolve": 1.5, "gmres": 1.2, "bicgstab": 1.2, "power": 1.1, "build_csr": 1.0}


def bandwidth_gbps() -> float:
    """Measured in a child process, so that the 1 GB it touches does not count in the peak
    memory the solver processes report (ru_maxrss survives fork + exec)."""
    code = ("import numpy as np, time, math\n"
            "a = np.ones(64 * 1024 * 1024); b = np.empty_like(a); np.copyto(b, a)\n"
            "best = math.inf\n"
            "for _ in range(5):\n"
            "    t0 = time.perf_counter(); np.copyto(b, a); best = min(best, time.perf_counter() - t0)\n"
            "print(2 * a.nbytes / best / 1e9)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return float(out.stdout.strip())


def _write(path: Path, doc) -> None:
    from stateworth.files import write_json
    write_json(path, doc, indent=2)


def run_one(size: str, solver: str, csr: str | None, timeout: float, devices: int | None = None) -> dict:
    cmd = [sys.executable, str(HERE / "solve_one.py"), "--size", size, "--solver", solver]
    env = dict(os.environ)
    # every solver process (references included) gets huge pages for large buffers, as `make` sets
    env.setdefault("GLIBC_TUNABLES", "glibc.malloc.hugetlb=1")
    if csr:
        cmd += ["--csr", csr]
    if devices:
        cmd += ["--devices", str(devices)]
        env["XLA_FLAGS"] = f"--xla_force_host_platform_device_count={devices}"
    try:
        out = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, check=True, env=env)
    except subprocess.TimeoutExpired:
        return {"solver": solver, "skipped": f"timed out after {timeout:.0f} s"}
    except subprocess.CalledProcessError as e:
        return {"solver": solver, "skipped": f"failed: {e.stderr.strip().splitlines()[-1] if e.stderr else e}"}
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    import models

    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default=",".join(models.DEFAULT))
    ap.add_argument("--devices", type=int, default=2,
                    help="also solve the two largest sizes sharded over this many forced host devices")
    ap.add_argument("--skip-others", action="store_true", help="run only the solve benchmark")
    ap.add_argument("--merge", action="store_true",
                    help="keep the rows of bench/out/solve.json for sizes not run this time")
    args = ap.parse_args()
    OUT.mkdir(parents=True, exist_ok=True)
    sizes = args.sizes.split(",")
    bw = bandwidth_gbps()
    print(f"memory bandwidth (numpy copy, read + write): {bw:.2f} GB/s", flush=True)
    rows: list[dict] = []
    per_size: list[dict] = []
    last: dict[str, tuple[int, float]] = {}
    for size in sizes:
        M, T, B = models.SIZES[size]
        n = M * T * 5 * 5 * B
        print(f"\n== {size}: {n:,} states ==", flush=True)
        sw = run_one(size, "stateworth", None, 900)
        rows.append(sw)
        print(f"  stateworth       {sw.get('seconds', float('nan')):9.3f} s  residual {sw.get('rel_residual', float('nan')):.1e}  "
              f"applies {sw.get('operator_applies')}  rss {sw.get('peak_rss_mb', 0):.0f} MB", flush=True)
        if args.devices and args.devices > 1 and size in sizes[-2:]:
            sh = run_one(size, "stateworth", None, 900, devices=args.devices)
            sh.setdefault("states", n)
            rows.append(sh)
            if "seconds" in sh:
                print(f"  {sh['solver']:<16} {sh['seconds']:9.3f} s  residual {sh['rel_residual']:.1e}  "
                      f"applies {sh['operator_applies']}  rss {sh['peak_rss_mb']:.0f} MB "
                      f"({sw.get('seconds', float('nan')) / sh['seconds']:.2f}x the single-device run)", flush=True)
            else:
                print(f"  stateworth_{args.devices}dev {sh['skipped']}", flush=True)
        csr = str(OUT / f"csr-{size}.npz")

        def est(name: str) -> float:
            if name not in last:
                return 0.0
            n0, t0 = last[name]
            return t0 * (n / n0) ** GROWTH[name]

        build_est = est("build_csr")
        refs_possible = build_est <= LIMIT_S
        if refs_possible and not Path(csr).exists():
            b = run_one(size, "build_csr", csr, LIMIT_S * 2)
            if "seconds" in b:
                last["build_csr"] = (n, b["seconds"])
                print(f"  (explicit CSR: {b['nnz']:,} non-zeros, built in {b['seconds']:.1f} s)", flush=True)
            else:
                refs_possible = False
        for ref in REFS:
            e = est(ref)
            if not refs_possible or e > LIMIT_S:
                why = (f"skipped: extrapolated {e:.0f} s from the previous size exceeds {LIMIT_S:.0f} s"
                       if refs_possible else "skipped: explicit CSR export too large for this size")
                rows.append({"states": n, "solver": ref, "skipped": why})
                print(f"  {ref:<16} {why}", flush=True)
                continue
            row = run_one(size, ref, csr, LIMIT_S + 60)
            row.setdefault("states", n)
            rows.append(row)
            if "seconds" in row:
                last[ref] = (n, row["seconds"])
                print(f"  {row['solver']:<16} {row['seconds']:9.3f} s  residual {row['rel_residual']:.1e}  "
                      f"applies {row['operator_applies']}  rss {row['peak_rss_mb']:.0f} MB", flush=True)
            else:
                print(f"  {ref:<16} {row['skipped']}", flush=True)
        refs_done = [r for r in rows if r.get("states") == n and r.get("solver", "").startswith(("scipy", "numpy"))
                     and "seconds" in r]
        fastest = min(refs_done, key=lambda r: r["seconds"]) if refs_done else None
        info = {"states": n, "size": size, "bandwidth_gbps": bw,
                "apply_seconds": sw.get("apply_seconds"),
                "apply_floor_seconds": sw.get("apply_bytes", 0) / (bw * 1e9) if sw.get("apply_bytes") else None}
        if fastest and "seconds" in sw:
            info["fastest_reference"] = fastest["solver"]
            info["speedup_vs_fastest_reference"] = fastest["seconds"] / sw["seconds"]
        if info["apply_seconds"] and info["apply_floor_seconds"]:
            info["apply_over_floor"] = info["apply_seconds"] / info["apply_floor_seconds"]
        per_size.append(info)
        _write(OUT / "solve.json", rows + per_size)  # after each size, so a cut-short run keeps its rows
        print(f"  apply {info['apply_seconds'] * 1e3:.2f} ms vs floor {info['apply_floor_seconds'] * 1e3:.2f} ms "
              f"({info.get('apply_over_floor', float('nan')):.1f}x)"
              + (f"; {info['speedup_vs_fastest_reference']:.1f}x faster than {fastest['solver']}" if fastest else ""),
              flush=True)
    sw_rows = [r for r in rows if r.get("solver") == "stateworth" and "seconds" in r]
    growth = {}
    if len(sw_rows) >= 2:
        a, b = sw_rows[0], sw_rows[-1]
        growth = {"time_exponent": math.log(b["seconds"] / a["seconds"]) / math.log(b["states"] / a["states"]),
                  "memory_exponent": math.log(b["peak_rss_mb"] / a["peak_rss_mb"]) / math.log(b["states"] / a["states"])}
        print(f"\nstateworth growth from {a['states']:,} to {b['states']:,} states: time ~ n^{growth['time_exponent']:.2f}, "
              f"peak memory ~ n^{growth['memory_exponent']:.2f}")
    doc = rows + per_size + ([{"growth": growth}] if growth else [])
    if args.merge and (OUT / "solve.json").exists():
        ran = {r["states"] for r in rows if "states" in r}
        old = [r for r in json.loads((OUT / "solve.json").read_text())
               if "states" in r and r["states"] not in ran]
        doc = old + doc
    _write(OUT / "solve.json", doc)
    print(f"\nwrote {OUT / 'solve.json'}")
    if not args.skip_others:
        for extra in ("cold_bench.py", "fit_bench.py", "valuation_bench.py", "serve_bench.py", "backtest_bench.py"):
            if (HERE / extra).exists():
                print(f"\n== {extra} ==", flush=True)
                subprocess.run([sys.executable, str(HERE / extra)], check=False)


if __name__ == "__main__":
    main()
