"""The parts of a probity model file (format version 2) that do not depend on the training library.

`docs/model-format.md` in the probity repository is the contract; this module builds its top level, checks the
options a caller passes through (calibration, reference distribution, points scale) and writes the document.
Numbers are written with Python's `repr` (through `json`), which round-trips every float64 exactly.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

FORMAT = "probity.model"
FORMAT_VERSION = 2
EXPORTER = "probity_export 0.1.0"

_NAME_RE = re.compile(r"^[A-Za-z0-9._-]{1,128}$")


class ExportError(ValueError):
    """A fitted model, or an option, that cannot be written as a probity model file exactly."""


def numeric_feature(name: str) -> dict:
    """A numeric entry of `features`."""
    return {"name": name, "type": "numeric"}


def categorical_feature(name: str, categories: Sequence[str]) -> dict:
    """A categorical entry of `features`; the dense-row value of a category is its position in `categories`."""
    cats = [str(c) for c in categories]
    if not cats:
        raise ExportError(f"feature {name!r}: a categorical feature needs at least one category")
    if len(set(cats)) != len(cats) or any(c == "" for c in cats):
        raise ExportError(f"feature {name!r}: categories must be unique, non-empty strings, got {cats!r}")
    return {"name": name, "type": "categorical", "categories": cats}


def category_name(value: Any) -> str:
    """The text of a category value: an integral number becomes its integer digits ("3", not "3.0")."""
    if isinstance(value, (float, np.floating)):
        if not math.isfinite(value):
            raise ExportError(f"category value {value!r} is not finite")
        if float(value).is_integer():
            return str(int(value))
        return repr(float(value))
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    return str(value)


def feature_names(given: Sequence[str] | None, from_model: Sequence[str] | None, n: int) -> list[str]:
    """Resolves feature names: the caller's, else the model's, else `f0`, `f1`, ..."""
    names = list(given) if given is not None else (list(from_model) if from_model is not None else None)
    if names is None:
        names = [f"f{i}" for i in range(n)]
    if len(names) != n:
        raise ExportError(f"{len(names)} feature names given, the model has {n} features")
    names = [str(x) for x in names]
    if len(set(names)) != n or any(x == "" for x in names):
        raise ExportError(f"feature names must be unique and non-empty, got {names!r}")
    return names


def threshold(value: Any) -> float | str:
    """A numeric split's threshold as the format writes it: a finite number as itself, an infinite one as the text
    `"inf"` or `"-inf"` (JSON has no literal for it). NaN is refused."""
    v = float(value)
    if math.isnan(v):
        raise ExportError(f"split threshold {value!r} is not a number")
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return v


def resolve_base_rate(base_rate: float | None, y: Iterable | None) -> float:
    """The model's base rate: given, or the positive share of the training labels `y` (0/1 or booleans)."""
    if base_rate is None:
        if y is None:
            raise ExportError("base_rate is required: pass base_rate=... or the training labels y=...")
        labels = np.asarray(list(y) if not hasattr(y, "__len__") else y, dtype=float)
        if labels.size == 0 or not np.all((labels == 0) | (labels == 1)):
            raise ExportError("y must be a non-empty sequence of 0/1 labels to derive the base rate")
        base_rate = float(labels.mean())
    base_rate = float(base_rate)
    if not (0.0 < base_rate < 1.0):
        raise ExportError(f"base_rate must be in (0, 1), got {base_rate!r}")
    return base_rate


def _check_finite(path: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ExportError(f"{path}: expected a number, got {value!r}")
    v = float(value)
    if not math.isfinite(v):
        raise ExportError(f"{path}: expected a finite number, got {v!r}")
    return v


def check_calibration(cal: dict) -> dict:
    """Checks a calibration object against the spec's rules and returns it with plain Python numbers."""
    if not isinstance(cal, dict) or len(cal) != 1:
        raise ExportError("calibration: expected an object with exactly one of platt, isotonic, beta, temperature")
    (kind, body), = cal.items()
    if kind == "platt":
        a, b = _check_finite("calibration.platt.a", body["a"]), _check_finite("calibration.platt.b", body["b"])
        if a <= 0:
            raise ExportError(f"calibration.platt.a: must be > 0, got {a!r}")
        return {"platt": {"a": a, "b": b}}
    if kind == "temperature":
        t = _check_finite("calibration.temperature.t", body["t"])
        if t <= 0:
            raise ExportError(f"calibration.temperature.t: must be > 0, got {t!r}")
        return {"temperature": {"t": t}}
    if kind == "beta":
        out = {k: _check_finite(f"calibration.beta.{k}", body[k]) for k in ("a", "b", "c")}
        if out["a"] < 0 or out["b"] < 0:
            raise ExportError("calibration.beta: a and b must be >= 0")
        return {"beta": out}
    if kind == "isotonic":
        x = [_check_finite(f"calibration.isotonic.x[{i}]", v) for i, v in enumerate(body["x"])]
        y = [_check_finite(f"calibration.isotonic.y[{i}]", v) for i, v in enumerate(body["y"])]
        inp = body.get("input", "log_odds")
        if inp not in ("log_odds", "probability"):
            raise ExportError(f"calibration.isotonic.input: must be log_odds or probability, got {inp!r}")
        if len(x) != len(y) or len(x) < 2:
            raise ExportError("calibration.isotonic: x and y need the same length, at least 2")
        if any(b <= a for a, b in zip(x, x[1:])):
            raise ExportError("calibration.isotonic.x: must be strictly increasing")
        if any(b < a for a, b in zip(y, y[1:])) or y[0] < 0 or y[-1] > 1:
            raise ExportError("calibration.isotonic.y: must be non-decreasing in [0, 1]")
        return {"isotonic": {"input": inp, "x": x, "y": y}}
    raise ExportError(f"calibration: unknown kind {kind!r}")


def check_reference_distribution(ref: dict) -> dict:
    """Checks a reference distribution (`on`, `edges`, `fractions`) against the spec's rules."""
    on = ref.get("on")
    if on not in ("probability", "log_odds"):
        raise ExportError(f"reference_distribution.on: must be probability or log_odds, got {on!r}")
    edges = [_check_finite(f"reference_distribution.edges[{i}]", v) for i, v in enumerate(ref["edges"])]
    fractions = [_check_finite(f"reference_distribution.fractions[{i}]", v) for i, v in enumerate(ref["fractions"])]
    if any(b <= a for a, b in zip(edges, edges[1:])):
        raise ExportError("reference_distribution.edges: must be strictly increasing")
    if len(fractions) != len(edges) + 1:
        raise ExportError("reference_distribution.fractions: needs one more entry than edges")
    if any(f < 0 or f > 1 for f in fractions) or abs(sum(fractions) - 1.0) > 1e-6:
        raise ExportError("reference_distribution.fractions: each in [0, 1], summing to 1")
    return {"on": on, "edges": edges, "fractions": fractions}


def reference_distribution(scores: Sequence[float], n_bins: int = 10, on: str = "probability") -> dict:
    """A reference distribution from validation scores: interior edges at the score quantiles, with ties merged.

    Bins are `(e[i-1], e[i]]` as in the spec, so the fractions are counted with the same closure.
    Quantile binning for drift monitoring is common practice, no single source.
    """
    s = np.sort(np.asarray(scores, dtype=float))
    if s.size == 0 or not np.all(np.isfinite(s)):
        raise ExportError("reference_distribution: needs at least one finite score")
    qs = np.quantile(s, np.arange(1, n_bins) / n_bins, method="lower")
    edges = sorted({float(q) for q in qs if q < s[-1]})
    counts = np.bincount(np.searchsorted(np.asarray(edges), s, side="left"), minlength=len(edges) + 1)
    fractions = [float(c) / s.size for c in counts]
    return check_reference_distribution({"on": on, "edges": edges, "fractions": fractions})


def check_score_scale(scale: dict) -> dict:
    """Checks a points scale (`points`, `at_odds`, `pdo`, `odds_of`)."""
    out = {k: _check_finite(f"score_scale.{k}", scale[k]) for k in ("points", "at_odds", "pdo")}
    if out["at_odds"] <= 0 or out["pdo"] <= 0:
        raise ExportError("score_scale: at_odds and pdo must be > 0")
    odds_of = scale.get("odds_of", "negative")
    if odds_of not in ("negative", "positive"):
        raise ExportError(f"score_scale.odds_of: must be negative or positive, got {odds_of!r}")
    out["odds_of"] = odds_of
    return out


def build_document(
    *,
    name: str,
    version: str,
    features: list[dict],
    margin_scale: str,
    base_rate: float,
    body_key: str,
    body: dict,
    metadata: dict | None = None,
    calibration: dict | None = None,
    reference_distribution: dict | None = None,
    score_scale: dict | None = None,
) -> dict:
    """Assembles a complete model document in the spec's key order."""
    for key, value in (("name", name), ("version", version)):
        if not isinstance(value, str) or not _NAME_RE.match(value):
            raise ExportError(f"{key}: 1 to 128 characters of A-Za-z0-9._- required, got {value!r}")
    if margin_scale not in ("log_odds", "half_log_odds"):
        raise ExportError(f"margin_scale: {margin_scale!r}")
    doc: dict[str, Any] = {"format": FORMAT, "format_version": FORMAT_VERSION, "name": name, "version": version}
    meta = {"exporter": EXPORTER}
    meta.update(metadata or {})
    doc["metadata"] = meta
    doc["features"] = features
    doc["margin_scale"] = margin_scale
    doc["base_rate"] = base_rate
    doc[body_key] = body
    if calibration is not None:
        doc["calibration"] = check_calibration(calibration)
    if reference_distribution is not None:
        doc["reference_distribution"] = check_reference_distribution(reference_distribution)
    if score_scale is not None:
        doc["score_scale"] = check_score_scale(score_scale)
    return doc


def dumps(doc: dict) -> str:
    """The document as JSON text: floats by `repr` (exact round trip), no NaN or infinity, one trailing newline."""
    return json.dumps(doc, indent=1, allow_nan=False, ensure_ascii=False) + "\n"


def write(doc: dict, path: str | Path) -> None:
    """Writes the document to `path` (UTF-8)."""
    Path(path).write_text(dumps(doc), encoding="utf-8")


def _check_cover(value: Any) -> float:
    c = _check_finite("cover", value)
    if c < 0:
        raise ExportError(f"cover: {c!r} is negative")
    return c


def with_reason_families(doc: dict, families: Sequence[Mapping[str, Any]]) -> dict:
    """Adds the deployer's reason families to a document: each `{"code": ..., "text": ..., "features": [names]}`,
    feature names as in the document's `features`. Checks the spec's rules (codes unique, 1 to 32 characters;
    texts 1 to 200; each feature in one family at most) and writes the features as indices."""
    index = {f["name"]: i for i, f in enumerate(doc["features"])}
    out, codes, taken = [], set(), {}
    for k, fam in enumerate(families):
        p = f"reason_families[{k}]"
        unknown = set(fam) - {"code", "text", "features"}
        if unknown:
            raise ExportError(f"{p}: unknown keys {sorted(unknown)}")
        code, text, names = fam.get("code"), fam.get("text"), fam.get("features")
        if not isinstance(code, str) or not 1 <= len(code) <= 32 or not code.isprintable():
            raise ExportError(f"{p}.code: 1 to 32 printable characters required, got {code!r}")
        if code in codes:
            raise ExportError(f"{p}.code: duplicate code {code!r}")
        codes.add(code)
        if not isinstance(text, str) or not 1 <= len(text) <= 200 or not text.isprintable():
            raise ExportError(f"{p}.text: 1 to 200 printable characters required, got {text!r}")
        if not names or isinstance(names, str):
            raise ExportError(f"{p}.features: a non-empty list of feature names required")
        idx = []
        for j, name in enumerate(names):
            if name not in index:
                raise ExportError(f"{p}.features[{j}]: {name!r} is not a feature of this model")
            if name in taken:
                raise ExportError(f"{p}.features[{j}]: {name!r} is already in family {taken[name]!r}")
            taken[name] = code
            idx.append(index[name])
        out.append({"code": code, "text": text, "features": idx})
    doc["reason_families"] = out
    return doc


def flatten_tree(root: Any, visit) -> list[dict]:
    """Lays out a binary tree as a probity `nodes` array in pre-order, root first.

    `visit(node)` returns `("leaf", value, cover)` or `("split", split_key, split_body, left_node, right_node,
    cover)`, where `split_key` is `"numeric"` or `"categorical"` and `cover` is the training weight that reached
    the node as the library records it (written as the node's `cover`). Iterative, so deep trees do not hit the
    recursion limit.
    """
    nodes: list[dict | None] = []
    stack = [(root, None, None)]  # (node, parent index, side)
    while stack:
        node, parent, side = stack.pop()
        idx = len(nodes)
        nodes.append(None)
        if parent is not None:
            nodes[parent][side] = idx  # type: ignore[index]
        kind = visit(node)
        if kind[0] == "leaf":
            nodes[idx] = {"leaf": _check_finite("leaf", kind[1]), "cover": _check_cover(kind[2])}
        else:
            _, split_key, split_body, left, right, cover = kind
            nodes[idx] = {split_key: split_body, "left": -1, "right": -1, "cover": _check_cover(cover)}
            # Right pushed first so the left subtree is laid out first.
            stack.append((right, idx, "right"))
            stack.append((left, idx, "left"))
    return nodes  # type: ignore[return-value]


# Most value bins (numeric bins or categories) of one feature's training distribution (`docs/model-format.md`).
MAX_DISTRIBUTION_BINS = 32


def _is_missing(value: Any) -> bool:
    """Whether a training cell is missing as the server reads it: None, NaN, or a number that is not finite."""
    if value is None:
        return True
    if isinstance(value, (float, np.floating)):
        return not math.isfinite(float(value))
    return False


def _numeric_distribution(name: str, column: Sequence[Any], n_bins: int) -> dict:
    values = []
    missing = 0
    for v in column:
        if _is_missing(v):
            missing += 1
            continue
        try:
            values.append(float(v))
        except (TypeError, ValueError):
            raise ExportError(f"training data, feature {name!r}: {v!r} is not a number") from None
    total = len(values) + missing
    if not values:
        return {"edges": [], "shares": [0.0], "missing": 1.0}
    s = np.sort(np.asarray(values, dtype=float))
    # Quantile edges of the values present, as `reference_distribution` cuts scores: ties merged, no edge at the
    # largest value; bins (e[i-1], e[i]]. Quantile binning for drift monitoring is common practice, no single source.
    qs = np.quantile(s, np.arange(1, n_bins) / n_bins, method="lower")
    edges = sorted({float(q) for q in qs if q < s[-1]})
    counts = np.bincount(np.searchsorted(np.asarray(edges), s, side="left"), minlength=len(edges) + 1)
    return {
        "edges": edges,
        "shares": [float(c) / total for c in counts],
        "missing": missing / total,
    }


def _categorical_distribution(categories: Sequence[str], column: Sequence[Any],
                              code_names: Sequence[str] | None = None) -> dict:
    index = {c: i for i, c in enumerate(categories)}
    counts = [0] * len(categories)
    missing = unknown = 0
    for v in column:
        if _is_missing(v):
            missing += 1
            continue
        name = category_name(v)
        if code_names is not None and name.isdigit() and int(name) < len(code_names):
            name = str(code_names[int(name)])
        k = index.get(name)
        if k is None:
            unknown += 1
        else:
            counts[k] += 1
    total = sum(counts) + missing + unknown
    return {
        "shares": [c / total for c in counts],
        "missing": missing / total,
        "unknown": unknown / total,
    }


def with_training_distribution(doc: dict, x: Any, n_bins: int = 10,
                               category_names: Mapping[str, Sequence[str]] | None = None) -> dict:
    """Adds each feature's training distribution (`features[i].training_distribution`) from the training rows `x`:
    a 2-D array or data frame with one column per feature of the document, in its order, values as given to the
    library (categorical columns as the library's codes or labels: a category is matched by `category_name`).

    Numeric features: interior edges at the quantiles `k / n_bins` of the values present (ties merged), the share
    of all rows in each bin `(e[i-1], e[i]]`, and the missing share (None, NaN or infinite, as the server reads
    them). Categorical features: the share of each category, of a value that is none of them (unknown), and of
    missing values. A categorical feature with more than 32 categories gets none (the format's limit).
    `category_names` (as the LightGBM exporter takes it: feature name -> names indexed by integer code) maps the
    codes of `x` to the category names of the document.
    """
    if not 1 <= n_bins <= MAX_DISTRIBUTION_BINS:
        raise ExportError(f"training distribution: n_bins must be 1 to {MAX_DISTRIBUTION_BINS}, got {n_bins!r}")
    if isinstance(x, np.ndarray):
        if x.ndim != 2:
            raise ExportError(f"training data: expected a 2-D array, got {x.ndim} dimensions")
        columns = list(x.T)
    else:
        if hasattr(x, "columns") and hasattr(x, "iloc"):
            columns = [x.iloc[:, j].tolist() for j in range(x.shape[1])]
        else:
            rows = [list(r) for r in x]
            width = len(rows[0]) if rows else 0
            if any(len(r) != width for r in rows):
                raise ExportError("training data: rows of different lengths")
            columns = [[r[j] for r in rows] for j in range(width)]
    features = doc["features"]
    if len(columns) != len(features):
        raise ExportError(f"training data has {len(columns)} columns, the model has {len(features)} features")
    if len(features) and len(columns[0]) == 0:
        raise ExportError("training data has no rows")
    for f, column in zip(features, columns):
        if f["type"] == "numeric":
            f["training_distribution"] = _numeric_distribution(f["name"], column, n_bins)
        elif len(f["categories"]) <= MAX_DISTRIBUTION_BINS:
            f["training_distribution"] = _categorical_distribution(
                f["categories"], column, (category_names or {}).get(f["name"]))
    return doc
