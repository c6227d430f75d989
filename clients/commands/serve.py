"""``stateworth serve MODEL_DIR``: the gRPC service over a directory of compiled models."""

from __future__ import annotations

import argparse

NAME = "serve"
HELP = "serve the models of a directory over gRPC (values, contrasts, changes, read-outs)"
DESCRIPTION = """Serve the compiled models of MODEL_DIR over gRPC (package stateworth.v1).

MODEL_DIR is one model folder or a folder of model folders (as `stateworth fit -o` or
`stateworth solve --save` write them); one without any model is refused (exit 1) unless
--allow-empty. Each is verified at start and its stored values read; the admin calls
LoadModel / ReloadModels load changed artifacts off to the side and swap them in atomically;
a model folder that cannot be loaded keeps serving the version it had. Admin calls are off
unless --admin-token-file is given (or --admin-open, for local development on loopback).
Listens on loopback unless --host says otherwise; use TLS and tokens beyond it. Logs are JSON
lines on stderr; --metrics-port serves Prometheus metrics at http://127.0.0.1:PORT/metrics.
SIGTERM drains the calls in flight (--drain-seconds) and exits 0, at most a few seconds after
the drain time whatever the calls do. Health: grpc.health.v1, NOT_SERVING while no
model is loaded.

Several versions of one model (folders holding the same model name) are served side by side;
requests that pin no version get the default: the one marked by --default NAME=VERSION, else
by MODEL_DIR/defaults.toml ([default_versions] with lines NAME = "VERSION", re-read on every
reload), else the newest written. A change of default is logged (event default_changed).

--workers N runs N server processes on the one port (SO_REUSEPORT: the kernel spreads new
connections over them) under a supervisor that restarts a worker that dies, runs admin loads
on every worker before answering, and merges the workers' metrics (each series gets a worker
label). One process answers single-value calls on about one core; use one worker per core for
throughput. Each worker holds every model in its own memory.

Answers are model-based estimates under the model's causal assumptions; not accounting figures.

example:
  stateworth serve demo-out/models --port 50051 --token-file query.token --admin-token-file admin.token
  stateworth serve demo-out/models --workers 2 --metrics-port 9464
  stateworth serve demo-out/models --admin-open
  stateworth serve demo-out/models/fitted
  stateworth serve demo-out/models --default fitness-demo=3fa9c2d1
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("model_dir", metavar="MODEL_DIR",
                   help="a model folder (written by fit -o or solve --save), or a folder of model folders")
    p.add_argument("--default", action="append", default=[], metavar="NAME=VERSION",
                   help="the version that answers requests pinning none (repeatable; wins over the folder's "
                        "defaults.toml; otherwise the newest written)")
    p.add_argument("--allow-empty", action="store_true",
                   help="start on a folder without any model yet (load models later with an admin call)")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default loopback 127.0.0.1)")
    p.add_argument("--port", type=int, default=50051, help="port (default 50051; 0 picks a free one)")
    p.add_argument("--tls-cert", help="PEM certificate chain file (with --tls-key: serve TLS)")
    p.add_argument("--tls-key", help="PEM private key file")
    p.add_argument("--token-file", help="file holding the bearer token query calls must send")
    p.add_argument("--admin-token-file", help="file holding the bearer token admin calls (loads) must send; "
                   "without it admin calls are off")
    p.add_argument("--admin-open", action="store_true",
                   help="allow admin calls without a token (local development; loopback hosts only)")
    p.add_argument("--threads", type=int, default=16, help="threads answering calls (default 16; per worker)")
    p.add_argument("--workers", type=int, default=1,
                   help="server processes sharing the port (default 1; one per core for throughput)")
    p.add_argument("--worker-ports", type=int, default=0, metavar="BASE",
                   help="with --workers: worker i also listens on BASE + i (default: free ports, logged)")
    p.add_argument("--worker-index", type=int, help=argparse.SUPPRESS)
    p.add_argument("--worker-port", type=int, help=argparse.SUPPRESS)
    p.add_argument("--max-batch", type=int, default=1_000_000, help="states per batch, chunk or cohort (default 10^6)")
    p.add_argument("--max-message-mb", type=float, default=64.0, help="largest message in MiB (default 64)")
    p.add_argument("--max-concurrent", type=int, default=256, help="calls in progress before RESOURCE_EXHAUSTED")
    p.add_argument("--work-workers", type=int, default=2, help="solves run at once (default 2)")
    p.add_argument("--work-queue", type=int, default=8, help="solves waiting before RESOURCE_EXHAUSTED (default 8)")
    p.add_argument("--work-seconds", type=float, default=300.0, help="longest a solve may take (default 300)")
    p.add_argument("--work-cache-mb", type=float, default=256.0,
                   help="MiB of solve results kept for repeated calls, least recently used evicted (default 256)")
    p.add_argument("--horizon-cache-mb", type=float, default=256.0,
                   help="MiB of finite-horizon values kept for all models, least recently used evicted (default 256)")
    p.add_argument("--drain-seconds", type=float, default=10.0, help="grace for calls in flight on SIGTERM")
    p.add_argument("--metrics-port", type=int, help="serve Prometheus metrics on this port (0: a free one)")
    p.add_argument("--metrics-host", default="127.0.0.1", help="address of the metrics endpoint (default loopback)")
    p.add_argument("--no-reflection", action="store_true", help="do not serve gRPC server reflection")
    p.add_argument("--log-level", default="info", choices=["debug", "info", "warning", "error"])
    p.add_argument("--log-flush-ms", type=float, default=50.0,
                   help="write queued access lines every this many ms (default 50; 0: as each call ends)")
    p.add_argument("--no-access-log", action="store_true",
                   help="no log line per call (metrics still count every call)")


def run(args: argparse.Namespace) -> int:
    from stateworth.errors import QueryError
    from stateworth.server import ServerConfig, read_secret
    from stateworth.server import run as serve
    from stateworth.server.app import exit_bounded
    from stateworth.server.logs import setup

    for opt in ("threads", "max_batch", "max_concurrent", "work_workers", "workers"):
        if getattr(args, opt) < 1:
            raise QueryError(f"--{opt.replace('_', '-')} must be at least 1 (got {getattr(args, opt)})", field=opt)
    for opt in ("work_cache_mb", "horizon_cache_mb"):
        if not getattr(args, opt) >= 0:
            raise QueryError(f"--{opt.replace('_', '-')} must be 0 or more MiB (got {getattr(args, opt)})", field=opt)
    if args.max_message_mb <= 0:
        raise QueryError("--max-message-mb must be positive", field="max_message_mb")
    if args.log_flush_ms < 0:
        raise QueryError(f"--log-flush-ms must be 0 or more (got {args.log_flush_ms})", field="log_flush_ms")
    worker = {"worker": args.worker_index} if args.worker_index is not None else None
    setup(args.log_level, flush_seconds=args.log_flush_ms / 1000, static=worker)
    if args.workers > 1 and args.worker_index is None:
        return _supervise(args)
    if args.no_access_log:
        import logging
        logging.getLogger("stateworth.server.access").setLevel(logging.WARNING)
    config = ServerConfig(model_dir=args.model_dir, host=args.host, port=args.port, tls_cert=args.tls_cert,
                          tls_key=args.tls_key, token=read_secret(args.token_file, "token"),
                          admin_token=read_secret(args.admin_token_file, "admin token"),
                          admin_open=args.admin_open, threads=args.threads, defaults=_defaults(args),
                          allow_empty=args.allow_empty,
                          max_concurrent=args.max_concurrent, max_message_bytes=int(args.max_message_mb * 2**20),
                          max_batch=args.max_batch, work_workers=args.work_workers, work_queue=args.work_queue,
                          work_seconds=args.work_seconds, drain_seconds=args.drain_seconds,
                          work_cache_bytes=int(args.work_cache_mb * 2**20),
                          horizon_cache_bytes=int(args.horizon_cache_mb * 2**20),
                          metrics_host=args.metrics_host, metrics_port=args.metrics_port,
                          reflection=not args.no_reflection, worker_index=args.worker_index,
                          worker_port=args.worker_port)
    exit_bounded(serve(config))  # ends the process (see its docstring)
    return 0  # pragma: no cover


#: options passed on to every worker as they were given (flag, attribute)
_PASSED = [("--host", "host"), ("--tls-cert", "tls_cert"), ("--tls-key", "tls_key"), ("--token-file", "token_file"),
           ("--admin-token-file", "admin_token_file"), ("--threads", "threads"), ("--max-batch", "max_batch"),
           ("--max-message-mb", "max_message_mb"), ("--max-concurrent", "max_concurrent"),
           ("--work-workers", "work_workers"), ("--work-queue", "work_queue"), ("--work-seconds", "work_seconds"),
           ("--work-cache-mb", "work_cache_mb"), ("--horizon-cache-mb", "horizon_cache_mb"),
           ("--drain-seconds", "drain_seconds"), ("--log-level", "log_level"), ("--log-flush-ms", "log_flush_ms")]


def _defaults(args: argparse.Namespace) -> dict[str, str]:
    """``--default NAME=VERSION`` values as a mapping (ConfigError names a malformed one)."""
    from stateworth.server.store import parse_default

    out: dict[str, str] = {}
    for text in args.default:
        name, version = parse_default(text)
        out[name] = version
    return out


def _supervise(args: argparse.Namespace) -> int:
    """``--workers N``: check what every worker would refuse, then run the supervisor."""
    import sys
    from pathlib import Path

    from stateworth.server import ConfigError, read_secret
    from stateworth.server.supervisor import run_supervised

    from stateworth.server.app import LOOPBACK

    from stateworth.server.store import check_served_path

    read_secret(args.token_file, "token")
    read_secret(args.admin_token_file, "admin token")
    check_served_path(Path(args.model_dir), args.allow_empty)
    _defaults(args)
    if args.admin_open and args.admin_token_file:
        raise ConfigError("--admin-open and --admin-token-file contradict each other; give one", where="--admin-open")
    if args.admin_open and args.host not in LOOPBACK:
        raise ConfigError(f"--admin-open is for local development on loopback; on {args.host} give "
                          "--admin-token-file instead", where="--admin-open")
    if bool(args.tls_cert) != bool(args.tls_key):
        raise ConfigError("TLS needs both --tls-cert and --tls-key", where="--tls-cert/--tls-key")
    for f in (args.tls_cert, args.tls_key):
        if f and not Path(f).is_file():
            raise ConfigError("cannot read the TLS file (no such file)", where=f)
    # file options become absolute: a worker resolves them wherever it runs
    absolute = {"tls_cert", "tls_key", "token_file", "admin_token_file"}

    def argv(index: int, port: int, worker_port: int) -> list[str]:
        out = [sys.executable, "-m", "stateworth", "serve", str(Path(args.model_dir).resolve()), "--port", str(port),
               "--worker-index", str(index), "--worker-port", str(worker_port)]
        for flag, attr in _PASSED:
            v = getattr(args, attr)
            if v is not None:
                out += [flag, str(Path(v).resolve()) if attr in absolute else str(v)]
        if args.metrics_port is not None:
            out += ["--metrics-port", "0"]
        if args.no_reflection:
            out.append("--no-reflection")
        if args.no_access_log:
            out.append("--no-access-log")
        if args.admin_open:
            out.append("--admin-open")
        if args.allow_empty:
            out.append("--allow-empty")
        for d in args.default:
            out += ["--default", d]
        return out

    if args.worker_ports < 0 or args.worker_ports + args.workers > 65536:
        raise ConfigError(f"--worker-ports must leave room for {args.workers} ports below 65536 (got "
                          f"{args.worker_ports})", where="--worker-ports")
    return run_supervised(argv, args.workers, args.host, args.port, metrics_host=args.metrics_host,
                          metrics_port=args.metrics_port, drain_seconds=args.drain_seconds,
                          worker_base_port=args.worker_ports)
