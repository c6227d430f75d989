"""``stateworth serve --workers 2``: two worker processes on one port under a supervisor.

The real command, started as a subprocess: both workers answer on the shared port and on their
own ports, an admin reload or load answers only once every worker has done it, a failed load
changes no worker, the metrics of both workers come back labelled, a killed worker is started
again on its own port, SIGTERM stops everything with status 0, and a worker that cannot start
makes the command fail with one line.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import urllib.request

import pytest

from prometheus_client.exposition import generate_latest
from prometheus_client.parser import text_string_to_metric_families

from serving import MODEL, ROOT, STATE, ServerProcess, sample, scrape, write_artifact
from stateworth.clients import client as cl
from stateworth.server.supervisor import merge_workers


def test_merged_metrics_label_every_sample_and_keep_each_family_together():
    text = ("# HELP a_total A.\n# TYPE a_total counter\na_total{method=\"/x\",code=\"OK\"} 3\n"
            "# TYPE h histogram\nh_bucket{le=\"+Inf\"} 2\nh_sum 0.5\nh_count 2\n# TYPE g gauge\ng 1\n")
    families = merge_workers([(0, text), (1, text.replace(" 3\n", " 4\n"))])
    assert [(f.name, f.type, f.documentation) for f in families] == [
        ("a", "counter", "A."), ("h", "histogram", ""), ("g", "gauge", "")]
    assert [(s.name, s.labels, s.value) for s in families[0].samples] == [
        ("a_total", {"worker": "0", "method": "/x", "code": "OK"}, 3),
        ("a_total", {"worker": "1", "method": "/x", "code": "OK"}, 4)]
    assert [(s.name, s.labels) for s in families[1].samples] == [
        ("h_bucket", {"worker": "0", "le": "+Inf"}), ("h_sum", {"worker": "0"}), ("h_count", {"worker": "0"}),
        ("h_bucket", {"worker": "1", "le": "+Inf"}), ("h_sum", {"worker": "1"}), ("h_count", {"worker": "1"})]
    # written out, each family once, and read back by the same parser: the text is valid
    exposed = generate_latest(FamiliesOf(families)).decode()
    assert exposed.count("# TYPE a_total counter") == exposed.count("# TYPE h histogram") == 1
    again = {(s.name, tuple(sorted(s.labels.items()))): s.value
             for f in text_string_to_metric_families(exposed) for s in f.samples}
    assert again[("a_total", (("code", "OK"), ("method", "/x"), ("worker", "1")))] == 4
    assert again[("g", (("worker", "0"),))] == 1


class FamiliesOf:
    def __init__(self, families) -> None:
        self.families = families

    def collect(self):
        return self.families


@pytest.fixture(scope="module")
def workers(tmp_path_factory):
    d = tmp_path_factory.mktemp("worker-models")
    v1 = write_artifact(d, "tiny", seed=0)
    srv = ServerProcess(d, "--workers", "2", "--threads", "2", "--metrics-port", "0", "--log-flush-ms", "0",
                        "--admin-open")
    yield srv, d, v1
    assert srv.stop() == 0


def _serving(srv) -> dict:
    return srv.wait_for("serving")


def _ready(srv) -> dict[int, dict]:
    """The newest worker_ready line of each worker."""
    out: dict[int, dict] = {}
    for ev in list(srv.events):
        if ev.get("event") == "worker_ready":
            out[ev["worker"]] = ev
    return out


def _version_at(port: int) -> str:
    with cl.Client(f"127.0.0.1:{port}", timeout=20) as c:
        return c.value(MODEL, STATE).version


def test_both_workers_answer_on_the_shared_port_and_their_own(workers):
    srv, _d, v1 = workers
    serving = _serving(srv)
    assert serving["workers"] == 2 and len(serving["worker_ports"]) == 2
    assert all("worker" not in ev for ev in srv.events if ev.get("event") in ("listening", "serving"))
    for k, port in enumerate(serving["worker_ports"]):
        assert _version_at(port) == v1
    before = len(srv.events)
    for _ in range(24):  # a fresh connection each: the kernel spreads them over the workers
        with cl.Client(srv.target, timeout=20) as c:
            assert c.value(MODEL, STATE).version == v1
    events = srv.wait_until(lambda evs: sum(1 for e in evs[before:] if e.get("event") == "rpc") >= 24)
    answered_by = {e["worker"] for e in events[before:] if e.get("event") == "rpc"}
    assert answered_by == {0, 1}
    with cl.Client(srv.target, timeout=20) as c:
        assert c.health() == "SERVING"


def test_reload_answers_once_every_worker_serves_the_new_version(workers):
    srv, d, v1 = workers
    ports = _serving(srv)["worker_ports"]
    v2 = write_artifact(d, "tiny", seed=1)
    assert v2 != v1
    with cl.Client(srv.target, timeout=60) as c:
        r = c.reload_models()
    assert [m.version for m in r.models] == [v2]
    assert [_version_at(p) for p in ports] == [v2, v2]
    # a load that fails on every worker changes none of them
    with cl.Client(srv.target, timeout=60) as c:
        with pytest.raises(cl.NotFound) as e:
            c.load_model("missing-artifact")
    assert "missing-artifact" in str(e.value)
    assert [_version_at(p) for p in ports] == [v2, v2]
    # and a load of one artifact reaches both
    write_artifact(d, "tiny", seed=0)
    with cl.Client(srv.target, timeout=60) as c:
        assert c.load_model("tiny").model.version == v1
    assert [_version_at(p) for p in ports] == [v1, v1]


def test_metrics_of_both_workers_come_back_labelled(workers):
    srv, _d, _v1 = workers
    for port in _serving(srv)["worker_ports"]:
        _version_at(port)
    with urllib.request.urlopen(f"http://127.0.0.1:{srv.metrics_port}/metrics", timeout=10) as r:
        text = r.read().decode()
    assert text.count("# TYPE stateworth_requests_total counter") == 1
    got = scrape(srv.metrics_port)
    assert sample(got, "stateworth_workers_ready") == 2
    get = "/stateworth.v1.ValuationService/GetValue"
    for k in ("0", "1"):
        assert sample(got, "stateworth_models_loaded", worker=k) == 1
        # each worker answered at least the call on its own port
        assert sample(got, "stateworth_requests_total", worker=k, method=get, code="OK") >= 1
    own = {"stateworth_workers_ready", "stateworth_worker_restarts_total"}  # the supervisor's
    assert all("worker" in dict(labels) for name, labels in got if name not in own)


def test_ports_in_use_are_refused_in_one_line(workers, tmp_path):
    srv, _d, _v1 = workers
    for args, where in ((["--port", str(srv.port)], "--port"),
                        (["--port", "0", "--worker-ports", str(_serving(srv)["worker_ports"][0])], "--worker-ports")):
        r = subprocess.run([sys.executable, "-m", "stateworth", "serve", str(tmp_path), "--workers", "2", "--allow-empty", *args],
                           capture_output=True, text=True, cwd=ROOT, timeout=120)
        assert r.returncode == 1, r.stderr
        assert where in r.stderr and "in use" in r.stderr and "Traceback" not in r.stderr


def test_a_killed_worker_is_started_again_on_its_own_port(workers):
    srv, _d, _v1 = workers
    ports = _serving(srv)["worker_ports"]
    old = _ready(srv)[1]
    os.kill(old["pid"], signal.SIGKILL)
    srv.wait_until(lambda evs: any(e.get("event") == "worker_exited" and e.get("worker_index") == 1 for e in evs),
                   timeout=30)
    srv.wait_until(lambda evs: any(e.get("event") == "worker_ready" and e.get("worker") == 1
                                   and e.get("pid") != old["pid"] for e in evs), timeout=180)
    new = _ready(srv)[1]
    assert new["worker_port"] == ports[1] == old["worker_port"]
    expected = _version_at(ports[0])
    assert _version_at(ports[1]) == expected
    assert sample(scrape(srv.metrics_port), "stateworth_worker_restarts_total") == 1


def test_sigterm_stops_every_worker(tmp_path):
    write_artifact(tmp_path, "tiny", seed=0)
    srv = ServerProcess(tmp_path, "--workers", "2")
    pids = [ev["pid"] for ev in _ready(srv).values()]
    assert len(pids) == 2
    assert srv.stop() == 0
    events = srv.wait_until(lambda evs: any(e.get("event") == "stopped" and "worker" not in e for e in evs))
    stopped = next(e for e in events if e.get("event") == "stopped" and "worker" not in e)
    assert stopped["worker_exit_codes"] == [0, 0]
    assert {e["worker"] for e in events if e.get("event") == "stopped" and "worker" in e} == {0, 1}
    for pid in pids:
        with pytest.raises(ProcessLookupError):
            os.kill(pid, 0)


def test_a_worker_that_cannot_start_fails_the_command(tmp_path):
    bad = tmp_path / "broken"
    bad.mkdir()
    (bad / "manifest.json").write_text("{ not json")
    r = subprocess.run([sys.executable, "-m", "stateworth", "serve", str(tmp_path), "--port", "0", "--workers", "2"],
                       capture_output=True, text=True, cwd=ROOT, timeout=300,
                       env=dict(os.environ, JAX_PLATFORMS="cpu"))
    assert r.returncode == 1
    assert "before serving" in r.stderr and "broken" in r.stderr
    assert "Traceback" not in r.stderr


@pytest.mark.parametrize("args, message", [(["--workers", "0"], "--workers must be at least 1"),
                                           (["--workers", "2", "--worker-ports", "65535"], "--worker-ports")])
def test_bad_worker_options_are_refused_in_one_line(tmp_path, args, message):
    r = subprocess.run([sys.executable, "-m", "stateworth", "serve", str(tmp_path), "--port", "0", "--allow-empty", *args],
                       capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert r.returncode == 1
    assert message in r.stderr and "Traceback" not in r.stderr


@pytest.mark.parametrize("mode, expect", [
    ("ok", [{"worker": 0, "ok": True}, {"worker": 1, "ok": True}]),
    ("fail", [{"worker": 0, "ok": True}, {"worker": 1, "ok": False, "error": "bad artifact"}]),
    ("other", [{"worker": 0, "ok": True}, {"worker": 1, "ok": False, "error": "serves other versions"}]),
    ("die", [{"worker": 0, "ok": True}, {"worker": 1, "ok": False, "error": "worker 1 exited"}]),
])
def test_a_relayed_load_reports_every_worker_and_restarts_the_ones_that_fell_behind(tmp_path, mode, expect):
    # the supervisor's coordinator on stand-in workers (tests/fake_worker.py): worker 0 asks for a
    # reload, worker 1 does it as MODE says; a worker that failed, left, or serves other versions
    # than the asker is started again
    import json
    from pathlib import Path

    from stateworth.server.supervisor import Supervisor

    out = tmp_path / "answer.json"
    fake = Path(__file__).with_name("fake_worker.py")

    def argv(index: int, port: int, worker_port: int) -> list[str]:
        return [sys.executable, str(fake), str(index), "ok" if index == 0 else mode, str(out)]

    sup = Supervisor(argv, 2, "127.0.0.1", 0, start_timeout=60, coordinate_seconds=30).start()
    try:
        sup.workers[0].send({"go": True})  # both are ready: worker 0 asks now
        for _ in range(300):
            if out.exists() and (mode == "ok" or sup.restarts_total >= 1):
                break
            time.sleep(0.1)
        results = json.loads(out.read_text())
        assert [r["worker"] for r in results] == [0, 1]
        for r, e in zip(results, expect):
            assert r["ok"] is e["ok"]
            assert e.get("error", "") in (r.get("error") or "")
        assert sup.restarts_total == (0 if mode == "ok" else 1)
    finally:
        sup.stop()  # the stand-ins end on SIGTERM without a drain, so their codes say nothing here
