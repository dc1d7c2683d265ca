"""LightGBM binary boosters as probity tree ensembles, read through `Booster.dump_model()`.

Prediction rules, read from LightGBM's `include/LightGBM/tree.h` (`NumericalDecision`, `CategoricalDecision`) and
`GBDT::PredictRaw`:

- The raw score is the sum of the trees' leaf values in double precision, tree by tree, from 0; the average
  (`boost_from_average`) is folded into the first tree's leaves, so the base margin is 0.
- Numeric split: `x <= threshold` goes left. With `missing_type` None a NaN is replaced by 0.0 and compared; with
  NaN it goes to the `default_left` side; with Zero, NaN becomes 0.0 and every value in (-1e-35, 1e-35] goes to the
  `default_left` side, which we can write exactly only when that side is where the threshold sends 0 and the
  threshold is outside that interval.
- Categorical split (`decision_type` "=="): the integer value goes left when it is in the `threshold` set
  ("1||3||5"); NaN and negative values go right, and so does a category not in the set, seen in training or not.
- Probability: `1 / (1 + exp(-sigmoid * raw))` for the `binary` objective (`sigmoid` in the objective string).
"""

from __future__ import annotations

import numpy as np

from .document import (
    ExportError,
    build_document,
    categorical_feature,
    feature_names,
    flatten_tree,
    numeric_feature,
    resolve_base_rate,
)

# LightGBM's kZeroThreshold (1e-35f), in double as the C++ comparison promotes it.
_ZERO_THRESHOLD = float(np.float32(1e-35))


def _booster(model):
    import lightgbm as lgb

    if isinstance(model, lgb.Booster):
        return model
    booster = getattr(model, "booster_", None)
    if isinstance(booster, lgb.Booster):
        return booster
    raise ExportError(f"expected a lightgbm.Booster or a fitted LGBMClassifier, got {type(model).__name__}")


def _margin_scale(objective: str) -> str:
    tokens = objective.split()
    if not tokens or tokens[0] != "binary":
        raise ExportError(f"only the binary objective is supported, the model has {objective!r}")
    sigmoid = 1.0
    for tok in tokens[1:]:
        if tok.startswith("sigmoid:"):
            sigmoid = float(tok.split(":", 1)[1])
    if sigmoid == 1.0:
        return "log_odds"
    if sigmoid == 2.0:
        return "half_log_odds"
    raise ExportError(
        f"objective {objective!r}: the probability is sigmoid({sigmoid} * raw score); only sigmoid 1 (log-odds) "
        "and 2 (half log-odds) can be written with the raw score as the margin"
    )


def _categories(info: dict | None, used_left: set[int]) -> list[int]:
    """Category codes of one categorical feature: those LightGBM recorded, plus any named by a split."""
    values = {int(v) for v in (info or {}).get("values", []) if int(v) >= 0}
    return sorted(values | used_left)


def _numeric_missing(node: dict, where: str) -> str:
    thr = float(node["threshold"])
    zero_side = "left" if 0.0 <= thr else "right"
    mtype = node.get("missing_type", "None")
    if mtype == "None":
        return zero_side
    default_side = "left" if node["default_left"] else "right"
    if mtype == "NaN":
        return default_side
    if mtype == "Zero":
        if default_side == zero_side and not (-_ZERO_THRESHOLD < thr <= _ZERO_THRESHOLD):
            return default_side
        raise ExportError(
            f"{where}: missing_type Zero sends values near 0 to the {default_side} side, which a threshold split "
            f"with missing side cannot express exactly (threshold {thr!r}); train with zero_as_missing=false"
        )
    raise ExportError(f"{where}: unknown missing_type {mtype!r}")


def export_lightgbm(
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
    category_names: dict[str, list[str]] | None = None,
) -> dict:
    """A LightGBM binary model (`Booster` or fitted `LGBMClassifier`) as a model document.

    Categorical features must be integer-coded (LightGBM's own `categorical_feature`). Their category names are
    the integer codes as strings, unless `category_names` maps the feature's name to a list of names indexed by
    code (code `k` is `names[k]`; every name becomes a category, seen in training or not). `pandas` categorical
    input is refused, since its code-to-label map lives outside the booster's trees.
    """
    import lightgbm as lgb

    booster = _booster(model)
    dump = booster.dump_model()
    if dump.get("num_class", 1) != 1 or dump.get("num_tree_per_iteration", 1) != 1:
        raise ExportError("only binary models (one tree per iteration) are supported")
    if dump.get("average_output"):
        raise ExportError("random-forest mode (average_output) is not supported: the margin is a mean, not a sum")
    if dump.get("pandas_categorical"):
        raise ExportError("pandas categorical input is not supported; integer-code the categories before training")
    margin_scale = _margin_scale(dump.get("objective", ""))
    lib_names = dump["feature_names"]
    n = int(dump["max_feature_idx"]) + 1
    infos = dump.get("feature_infos", {})

    # Pass 1: which features are categorical and which codes their splits name.
    cat_used: dict[int, set[int]] = {}
    for tree in dump["tree_info"]:
        if tree.get("is_linear"):
            raise ExportError("linear trees (linear_tree=true) are not supported")
        stack = [tree["tree_structure"]]
        while stack:
            node = stack.pop()
            if "leaf_value" in node:
                continue
            if node["decision_type"] == "==":
                codes = {int(c) for c in str(node["threshold"]).split("||")}
                cat_used.setdefault(int(node["split_feature"]), set()).update(codes)
            elif node["decision_type"] != "<=":
                raise ExportError(f"unknown decision_type {node['decision_type']!r}")
            stack.extend([node["left_child"], node["right_child"]])
    for i, fname in enumerate(lib_names):
        if (infos.get(fname) or {}).get("values"):
            cat_used.setdefault(i, set())
    codes = {i: _categories(infos.get(lib_names[i]), used) for i, used in cat_used.items()}
    names = feature_names(feature_names_, lib_names, n)
    labels = {i: [str(c) for c in cs] for i, cs in codes.items()}
    for fname, given in (category_names or {}).items():
        if fname not in names or names.index(fname) not in codes:
            raise ExportError(f"category_names: {fname!r} is not a categorical feature of this model")
        i = names.index(fname)
        if codes[i] and codes[i][-1] >= len(given):
            raise ExportError(f"category_names[{fname!r}]: the model uses code {codes[i][-1]}, only {len(given)} names")
        codes[i] = list(range(len(given)))
        labels[i] = [str(g) for g in given]
    index_of = {i: {c: k for k, c in enumerate(cs)} for i, cs in codes.items()}

    trees = []
    for t_idx, tree in enumerate(dump["tree_info"]):

        def visit(node, t_idx=t_idx):
            if "leaf_value" in node:
                return ("leaf", float(node["leaf_value"]), float(node["leaf_count"]))
            f = int(node["split_feature"])
            where = f"tree {t_idx}, split {node.get('split_index')}"
            if node["decision_type"] == "==":
                left = sorted(index_of[f][int(c)] for c in str(node["threshold"]).split("||"))
                split = {"feature": f, "left_categories": left, "missing": "right", "unknown": "right"}
                return ("split", "categorical", split, node["left_child"], node["right_child"], float(node["internal_count"]))
            if f in codes:
                raise ExportError(f"{where}: numeric split on categorical feature {lib_names[f]!r}")
            split = {
                "feature": f,
                "op": "<=",
                "threshold": float(node["threshold"]),
                "missing": _numeric_missing(node, where),
            }
            return ("split", "numeric", split, node["left_child"], node["right_child"], float(node["internal_count"]))

        trees.append({"nodes": flatten_tree(tree["tree_structure"], visit)})
    features = [categorical_feature(x, labels[i]) if i in codes else numeric_feature(x) for i, x in enumerate(names)]
    meta = {"library": "lightgbm", "library_version": lgb.__version__, "objective": dump.get("objective", "")}
    meta.update(metadata or {})
    return build_document(
        name=name,
        version=version,
        features=features,
        margin_scale=margin_scale,
        base_rate=resolve_base_rate(base_rate, y),
        body_key="ensemble",
        body={"base_margin": 0.0, "split_precision": "float64", "trees": trees},
        metadata=meta,
        calibration=calibration,
        reference_distribution=reference_distribution,
        score_scale=score_scale,
    )
