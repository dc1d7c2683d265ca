"""Per-node cover written for each library, read back from the library's own tree structures (scikit-learn 1.9.1
`tree_.weighted_n_node_samples` and HistGradientBoosting `nodes["count"]`, LightGBM 4.7.0 `dump_model`
`internal_count`/`leaf_count`, XGBoost 3.2.0 `save_raw` JSON `sum_hessian`), and the reason families option."""

import json

import lightgbm as lgb
import numpy as np
import pytest
import xgboost as xgb
from helpers import assert_reproduces
from sklearn.ensemble import GradientBoostingClassifier, HistGradientBoostingClassifier

import probity_export
from probity_export import ExportError


def _covers(doc):
    return [[n["cover"] for n in t["nodes"]] for t in doc["ensemble"]["trees"]]


def _children_add_up(doc, rel):
    """Every split's cover equals its children's sum (within `rel`, relative)."""
    for t in doc["ensemble"]["trees"]:
        nodes = t["nodes"]
        for n in nodes:
            if "leaf" not in n:
                total = nodes[n["left"]]["cover"] + nodes[n["right"]]["cover"]
                assert total == pytest.approx(n["cover"], rel=rel, abs=0)


def test_gradient_boosting_cover_is_weighted_samples(cancer):
    c = cancer
    w = np.where(c["y"][c["tr"]] == 1, 2.0, 1.0)
    m = GradientBoostingClassifier(n_estimators=5, max_depth=3, random_state=1)
    m.fit(c["x"][c["tr"]], c["y"][c["tr"]], sample_weight=w)
    doc = probity_export.export(m, name="gbc", version="1", base_rate=0.3)
    assert doc["format_version"] == 2
    assert_reproduces(doc, c["x"][c["te"]], m.decision_function(c["x"][c["te"]]), 0.0)
    # The root of each tree saw the whole (weighted) training set.
    assert {t[0] for t in _covers(doc)} == {float(w.sum())}
    _children_add_up(doc, 1e-12)


def test_hist_gradient_boosting_cover_is_count(cancer):
    c = cancer
    m = HistGradientBoostingClassifier(max_iter=5, max_depth=3, random_state=0).fit(c["x_nan"][c["tr"]], c["y"][c["tr"]])
    doc = probity_export.export(m, name="hgb", version="1", base_rate=0.3)
    assert {t[0] for t in _covers(doc)} == {float(len(c["tr"]))}
    _children_add_up(doc, 0)
    pred = m._predictors[0][0].nodes
    assert sorted(_covers(doc)[0]) == sorted(float(x) for x in pred["count"])


def test_lightgbm_cover_is_data_count(cancer):
    c = cancer
    ds = lgb.Dataset(c["x_cat"][c["tr"]], c["y"][c["tr"]], categorical_feature=[2], params={"verbose": -1})
    b = lgb.train({"objective": "binary", "num_leaves": 8, "verbose": -1, "num_threads": 1, "min_data_per_group": 5,
                   "max_cat_to_onehot": 2}, ds, num_boost_round=5)
    doc = probity_export.export(b, name="lgb", version="1", base_rate=0.3)
    assert {t[0] for t in _covers(doc)} == {float(len(c["tr"]))}
    _children_add_up(doc, 0)


def test_xgboost_cover_is_hessian_sum(cancer):
    c = cancer
    b = xgb.train({"objective": "binary:logistic", "max_depth": 3, "nthread": 1, "seed": 0},
                  xgb.DMatrix(c["x_nan"][c["tr"]], c["y"][c["tr"]]), num_boost_round=5)
    doc = probity_export.export(b, name="xgb", version="1", base_rate=0.3)
    raw = json.loads(bytes(b.save_raw(raw_format="json")).decode())
    hess = raw["learner"]["gradient_booster"]["model"]["trees"][0]["sum_hessian"]
    assert _covers(doc)[0][0] == float(np.float32(hess[0]))
    # First tree: every row starts at the same margin, so each hessian is p(1-p) of the base score.
    assert _covers(doc)[0][0] > 0
    # float32 sums: children add up to the parent within float32 rounding.
    _children_add_up(doc, 1e-5)


def test_reason_families_option(cancer):
    c = cancer
    m = GradientBoostingClassifier(n_estimators=2, max_depth=2, random_state=1).fit(c["x"], c["y"])
    fams = [{"code": "S1", "text": "Cell size", "features": [c["names"][0], c["names"][2]]},
            {"code": "T1", "text": "Texture", "features": [c["names"][1]]}]
    doc = probity_export.export(m, name="gbc", version="1", base_rate=0.3, feature_names=c["names"], reason_families=fams)
    assert doc["reason_families"] == [{"code": "S1", "text": "Cell size", "features": [0, 2]},
                                      {"code": "T1", "text": "Texture", "features": [1]}]
    assert_reproduces(doc, c["x"][:5], m.decision_function(c["x"][:5]), 0.0)
    for bad, match in [
        ([{"code": "S1", "text": "x", "features": ["nope"]}], "not a feature"),
        ([{"code": "S1", "text": "x", "features": [c["names"][0]]}, {"code": "S1", "text": "y", "features": [c["names"][1]]}], "duplicate"),
        ([{"code": "S1", "text": "x", "features": [c["names"][0]]}, {"code": "S2", "text": "y", "features": [c["names"][0]]}], "already"),
        ([{"code": "", "text": "x", "features": [c["names"][0]]}], "code"),
    ]:
        with pytest.raises(ExportError, match=match):
            probity_export.export(m, name="gbc", version="1", base_rate=0.3, feature_names=c["names"], reason_families=bad)
