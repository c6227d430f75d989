"""The gRPC service end to end: a real ``stateworth serve`` subprocess on a loopback port.

One server for the module (two versions of the tiny model, with posterior draws); every RPC of
ValuationService, health, reflection, metrics, logs, the error codes, the query command, and
property-based bad requests. Expected figures come from the valuation library in this process
(the server must return exactly what the library computes, through the wire).
"""

from __future__ import annotations

import json

import grpc
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from serving import MODEL, STATE, ServerProcess, compile_tiny, sample, scrape, write_artifact
from stateworth.clients import client as cl
from stateworth.v1 import admin_service_pb2 as apb
from stateworth.v1 import valuation_service_pb2 as pb
from stateworth.v1 import valuation_service_pb2_grpc as vgrpc

AXES = {"market": ["harbor", "upland"], "tenure": ["0", "1", "2", "3"],
        "status": ["prospect", "lapsed", "solo", "duo", "studio"], "engagement": ["none", "light", "keen"],
        "band": ["low", "high"]}
MEMBER = dict(STATE, status="solo", tenure="2", engagement="light")


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    d = tmp_path_factory.mktemp("models")
    # 20 draws: the fewest a 90 % interval may use (2 / (1 - 0.9); valuation.answer.draws_needed)
    va = write_artifact(d, "tiny-a", seed=0, draws=20)
    vb = write_artifact(d, "tiny-b", seed=1, draws=20)  # written last: the default version
    srv = ServerProcess(d, "--metrics-port", "0", "--max-batch", "5000", "--admin-open")
    yield {"server": srv, "dir": d, "a": va, "b": vb}
    rc = srv.stop()
    assert rc == 0, "".join(srv.lines[-20:])


@pytest.fixture(scope="module")
def client(served):
    with cl.Client(served["server"].target, timeout=30) as c:
        yield c


@pytest.fixture(scope="module")
def reference():
    """The default version's point Valuer, built here (same tables as the server's; draws are
    left out to keep the test quick, intervals are checked for shape and order only)."""
    from stateworth.valuation import Valuer
    return Valuer.build(compile_tiny(1, draws=20), draws=False)


def _columns(states: list[dict]) -> dict[str, list[str]]:
    return {a: [s[a] for s in states] for a in AXES}


def _all_states() -> dict[str, np.ndarray]:
    grids = np.meshgrid(*[np.arange(len(v)) for v in AXES.values()], indexing="ij")
    return {a: g.reshape(-1).astype(np.int64) for a, g in zip(AXES, grids)}


# ---- models, health, reflection ------------------------------------------------------------
def test_health_serving_and_reflection(served, client):
    assert client.health() == "SERVING"
    assert client.health("stateworth.v1.ValuationService") == "SERVING"
    from grpc_reflection.v1alpha import reflection_pb2, reflection_pb2_grpc
    with grpc.insecure_channel(served["server"].target) as ch:
        stub = reflection_pb2_grpc.ServerReflectionStub(ch)
        resp = next(stub.ServerReflectionInfo(iter([reflection_pb2.ServerReflectionRequest(list_services="")]),
                                              timeout=10))
        names = {s.name for s in resp.list_services_response.service}
    assert {"stateworth.v1.ValuationService", "stateworth.v1.ModelAdminService", "grpc.health.v1.Health"} <= names


def test_list_and_describe_models(served, client):
    r = client.list_models()
    assert [m.name for m in r.models] == [f"models/{MODEL}"]
    m = r.models[0]
    assert m.default_version == served["b"]
    assert {v.version for v in m.versions} == {served["a"], served["b"]}
    d = client.get_model(MODEL)
    assert d.version == served["b"] and d.default_version and d.artifact == "tiny-b"
    assert [a.name for a in d.axes] == list(AXES) and list(d.axes[2].levels) == AXES["status"]
    assert {s.name: s.unit for s in d.reward_streams} == {"revenue": "EUR", "member_months": "member-months"}
    assert d.currency == "EUR" and d.state_count == 240 and d.content_hash.startswith(d.version)
    assert 0.99 < d.discounting.beta < 1 and d.discounting.period == "month"
    assert d.solve_statistics.status == "converged" and d.solve_statistics.draw_count == 20
    pinned = client.get_model(f"models/{MODEL}", served["a"])
    assert pinned.version == served["a"] and not pinned.default_version


# ---- values ----------------------------------------------------------------------------------
def test_value_matches_the_library(served, client, reference):
    r = client.value(MODEL, STATE, interval=0.8)
    assert r.version == served["b"] and r.name == f"models/{MODEL}" and r.stream == "revenue"
    i = reference.index(STATE)
    assert r.state_index == i
    assert r.value.value == pytest.approx(float(reference.values(np.array([i]), "revenue")[0]), rel=1e-9)
    assert r.value.interval.lower <= r.value.interval.upper
    assert r.value.interval.level == 0.8 and "not an accounting figure" in r.caution
    mm = client.value(MODEL, STATE, stream="member_months")
    assert mm.value.unit == "member-months" and not mm.value.HasField("interval")
    h = client.value(MODEL, STATE, horizon=12)
    assert h.horizon == 12
    assert h.value.value == pytest.approx(float(reference.values(np.array([i]), "revenue", 12)[0]), rel=1e-9)
    old = client.value(MODEL, STATE, version=served["a"])
    assert old.version == served["a"] and old.value.value != r.value.value


def test_batch_and_stream_values(served, client, reference):
    cols = _all_states()
    r = client.values(MODEL, cols, interval=0.9)
    idx = reference.index_many(cols)
    np.testing.assert_allclose(np.asarray(r.values), reference.values(idx, "revenue"), rtol=1e-10)
    assert len(r.lower) == len(r.upper) == 240 and r.interval_level == 0.9
    assert np.all(np.asarray(r.lower) <= np.asarray(r.upper))
    by_name = client.values(MODEL, _columns([STATE, MEMBER]))
    np.testing.assert_allclose(np.asarray(by_name.values), reference.values(
        np.array([reference.index(STATE), reference.index(MEMBER)]), "revenue"), rtol=1e-10)
    chunks = [{a: c[k:k + 100] for a, c in cols.items()} for k in range(0, 240, 100)]
    out = list(client.stream_values(MODEL, chunks, version=served["a"]))
    assert [o.offset for o in out] == [0, 100, 200] and {o.version for o in out} == {served["a"]}
    streamed = np.concatenate([np.asarray(o.values) for o in out])
    direct = client.values(MODEL, cols, version=served["a"])
    np.testing.assert_array_equal(streamed, np.asarray(direct.values))


# ---- contrasts --------------------------------------------------------------------------------
def test_contrasts_match_the_library(client, reference):
    cases = [
        (client.acquisition(MODEL, STATE, "solo", interval=0.9), reference.acquisition(STATE, "solo")),
        (client.plan_change(MODEL, MEMBER, "duo"), reference.plan_change(MEMBER, "duo")),
        (client.win_back(MODEL, dict(STATE, status="lapsed"), "duo"),
         reference.win_back(dict(STATE, status="lapsed"), "duo")),
        (client.engagement_change(MODEL, MEMBER, "engagement", "keen"),
         reference.engagement_change(MEMBER, "engagement", "keen")),
        (client.contrast(MODEL, MEMBER, dict(MEMBER, band="low")), reference.contrast(MEMBER, dict(MEMBER, band="low"))),
    ]
    for resp, ans in cases:
        assert resp.kind == ans.kind
        assert resp.value.value == pytest.approx(ans.value, rel=1e-9, abs=1e-9)
        assert resp.value.unit == "EUR"
    acq = cases[0][0]
    assert acq.value.HasField("interval") and acq.details["after"]["status"] == "solo"


def test_cohort_contrast(client, reference):
    cohort = _columns([MEMBER, dict(MEMBER, market="upland"), dict(MEMBER, engagement="none")])
    r = client.cohort_contrast(MODEL, cohort, {"status": "duo"}, weights=[1.0, 2.0, 1.0], interval=0.9)
    w = np.zeros(240)
    for s, x in zip([MEMBER, dict(MEMBER, market="upland"), dict(MEMBER, engagement="none")], [1.0, 2.0, 1.0]):
        w[reference.index(s)] += x
    ans = reference.cohort_contrast(w, {"status": "duo"})
    assert r.value.value == pytest.approx(ans.value, rel=1e-9) and r.value.HasField("interval")


# ---- solving calls ----------------------------------------------------------------------------
def test_transition_change(client, reference):
    cohort = _columns([MEMBER, dict(MEMBER, status="duo")])
    r = client.transition_change(MODEL, "status", "lapsed", 0.01, when={"status": "solo"}, cohort_columns=cohort,
                                 states=cohort, interval=0.9)
    # the cohort-weighted figure is the mean of the per-state changes at the cohort's states
    assert r.weighted_delta.value == pytest.approx(float(np.mean(r.deltas)), rel=1e-9)
    assert r.weighted_delta.value < 0  # more churn from solo loses revenue
    assert r.deltas[0] < 0 and r.max_abs_delta >= abs(r.deltas[0])
    assert r.changed_version != r.version and len(r.changed_version) == 12
    assert len(r.lower) == 2 and r.weighted_delta.HasField("interval")
    assert r.details["change"]["axis"] == "status" and r.details["stats"]["states_resolved"] > 0
    again = client.transition_change(MODEL, "status", "lapsed", 0.01, when={"status": "solo"}, cohort_columns=cohort,
                                     states=cohort, interval=0.9)
    assert again == r  # answered from the cache, identical
    zero = client.transition_change(MODEL, "status", "lapsed", 0.0, when={"status": "solo"}, states=cohort)
    np.testing.assert_allclose(np.asarray(zero.deltas), 0.0, atol=1e-6)
    assert not zero.HasField("weighted_delta")


def test_marginal_values(client, reference):
    cohort = _columns([MEMBER, STATE])
    r = client.marginal_values(MODEL, cohort, top=5)
    w = np.array([reference.index(MEMBER), reference.index(STATE)])
    assert r.objective.value == pytest.approx(float(np.mean(reference.values(w, "revenue"))), rel=1e-9)
    assert [e.rank for e in r.entries] == [1, 2, 3, 4, 5]
    pp = [abs(e.per_point) for e in r.entries]
    assert pp == sorted(pp, reverse=True) and pp[0] > 0
    top = r.entries[0]
    one = client.marginal_value(MODEL, cohort, entry=(top.axis, dict(top.cell), top.to))
    assert one.entry.per_point == pytest.approx(top.per_point, rel=1e-9)
    assert one.entry.gradient == pytest.approx(top.gradient, rel=1e-9)
    assert one.entry.probability == pytest.approx(top.probability)
    tr = client.marginal_value(MODEL, cohort, transition=(MEMBER, dict(MEMBER, status="lapsed", tenure="0")))
    assert tr.transition_gradient > 0  # beta lambda_i V_j with a visited state i and a valuable state j
    with pytest.raises(cl.InvalidArgument) as e:
        client.marginal_value(MODEL, cohort, entry=("status", dict(top.cell, status="nowhere"), "lapsed"))
    assert e.value.field.startswith("entry.cell")


def test_readout_between_versions(served, client):
    cohort = _columns([STATE, MEMBER])
    r = client.readout(MODEL, served["a"], served["b"], cohort, interval=0.9, seed=3)
    assert (r.control_version, r.treatment_version) == (served["a"], served["b"])
    assert r.difference.value == pytest.approx(r.treatment.value - r.control.value, rel=1e-9)
    assert r.difference.HasField("interval") and "control" in r.long_run
    ctl = client.values(MODEL, cohort, version=served["a"])
    assert r.control.value == pytest.approx(float(np.mean(ctl.values)), rel=1e-9)


# ---- errors -----------------------------------------------------------------------------------
def test_invalid_argument_names_the_axis_or_field(client):
    with pytest.raises(cl.InvalidArgument) as e:
        client.value(MODEL, dict(STATE, market="nowhere"))
    assert e.value.field == "market" and "harbor" in str(e.value)
    with pytest.raises(cl.InvalidArgument) as e:
        client.value(MODEL, {k: v for k, v in STATE.items() if k != "band"})
    assert e.value.field == "band"
    with pytest.raises(cl.InvalidArgument) as e:
        client.value("no/slash/model", STATE)
    assert e.value.field == "name"
    with pytest.raises(cl.InvalidArgument) as e:
        client.value(MODEL, STATE, interval=1.5)
    assert e.value.field == "interval_level"
    with pytest.raises(cl.InvalidArgument) as e:
        client.acquisition(MODEL, MEMBER, "solo")
    assert e.value.violations and e.value.code == grpc.StatusCode.INVALID_ARGUMENT
    with pytest.raises(cl.InvalidArgument) as e:
        client.values(MODEL, {"market": ["harbor"], "tenure": ["0", "1"]})
    assert e.value.field.startswith("states.columns")
    with pytest.raises(cl.InvalidArgument) as e:
        client.transition_change(MODEL, "status", "studio", 0.5, when={"status": "prospect"})
    assert e.value.field == "change.to"


def test_not_found_for_unknown_models_and_versions(client):
    with pytest.raises(cl.NotFound) as e:
        client.value("models/unknown", STATE)
    assert e.value.field == "name"
    with pytest.raises(cl.NotFound) as e:
        client.get_model(MODEL, "0123456789ab")
    assert e.value.field == "version"
    with pytest.raises(cl.NotFound):
        client.load_model("no-such-artifact")


def test_resource_exhausted_past_limits(client):
    big = {a: np.zeros(5001, dtype=np.int64) for a in AXES}
    with pytest.raises(cl.ResourceExhausted) as e:
        client.values(MODEL, big)
    assert e.value.field == "states"
    with pytest.raises(cl.ResourceExhausted):
        client.value(MODEL, STATE, horizon=10**6)
    with pytest.raises(cl.ResourceExhausted):
        client.marginal_values(MODEL, _columns([STATE]), top=10**6)


def test_message_size_limit_is_resource_exhausted(served):
    small = cl.Client(served["server"].target, max_message_bytes=64 * 1024 * 1024)
    cols = {a: np.zeros(4000, dtype=np.int64) for a in AXES}
    cols["market"] = ["harbor" * 3000] * 4000  # ~70 MB of level names: over the server's 64 MiB limit
    with pytest.raises(cl.ResourceExhausted):
        small.values(MODEL, cols)
    small.close()


def test_deadline_exceeded_on_a_solve(client):
    with pytest.raises(cl.DeadlineExceeded):
        client.transition_change(MODEL, "status", "lapsed", 0.0123, when={"status": "duo"}, timeout=0.002)


def test_failed_load_leaves_models_untouched(served, client):
    bad = served["dir"] / "broken"
    bad.mkdir()
    (bad / "manifest.json").write_text("{not json")
    try:
        with pytest.raises(cl.FailedPrecondition) as e:
            client.load_model("broken")
        assert "broken" in str(e.value) and "unchanged" in str(e.value)
        r = client.reload_models()  # the broken folder is reported; the others keep serving
        by = {o.artifact: o for o in r.outcomes}
        assert r.failed_count == 1 and by["broken"].result == apb.RELOAD_RESULT_FAILED
        assert "manifest.json is not valid JSON" in by["broken"].error and not by["broken"].version
        assert by["tiny-b"].result == apb.RELOAD_RESULT_KEPT and by["tiny-b"].version == served["b"]
        with pytest.raises(cl.InvalidArgument):
            client.load_model("../etc")
        assert client.get_model(MODEL).version == served["b"]
        assert client.value(MODEL, STATE).version == served["b"]
    finally:
        (bad / "manifest.json").unlink()
        bad.rmdir()


# ---- metrics, logs, command line --------------------------------------------------------------
def test_metrics_endpoint(served, client):
    get = "/stateworth.v1.ValuationService/GetValue"
    before = scrape(served["server"].metrics_port)
    client.value(MODEL, STATE)
    with pytest.raises(cl.InvalidArgument):
        client.value(MODEL, dict(STATE, market="nowhere"))
    after = scrape(served["server"].metrics_port)
    for code in ("OK", "INVALID_ARGUMENT"):
        assert sample(after, "stateworth_requests_total", method=get, code=code) == \
            (sample(before, "stateworth_requests_total", method=get, code=code) or 0) + 1
    n = sample(after, "stateworth_request_seconds_count", method=get)
    assert n == (sample(before, "stateworth_request_seconds_count", method=get) or 0) + 2
    assert sample(after, "stateworth_request_seconds_bucket", method=get, le="+Inf") == n
    assert sample(after, "stateworth_models_loaded") == 2
    assert all(sample(after, "stateworth_reloads_total", result=r) is not None for r in ("ok", "failed"))
    # one registry per server: nothing else (no process or platform collectors, no _created)
    assert {name for name, _ in after} <= {
        "stateworth_requests_total", "stateworth_request_seconds_bucket", "stateworth_request_seconds_sum",
        "stateworth_request_seconds_count", "stateworth_reloads_total", "stateworth_models_loaded",
        "stateworth_model_generation", "stateworth_work_cache_hits_total", "stateworth_work_cache_misses_total",
        "stateworth_work_cache_bytes", "stateworth_work_cache_evictions_total", "stateworth_horizon_cache_bytes",
        "stateworth_horizon_cache_evictions_total"}


def test_logs_are_json_and_never_carry_request_contents(served, client):
    marker = "acct-99881234"
    with pytest.raises(cl.InvalidArgument):
        client.value(MODEL, dict(STATE, market=marker))
    client.value(MODEL, STATE)
    srv = served["server"]
    srv.wait_until(lambda evs: any(e.get("event") == "rpc" and e.get("code") == "INVALID_ARGUMENT" for e in evs)
                   and any(e.get("event") == "rpc" and e.get("method", "").endswith("/GetValue")
                           and e.get("code") == "OK" for e in evs))
    rpc = [e for e in list(srv.events) if e.get("event") == "rpc"]
    assert rpc and all({"method", "code", "ms", "ts"} <= set(e) for e in rpc)
    assert any(e["code"] == "INVALID_ARGUMENT" and e.get("field") == "market" for e in rpc)
    text = "".join(srv.lines)
    assert marker not in text
    ours = [line for line in srv.lines if line.startswith("{")]
    assert len(ours) >= len(rpc)
    for line in ours:  # every line of ours is one JSON object (library warnings, if any, are not ours)
        json.loads(line)


def test_query_command(served, capsys):
    from stateworth.clients.cli import main
    t = ["--target", served["server"].target]
    assert main(["query", *t, "models"]) == 0
    assert served["b"] in capsys.readouterr().out
    pairs = [f"{k}={v}" for k, v in STATE.items()]
    assert main(["query", *t, "--json", "value", MODEL, *pairs, "--level", "0.9"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["version"] == served["b"] and doc["value"]["unit"] == "EUR"
    assert main(["query", *t, "contrast", MODEL, *pairs, "--acquisition", "duo"]) == 0
    assert "acquisition" in capsys.readouterr().out
    assert main(["query", *t, "marginal", MODEL, "--cohort", "status=solo", "--top", "3"]) == 0
    assert "value of +1 point" in capsys.readouterr().out
    assert main(["query", *t, "value", MODEL, *pairs[:-1], "band=nowhere"]) == 1
    assert "band" in capsys.readouterr().err
    assert main(["query", *t, "health"]) == 0


# ---- property-based bad requests --------------------------------------------------------------
_text = st.text(alphabet=st.characters(codec="utf-8", exclude_categories=("Cs",)), max_size=12)
_levels = st.dictionaries(st.one_of(st.sampled_from(list(AXES)), _text),
                          st.one_of(st.sampled_from(sum(AXES.values(), [])), _text), max_size=7)
OK_CODES = {grpc.StatusCode.OK, grpc.StatusCode.INVALID_ARGUMENT, grpc.StatusCode.NOT_FOUND,
            grpc.StatusCode.RESOURCE_EXHAUSTED}


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(levels=_levels, name=st.one_of(st.just(f"models/{MODEL}"), _text.map(lambda s: "models/" + s), _text),
       horizon=st.one_of(st.none(), st.integers(-5, 2000)), level=st.one_of(st.none(), st.floats(allow_nan=True)),
       codes=st.lists(st.integers(0, 2**31 - 1), max_size=4), stream=st.one_of(st.just(""), _text))
def test_bad_requests_never_crash_the_server(served, levels, name, horizon, level, codes, stream):
    with grpc.insecure_channel(served["server"].target) as ch:
        stub = vgrpc.ValuationServiceStub(ch)
        req = pb.GetValueRequest(name=name, state=pb.State(levels=levels), stream=stream)
        if horizon is not None:
            req.horizon = horizon
        if level is not None:
            req.interval_level = level
        breq = pb.BatchGetValuesRequest(name=name, stream=stream)
        for a in list(AXES)[: len(codes) + 1]:
            breq.states.columns.add(axis=a, codes=codes)
        for fn, r in ((stub.GetValue, req), (stub.BatchGetValues, breq),
                      (stub.GetContrast, pb.GetContrastRequest(name=name, acquisition=pb.Acquisition(
                          state=pb.State(levels=levels), plan=stream)))):
            try:
                fn(r, timeout=30)
                code = grpc.StatusCode.OK
            except grpc.RpcError as e:
                code = e.code()
            assert code in OK_CODES, code
    assert served["server"].proc.poll() is None
