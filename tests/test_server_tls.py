"""TLS and bearer tokens: a server with a self-signed certificate, a query token and an admin
token. Wrong or missing tokens are UNAUTHENTICATED, the query token on admin calls is
PERMISSION_DENIED, health stays open, plaintext clients cannot talk to the TLS port."""

from __future__ import annotations

import datetime
import ipaddress

import pytest

from serving import MODEL, STATE, ServerProcess, write_artifact
from stateworth.clients import client as cl


def _self_signed(tmp):
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "localhost")])
    now = datetime.datetime.now(datetime.timezone.utc)
    cert = (x509.CertificateBuilder().subject_name(name).issuer_name(name).public_key(key.public_key())
            .serial_number(x509.random_serial_number()).not_valid_before(now - datetime.timedelta(minutes=5))
            .not_valid_after(now + datetime.timedelta(days=1))
            .add_extension(x509.SubjectAlternativeName([x509.DNSName("localhost"),
                                                        x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]),
                           critical=False)
            .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
            .sign(key, hashes.SHA256()))
    cert_path, key_path = tmp / "server.pem", tmp / "server.key"
    cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    key_path.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                           serialization.NoEncryption()))
    return cert_path, key_path


@pytest.fixture(scope="module")
def secure(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("tls")
    models = tmp / "models"
    models.mkdir()
    write_artifact(models, "tiny", seed=0)
    cert, key = _self_signed(tmp)
    (tmp / "query.token").write_text("query-secret-1\n")
    (tmp / "admin.token").write_text("admin-secret-2\n")
    srv = ServerProcess(models, "--tls-cert", str(cert), "--tls-key", str(key), "--token-file",
                        str(tmp / "query.token"), "--admin-token-file", str(tmp / "admin.token"))
    yield srv, cert
    assert srv.stop() == 0
    log = "".join(srv.lines)
    assert "query-secret-1" not in log and "admin-secret-2" not in log


def test_tls_with_the_query_token(secure):
    srv, cert = secure
    with cl.Client(f"localhost:{srv.port}", tls_ca=cert, token="query-secret-1") as c:
        assert c.value(MODEL, STATE).value.unit == "EUR"
        assert c.health() == "SERVING"


def test_missing_or_wrong_tokens_are_unauthenticated(secure):
    srv, cert = secure
    with cl.Client(f"localhost:{srv.port}", tls_ca=cert) as c:
        assert c.health() == "SERVING"  # health is open to probes
        with pytest.raises(cl.Unauthenticated):
            c.value(MODEL, STATE)
    with cl.Client(f"localhost:{srv.port}", tls_ca=cert, token="guess") as c:
        with pytest.raises(cl.Unauthenticated):
            c.list_models()
        with pytest.raises(cl.Unauthenticated):
            c.reload_models()


def test_admin_calls_need_the_admin_token(secure):
    srv, cert = secure
    with cl.Client(f"localhost:{srv.port}", tls_ca=cert, token="query-secret-1") as c:
        with pytest.raises(cl.PermissionDenied):
            c.reload_models()
    with cl.Client(f"localhost:{srv.port}", tls_ca=cert, token="query-secret-1", admin_token="admin-secret-2") as c:
        r = c.reload_models()
        assert r.kept_count == 1 and r.loaded_count == 0
        assert c.value(MODEL, STATE).version == r.models[0].version


def test_plaintext_client_cannot_use_the_tls_port(secure):
    srv, _ = secure
    with cl.Client(srv.target, token="query-secret-1", timeout=3, retries=1, backoff=0.01) as c:
        with pytest.raises(cl.Unavailable):
            c.list_models()


def _rpc_lines(srv: ServerProcess, method: str) -> list[dict]:
    return [e for e in list(srv.events) if e.get("event") == "rpc" and e.get("method") == method]


def test_each_refused_call_has_one_access_line_and_the_same_handler_serves_again(secure):
    """Refusals go through the same per-method handlers as allowed calls (built once, kept):
    every call, refused or not, gets exactly one access line with its own code, and a refusal
    does not stick to the method."""
    import time

    srv, cert = secure
    method = "/stateworth.v1.ValuationService/GetModel"
    before = len(_rpc_lines(srv, method))
    with cl.Client(f"localhost:{srv.port}", tls_ca=cert, token="guess") as bad, \
            cl.Client(f"localhost:{srv.port}", tls_ca=cert, token="query-secret-1") as good:
        for _ in range(3):
            with pytest.raises(cl.Unauthenticated):
                bad.get_model(MODEL)
            assert good.get_model(MODEL).name == f"models/{MODEL}"
    end = time.monotonic() + 10
    while len(_rpc_lines(srv, method)) < before + 6 and time.monotonic() < end:
        time.sleep(0.05)
    time.sleep(0.2)  # a doubled line would arrive by now
    codes = [e["code"] for e in _rpc_lines(srv, method)[before:]]
    assert codes == ["UNAUTHENTICATED", "OK"] * 3


def test_a_token_must_match_exactly(secure):
    srv, cert = secure
    # (gRPC itself refuses header values that end in white space, so padding goes in front)
    for padded in (" query-secret-1", "   query-secret-1"):
        with cl.Client(f"localhost:{srv.port}", tls_ca=cert, token=padded) as c:
            with pytest.raises(cl.Unauthenticated):
                c.list_models()
    with cl.Client(f"localhost:{srv.port}", tls_ca=cert, token="query-secret-1",
                   admin_token=" admin-secret-2") as c:
        with pytest.raises(cl.Unauthenticated):
            c.reload_models()


def test_tls_beyond_loopback_without_tokens_is_warned_about(tmp_path):
    # 127.0.0.2 is a loopback address of the machine that the server does not treat as loopback
    # (it names only 127.0.0.1, ::1 and localhost), so it stands for a public address here
    cert, key = _self_signed(tmp_path)
    models = tmp_path / "models"
    models.mkdir()
    srv = ServerProcess(models, "--allow-empty", "--host", "127.0.0.2", "--tls-cert", str(cert), "--tls-key", str(key))
    try:
        warned = srv.wait_for("tls_without_tokens", timeout=60)
        assert warned["level"] == "warning" and warned["host"] == "127.0.0.2"
    finally:
        assert srv.stop() == 0
    quiet = ServerProcess(models, "--allow-empty", "--tls-cert", str(cert), "--tls-key", str(key))  # on loopback: no warning
    try:
        quiet.wait_for("serving")
    finally:
        assert quiet.stop() == 0
    assert not any(e.get("event") == "tls_without_tokens" for e in quiet.events)
