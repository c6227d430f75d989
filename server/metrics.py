"""Request counts and latency histograms, exposed with ``prometheus_client``.

Exposed at ``http://HOST:PORT/metrics`` (Prometheus text format 0.0.4, or OpenMetrics when the
scraper asks for it) by ``prometheus_client``'s HTTP server on loopback when the server is
started with ``--metrics-port`` (``--metrics-host`` to change the address). Series:

* ``stateworth_requests_total{method, code}``: finished calls by gRPC method and status code;
* ``stateworth_request_seconds{method}``: histogram of call latency in seconds (server side,
  from the call's start to its last message);
* ``stateworth_reloads_total{result}``: admin loads by result (ok, failed);
* the gauges the server registers in :attr:`Metrics.gauges`, read when scraped:
  ``stateworth_models_loaded``, ``stateworth_model_generation`` (what is being served),
  ``stateworth_work_cache_hits_total``, ``stateworth_work_cache_misses_total``,
  ``stateworth_work_cache_bytes``, ``stateworth_work_cache_evictions_total`` (solve cache),
  ``stateworth_horizon_cache_bytes``, ``stateworth_horizon_cache_evictions_total``.

Each :class:`Metrics` holds its own ``CollectorRegistry`` (``prometheus_client``'s default
registry, a process-wide global, is never used), so two servers in one process count apart.
"""

from __future__ import annotations

from typing import Callable, Iterable, Iterator, Protocol

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, start_http_server
from prometheus_client.core import Metric
from prometheus_client.exposition import generate_latest

#: histogram bucket upper bounds, seconds (+Inf is added by the histogram)
BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)

#: HELP text of the gauges the server registers (others get their name)
GAUGE_HELP = {
    "stateworth_models_loaded": "Model versions being served.",
    "stateworth_model_generation": "Snapshots of the model directory loaded since the start.",
    "stateworth_work_cache_hits_total": "Calls that solve answered from the solve cache.",
    "stateworth_work_cache_misses_total": "Calls that solve that were not in the solve cache.",
    "stateworth_work_cache_bytes": "Bytes of the results held in the solve cache.",
    "stateworth_work_cache_evictions_total": "Results evicted from the solve cache (least recently used first).",
    "stateworth_horizon_cache_bytes": "Bytes of finite-horizon values held for all models.",
    "stateworth_horizon_cache_evictions_total": "Finite-horizon values evicted (least recently used first).",
}


class Collector(Protocol):
    """What ``prometheus_client`` exposes: anything whose ``collect()`` yields metric families."""

    def collect(self) -> Iterable[Metric]: ...


class GaugeFunctions(dict):
    """``name -> callable``: each entry becomes a ``prometheus_client`` gauge of the registry
    whose value is the callable's when scraped (setting a name again replaces its callable)."""

    def __init__(self, registry: CollectorRegistry) -> None:
        super().__init__()
        self._registry = registry
        self._gauges: dict[str, Gauge] = {}

    def __setitem__(self, name: str, fn: Callable[[], float]) -> None:
        super().__setitem__(name, fn)
        gauge = self._gauges.get(name)
        if gauge is None:
            gauge = self._gauges[name] = Gauge(name, GAUGE_HELP.get(name, name), registry=self._registry)
        gauge.set_function(fn)


class WithoutCreated:
    """A registry's families without the ``_created`` samples ``prometheus_client`` adds to
    counters and histograms (a creation timestamp per series, which doubles the series count
    and which nothing here reads; the library's own switch for them is process-global)."""

    def __init__(self, registry: Collector) -> None:
        self.registry = registry

    def collect(self) -> Iterator[Metric]:
        for family in self.registry.collect():
            family.samples = [s for s in family.samples if not s.name.endswith("_created")]
            yield family

    def restricted_registry(self, names: Iterable[str]) -> "WithoutCreated":
        """The same for the families named (the endpoint's ``?name[]=`` filter)."""
        return WithoutCreated(self.registry.restricted_registry(names))  # type: ignore[attr-defined]


class Metrics:
    """The server's counters, histograms and gauges in a registry of its own. Thread-safe
    (``prometheus_client`` locks each value); :meth:`render` gives the exposition text."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        self._requests = Counter("stateworth_requests", "Finished gRPC calls by method and status code.",
                                 ("method", "code"), registry=self.registry)
        self._latency = Histogram("stateworth_request_seconds", "Latency of gRPC calls in seconds.", ("method",),
                                  buckets=BUCKETS, registry=self.registry)
        self._reloads = Counter("stateworth_reloads", "Admin loads and reloads by result.", ("result",),
                                registry=self.registry)
        for result in ("ok", "failed"):  # both series exist from the start, at 0
            self._reloads.labels(result)
        #: gauges read when scraped: metric name -> callable returning its value
        self.gauges: dict[str, Callable[[], float]] = GaugeFunctions(self.registry)
        #: what the endpoint serves
        self.exposed = WithoutCreated(self.registry)
        # children by label values: labels() takes the metric's lock and builds a key per call
        self._children: dict[tuple[str, str], tuple] = {}

    def observe(self, method: str, code: str, seconds: float) -> None:
        """Count one finished call of ``method`` with status ``code`` that took ``seconds``."""
        child = self._children.get((method, code))
        if child is None:
            child = self._children[(method, code)] = (self._requests.labels(method, code).inc,
                                                      self._latency.labels(method).observe)
        child[0]()
        child[1](seconds)

    def reload(self, ok: bool) -> None:
        self._reloads.labels("ok" if ok else "failed").inc()

    def render(self) -> str:
        """The exposition text (Prometheus text format 0.0.4)."""
        return generate_latest(self.exposed).decode()


class MetricsEndpoint(Protocol):
    server_port: int

    def shutdown(self) -> None: ...


def serve_registry(registry: Collector, host: str, port: int) -> MetricsEndpoint:
    """Serve ``registry`` at http://host:port/metrics from a daemon thread
    (``prometheus_client.start_http_server``); returns the HTTP server (``server_port``,
    ``shutdown()``). OSError when the address cannot be bound."""
    httpd, _thread = start_http_server(port, addr=host, registry=registry)
    return httpd


def serve_metrics(metrics: Metrics, host: str, port: int) -> MetricsEndpoint:
    """Start the /metrics endpoint of a server's :class:`Metrics` in a daemon thread."""
    return serve_registry(metrics.exposed, host, port)
