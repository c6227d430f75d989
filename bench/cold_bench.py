"""Cold and warm: what a person waits for, beside the plain scipy script, for every size and shape.

Every figure but the warm ones is the wall time of a FRESH PROCESS (interpreter start, imports,
loading, compiling, solving, printing), timed from this process around ``subprocess.run``:

* ``script``: bench/scipy_script.py, the plain scipy script a user would write (load the model
  with ``stateworth.rules.load_model``, ``model.csr()``, ``I - beta P``, solve one stream, print
  one value), once with ``spsolve`` and once with BiCGStab (with its max-norm residual check);
  the faster of the two whole processes is the reference of the ratios;
* ``solve cold``: ``stateworth solve MODEL --force`` with an EMPTY compile cache
  (``STATEWORTH_COMPILE_CACHE`` = a fresh folder), then ``solve warm cache``: the same command
  again with that folder as the first run left it; for models that ``auto`` solves by sparse LU,
  both again with ``--method gmres`` (the compiled path; its own fresh folder);
* ``value``: ``stateworth value MODEL STATE`` after the solve (stored values), STATE a state the
  chain can reach;
* ``stateworth --help`` and ``stateworth value --help``.

Warm, in one process per model: the best of 3 solves (after a first, compiling one) of the first
stream to a max-norm relative residual of 1e-8 by ``method="auto"`` and ``method="gmres"``, and
GMRES's iteration count at 1e-8 for each stream alone (the issue's goal: at most 20) and for
``solve(model, method="gmres", tol=1e-8)`` (every stream at once: GMRES runs column by column and
reports the sum over the streams). The scipy references' warm figure is their solve-only time inside
the script (matrix already built).

Models: the FITTED example (examples/fitness.toml simulated with 20,000 accounts over 24 months,
seed 1, fitted with 30 posterior draws), a fitted generator model (a panel simulated from
bench/models.py's 10k spec and tables, fitted), a fitted two-counter model (small), the family
shapes weekly, flat and two_counters ("large"; "small" with ``--quick``) and the generator sizes
10k, 100k, 360k (10k with ``--quick``). Fitted models are fitted with ``--no-solve``: the solve is
what is measured. Models are prepared once under ``<out>/cold-models`` and reused
(``--rebuild`` prepares them again).

Serving: ``stateworth serve`` on a folder holding the three fitted models with their stored
values; seconds from process start until the gRPC health check answers SERVING.

Ratios (one run, one machine): ``value / script`` and ``solve cold / script`` (aims: at most 0.3
and 1 on the fitted example), ``script / solve cold`` (aim at 360,000 states: at least 5) and
``fastest scipy solve / stateworth warm`` (aim at 360,000 states: at least 40).

Writes ``<out>/cold.json`` (``cold-quick.json`` with ``--quick``), prints one table.

    .venv/bin/python bench/cold_bench.py [--quick] [--models fitness-fitted,flat-small] [--no-serve]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
OUT = HERE / "out"
SPEC = ROOT / "examples" / "fitness.toml"
TOL = 1e-8
#: warm in-process solves timed per method (the best is reported, all are kept)
REPEATS = 3
#: the issue's aims, printed beside the figures (tests never assert on time)
AIMS = {"value_over_script_fitted": 0.3, "solve_cold_over_script_fitted": 1.0, "gmres_iterations": 20,
        "script_over_solve_cold_360k": 5.0, "scipy_over_warm_360k": 40.0, "serve_ready_s": 2.0, "help_s": 0.3}

#: name -> (kind, what to build). kind: "fitness" (the example, simulated and fitted),
#: "gen-fitted" (a generator size, simulated and fitted), "family-fitted" (a family shape and size,
#: simulated and fitted), "family" (a family shape and size), "gen" (a generator size)
MODELS = {
    "fitness-fitted": ("fitness", None),
    "gen-10k-fitted": ("gen-fitted", "10k"),
    "two_counters-small-fitted": ("family-fitted", ("two_counters", "small")),
    "weekly-large": ("family", ("weekly", "large")),
    "flat-large": ("family", ("flat", "large")),
    "two_counters-large": ("family", ("two_counters", "large")),
    "gen-10k": ("gen", "10k"),
    "gen-100k": ("gen", "100k"),
    "gen-360k": ("gen", "360k"),
    "weekly-small": ("family", ("weekly", "small")),
    "flat-small": ("family", ("flat", "small")),
    "two_counters-small": ("family", ("two_counters", "small")),
}
FULL = ["fitness-fitted", "gen-10k-fitted", "two_counters-small-fitted", "weekly-large", "flat-large",
        "two_counters-large", "gen-10k", "gen-100k", "gen-360k"]
QUICK = ["fitness-fitted", "gen-10k-fitted", "two_counters-small-fitted", "weekly-small", "flat-small",
         "two_counters-small", "gen-10k"]
#: the fitted models served together
SERVED = ["fitness-fitted", "gen-10k-fitted", "two_counters-small-fitted"]
#: simulated panels: addressable people, months, seed (the README's example for the fitness model)
PANEL = {"accounts": 20000, "periods": 24, "seed": 1}
DRAWS = 30


# ---- processes --------------------------------------------------------------------------------
def stateworth_cmd() -> list[str]:
    """The console script a user runs (beside this interpreter), else ``python -m stateworth``."""
    exe = Path(sys.executable).parent / "stateworth"
    return [str(exe)] if exe.is_file() else [sys.executable, "-m", "stateworth"]


def child_env(cache: str | Path | None = None) -> dict[str, str]:
    env = dict(os.environ)
    # what `make` sets for every command alike (see stateworth/config.py)
    env.setdefault("GLIBC_TUNABLES", "glibc.malloc.hugetlb=1")
    env["STATEWORTH_COMPILE_CACHE"] = str(cache) if cache is not None else "off"
    env.pop("PYTHONPATH", None)
    return env


def timed(cmd: list[str], env: dict[str, str], timeout: float, memory_gb: float | None = None) -> dict:
    """Run ``cmd`` as a fresh process; its wall time from start to exit, its output, or why not.
    ``memory_gb`` caps the child's address space (a MemoryError there instead of the machine's
    out-of-memory killer)."""
    limit = None
    if memory_gb:
        import resource

        def limit() -> None:
            cap = int(memory_gb * 1024**3)
            resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
    t0 = time.perf_counter()
    try:
        p = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=env, cwd=ROOT,
                           preexec_fn=limit)
    except subprocess.TimeoutExpired:
        return {"skipped": f"timed out after {timeout:.0f} s"}
    wall = time.perf_counter() - t0
    if p.returncode != 0:
        last = (p.stderr.strip() or p.stdout.strip() or "no output").splitlines()[-1]
        return {"skipped": f"exit {p.returncode}: {last}", "wall_s": wall}
    return {"wall_s": wall, "stdout": p.stdout}


def last_json(text: str) -> dict:
    for line in reversed(text.strip().splitlines()):
        line = line.strip()
        if line.startswith("{"):
            return json.loads(line)
    raise ValueError("no JSON line in the output")


def best_of(runs: list[dict]) -> dict:
    ok = [r for r in runs if "wall_s" in r and "skipped" not in r]
    if not ok:
        return runs[-1]
    best = dict(min(ok, key=lambda r: r["wall_s"]))
    if len(runs) > 1:
        best["wall_s_runs"] = [r.get("wall_s") for r in runs]
    return best


# ---- preparing the models ---------------------------------------------------------------------
def prepare(name: str, models_dir: Path, timeout: float, rebuild: bool) -> dict:
    """The model directory of ``name`` (built once, reused), and how it was made."""
    target = models_dir / name
    info_path = models_dir / f"{name}.prep.json"
    from stateworth.rules.artifact import is_model_dir

    if not rebuild and is_model_dir(target) and info_path.exists():
        info = json.loads(info_path.read_text())
        if "estimated_nnz" in info:
            return info
    kind, what = MODELS[name]
    work = models_dir / f"{name}-panel"  # the simulated panel of a fitted model
    models_dir.mkdir(parents=True, exist_ok=True)
    if kind in ("fitness", "gen-fitted", "family-fitted"):
        work.mkdir(exist_ok=True)
    env = child_env(None)
    info: dict = {"model": name, "kind": kind, "dir": str(target)}
    if kind == "fitness":
        panel = work / "panel.parquet"
        sim = timed(stateworth_cmd() + ["simulate", str(SPEC), "--accounts", str(PANEL["accounts"]), "--periods",
                                        str(PANEL["periods"]), "--seed", str(PANEL["seed"]), "-o", str(panel)],
                    env, timeout)
        if "skipped" in sim:
            raise SystemExit(f"simulating the fitness example failed: {sim['skipped']}")
        fit = timed(stateworth_cmd() + ["fit", str(SPEC), "--panel", str(panel), "--markets",
                                        str(work / "panel.markets.csv"), "-o", str(target), "--draws", str(DRAWS),
                                        "--no-solve", "--quiet"], env, timeout)
        if "skipped" in fit:
            raise SystemExit(f"fitting the fitness example failed: {fit['skipped']}")
        info.update({"simulate_wall_s": sim["wall_s"], "fit_wall_s": fit["wall_s"],
                     "fit_command": f"stateworth fit examples/fitness.toml --draws {DRAWS} --no-solve"})
    else:
        cmd = [sys.executable, str(Path(__file__).resolve()), "--child", "prepare", "--name", name,
               "--dir", str(target), "--work", str(work)]
        r = timed(cmd, env, timeout)
        if "skipped" in r:
            raise SystemExit(f"preparing {name} failed: {r['skipped']}")
        info.update(last_json(r["stdout"]))
    # size of the explicit matrix, estimated from the tables (no JAX, nothing enumerated)
    from stateworth.rules import load_model
    from stateworth.solver.sparse import estimated_nnz

    model, _ = load_model(target)
    info.update({"states": model.n_states, "estimated_nnz": estimated_nnz(model), "model_name": model.name,
                 "version": model.version})
    info_path.write_text(json.dumps(info, indent=2))
    return info


def child_prepare(name: str, target: str, work: str) -> None:
    """(child process) Build a generator or family model, or simulate and fit one; save it."""
    sys.path.insert(0, str(HERE))
    import models

    from stateworth.rules import compile_model, parse_spec, save_model

    kind, what = MODELS[name]
    if kind == "gen":
        M, T, B = models.SIZES[what]
        spec, tabs = models.spec_dict(M, T, B), models.tables(M, T, B)
    elif kind == "gen-fitted":
        M, T, B = models.SIZES[what]
        spec, tabs = models.spec_dict(M, T, B), models.tables(M, T, B)
    else:
        spec, tabs = models.FAMILY[what[0]](what[1])
    parsed = parse_spec(spec, source=f"bench:{name}")
    out: dict = {}
    if kind in ("gen", "family"):
        t0 = time.perf_counter()
        m = compile_model(parsed, tabs, source=f"bench:{name}")
        save_model(m, target)
        out["build_s"] = time.perf_counter() - t0
    else:
        from stateworth.estimation.fit import FitOptions, fit_to_dir
        from stateworth.estimation.simulate import simulate_panel, write_simulation

        t0 = time.perf_counter()
        sim = simulate_panel(parsed, PANEL["accounts"], PANEL["periods"], PANEL["seed"], tables=tabs)
        panel, markets = write_simulation(sim, Path(work) / "panel.parquet")
        out["simulate_s"] = time.perf_counter() - t0
        out["panel_rows"] = int(sim.panel.num_rows)
        t0 = time.perf_counter()
        res = fit_to_dir(parsed, panel, markets, target, FitOptions(draws=DRAWS, seed=0), source=f"bench:{name}")
        out["fit_s"] = time.perf_counter() - t0
        m = res.model
    out.update({"states": m.n_states, "model_name": m.name, "version": m.version})
    print(json.dumps(out))


# ---- warm, in one process ---------------------------------------------------------------------
def child_warm(model_dir: str) -> None:
    """(child process) Warm solves of the first stream by auto and gmres (best of REPEATS after a
    first call), and GMRES's iterations at 1e-8 per stream and for every stream at once."""
    from stateworth.rules import load_model
    from stateworth.solver import solve

    model, _ = load_model(model_dir)
    stream = model.streams[0]
    out: dict = {"states": model.n_states, "streams": list(model.streams)}
    for method in ("auto", "gmres"):
        first = solve(model, stream, method=method, tol=TOL)
        sols = [solve(model, stream, method=method, tol=TOL) for _ in range(REPEATS)]
        best = min(sols, key=lambda s: s.seconds)
        out[method] = {"method": best.method, "seconds": best.seconds, "first_call_s": first.seconds,
                       "seconds_runs": [s.seconds for s in sols], "iterations": best.iterations,
                       "operator_applies": best.operator_applies, "residual": float(best.residual)}
    # iterations per stream (GMRES runs column by column; a solve of k streams reports their sum)
    per = {s: solve(model, s, method="gmres", tol=TOL) for s in model.streams}
    out["gmres_per_stream"] = {s: {"iterations": p.iterations, "operator_applies": p.operator_applies,
                                   "residual": float(p.residual)} for s, p in per.items()}
    out["gmres_iterations_max"] = max(p.iterations for p in per.values())
    every = solve(model, method="gmres", tol=TOL)
    out["gmres_all_streams"] = {"iterations": every.iterations, "operator_applies": every.operator_applies,
                                "seconds": every.seconds, "residual": float(every.residual), "notes": list(every.notes)}
    print(json.dumps(out, default=float))


# ---- one model --------------------------------------------------------------------------------
def reachable_state(model_dir: Path) -> list[str] | None:
    """``AXIS=LEVEL`` pairs of a state the chain can reach (from the stored solution), or None."""
    import numpy as np

    from stateworth.rules import load_model
    from stateworth.valuation import stored

    model, _ = load_model(model_dir)
    try:
        solved = stored.load(model_dir, model)
    except (FileNotFoundError, stored.StoredValuesError):
        return None
    idx = 0 if solved.reachable is None else int(np.flatnonzero(solved.reachable)[0])
    codes = np.unravel_index(idx, model.grid.shape)
    return [f"{a.name}={a.levels[int(c)]}" for a, c in zip(model.grid.axes, codes)]


def solve_row(model_dir: Path, method: str | None, cache: Path, timeout: float) -> dict:
    cmd = stateworth_cmd() + ["solve", str(model_dir), "--force", "--json"]
    if method:
        cmd += ["--method", method]
    r = timed(cmd, child_env(cache), timeout)
    if "skipped" in r:
        return r
    doc = json.loads(r.pop("stdout"))
    point = doc.get("solve") or {}
    draws = doc.get("draws") or {}
    r.update({"method": point.get("method"), "iterations": point.get("iterations"),
              "operator_applies": point.get("operator_applies"), "solve_s": point.get("seconds"),
              "residual": point.get("residual"), "draws": draws.get("draws"), "draws_s": draws.get("seconds"),
              "long_run": doc.get("long_run"), "compile_cache": doc.get("compile_cache")})
    return r


def cold_solves(model_dir: Path, method: str | None, scratch: Path, timeout: float, repeats: int) -> tuple[dict, dict]:
    """(empty cache, warm cache): each repeat gets its own fresh cache folder."""
    empty, warm = [], []
    for k in range(repeats):
        cache = Path(tempfile.mkdtemp(prefix=f"cache-{method or 'auto'}-{k}-", dir=scratch))
        empty.append(solve_row(model_dir, method, cache, timeout))
        # what the first run left in the cache (0 for the sparse path, which compiles nothing)
        empty[-1]["cache_files_after"] = sum(1 for f in cache.rglob("*") if f.is_file())
        warm.append(solve_row(model_dir, method, cache, timeout))
        shutil.rmtree(cache, ignore_errors=True)
    return best_of(empty), best_of(warm)


def measure(name: str, info: dict, scratch: Path, opts: argparse.Namespace) -> dict:
    timeout, repeats = opts.timeout, opts.repeats
    model_dir = Path(info["dir"])
    row: dict = {"model": name, "kind": info["kind"], "states": info.get("states"), "prepared": info}
    print(f"\n== {name} ({info.get('states', 0):,} states) ==", flush=True)
    env = child_env(None)
    for solver in ("spsolve", "bicgstab"):
        if info.get("estimated_nnz", 0) > opts.max_nnz:
            row[f"script_{solver}"] = r = {"skipped": f"explicit matrix of about {info['estimated_nnz']:,} non-zeros "
                                           f"(over --max-nnz {opts.max_nnz:,}): scipy has no matrix to work on"}
            print(f"  scipy script ({solver}): {r['skipped']}", flush=True)
            continue
        runs = [timed([sys.executable, str(HERE / "scipy_script.py"), str(model_dir), "--solver", solver], env,
                      opts.script_timeout, memory_gb=opts.script_memory_gb)
                for _ in range(repeats)]
        r = best_of(runs)
        if "stdout" in r:
            r.update(last_json(r.pop("stdout")))
        row[f"script_{solver}"] = r
        row["states"] = row["states"] or r.get("states")
        print(f"  scipy script ({solver}): " + (f"{r['wall_s']:.2f} s (solve {r['solve_s']:.3f} s, residual "
              f"{_f(r['rel_residual'], '{:.1e}')}" + ("" if r.get("reached") else ": not reached, not a reference")
              + ")" if "solve_s" in r else r["skipped"]), flush=True)
    row["solve_cold"], row["solve_warm_cache"] = cold_solves(model_dir, None, scratch, timeout, repeats)
    auto_method = row["solve_cold"].get("method")
    print(f"  stateworth solve --force: empty cache {_s(row['solve_cold'])}, warm cache "
          f"{_s(row['solve_warm_cache'])} ({auto_method})", flush=True)
    if auto_method == "sparse":
        row["solve_gmres_cold"], row["solve_gmres_warm_cache"] = cold_solves(model_dir, "gmres", scratch, timeout,
                                                                             repeats)
        print(f"  stateworth solve --force --method gmres: empty cache {_s(row['solve_gmres_cold'])}, warm cache "
              f"{_s(row['solve_gmres_warm_cache'])}", flush=True)
    # the stored values the last solve left (auto or gmres: the same settings, the same folder)
    state = reachable_state(model_dir)
    if state is None:
        row["value"] = {"skipped": "no stored values to query"}
    else:
        runs = [timed(stateworth_cmd() + ["value", str(model_dir), *state], env, timeout)
                for _ in range(max(repeats, 3))]
        r = best_of(runs)
        r.pop("stdout", None)
        r["state"] = " ".join(state)
        row["value"] = r
    print(f"  stateworth value (stored): {_s(row['value'])}", flush=True)
    cache = Path(tempfile.mkdtemp(prefix="cache-warm-", dir=scratch))
    w = timed([sys.executable, str(Path(__file__).resolve()), "--child", "warm", "--dir", str(model_dir)],
              child_env(cache), timeout * 2)
    shutil.rmtree(cache, ignore_errors=True)
    row["warm"] = last_json(w["stdout"]) if "stdout" in w else w
    if "auto" in row["warm"]:
        wm = row["warm"]
        print(f"  warm in-process (best of {REPEATS}, first stream, 1e-8): auto ({wm['auto']['method']}) "
              f"{wm['auto']['seconds']:.3f} s, gmres {wm['gmres']['seconds']:.3f} s ({wm['gmres']['iterations']} it.); "
              f"gmres iterations per stream {[p['iterations'] for p in wm.get('gmres_per_stream', {}).values()]}, "
              f"every stream at once {wm['gmres_all_streams']['iterations']}", flush=True)
    else:
        print(f"  warm in-process: {row['warm'].get('skipped')}", flush=True)
    row["ratios"] = ratios(row)
    return row


def _s(r: dict) -> str:
    return f"{r['wall_s']:.2f} s" if "wall_s" in r and "skipped" not in r else r.get("skipped", "-")


def _wall(r: dict | None) -> float | None:
    return r["wall_s"] if r and "wall_s" in r and "skipped" not in r else None


def _reached(r: dict | None) -> bool:
    """Whether a scipy script ran and reached the benchmark's residual (1e-8; NaN never does)."""
    return bool(r) and "solve_s" in r and bool(r.get("reached"))


def ratios(row: dict) -> dict:
    # a script counts as a reference only where it reached the residual (BiCGStab can break down)
    scripts = [(s, _wall(row.get(f"script_{s}"))) for s in ("spsolve", "bicgstab") if _reached(row.get(f"script_{s}"))]
    scripts = [(s, w) for s, w in scripts if w is not None]
    out: dict = {}
    if scripts:
        ref_name, ref = min(scripts, key=lambda x: x[1])
        out["script_reference"] = ref_name
        out["script_s"] = ref
        for key in ("solve_cold", "solve_warm_cache", "solve_gmres_cold", "solve_gmres_warm_cache", "value"):
            w = _wall(row.get(key))
            if w is not None:
                out[f"{key}_over_script"] = w / ref
        if _wall(row.get("solve_cold")) is not None:
            out["script_over_solve_cold"] = ref / _wall(row["solve_cold"])
    solves = [(f"scipy_{s}", row[f"script_{s}"]["solve_s"]) for s in ("spsolve", "bicgstab")
              if _reached(row.get(f"script_{s}"))]
    warm = row.get("warm", {})
    if solves and "auto" in warm:
        name, fastest = min(solves, key=lambda x: x[1])
        best = min(warm["auto"]["seconds"], warm["gmres"]["seconds"])
        out.update({"fastest_scipy_solve": name, "fastest_scipy_solve_s": fastest, "warm_s": best,
                    "scipy_over_warm": fastest / best,
                    "scipy_over_warm_auto": fastest / warm["auto"]["seconds"],
                    "scipy_over_warm_gmres": fastest / warm["gmres"]["seconds"]})
    return out


# ---- help and serve ---------------------------------------------------------------------------
def help_rows(timeout: float) -> dict:
    env = child_env(None)
    out = {}
    for key, args in (("help", ["--help"]), ("value_help", ["value", "--help"])):
        r = best_of([timed(stateworth_cmd() + args, env, timeout) for _ in range(5)])
        r.pop("stdout", None)
        out[key] = r
    return out


def serve_ready(model_dirs: list[Path], scratch: Path, timeout: float) -> dict:
    """``stateworth serve`` on a folder holding ``model_dirs`` (with their stored values): seconds
    from process start until the gRPC health check answers SERVING."""
    import grpc
    from grpc_health.v1 import health_pb2, health_pb2_grpc

    folder = scratch / "served"
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir(parents=True)
    for d in model_dirs:
        shutil.copytree(d, folder / d.name)
    log_path = scratch / "serve.log"
    cmd = stateworth_cmd() + ["serve", str(folder), "--port", "0"]
    env = dict(child_env(Path(tempfile.mkdtemp(prefix="cache-serve-", dir=scratch))), PYTHONUNBUFFERED="1")
    with open(log_path, "w") as log_file:
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, stderr=log_file, stdout=subprocess.DEVNULL, env=env, cwd=ROOT)
    out: dict = {"models": [d.name for d in model_dirs], "command": "stateworth serve FOLDER --port 0"}
    try:
        port = None
        listening_s = None
        with open(log_path) as reader:
            while port is None:
                line = reader.readline()
                if not line:
                    if proc.poll() is not None or time.perf_counter() - t0 > timeout:
                        return {**out, "skipped": f"no 'listening' line (see {log_path})"}
                    time.sleep(0.005)
                    continue
                try:
                    ev = json.loads(line)
                except ValueError:
                    continue
                if ev.get("event") == "listening" and "worker" not in ev:
                    port, listening_s = int(ev["port"]), time.perf_counter() - t0
        with grpc.insecure_channel(f"127.0.0.1:{port}") as ch:
            stub = health_pb2_grpc.HealthStub(ch)
            checks = 0
            while True:
                if proc.poll() is not None:
                    return {**out, "skipped": f"the server exited (see {log_path})"}
                if time.perf_counter() - t0 > timeout:
                    return {**out, "skipped": f"not SERVING after {timeout:.0f} s"}
                checks += 1
                try:
                    r = stub.Check(health_pb2.HealthCheckRequest(service=""), timeout=1.0)
                    if r.status == health_pb2.HealthCheckResponse.SERVING:
                        ready = time.perf_counter() - t0
                        break
                except grpc.RpcError:
                    pass
                time.sleep(0.01)
        loaded = [e for e in map(_json_or_none, log_path.read_text().splitlines())
                  if e and e.get("event") == "serving"]
        out.update({"serving_s": ready, "listening_s": listening_s, "health_checks": checks,
                    "versions": loaded[0].get("versions") if loaded else None})
        return out
    finally:
        proc.terminate()
        try:
            proc.wait(30)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def _json_or_none(line: str):
    try:
        return json.loads(line)
    except ValueError:
        return None


# ---- the table --------------------------------------------------------------------------------
def _f(x, fmt: str = "{:.2f}") -> str:
    return "-" if x is None else fmt.format(x)


def print_table(rows: list[dict]) -> None:
    head = ["model", "states", "auto", "script s", "cold s", "warm-cache s", "gmres cold s", "gmres w-c s",
            "value s", "cold/script", "value/script", "scipy solve s", "warm s", "scipy/warm", "GMRES it. max/sum"]
    table = []
    for row in rows:
        ra = row.get("ratios", {})
        wm = row.get("warm", {})
        table.append([
            row["model"], _f(row.get("states"), "{:,}"), row.get("solve_cold", {}).get("method") or "-",
            _f(ra.get("script_s")), _f(_wall(row.get("solve_cold"))), _f(_wall(row.get("solve_warm_cache"))),
            _f(_wall(row.get("solve_gmres_cold"))), _f(_wall(row.get("solve_gmres_warm_cache"))),
            _f(_wall(row.get("value"))), _f(ra.get("solve_cold_over_script"), "{:.2f}x"),
            _f(ra.get("value_over_script"), "{:.2f}x"), _f(ra.get("fastest_scipy_solve_s"), "{:.3f}"),
            _f(min(wm["auto"]["seconds"], wm["gmres"]["seconds"]) if "auto" in wm else None, "{:.3f}"),
            _f(ra.get("scipy_over_warm"), "{:.1f}x"),
            f"{_f(wm.get('gmres_iterations_max'), '{}')}/{_f(wm.get('gmres_all_streams', {}).get('iterations'), '{}')}"])
    widths = [max(len(str(r[i])) for r in [head] + table) for i in range(len(head))]
    print()
    print("  ".join(h.ljust(w) if i == 0 else h.rjust(w) for i, (h, w) in enumerate(zip(head, widths))))
    for r in table:
        print("  ".join(str(c).ljust(w) if i == 0 else str(c).rjust(w) for i, (c, w) in enumerate(zip(r, widths))))
    print("script: the faster whole process of bench/scipy_script.py (spsolve / BiCGStab); cold: `stateworth solve"
          " --force`, empty compile cache; warm-cache: the same again; gmres: with --method gmres; value: `stateworth"
          " value` on the stored values; scipy solve: the faster scipy solve alone; warm: stateworth's best warm"
          " solve in-process (first stream, 1e-8); GMRES it.: iterations at 1e-8, the most any stream alone needs / every stream at once (summed over the streams).")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="small sizes only (a smoke run)")
    ap.add_argument("--models", help=f"comma-separated subset of: {', '.join(MODELS)}")
    ap.add_argument("--no-serve", action="store_true", help="skip the serve measurement")
    ap.add_argument("--repeats", type=int, default=1,
                    help="fresh processes per measurement; the fastest is reported (default 1)")
    ap.add_argument("--timeout", type=float, default=600.0, help="seconds any one stateworth process may take")
    ap.add_argument("--script-timeout", type=float, default=300.0,
                    help="seconds a scipy script may take (default 300; longer counts as no reference)")
    ap.add_argument("--script-memory-gb", type=float, default=8.0,
                    help="address-space cap of a scipy script (default 8 GB: a MemoryError, not the OOM killer)")
    ap.add_argument("--max-nnz", type=int, default=60_000_000,
                    help="skip the scipy scripts where the explicit matrix would have more non-zeros (estimated)")
    ap.add_argument("--rebuild", action="store_true", help="prepare (simulate, fit, build) the models again")
    ap.add_argument("--out", default=str(OUT), help="output folder (default bench/out)")
    ap.add_argument("--child", choices=["prepare", "warm"], help=argparse.SUPPRESS)
    ap.add_argument("--name", help=argparse.SUPPRESS)
    ap.add_argument("--dir", help=argparse.SUPPRESS)
    ap.add_argument("--work", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child == "prepare":
        child_prepare(args.name, args.dir, args.work)
        return 0
    if args.child == "warm":
        child_warm(args.dir)
        return 0
    names = args.models.split(",") if args.models else (QUICK if args.quick else FULL)
    unknown = [n for n in names if n not in MODELS]
    if unknown:
        ap.error(f"unknown model(s) {', '.join(unknown)}; choose from {', '.join(MODELS)}")
    out_dir = Path(args.out)
    out_dir.mkdir(parents=True, exist_ok=True)
    models_dir = out_dir / "cold-models"
    models_dir.mkdir(exist_ok=True)
    result_path = out_dir / ("cold-quick.json" if args.quick else "cold.json")
    doc: dict = {"machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                             "load_average_at_start": list(os.getloadavg())},
                 "command": " ".join(["bench/cold_bench.py"] + sys.argv[1:]), "aims": AIMS, "rows": []}

    def write() -> None:
        from stateworth.files import write_json
        write_json(result_path, doc, indent=2, default=float)

    with tempfile.TemporaryDirectory(prefix="cold-bench-") as tmp:
        scratch = Path(tmp)
        doc["help"] = help_rows(args.timeout)
        print(f"stateworth --help {_s(doc['help']['help'])}, stateworth value --help "
              f"{_s(doc['help']['value_help'])} (best of 5 fresh processes)", flush=True)
        prepared = {}
        for name in names:
            print(f"preparing {name} ...", flush=True)
            prepared[name] = prepare(name, models_dir, args.timeout, args.rebuild)
        for name in names:
            doc["rows"].append(measure(name, prepared[name], scratch, args))
            write()  # after each model, so a cut-short run keeps its rows
        served = [n for n in SERVED if n in prepared]
        if not args.no_serve and served:
            # the solves above stored each model's values; serve them together
            doc["serve"] = serve_ready([Path(prepared[n]["dir"]) for n in served], scratch, args.timeout)
            s = doc["serve"]
            print(f"\nstateworth serve on {len(served)} fitted models with stored values: "
                  + (f"SERVING after {s['serving_s']:.2f} s (listening after {s['listening_s']:.2f} s)"
                     if "serving_s" in s else s["skipped"]), flush=True)
    doc["machine"]["load_average_at_end"] = list(os.getloadavg())
    write()
    print_table(doc["rows"])
    print(f"\nwrote {result_path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
