"""`probity serve` with TLS, mutual TLS and roles, called from Python's grpcio (a second gRPC implementation, with
its own TLS stack): a token with the role is served, no credentials get UNAUTHENTICATED, a token without the role
gets PERMISSION_DENIED, a client certificate whose CN is a configured caller is served, and a plain-text channel
gets nowhere. The certificates are made with the openssl command-line tool for this run."""

import json
import shutil
import subprocess
from pathlib import Path

import grpc
import pytest

from conftest import Server

TOKENS = {"gateway": "e2e-gateway-token-5tQ8wN2z", "ops": "e2e-ops-token-Hk3vB9mX1c"}


def openssl(*args, cwd):
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True)


def leaf(d: Path, name: str, subject: str, ext: str):
    openssl("req", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes", "-keyout", f"{name}.key",
            "-out", f"{name}.csr", "-subj", subject, cwd=d)
    (d / f"{name}.ext").write_text(ext)
    openssl("x509", "-req", "-in", f"{name}.csr", "-CA", "ca.crt", "-CAkey", "ca.key", "-CAcreateserial",
            "-out", f"{name}.crt", "-days", "2", "-extfile", f"{name}.ext", cwd=d)


@pytest.fixture(scope="module")
def pki(tmp_path_factory):
    if shutil.which("openssl") is None:
        pytest.fail("the openssl command-line tool is needed to make the test certificates")
    d = tmp_path_factory.mktemp("pki")
    openssl("req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
            "-keyout", "ca.key", "-out", "ca.crt", "-days", "2", "-subj", "/CN=probity e2e CA",
            "-addext", "basicConstraints=critical,CA:TRUE", "-addext", "keyUsage=critical,keyCertSign,cRLSign", cwd=d)
    leaf(d, "server", "/CN=probity e2e server",
         "basicConstraints=CA:FALSE\nsubjectAltName=DNS:localhost,IP:127.0.0.1\nextendedKeyUsage=serverAuth\n")
    leaf(d, "desk", "/CN=desk.e2e.test", "basicConstraints=CA:FALSE\nextendedKeyUsage=clientAuth\n")
    for name, token in TOKENS.items():
        (d / f"{name}.token").write_text(token + "\n")
    return d


def server_toml(d: Path) -> str:
    q = lambda p: json.dumps(str(d / p))  # noqa: E731
    return (
        f"[server.tls]\ncertificate_file = {q('server.crt')}\nkey_file = {q('server.key')}\n"
        f"client_ca_file = {q('ca.crt')}\nclient_certificates = \"optional\"\n"
        f"[[access.callers]]\nname = \"gateway\"\ntoken_file = {q('gateway.token')}\nroles = [\"score\"]\n"
        f"[[access.callers]]\nname = \"ops\"\ntoken_file = {q('ops.token')}\nroles = [\"admin\"]\n"
        "[[access.callers]]\nname = \"desk\"\ncertificate_name = \"desk.e2e.test\"\nroles = [\"score\"]\n"
    )


@pytest.fixture(scope="module")
def tls_server(tmp_path_factory, pki):
    creds = grpc.ssl_channel_credentials(root_certificates=(pki / "ca.crt").read_bytes())
    s = Server(tmp_path_factory.mktemp("serve-tls"), server_toml=server_toml(pki), credentials=creds)
    yield s
    s.stop()


def score(stubs, channel, token=None):
    s = stubs
    request = s.scoring.ScoreRequest(route="fraud", row=s.scoring.Row(dense=s.scoring.DenseFeatures(values=[150.0, 1.0, 3.0])))
    metadata = [("authorization", f"Bearer {token}")] if token else None
    return s.scoring_grpc.ScoringStub(channel).Score(request, metadata=metadata, timeout=10)


def test_roles_over_tls_from_grpcio(tls_server, stubs, pki):
    assert score(stubs, tls_server.channel, TOKENS["gateway"]).model == "grpc-fraud"
    with pytest.raises(grpc.RpcError) as err:
        score(stubs, tls_server.channel)
    assert err.value.code() == grpc.StatusCode.UNAUTHENTICATED
    with pytest.raises(grpc.RpcError) as err:
        score(stubs, tls_server.channel, TOKENS["ops"])
    assert err.value.code() == grpc.StatusCode.PERMISSION_DENIED
    assert "ops" in err.value.details() and "score" in err.value.details()
    assert TOKENS["ops"] not in err.value.details()


def test_client_certificate_identity_from_grpcio(tls_server, stubs, pki):
    creds = grpc.ssl_channel_credentials(
        root_certificates=(pki / "ca.crt").read_bytes(),
        private_key=(pki / "desk.key").read_bytes(),
        certificate_chain=(pki / "desk.crt").read_bytes(),
    )
    with grpc.secure_channel(tls_server.grpc_addr, creds, options=[("grpc.ssl_target_name_override", "localhost")]) as ch:
        assert score(stubs, ch).model == "grpc-fraud"


def test_plain_text_channel_cannot_reach_a_tls_server(tls_server, stubs):
    with grpc.insecure_channel(tls_server.grpc_addr) as ch:
        with pytest.raises(grpc.RpcError) as err:
            score(stubs, ch, TOKENS["gateway"])
    assert err.value.code() == grpc.StatusCode.UNAVAILABLE


def test_tokens_are_not_in_the_log(tls_server):
    log = "".join(tls_server.log)
    assert "call refused" in log
    for token in TOKENS.values():
        assert token not in log
