"""scikit-learn gradient boosting classifiers as probity tree ensembles.

Read from scikit-learn 1.9 source (`sklearn/ensemble/_gb.py`, `_gradient_boosting.pyx`,
`_hist_gradient_boosting/gradient_boosting.py`, `_predictor.pyx`):

- `GradientBoostingClassifier`: the raw prediction is the init estimator's raw prediction (`_raw_predict_init`:
  the link of the prior, `logit(p)` for log_loss, `logit(p) / 2` for the exponential loss) plus
  `learning_rate * value` of the leaf reached in each tree, added tree by tree in float64. Features are cast to
  float32 first and a row goes left when `X[:, f] <= threshold`; `predict_proba` is `expit(raw)` for log_loss
  and `expit(2 raw)` for the exponential loss.
- `HistGradientBoostingClassifier`: `_baseline_prediction` plus each predictor's leaf `value` (shrinkage already
  applied), features in float64, `x <= num_threshold`, NaN to the `missing_go_to_left` side. Categorical
  features pass an `OrdinalEncoder` first (unknown categories become NaN, so they follow the missing side) and
  are moved to the front of the columns the predictors see.
"""

from __future__ import annotations

import numpy as np

from .document import (
    ExportError,
    build_document,
    categorical_feature,
    category_name,
    feature_names,
    flatten_tree,
    numeric_feature,
    resolve_base_rate,
    threshold,
)


def _library_metadata(estimator, metadata: dict | None) -> dict:
    import sklearn

    meta = {"library": "scikit-learn", "library_version": sklearn.__version__, "estimator": type(estimator).__name__}
    meta.update(metadata or {})
    return meta


def export_gradient_boosting(
    model,
    *,
    name: str,
    version: str,
    feature_names_: list[str] | None = None,
    base_rate: float | None = None,
    y=None,
    metadata: dict | None = None,
    calibration: dict | None = None,
    reference_distribution: dict | None = None,
    score_scale: dict | None = None,
) -> dict:
    """A fitted binary `sklearn.ensemble.GradientBoostingClassifier` as a model document.

    scikit-learn refuses NaN at predict time for this estimator; the exported splits send a missing value where
    each fitted `DecisionTreeRegressor` would (`tree_.missing_go_to_left`).
    """
    from sklearn.dummy import DummyClassifier

    if not hasattr(model, "estimators_"):
        raise ExportError("GradientBoostingClassifier is not fitted")
    if len(model.classes_) != 2 or model.estimators_.shape[1] != 1:
        raise ExportError(f"only binary classifiers are supported, this one has {len(model.classes_)} classes")
    if model.loss == "log_loss":
        margin_scale = "log_odds"
    elif model.loss == "exponential":
        margin_scale = "half_log_odds"
    else:
        raise ExportError(f"unsupported loss {model.loss!r}")
    n = int(model.n_features_in_)
    if isinstance(model.init_, str) and model.init_ == "zero":
        base_margin = 0.0
    elif isinstance(model.init_, DummyClassifier):
        # The dummy's prediction does not depend on X, so one row of zeros gives the constant.
        base_margin = float(model._raw_predict_init(np.zeros((1, n), dtype=np.float32))[0, 0])
    else:
        raise ExportError(
            f"init estimator {type(model.init_).__name__} gives a row-dependent start; only the default prior "
            "(DummyClassifier) or init='zero' can be written as a constant base margin"
        )
    lr = float(model.learning_rate)
    trees = []
    for stage in model.estimators_[:, 0]:
        t = stage.tree_
        left, right, feat, thr = t.children_left, t.children_right, t.feature, t.threshold
        miss_left = t.missing_go_to_left
        value = t.value[:, 0, 0]
        cover = t.weighted_n_node_samples

        def visit(i, left=left, right=right, feat=feat, thr=thr, miss_left=miss_left, value=value, cover=cover):
            if left[i] == -1:
                # Same product sklearn forms in `_predict_regression_tree_inplace_fast_dense`.
                return ("leaf", lr * float(value[i]), float(cover[i]))
            split = {
                "feature": int(feat[i]),
                "op": "<=",
                "threshold": float(thr[i]),
                "missing": "left" if miss_left[i] else "right",
            }
            return ("split", "numeric", split, int(left[i]), int(right[i]), float(cover[i]))

        trees.append({"nodes": flatten_tree(0, visit)})
    names = feature_names(feature_names_, getattr(model, "feature_names_in_", None), n)
    return build_document(
        name=name,
        version=version,
        features=[numeric_feature(x) for x in names],
        margin_scale=margin_scale,
        base_rate=resolve_base_rate(base_rate, y),
        body_key="ensemble",
        body={"base_margin": base_margin, "split_precision": "float32", "trees": trees},
        metadata=_library_metadata(model, metadata),
        calibration=calibration,
        reference_distribution=reference_distribution,
        score_scale=score_scale,
    )


def _bitset_members(bitset_row) -> list[int]:
    """The integers set in one row of scikit-learn's 256-bit bitsets (8 words of 32 bits)."""
    out = []
    for word_idx, word in enumerate(np.asarray(bitset_row, dtype=np.uint32)):
        w = int(word)
        for bit in range(32):
            if w >> bit & 1:
                out.append(word_idx * 32 + bit)
    return out


def _hgb_column_map(model) -> tuple[list[int], dict[int, list[str]]]:
    """For the columns the predictors see: the original feature index of each, and per original categorical
    feature, its category names in encoded order."""
    n = int(model.n_features_in_)
    pre = model._preprocessor
    if pre is None:
        return list(range(n)), {}
    is_cat = np.asarray(model.is_categorical_, dtype=bool)
    cat_orig = [int(i) for i in np.flatnonzero(is_cat)]
    num_orig = [int(i) for i in np.flatnonzero(~is_cat)]
    enc_slice = pre.output_indices_["encoder"]
    num_slice = pre.output_indices_["numerical"]
    out_to_orig = [-1] * n
    for j, orig in zip(range(enc_slice.start, enc_slice.stop), cat_orig):
        out_to_orig[j] = orig
    for j, orig in zip(range(num_slice.start, num_slice.stop), num_orig):
        out_to_orig[j] = orig
    if -1 in out_to_orig:
        raise ExportError("could not map the preprocessed columns back to the input features")
    encoder = pre.named_transformers_["encoder"]
    categories: dict[int, list[str]] = {}
    for orig, cats in zip(cat_orig, encoder.categories_):
        cats = list(cats)
        if cats and isinstance(cats[-1], float) and np.isnan(cats[-1]):
            cats = cats[:-1]  # NaN is the missing value, not a category
        categories[orig] = [category_name(c) for c in cats]
    return out_to_orig, categories


def export_hist_gradient_boosting(
    model,
    *,
    name: str,
    version: str,
    feature_names_: list[str] | None = None,
    base_rate: float | None = None,
    y=None,
    metadata: dict | None = None,
    calibration: dict | None = None,
    reference_distribution: dict | None = None,
    score_scale: dict | None = None,
) -> dict:
    """A fitted binary `sklearn.ensemble.HistGradientBoostingClassifier` as a model document, with NaN and
    native categorical splits. Unknown categories go to the missing side, as scikit-learn sends them."""
    if not hasattr(model, "_predictors"):
        raise ExportError("HistGradientBoostingClassifier is not fitted")
    if len(model.classes_) != 2 or model.n_trees_per_iteration_ != 1:
        raise ExportError(f"only binary classifiers are supported, this one has {len(model.classes_)} classes")
    n = int(model.n_features_in_)
    out_to_orig, categories = _hgb_column_map(model)
    known = model._bin_mapper.bin_thresholds_
    trees = []
    for (predictor,) in model._predictors:
        nodes = predictor.nodes
        bitsets = predictor.raw_left_cat_bitsets

        def visit(i, nodes=nodes, bitsets=bitsets):
            node = nodes[i]
            if node["is_leaf"]:
                return ("leaf", float(node["value"]), float(node["count"]))
            col = int(node["feature_idx"])
            orig = out_to_orig[col]
            side = "left" if node["missing_go_to_left"] else "right"
            if node["is_categorical"]:
                n_cats = len(categories[orig])
                left_cats = _bitset_members(bitsets[node["bitset_idx"]])
                known_codes = {int(c) for c in known[col]}
                if any(c >= n_cats or c not in known_codes for c in left_cats):
                    raise ExportError(f"tree split on feature {orig} names a category code the encoder does not know")
                split = {"feature": orig, "left_categories": left_cats, "missing": side, "unknown": side}
                return ("split", "categorical", split, int(node["left"]), int(node["right"]), float(node["count"]))
            # A split of missing from non-missing values has threshold +inf (scikit-learn's "split on nan").
            split = {"feature": orig, "op": "<=", "threshold": threshold(node["num_threshold"]), "missing": side}
            return ("split", "numeric", split, int(node["left"]), int(node["right"]), float(node["count"]))

        trees.append({"nodes": flatten_tree(0, visit)})
    names = feature_names(feature_names_, getattr(model, "feature_names_in_", None), n)
    features = [
        categorical_feature(x, categories[i]) if i in categories else numeric_feature(x) for i, x in enumerate(names)
    ]
    return build_document(
        name=name,
        version=version,
        features=features,
        margin_scale="log_odds",
        base_rate=resolve_base_rate(base_rate, y),
        body_key="ensemble",
        body={
            "base_margin": float(np.asarray(model._baseline_prediction).ravel()[0]),
            "split_precision": "float64",
            "trees": trees,
        },
        metadata=_library_metadata(model, metadata),
        calibration=calibration,
        reference_distribution=reference_distribution,
        score_scale=score_scale,
    )
