"""A short hostile-input run (tools/storm.py) against the real `probity serve` with a prediction store: the server
lives through it, answers a good call the same way afterwards, uses the gRPC status table's codes (grpc/grpc
doc/statuscodes.md: INTERNAL for a body that is not the method's message, RESOURCE_EXHAUSTED for one over the size
limit), counts every refusal it made in probity_grpc_requests_total whichever layer made it, and keeps no metric
series whose labels carry a value the caller made up."""

import sys
import urllib.request
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from conftest import ROOT, Server

sys.path.insert(0, str(ROOT / "tools"))
import storm  # noqa: E402

MARKER = "zq"


@pytest.fixture(scope="module")
def stored(tmp_path_factory):
    work = tmp_path_factory.mktemp("storm")
    store = work / "store"
    s = Server(work, server_toml=f'plaintext = "loopback"\n[store]\ndirectory = "{store}"\n')
    yield s
    if s.proc.poll() is None:
        s.proc.kill()


def requests_by_code(metrics_addr):
    """probity_grpc_requests_total by (method, code)."""
    with urllib.request.urlopen(f"http://{metrics_addr}/metrics", timeout=10) as r:
        text = r.read().decode()
    totals = {}
    for family in text_string_to_metric_families(text):
        if family.name != "probity_grpc_requests":
            continue
        for sample in family.samples:
            if sample.name.endswith("_total"):
                key = (sample.labels["method"], sample.labels["code"])
                totals[key] = totals.get(key, 0) + sample.value
    return totals


def good_answer(stubs, channel):
    s = stubs.scoring
    row = s.Row(prediction_id="storm-check", named=s.NamedFeatures(values={
        "amount": s.FeatureValue(number=120.5), "channel": s.FeatureValue(category="online"),
        "hour": s.FeatureValue(number=3)}))
    return stubs.scoring_grpc.ScoringStub(channel).Score(s.ScoreRequest(route="fraud", row=row))


def test_a_short_storm_leaves_the_server_whole_counted_and_without_invented_labels(stored, stubs):
    before = good_answer(stubs, stored.channel)
    codes_before = requests_by_code(stored.metrics_addr)
    result = storm.run(stored.grpc_addr, stored.metrics_addr, stored.proc.pid, seconds=8, seed=7, workers=6,
                       quiet=1, marker=MARKER, routes=["fraud", "credit"])
    print(result)
    assert result["alive"] and stored.proc.poll() is None
    assert result["calls"] > 200, result

    # No series remembers a value a caller made up (they all start with the marker).
    assert result["series_with_invented_labels"] == []

    by_kind = result["by_kind"]
    # A message over limits.max_message_bytes is RESOURCE_EXHAUSTED (not the library's OUT_OF_RANGE).
    assert set(by_kind.get("oversize", {})) <= {"RESOURCE_EXHAUSTED"}, by_kind
    # Undecodable bodies are INTERNAL (or decode by chance into a valid message); well-formed calls with made-up or
    # overlong values are never INTERNAL or UNKNOWN.
    for kind in ("invented", "overlong", "unknown"):
        assert not {"INTERNAL", "UNKNOWN"} & set(by_kind.get(kind, {})), (kind, by_kind)
    assert "UNKNOWN" not in by_kind.get("garbage", {})
    assert by_kind.get("garbage", {}).get("INTERNAL", 0) > 0

    # Every INTERNAL and RESOURCE_EXHAUSTED answer of a unary method that the client saw was counted by the server,
    # once. (A streaming method counts each message it answers, and a client that cancels does not see the
    # refusal of a message it had already sent: those are checked by the Rust tests of the refusal layer.)
    codes_after = requests_by_code(stored.metrics_addr)
    for code in ("INTERNAL", "RESOURCE_EXHAUSTED"):
        seen = sum(by_kind.get(k, {}).get(code, 0) for k in ("garbage", "oversize", "invented", "overlong", "unknown"))
        counted = sum(
            v - codes_before.get(key, 0)
            for key, v in codes_after.items()
            if isinstance(key, tuple) and key[1] == code and not key[0].endswith("Stream")
        )
        assert counted == seen, (code, counted, seen, by_kind)

    after = good_answer(stubs, stored.channel)
    assert after.probability == before.probability and after.log_odds == before.log_odds
