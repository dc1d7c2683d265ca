"""scikit-learn logistic regression (alone or after a `StandardScaler`) as a probity linear model.

`LogisticRegression.decision_function` is `X @ coef_.T + intercept_` (scikit-learn 1.9,
`sklearn/linear_model/_base.py`), and `StandardScaler.transform` is `(x - mean_) / scale_` with the centring
skipped when `with_mean=False` and the scaling skipped when `with_std=False` (`scale_` is then `None`;
zero-variance columns already have `scale_ == 1`).
"""

from __future__ import annotations

import numpy as np

from .document import ExportError, build_document, feature_names, numeric_feature, resolve_base_rate
from .sklearn_trees import _library_metadata


def _split_pipeline(model):
    """The (scaler or None, logistic regression) pair inside `model`."""
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import StandardScaler

    if isinstance(model, LogisticRegression):
        return None, model
    if isinstance(model, Pipeline):
        steps = [s for _, s in model.steps if s not in (None, "passthrough")]
        if len(steps) == 2 and isinstance(steps[0], StandardScaler) and isinstance(steps[1], LogisticRegression):
            return steps[0], steps[1]
        if len(steps) == 1 and isinstance(steps[0], LogisticRegression):
            return None, steps[0]
    raise ExportError(
        f"expected LogisticRegression or Pipeline(StandardScaler, LogisticRegression), got {type(model).__name__}"
    )


def export_logistic(
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
    """A fitted binary logistic regression, optionally standardised, as a model document with numeric terms."""
    scaler, lr = _split_pipeline(model)
    if not hasattr(lr, "coef_"):
        raise ExportError("LogisticRegression is not fitted")
    if len(lr.classes_) != 2 or lr.coef_.shape[0] != 1:
        raise ExportError(f"only binary classifiers are supported, this one has {len(lr.classes_)} classes")
    coef = lr.coef_[0]
    n = coef.shape[0]
    center = np.zeros(n)
    scale = np.ones(n)
    if scaler is not None:
        if scaler.with_mean:
            center = np.asarray(scaler.mean_, dtype=float)
        if scaler.with_std:
            scale = np.asarray(scaler.scale_, dtype=float)
    terms = []
    for i in range(n):
        term = {"feature": i, "coefficient": float(coef[i])}
        if center[i] != 0.0:
            term["center"] = float(center[i])
        if scale[i] != 1.0:
            if not (np.isfinite(scale[i]) and scale[i] > 0):
                raise ExportError(f"feature {i}: scale {scale[i]!r} is not finite and positive")
            term["scale"] = float(scale[i])
        terms.append({"numeric": term})
    source = model if scaler is None else scaler
    names = feature_names(feature_names_, getattr(source, "feature_names_in_", None), n)
    return build_document(
        name=name,
        version=version,
        features=[numeric_feature(x) for x in names],
        margin_scale="log_odds",
        base_rate=resolve_base_rate(base_rate, y),
        body_key="linear",
        body={"intercept": float(lr.intercept_[0]), "terms": terms},
        metadata=_library_metadata(model, metadata),
        calibration=calibration,
        reference_distribution=reference_distribution,
        score_scale=score_scale,
    )
