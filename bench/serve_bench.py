"""Serving benchmark: the 3.6 x 10^5-state reference model behind ``stateworth serve``.

The server runs on a loopback port as ``stateworth serve --workers W`` (default: one worker per
core; ``--workers 1`` for one process); this process is the load generator (one gRPC channel
per caller, the stateworth Python client). Every phase is bounded by a call count and a time
limit. Measured:

* single-value unary calls (GetValue) from h2load (``bench/h2load_phase.py``: a load generator in
  C, a few us of CPU a call, so the server gets the cores) at 1, 8 and 32 closed-loop callers,
  spread over the workers' own ports (client-side balancing, as a gRPC client with the
  round_robin policy does), and at 8 callers on the shared port (the kernel's balancing). Errors
  are read from the server's per-code request counts (metrics endpoint): h2load sees HTTP
  statuses only. Skipped, with the reason, where h2load cannot be had (it installs Debian's
  nghttp2-client when run as root);

* single-value unary calls (GetValue) at 1, 8 and 32 concurrent callers: calls per second and
  p50 / p99 latency as seen by the caller (ms), and errors. Callers are asyncio tasks on
  grpc.aio channels (a light load generator); a second, shorter run at 1 and 8 callers uses the
  stateworth Client from one thread per caller (what a Python service embedding it would see);
* the same single-value call from 8 callers at a fixed offered rate (``--paced``, open loop,
  latency from the scheduled send time): latency at a stated load below saturation;
* values per second through the batch form (BatchGetValues, 10^5 states per call, level codes);
* the same 8-caller load against a bare grpcio server in another process (``--bare-server``: the
  same request parsing and response bytes, no model, interceptor, log or metrics): what Python
  gRPC alone costs per call on this machine, the floor under the service's figure;
* the marginal-transition table (ListMarginalValues, top 20): the first call (compiles the
  adjoint solve and the table gradients) and a second call for another cohort (solves, no
  compile), and a cached repeat.

Beside each unary phase: the CPU time per call of the server process and of this load generator
(Linux /proc and os.times), which together bound the throughput on a small machine. The server's
log (one JSON access line per call) goes to bench/out/serve-server.log, not through a pipe this
process would have to read line by line while it is generating load.

Aims (issue 6, on the 2-core development machine): p99 under 5 ms at 8 callers, at least
10^6 values/s batch, no error. The verdict reads p99 at 8 callers from the h2load phase over
the workers' ports when it ran (the Python generator's figure is reported beside it). Writes
bench/out/serve.json.

    .venv/bin/python bench/serve_bench.py [--calls 4000] [--seconds 20] [--workers 2]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
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


def build_artifact(model_dir: Path) -> dict:
    from models import build

    from stateworth.rules import save_model

    t0 = time.perf_counter()
    m = build("360k")
    save_model(m, model_dir / "reference-360k")
    return {"name": m.name, "version": m.version, "states": m.n_states, "compile_s": time.perf_counter() - t0,
            "axes": {a.name: list(a.levels) for a in m.grid.axes}}


def process_cpu(pid: int) -> float | None:
    """User + system CPU seconds of process ``pid`` so far (None where /proc is not there)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return None
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def own_cpu() -> float:
    t = os.times()
    return t.user + t.system


def with_cpu(server_cpu, phase, *args) -> dict:
    """Run ``phase(*args)`` and add the server's (``server_cpu()``: its CPU seconds so far, or
    None) and this process's CPU microseconds per call."""
    s0, c0 = server_cpu(), own_cpu()
    r = phase(*args)
    s1, c1 = server_cpu(), own_cpu()
    n = max(r["calls"], 1)
    r["load_generator_cpu_us_per_call"] = (c1 - c0) / n * 1e6
    if s0 is not None and s1 is not None:
        r["server_cpu_us_per_call"] = (s1 - s0) / n * 1e6
    return r


def percentile(a: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(a), q)) if a else float("nan")


def unary_phase(target: str, model: str, states: list[dict], callers: int, calls: int, seconds: float) -> dict:
    from stateworth.clients.client import Client

    lat: list[list[float]] = [[] for _ in range(callers)]
    errors = [0] * callers
    per = max(calls // callers, 1)
    end = time.perf_counter() + seconds
    barrier = threading.Barrier(callers + 1)

    def worker(k: int) -> None:
        with Client(target, timeout=10) as c:
            c.value(model, states[k % len(states)])  # connect outside the timed window
            barrier.wait()
            for i in range(per):
                s = states[(k * 7919 + i) % len(states)]
                t = time.perf_counter()
                try:
                    c.value(model, s)
                except Exception:  # noqa: BLE001 - counted as an error, the phase goes on
                    errors[k] += 1
                lat[k].append(time.perf_counter() - t)
                if t > end:
                    break

    ts = [threading.Thread(target=worker, args=(k,)) for k in range(callers)]
    for t in ts:
        t.start()
    barrier.wait()
    t0 = time.perf_counter()
    for t in ts:
        t.join()
    wall = time.perf_counter() - t0
    flat = [x for xs in lat for x in xs]
    return {"callers": callers, "calls": len(flat), "seconds": wall, "calls_per_s": len(flat) / wall,
            "p50_ms": percentile(flat, 50) * 1e3, "p99_ms": percentile(flat, 99) * 1e3,
            "max_ms": max(flat) * 1e3, "errors": int(sum(errors))}


def unary_phase_aio(target: str, model: str, states: list[dict], callers: int, calls: int, seconds: float) -> dict:
    """The same load from asyncio callers on one grpc.aio channel each (a lighter load generator:
    no thread switching in this process, so the latency is mostly the server's)."""
    import asyncio

    import grpc

    from stateworth.v1 import valuation_service_pb2 as pb
    from stateworth.v1 import valuation_service_pb2_grpc as vgrpc

    reqs = [pb.GetValueRequest(name=f"models/{model}", state=pb.State(levels=s)) for s in states]
    per = max(calls // callers, 1)

    async def run() -> tuple[list[float], int, float]:
        chans = [grpc.aio.insecure_channel(target) for _ in range(callers)]
        stubs = [vgrpc.ValuationServiceStub(c) for c in chans]
        for st in stubs:
            await st.GetValue(reqs[0], timeout=10)
        lat: list[float] = []
        errors = 0
        end = time.perf_counter() + seconds

        async def caller(k: int) -> None:
            nonlocal errors
            for i in range(per):
                t = time.perf_counter()
                try:
                    await stubs[k].GetValue(reqs[(k * 7919 + i) % len(reqs)], timeout=10)
                except grpc.aio.AioRpcError:
                    errors += 1
                lat.append(time.perf_counter() - t)
                if t > end:
                    break

        t0 = time.perf_counter()
        await asyncio.gather(*[caller(k) for k in range(callers)])
        wall = time.perf_counter() - t0
        for c in chans:
            await c.close()
        return lat, errors, wall

    lat, errors, wall = asyncio.run(run())
    return {"callers": callers, "calls": len(lat), "seconds": wall, "calls_per_s": len(lat) / wall,
            "p50_ms": percentile(lat, 50) * 1e3, "p99_ms": percentile(lat, 99) * 1e3, "max_ms": max(lat) * 1e3,
            "errors": int(errors), "load_generator": "grpc.aio"}


def paced_phase(target: str, model: str, states: list[dict], callers: int, rate: float, seconds: float) -> dict:
    """Open-loop load: ``callers`` asyncio callers (one grpc.aio channel each) together offer
    ``rate`` calls per second on a fixed schedule (caller k sends at start + (j * callers + k) /
    rate). Latency runs from the scheduled send time, so a late send counts against the server
    rather than thinning the load (no coordinated omission). The closed loop above measures
    latency at saturation; this measures it at a stated load below it."""
    import asyncio

    import grpc

    from stateworth.v1 import valuation_service_pb2 as pb
    from stateworth.v1 import valuation_service_pb2_grpc as vgrpc

    reqs = [pb.GetValueRequest(name=f"models/{model}", state=pb.State(levels=s)) for s in states]
    per = max(int(rate * seconds / callers), 1)

    async def run() -> tuple[list[float], int, float]:
        chans = [grpc.aio.insecure_channel(target) for _ in range(callers)]
        stubs = [vgrpc.ValuationServiceStub(c) for c in chans]
        for st in stubs:
            await st.GetValue(reqs[0], timeout=10)
        lat: list[float] = []
        errors = 0
        start = time.perf_counter() + 0.05

        async def caller(k: int) -> None:
            nonlocal errors
            for j in range(per):
                due = start + (j * callers + k) / rate
                wait = due - time.perf_counter()
                if wait > 0:
                    await asyncio.sleep(wait)
                try:
                    await stubs[k].GetValue(reqs[(k * 7919 + j) % len(reqs)], timeout=10)
                except grpc.aio.AioRpcError:
                    errors += 1
                lat.append(time.perf_counter() - due)

        await asyncio.gather(*[caller(k) for k in range(callers)])
        wall = time.perf_counter() - start
        for c in chans:
            await c.close()
        return lat, errors, wall

    lat, errors, wall = asyncio.run(run())
    return {"callers": callers, "offered_per_s": rate, "calls": len(lat), "seconds": wall,
            "calls_per_s": len(lat) / wall, "p50_ms": percentile(lat, 50) * 1e3, "p99_ms": percentile(lat, 99) * 1e3,
            "max_ms": max(lat) * 1e3, "errors": int(errors), "load_generator": "grpc.aio, open loop"}


def batch_phase(target: str, model: str, shape: list[int], per_call: int, calls: int, seconds: float) -> dict:
    from stateworth.clients.client import Client

    rng = np.random.default_rng(0)
    names = list(shape)
    with Client(target, timeout=60) as c:
        cols = {a: rng.integers(0, n, size=per_call) for a, n in shape.items()}
        c.values(model, cols)  # warm
        t0 = time.perf_counter()
        done, errors = 0, 0
        for _ in range(calls):
            try:
                r = c.values(model, cols)
                done += len(np.asarray(r.values))
            except Exception:  # noqa: BLE001
                errors += 1
            if time.perf_counter() - t0 > seconds:
                break
        wall = time.perf_counter() - t0
        chunks = [{a: v[k:k + per_call // 4] for a, v in cols.items()} for k in range(0, per_call, per_call // 4)]
        t1 = time.perf_counter()
        streamed = sum(len(np.asarray(o.values)) for _ in range(3) for o in c.stream_values(model, chunks))
        swall = time.perf_counter() - t1
    return {"states_per_call": per_call, "calls": calls, "values": done, "seconds": wall, "values_per_s": done / wall,
            "errors": errors, "axes": names, "stream_values_per_s": streamed / swall}


def marginal_phase(target: str, model: str, axes: dict) -> dict:
    from stateworth.clients.client import Client

    out = {}
    with Client(target, timeout=600, solve_timeout=600) as c:
        for label, market in (("first_s", 0), ("second_s", 1), ("cached_s", 1)):
            cohort = {"market": np.array([market] * 5), "tenure": np.array([0, 3, 6, 12, 24]),
                      "status": np.array([2, 2, 3, 3, 4]), "engagement": np.array([1, 2, 2, 3, 4]),
                      "band": np.array([5, 10, 15, 10, 5])}
            t = time.perf_counter()
            r = c.marginal_values(model, cohort, top=20)
            out[label] = time.perf_counter() - t
        out["entries"] = len(r.entries)
        out["top_entry"] = {"axis": r.entries[0].axis, "to": r.entries[0].to, "per_point": r.entries[0].per_point,
                            "unit": r.objective.unit}
    return out


def bare_server(response_file: str, threads: int) -> int:
    """A grpcio server answering GetValue with fixed response bytes (the floor measurement)."""
    from concurrent import futures

    import grpc

    from stateworth.v1 import valuation_service_pb2 as pb

    body = Path(response_file).read_bytes()
    done = threading.Event()
    handler = grpc.method_handlers_generic_handler("stateworth.v1.ValuationService", {
        "GetValue": grpc.unary_unary_rpc_method_handler(lambda request, context: body,
                                                        request_deserializer=pb.GetValueRequest.FromString)})
    server = grpc.server(futures.ThreadPoolExecutor(max_workers=threads), handlers=[handler])
    port = server.add_insecure_port("127.0.0.1:0")
    server.start()
    signal.signal(signal.SIGTERM, lambda *a: done.set())
    print(json.dumps({"event": "listening", "port": port}), file=sys.stderr, flush=True)
    print(json.dumps({"event": "serving"}), file=sys.stderr, flush=True)
    done.wait()
    server.stop(1).wait()
    return 0


def request_counts(metrics_port: int | None) -> dict[str, int]:
    """GetValue calls finished so far by status code, summed over workers (server metrics)."""
    import urllib.request

    from prometheus_client.parser import text_string_to_metric_families

    if metrics_port is None:
        return {}
    with urllib.request.urlopen(f"http://127.0.0.1:{metrics_port}/metrics", timeout=10) as r:
        text = r.read().decode()
    out: dict[str, int] = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            if s.name == "stateworth_requests_total" and s.labels.get("method", "").endswith("/GetValue"):
                out[s.labels["code"]] = out.get(s.labels["code"], 0) + int(s.value)
    return out


def h2load_phases(h2load: str, pid_cpu, ports: list[int], shared_port: int, metrics_port: int | None,
                  bodies: list[bytes], calls: int, seconds: float) -> list[dict]:
    import h2load_phase

    method = "/stateworth.v1.ValuationService/GetValue"
    out = []
    plan = [(c, ports, "worker ports") for c in (1, 8, 32)] + [(8, [shared_port], "shared port")]
    for callers, where, label in plan:
        before = request_counts(metrics_port)
        c0 = pid_cpu()
        r = h2load_phase.run(h2load, where, method, bodies, callers, calls * (2 if callers > 1 else 1), seconds)
        c1 = pid_cpu()
        after = request_counts(metrics_port)
        delta = {k: after.get(k, 0) - before.get(k, 0) for k in after}
        r["target"] = label
        r["server_codes"] = delta
        r["errors"] = sum(v for k, v in delta.items() if k != "OK") + r.get("http_not_200", 0)
        if c0 is not None and c1 is not None and r.get("calls"):
            r["server_cpu_us_per_call"] = (c1 - c0) / r["calls"] * 1e6
        out.append(r)
        print(f"GetValue x{callers:2d} (h2load, {label}): {r.get('calls_per_s', 0):8.0f} calls/s  "
              f"p50 {r.get('p50_ms', float('nan')):.2f} ms  p99 {r.get('p99_ms', float('nan')):.2f} ms  "
              f"p99.9 {r.get('p999_ms', float('nan')):.2f} ms  errors {r['errors']}  CPU/call: server "
              f"{r.get('server_cpu_us_per_call', float('nan')):.0f} us", flush=True)
    return out


def start_server(cmd: list[str], log_path: Path) -> tuple[subprocess.Popen, int, dict]:
    """Start a server subprocess logging to ``log_path``; wait for its ``serving`` line.
    Returns (process, port, the listening and serving lines' fields)."""
    log_file = open(log_path, "w")
    proc = subprocess.Popen(cmd, stderr=log_file, stdout=subprocess.DEVNULL, env=dict(os.environ, PYTHONUNBUFFERED="1"),
                            cwd=ROOT)
    log_file.close()  # the child holds its own descriptor
    port = None
    info: dict = {}
    with open(log_path) as reader:
        while True:
            line = reader.readline()
            if not line:
                if proc.poll() is not None:
                    raise SystemExit(f"the server exited before serving; see {log_path}")
                time.sleep(0.05)
                continue
            try:
                ev = json.loads(line)
            except ValueError:
                continue
            if ev.get("event") == "listening" and "worker" not in ev:
                port = ev["port"]
                info.update(ev)
            if ev.get("event") == "serving" and "worker" not in ev:
                info.update(ev)
                return proc, int(port), info


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--calls", type=int, default=4000, help="unary calls per concurrency level (bound)")
    ap.add_argument("--seconds", type=float, default=20.0, help="time bound per phase")
    ap.add_argument("--threads", type=int, default=2, help="server threads per worker (fewer contend less for the GIL)")
    ap.add_argument("--workers", type=int, default=os.cpu_count() or 1, help="server processes (default: one per core)")
    ap.add_argument("--no-h2load", action="store_true", help="skip the h2load phases")
    ap.add_argument("--paced", type=float, nargs="*", default=[500.0, 1000.0],
                    help="offered rates (calls/s) of the open-loop 8-caller phases")
    ap.add_argument("--bare-server", metavar="RESPONSE_FILE", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.bare_server:
        return bare_server(args.bare_server, args.threads)
    OUT.mkdir(parents=True, exist_ok=True)
    model_dir = OUT / "serve-models"
    shutil.rmtree(model_dir, ignore_errors=True)
    model_dir.mkdir(parents=True)
    info = build_artifact(model_dir)
    print(f"reference model {info['name']} {info['version']}: {info['states']:,} states", flush=True)

    t0 = time.perf_counter()
    cmd = [sys.executable, "-m", "stateworth", "serve", str(model_dir), "--port", "0", "--threads",
           str(args.threads), "--workers", str(args.workers), "--metrics-port", "0"]
    proc, port, served = start_server(cmd, OUT / "serve-server.log")
    worker_pids: list[int] = []
    if args.workers > 1:
        for line in (OUT / "serve-server.log").read_text().splitlines():
            try:
                ev = json.loads(line)
            except ValueError:
                continue
            if ev.get("event") == "worker_ready":
                worker_pids.append(int(ev["pid"]))
    server_pids = worker_pids or [proc.pid]

    def server_cpu() -> float | None:
        vals = [process_cpu(p) for p in server_pids]
        return None if any(v is None for v in vals) else sum(vals)
    ready_s = time.perf_counter() - t0
    target = f"127.0.0.1:{port}"
    print(f"server ready in {ready_s:.1f} s (load, verify and solve) on {target}", flush=True)
    model = info["name"]
    axes = info["axes"]
    rng = np.random.default_rng(1)
    states = [{a: lv[int(rng.integers(len(lv)))] for a, lv in axes.items()} for _ in range(2000)]
    result = {"model": {k: info[k] for k in ("name", "version", "states", "compile_s")}, "server_ready_s": ready_s,
              "server_threads": args.threads, "server_workers": args.workers,
              "worker_ports": served.get("worker_ports"), "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                          "load_average_at_start": list(os.getloadavg())},
              "unary": [], "aims": {"p99_ms_at_8": 5.0, "batch_values_per_s": 1e6}}
    try:
        for callers in (1, 8, 32):
            r = with_cpu(server_cpu, unary_phase_aio, target, model, states, callers, args.calls, args.seconds)
            result["unary"].append(r)
            print(f"GetValue x{callers:2d} (aio callers):    {r['calls_per_s']:8.0f} calls/s  p50 {r['p50_ms']:.2f} ms"
                  f"  p99 {r['p99_ms']:.2f} ms  errors {r['errors']}  CPU/call: server "
                  f"{r.get('server_cpu_us_per_call', float('nan')):.0f} us, load generator "
                  f"{r['load_generator_cpu_us_per_call']:.0f} us", flush=True)
        import h2load_phase

        from stateworth.v1 import valuation_service_pb2 as pb

        h2load, how = (None, "skipped (--no-h2load)") if args.no_h2load else h2load_phase.find_h2load()
        result["h2load"] = {"path": h2load, "how": how}
        bodies = [h2load_phase.grpc_body(pb.GetValueRequest(name=f"models/{model}", state=pb.State(levels=s))
                                         .SerializeToString()) for s in states[:8]]
        if h2load:
            ports = served.get("worker_ports") or [port]
            result["unary_h2load"] = h2load_phases(h2load, server_cpu, ports, port, served.get("metrics_port"),
                                                   bodies, args.calls * 2, args.seconds)
        else:
            print(f"h2load phases skipped: {how}", flush=True)
        for callers in (1, 8):
            r = with_cpu(server_cpu, unary_phase, target, model, states, callers, args.calls // 2, args.seconds / 2)
            r["load_generator"] = "stateworth Client, one thread per caller"
            result.setdefault("unary_client_threads", []).append(r)
            print(f"GetValue x{callers:2d} (Client threads): {r['calls_per_s']:8.0f} calls/s  p50 {r['p50_ms']:.2f} ms"
                  f"  p99 {r['p99_ms']:.2f} ms  errors {r['errors']}", flush=True)
        for rate in args.paced:
            r = with_cpu(server_cpu, paced_phase, target, model, states, 8, rate, args.seconds / 2)
            result.setdefault("unary_paced", []).append(r)
            print(f"GetValue x 8 paced {rate:5.0f}/s:     {r['calls_per_s']:8.0f} calls/s  p50 {r['p50_ms']:.2f} ms"
                  f"  p99 {r['p99_ms']:.2f} ms  errors {r['errors']}  CPU/call: server "
                  f"{r.get('server_cpu_us_per_call', float('nan')):.0f} us", flush=True)
        import grpc

        from stateworth.v1 import valuation_service_pb2 as pb
        from stateworth.v1 import valuation_service_pb2_grpc as vgrpc

        with grpc.insecure_channel(target) as ch:
            sample = vgrpc.ValuationServiceStub(ch).GetValue(
                pb.GetValueRequest(name=f"models/{model}", state=pb.State(levels=states[0])), timeout=10)
        (OUT / "serve-response.bin").write_bytes(sample.SerializeToString())
        bare, bare_port, _ = start_server([sys.executable, str(Path(__file__).resolve()), "--bare-server",
                                        str(OUT / "serve-response.bin"), "--threads", str(args.threads)],
                                       OUT / "serve-bare.log")
        try:
            r = with_cpu(lambda: process_cpu(bare.pid), unary_phase_aio, f"127.0.0.1:{bare_port}", model, states, 8,
                         args.calls, args.seconds)
            if h2load:
                rb = with_cpu(lambda: process_cpu(bare.pid), h2load_phase.run, h2load, [bare_port],
                              "/stateworth.v1.ValuationService/GetValue", bodies, 8, args.calls * 2, args.seconds)
                rb["server"] = "bare grpcio, one process, fixed response bytes"
                result["bare_grpc_h2load"] = rb
                print(f"GetValue x 8 bare grpcio, h2load:  {rb['calls_per_s']:8.0f} calls/s  p50 {rb['p50_ms']:.2f} ms"
                      f"  p99 {rb['p99_ms']:.2f} ms", flush=True)
        finally:
            bare.send_signal(signal.SIGTERM)
            bare.wait(30)
        r["server"] = "bare grpcio, fixed response bytes"
        result["bare_grpc"] = r
        print(f"GetValue x 8 bare grpcio server:  {r['calls_per_s']:8.0f} calls/s  p50 {r['p50_ms']:.2f} ms"
              f"  p99 {r['p99_ms']:.2f} ms  errors {r['errors']}  CPU/call: server "
              f"{r.get('server_cpu_us_per_call', float('nan')):.0f} us, load generator "
              f"{r['load_generator_cpu_us_per_call']:.0f} us", flush=True)
        b = batch_phase(target, model, {a: len(lv) for a, lv in axes.items()}, 100_000, 30, args.seconds)
        result["batch"] = b
        print(f"BatchGetValues: {b['values_per_s']:,.0f} values/s ({b['states_per_call']:,} per call), "
              f"StreamValues {b['stream_values_per_s']:,.0f} values/s, errors {b['errors']}", flush=True)
        m = marginal_phase(target, model, axes)
        result["marginal"] = m
        print(f"ListMarginalValues: first {m['first_s']:.2f} s, second cohort {m['second_s']:.2f} s, "
              f"cached {m['cached_s'] * 1e3:.1f} ms", flush=True)
    finally:
        proc.send_signal(signal.SIGTERM)
        result["server_exit_code"] = proc.wait(60)

    result["machine"]["load_average_at_end"] = list(os.getloadavg())
    u8 = next(r for r in result["unary"] if r["callers"] == 8)
    errors = (sum(r["errors"] for r in result["unary"] + result.get("unary_client_threads", [])
                  + result.get("unary_paced", []))
              + result.get("batch", {}).get("errors", 0))
    h8 = next((r for r in result.get("unary_h2load", []) if r["callers"] == 8 and r["target"] == "worker ports"), None)
    errors += sum(r["errors"] for r in result.get("unary_h2load", []))
    p99_8 = h8["p99_ms"] if h8 else u8["p99_ms"]
    result["verdict"] = {"p99_at_8_ms": p99_8, "p99_at_8_from": "h2load over worker ports" if h8 else "grpc.aio callers",
                         "p99_at_8_ok": p99_8 < 5.0, "p99_at_8_python_generator_ms": u8["p99_ms"],
                         "p99_at_8_paced_ok": {str(r["offered_per_s"]): r["p99_ms"] < 5.0
                                               for r in result.get("unary_paced", [])},
                         "batch_ok": result.get("batch", {}).get("values_per_s", 0) >= 1e6, "no_errors": errors == 0}
    (OUT / "serve.json").write_text(json.dumps(result, indent=2))
    shutil.rmtree(model_dir, ignore_errors=True)
    print(f"wrote {OUT / 'serve.json'}: {result['verdict']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
