"""End-to-end: the real `probity serve` binary, called over gRPC from Python's grpcio with stubs generated from
proto/ in this run; the probabilities equal `probity score`'s to the last bit; /metrics passes the
prometheus_client exposition-format parser (prometheus_client.parser.text_string_to_metric_families, 0.26)."""

import csv
import subprocess
import urllib.error
import urllib.request

import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_reflection.v1alpha.proto_reflection_descriptor_database import ProtoReflectionDescriptorDatabase
from prometheus_client.parser import text_string_to_metric_families

from conftest import DATA, binary

# Fixture rows for the fraud test model: every branch of both trees, a missing value, an unknown category.
ROWS = [
    ("r1", "150", "online", "3"),
    ("r2", "50", "pos", "3"),
    ("r3", "50", "pos", "12"),
    ("r4", "100", "atm", "5.999"),
    ("r5", "100.0001", "pos", ""),
    ("r6", "1e6", "phone", "23"),
    ("r7", "-20.5", "online", "0"),
]


def named_row(s, rid, amount, channel, hour):
    values = {}
    if amount != "":
        values["amount"] = s.scoring.FeatureValue(number=float(amount))
    if channel != "":
        values["channel"] = s.scoring.FeatureValue(category=channel)
    if hour != "":
        values["hour"] = s.scoring.FeatureValue(number=float(hour))
    return s.scoring.Row(prediction_id=rid, named=s.scoring.NamedFeatures(values=values))


def test_probabilities_equal_probity_score_to_the_last_bit(server, stubs, tmp_path):
    src = tmp_path / "rows.csv"
    with src.open("w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["id", "amount", "channel", "hour"])
        w.writerows(ROWS)
    out = tmp_path / "scored.csv"
    subprocess.run(
        [binary(), "score", "--model", str(DATA / "grpc-fraud-v1.json"), "--input", str(src), "--output", str(out),
         "--target-base-rate", "0.01", "--threshold", "0.5", "--quiet", "--full-precision"],
        check=True,
    )
    with out.open() as f:
        offline = {r["id"]: r for r in csv.DictReader(f)}

    scoring = stubs.scoring_grpc.ScoringStub(server.channel)
    batch = scoring.ScoreBatch(stubs.scoring.ScoreBatchRequest(
        route="fraud", rows=[named_row(stubs, *r) for r in ROWS]))
    assert [r.prediction_id for r in batch.results] == [r[0] for r in ROWS]
    for result in batch.results:
        expected = offline[result.prediction_id]
        single = scoring.Score(stubs.scoring.ScoreRequest(route="fraud", row=named_row(stubs, *next(r for r in ROWS if r[0] == result.prediction_id))))
        for field in ("margin", "log_odds", "calibrated_log_odds", "adjusted_log_odds", "probability", "score"):
            # float() of Rust's shortest round-trip text gives back the same bits.
            assert getattr(result, field) == float(expected[field]), (result.prediction_id, field)
            assert getattr(single, field) == getattr(result, field)
        assert result.decision == expected["decision"]
    warned = {r.prediction_id: [w.feature for w in r.warnings] for r in batch.results if r.warnings}
    assert warned == {"r5": ["hour"], "r6": ["channel"]}


def test_every_other_rpc(server, stubs):
    s = stubs
    scoring = s.scoring_grpc.ScoringStub(server.channel)
    dense = s.scoring.Row(dense=s.scoring.DenseFeatures(values=[150.0, 1.0, 3.0]))
    one = scoring.Score(s.scoring.ScoreRequest(route="fraud", row=dense))
    assert (one.model, one.model_version) == ("grpc-fraud", "v1")
    assert len(one.prediction_id) == 36, "server-made UUID"

    requests = [s.scoring.ScoreRequest(route="fraud", row=dense), s.scoring.ScoreRequest(route="ghost", row=dense),
                s.scoring.ScoreRequest(route="fraud-strict", row=dense)]
    answers = list(scoring.ScoreStream(iter(requests)))
    assert [a.sequence for a in answers] == [0, 1, 2]
    assert answers[0].result.probability == one.probability
    assert answers[1].error.code == grpc.StatusCode.NOT_FOUND.value[0]
    assert answers[2].result.model == "grpc-fraud"

    models = s.models_grpc.ModelsStub(server.channel)
    listing = models.ListRoutes(s.models.ListRoutesRequest())
    assert [(r.name, r.ready) for r in listing.routes] == [("credit", True), ("fraud", True), ("fraud-strict", True)]
    assert sorted((m.name, m.version) for m in listing.models) == [("grpc-credit", "v1"), ("grpc-fraud", "v1")]
    described = models.ModelFacts(s.models.ModelFactsRequest(route="credit"))
    assert [f.name for f in described.features] == ["income", "region"]
    assert list(described.features[1].categories) == ["north", "south"]
    reload = models.Reload(s.models.ReloadRequest())
    assert {f.file: f.outcome for f in reload.files} == {
        "grpc-credit-v1.json": s.models.RELOAD_OUTCOME_UNCHANGED,
        "grpc-fraud-v1.json": s.models.RELOAD_OUTCOME_UNCHANGED,
    }

    health = health_pb2_grpc.HealthStub(server.channel)
    assert health.Check(health_pb2.HealthCheckRequest(service="")).status == health_pb2.HealthCheckResponse.SERVING

    services = set(ProtoReflectionDescriptorDatabase(server.channel).get_services())
    assert {"probity.v1.Scoring", "probity.v1.Models", "grpc.health.v1.Health"} <= services


@pytest.mark.parametrize("route,row,code,needle", [
    ("nope", {"amount": 1.0}, grpc.StatusCode.NOT_FOUND, "nope"),
    ("fraud-strict", {"amount": 1.0, "channel": "pos"}, grpc.StatusCode.INVALID_ARGUMENT, 'row.named.values["hour"]'),
    ("fraud-strict", {"amount": 1.0, "channel": "phone", "hour": 2.0}, grpc.StatusCode.INVALID_ARGUMENT, 'row.named.values["channel"]'),
    ("fraud", {"amount": "high", "channel": "pos", "hour": 2.0}, grpc.StatusCode.INVALID_ARGUMENT, 'row.named.values["amount"]'),
])
def test_bad_requests_from_python(server, stubs, route, row, code, needle):
    values = {k: stubs.scoring.FeatureValue(category=v) if isinstance(v, str) else stubs.scoring.FeatureValue(number=v)
              for k, v in row.items()}
    request = stubs.scoring.ScoreRequest(route=route, row=stubs.scoring.Row(named=stubs.scoring.NamedFeatures(values=values)))
    with pytest.raises(grpc.RpcError) as err:
        stubs.scoring_grpc.ScoringStub(server.channel).Score(request)
    assert err.value.code() == code
    assert needle in err.value.details()


def test_metrics_pass_the_exposition_parser(server, stubs):
    text = urllib.request.urlopen(f"http://{server.metrics_addr}/metrics", timeout=10).read().decode()
    families = {f.name: f for f in text_string_to_metric_families(text)}
    # prometheus_client strips the _total suffix from counter family names.
    assert families["probity_predictions"].type == "counter"
    assert families["probity_prediction_probability"].type == "histogram"
    assert families["probity_grpc_request_duration_seconds"].type == "histogram"
    assert families["probity_build_info"].type == "gauge"
    samples = [x for x in families["probity_predictions"].samples if x.labels.get("route") == "fraud"]
    assert samples and samples[0].labels["model"] == "grpc-fraud" and samples[0].labels["version"] == "v1"
    assert samples[0].value >= 7
    buckets = [x for x in families["probity_prediction_probability"].samples
               if x.name.endswith("_bucket") and x.labels.get("route") == "fraud"]
    counts = [x.value for x in sorted(buckets, key=lambda x: float(x.labels["le"]))]
    assert counts == sorted(counts), "cumulative buckets"
    assert urllib.request.urlopen(f"http://{server.metrics_addr}/readyz", timeout=10).status == 200


def test_sigterm_drains_and_exits_cleanly(server):
    assert server.stop() == 0
    assert any('"stopped"' in line for line in server.log), "".join(server.log[-5:])
