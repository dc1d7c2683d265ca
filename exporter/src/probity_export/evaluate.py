"""A small pure-Python evaluator of probity model files, the exporter's own check that a written file reproduces
the library's margin. It follows `docs/model-format.md` literally and is kept independent of the Rust engine.
"""

from __future__ import annotations

import math
from typing import Mapping, Sequence

import numpy as np


def encode_row(doc: dict, cells: Mapping[str, str]) -> list[float]:
    """The dense row for text cells keyed by feature name: numbers parsed, empty cells missing, categories by
    position, any other category text unknown (-1)."""
    row = []
    for f in doc["features"]:
        text = cells.get(f["name"], "").strip()
        if f["type"] == "numeric":
            row.append(float("nan") if text == "" else float(text))
        elif text == "":
            row.append(float("nan"))
        else:
            cats = f["categories"]
            row.append(float(cats.index(text)) if text in cats else -1.0)
    return row


def _category_index(value: float, n: int) -> int | None:
    if value.is_integer() and 0 <= value < n:
        return int(value)
    return None


def _threshold(written: float | str) -> float:
    """A written threshold: a number, or `"inf"` / `"-inf"` for an infinite one."""
    if isinstance(written, str):
        return {"inf": math.inf, "-inf": -math.inf}[written]
    return written


def _tree_value(nodes: list[dict], row: Sequence[float], features: list[dict], f32: bool) -> float:
    i = 0
    while True:
        node = nodes[i]
        if "leaf" in node:
            return node["leaf"]
        if "numeric" in node:
            s = node["numeric"]
            x = row[s["feature"]]
            if math.isnan(x):
                side = s["missing"]
            else:
                if f32:
                    x = float(np.float32(x))
                t = _threshold(s["threshold"])
                holds = x < t if s["op"] == "<" else x <= t
                side = "left" if holds else "right"
        else:
            s = node["categorical"]
            x = row[s["feature"]]
            if math.isnan(x):
                side = s["missing"]
            else:
                k = _category_index(x, len(features[s["feature"]]["categories"]))
                if k is None:
                    side = s["unknown"]
                else:
                    side = "left" if k in s["left_categories"] else "right"
        i = node[side]


def _term_value(term: dict, row: Sequence[float], features: list[dict]) -> float:
    (kind, t), = term.items()
    x = row[t["feature"]]
    if math.isnan(x):
        if "missing" not in t:
            raise ValueError(f"feature {features[t['feature']]['name']!r} is missing")
        return t["missing"]
    if kind == "numeric":
        return t["coefficient"] * (x - t.get("center", 0.0)) / t.get("scale", 1.0)
    if kind == "categorical":
        k = _category_index(x, len(t["coefficients"]))
        if k is None:
            if "unknown" not in t:
                raise ValueError(f"feature {features[t['feature']]['name']!r} has an unknown category")
            return t["unknown"]
        return t["coefficients"][k]
    if kind == "binned":
        edges = t["edges"]
        if t.get("closed", "left") == "left":
            b = sum(1 for e in edges if x >= e)
        else:
            b = sum(1 for e in edges if x > e)
        return t["contributions"][b]
    raise ValueError(f"unknown term kind {kind!r}")


def margin(doc: dict, row: Sequence[float]) -> float:
    """The raw margin of one dense row."""
    features = doc["features"]
    if "ensemble" in doc:
        ens = doc["ensemble"]
        f32 = ens["split_precision"] == "float32"
        total = ens["base_margin"]
        for tree in ens["trees"]:
            total += _tree_value(tree["nodes"], row, features, f32)
        return total
    lin = doc["linear"]
    total = lin["intercept"]
    for term in lin["terms"]:
        total += _term_value(term, row, features)
    return total


def log_odds(doc: dict, m: float) -> float:
    """Log-odds from a raw margin."""
    return 2.0 * m if doc["margin_scale"] == "half_log_odds" else m


def probability(doc: dict, row: Sequence[float]) -> float:
    """The uncalibrated probability of the positive class (no calibration, no base-rate shift)."""
    h = log_odds(doc, margin(doc, row))
    if h >= 0:
        return 1.0 / (1.0 + math.exp(-h))
    e = math.exp(h)
    return e / (1.0 + e)
