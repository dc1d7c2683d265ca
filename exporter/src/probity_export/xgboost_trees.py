"""XGBoost binary boosters as probity tree ensembles, read through `Booster.save_raw("json")`.

Prediction rules, read from XGBoost's source (`src/predictor/predict_fn.h`, `src/objective/regression_loss.h`):

- Features are stored as float32; a row goes to the left child when `x < split_condition` (both float32), and a
  missing value (NaN) to the `default_left` side. So the file uses `op "<"` and `split_precision "float32"`, and
  every threshold is the float32 value written exactly as a double.
- The margin is the base margin plus the leaf values (stored in `split_conditions` of leaf nodes, learning rate
  already applied), accumulated in float32 by XGBoost and in float64 by probity: the two differ by float32
  rounding, about 1e-7 relative.
- Since XGBoost 2 the intercept `base_score` is stored as a probability for the logistic objectives (written as
  a vector such as "[6.274165E-1]" in 3.x); the base margin is its logit, computed in float32 as XGBoost does.

Categorical splits are not supported; a model with categorical features is refused.
"""

from __future__ import annotations

import json

import numpy as np

from .document import ExportError, build_document, feature_names, flatten_tree, numeric_feature, resolve_base_rate

_LOGISTIC = ("binary:logistic", "reg:logistic", "binary:logitraw")


def _booster(model):
    import xgboost as xgb

    if isinstance(model, xgb.Booster):
        return model
    if hasattr(model, "get_booster"):
        return model.get_booster()
    raise ExportError(f"expected an xgboost.Booster or a fitted XGBClassifier, got {type(model).__name__}")


def _parse_base_score(text) -> np.float32:
    s = str(text).strip()
    if s.startswith("[") and s.endswith("]"):
        parts = [p for p in s[1:-1].split(",") if p.strip()]
        if len(parts) != 1:
            raise ExportError(f"base_score {s!r}: expected one intercept for a binary model")
        s = parts[0]
    return np.float32(float(s))


def _base_margin(objective: str, base_score: np.float32) -> float:
    if objective == "binary:logitraw":
        # LogisticRaw keeps the intercept on the margin scale.
        return float(base_score)
    if not (0.0 < base_score < 1.0):
        raise ExportError(f"base_score {base_score!r} is not a probability in (0, 1)")
    one = np.float32(1.0)
    with np.errstate(all="raise"):
        return float(np.float32(-np.log(one / base_score - one)))


def export_xgboost(
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
    """An XGBoost binary model (`Booster` or fitted `XGBClassifier`) with numeric splits as a model document.

    All trees are written; a booster whose predictions use fewer (`iteration_range`, early stopping's
    `best_iteration`) must be sliced first (`booster[: n]`).
    """
    import xgboost as xgb

    booster = _booster(model)
    raw = json.loads(bytes(booster.save_raw(raw_format="json")).decode("utf-8"))
    learner = raw["learner"]
    objective = learner["objective"]["name"]
    if objective not in _LOGISTIC:
        raise ExportError(f"objective {objective!r} is not supported; use one of {', '.join(_LOGISTIC)}")
    param = learner["learner_model_param"]
    if int(param.get("num_class", "0")) > 1 or int(param.get("num_target", "1")) != 1:
        raise ExportError("only binary models with one target are supported")
    gb = learner["gradient_booster"]
    if gb.get("name") != "gbtree":
        raise ExportError(f"booster {gb.get('name')!r} is not supported; only gbtree (dart scales its trees)")
    types = learner.get("feature_types") or []
    if any(t == "c" for t in types):
        raise ExportError(
            "categorical features (feature_types 'c', enable_categorical=True) are not supported by this exporter; "
            "one-hot or integer-code them as numeric features"
        )
    n = int(param["num_feature"])
    base_margin = _base_margin(objective, _parse_base_score(param["base_score"]))
    trees = []
    for t_idx, tree in enumerate(gb["model"]["trees"]):
        if any(int(s) != 0 for s in tree.get("split_type", [])):
            raise ExportError(f"tree {t_idx} has a categorical split, which this exporter does not support")
        lc, rc = tree["left_children"], tree["right_children"]
        feat, cond, dleft = tree["split_indices"], tree["split_conditions"], tree["default_left"]
        hess = tree["sum_hessian"]

        def visit(i, lc=lc, rc=rc, feat=feat, cond=cond, dleft=dleft, hess=hess):
            # Values are float32 in XGBoost; the JSON text is their shortest decimal form, so round back to f32.
            value = float(np.float32(cond[i]))
            # The cover XGBoost's own contributions use: the node's hessian sum (float32).
            cover = float(np.float32(hess[i]))
            if lc[i] == -1:
                return ("leaf", value, cover)
            split = {"feature": int(feat[i]), "op": "<", "threshold": value, "missing": "left" if dleft[i] else "right"}
            return ("split", "numeric", split, int(lc[i]), int(rc[i]), cover)

        trees.append({"nodes": flatten_tree(0, visit)})
    names = feature_names(feature_names_, learner.get("feature_names") or None, n)
    meta = {"library": "xgboost", "library_version": xgb.__version__, "objective": objective}
    meta.update(metadata or {})
    return build_document(
        name=name,
        version=version,
        features=[numeric_feature(x) for x in names],
        margin_scale="log_odds",
        base_rate=resolve_base_rate(base_rate, y),
        body_key="ensemble",
        body={"base_margin": base_margin, "split_precision": "float32", "trees": trees},
        metadata=meta,
        calibration=calibration,
        reference_distribution=reference_distribution,
        score_scale=score_scale,
    )
