"""``stateworth serve --workers N``: N server processes on one port, run by one supervisor.

Why: a Python gRPC server answers calls under one interpreter lock, so a single process uses
about one core for single-value calls however many the machine has (measured on the 2-core
development machine: one process saturates near 2,800 calls/s; see DEVELOPERS.md). Workers
listen on the same address with ``SO_REUSEPORT`` and the kernel spreads new connections over
them; each worker loads and solves every model itself and answers from its own memory.

The supervisor (this module) owns no gRPC server. It

* reserves the port (a bound, not listening ``SO_REUSEPORT`` socket, so ``--port 0`` gets one
  free port for every worker) and starts the workers, each ``stateworth serve`` with a hidden
  ``--worker-index``; a worker loads its models *before* it listens, so a connection never
  reaches a worker that cannot answer yet;
* logs ``listening`` and then ``serving`` once every worker is ready (workers log
  ``worker_ready``; every worker line carries ``"worker": i``). Each worker also listens on a
  port of its own (``worker_ports`` in the ``serving`` line; ``--worker-ports BASE`` puts worker
  i on BASE + i): a gRPC channel sends all its calls down one connection, hence to one worker,
  so a client that wants every core balances over those addresses (gRPC's ``round_robin``
  policy, or the Python client given the list);
* relays admin loads (:mod:`.peers`): a LoadModel or ReloadModels call on any worker runs on
  every worker, one such load at a time, and answers when all are done; a worker whose load
  failed while others succeeded is restarted, so it starts again from the model directory;
* restarts a worker that exits unexpectedly (after 1 s, doubling up to 30 s while it keeps
  failing within a minute of its start);
* serves ``/metrics`` on ``--metrics-port`` by asking each worker's own endpoint (on a free
  loopback port) and labelling every series ``worker="i"``, plus ``stateworth_workers_ready``
  and ``stateworth_worker_restarts_total``;
* on SIGTERM or SIGINT sends SIGTERM to every worker (each drains its calls in flight), waits,
  and exits 0 when every worker stopped cleanly.

Workers run in their own process session, so a terminal's Ctrl-C reaches the supervisor only,
and a worker whose supervisor disappears (its command pipe closes) drains and exits.
"""

from __future__ import annotations

import json
import logging
import queue
import signal
import socket
import subprocess
import threading
import time
import urllib.request
from dataclasses import dataclass, field
from typing import Callable, Iterator

from prometheus_client import CollectorRegistry
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.exposition import generate_latest
from prometheus_client.parser import text_string_to_metric_families

from stateworth.errors import StateworthError
from stateworth.server import logs
from stateworth.server.metrics import MetricsEndpoint, serve_registry

log = logging.getLogger("stateworth.server")

#: seconds a worker may take to load its models and start listening
START_TIMEOUT = 600.0
RESTART_FIRST, RESTART_MAX, RESTART_WINDOW = 1.0, 30.0, 60.0


class WorkerStartError(StateworthError):
    """A worker exited before it was ready (its own error line is above, on stderr)."""


@dataclass
class _Worker:
    index: int
    proc: subprocess.Popen
    started: float
    ready: threading.Event = field(default_factory=threading.Event)
    metrics_port: int | None = None
    worker_port: int | None = None
    restarts: int = 0
    delay: float = RESTART_FIRST
    lock: threading.Lock = field(default_factory=threading.Lock)

    def send(self, doc: dict) -> None:
        line = json.dumps(doc, separators=(",", ":")) + "\n"
        with self.lock:
            try:
                self.proc.stdin.write(line)
                self.proc.stdin.flush()
            except (OSError, ValueError):  # it is exiting; its reader sees EOF
                pass


def reserve_port(host: str, port: int) -> socket.socket:
    """A bound (not listening) SO_REUSEPORT socket on ``host:port`` (0: a free port), holding the
    port for the workers while they start. ConfigError-like StateworthError when it cannot."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    s = socket.socket(family, socket.SOCK_STREAM)
    try:
        s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEPORT, 1)
        s.bind(("127.0.0.1" if host == "localhost" else host, port))
    except (OSError, AttributeError) as e:
        s.close()
        raise StateworthError(f"cannot reserve {host}:{port} for the workers ({getattr(e, 'strerror', e)}); "
                              "pick another --port, or --workers 1", where="--host/--port") from None
    return s


def merge_workers(texts: list[tuple[int, str]]) -> list[Metric]:
    """The exposition texts of several workers as one set of metric families
    (``prometheus_client.parser``): every sample gets a ``worker="i"`` label, and each family
    is kept once (its HELP and type from the first worker that has it) with the samples of
    every worker, as the format asks."""
    families: dict[str, Metric] = {}
    for index, text in texts:
        for family in text_string_to_metric_families(text):
            merged = families.get(family.name)
            if merged is None:
                merged = families[family.name] = Metric(family.name, family.documentation, family.type, family.unit)
            merged.samples += [s._replace(labels={"worker": str(index), **s.labels}) for s in family.samples]
    return list(families.values())


class _MergedWorkers:
    """The supervisor's collector: each ready worker's own endpoint, scraped when the
    supervisor's is, merged by :func:`merge_workers`, plus ``stateworth_workers_ready`` and
    ``stateworth_worker_restarts_total``."""

    def __init__(self, supervisor: "Supervisor") -> None:
        self.supervisor = supervisor

    def collect(self) -> Iterator[Metric]:
        texts = self.supervisor.scrape_workers()
        yield from merge_workers(texts)
        yield GaugeMetricFamily("stateworth_workers_ready", "Workers answering calls.", value=len(texts))
        yield CounterMetricFamily("stateworth_worker_restarts", "Workers restarted by the supervisor.",
                                  value=self.supervisor.restarts_total)


def port_free(host: str, port: int) -> bool:
    """Whether ``host:port`` can be bound by a socket without SO_REUSEPORT (nobody listens
    there, our own workers included)."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as s:
        try:
            s.bind(("127.0.0.1" if host == "localhost" else host, port))
        except OSError:
            return False
    return True


class Supervisor:
    """Start ``n`` workers (``argv(index, port, worker_port)`` is a worker's command line), keep them running,
    relay their admin loads, serve their merged metrics; :meth:`run` until stopped."""

    def __init__(self, argv: Callable[[int, int, int], list[str]], n: int, host: str, port: int,
                 metrics_host: str = "127.0.0.1", metrics_port: int | None = None, drain_seconds: float = 10.0,
                 start_timeout: float = START_TIMEOUT, worker_base_port: int = 0,
                 coordinate_seconds: float = START_TIMEOUT) -> None:
        if n < 2:
            raise ValueError("a supervisor runs at least two workers")
        self.argv = argv
        self.n = n
        self.host = host
        self.port = port
        self.metrics_host = metrics_host
        self.metrics_port = metrics_port
        self.drain_seconds = drain_seconds
        self.start_timeout = start_timeout
        self.coordinate_seconds = coordinate_seconds
        self.workers: list[_Worker | None] = [None] * n
        #: each worker's own port (base + i when ``worker_base_port``; else free ports, kept
        #: across restarts)
        self.worker_ports: list[int] = [worker_base_port + i if worker_base_port else 0 for i in range(n)]
        self._stopping = threading.Event()
        self._changed = threading.Condition()
        self._jobs: queue.Queue = queue.Queue()
        self._pending: dict[str, dict] = {}
        self._pending_lock = threading.Lock()
        self._httpd: MetricsEndpoint | None = None
        #: the supervisor's own metrics registry (the workers' series, merged when scraped)
        self.registry = CollectorRegistry()
        self.registry.register(_MergedWorkers(self))
        self._life = threading.Lock()  # spawning vs stopping
        self._started = False  # every worker was ready once: from then on, exits are restarted
        self.restarts_total = 0

    # ---- workers -------------------------------------------------------------------------------
    def _spawn(self, index: int, restarts: int = 0, delay: float = RESTART_FIRST) -> _Worker | None:
        with self._life:  # never a new worker once stop() has taken the list of workers to end
            if self._stopping.is_set():
                return None
            proc = subprocess.Popen(self.argv(index, self.port, self.worker_ports[index]), stdin=subprocess.PIPE,
                                    stdout=subprocess.PIPE, stderr=None, text=True, bufsize=1, start_new_session=True)
            w = _Worker(index, proc, time.monotonic(), restarts=restarts, delay=delay)
            self.workers[index] = w
        threading.Thread(target=self._read, args=(w,), name=f"stateworth-worker-{index}", daemon=True).start()
        return w

    def _read(self, w: _Worker) -> None:
        for line in w.proc.stdout:
            try:
                doc = json.loads(line)
            except ValueError:
                continue
            if not isinstance(doc, dict):
                continue
            ev = doc.get("event")
            if ev == "ready":
                w.metrics_port = doc.get("metrics_port")
                w.worker_port = doc.get("worker_port")
                self.worker_ports[w.index] = w.worker_port
                w.ready.set()
                with self._changed:
                    self._changed.notify_all()
            elif ev == "coordinate":
                self._jobs.put((w, doc))
            elif ev == "done":
                self._done(w.index, doc)
        code = w.proc.wait()
        with self._changed:
            self._changed.notify_all()
        self._gone(w, code)

    def _gone(self, w: _Worker, code: int) -> None:
        """A worker's pipe closed: count it out of pending loads; restart it unless stopping."""
        with self._pending_lock:
            keys = list(self._pending)
        for key in keys:
            self._done(w.index, {"id": key, "ok": False, "code": "UNAVAILABLE", "error": f"worker {w.index} exited"})
        if self._stopping.is_set() or self.workers[w.index] is not w:
            return
        if not self._started and not w.ready.is_set():  # a failed first start: start() reports it
            return
        quick = time.monotonic() - w.started < RESTART_WINDOW
        delay = min(RESTART_MAX, w.delay * 2) if quick and w.restarts else RESTART_FIRST
        log.warning("worker exited; restarting it", extra={"fields": {
            "event": "worker_exited", "worker_index": w.index, "exit_code": code, "restart_in_seconds": delay}})
        self.restarts_total += 1
        if self._stopping.wait(delay):
            return
        self._spawn(w.index, w.restarts + 1, delay)

    def _restart(self, index: int) -> None:
        """Stop worker ``index`` gracefully; :meth:`_gone` starts it again."""
        w = self.workers[index]
        if w is not None and w.proc.poll() is None:
            log.warning("restarting a worker whose load failed", extra={"fields": {
                "event": "worker_restart", "worker_index": index}})
            w.proc.send_signal(signal.SIGTERM)

    # ---- admin loads -------------------------------------------------------------------------
    def _coordinator(self) -> None:
        """One load at a time: send it to every live worker, wait for all (at most
        ``coordinate_seconds``), answer the asker. Workers that failed while others succeeded,
        that did not answer, or that ended up serving other versions than the asker (the
        directory changed under the load) are restarted: they start again from the directory."""
        while True:
            item = self._jobs.get()
            if item is None:
                return
            origin, doc = item
            key = str(doc.get("id"))
            state = {"expected": set(), "results": {}, "done": threading.Event()}
            with self._pending_lock:  # registered before the workers are chosen: an exit counts
                self._pending[key] = state
                live = [w for w in self.workers if w is not None and w.proc.poll() is None
                        and (w.ready.is_set() or w is origin)]
                state["expected"] = {w.index for w in live}
            cmd = {"op": doc.get("op"), "id": key, "artifact": doc.get("artifact", "")}
            for w in live:
                w.send(cmd)
            if not state["expected"]:
                state["done"].set()
            state["done"].wait(self.coordinate_seconds)
            with self._pending_lock:
                self._pending.pop(key, None)
                got = dict(state["results"])
            for i in state["expected"] - set(got):
                got[i] = {"ok": False, "code": "UNAVAILABLE",
                          "error": f"worker {i} did not finish within {self.coordinate_seconds:.0f} s"}
            mine = got.get(origin.index, {}).get("versions")
            for r in got.values():
                if r.get("ok") and mine is not None and r.get("versions") != mine:
                    r.update(ok=False, code="UNAVAILABLE",
                             error="serves other versions than the asking worker (the model directory changed "
                                   "during the load)")
            results = [{"worker": i, **{k: got[i].get(k) for k in ("ok", "code", "error")}} for i in sorted(got)]
            origin.send({"op": "result", "id": key, "results": results})
            ok = [r for r in results if r.get("ok")]
            if ok and len(ok) < len(results):  # mixed: the failed ones start again from the directory
                for r in results:
                    if not r.get("ok"):
                        self._restart(r["worker"])

    def _done(self, index: int, doc: dict) -> None:
        with self._pending_lock:
            state = self._pending.get(str(doc.get("id")))
            if state is None or index not in state["expected"] or index in state["results"]:
                return
            state["results"][index] = {k: doc.get(k) for k in ("ok", "code", "error", "versions")}
            if set(state["results"]) >= state["expected"]:
                state["done"].set()

    # ---- metrics -----------------------------------------------------------------------------
    def scrape_workers(self) -> list[tuple[int, str]]:
        """(index, exposition text) of every ready worker that answered its endpoint."""
        texts: list[tuple[int, str]] = []
        for w in list(self.workers):
            if w is None or not w.ready.is_set() or w.metrics_port is None or w.proc.poll() is not None:
                continue
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{w.metrics_port}/metrics", timeout=5) as r:
                    texts.append((w.index, r.read().decode()))
            except OSError:
                continue
        return texts

    def render_metrics(self) -> str:
        """The merged exposition text (Prometheus text format 0.0.4)."""
        return generate_latest(self.registry).decode()

    def _serve_metrics(self) -> None:
        try:
            self._httpd = serve_registry(self.registry, self.metrics_host, self.metrics_port)
        except OSError as e:
            raise StateworthError(f"cannot serve metrics on {self.metrics_host}:{self.metrics_port} ({e.strerror})",
                                  where="--metrics-port") from None

    # ---- life cycle --------------------------------------------------------------------------
    def start(self, stop: threading.Event | None = None) -> "Supervisor":
        """Reserve the port, start every worker, return once all are ready (or once ``stop`` is
        set). Raises WorkerStartError (after stopping the others) when one exits before it is
        ready."""
        # SO_REUSEPORT would let the workers share a port with another server: refuse taken ones
        if self.port and not port_free(self.host, self.port):
            raise StateworthError(f"{self.host}:{self.port} is in use; pick another --port", where="--port")
        for i, wp in enumerate(self.worker_ports):
            if wp and (wp == self.port or not port_free(self.host, wp)):
                raise StateworthError(f"worker {i}'s port {wp} is in use or is --port; pick another --worker-ports "
                                      f"base (worker i listens on BASE + i)", where="--worker-ports")
        hold = reserve_port(self.host, self.port)
        self.port = hold.getsockname()[1]
        try:
            if self.metrics_port is not None:
                self._serve_metrics()
            for i in range(self.n):
                self._spawn(i)
            threading.Thread(target=self._coordinator, name="stateworth-coordinator", daemon=True).start()
            log.info("listening", extra={"fields": {
                "event": "listening", "host": self.host, "port": self.port, "workers": self.n,
                "metrics_port": None if self._httpd is None else self._httpd.server_port}})
            end = time.monotonic() + self.start_timeout
            with self._changed:
                while not all(w.ready.is_set() for w in self.workers):
                    if stop is not None and stop.is_set():
                        return self
                    dead = [w for w in self.workers if w.proc.poll() is not None and not w.ready.is_set()]
                    if dead or time.monotonic() > end:
                        self._stopping.set()
                        self._terminate(5.0)
                        w = dead[0] if dead else None
                        raise WorkerStartError(
                            f"worker {w.index} exited with status {w.proc.returncode} before serving (its message is "
                            "above)" if w else f"the workers were not ready within {self.start_timeout:.0f} s",
                            where="stateworth serve --workers")
                    self._changed.wait(0.5)
        finally:
            hold.close()
        self._started = True
        log.info("serving", extra={"fields": {"event": "serving", "port": self.port, "workers": self.n,
                                              "worker_ports": list(self.worker_ports)}})
        return self

    def _terminate(self, grace: float) -> list[int | None]:
        """SIGTERM the workers alive now, wait ``grace`` seconds, kill the rest; their exit codes
        (None for a worker that had already exited: its exit was logged then)."""
        with self._life:
            self._stopping.set()
            procs = [w.proc for w in self.workers if w is not None]
        alive = [p.poll() is None for p in procs]
        for p in procs:
            if p.poll() is None:
                p.send_signal(signal.SIGTERM)
        end = time.monotonic() + grace
        for p in procs:
            try:
                p.wait(max(0.0, end - time.monotonic()))
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()
        return [p.returncode if a else None for p, a in zip(procs, alive)]

    def stop(self) -> int:
        """SIGTERM every worker, wait for their drain; 0 when all stopped cleanly."""
        self._stopping.set()
        log.info("draining", extra={"fields": {"event": "draining", "grace_seconds": self.drain_seconds,
                                                "workers": self.n}})
        codes = self._terminate(self.drain_seconds + 30.0)
        self._jobs.put(None)
        if self._httpd is not None:
            self._httpd.shutdown()
        bad = [i for i, c in enumerate(codes) if c not in (0, None)]
        log.info("stopped", extra={"fields": {"event": "stopped", "worker_exit_codes": codes}})
        logs.flush()
        return 1 if bad else 0


def run_supervised(argv: Callable[[int, int, int], list[str]], n: int, host: str, port: int, *,
                   metrics_host: str = "127.0.0.1", metrics_port: int | None = None,
                   drain_seconds: float = 10.0, worker_base_port: int = 0) -> int:
    """Serve with ``n`` workers until SIGTERM/SIGINT (the ``stateworth serve --workers`` path)."""
    sup = Supervisor(argv, n, host, port, metrics_host, metrics_port, drain_seconds,
                     worker_base_port=worker_base_port)
    stop = threading.Event()
    prev = {s: signal.signal(s, lambda *a: stop.set()) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        sup.start(stop)
        while not stop.wait(0.5):
            pass
        return sup.stop()
    finally:
        for s, h in prev.items():
            signal.signal(s, h)
