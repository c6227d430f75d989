"""The Python client without JAX on the other side: a small in-process gRPC server that fails
on purpose checks the retry policy (gRPC's own, from the channel's service config), deadlines,
and the mapping of rich status details."""

from __future__ import annotations

import threading
from concurrent import futures

import grpc
import numpy as np
import pytest

from stateworth.clients import client as cl
from stateworth.errors import StateworthError
from stateworth.v1 import valuation_service_pb2 as pb
from stateworth.v1 import valuation_service_pb2_grpc as vgrpc


class Flaky(vgrpc.ValuationServiceServicer):
    def __init__(self) -> None:
        self.calls = 0
        self.fail = 2
        self.seen_metadata: list = []
        self.lock = threading.Lock()
        self.refused = 0
        self.streams = 0

    def ListModels(self, request, context):
        with self.lock:
            self.calls += 1
            n = self.calls
        self.seen_metadata.append(dict(context.invocation_metadata()))
        if n <= self.fail:
            context.abort(grpc.StatusCode.UNAVAILABLE, "starting")
        return pb.ListModelsResponse()

    def GetValue(self, request, context):
        from stateworth.server.errors import rich_status
        with self.lock:
            self.refused += 1
        context.abort_with_status(rich_status(grpc.StatusCode.INVALID_ARGUMENT, "'x' is not a level of market",
                                              "market"))

    def BatchGetValues(self, request, context):
        r = pb.BatchGetValuesResponse(name=request.name)
        cols = {c.axis: np.asarray(c.codes) if c.codes else list(c.levels) for c in request.states.columns}
        r.values.extend([float(x) for x in cols["a"]])
        r.unit = ",".join(cols["b"])
        return r

    def StreamValues(self, request_iterator, context):
        with self.lock:
            self.streams += 1
        for _ in request_iterator:
            context.abort(grpc.StatusCode.UNAVAILABLE, "starting")

    def GetModel(self, request, context):
        import time
        time.sleep(2)
        return pb.GetModelResponse()


@pytest.fixture(scope="module")
def fake():
    svc = Flaky()
    server = grpc.server(futures.ThreadPoolExecutor(4))
    vgrpc.add_ValuationServiceServicer_to_server(svc, server)
    port = server.add_insecure_port("127.0.0.1:0")
    server.start()
    yield svc, f"127.0.0.1:{port}"
    server.stop(0)


def test_unavailable_is_retried_with_backoff(fake):
    svc, target = fake
    svc.calls, svc.fail = 0, 2
    with cl.Client(target, retries=3, backoff=0.01, token="tok") as c:
        c.list_models()
    assert svc.calls == 3
    assert svc.seen_metadata[-1]["authorization"] == "Bearer tok"
    svc.calls, svc.fail = 0, 10
    with cl.Client(target, retries=2, backoff=0.01) as c:
        with pytest.raises(cl.Unavailable) as e:
            c.list_models()
    assert svc.calls == 3 and e.value.code == grpc.StatusCode.UNAVAILABLE


def test_the_channel_retries_unavailable_until_ok(fake):
    # gRPC's retry design (docs/references.md, gRFC A6): each retried attempt carries the header
    # grpc-previous-rpc-attempts, so the attempts the server saw were made by the channel itself
    svc, target = fake
    svc.calls, svc.fail, svc.seen_metadata = 0, 3, []
    with cl.Client(target, retries=4, backoff=0.01, token="tok") as c:
        assert c.list_models() == pb.ListModelsResponse()
    assert svc.calls == 4
    assert [m.get("grpc-previous-rpc-attempts") for m in svc.seen_metadata] == [None, "1", "2", "3"]
    assert all(m["authorization"] == "Bearer tok" for m in svc.seen_metadata)


def test_only_unavailable_on_unary_calls_is_retried(fake):
    svc, target = fake
    svc.refused = svc.streams = 0
    with cl.Client(target, retries=4, backoff=0.01) as c:
        with pytest.raises(cl.InvalidArgument):
            c.value("m", {"market": "x"})
        with pytest.raises(cl.Unavailable):
            list(c.stream_values("m", [{"a": ["x"]}, {"a": ["y"]}]))
    assert svc.refused == 1 and svc.streams == 1
    svc.calls, svc.fail = 0, 10
    with cl.Client(target, retries=0) as c:
        with pytest.raises(cl.Unavailable):
            c.list_models()
    assert svc.calls == 1


def test_a_retry_policy_grpc_would_not_keep_is_refused():
    for kw, where in (({"retries": 5}, "retries"), ({"retries": -1}, "retries"), ({"backoff": 0.0}, "backoff"),
                      ({"backoff": 3.0, "max_backoff": 2.0}, "backoff")):
        with pytest.raises(StateworthError) as e:
            cl.Client("127.0.0.1:1", **kw)
        assert e.value.where == where


def test_field_violations_reach_the_exception(fake):
    _, target = fake
    with cl.Client(target) as c:
        with pytest.raises(cl.InvalidArgument) as e:
            c.value("m", {"market": "x"})
    assert e.value.field == "market" and e.value.violations == [("market", "'x' is not a level of market")]
    assert "INVALID_ARGUMENT [market]" in str(e.value)


def test_default_deadline_applies(fake):
    _, target = fake
    with cl.Client(target, timeout=0.2) as c:
        with pytest.raises(cl.DeadlineExceeded):
            c.get_model("m")


def test_columns_fast_and_plain_paths(fake):
    _, target = fake
    with cl.Client(target) as c:
        r = c.values("m", {"a": np.array([3, 1, 200]), "b": ["x", "y", "z"]})
    assert list(r.values) == [3.0, 1.0, 200.0] and r.unit == "x,y,z" and r.name == "models/m"


def test_resource_names():
    assert cl.resource("fitness-demo") == "models/fitness-demo"
    assert cl.resource("models/fitness-demo") == "models/fitness-demo"
