"""Building and running the server: ports, TLS, limits, health, reflection, SIGTERM drain.

Start-up order: listen (health NOT_SERVING), load and solve every artifact of the model
directory, then SERVING. A worker of ``stateworth serve --workers N`` (``worker_index`` set,
see :mod:`.supervisor`) loads first and listens after, on a port it shares with the other
workers, and relays admin loads through its supervisor (:mod:`.peers`). Health stays NOT_SERVING while no model is loaded (a folder without
any model is refused at start unless ``allow_empty``: then load one later with the admin
LoadModel call). SIGTERM or SIGINT: health
turns NOT_SERVING, new calls are refused, calls in flight get ``drain_seconds`` to finish, then
the process exits with status 0. The stop is bounded whatever the calls do: past the drain time
plus :data:`STOP_SLACK_SECONDS` the server stops without them (``stop_forced`` in the log), and
``stateworth serve`` ends the process even if a solve is still running in a thread.

Admin calls (loads) are off unless an admin token is configured, or ``admin_open`` is set
(``--admin-open``: local development, loopback only).
"""

from __future__ import annotations

import logging
import os
import signal
import sys
import threading
import time
from concurrent import futures
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import grpc
from grpc_health.v1 import health, health_pb2, health_pb2_grpc
from grpc_reflection.v1alpha import reflection

from stateworth.errors import StateworthError
from stateworth.server import logs
from stateworth.server.errors import ConfigError
from stateworth.server.interceptors import CallInterceptor
from stateworth.server.metrics import Metrics, serve_metrics
from stateworth.server.service import AdminServicer, Limits, ValuationServicer
from stateworth.server.store import ModelStore, Snapshot, check_served_path
from stateworth.server.work import WorkPool
from stateworth.v1 import admin_service_pb2, admin_service_pb2_grpc, valuation_service_pb2, valuation_service_pb2_grpc

log = logging.getLogger("stateworth.server")

LOOPBACK = ("127.0.0.1", "::1", "localhost")
#: seconds the stop waits for the gRPC server past the drain time before it gives up on calls
STOP_SLACK_SECONDS = 5.0
SERVICE_NAMES = (valuation_service_pb2.DESCRIPTOR.services_by_name["ValuationService"].full_name,
                 admin_service_pb2.DESCRIPTOR.services_by_name["ModelAdminService"].full_name)


@dataclass
class ServerConfig:
    """Options of ``stateworth serve`` (see ``stateworth serve --help``).

    ``port`` 0 picks a free port (the ``listening`` log line says which). Sizes in bytes,
    times in seconds."""

    model_dir: str
    host: str = "127.0.0.1"
    port: int = 50051
    tls_cert: str | None = None
    tls_key: str | None = None
    token: str | None = None
    admin_token: str | None = None
    #: admin calls without a token (local development; loopback hosts only)
    admin_open: bool = False
    threads: int = 16
    max_concurrent: int = 256
    max_message_bytes: int = 64 * 1024 * 1024
    max_batch: int = 1_000_000
    work_workers: int = 2
    work_queue: int = 8
    work_cache: int = 256
    #: default versions marked by the operator (model name -> version; ``serve --default``)
    defaults: dict[str, str] = field(default_factory=dict)
    #: start on a folder without any model (models loaded later by an admin call)
    allow_empty: bool = False
    #: bytes the solve cache may hold (LRU beyond)
    work_cache_bytes: int = 256 * 1024**2
    #: bytes the finite-horizon values of all models may hold (LRU beyond)
    horizon_cache_bytes: int = 256 * 1024**2
    work_seconds: float = 300.0
    drain_seconds: float = 10.0
    metrics_host: str = "127.0.0.1"
    metrics_port: int | None = None
    reflection: bool = True
    build: Callable[[Any], Any] | None = field(default=None, repr=False)
    #: set in the worker processes of ``stateworth serve --workers N`` (see :mod:`.supervisor`)
    worker_index: int | None = None
    #: a worker's own port (0: a free one), listened on besides the shared ``port``
    worker_port: int | None = None


def read_secret(path: str | None, what: str) -> str | None:
    """A token file's content (stripped); ConfigError naming the file if unreadable or empty."""
    if not path:
        return None
    try:
        text = Path(path).read_text().strip()
    except OSError as e:
        raise ConfigError(f"cannot read the {what} file ({e.strerror})", where=path) from None
    if not text:
        raise ConfigError(f"the {what} file is empty; put the token on its first line", where=path)
    return text


class Server:
    """A configured, started stateworth server. :meth:`wait` blocks until stopped."""

    def __init__(self, config: ServerConfig) -> None:
        self.config = config
        self.metrics = Metrics()
        self.store = ModelStore(config.model_dir, build=config.build, horizon_cache_bytes=config.horizon_cache_bytes,
                                defaults=config.defaults)
        self.pool = WorkPool(config.work_workers, config.work_queue, config.work_cache, config.work_seconds,
                             cache_bytes=config.work_cache_bytes)
        self.health = health.HealthServicer()
        self._stopped = threading.Event()
        self.port: int | None = None
        self.metrics_port: int | None = None
        self._httpd = None
        self.peers = None
        if config.worker_index is not None:
            import sys

            from stateworth.server.peers import PeerLink
            self.peers = PeerLink(config.worker_index, sys.stdin, sys.stdout)
        opts = [("grpc.max_receive_message_length", config.max_message_bytes),
                ("grpc.max_send_message_length", config.max_message_bytes),
                # workers share their port (the kernel spreads connections); one process does not
                ("grpc.so_reuseport", 1 if self.peers is not None else 0)]
        if config.admin_open and config.admin_token:
            raise ConfigError("--admin-open and --admin-token-file contradict each other; give one",
                              where="--admin-open")
        if config.admin_open and config.host not in LOOPBACK:
            raise ConfigError(f"--admin-open is for local development on loopback; on {config.host} give "
                              "--admin-token-file instead", where="--admin-open")
        self._executor = futures.ThreadPoolExecutor(max_workers=config.threads, thread_name_prefix="stateworth-rpc")
        self.grpc = grpc.server(self._executor,
                                interceptors=[CallInterceptor(self.metrics, config.token, config.admin_token,
                                                              config.admin_open)],
                                options=opts, maximum_concurrent_rpcs=config.max_concurrent)
        valuation_service_pb2_grpc.add_ValuationServiceServicer_to_server(
            ValuationServicer(self.store, self.pool, Limits(max_batch=config.max_batch)), self.grpc)
        # a relayed load runs on every worker, each loading and solving: as long as a start may take
        self.admin = AdminServicer(self.store, self.metrics, self.peers, max(config.work_seconds, 600.0))
        admin_service_pb2_grpc.add_ModelAdminServiceServicer_to_server(self.admin, self.grpc)
        health_pb2_grpc.add_HealthServicer_to_server(self.health, self.grpc)
        if config.reflection:
            reflection.enable_server_reflection(SERVICE_NAMES + (health.SERVICE_NAME, reflection.SERVICE_NAME),
                                                self.grpc)
        self.store.listeners.append(self._on_snapshot)
        self.metrics.gauges["stateworth_models_loaded"] = lambda: len(self.store.snapshot.all())
        self.metrics.gauges["stateworth_model_generation"] = lambda: self.store.snapshot.generation
        self.metrics.gauges["stateworth_work_cache_hits_total"] = lambda: self.pool.hits
        self.metrics.gauges["stateworth_work_cache_misses_total"] = lambda: self.pool.misses
        self.metrics.gauges["stateworth_work_cache_bytes"] = lambda: self.pool.cached_bytes
        self.metrics.gauges["stateworth_work_cache_evictions_total"] = lambda: self.pool.evictions
        self.metrics.gauges["stateworth_horizon_cache_bytes"] = lambda: self.store.horizons.stats()["bytes"]
        self.metrics.gauges["stateworth_horizon_cache_evictions_total"] = \
            lambda: self.store.horizons.stats()["evictions"]
        self._set_health(False)

    def _set_health(self, serving: bool) -> None:
        st = health_pb2.HealthCheckResponse.SERVING if serving else health_pb2.HealthCheckResponse.NOT_SERVING
        for name in ("",) + SERVICE_NAMES:
            self.health.set(name, st)

    def _on_snapshot(self, snap: Snapshot) -> None:
        if not self._stopped.is_set():
            self._set_health(not snap.empty)

    def _bind(self, port: int | None = None) -> int:
        c = self.config
        port = c.port if port is None else port
        address = f"[{c.host}]:{port}" if ":" in c.host else f"{c.host}:{port}"
        if bool(c.tls_cert) != bool(c.tls_key):
            raise ConfigError("TLS needs both --tls-cert and --tls-key", where="--tls-cert/--tls-key")
        if c.tls_cert:
            try:
                key, cert = Path(c.tls_key).read_bytes(), Path(c.tls_cert).read_bytes()
            except OSError as e:
                raise ConfigError(f"cannot read the TLS file ({e.strerror})", where=e.filename) from None
            if c.host not in LOOPBACK and port == c.port and c.token is None:
                log.warning("TLS beyond loopback without a query token: anyone who can reach the port may query; "
                            "give --token-file", extra={"fields": {"event": "tls_without_tokens", "host": c.host,
                                                                   "admin_token": c.admin_token is not None}})
            add = lambda: self.grpc.add_secure_port(address, grpc.ssl_server_credentials([(key, cert)]))  # noqa: E731
        else:
            if c.host not in LOOPBACK and port == c.port:
                log.warning("listening beyond loopback without TLS", extra={"fields": {
                    "event": "insecure_listen", "host": c.host}})
            add = lambda: self.grpc.add_insecure_port(address)  # noqa: E731
        try:
            bound = add()
        except RuntimeError:  # grpcio raises where older versions returned 0
            bound = 0
        if not bound:
            raise ConfigError(f"cannot listen on {address}: the port is in use, or the host is not an address of "
                              "this machine; pick another --port (0: a free one) or --host", where="--host/--port")
        return bound

    def start(self, load: bool = True) -> "Server":
        if load:
            check_served_path(Path(self.config.model_dir), self.config.allow_empty)
        if self.peers is not None:
            return self._start_worker()
        self.port = self._bind()
        self.grpc.start()
        if self.config.metrics_port is not None:
            try:
                self._httpd = serve_metrics(self.metrics, self.config.metrics_host, self.config.metrics_port)
            except OSError as e:
                self.grpc.stop(0)
                raise ConfigError(f"cannot serve metrics on {self.config.metrics_host}:{self.config.metrics_port} "
                                  f"({e.strerror})", where="--metrics-port") from None
            self.metrics_port = self._httpd.server_port
        log.info("listening", extra={"fields": {"event": "listening", "host": self.config.host, "port": self.port,
                                                "tls": bool(self.config.tls_cert), "metrics_port": self.metrics_port,
                                                "token": self.config.token is not None,
                                                "admin_token": self.config.admin_token is not None}})
        if load:
            try:
                self.store.reload_all()
            except StateworthError:
                self.stop(0)
                raise
        log.info("serving", extra={"fields": {"event": "serving", "port": self.port,
                                              "versions": [f"{s.name}@{s.version}" for s in self.store.snapshot.all()]}})
        return self

    def _start_worker(self) -> "Server":
        """Load, then listen on the shared port, then tell the supervisor (worker mode)."""
        self.store.reload_all()
        self.port = self._bind()
        # the worker's own port besides the shared one: for clients that balance over workers
        # themselves (one gRPC channel sends every call down one connection, to one worker)
        self.worker_port = self._bind(self.config.worker_port or 0)
        self.grpc.start()
        if self.config.metrics_port is not None:
            self._httpd = serve_metrics(self.metrics, "127.0.0.1", 0)
            self.metrics_port = self._httpd.server_port
        self.peers.run_op = self.admin.run_local
        self.peers.versions = lambda: sorted(f"{s.name}@{s.version}" for s in self.store.snapshot.all())
        self.peers.start()
        log.info("worker serving", extra={"fields": {
            "event": "worker_ready", "port": self.port, "worker_port": self.worker_port, "pid": os.getpid(),
            "versions": [f"{s.name}@{s.version}" for s in self.store.snapshot.all()]}})
        self.peers.ready(self.port, self.worker_port, self.metrics_port)
        return self

    def stop(self, grace: float | None = None) -> bool:
        """Refuse new calls, let calls in flight finish within ``grace`` seconds, stop. Returns
        False when the gRPC server had not stopped ``STOP_SLACK_SECONDS`` after the grace (a
        call that ignores its cancellation): the caller should end the process."""
        if self._stopped.is_set():
            return True
        self._stopped.set()
        self._set_health(False)
        g = self.config.drain_seconds if grace is None else grace
        log.info("draining", extra={"fields": {"event": "draining", "grace_seconds": g}})
        clean = self.grpc.stop(g).wait(g + STOP_SLACK_SECONDS)
        if not clean:
            log.warning("calls still running after the drain; stopping without them", extra={"fields": {
                "event": "stop_forced", "grace_seconds": g}})
        self._executor.shutdown(wait=False, cancel_futures=True)
        self.pool.shutdown()
        if self._httpd is not None:
            self._httpd.shutdown()
        logs.flush()  # the access lines of the last calls come before "stopped"
        log.info("stopped", extra={"fields": {"event": "stopped"}})
        return clean

    def wait(self) -> None:
        self.grpc.wait_for_termination()


def run(config: ServerConfig) -> int:
    """Serve until SIGTERM/SIGINT, then drain and return 0 (the ``stateworth serve`` command,
    which then ends the process within a bound: see :func:`exit_bounded`)."""
    server = Server(config)
    stop = threading.Event()

    def on_signal(signum, frame) -> None:
        stop.set()

    prev = {s: signal.signal(s, on_signal) for s in (signal.SIGTERM, signal.SIGINT)}
    if server.peers is not None:  # a worker whose supervisor is gone stops too
        server.peers.on_close = stop.set
    try:
        server.start()
        while not stop.wait(0.5):
            pass
        server.stop()
    finally:
        for s, h in prev.items():
            signal.signal(s, h)
    return 0


def exit_bounded(rc: int, seconds: float = 2.0) -> None:
    """End the process with status ``rc`` once the server has stopped: threads get ``seconds``
    to end, logs are flushed, then the process exits without Python's own shutdown. That
    shutdown joins every worker thread of every thread pool, daemon or not, so a solve still
    running in the work pool (a JAX computation cannot be interrupted) would hold the exit
    until it ends, minutes past the drain. For the ``stateworth serve`` command only, never a
    library caller."""
    end = time.monotonic() + seconds
    busy = 0
    for t in threading.enumerate():  # the threads that answer calls and run solves
        if not t.name.startswith(("stateworth-rpc", "stateworth-work")):
            continue
        t.join(max(0.0, end - time.monotonic()))
        busy += t.is_alive()
    if busy:
        log.info("threads still running after the stop end with the process", extra={"fields": {
            "event": "exit_threads", "threads": busy}})
    logs.flush()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass
    os._exit(rc)
