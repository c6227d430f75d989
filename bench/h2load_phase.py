"""Unary gRPC load from h2load (nghttp2's HTTP/2 load generator, written in C).

Why a second load generator: on a 2-core machine a Python load generator spends about as much
CPU per call as the server it measures (~225 us against ~300 us), so it takes a core from the
server and its own scheduling shows up in the latency tail. h2load spends a few microseconds a
call. It speaks gRPC here because a unary gRPC call is one HTTP/2 POST: ``content-type:
application/grpc``, ``te: trailers``, and a body of one length-prefixed message (a zero byte, the
length as 4 big-endian bytes, the serialized request). h2load counts HTTP statuses only; the
gRPC status travels in trailers, so the benchmark reads the server's own per-code request
counts (its metrics endpoint) to count errors.

Each run gives h2load ``--log-file`` (one line per request: start time in microseconds, HTTP
status, microseconds until the response ended), from which the percentiles are computed.
Callers are split over the given ports (one h2load process each, run together): against the
workers' own ports that is client-side balancing, against the shared port the kernel's.
"""

from __future__ import annotations

import os
import shutil
import struct
import subprocess
import tempfile
from pathlib import Path

import numpy as np

PACKAGE = "nghttp2-client"


def find_h2load(install: bool = True) -> tuple[str | None, str]:
    """(path to h2load, how it was found); installs Debian's nghttp2-client when allowed, root
    and apt-get are there. (None, reason) when it cannot be had."""
    path = shutil.which("h2load")
    if path:
        return path, "on PATH"
    if not install:
        return None, "h2load not on PATH"
    if os.geteuid() != 0 or not shutil.which("apt-get"):
        return None, f"h2load not on PATH; install Debian's {PACKAGE} (needs root and apt-get)"
    r = subprocess.run(["apt-get", "install", "-y", "-q", PACKAGE], capture_output=True, text=True,
                       env=dict(os.environ, DEBIAN_FRONTEND="noninteractive"))
    path = shutil.which("h2load")
    if path:
        return path, f"installed {PACKAGE} with apt-get"
    return None, f"apt-get install {PACKAGE} failed: {r.stderr.strip()[-300:]}"


def grpc_body(message: bytes) -> bytes:
    """One uncompressed gRPC message frame: flag byte 0, 4-byte big-endian length, bytes."""
    return b"\x00" + struct.pack(">I", len(message)) + message


def run(h2load: str, ports: list[int], method: str, bodies: list[bytes], callers: int, calls: int,
        seconds: float, host: str = "127.0.0.1") -> dict:
    """``callers`` closed-loop callers (one connection each, one call at a time) split over
    ``ports``, ``calls`` calls in all, each h2load process stopped after ``seconds`` + 30."""
    per_port = [callers // len(ports) + (1 if i < callers % len(ports) else 0) for i in range(len(ports))]
    jobs = [(p, c) for p, c in zip(ports, per_port) if c > 0]
    with tempfile.TemporaryDirectory(prefix="stateworth-h2load-") as tmp:
        procs = []
        for i, (port, c) in enumerate(jobs):
            body = Path(tmp) / f"body{i}.bin"
            body.write_bytes(bodies[i % len(bodies)])
            n = max(c, calls * c // callers)
            cmd = [h2load, "-n", str(n), "-c", str(c), "-m", "1", "-t", "1", "-d", str(body),
                   "-H", "content-type: application/grpc", "-H", "te: trailers",
                   f"--log-file={tmp}/log{i}.tsv", f"http://{host}:{port}{method}"]
            procs.append(subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True))
        outputs = []
        for p in procs:
            try:
                out, _ = p.communicate(timeout=seconds + 30)
            except subprocess.TimeoutExpired:
                p.kill()
                out, _ = p.communicate()
            outputs.append(out)
        rows = [np.loadtxt(f"{tmp}/log{i}.tsv", ndmin=2, usecols=(0, 1, 2)) for i in range(len(jobs))
                if Path(f"{tmp}/log{i}.tsv").stat().st_size]
    a = np.concatenate(rows) if rows else np.zeros((0, 3))
    if not len(a):
        return {"callers": callers, "calls": 0, "errors": calls, "h2load_output": outputs[-1][-500:] if outputs else ""}
    start, end = a[:, 0].min(), (a[:, 0] + a[:, 2]).max()
    lat = a[:, 2] / 1e3
    wall = (end - start) / 1e6
    return {"callers": callers, "ports": len(jobs), "calls": int(len(a)), "seconds": wall,
            "calls_per_s": len(a) / wall, "p50_ms": float(np.percentile(lat, 50)),
            "p99_ms": float(np.percentile(lat, 99)), "p999_ms": float(np.percentile(lat, 99.9)),
            "max_ms": float(lat.max()), "http_not_200": int(np.sum(a[:, 1] != 200)),
            "load_generator": "h2load (C), one connection per caller"}
