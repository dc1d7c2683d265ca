"""scikit-learn exports against scikit-learn's own `decision_function` / `predict_proba` (scikit-learn 1.9.1)."""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from helpers import assert_reproduces
from sklearn.ensemble import GradientBoostingClassifier, HistGradientBoostingClassifier
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

import probity_export
from probity_export import ExportError, evaluate


@pytest.mark.parametrize("loss,scale", [("log_loss", "log_odds"), ("exponential", "half_log_odds")])
def test_gradient_boosting(cancer, loss, scale):
    c = cancer
    m = GradientBoostingClassifier(loss=loss, n_estimators=25, max_depth=3, random_state=1).fit(c["x"][c["tr"]], c["y"][c["tr"]])
    doc = probity_export.export(m, name="gbc", version="1", y=c["y"][c["tr"]])
    assert doc["margin_scale"] == scale
    assert doc["ensemble"]["split_precision"] == "float32"
    assert doc["base_rate"] == pytest.approx(c["y"][c["tr"]].mean())
    xt = c["x"][c["te"]]
    # Tree sums are reproduced bit for bit: same products, same order (sklearn `predict_stages`).
    ours = assert_reproduces(doc, xt, m.decision_function(xt), 0.0)
    probs = [evaluate.probability(doc, [float(v) for v in r]) for r in xt]
    np.testing.assert_allclose(probs, m.predict_proba(xt)[:, 1], rtol=0, atol=1e-15)
    assert ours.std() > 0


def test_gradient_boosting_zero_init(cancer):
    c = cancer
    m = GradientBoostingClassifier(n_estimators=5, init="zero", random_state=0).fit(c["x"], c["y"])
    doc = probity_export.export(m, name="gbc", version="1", base_rate=0.3)
    assert doc["ensemble"]["base_margin"] == 0.0
    assert_reproduces(doc, c["x"][:50], m.decision_function(c["x"][:50]), 0.0)


def test_gradient_boosting_refuses_custom_init(cancer):
    c = cancer
    m = GradientBoostingClassifier(n_estimators=3, init=LogisticRegression(max_iter=5000)).fit(c["x"], c["y"])
    with pytest.raises(ExportError, match="init estimator"):
        probity_export.export(m, name="gbc", version="1", base_rate=0.3)


def test_hist_gradient_boosting_nan_and_categories(cancer):
    c = cancer
    x = c["x_cat"]
    m = HistGradientBoostingClassifier(max_iter=30, max_depth=4, categorical_features=[2], early_stopping=False, random_state=0)
    m.fit(x[c["tr"]], c["y"][c["tr"]])
    doc = probity_export.export(m, name="hgb", version="1", feature_names=c["names"], y=c["y"][c["tr"]])
    assert doc["features"][2] == {"name": c["names"][2], "type": "categorical", "categories": ["0", "1", "2", "3"]}
    assert any("categorical" in n for t in doc["ensemble"]["trees"] for n in t["nodes"])
    xt = x[c["te"]].copy()
    xt[::3, 2] = 7.0  # a code never seen in training: scikit-learn treats it as missing
    xt[1::3, 2] = np.nan
    assert_reproduces(doc, xt, m.decision_function(xt), 0.0)


def test_hist_gradient_boosting_split_of_missing_from_present(cancer):
    """A feature recorded only when present (1.0, else missing) can only split missing from non-missing values:
    scikit-learn writes that split with threshold +inf, which the file carries as the text "inf"."""
    c = cancer
    flag = np.where(c["x"][:, 7] > np.quantile(c["x"][:, 7], 0.6), 1.0, np.nan)
    x = np.column_stack([np.delete(c["x_nan"], 7, axis=1), flag])  # the flag stands in for column 7
    m = HistGradientBoostingClassifier(max_iter=30, max_depth=4, early_stopping=False, random_state=0)
    m.fit(x[c["tr"]], c["y"][c["tr"]])
    doc = probity_export.export(m, name="hgb", version="1", y=c["y"][c["tr"]])
    splits = [n["numeric"] for t in doc["ensemble"]["trees"] for n in t["nodes"] if "numeric" in n]
    assert any(s["threshold"] == "inf" for s in splits)
    probity_export.dumps(doc)  # strict JSON (no bare Infinity): raises otherwise
    xt = x[c["te"]]
    assert_reproduces(doc, xt, m.decision_function(xt), 0.0)


def test_hist_gradient_boosting_string_categories(cancer):
    """Categories given as strings through pandas keep their text as the category names."""
    c = cancer
    band = np.array(["low", "mid", "high", "top"])[c["x_cat"][:, 2].astype(int)]
    df = pd.DataFrame({"radius": c["x_nan"][:, 0], "band": pd.Categorical(band), "area": c["x"][:, 3]})
    m = HistGradientBoostingClassifier(max_iter=20, categorical_features="from_dtype", random_state=0).fit(df, c["y"])
    doc = probity_export.export(m, name="hgb", version="1", y=c["y"])
    assert [f["name"] for f in doc["features"]] == ["radius", "band", "area"]
    assert doc["features"][1]["categories"] == ["high", "low", "mid", "top"]
    rows = [evaluate.encode_row(doc, {"radius": "" if np.isnan(r) else repr(r), "band": b, "area": repr(a)})
            for r, b, a in zip(df["radius"], band, df["area"])]
    ours = np.array([evaluate.margin(doc, r) for r in rows])
    np.testing.assert_array_equal(ours, m.decision_function(df))


def test_logistic_regression_matches_statsmodels_on_spector():
    """Unpenalised logistic regression on Spector and Mazzeo (1980) equals the maximum-likelihood logit of
    statsmodels `Logit` (statsmodels 0.15.0), and the exported file reproduces scikit-learn's margin."""
    data = sm.datasets.spector.load_pandas()
    x, y = data.exog.to_numpy(), data.endog.to_numpy()
    m = LogisticRegression(C=np.inf, max_iter=10_000, tol=1e-12).fit(x, y)
    doc = probity_export.export(m, name="spector", version="1", feature_names=list(data.exog.columns), y=y)
    assert doc["base_rate"] == pytest.approx(11 / 32)
    assert_reproduces(doc, x, m.decision_function(x), 1e-12)
    sm_fit = sm.Logit(y, sm.add_constant(x)).fit(disp=0)
    coefs = [doc["linear"]["intercept"]] + [t["numeric"]["coefficient"] for t in doc["linear"]["terms"]]
    np.testing.assert_allclose(coefs, sm_fit.params, rtol=1e-4)


@pytest.mark.parametrize("with_mean,with_std", [(True, True), (False, True), (True, False)])
def test_standardised_logistic_regression(cancer, with_mean, with_std):
    c = cancer
    x = c["x"].copy()
    x[:, 5] = 3.0  # zero variance: StandardScaler keeps scale_ = 1 there
    m = make_pipeline(StandardScaler(with_mean=with_mean, with_std=with_std), LogisticRegression(max_iter=10_000))
    m.fit(x[c["tr"]], c["y"][c["tr"]])
    doc = probity_export.export(m, name="lr", version="1", y=c["y"][c["tr"]])
    terms = [t["numeric"] for t in doc["linear"]["terms"]]
    assert ("center" in terms[0]) == with_mean
    assert ("scale" in terms[0]) == with_std
    assert "scale" not in terms[5]
    assert_reproduces(doc, x[c["te"]], m.decision_function(x[c["te"]]), 1e-9)


def test_multiclass_refused(cancer):
    c = cancer
    y3 = np.arange(len(c["y"])) % 3
    m = LogisticRegression(max_iter=5000).fit(c["x"][:, :2], y3)
    with pytest.raises(ExportError, match="binary"):
        probity_export.export(m, name="lr", version="1", base_rate=0.3)
