"""LightGBM and XGBoost exports against their own predict functions (LightGBM 4.7.0 `Booster.predict`,
XGBoost 3.2.0 `Booster.predict`)."""

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest
import xgboost as xgb
from helpers import assert_reproduces, dense

import probity_export
from probity_export import ExportError, evaluate

LGB_BASE = {"num_leaves": 8, "min_data_in_leaf": 10, "num_threads": 1, "deterministic": True, "verbose": -1, "seed": 3}


def _lgb(c, x, rounds=20, **params):
    p = {"objective": "binary", **LGB_BASE, **params}
    ds = lgb.Dataset(x[c["tr"]], c["y"][c["tr"]], categorical_feature=[2], params={"verbose": -1})
    return lgb.train(p, ds, num_boost_round=rounds)


@pytest.mark.parametrize("use_missing", [True, False])
def test_lightgbm_nan_and_categories(cancer, use_missing):
    c = cancer
    b = _lgb(c, c["x_cat"], use_missing=use_missing, min_data_per_group=5, cat_smooth=1.0, max_cat_to_onehot=2)
    doc = probity_export.export(b, name="lgb", version="1", feature_names=c["names"], y=c["y"][c["tr"]])
    assert doc["features"][2]["type"] == "categorical"
    assert doc["ensemble"]["base_margin"] == 0.0
    xt = c["x_cat"][c["te"]].copy()
    xt[::4, 2] = 9.0  # unseen code: in no left set, so right (LightGBM tree.h CategoricalDecision)
    xt[1::4, 2] = np.nan
    xt[2::4, 2] = -1.0  # negative: right
    assert_reproduces(doc, xt, b.predict(xt, raw_score=True), 0.0)
    probs = [evaluate.probability(doc, r) for r in dense(doc, xt)]
    np.testing.assert_allclose(probs, b.predict(xt), rtol=0, atol=1e-15)


def test_lightgbm_classifier_wrapper_and_half_log_odds(cancer):
    """`sigmoid: 2` makes the probability sigmoid(2 raw), the half-log-odds scale."""
    c = cancer
    m = lgb.LGBMClassifier(n_estimators=15, num_leaves=8, sigmoid=2.0, n_jobs=1, deterministic=True, verbose=-1)
    m.fit(c["x_nan"][c["tr"]], c["y"][c["tr"]])
    doc = probity_export.export(m, name="lgb", version="1", y=c["y"][c["tr"]])
    assert doc["margin_scale"] == "half_log_odds"
    xt = c["x_nan"][c["te"]]
    assert_reproduces(doc, xt, m.predict(xt, raw_score=True), 0.0)
    probs = [evaluate.probability(doc, r) for r in dense(doc, xt)]
    np.testing.assert_allclose(probs, m.predict_proba(xt)[:, 1], rtol=0, atol=1e-15)


def test_lightgbm_other_sigmoid_refused(cancer):
    c = cancer
    b = _lgb(c, c["x"], rounds=3, sigmoid=1.5)
    with pytest.raises(ExportError, match="sigmoid"):
        probity_export.export(b, name="lgb", version="1", base_rate=0.3)


def test_lightgbm_zero_as_missing_refused(cancer):
    """With missing_type Zero, LightGBM sends NaN and values in (-1e-35, 1e-35] to the default side even when the
    threshold would send 0 the other way (tree.h NumericalDecision); that cannot be written as a threshold split
    with a missing side, so the export stops and says so."""
    c = cancer
    x = c["x_nan"].copy()
    x[::6, 1] = 0.0
    b = _lgb(c, x, rounds=10, zero_as_missing=True)
    with pytest.raises(ExportError, match="missing_type Zero"):
        probity_export.export(b, name="lgb", version="1", base_rate=0.3)


def test_lightgbm_multiclass_refused(cancer):
    c = cancer
    ds = lgb.Dataset(c["x"], np.arange(len(c["y"])) % 3)
    b = lgb.train({"objective": "multiclass", "num_class": 3, "verbose": -1, "num_threads": 1}, ds, num_boost_round=2)
    with pytest.raises(ExportError):
        probity_export.export(b, name="lgb", version="1", base_rate=0.3)


@pytest.mark.parametrize("objective", ["binary:logistic", "binary:logitraw"])
def test_xgboost_nan(cancer, objective):
    c = cancer
    p = {"objective": objective, "max_depth": 3, "eta": 0.3, "nthread": 1, "seed": 0}
    b = xgb.train(p, xgb.DMatrix(c["x_nan"][c["tr"]], c["y"][c["tr"]]), num_boost_round=20)
    doc = probity_export.export(b, name="xgb", version="1", y=c["y"][c["tr"]])
    assert doc["ensemble"]["split_precision"] == "float32"
    assert all(n["numeric"]["op"] == "<" for t in doc["ensemble"]["trees"] for n in t["nodes"] if "numeric" in n)
    xt = c["x_nan"][c["te"]]
    # XGBoost accumulates the margin in float32, probity in float64: float32 rounding of a sum of 20 terms.
    assert_reproduces(doc, xt, b.predict(xgb.DMatrix(xt), output_margin=True), 1e-5)


def test_xgboost_thresholds_are_float32_values(cancer):
    c = cancer
    b = xgb.train({"objective": "binary:logistic", "max_depth": 2, "nthread": 1}, xgb.DMatrix(c["x"], c["y"]), 5)
    doc = probity_export.export(b, name="xgb", version="1", base_rate=0.3)
    for t in doc["ensemble"]["trees"]:
        for n in t["nodes"]:
            v = n["numeric"]["threshold"] if "numeric" in n else n["leaf"]
            assert float(np.float32(v)) == v


def test_xgboost_categorical_refused(cancer):
    c = cancer
    df = pd.DataFrame({"a": c["x"][:, 0], "band": pd.Categorical(c["x_cat"][:, 2].astype(int))})
    d = xgb.DMatrix(df, c["y"], enable_categorical=True)
    b = xgb.train({"objective": "binary:logistic", "max_depth": 2, "nthread": 1, "tree_method": "hist"}, d, 3)
    with pytest.raises(ExportError, match="categorical"):
        probity_export.export(b, name="xgb", version="1", base_rate=0.3)


def test_xgboost_dart_refused(cancer):
    c = cancer
    b = xgb.train({"objective": "binary:logistic", "booster": "dart", "nthread": 1}, xgb.DMatrix(c["x"], c["y"]), 3)
    with pytest.raises(ExportError, match="dart"):
        probity_export.export(b, name="xgb", version="1", base_rate=0.3)


def test_lightgbm_category_names(cancer):
    """Integer codes named by the caller: code k is names[k]; a name never seen in training is still a category."""
    c = cancer
    b = _lgb(c, c["x_cat"], min_data_per_group=5, cat_smooth=1.0, max_cat_to_onehot=2)
    names = ["low", "mid", "high", "top", "spare"]
    doc = probity_export.export(b, name="lgb", version="1", feature_names=c["names"], y=c["y"][c["tr"]],
                                category_names={c["names"][2]: names})
    assert doc["features"][2]["categories"] == names
    xt = c["x_cat"][c["te"]]
    rows = []
    for r in xt:
        cells = {n: ("" if np.isnan(v) else repr(float(v))) for n, v in zip(c["names"], r)}
        cells[c["names"][2]] = names[int(r[2])]
        rows.append(evaluate.encode_row(doc, cells))
    np.testing.assert_array_equal([evaluate.margin(doc, r) for r in rows], b.predict(xt, raw_score=True))
    with pytest.raises(ExportError, match="category_names"):
        probity_export.export(b, name="lgb", version="1", base_rate=0.3, feature_names=c["names"],
                              category_names={c["names"][2]: ["low", "mid"]})
