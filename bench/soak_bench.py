"""Soak benchmark: the service under a steady mixed load while its models change and its
workers die.

``stateworth serve --workers W`` runs on a loopback port over a model directory of two model
folders; this process, for ``--minutes`` (default 30):

* offers mixed queries at a steady rate (``--rate`` calls/s over ``--callers`` threads, each
  with its own channel to the shared port, the stateworth Client with its default retries):
  single values (plain, with an interval, over a finite horizon), batches, streams, acquisition
  contrasts, model listings (and, with ``--with-changes``, transition changes);
* writes a new version of model folder ``a`` every ``--write-seconds`` (three table variants in
  turn, each with posterior draws; ``stateworth.rules.save_model``, the atomic publish), and
  rewrites folder ``b`` with unchanged content now and then (its version must stay);
* reloads (admin ReloadModels, now and then LoadModel) every ``--reload-seconds``;
* kills one worker with SIGKILL every ``--kill-seconds`` (the supervisor restarts it).

Checked on every answer: the version it names is one that was written, and every value equals
what the valuation library computes in this process for that version (batches and streams value
by value, so an answer mixing two versions cannot pass). Counted: calls, calls failed (an
UNAVAILABLE or CANCELLED failure of a call in flight at a kill, or started within
``--kill-window`` seconds after it, is the kill's own; any other is a failure outside the
kills), answers of a wrong version, reload outcomes.
Memory: resident memory of the supervisor and its workers summed, sampled every 30 s. A
worker's memory climbs for its first few minutes (each query path compiles once, each thread
that runs a solve gets its own allocator arena) and then levels off, so kills start only after
``--warmup-seconds`` and stop that long before the end: the start is the last sample before the
first kill, the end the last sample of the run, both with warm workers only; the ratio end /
start is the figure (each worker process's own climb is reported beside it). Finally SIGTERM:
the supervisor's exit status and each worker's.

Goal (issue 21): 0 answers of a wrong or mixed version, 0 calls failed outside a worker kill's
own connections, memory at the end within 10 % of the start. Writes bench/out/soak.json (and
the server's log to bench/out/soak-server.log).

    .venv/bin/python bench/soak_bench.py [--minutes 30] [--rate 20] [--workers 2]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import random
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
OUT = HERE / "out"
sys.path.insert(0, str(HERE))

PLANS = ("basic", "plus")
CHANGE = {"axis": "status", "to": "lapsed", "delta": 0.01, "when": {"status": "basic"}}


# ---- models -----------------------------------------------------------------------------------
def variant(size: str, seed: int, draws: int, name: str | None = None):
    """The reference model of ``size`` with the tables of ``seed`` and ``draws`` posterior draws
    (mixtures of its status table with another seed's: every draw keeps the move rules)."""
    from models import SIZES, spec_dict, tables

    from stateworth.rules import compile_model, parse_spec

    M, T, B = SIZES[size]
    d = spec_dict(M, T, B)
    if name:
        d["model"]["name"] = name
    t = tables(M, T, B, seed)
    other = tables(M, T, B, seed + 100)
    w = np.random.default_rng(seed + 7).uniform(0.0, 0.3, size=draws)
    dr = {"status": np.stack([(1 - x) * t["status"] + x * other["status"] for x in w])} if draws else {}
    return compile_model(parse_spec(d, source=f"soak:{size}"), t, draws=dr, source=f"soak:{size}")


class Expected:
    """What each version must answer, computed here by the valuation library: V of every state
    for each stream and the acquisition value of the probe prospects."""

    def __init__(self) -> None:
        self.values: dict[str, dict[str, np.ndarray]] = {}
        self.acquisition: dict[tuple[str, int, str], float] = {}
        self.model_of: dict[str, str] = {}

    def add(self, model, probes: list[dict]) -> None:
        from stateworth.valuation import Valuer

        v = Valuer.build(model, draws=False)
        n = np.arange(model.n_states)
        self.values[model.version] = {s: np.asarray(v.values(n, s)) for s in model.rewards}
        self.model_of[model.version] = model.name
        for k, st in enumerate(probes):
            if st["status"] == "prospect":
                for plan in PLANS:
                    self.acquisition[(model.version, k, plan)] = float(v.acquisition(st, plan).value)


# ---- the server ---------------------------------------------------------------------------------
class Server:
    """``stateworth serve --workers W`` with its log in a file, read for its events."""

    def __init__(self, model_dir: Path, workers: int, token_file: Path, log_path: Path) -> None:
        self.log_path = log_path
        self.log = open(log_path, "w")
        cmd = [sys.executable, "-m", "stateworth", "serve", str(model_dir), "--port", "0", "--workers", str(workers),
               "--admin-token-file", str(token_file), "--drain-seconds", "5", "--metrics-port", "0"]
        env = dict(os.environ, JAX_PLATFORMS="cpu", PYTHONUNBUFFERED="1")
        self.proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=self.log, cwd=ROOT, env=env)
        self._seen = 0
        self.events: list[dict] = []

    def poll(self) -> list[dict]:
        with open(self.log_path) as f:
            f.seek(self._seen)
            text = f.read()
        cut = text.rfind("\n") + 1
        self._seen += len(text[:cut].encode())
        for line in text[:cut].splitlines():
            if line.startswith("{") and '"event":"rpc"' not in line:
                try:
                    self.events.append(json.loads(line))
                except ValueError:
                    pass
        return self.events

    def wait_for(self, event: str, timeout: float = 600.0, after: int = 0) -> dict:
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            for e in self.poll()[after:]:
                if e.get("event") == event and "worker" not in e:
                    return e
            if self.proc.poll() is not None:
                raise RuntimeError(f"the server exited ({self.proc.returncode}); see {self.log_path}")
            time.sleep(0.2)
        raise TimeoutError(f"no '{event}' from the server; see {self.log_path}")

    def worker_pids(self) -> dict[int, int]:
        out: dict[int, int] = {}
        for e in self.poll():
            if e.get("event") == "worker_ready":
                out[int(e["worker"])] = int(e["pid"])
        return out

    def rss_mib(self) -> dict[str, float]:
        """Resident MiB by process: ``supervisor`` and ``pid <pid>`` of each live worker."""
        out = {"supervisor": _rss_mib(self.proc.pid)}
        for pid in self.worker_pids().values():
            out[f"pid {pid}"] = _rss_mib(pid)
        return out

    def stop(self, timeout: float = 120.0) -> int:
        self.proc.send_signal(signal.SIGTERM)
        try:
            rc = self.proc.wait(timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            rc = self.proc.wait()
        self.log.close()
        return rc


def _rss_mib(pid: int) -> float:
    try:
        with open(f"/proc/{pid}/status") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return 0.0


# ---- the load -----------------------------------------------------------------------------------
class Tally:
    """Thread-safe counts of the run."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.calls: dict[str, int] = {}
        self.latency: list[float] = []
        self.failures: list[dict] = []
        self.wrong: list[dict] = []
        self.versions: dict[str, int] = {}

    def ok(self, kind: str, seconds: float, version: str) -> None:
        with self.lock:
            self.calls[kind] = self.calls.get(kind, 0) + 1
            self.latency.append(seconds)
            self.versions[version] = self.versions.get(version, 0) + 1

    def fail(self, kind: str, code: str, message: str, at: float, ended: float) -> None:
        with self.lock:
            self.calls[kind] = self.calls.get(kind, 0) + 1
            self.failures.append({"kind": kind, "code": code, "at_s": round(at, 3), "ended_s": round(ended, 3),
                                  "message": message[:200]})

    def bad(self, kind: str, version: str, why: str, at: float) -> None:
        with self.lock:
            self.wrong.append({"kind": kind, "version": version, "why": why, "at_s": round(at, 3)})


#: the query mix (kind, weight in 100): lookups mostly, and a finite horizon (solved once per
#: version, in the server's work pool). Transition changes (``--with-changes``: 1 in 100) are
#: left out by default: with a new version every few seconds each one is a cold re-solve of
#: every posterior draw, tens of seconds on the 2-core machine, which measures the solver
#: rather than the service
KINDS = [("value", 35), ("value_interval", 10), ("value_horizon", 5), ("batch", 20), ("contrast", 10),
         ("stream", 5), ("list", 5), ("model_b", 10)]


def caller(k: int, target: str, token: str, model: str, model_b: str, probes: list[dict], expected: Expected,
           tally: Tally, rate: float, t0: float, until: float, stop: threading.Event, with_changes: bool) -> None:
    from stateworth.clients.client import CallError, Client

    rng = random.Random(k)
    kinds = [kk for kk, w in KINDS for _ in range(w)]
    if with_changes:
        kinds[-1] = "change"
    axes = list(probes[0])
    batch_idx = [rng.sample(range(len(probes)), 200) for _ in range(8)]
    prospects = [i for i, p in enumerate(probes) if p["status"] == "prospect"]

    def columns(ix):
        return {a: [probes[i][a] for i in ix] for a in axes}

    def want(version: str, stream: str, idx):
        vals = expected.values.get(version, {}).get(stream)
        return None if vals is None else vals[idx]

    def check(kind: str, version: str, got, wanted, at: float) -> None:
        if version not in expected.values or wanted is None:
            tally.bad(kind, version, "a version that was never written", at)
        elif not np.allclose(np.asarray(got, dtype=np.float64), wanted, rtol=1e-9, atol=1e-9):
            tally.bad(kind, version, "values differ from the version's own", at)

    # deadlines as a patient caller sets them: a solve for a version just written may queue
    # behind the server's own loads on a small machine
    with Client(target, token=token, timeout=60, solve_timeout=300) as c:
        nxt = time.monotonic() + rng.uniform(0, 1 / rate)
        while not stop.is_set() and time.monotonic() < until:
            wait = nxt - time.monotonic()
            if wait > 0:
                time.sleep(wait)
            nxt += 1 / rate
            kind = rng.choice(kinds)
            i = rng.randrange(len(probes))
            at = time.monotonic() - t0
            s = time.perf_counter()
            try:
                if kind == "value":
                    r = c.value(model, probes[i])
                    check(kind, r.version, [r.value.value], want(r.version, "revenue", [_INDEX[i]]), at)
                    version = r.version
                elif kind == "value_interval":
                    r = c.value(model, probes[i], interval=0.9)
                    check(kind, r.version, [r.value.value], want(r.version, "revenue", [_INDEX[i]]), at)
                    if not r.value.interval.lower <= r.value.interval.upper:
                        tally.bad(kind, r.version, "an interval upside down", at)
                    version = r.version
                elif kind == "value_horizon":
                    r = c.value(model, probes[i], horizon=12, timeout=300)
                    if r.version not in expected.values:
                        tally.bad(kind, r.version, "a version that was never written", at)
                    version = r.version
                elif kind == "batch":
                    ix = batch_idx[rng.randrange(len(batch_idx))]
                    r = c.values(model, columns(ix), stream="member_months")
                    check(kind, r.version, np.asarray(r.values), want(r.version, "member_months", [_INDEX[j] for j in ix]),
                          at)
                    version = r.version
                elif kind == "stream":
                    ix = batch_idx[rng.randrange(len(batch_idx))]
                    out = list(c.stream_values(model, [columns(ix[:100]), columns(ix[100:])]))
                    versions = {o.version for o in out}
                    version = out[0].version
                    if len(versions) != 1:
                        tally.bad(kind, ",".join(sorted(versions)), "a stream answered by two versions", at)
                    check(kind, version, np.concatenate([np.asarray(o.values) for o in out]),
                          want(version, "revenue", [_INDEX[j] for j in ix]), at)
                elif kind == "contrast":
                    j = prospects[rng.randrange(len(prospects))]
                    plan = rng.choice(PLANS)
                    r = c.acquisition(model, probes[j], plan)
                    acq = expected.acquisition.get((r.version, j, plan))
                    check(kind, r.version, [r.value.value], None if acq is None else [acq], at)
                    version = r.version
                elif kind == "list":
                    r = c.list_models()
                    version = next(m.default_version for m in r.models if m.name == "models/" + model)
                    if version not in expected.values:
                        tally.bad(kind, version, "a version that was never written", at)
                elif kind == "model_b":
                    r = c.value(model_b, probes[i])
                    check(kind, r.version, [r.value.value], want(r.version, "revenue", [_INDEX[i]]), at)
                    if expected.model_of.get(r.version) != model_b:
                        tally.bad(kind, r.version, "answered by another model's version", at)
                    version = r.version
                else:
                    r = c.transition_change(model, CHANGE["axis"], CHANGE["to"], CHANGE["delta"], when=CHANGE["when"])
                    if r.version not in expected.values:
                        tally.bad(kind, r.version, "a version that was never written", at)
                    version = r.version
                tally.ok(kind, time.perf_counter() - s, version)
            except CallError as e:
                tally.fail(kind, e.code.name, str(e), at, time.monotonic() - t0)
            except Exception as e:  # noqa: BLE001 - any failure is counted, the run goes on
                tally.fail(kind, e.__class__.__name__, str(e), at, time.monotonic() - t0)


#: probe number -> flat state index (filled once by :func:`run`)
_INDEX: dict[int, int] = {}


# ---- the run ------------------------------------------------------------------------------------
def run(args: argparse.Namespace) -> dict:
    import tempfile

    from stateworth.clients.client import Client
    from stateworth.rules import save_model

    OUT.mkdir(exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix="soak-", dir=OUT))
    models, token_file = work / "models", work / "admin.token"
    models.mkdir()
    token = "soak-admin-" + os.urandom(6).hex()
    token_file.write_text(token + "\n")

    print(f"building {args.size} models ...", flush=True)
    variants = [variant(args.size, seed, args.draws) for seed in (0, 1, 2)]
    b = variant(args.size, 9, 0, name="soak-b")
    model, model_b = variants[0].name, b.name
    grid = variants[0].grid
    from stateworth.valuation.reach import reachable

    # states a customer can be in under every variant (others are refused as impossible)
    ok = np.logical_and.reduce([reachable(m) for m in (*variants, b)])
    rng = np.random.default_rng(0)
    status = np.unravel_index(np.arange(grid.size if hasattr(grid, "size") else int(np.prod(grid.shape))),
                              grid.shape)[grid.names.index("status")]
    prospects, members = np.flatnonzero(ok & (status == 0)), np.flatnonzero(ok & (status != 0))
    n_p = args.probes // 4  # a quarter are prospects (contrasts)
    flat = np.concatenate([rng.choice(prospects, n_p), rng.choice(members, args.probes - n_p)])
    codes = np.stack(np.unravel_index(flat, grid.shape), axis=1)
    probes = [{a.name: a.levels[int(c)] for a, c in zip(grid.axes, row)} for row in codes]
    for j, row in enumerate(codes):
        _INDEX[j] = int(np.ravel_multi_index(tuple(int(x) for x in row), grid.shape))
    expected = Expected()
    for m in (*variants, b):
        expected.add(m, probes)
    save_model(variants[0], models / "a")
    save_model(b, models / "b")

    srv = Server(models, args.workers, token_file, OUT / "soak-server.log")
    result: dict = {"config": {k: v for k, v in vars(args).items()},
                    "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                                "platform": platform.platform()},
                    "versions_written": {m.version: m.name for m in (*variants, b)}}
    try:
        listening = srv.wait_for("listening")
        srv.wait_for("serving")
        target = f"127.0.0.1:{listening['port']}"
        print(f"serving on {target}; soak for {args.minutes} min at {args.rate:g} calls/s", flush=True)
        tally = Tally()
        stop = threading.Event()
        t0 = time.monotonic()
        until = t0 + args.minutes * 60
        per_caller = args.rate / args.callers
        threads = [threading.Thread(target=caller, args=(k, target, token, model, model_b, probes, expected, tally,
                                                         per_caller, t0, until, stop, args.with_changes),
                                    daemon=True)
                   for k in range(args.callers)]
        for t in threads:
            t.start()

        writes = {"a": 0, "b_same_content": 0, "b_version_kept": True}
        reloads = {"calls": 0, "loads": 0, "failed_calls": [], "outcomes": {}}
        kills: list[dict] = []
        memory: list[dict] = []
        lock = threading.Lock()

        def writer() -> None:
            from stateworth.rules import model_files

            k = 0
            b_files = model_files(models / "b")
            while not stop.wait(args.write_seconds):
                if time.monotonic() >= until:
                    return
                k += 1
                save_model(variants[k % len(variants)], models / "a")
                writes["a"] += 1
                if k % 10 == 0:  # the same content again: its version folder must stay
                    save_model(b, models / "b")
                    writes["b_same_content"] += 1
                    writes["b_version_kept"] = writes["b_version_kept"] and model_files(models / "b") == b_files

        def reloader() -> None:
            from stateworth.clients.client import CallError
            from stateworth.v1 import admin_service_pb2 as apb

            with Client(target, admin_token=token, timeout=120, solve_timeout=300) as c:
                k = 0
                while not stop.wait(args.reload_seconds):
                    if time.monotonic() >= until:
                        return
                    k += 1
                    try:
                        if k % 5 == 0:
                            c.load_model("a")
                            reloads["loads"] += 1
                        else:
                            r = c.reload_models()
                            reloads["calls"] += 1
                            with lock:
                                for o in r.outcomes:
                                    name = apb.ReloadResult.Name(o.result).removeprefix("RELOAD_RESULT_").lower()
                                    reloads["outcomes"][name] = reloads["outcomes"].get(name, 0) + 1
                    except CallError as e:
                        reloads["failed_calls"].append({"at_s": round(time.monotonic() - t0, 3),
                                                        "code": e.code.name, "message": str(e)[:200]})

        def killer() -> None:
            # kills start once the workers are warm (the memory start is taken just before the
            # first) and end a warm-up before the end (so the end, too, has warm workers only)
            index = 0
            wait = max(args.kill_seconds, args.warmup_seconds + 15)
            while not stop.wait(wait):
                wait = args.kill_seconds
                if time.monotonic() >= until - max(args.kill_window, args.warmup_seconds):
                    return
                pids = srv.worker_pids()
                pid = pids.get(index)
                if pid is None:
                    continue
                before = len(srv.poll())
                at = time.monotonic() - t0
                try:
                    os.kill(pid, signal.SIGKILL)
                except ProcessLookupError:
                    continue
                entry = {"at_s": round(at, 3), "worker": index, "pid": pid}
                deadline = time.monotonic() + 300
                while time.monotonic() < deadline and not stop.is_set():
                    new = [e for e in srv.poll()[before:] if e.get("event") == "worker_ready"
                           and e.get("worker") == index]
                    if new:
                        entry["ready_again_s"] = round(time.monotonic() - t0 - at, 3)
                        entry["new_pid"] = new[-1]["pid"]
                        break
                    time.sleep(0.2)
                kills.append(entry)
                print(f"  killed worker {index} (pid {pid}) at {at:.0f} s; ready again after "
                      f"{entry.get('ready_again_s', 'n/a')} s", flush=True)
                index = (index + 1) % args.workers

        def sampler() -> None:
            while True:
                now = time.monotonic() - t0
                rss = srv.rss_mib()
                memory.append({"at_s": round(now, 1), "total_mib": round(sum(rss.values()), 1),
                               **{k: round(v, 1) for k, v in rss.items()}})
                if stop.wait(30) or time.monotonic() >= until:
                    return

        helpers = [threading.Thread(target=f, daemon=True) for f in (writer, reloader, killer, sampler)]
        for t in helpers:
            t.start()
        last = t0
        while time.monotonic() < until:
            time.sleep(5)
            if time.monotonic() - last >= 60:
                last = time.monotonic()
                with tally.lock:
                    n, f, w = sum(tally.calls.values()), len(tally.failures), len(tally.wrong)
                print(f"  {int((last - t0) / 60)} min: {n:,} calls, {f} failed, {w} wrong; "
                      f"{writes['a']} writes, {reloads['calls']} reloads; memory "
                      f"{memory[-1]['total_mib'] if memory else 0:,.0f} MiB", flush=True)
        seconds = time.monotonic() - t0
        rss = srv.rss_mib()  # the end: before the last calls in flight are waited for
        memory.append({"at_s": round(seconds, 1), "total_mib": round(sum(rss.values()), 1),
                       **{k: round(v, 1) for k, v in rss.items()}})
        stop.set()  # callers and helpers finish the call they are in, then stop
        for t in threads + helpers:
            t.join(360)
        tail = time.monotonic() - t0 - seconds
    finally:
        rc = srv.stop()
    stopped = next((e for e in reversed(srv.poll()) if e.get("event") == "stopped" and "worker" not in e), {})

    def at_kill(f: dict) -> bool:
        """A call in flight when a worker was killed, or started within the window after."""
        return f["code"] in ("UNAVAILABLE", "CANCELLED") and any(
            f["at_s"] <= k["at_s"] + args.kill_window and f["ended_s"] >= k["at_s"] for k in kills)

    own = [f for f in tally.failures if at_kill(f)]
    outside = [f for f in tally.failures if not at_kill(f)]
    # each worker process on its own: its first sample once warm, its last one (a killed worker
    # is replaced by a fresh one, whose smaller memory would hide growth in the total)
    lives: dict[str, list[dict]] = {}
    for m in memory:
        for k, v in m.items():
            if k.startswith("pid ") and v > 0:
                lives.setdefault(k, []).append({"at_s": m["at_s"], "mib": v})
    per_process = {}
    for k, xs in lives.items():
        warm_x = [x for x in xs if x["at_s"] - xs[0]["at_s"] >= args.warmup_seconds] or xs[-1:]
        per_process[k] = {"first_at_s": xs[0]["at_s"], "warm_mib": warm_x[0]["mib"], "warm_at_s": warm_x[0]["at_s"],
                          "last_mib": xs[-1]["mib"], "last_at_s": xs[-1]["at_s"],
                          "last_over_warm": round(xs[-1]["mib"] / warm_x[0]["mib"], 4)}
    first_kill = kills[0]["at_s"] if kills else float("inf")
    warm = [m for m in memory if args.warmup_seconds <= m["at_s"] <= first_kill]
    start = warm[-1] if warm else memory[0]
    end = memory[-1]
    lat = np.asarray(tally.latency)
    calls = sum(tally.calls.values())
    result.update({
        "seconds": round(seconds, 1), "seconds_finishing_calls_in_flight": round(tail, 1),
        "calls": calls, "calls_by_kind": tally.calls, "calls_per_s": round(calls / seconds, 2),
        "answers_by_version": tally.versions,
        "latency_ms": {"p50": round(float(np.percentile(lat, 50)) * 1e3, 3) if lat.size else None,
                       "p99": round(float(np.percentile(lat, 99)) * 1e3, 3) if lat.size else None,
                       "max": round(float(lat.max()) * 1e3, 3) if lat.size else None},
        "failed": {"total": len(tally.failures), "at_worker_kills": len(own), "outside_kills": len(outside),
                   "outside_examples": outside[:20], "at_kill_examples": own[:10]},
        "wrong_or_mixed_version": {"count": len(tally.wrong), "examples": tally.wrong[:20]},
        "writes": writes, "reloads": reloads, "kills": kills,
        "memory": {"start_mib": start["total_mib"], "start_at_s": start["at_s"], "end_mib": end["total_mib"],
                   "end_at_s": end["at_s"], "end_over_start": round(end["total_mib"] / start["total_mib"], 4),
                   "first_sample_mib": memory[0]["total_mib"], "per_process": per_process,
                   "samples": memory},
        "stop": {"supervisor_exit_code": rc, "worker_exit_codes": stopped.get("worker_exit_codes")},
    })
    result["goal"] = {
        "wrong_or_mixed_answers_0": len(tally.wrong) == 0,
        "failed_outside_kills_0": len(outside) == 0,
        "memory_end_within_10pct": result["memory"]["end_over_start"] <= 1.10,
        "met": len(tally.wrong) == 0 and len(outside) == 0 and result["memory"]["end_over_start"] <= 1.10,
    }
    import shutil
    shutil.rmtree(work, ignore_errors=True)
    return result


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--minutes", type=float, default=30.0, help="length of the soak (default 30)")
    p.add_argument("--rate", type=float, default=20.0, help="calls per second offered, all callers together")
    p.add_argument("--callers", type=int, default=8, help="caller threads, one channel each (default 8)")
    p.add_argument("--workers", type=int, default=2, help="server worker processes (default 2)")
    p.add_argument("--size", default="10k", help="reference model size (bench/models.py; default 10k states)")
    p.add_argument("--draws", type=int, default=4, help="posterior draws in model a (default 4)")
    p.add_argument("--probes", type=int, default=400, help="states the queries pick from (default 400)")
    p.add_argument("--write-seconds", type=float, default=3.0, help="a new version of model a every ... s")
    p.add_argument("--reload-seconds", type=float, default=2.0, help="an admin reload every ... s")
    p.add_argument("--kill-seconds", type=float, default=180.0, help="SIGKILL one worker every ... s")
    p.add_argument("--kill-window", type=float, default=15.0,
                   help="seconds after a kill in which UNAVAILABLE/CANCELLED failures are the kill's own")
    p.add_argument("--warmup-seconds", type=float, default=300.0,
                   help="no kill before this nor this long before the end; memory start taken after it (default 300)")
    p.add_argument("--with-changes", action="store_true", help="1 call in 100 a transition change (a re-solve)")
    args = p.parse_args()
    res = run(args)
    OUT.mkdir(exist_ok=True)
    from stateworth.files import write_json
    write_json(OUT / "soak.json", res, indent=2)
    f, w, m = res["failed"], res["wrong_or_mixed_version"], res["memory"]
    print(f"{res['calls']:,} calls in {res['seconds']:.0f} s ({res['calls_per_s']:.1f}/s): "
          f"{f['outside_kills']} failed outside kills, {f['at_worker_kills']} at kills, {w['count']} wrong or mixed; "
          f"{res['writes']['a']} writes, {res['reloads']['calls']} reloads ({res['reloads']['outcomes']}), "
          f"{len(res['kills'])} kills; memory {m['start_mib']:,.0f} -> {m['end_mib']:,.0f} MiB "
          f"({m['end_over_start']:.3f}x); stop exit {res['stop']['supervisor_exit_code']}, workers "
          f"{res['stop']['worker_exit_codes']}; goal met: {res['goal']['met']}")
    print(f"wrote {OUT / 'soak.json'}")
    return 0 if res["goal"]["met"] else 1


if __name__ == "__main__":
    sys.exit(main())
