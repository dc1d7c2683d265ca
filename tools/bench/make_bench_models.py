"""Benchmark models and rows, trained with the reference libraries on seeded synthetic data and exported with
probity_export, so that each model runs both in its own library and in probity.

    .venv/bin/python tools/bench/make_bench_models.py [--out target/bench-models] [--rows 10000]

Writes into the output folder (gitignored, about 60 MB):

    <name>.json         the probity model file
    <name>.native       the library's own model (LightGBM text, XGBoost UBJSON, scikit-learn pickle)
    trees_rows.f64      scoring rows for the 50-feature tree models: little-endian float64, row-major
    linear_rows.f64     the same for the linear model's 200 features (dense encoding, categories by index)
    linear_design.f64   the linear model's rows as scikit-learn sees them (one-hot design matrix)
    <name>.expected.f64 the library's own probability for every scoring row
    manifest.json       names, kinds, shapes, files, library versions, training times

Models (the sizes issue 7 asks for):
    lightgbm_500_d6     LightGBM, 500 trees, max_depth 6 (num_leaves 64), 50 numeric features with NaN
    xgboost_500_d6      XGBoost, 500 trees, max_depth 6, same data
    sklearn_500_d6      scikit-learn HistGradientBoostingClassifier, 500 trees, max_depth 6, same data (some of
                        its splits separate missing from present values with threshold +inf, written "inf")
    lightgbm_1000_d8    LightGBM, 1,000 trees, max_depth 8 (num_leaves 256)
    linear_200          scikit-learn LogisticRegression on a one-hot design: 200 terms (100 standardised numeric,
                        70 binned, 30 categorical), written as a probity linear model

Everything is seeded; the same library versions give the same files. A model whose files are already there is
kept (training takes minutes on a shared 2-core machine); --force retrains everything.
"""

from __future__ import annotations

import argparse
import json
import pickle
import time
from pathlib import Path

import lightgbm as lgb
import numpy as np
import sklearn
import xgboost as xgb
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.linear_model import LogisticRegression

import probity_export

N_TREE_FEATURES = 50
N_NUMERIC, N_BINNED, N_CATEGORICAL = 100, 70, 30
N_TRAIN = 20_000
SEED = 20240607


def sigmoid(h: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-h))


def tree_data(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    """50 correlated numeric features, 10 of them 5% missing; a label from a non-linear logit with interactions."""
    z = rng.standard_normal((n, N_TREE_FEATURES))
    x = z + 0.5 * z[:, [0]]  # a shared factor correlates the columns
    x[:, 10:20] = np.exp(x[:, 10:20] / 2)  # skewed, like amounts
    h = (
        -1.0
        + 0.8 * x[:, 0]
        - 0.6 * x[:, 1] * x[:, 2]
        + 0.5 * np.sin(2 * x[:, 3])
        + 0.4 * (x[:, 10] > 1.5)
        + 0.3 * np.abs(x[:, 4])
        + 0.05 * x[:, 20:50].sum(axis=1)
    )
    y = (rng.random(n) < sigmoid(h)).astype(np.int64)
    for j in range(30, 40):
        x[rng.random(n) < 0.05, j] = np.nan
    return x, y


def tree_names() -> list[str]:
    return [f"f{j:02d}" for j in range(N_TREE_FEATURES)]


def export_tree_model(model, name: str, names: list[str], y: np.ndarray) -> dict:
    return probity_export.export(model, name=name, version="1", feature_names=names, y=y)


def train_lightgbm(x, y, trees: int, depth: int) -> lgb.Booster:
    params = {
        "objective": "binary",
        "num_leaves": 2**depth,
        "max_depth": depth,
        "learning_rate": 0.05,
        "min_data_in_leaf": 5,
        "min_sum_hessian_in_leaf": 1e-6,
        "lambda_l2": 1.0,
        "num_threads": 2,
        "deterministic": True,
        "force_row_wise": True,
        "seed": SEED,
        "verbose": -1,
    }
    return lgb.train(params, lgb.Dataset(x, y, feature_name=tree_names()), num_boost_round=trees)


def train_xgboost(x, y, trees: int, depth: int) -> xgb.Booster:
    params = {
        "objective": "binary:logistic",
        "max_depth": depth,
        "eta": 0.05,
        "nthread": 2,
        "seed": SEED,
        "tree_method": "hist",
    }
    return xgb.train(params, xgb.DMatrix(x, y, feature_names=tree_names()), num_boost_round=trees)


def train_sklearn(x, y, trees: int, depth: int) -> HistGradientBoostingClassifier:
    model = HistGradientBoostingClassifier(
        max_iter=trees,
        max_depth=depth,
        max_leaf_nodes=2**depth,
        min_samples_leaf=5,
        learning_rate=0.05,
        early_stopping=False,
        random_state=SEED,
    )
    return model.fit(x, y)


# ------------------------------------------------------------------------------------------------ linear scorecard


def linear_data(rng: np.random.Generator, n: int):
    """100 numeric, 70 binned numeric and 30 categorical columns (8 to 20 levels each); a logit linear in the
    numeric columns, step-shaped in the binned ones, by level in the categorical ones."""
    num = rng.standard_normal((n, N_NUMERIC)) * rng.uniform(0.5, 20, N_NUMERIC) + rng.uniform(-50, 50, N_NUMERIC)
    binned = rng.gamma(2.0, 1.0, (n, N_BINNED))
    levels = rng.integers(8, 21, N_CATEGORICAL)
    cats = np.column_stack([rng.integers(0, k, n) for k in levels])
    h = -2.0 + ((num - num.mean(0)) / num.std(0)) @ rng.normal(0, 0.08, N_NUMERIC)
    h += (binned > 2.0) @ rng.normal(0, 0.15, N_BINNED)
    for j, k in enumerate(levels):
        h += rng.normal(0, 0.2, k)[cats[:, j]]
    y = (rng.random(n) < sigmoid(h)).astype(np.int64)
    binned[rng.random((n, N_BINNED)) < 0.02] = np.nan
    return num, binned, cats, levels, y


def linear_spec(num, binned, levels) -> dict:
    """Standardisation of the numeric columns and quantile edges of the binned ones (quartiles to deciles),
    taken from the training data. Quantile binning is common practice, no single source."""
    edges = []
    for j in range(N_BINNED):
        b = binned[:, j][~np.isnan(binned[:, j])]
        k = 4 + j % 7
        qs = np.quantile(b, np.arange(1, k) / k)
        edges.append(sorted({float(f"{q:.4g}") for q in qs}))
    return {"center": num.mean(0), "scale": num.std(0), "edges": edges, "levels": [int(k) for k in levels]}


def linear_design(num, binned, cats, spec) -> np.ndarray:
    """The one-hot design matrix: standardised numeric columns; per binned column one column per bin (closed on
    the left) and one for missing; per categorical column one per level."""
    cols = [(num - spec["center"]) / spec["scale"]]
    for j, e in enumerate(spec["edges"]):
        x = binned[:, j]
        b = np.searchsorted(np.asarray(e), np.where(np.isnan(x), -np.inf, x), side="right")
        onehot = (b[:, None] == np.arange(len(e) + 1)[None, :]) & ~np.isnan(x)[:, None]
        cols.append(onehot.astype(float))
        cols.append(np.isnan(x)[:, None].astype(float))
    for j, k in enumerate(spec["levels"]):
        cols.append((cats[:, [j]] == np.arange(k)[None, :]).astype(float))
    return np.hstack(cols)


def linear_document(lr: LogisticRegression, spec: dict, base_rate: float) -> dict:
    coef = lr.coef_[0]
    features, terms, at = [], [], 0
    for j in range(N_NUMERIC):
        features.append({"name": f"n{j:03d}", "type": "numeric"})
        terms.append(
            {
                "numeric": {
                    "feature": j,
                    "coefficient": float(coef[at]),
                    "center": float(spec["center"][j]),
                    "scale": float(spec["scale"][j]),
                }
            }
        )
        at += 1
    for j, e in enumerate(spec["edges"]):
        features.append({"name": f"b{j:03d}", "type": "numeric"})
        n = len(e) + 1
        terms.append(
            {
                "binned": {
                    "feature": N_NUMERIC + j,
                    "edges": e,
                    "closed": "left",
                    "contributions": [float(c) for c in coef[at : at + n]],
                    "missing": float(coef[at + n]),
                }
            }
        )
        at += n + 1
    for j, k in enumerate(spec["levels"]):
        features.append({"name": f"c{j:03d}", "type": "categorical", "categories": [f"L{i}" for i in range(k)]})
        terms.append(
            {
                "categorical": {
                    "feature": N_NUMERIC + N_BINNED + j,
                    "coefficients": [float(c) for c in coef[at : at + k]],
                    "unknown": 0.0,
                    "missing": 0.0,
                }
            }
        )
        at += k
    assert at == len(coef), (at, len(coef))
    return probity_export.document.build_document(
        name="linear_200",
        version="1",
        features=features,
        margin_scale="log_odds",
        base_rate=base_rate,
        body_key="linear",
        body={"intercept": float(lr.intercept_[0]), "terms": terms},
        metadata={
            "model": "benchmark scorecard: 100 standardised, 70 binned, 30 categorical terms",
            "library": "scikit-learn",
            "library_version": sklearn.__version__,
        },
    )


# --------------------------------------------------------------------------------------------------------- main


def write_f64(path: Path, a: np.ndarray) -> None:
    np.ascontiguousarray(a, dtype="<f8").tofile(path)


def check_margins(doc: dict, rows: np.ndarray, want: np.ndarray, tol: float, n: int = 200) -> None:
    """The exporter's own pure-Python evaluator must reproduce the library's margin on a sample of rows."""
    got = np.array([probity_export.evaluate.margin(doc, list(r)) for r in rows[:n]])
    err = np.max(np.abs(got - want[:n]))
    if err > tol:
        raise SystemExit(f"{doc['name']}: exported margins differ from the library's by {err:g}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--out", default="target/bench-models")
    ap.add_argument("--rows", type=int, default=10_000, help="scoring rows (default 10000)")
    ap.add_argument("--force", action="store_true", help="retrain models whose files exist")
    args = ap.parse_args()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)
    manifest: dict = {
        "seed": SEED,
        "rows": args.rows,
        "libraries": {
            "lightgbm": lgb.__version__,
            "xgboost": xgb.__version__,
            "scikit-learn": sklearn.__version__,
            "numpy": np.__version__,
        },
        "models": [],
    }

    x, y = tree_data(rng, N_TRAIN + args.rows)
    xt, yt, xs = x[:N_TRAIN], y[:N_TRAIN], x[N_TRAIN:]
    write_f64(out / "trees_rows.f64", xs)
    names = tree_names()
    tree_cases = [
        ("lightgbm_500_d6", "lightgbm", 500, 6),
        ("xgboost_500_d6", "xgboost", 500, 6),
        ("sklearn_500_d6", "scikit-learn", 500, 6),
        ("lightgbm_1000_d8", "lightgbm", 1000, 8),
    ]
    for name, library, trees, depth in tree_cases:
        entry = {
            "name": name,
            "library": library,
            "kind": "trees",
            "trees": trees,
            "max_depth": depth,
            "features": N_TREE_FEATURES,
            "rows_file": "trees_rows.f64",
        }
        if not args.force and all((out / f"{name}{ext}").exists() for ext in (".json", ".native", ".expected.f64")):
            manifest["models"].append(entry)
            print(f"{name}: kept", flush=True)
            continue
        t0 = time.perf_counter()
        if library == "lightgbm":
            model = train_lightgbm(xt, yt, trees, depth)
            model.save_model(str(out / f"{name}.native"))
            margin, prob = model.predict(xs, raw_score=True), model.predict(xs)
        elif library == "xgboost":
            model = train_xgboost(xt, yt, trees, depth)
            model.save_model(str(out / f"{name}.native.ubj"))
            (out / f"{name}.native.ubj").rename(out / f"{name}.native")
            d = xgb.DMatrix(xs, feature_names=names)
            margin, prob = model.predict(d, output_margin=True), model.predict(d)
        else:
            model = train_sklearn(xt, yt, trees, depth)
            (out / f"{name}.native").write_bytes(pickle.dumps(model))
            margin, prob = model.decision_function(xs), model.predict_proba(xs)[:, 1]
        seconds = time.perf_counter() - t0
        doc = export_tree_model(model, name, names, yt)
        # XGBoost sums its trees in float32, probity in float64: float32 rounding over 500 terms (the exporter's
        # own tests allow 1e-5 over 20 terms).
        check_margins(doc, xs, margin, 1e-4 if library == "xgboost" else 1e-9)
        probity_export.write(doc, out / f"{name}.json")
        write_f64(out / f"{name}.expected.f64", prob)
        entry["train_seconds"] = round(seconds, 1)
        manifest["models"].append(entry)
        print(f"{name}: trained in {seconds:.1f} s", flush=True)

    num, binned, cats, levels, y = linear_data(rng, N_TRAIN + args.rows)
    spec = linear_spec(num[:N_TRAIN], binned[:N_TRAIN], levels)
    design = linear_design(num, binned, cats, spec)
    t0 = time.perf_counter()
    lr = LogisticRegression(C=1.0, max_iter=10_000, tol=1e-8).fit(design[:N_TRAIN], y[:N_TRAIN])
    seconds = time.perf_counter() - t0
    doc = linear_document(lr, spec, float(y[:N_TRAIN].mean()))
    dense = np.hstack([num, binned, cats.astype(np.float64)])[N_TRAIN:]
    ds = design[N_TRAIN:]
    check_margins(doc, dense, lr.decision_function(ds), 1e-9)
    probity_export.write(doc, out / "linear_200.json")
    (out / "linear_200.native").write_bytes(pickle.dumps(lr))
    write_f64(out / "linear_rows.f64", dense)
    write_f64(out / "linear_design.f64", ds)
    write_f64(out / "linear_200.expected.f64", lr.predict_proba(ds)[:, 1])
    manifest["models"].append(
        {
            "name": "linear_200",
            "library": "scikit-learn",
            "kind": "linear",
            "terms": N_NUMERIC + N_BINNED + N_CATEGORICAL,
            "features": N_NUMERIC + N_BINNED + N_CATEGORICAL,
            "design_columns": int(ds.shape[1]),
            "rows_file": "linear_rows.f64",
            "design_file": "linear_design.f64",
            "train_seconds": round(seconds, 1),
        }
    )
    print(f"linear_200: trained in {seconds:.1f} s ({ds.shape[1]} design columns)", flush=True)
    (out / "manifest.json").write_text(json.dumps(manifest, indent=2) + "\n")


if __name__ == "__main__":
    main()
