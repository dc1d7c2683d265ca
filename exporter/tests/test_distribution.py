"""The training distribution of each feature (`features[i].training_distribution`, docs/model-format.md), written
from the training rows: every share is counted again here independently, by the spec's bin rule."""

import numpy as np
import pandas as pd
import pytest
from sklearn.ensemble import HistGradientBoostingClassifier
from spec_check import check_document

import probity_export
from probity_export import ExportError


@pytest.fixture(scope="module")
def hgb(cancer):
    c = cancer
    x = c["x_cat"][c["tr"]]
    m = HistGradientBoostingClassifier(max_iter=10, max_depth=3, categorical_features=[2], random_state=0)
    m.fit(x, c["y"][c["tr"]])
    return m, x


def test_shares_counted_by_the_spec_rule(cancer, hgb):
    m, x = hgb
    doc = probity_export.export(m, name="hgb", version="1", feature_names=cancer["names"], base_rate=0.3,
                                training_x=x)
    check_document(doc)
    n = len(x)
    for j, f in enumerate(doc["features"]):
        d = f["training_distribution"]
        col = x[:, j]
        if f["type"] == "numeric":
            present = col[~np.isnan(col)]
            edges = d["edges"]
            # 10 quantile bins unless ties merge some (docs/model-format.md: at most 32).
            assert 1 <= len(edges) <= 9
            # Bins (e[i-1], e[i]]: a value's bin is the number of edges strictly below it.
            counts = [0] * (len(edges) + 1)
            for v in present:
                counts[sum(1 for e in edges if v > e)] += 1
            assert d["shares"] == [k / n for k in counts], f["name"]
            assert d["missing"] == (n - len(present)) / n
            # Quantile edges: each bin holds about a tenth of the values present (ties aside).
            assert max(counts) <= 0.2 * len(present)
        else:
            codes, k = np.unique(col, return_counts=True)
            assert d["shares"] == [c / n for c in k] and list(codes) == [0.0, 1.0, 2.0, 3.0]
            assert d["missing"] == 0.0 and d["unknown"] == 0.0
    # Feature 0 has every 5th value missing in the conftest data.
    assert doc["features"][0]["training_distribution"]["missing"] == np.isnan(x[:, 0]).sum() / n > 0.15


def test_without_training_rows_nothing_is_written(cancer, hgb):
    m, _ = hgb
    doc = probity_export.export(m, name="hgb", version="1", base_rate=0.3)
    assert all("training_distribution" not in f for f in doc["features"])


def test_missing_and_unknown_categories_and_frames():
    doc = {"features": [
        {"name": "amount", "type": "numeric"},
        {"name": "channel", "type": "categorical", "categories": ["pos", "online"]},
        {"name": "merchant", "type": "categorical", "categories": [f"m{i}" for i in range(40)]},
    ]}
    frame = pd.DataFrame({
        "amount": [1.0, 2.0, np.inf, None, 5.0, 6.0, 7.0, 8.0],
        "channel": ["pos", "pos", "online", None, "atm", "pos", "online", "atm"],
        "merchant": ["m1"] * 8,
    })
    probity_export.with_training_distribution(doc, frame, n_bins=4)
    check_document({"format": "probity.model", "format_version": 2, "name": "m", "version": "1",
                    "features": doc["features"], "margin_scale": "log_odds", "base_rate": 0.5,
                    "linear": {"intercept": 0.0, "terms": []}})
    amount = doc["features"][0]["training_distribution"]
    # An infinite value is missing, as the server reads it (docs/model-format.md, Dense row encoding).
    assert amount["missing"] == 2 / 8
    assert abs(sum(amount["shares"]) - 6 / 8) < 1e-15
    channel = doc["features"][1]["training_distribution"]
    assert channel == {"shares": [3 / 8, 2 / 8], "missing": 1 / 8, "unknown": 2 / 8}
    # More categories than the format's 32 bins: no distribution.
    assert "training_distribution" not in doc["features"][2]


def test_bad_training_rows_are_refused():
    doc = {"features": [{"name": "a", "type": "numeric"}, {"name": "b", "type": "numeric"}]}
    with pytest.raises(ExportError, match="1 columns, the model has 2"):
        probity_export.with_training_distribution(doc, np.zeros((3, 1)))
    with pytest.raises(ExportError, match="n_bins"):
        probity_export.with_training_distribution(doc, np.zeros((3, 2)), n_bins=40)
    with pytest.raises(ExportError, match="no rows"):
        probity_export.with_training_distribution(doc, np.zeros((0, 2)))
    with pytest.raises(ExportError, match="not a number"):
        probity_export.with_training_distribution(doc, [["x", 1.0]])


def test_lightgbm_category_names_map_training_codes(cancer):
    """With LightGBM's `category_names`, the training rows hold codes and the document names: code k is names[k]."""
    import lightgbm as lgb

    c = cancer
    x = c["x_cat"][c["tr"]]
    b = lgb.train({"objective": "binary", "verbose": -1, "num_leaves": 4, "min_data_per_group": 5},
                  lgb.Dataset(x, c["y"][c["tr"]], categorical_feature=[2]), num_boost_round=3)
    names = ["low", "mid", "high", "top", "spare"]
    doc = probity_export.export(b, name="lgb", version="1", feature_names=c["names"], y=c["y"][c["tr"]],
                                category_names={c["names"][2]: names}, training_x=x)
    check_document(doc)
    d = doc["features"][2]["training_distribution"]
    codes, k = np.unique(x[:, 2], return_counts=True)
    assert list(codes) == [0.0, 1.0, 2.0, 3.0]
    assert d["shares"] == [c_ / len(x) for c_ in k] + [0.0]
    assert d["unknown"] == 0.0 and d["missing"] == 0.0
