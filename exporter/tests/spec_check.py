"""A structural check of a model document against `docs/model-format.md` (format version 2), written from the
spec's tables for the exporter's tests. It raises AssertionError naming the JSON path of the first problem."""

from __future__ import annotations

import math
import re

TOP_REQUIRED = {"format", "format_version", "name", "version", "features", "margin_scale", "base_rate"}
TOP_OPTIONAL = {"metadata", "ensemble", "linear", "calibration", "reference_distribution", "score_scale", "reason_families"}
NAME_RE = re.compile(r"^[A-Za-z0-9._-]{1,128}$")


def _finite(path, v):
    assert isinstance(v, (int, float)) and not isinstance(v, bool), f"{path}: not a number: {v!r}"
    assert math.isfinite(v), f"{path}: not finite: {v!r}"


def _side(path, v):
    assert v in ("left", "right"), f"{path}: {v!r} is not left/right"


def check_features(features):
    names = set()
    for i, f in enumerate(features):
        p = f"features[{i}]"
        assert f["name"] and f["name"] not in names, f"{p}.name"
        names.add(f["name"])
        if f["type"] == "numeric":
            assert set(f) - {"training_distribution"} == {"name", "type"}, p
        else:
            assert f["type"] == "categorical" and set(f) - {"training_distribution"} == {"name", "type", "categories"}, p
            cats = f["categories"]
            assert 1 <= len(cats) <= 65536 and len(set(cats)) == len(cats), f"{p}.categories"
            assert all(isinstance(c, str) and c for c in cats), f"{p}.categories"
        if "training_distribution" in f:
            check_training_distribution(p + ".training_distribution", f, f["training_distribution"])


def check_training_distribution(p, f, d):
    """`docs/model-format.md`, Training distribution: shares in [0, 1] summing to 1 within 1e-6; numeric edges
    finite, strictly increasing, one fewer than the shares; categorical one share per category; at most 32 bins."""
    if f["type"] == "numeric":
        assert set(d) == {"edges", "shares", "missing"}, p
        e = d["edges"]
        for j, v in enumerate(e):
            _finite(f"{p}.edges[{j}]", v)
        assert all(b > a for a, b in zip(e, e[1:])), f"{p}.edges"
        assert len(d["shares"]) == len(e) + 1 <= 32, f"{p}.shares"
        total = sum(d["shares"]) + d["missing"]
    else:
        assert set(d) <= {"shares", "missing", "unknown"} and {"shares", "missing"} <= set(d), p
        assert len(d["shares"]) == len(f["categories"]) <= 32, f"{p}.shares"
        total = sum(d["shares"]) + d["missing"] + d.get("unknown", 0.0)
    for j, v in enumerate(d["shares"] + [d["missing"], d.get("unknown", 0.0)]):
        _finite(f"{p}[{j}]", v)
        assert 0.0 <= v <= 1.0, f"{p}: share {v!r}"
    assert abs(total - 1.0) <= 1e-6, f"{p}: shares sum to {total!r}"


def check_tree(t, nodes, features):
    assert nodes, f"ensemble.trees[{t}].nodes is empty"
    seen = [0] * len(nodes)
    stack = [0]
    while stack:
        i = stack.pop()
        p = f"ensemble.trees[{t}].nodes[{i}]"
        seen[i] += 1
        assert seen[i] == 1, f"{p}: reached twice"
        node = nodes[i]
        assert "cover" in node, f"{p}.cover"
        _finite(f"{p}.cover", node["cover"])
        assert node["cover"] >= 0, f"{p}.cover"
        if "leaf" in node:
            assert set(node) == {"leaf", "cover"}, p
            _finite(f"{p}.leaf", node["leaf"])
            continue
        (kind,) = set(node) - {"left", "right", "cover"}
        assert set(node) == {kind, "left", "right", "cover"}, p
        s = node[kind]
        f = features[s["feature"]]
        if kind == "numeric":
            assert set(s) == {"feature", "op", "threshold", "missing"}, p
            assert f["type"] == "numeric", f"{p}: numeric split on a categorical feature"
            assert s["op"] in ("<", "<="), p
            if s["threshold"] not in ("inf", "-inf"):
                _finite(f"{p}.numeric.threshold", s["threshold"])
            _side(f"{p}.numeric.missing", s["missing"])
        else:
            assert kind == "categorical", p
            assert set(s) == {"feature", "left_categories", "missing", "unknown"}, p
            assert f["type"] == "categorical", f"{p}: categorical split on a numeric feature"
            lc = s["left_categories"]
            assert len(set(lc)) == len(lc) and all(0 <= c < len(f["categories"]) for c in lc), p
            _side(f"{p}.categorical.missing", s["missing"])
            _side(f"{p}.categorical.unknown", s["unknown"])
        for side in ("left", "right"):
            c = node[side]
            assert isinstance(c, int) and 0 <= c < len(nodes) and c != i, f"{p}.{side}"
            stack.append(c)
        assert node["left"] != node["right"], p
    assert all(s == 1 for s in seen), f"ensemble.trees[{t}]: unreachable nodes"


def check_term(j, term, features):
    p = f"linear.terms[{j}]"
    ((kind, t),) = term.items()
    f = features[t["feature"]]
    for k in ("missing", "unknown", "coefficient", "center"):
        if k in t:
            _finite(f"{p}.{kind}.{k}", t[k])
    if kind == "numeric":
        assert set(t) <= {"feature", "coefficient", "center", "scale", "missing"} and f["type"] == "numeric", p
        assert t.get("scale", 1.0) > 0, p
    elif kind == "categorical":
        assert set(t) <= {"feature", "coefficients", "unknown", "missing"} and f["type"] == "categorical", p
        assert len(t["coefficients"]) == len(f["categories"]), p
    else:
        assert kind == "binned" and f["type"] == "numeric", p
        assert set(t) <= {"feature", "edges", "closed", "contributions", "missing"}, p
        e = t["edges"]
        assert all(b > a for a, b in zip(e, e[1:])) and len(t["contributions"]) == len(e) + 1, p
        assert t.get("closed", "left") in ("left", "right"), p


def check_document(doc):
    keys = set(doc)
    assert TOP_REQUIRED <= keys and keys <= TOP_REQUIRED | TOP_OPTIONAL, f"$: keys {sorted(keys)}"
    assert doc["format"] == "probity.model" and doc["format_version"] == 2
    assert NAME_RE.match(doc["name"]) and NAME_RE.match(doc["version"])
    assert doc["margin_scale"] in ("log_odds", "half_log_odds")
    assert 0 < doc["base_rate"] < 1
    assert ("ensemble" in doc) != ("linear" in doc), "$: exactly one of ensemble and linear"
    check_features(doc["features"])
    if "ensemble" in doc:
        ens = doc["ensemble"]
        assert set(ens) == {"base_margin", "split_precision", "trees"}
        _finite("ensemble.base_margin", ens["base_margin"])
        assert ens["split_precision"] in ("float32", "float64")
        assert ens["trees"]
        for t, tree in enumerate(ens["trees"]):
            assert set(tree) == {"nodes"}
            check_tree(t, tree["nodes"], doc["features"])
    else:
        lin = doc["linear"]
        assert set(lin) == {"intercept", "terms"}
        _finite("linear.intercept", lin["intercept"])
        for j, term in enumerate(lin["terms"]):
            check_term(j, term, doc["features"])
    if "reason_families" in doc:
        seen, codes = set(), set()
        for k, fam in enumerate(doc["reason_families"]):
            assert set(fam) == {"code", "text", "features"}, f"reason_families[{k}]"
            assert 1 <= len(fam["code"]) <= 32 and fam["code"] not in codes, f"reason_families[{k}].code"
            codes.add(fam["code"])
            assert 1 <= len(fam["text"]) <= 200, f"reason_families[{k}].text"
            for j, i in enumerate(fam["features"]):
                assert 0 <= i < len(doc["features"]) and i not in seen, f"reason_families[{k}].features[{j}]"
                seen.add(i)
    if "reference_distribution" in doc:
        r = doc["reference_distribution"]
        assert len(r["fractions"]) == len(r["edges"]) + 1 and abs(sum(r["fractions"]) - 1) <= 1e-6
