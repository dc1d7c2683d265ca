"""Options shared by every exporter: names, base rate, passthrough objects, the reference distribution helper."""

import json
import math

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression
from spec_check import check_document

import probity_export
from probity_export import ExportError


@pytest.fixture(scope="module")
def lr(cancer):
    return LogisticRegression(max_iter=10_000).fit(cancer["x"][:, :3], cancer["y"])


def test_base_rate_required(lr):
    with pytest.raises(ExportError, match="base_rate is required"):
        probity_export.export(lr, name="m", version="1")
    for bad in (0.0, 1.0, 1.5, float("nan")):
        with pytest.raises(ExportError, match="base_rate"):
            probity_export.export(lr, name="m", version="1", base_rate=bad)
    doc = probity_export.export(lr, name="m", version="1", y=[0, 1, 1, 1])
    assert doc["base_rate"] == 0.75


def test_names_checked(lr):
    with pytest.raises(ExportError, match="name"):
        probity_export.export(lr, name="has space", version="1", base_rate=0.5)
    with pytest.raises(ExportError, match="feature names"):
        probity_export.export(lr, name="m", version="1", base_rate=0.5, feature_names=["a", "a", "b"])
    with pytest.raises(ExportError, match="3 features"):
        probity_export.export(lr, name="m", version="1", base_rate=0.5, feature_names=["a"])


def test_passthrough_and_metadata(lr):
    ref = {"on": "probability", "edges": [0.1, 0.5], "fractions": [0.5, 0.3, 0.2]}
    doc = probity_export.export(
        lr,
        name="m",
        version="2.0",
        base_rate=0.1,
        metadata={"owner": "risk"},
        calibration={"platt": {"a": 1.1, "b": -0.2}},
        reference_distribution=ref,
        score_scale={"points": 600, "at_odds": 50, "pdo": 20, "odds_of": "negative"},
    )
    check_document(doc)
    assert doc["metadata"]["library"] == "scikit-learn" and doc["metadata"]["owner"] == "risk"
    assert doc["calibration"] == {"platt": {"a": 1.1, "b": -0.2}}
    assert doc["reference_distribution"] == ref
    with pytest.raises(ExportError, match="platt.a"):
        probity_export.export(lr, name="m", version="1", base_rate=0.1, calibration={"platt": {"a": -1, "b": 0}})
    with pytest.raises(ExportError, match="fractions"):
        probity_export.export(lr, name="m", version="1", base_rate=0.1,
                              reference_distribution={"on": "probability", "edges": [0.5], "fractions": [0.5, 0.6]})


def test_floats_round_trip_exactly():
    values = [0.1, 1 / 3, 2.0**-1074, 1.7976931348623157e308, -0.0, 1e-300, math.pi]
    text = probity_export.dumps({"v": values})
    back = json.loads(text)["v"]
    assert [v.hex() for v in back] == [v.hex() for v in values]


def test_reference_distribution_counts_right_closed_bins():
    scores = np.array([0.01, 0.02, 0.02, 0.05, 0.1, 0.2, 0.2, 0.2, 0.5, 0.9])
    ref = probity_export.reference_distribution(scores, n_bins=4)
    edges, fr = ref["edges"], ref["fractions"]
    # Bins are (e[i-1], e[i]] (docs/model-format.md): count by hand with that closure.
    counts = [0] * (len(edges) + 1)
    for s in scores:
        counts[sum(1 for e in edges if s > e)] += 1
    assert fr == [k / len(scores) for k in counts]
    assert abs(sum(fr) - 1.0) <= 1e-12
    assert all(b > a for a, b in zip(edges, edges[1:]))


def test_reference_distribution_constant_scores():
    ref = probity_export.reference_distribution([0.3] * 5, n_bins=10)
    assert ref["edges"] == [] and ref["fractions"] == [1.0]
