#!/usr/bin/env python3
"""Hostile-input run against a running `probity serve`: malformed, oversized and invented calls and raw garbage
connections, while the server's resident memory and its metric series are watched.

    .venv/bin/python tools/storm.py --grpc 127.0.0.1:50051 --metrics 127.0.0.1:9464 --pid PID --seconds 25

Every kind of call below goes to the server in turn from a pool of worker threads until the time is up:

- garbage: random bytes as the body of every method (the gRPC layer answers INTERNAL: the body is not the message);
- oversize: a body over `limits.max_message_bytes` (RESOURCE_EXHAUSTED);
- invented: well-formed calls carrying names no configuration holds (routes, models, versions, challengers,
  prediction ids, feature names, tag keys), each made up for that call and marked with the `--marker` prefix;
- overlong: the same fields at 10 to 100 times their documented maximum (docs/limits.md);
- unknown: calls to methods and services that do not exist;
- streams: scoring and outcome streams that carry a garbage message among good ones, or are cut off mid-stream;
- sockets: raw TCP connections that send random bytes, a bare HTTP/2 preface, or nothing, then close.

It prints one JSON object: calls made per kind and status code, resident memory before, at its peak, right after
and after a quiet period, the number of metric series before and after, and every series whose labels carry an
invented value (there must be none: a label set that grows with values a client makes up is unbounded memory).
The `test_storm.py` end-to-end test runs a short form of it and checks those figures.
"""

from __future__ import annotations

import argparse
import collections
import json
import os
import random
import socket
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path

import grpc

ROOT = Path(__file__).resolve().parents[1]

# Every method of proto/probity/v1, with its request message (module, name) and whether it streams requests.
METHODS = {
    "/probity.v1.Scoring/Score": ("scoring", "ScoreRequest", False),
    "/probity.v1.Scoring/ScoreBatch": ("scoring", "ScoreBatchRequest", False),
    "/probity.v1.Scoring/ScoreStream": ("scoring", "ScoreRequest", True),
    "/probity.v1.Models/ListRoutes": ("models", "ListRoutesRequest", False),
    "/probity.v1.Models/ModelFacts": ("models", "ModelFactsRequest", False),
    "/probity.v1.Models/Reload": ("models", "ReloadRequest", False),
    "/probity.v1.Outcomes/RecordOutcomes": ("outcomes", "RecordOutcomesRequest", False),
    "/probity.v1.Outcomes/RecordOutcomeStream": ("outcomes", "Outcome", True),
    "/probity.v1.Outcomes/Report": ("outcomes", "ReportRequest", False),
    "/probity.v1.Challengers/Compare": ("challengers", "CompareRequest", False),
    "/probity.v1.Challengers/Promote": ("challengers", "PromoteRequest", False),
    "/probity.v1.Challengers/RouteHistory": ("challengers", "RouteHistoryRequest", False),
}


def load_stubs():
    """The message modules, generated from proto/ into a temporary directory with grpcio-tools' protoc."""
    from grpc_tools import protoc

    out = tempfile.mkdtemp(prefix="probity-storm-stubs-")
    include = Path(protoc.__file__).parent / "_proto"
    protos = sorted(str(p.relative_to(ROOT / "proto")) for p in (ROOT / "proto" / "probity" / "v1").glob("*.proto"))
    if protoc.main(["protoc", f"-I{ROOT / 'proto'}", f"-I{include}", f"--python_out={out}", *protos]) != 0:
        raise SystemExit("protoc failed")
    sys.path.insert(0, out)
    from probity.v1 import challengers_pb2, models_pb2, outcomes_pb2, scoring_pb2

    return {"scoring": scoring_pb2, "models": models_pb2, "outcomes": outcomes_pb2, "challengers": challengers_pb2}


def rss_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise RuntimeError(f"no VmRSS for process {pid}")


def scrape(metrics_addr: str) -> list[str]:
    """The sample lines of the server's Prometheus exposition."""
    with urllib.request.urlopen(f"http://{metrics_addr}/metrics", timeout=10) as r:
        text = r.read().decode()
    return [line for line in text.splitlines() if line and not line.startswith("#")]


def series_of(line: str) -> str:
    """A sample line's series: its name and labels, without the value."""
    return line.rsplit(" ", 1)[0]


class Storm:
    def __init__(self, grpc_addr: str, pb: dict, seed: int, marker: str, max_message_bytes: int, routes: list[str]):
        self.grpc_addr = grpc_addr
        self.pb = pb
        self.rng_seed = seed
        self.marker = marker
        self.max_message_bytes = max_message_bytes
        self.routes = routes
        self.counts: dict[str, collections.Counter] = collections.defaultdict(collections.Counter)
        self.lock = threading.Lock()
        self.options = [
            ("grpc.max_send_message_length", 64 * 1024 * 1024),
            ("grpc.max_receive_message_length", 64 * 1024 * 1024),
            ("grpc.max_metadata_size", 64 * 1024),
        ]

    def tally(self, kind: str, code: str):
        with self.lock:
            self.counts[kind][code] += 1

    def name(self, rng: random.Random, length: int | None = None) -> str:
        n = length if length is not None else rng.randint(1, 40)
        alphabet = "abcdefghijklmnopqrstuvwxyz0123456789-_.éß€"
        return self.marker + "".join(rng.choice(alphabet) for _ in range(n))

    def call(self, channel, kind: str, path: str, body: bytes, timeout: float = 10.0):
        method = channel.unary_unary(path, request_serializer=None, response_deserializer=None)
        try:
            method(body, timeout=timeout)
            self.tally(kind, "OK")
        except grpc.RpcError as e:
            self.tally(kind, e.code().name)

    def stream(self, channel, kind: str, path: str, bodies: list[bytes], cancel_after: int | None):
        method = channel.stream_stream(path, request_serializer=None, response_deserializer=None)
        try:
            responses = method(iter(bodies), timeout=10.0)
            for i, _ in enumerate(responses):
                if cancel_after is not None and i >= cancel_after:
                    responses.cancel()
                    break
            self.tally(kind, "OK")
        except grpc.RpcError as e:
            self.tally(kind, e.code().name)

    # One call of each kind; `rng` is the worker's own.

    def garbage(self, channel, rng):
        path = rng.choice(list(METHODS))
        body = rng.randbytes(rng.randint(1, 2000))
        # A streaming method counts each message it answers, so its calls are tallied apart.
        self.call(channel, "garbage-stream" if METHODS[path][2] else "garbage", path, body)

    def oversize(self, channel, rng):
        path = rng.choice(["/probity.v1.Scoring/ScoreBatch", "/probity.v1.Outcomes/RecordOutcomes", "/probity.v1.Scoring/Score"])
        body = rng.randbytes(self.max_message_bytes + rng.randint(1, 2 * 1024 * 1024))
        self.call(channel, "oversize", path, body)

    def invented_message(self, rng, scale: int):
        """A well-formed request with names nobody configured; `scale` multiplies the length of every name."""
        s, m, o, c = (self.pb[k] for k in ("scoring", "models", "outcomes", "challengers"))

        def n(base: int) -> str:
            return self.name(rng, base * scale)

        def row():
            r = s.Row(prediction_id=n(20), subject_key=n(20))
            for _ in range(rng.randint(0, 4)):
                r.tags[n(8)] = n(8)
            for _ in range(rng.randint(0, 6)):
                if rng.random() < 0.5:
                    r.named.values[n(10)].number = rng.uniform(-1e6, 1e6)
                else:
                    r.named.values[n(10)].category = n(10)
            return r

        route = rng.choice(self.routes + [n(12)]) if scale == 1 else n(12)
        choice = rng.randrange(9)
        if choice == 0:
            return "/probity.v1.Scoring/Score", s.ScoreRequest(route=route, row=row())
        if choice == 1:
            return "/probity.v1.Scoring/ScoreBatch", s.ScoreBatchRequest(route=route, rows=[row() for _ in range(rng.randint(1, 20))])
        if choice == 2:
            req = m.ModelFactsRequest()
            field = rng.choice([f.name for f in req.DESCRIPTOR.fields])
            setattr(req, field, n(12))
            return "/probity.v1.Models/ModelFacts", req
        if choice == 3:
            outcomes = [o.Outcome(prediction_id=n(20), label=rng.random() < 0.5) for _ in range(rng.randint(1, 200))]
            return "/probity.v1.Outcomes/RecordOutcomes", o.RecordOutcomesRequest(outcomes=outcomes)
        if choice == 4:
            return "/probity.v1.Outcomes/Report", o.ReportRequest(route=n(12), model=n(12), version=n(6))
        if choice == 5:
            return "/probity.v1.Challengers/Compare", c.CompareRequest(route=route, challenger=n(12))
        if choice == 6:
            return "/probity.v1.Challengers/Promote", c.PromoteRequest(
                route=n(12), challenger=n(12), requested_by=n(10), reason=n(100)
            )
        if choice == 7:
            return "/probity.v1.Challengers/RouteHistory", c.RouteHistoryRequest(route=n(12))
        return "/probity.v1.Models/ListRoutes", m.ListRoutesRequest()

    def invented(self, channel, rng):
        path, message = self.invented_message(rng, 1)
        self.call(channel, "invented", path, message.SerializeToString())

    def overlong(self, channel, rng):
        path, message = self.invented_message(rng, rng.choice([10, 100]))
        self.call(channel, "overlong", path, message.SerializeToString())

    def unknown(self, channel, rng):
        service = rng.choice(["probity.v1.Scoring", "probity.v1.Outcomes", self.name(rng, 12)])
        path = f"/{service}/{self.name(rng, 12)}"
        self.call(channel, "unknown", path, rng.randbytes(rng.randint(0, 64)))

    def streams(self, channel, rng):
        s, o = self.pb["scoring"], self.pb["outcomes"]
        if rng.random() < 0.5:
            path = "/probity.v1.Scoring/ScoreStream"
            good = [s.ScoreRequest(route=rng.choice(self.routes), row=s.Row()).SerializeToString() for _ in range(5)]
        else:
            path = "/probity.v1.Outcomes/RecordOutcomeStream"
            good = [o.Outcome(prediction_id=self.name(rng), label=True).SerializeToString() for _ in range(5)]
        bodies = good[:2] + [rng.randbytes(rng.randint(1, 300))] + good[2:]
        self.stream(channel, "streams", path, bodies, cancel_after=rng.choice([None, 1]))

    def sockets(self, _channel, rng):
        host, port = self.grpc_addr.rsplit(":", 1)
        what = rng.choice(["random", "preface", "silent"])
        try:
            with socket.create_connection((host, int(port)), timeout=5) as sock:
                if what == "random":
                    sock.sendall(rng.randbytes(rng.randint(1, 4096)))
                elif what == "preface":
                    sock.sendall(b"PRI * HTTP/2.0\r\n\r\nSM\r\n\r\n" + rng.randbytes(rng.randint(0, 512)))
                else:
                    time.sleep(0.2)
                sock.settimeout(1)
                try:
                    sock.recv(4096)
                except (socket.timeout, OSError):
                    pass
            self.tally("sockets", what)
        except OSError as e:
            self.tally("sockets", f"{what}:{type(e).__name__}")

    def run(self, seconds: float, workers: int):
        kinds = [self.garbage, self.oversize, self.invented, self.invented, self.overlong, self.unknown, self.streams, self.sockets]
        weights = [6, 1, 8, 8, 4, 2, 2, 2]
        end = time.monotonic() + seconds

        def worker(i: int):
            rng = random.Random(self.rng_seed * 1000 + i)
            with grpc.insecure_channel(self.grpc_addr, options=self.options) as channel:
                while time.monotonic() < end:
                    rng.choices(kinds, weights)[0](channel, rng)

        threads = [threading.Thread(target=worker, args=(i,)) for i in range(workers)]
        for t in threads:
            t.start()
        return threads


def run(grpc_addr: str, metrics_addr: str, pid: int, seconds: float, seed: int = 1, workers: int = 8,
        quiet: float = 10.0, marker: str = "zq", max_message_bytes: int = 4 * 1024 * 1024,
        routes: list[str] | None = None, pb: dict | None = None) -> dict:
    """One hostile-input run; returns the figures (see the module's doc)."""
    pb = pb or load_stubs()
    before_series = {series_of(line) for line in scrape(metrics_addr)}
    rss_before = rss_kib(pid)
    storm = Storm(grpc_addr, pb, seed, marker, max_message_bytes, routes or [])
    started = time.monotonic()
    threads = storm.run(seconds, workers)
    peak = rss_before
    while any(t.is_alive() for t in threads):
        peak = max(peak, rss_kib(pid))
        time.sleep(0.1)
    elapsed = time.monotonic() - started
    rss_after = rss_kib(pid)
    time.sleep(quiet)
    rss_quiet = rss_kib(pid)
    after_series = {series_of(line) for line in scrape(metrics_addr)}
    invented = sorted(s for s in after_series if marker in s)
    calls = {kind: dict(sorted(c.items())) for kind, c in sorted(storm.counts.items())}
    return {
        "seconds": round(elapsed, 1),
        "calls": sum(sum(c.values()) for k, c in storm.counts.items() if k != "sockets"),
        "connections": sum(storm.counts["sockets"].values()),
        "by_kind": calls,
        "rss_kib": {"before": rss_before, "peak": peak, "after": rss_after, f"after_{quiet:g}s_quiet": rss_quiet},
        "series": {"before": len(before_series), "after": len(after_series),
                   "new": sorted(after_series - before_series)},
        "series_with_invented_labels": invented,
        "alive": Path(f"/proc/{pid}").exists(),
    }


def main():
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--grpc", required=True, help="the server's gRPC address, host:port (plaintext)")
    p.add_argument("--metrics", required=True, help="the server's monitoring address, host:port")
    p.add_argument("--pid", type=int, required=True, help="the server's process id (for its resident memory)")
    p.add_argument("--seconds", type=float, default=25.0)
    p.add_argument("--workers", type=int, default=8)
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--quiet", type=float, default=10.0, help="seconds to wait after the run before the last sample")
    p.add_argument("--route", action="append", default=[], help="a configured route (repeat): invented rows go to it too")
    p.add_argument("--max-message-bytes", type=int, default=4 * 1024 * 1024)
    a = p.parse_args()
    result = run(a.grpc, a.metrics, a.pid, a.seconds, a.seed, a.workers, a.quiet, "zq", a.max_message_bytes, a.route)
    json.dump(result, sys.stdout, indent=2)
    print()
    return 0 if result["alive"] and not result["series_with_invented_labels"] else 1


if __name__ == "__main__":
    sys.exit(main())
