"""Fixtures for the end-to-end test: stubs generated from proto/ at test time, and a real `probity serve`."""

import json
import os
import shutil
import signal
import subprocess
import sys
import threading
from pathlib import Path

import grpc
import pytest
from grpc_tools import protoc

ROOT = Path(__file__).resolve().parents[2]
DATA = ROOT / "service" / "tests" / "data"

ROUTES = """
[routes.fraud]
model = "grpc-fraud"
target_base_rate = 0.01
decision = { threshold = 0.5 }

[routes.fraud-strict]
model = "grpc-fraud"
missing_features = "reject"
unknown_categories = "reject"

[routes.credit]
model = "grpc-credit"
"""


@pytest.fixture(scope="session")
def stubs(tmp_path_factory):
    """Python modules generated from proto/probity/v1/*.proto with grpcio-tools' protoc."""
    out = tmp_path_factory.mktemp("stubs")
    include = Path(protoc.__file__).parent / "_proto"
    protos = sorted(str(p.relative_to(ROOT / "proto")) for p in (ROOT / "proto" / "probity" / "v1").glob("*.proto"))
    args = ["protoc", f"-I{ROOT / 'proto'}", f"-I{include}", f"--python_out={out}", f"--grpc_python_out={out}", *protos]
    assert protoc.main(args) == 0, "protoc failed"
    sys.path.insert(0, str(out))
    from probity.v1 import models_pb2, models_pb2_grpc, scoring_pb2, scoring_pb2_grpc

    return type("Stubs", (), dict(scoring=scoring_pb2, scoring_grpc=scoring_pb2_grpc, models=models_pb2, models_grpc=models_pb2_grpc))


def binary():
    path = os.environ.get("PROBITY_BIN") or str(ROOT / "target" / "debug" / "probity")
    if not Path(path).exists():
        pytest.fail(f"{path} not found: build with `cargo build -p probity` or run tests/e2e/run.sh")
    return path


class Server:
    """A `probity serve` process on loopback ports it picks itself (port 0), found from its JSON log."""

    def __init__(self, workdir: Path, server_toml: str = 'plaintext = "loopback"\n', credentials=None):
        self.models = workdir / "models"
        self.models.mkdir()
        for name in ("grpc-fraud-v1.json", "grpc-credit-v1.json"):
            shutil.copy(DATA / name, self.models / name)
        config = workdir / "probity.toml"
        config.write_text(
            '[server]\ngrpc_listen = "127.0.0.1:0"\nmetrics_listen = "127.0.0.1:0"\n'
            f"{server_toml}[models]\ndirectory = {json.dumps(str(self.models))}\nwatch = false\n{ROUTES}"
        )
        self.proc = subprocess.Popen(
            [binary(), "serve", "--config", str(config), "--log-format", "json"],
            stderr=subprocess.PIPE,
            text=True,
        )
        self.log = []
        found = threading.Event()

        def read():
            for line in self.proc.stderr:
                self.log.append(line)
                try:
                    event = json.loads(line)
                except ValueError:
                    continue
                if event.get("message") == "probity serving":
                    self.grpc_addr, self.metrics_addr = event["grpc_addr"], event["metrics_addr"]
                    found.set()

        threading.Thread(target=read, daemon=True).start()
        if not found.wait(60):
            self.proc.kill()
            pytest.fail("server did not start:\n" + "".join(self.log))
        if credentials is None:
            self.channel = grpc.insecure_channel(self.grpc_addr)
        else:
            # The test certificate is for `localhost`; the server listens on 127.0.0.1.
            options = [("grpc.ssl_target_name_override", "localhost")]
            self.channel = grpc.secure_channel(self.grpc_addr, credentials, options=options)

    def stop(self):
        self.channel.close()
        self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(30)


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    s = Server(tmp_path_factory.mktemp("serve"))
    yield s
    if s.proc.poll() is None:
        s.proc.kill()
