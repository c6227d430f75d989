"""Request counts and latency histograms in the Prometheus text exposition format (0.0.4).

Exposed at ``http://HOST:PORT/metrics`` by a small HTTP server on loopback when the server is
started with ``--metrics-port`` (``--metrics-host`` to change the address). Series:

* ``stateworth_requests_total{method, code}``: finished calls by gRPC method and status code;
* ``stateworth_request_seconds{method}``: histogram of call latency in seconds (server side,
  from the call's start to its last message);
* ``stateworth_models_loaded``, ``stateworth_model_generation``: what is being served;
* ``stateworth_reloads_total{result}``: admin loads by result (ok, failed);
* ``stateworth_work_cache_total{result}``: solve-cache hits and misses.
"""

from __future__ import annotations

import bisect
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Callable

#: histogram bucket upper bounds, seconds
BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)


def _esc(v: str) -> str:
    return v.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


class Metrics:
    """Thread-safe counters and histograms; :meth:`render` gives the exposition text."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._requests: dict[tuple[str, str], int] = {}
        self._hist: dict[str, list[float]] = {}  # method -> bucket counts + [sum, count]
        self._reloads: dict[str, int] = {"ok": 0, "failed": 0}
        self.gauges: dict[str, Callable[[], float]] = {}

    def observe(self, method: str, code: str, seconds: float) -> None:
        with self._lock:
            self._requests[(method, code)] = self._requests.get((method, code), 0) + 1
            h = self._hist.get(method)
            if h is None:
                h = self._hist[method] = [0.0] * (len(BUCKETS) + 2)
            i = bisect.bisect_left(BUCKETS, seconds)
            if i < len(BUCKETS):
                h[i] += 1
            h[-2] += seconds
            h[-1] += 1

    def reload(self, ok: bool) -> None:
        with self._lock:
            self._reloads["ok" if ok else "failed"] += 1

    def render(self) -> str:
        out = ["# HELP stateworth_requests_total Finished gRPC calls by method and status code.",
               "# TYPE stateworth_requests_total counter"]
        with self._lock:
            for (m, c), n in sorted(self._requests.items()):
                out.append(f'stateworth_requests_total{{method="{_esc(m)}",code="{c}"}} {n}')
            out += ["# HELP stateworth_request_seconds Latency of gRPC calls in seconds.",
                    "# TYPE stateworth_request_seconds histogram"]
            for m, h in sorted(self._hist.items()):
                acc = 0.0
                for b, n in zip(BUCKETS, h):
                    acc += n
                    out.append(f'stateworth_request_seconds_bucket{{method="{_esc(m)}",le="{b:g}"}} {int(acc)}')
                out.append(f'stateworth_request_seconds_bucket{{method="{_esc(m)}",le="+Inf"}} {int(h[-1])}')
                out.append(f'stateworth_request_seconds_sum{{method="{_esc(m)}"}} {h[-2]:.6f}')
                out.append(f'stateworth_request_seconds_count{{method="{_esc(m)}"}} {int(h[-1])}')
            out += ["# HELP stateworth_reloads_total Admin loads and reloads by result.",
                    "# TYPE stateworth_reloads_total counter"]
            for r, n in sorted(self._reloads.items()):
                out.append(f'stateworth_reloads_total{{result="{r}"}} {n}')
            gauges = dict(self.gauges)
        for name, fn in sorted(gauges.items()):
            out += [f"# TYPE {name} gauge", f"{name} {fn():g}"]
        return "\n".join(out) + "\n"


def serve_metrics(metrics: Metrics, host: str, port: int) -> ThreadingHTTPServer:
    """Start the /metrics endpoint in a daemon thread; returns the HTTP server (``server_port``)."""
    return serve_exposition(metrics.render, host, port)


def serve_exposition(render: Callable[[], str], host: str, port: int) -> ThreadingHTTPServer:
    """Serve ``render()`` (exposition text) at /metrics from a daemon thread (OSError when the
    address cannot be bound)."""

    class Handler(BaseHTTPRequestHandler):
        def do_GET(self) -> None:  # noqa: N802 - http.server's naming
            if self.path.split("?")[0] != "/metrics":
                self.send_error(404, "only /metrics is served here")
                return
            body = render().encode()
            self.send_response(200)
            self.send_header("Content-Type", "text/plain; version=0.0.4; charset=utf-8")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *args) -> None:  # scrapes are not worth a log line each
            return

    httpd = ThreadingHTTPServer((host, port), Handler)
    httpd.daemon_threads = True
    threading.Thread(target=httpd.serve_forever, name="stateworth-metrics", daemon=True).start()
    return httpd
