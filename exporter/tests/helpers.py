"""Shared checks: an exported document is valid per the spec, survives a JSON round trip unchanged, and its
margin (by the package's pure-Python evaluator) matches the library's on every row."""

import json

import numpy as np
from spec_check import check_document

import probity_export
from probity_export import evaluate


def dense(doc, x):
    """Dense rows from a library matrix: categorical codes become category positions (unknown -> -1)."""
    out = []
    for row in x:
        r = []
        for f, v in zip(doc["features"], row):
            if f["type"] == "categorical" and not np.isnan(v):
                name = probity_export.document.category_name(v)
                r.append(float(f["categories"].index(name)) if name in f["categories"] else -1.0)
            else:
                r.append(float(v))
        out.append(r)
    return out


def assert_reproduces(doc, x, library_margin, tol):
    check_document(doc)
    assert json.loads(probity_export.dumps(doc)) == doc
    ours = np.array([evaluate.margin(doc, r) for r in dense(doc, x)])
    lib = np.asarray(library_margin, dtype=float).ravel()
    worst = np.max(np.abs(ours - lib))
    assert worst <= tol, f"max |margin difference| {worst!r} > {tol!r}"
    return ours
