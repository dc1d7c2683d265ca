"""Write fitted binary classifiers as probity model files (format version 2, `docs/model-format.md`).

Tree nodes carry their training `cover`, which explanations need.

Supported: scikit-learn `GradientBoostingClassifier`, `HistGradientBoostingClassifier` (NaN and native
categorical features), `LogisticRegression` and `Pipeline(StandardScaler, LogisticRegression)`; LightGBM
`Booster` / `LGBMClassifier`; XGBoost `Booster` / `XGBClassifier` (numeric splits). Anything that cannot be
written exactly is refused with an `ExportError` that says why.

    doc = probity_export.export(model, name="fraud", version="1", base_rate=0.02)
    probity_export.write(doc, "fraud.json")
"""

from __future__ import annotations

from . import document, evaluate
from .document import (
    ExportError,
    check_calibration,
    check_reference_distribution,
    check_score_scale,
    dumps,
    reference_distribution,
    with_reason_families,
    with_training_distribution,
    write,
)
from .lightgbm_trees import export_lightgbm
from .sklearn_linear import export_logistic
from .sklearn_trees import export_gradient_boosting, export_hist_gradient_boosting
from .xgboost_trees import export_xgboost

__all__ = [
    "ExportError",
    "check_calibration",
    "check_reference_distribution",
    "check_score_scale",
    "document",
    "evaluate",
    "dumps",
    "export",
    "export_gradient_boosting",
    "export_hist_gradient_boosting",
    "export_lightgbm",
    "export_logistic",
    "export_xgboost",
    "reference_distribution",
    "with_reason_families",
    "with_training_distribution",
    "write",
]


def export(model, *, name: str, version: str, feature_names=None, **options) -> dict:
    """Exports any supported fitted model, choosing the exporter by its type.

    Options (all keyword): `base_rate` (or `y`, the training labels, to use their positive share), `metadata`
    (merged into the library's own), `calibration`, `reference_distribution`, `score_scale` (passed through
    after checking them against the spec), `reason_families` (the deployer's reason codes: a list of
    `{"code", "text", "features": [feature names]}`, see `document.with_reason_families`), `training_x` (the
    training rows, one column per feature: each feature's training distribution is written for drift monitoring,
    see `document.with_training_distribution`) and `distribution_bins` (its number of quantile bins, default 10).
    """
    families = options.pop("reason_families", None)
    training_x = options.pop("training_x", None)
    n_bins = options.pop("distribution_bins", 10)
    doc = _export(model, name=name, version=version, feature_names=feature_names, **options)
    if families is not None:
        with_reason_families(doc, families)
    if training_x is not None:
        with_training_distribution(doc, training_x, n_bins=n_bins, category_names=options.get("category_names"))
    return doc


def _export(model, *, name: str, version: str, feature_names=None, **options) -> dict:
    kind = type(model).__module__.split(".")[0], type(model).__name__
    opts = dict(name=name, version=version, feature_names_=feature_names, **options)
    if kind[0] == "lightgbm":
        return export_lightgbm(model, **opts)
    if kind[0] == "xgboost":
        return export_xgboost(model, **opts)
    if kind[1] == "GradientBoostingClassifier":
        return export_gradient_boosting(model, **opts)
    if kind[1] == "HistGradientBoostingClassifier":
        return export_hist_gradient_boosting(model, **opts)
    if kind[1] in ("LogisticRegression", "Pipeline"):
        return export_logistic(model, **opts)
    raise ExportError(f"no exporter for {kind[0]}.{kind[1]}")
