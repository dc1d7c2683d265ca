"""The Python client against a real `probity serve` (started here, stopped at the end), checked against the
scikit-learn figures of tests/fixtures/evaluate/expected.json (scikit-learn 1.9.1 `log_loss`, `roc_auc_score`,
computed by tests/fixtures/gen_evaluate.py on `load_breast_cancer`, Street, Wolberg and Mangasarian 1993), and the
per-feature stability against the NumPy reference of tests/fixtures/stability/reference.json (gen_stability.py:
slot counts by `np.digitize(right=True)`, PSI sum (a - e) ln(a / e), Siddiqi 2006, shares floored at 1e-4)."""

import csv
import json
import os
import shutil
import signal
import subprocess
import threading
import time
from pathlib import Path

import pytest

from probity_client import Client, Outcome

ROOT = Path(__file__).resolve().parents[3]
FIXTURE = ROOT / "tests" / "fixtures" / "evaluate"
STABILITY = ROOT / "tests" / "fixtures" / "stability"


def binary():
    path = os.environ.get("PROBITY_BIN") or str(ROOT / "target" / "debug" / "probity")
    if not Path(path).exists():
        pytest.fail(f"{path} not found: build with `cargo build -p probity`")
    return path


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    work = tmp_path_factory.mktemp("serve")
    models = work / "models"
    models.mkdir()
    shutil.copy(FIXTURE / "champion.json", models / "champion.json")
    shutil.copy(STABILITY / "model.json", models / "stability.json")
    config = work / "probity.toml"
    config.write_text(
        '[server]\nplaintext = "loopback"\ngrpc_listen = "127.0.0.1:0"\nmetrics_listen = "127.0.0.1:0"\n'
        f"[models]\ndirectory = {json.dumps(str(models))}\nwatch = false\n"
        "[limits]\nmax_batch_rows = 1000\n"
        f'[store]\ndirectory = {json.dumps(str(work / "log"))}\nflush_interval = "5ms"\n'
        '[routes.bc]\nmodel = "breast_cancer_champion"\n[routes.bc.decision]\nthreshold = 0.3\n'
        '[routes.stab]\nmodel = "stability"\nunknown_features = "ignore"\n'
    )
    proc = subprocess.Popen(
        [binary(), "serve", "--config", str(config), "--log-format", "json"], stderr=subprocess.PIPE, text=True
    )
    found, log, addr = threading.Event(), [], {}

    def read():
        for line in proc.stderr:
            log.append(line)
            try:
                event = json.loads(line)
            except ValueError:
                continue
            if event.get("message") == "probity serving":
                addr["grpc"] = event["grpc_addr"]
                found.set()

    threading.Thread(target=read, daemon=True).start()
    try:
        if not found.wait(60):
            pytest.fail("server did not start:\n" + "".join(log))
        yield addr["grpc"]
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(30)
        except subprocess.TimeoutExpired:
            proc.kill()


def labelled():
    features = [f["name"] for f in json.loads((FIXTURE / "champion.json").read_text())["features"]]
    with open(FIXTURE / "labelled.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    return [{n: float(r[n]) for n in features} for r in rows], [r["id"] for r in rows], [r["y"] == "1" for r in rows]


def test_score_outcomes_and_report_match_scikit_learn(server):
    expected = json.loads((FIXTURE / "expected.json").read_text())["champion"]
    rows, ids, labels = labelled()
    with Client(server) as c:
        scores = c.score_batch("bc", rows, prediction_ids=[f"bc-{i}" for i in ids])
        assert [s.prediction_id for s in scores] == [f"bc-{i}" for i in ids]
        assert all(s.model == "breast_cancer_champion" and s.role == "champion" for s in scores)
        one = c.score("bc", rows[0], prediction_id="single")
        assert one.probability == scores[0].probability and one.log_odds == scores[0].log_odds

        results = c.send_outcomes(Outcome(f"bc-{i}", y) for i, y in zip(ids, labels))
        assert len(results) == len(ids)
        assert {r.status for r in results} <= {"matched", "pending"}
        again = c.send_outcomes([(f"bc-{ids[0]}", labels[0])])
        assert again[0].status in ("duplicate", "pending")

        deadline = time.monotonic() + 30
        while True:
            report = c.report(route="bc")
            series = [s for s in report.series if s.route == "bc"]
            if series and series[0].with_outcome == len(ids):
                break
            assert time.monotonic() < deadline, f"outcomes not matched in time: {report}"
            time.sleep(0.1)
        s = series[0]
        assert s.predictions == len(ids) + 1  # the batch and the single row
        # scikit-learn 1.9.1 sklearn.metrics.log_loss and roc_auc_score on the same rows (gen_evaluate.py).
        assert abs(s.log_loss - expected["log_loss"]) <= 1e-9
        assert abs(s.roc_auc - expected["auc"]) <= 1e-9
        assert abs(s.brier - expected["brier"]) <= 1e-9
        assert report.full["series"][0]["route"] == "bc"
        # The operating point at the route's threshold 0.3 on the matured outcomes equals scikit-learn 1.9.1
        # sklearn.metrics.confusion_matrix, precision_score and recall_score at 0.3 (gen_evaluate.py, "threshold").
        at = json.loads((FIXTURE / "expected.json").read_text())["threshold"]
        (rule,) = s.operating_points
        assert rule.rule == "threshold 0.3"
        assert (rule.predictions, rule.with_outcome) == (len(ids) + 1, len(ids))
        p = rule.point
        assert (p.true_positive, p.false_positive, p.true_negative, p.false_negative) == (
            at["tp"], at["fp"], at["tn"], at["fn"]
        )
        assert abs(p.precision - at["precision"]) <= 1e-12
        assert abs(p.recall - at["recall"]) <= 1e-12
        assert abs(p.decline_rate - at["decline_rate"]) <= 1e-12
        assert p.expected_cost is None and rule.false_positive_cost is None


def test_bad_feature_type_is_refused_before_sending(server):
    with Client(server) as c, pytest.raises(TypeError, match="mean_texture"):
        c.score("bc", {"mean_texture": [1.0]})


def test_report_shows_each_features_stability(server):
    model = json.loads((STABILITY / "model.json").read_text())
    kinds = {f["name"]: f["type"] for f in model["features"]}
    with open(STABILITY / "shifted.csv", newline="") as f:
        rows = [
            {n: (v if kinds[n] == "categorical" else float(v)) for n, v in r.items() if n in kinds and v != ""}
            for r in csv.DictReader(f)
        ]
    reference = json.loads((STABILITY / "reference.json").read_text())["shifted"]
    with Client(server) as c:
        c.score_batch("stab", rows)
        deadline = time.monotonic() + 30
        while True:
            series = [s for s in c.report(route="stab").series if s.route == "stab"]
            if series and series[0].features and series[0].features[0].rows == len(rows):
                break
            assert time.monotonic() < deadline, "feature counts not in the store in time"
            time.sleep(0.1)
    features = {f.feature: f for f in series[0].features}
    assert set(features) == set(reference)
    for name, want in reference.items():
        got = features[name]
        assert list(got.counts) == want["counts"], name
        assert abs(got.psi - want["psi"]) <= 1e-12, name
        assert abs(got.missing_rate - want["missing_rate"]) <= 1e-15, name
        if want["unknown_rate"] is None:
            assert got.unknown_rate is None, name
        else:
            assert abs(got.unknown_rate - want["unknown_rate"]) <= 1e-15, name
