#!/usr/bin/env python3
"""Trains the two demo models of the probity demo scenario and writes them as probity model files.

The scenario: Harbourline Card Services, a fictional card issuer, scores card transactions for fraud. The data is
invented by `probity generate-demo-data` (columns id, amount, hour, merchant_group, channel, card_age_days,
txn_count_24h, distance_km, foreign, label) and is for the demo only.

Both models are trained the way fraud teams usually do (common practice, no single source): on re-sampled data,
all frauds plus 1 in 20 legitimate transactions. Their `base_rate` is the fraud share of that re-sampled set, so a
route configured with the live fraud rate as its target base rate shifts the log-odds by
logit(target) - logit(base_rate) (Elkan 2001, Theorem 2; Dal Pozzolo et al. 2015).

- service/demo/harbourline-fraud-trees.json: LightGBM, 100 trees of depth <= 5, native categorical splits.
- service/demo/harbourline-fraud-scorecard.json: a points scorecard. Each numeric characteristic is cut into 4 to 6
  quantile bins (plus a missing bin where training data had missing values), the bins and the categories are
  one-hot coded and a scikit-learn LogisticRegression is fitted; each bin's coefficient is its contribution on the
  log-odds scale. Points: 600 at odds 50 (of not fraud), 20 points to double the odds (Siddiqi 2006).

Each file carries a reference distribution of the probabilities measured on a held-out fifth of the data, after the
base-rate shift to the held-out fraud rate (recorded as `metadata.reference_target_base_rate`): a route serving the
model should use that target base rate for the drift comparison to be like for like.

Usage: tools/train_demo.py [--data FILE] [--out-dir service/demo]
Without --data, it runs `cargo run -p probity -- generate-demo-data --rows 200000 --seed 20240917` first.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import math  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
from pathlib import Path  # noqa: E402

import lightgbm as lgb  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import sklearn  # noqa: E402
from sklearn.linear_model import LogisticRegression  # noqa: E402
from sklearn.metrics import log_loss, roc_auc_score  # noqa: E402

import probity_export  # noqa: E402
from probity_export import evaluate  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
NUMERIC = ["amount", "hour", "card_age_days", "txn_count_24h", "distance_km", "foreign"]
CATEGORICAL = ["merchant_group", "channel"]
FEATURES = ["amount", "hour", "merchant_group", "channel", "card_age_days", "txn_count_24h", "distance_km", "foreign"]
BINNED = ["amount", "hour", "card_age_days", "txn_count_24h", "distance_km"]
SCORE_SCALE = {"points": 600, "at_odds": 50, "pdo": 20, "odds_of": "negative"}
DEFAULT_ROWS, DEFAULT_SEED = 200_000, 20240917


def logit(p: float) -> float:
    return math.log(p) - math.log1p(-p)


def sigmoid(h: np.ndarray) -> np.ndarray:
    return np.where(h >= 0, 1 / (1 + np.exp(-np.abs(h))), np.exp(-np.abs(h)) / (1 + np.exp(-np.abs(h))))


def load(path: Path) -> pd.DataFrame:
    df = pd.read_csv(path, dtype={c: str for c in CATEGORICAL + ["id"]}, keep_default_na=False, na_values=[""])
    missing = [c for c in FEATURES + ["label"] if c not in df.columns]
    if missing:
        raise SystemExit(f"{path}: missing columns {missing}")
    for c in NUMERIC:
        df[c] = df[c].astype(np.float64)
    return df


def split_and_resample(df: pd.DataFrame, keep_legit: int, seed: int):
    """Every 5th row is held out; the training rows keep all frauds and 1 in `keep_legit` legitimate ones."""
    pos = np.arange(len(df))
    hold = df[pos % 5 == 0].reset_index(drop=True)
    train = df[pos % 5 != 0].reset_index(drop=True)
    rng = np.random.default_rng(seed)
    keep = (train["label"].to_numpy() == 1) | (rng.random(len(train)) < 1.0 / keep_legit)
    return train[keep].reset_index(drop=True), hold


def reference(margins: np.ndarray, base_rate: float, target: float) -> tuple[dict, np.ndarray]:
    """Probabilities after the prior shift to `target`, and their decile reference distribution."""
    p = sigmoid(margins + logit(target) - logit(base_rate))
    return probity_export.reference_distribution(p, n_bins=10, on="probability"), p


def validation(y: np.ndarray, p: np.ndarray) -> dict:
    return {
        "rows": int(len(y)),
        "fraud_rate": float(y.mean()),
        "mean_probability": float(p.mean()),
        "auc": float(roc_auc_score(y, p)),
        "log_loss": float(log_loss(y, p)),
    }


# ------------------------------------------------------------------------------------------------- trees


def train_trees(train: pd.DataFrame, hold: pd.DataFrame, target: float, common: dict) -> dict:
    cats = {c: sorted(train[c].unique()) for c in CATEGORICAL}

    def matrix(df: pd.DataFrame) -> np.ndarray:
        cols = []
        for f in FEATURES:
            if f in cats:
                idx = {name: k for k, name in enumerate(cats[f])}
                cols.append(df[f].map(lambda v, idx=idx: idx.get(v, np.nan)).to_numpy(dtype=np.float64))
            else:
                cols.append(df[f].to_numpy(dtype=np.float64))
        return np.column_stack(cols)

    params = {
        "objective": "binary",
        "num_leaves": 24,
        "max_depth": 5,
        "learning_rate": 0.05,
        "min_data_in_leaf": 40,
        "min_data_per_group": 50,
        "cat_smooth": 10.0,
        "feature_fraction": 1.0,
        "num_threads": 1,
        "deterministic": True,
        "force_row_wise": True,
        "seed": 11,
        "verbose": -1,
    }
    y = train["label"].to_numpy()
    ds = lgb.Dataset(matrix(train), y, feature_name=FEATURES, categorical_feature=[FEATURES.index(c) for c in cats])
    booster = lgb.train(params, ds, num_boost_round=100)
    base_rate = float(y.mean())
    xh = matrix(hold)
    margins = booster.predict(xh, raw_score=True, num_threads=1)
    ref, p = reference(margins, base_rate, target)
    meta = dict(common)
    meta.update(
        {
            "model": "LightGBM gradient-boosted trees, 100 trees, depth <= 5",
            "library": "lightgbm",
            "library_version": lgb.__version__,
            "validation": validation(hold["label"].to_numpy(), p),
        }
    )
    doc = probity_export.export(
        booster,
        name="harbourline-fraud-trees",
        version="1",
        base_rate=base_rate,
        metadata=meta,
        reference_distribution=ref,
        category_names=cats,
    )
    doc["serving_base_rate"] = target
    check(doc, hold, margins, 1e-9)
    return doc


# --------------------------------------------------------------------------------------------- scorecard


def quantile_edges(x: np.ndarray, n_bins: int = 5) -> list[float]:
    """Interior cut points at the quantiles of the non-missing values, rounded to 3 significant digits so the
    scorecard reads well, ties merged. Quantile binning of characteristics is common practice, no single source."""
    x = x[~np.isnan(x)]
    qs = np.quantile(x, np.arange(1, n_bins) / n_bins)
    edges = sorted({float(f"{q:.3g}") for q in qs})
    return [e for e in edges if x.min() < e <= x.max()]


def bin_index(x: np.ndarray, edges: list[float]) -> np.ndarray:
    """Bin numbers with bins closed on the left, [e[i-1], e[i]), as the model file's `closed: "left"`."""
    return np.searchsorted(np.asarray(edges), x, side="right")


def design(df: pd.DataFrame, spec: list) -> np.ndarray:
    """One-hot columns: for each binned feature its bins (and a missing column), for each categorical one its
    categories (an unknown or missing category gets no column, so it contributes 0)."""
    cols = []
    for kind, f, info in spec:
        x = df[f].to_numpy()
        if kind == "binned":
            xf = x.astype(np.float64)
            b = bin_index(np.where(np.isnan(xf), -np.inf, xf), info["edges"])
            for k in range(len(info["edges"]) + 1):
                cols.append(((b == k) & ~np.isnan(xf)).astype(float))
            if info["has_missing"]:
                cols.append(np.isnan(xf).astype(float))
        else:
            for name in info["categories"]:
                cols.append((x == name).astype(float))
    return np.column_stack(cols)


def train_scorecard(train: pd.DataFrame, hold: pd.DataFrame, target: float, common: dict) -> dict:
    spec = []
    for f in FEATURES:
        if f in CATEGORICAL:
            spec.append(("categorical", f, {"categories": sorted(train[f].unique())}))
        elif f in BINNED:
            x = train[f].to_numpy(dtype=np.float64)
            spec.append(("binned", f, {"edges": quantile_edges(x), "has_missing": bool(np.isnan(x).any())}))
        else:  # foreign, 0/1: two bins split at 1
            spec.append(("binned", f, {"edges": [1.0], "has_missing": bool(train[f].isna().any())}))
    y = train["label"].to_numpy()
    lr = LogisticRegression(C=1.0, max_iter=10_000, tol=1e-10)
    lr.fit(design(train, spec), y)
    coef = lr.coef_[0]
    terms, j = [], 0
    for kind, f, info in spec:
        fi = FEATURES.index(f)
        if kind == "binned":
            n = len(info["edges"]) + 1
            term = {"feature": fi, "edges": info["edges"], "closed": "left", "contributions": [float(c) for c in coef[j : j + n]]}
            j += n
            if info["has_missing"]:
                term["missing"] = float(coef[j])
                j += 1
            terms.append({"binned": term})
        else:
            n = len(info["categories"])
            # A category never seen in training, or a missing one, has no column: it contributes 0.
            terms.append({"categorical": {"feature": fi, "coefficients": [float(c) for c in coef[j : j + n]], "unknown": 0.0, "missing": 0.0}})
            j += n
    assert j == len(coef)
    features = [
        {"name": f, "type": "categorical", "categories": info["categories"]} if kind == "categorical" else {"name": f, "type": "numeric"}
        for kind, f, info in spec
    ]
    base_rate = float(y.mean())
    margins = lr.decision_function(design(hold, spec))
    ref, p = reference(margins, base_rate, target)
    meta = dict(common)
    meta.update(
        {
            "model": "points scorecard: quantile-binned characteristics, one-hot, L2 logistic regression (C=1)",
            "library": "scikit-learn",
            "library_version": sklearn.__version__,
            "validation": validation(hold["label"].to_numpy(), p),
        }
    )
    doc = probity_export.document.build_document(
        name="harbourline-fraud-scorecard",
        version="1",
        features=features,
        margin_scale="log_odds",
        base_rate=base_rate,
        body_key="linear",
        body={"intercept": float(lr.intercept_[0]), "terms": terms},
        metadata=meta,
        reference_distribution=ref,
        score_scale=SCORE_SCALE,
    )
    doc["serving_base_rate"] = target
    check(doc, hold, margins, 1e-9)
    return doc


# ------------------------------------------------------------------------------------------------ checks


def check(doc: dict, hold: pd.DataFrame, margins: np.ndarray, tol: float, n: int = 2000) -> None:
    """The written file must reproduce the library's margin (pure-Python evaluator of the spec) on held-out rows."""
    worst = 0.0
    for i in range(min(n, len(hold))):
        row = hold.iloc[i]
        cells = {f: ("" if pd.isna(row[f]) else str(row[f]) if f in CATEGORICAL else repr(float(row[f]))) for f in FEATURES}
        worst = max(worst, abs(evaluate.margin(doc, evaluate.encode_row(doc, cells)) - margins[i]))
    if worst > tol:
        raise SystemExit(f"{doc['name']}: the file is off the library's margin by {worst!r}")
    print(f"{doc['name']}: file reproduces the library margin on {min(n, len(hold))} held-out rows (max diff {worst:.3g})")


def generate_data(path: Path) -> None:
    cmd = ["cargo", "run", "-q", "-p", "probity", "--", "generate-demo-data", "--rows", str(DEFAULT_ROWS),
           "--seed", str(DEFAULT_SEED), "--output", str(path)]
    print("running:", " ".join(cmd))
    subprocess.run(cmd, check=True, cwd=ROOT)


# Harbourline's own reason families (invented wording for the demo): codes and texts a fraud analyst reads.
REASON_FAMILIES = [
    {"code": "H01", "text": "Transaction amount", "features": ["amount"]},
    {"code": "H02", "text": "Time of day", "features": ["hour"]},
    {"code": "H03", "text": "Merchant type and channel", "features": ["merchant_group", "channel"]},
    {"code": "H04", "text": "Card recently issued", "features": ["card_age_days"]},
    {"code": "H05", "text": "Card activity in the last 24 hours", "features": ["txn_count_24h"]},
    {"code": "H06", "text": "Far from home or abroad", "features": ["distance_km", "foreign"]},
]


def main() -> None:
    ap = argparse.ArgumentParser(description="Train the Harbourline Card Services demo models.")
    ap.add_argument("--data", type=Path, help="CSV from `probity generate-demo-data` (default: generate one)")
    ap.add_argument("--out-dir", type=Path, default=ROOT / "service" / "demo")
    ap.add_argument("--keep-legit", type=int, default=20, help="keep 1 in N legitimate transactions for training")
    ap.add_argument("--seed", type=int, default=5)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        data = args.data
        if data is None:
            data = Path(tmp) / "demo.csv"
            generate_data(data)
        df = load(data)
    train, hold = split_and_resample(df, args.keep_legit, args.seed)
    target = float(hold["label"].mean())
    common = {
        "scenario": "Harbourline Card Services (fictional card issuer), card transaction fraud; invented demo data",
        "training_data": (
            f"{len(df)} invented transactions from `probity generate-demo-data`"
            + ("" if args.data else f" --rows {DEFAULT_ROWS} --seed {DEFAULT_SEED}")
            + f"; 4 in 5 for training, re-sampled to all frauds and 1 in {args.keep_legit} legitimate "
            f"({len(train)} rows, fraud share {train['label'].mean():.4f}); 1 in 5 held out ({len(hold)} rows)"
        ),
        "reference_target_base_rate": target,
        "trainer": "tools/train_demo.py",
    }
    args.out_dir.mkdir(parents=True, exist_ok=True)
    for doc in (train_trees(train, hold, target, common), train_scorecard(train, hold, target, common)):
        probity_export.with_reason_families(doc, REASON_FAMILIES)
        path = args.out_dir / f"{doc['name']}.json"
        probity_export.write(doc, path)
        v = doc["metadata"]["validation"]
        print(f"wrote {path} (base_rate {doc['base_rate']:.4f}; held-out AUC {v['auc']:.4f}, "
              f"mean probability {v['mean_probability']:.4f} vs fraud rate {v['fraud_rate']:.4f})")


if __name__ == "__main__":
    main()
