"""Replicated serving (issue 8): two ``stateworth serve`` processes reading one model directory,
a client balancing round-robin over both addresses, a reload on each, and every answer carrying
the same version once both have reloaded."""

from __future__ import annotations

import threading

import pytest

from serving import MODEL, STATE, ServerProcess, write_artifact
from stateworth.clients import client as cl


@pytest.fixture(scope="module")
def replicas(tmp_path_factory):
    d = tmp_path_factory.mktemp("shared-models")
    v1 = write_artifact(d, "tiny", seed=0)
    procs: list[ServerProcess] = [None, None]  # type: ignore[list-item]

    def start(k: int) -> None:
        procs[k] = ServerProcess(d, "--admin-open")

    ts = [threading.Thread(target=start, args=(k,)) for k in range(2)]
    for t in ts:
        t.start()
    for t in ts:
        t.join()
    yield procs, d, v1
    for p in procs:
        assert p.stop() == 0


def _calls(proc: ServerProcess) -> int:
    return sum(1 for e in list(proc.events) if e.get("event") == "rpc" and e.get("method", "").endswith("/GetValue"))


def test_round_robin_over_replicas_and_a_rolling_reload(replicas):
    procs, d, v1 = replicas
    with cl.Client([p.target for p in procs], timeout=20) as both:
        before = [_calls(p) for p in procs]
        assert {both.value(MODEL, STATE).version for _ in range(40)} == {v1}
        for p, b in zip(procs, before):  # access lines come from each server's log writer
            try:
                p.wait_until(lambda evs, p=p, b=b: _calls(p) > b, timeout=5)
            except TimeoutError:
                pass  # the assertion below says which replica was never reached
        after = [_calls(p) for p in procs]
        assert all(a > b for a, b in zip(after, before)), "round-robin reached only one replica"
        v2 = write_artifact(d, "tiny", seed=5)
        for p in procs:  # a rolling reload: one replica at a time
            with cl.Client(p.target) as one:
                assert one.reload_models().models[0].version == v2
        assert {both.value(MODEL, STATE).version for _ in range(40)} == {v2}
