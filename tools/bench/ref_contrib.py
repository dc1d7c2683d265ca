"""Times LightGBM's and XGBoost's own per-feature contribution paths on one thread, on the benchmark tree models
and rows of make_bench_models.py: microseconds per explained row.

    .venv/bin/python tools/bench/ref_contrib.py [--models target/bench-models] [--out FILE.json] [--seconds 3]

Paths timed:
    LightGBM 4.7   Booster.predict(rows, pred_contrib=True, num_threads=1): a batch of 1,000 rows (per-row time)
                   and one row per call
    XGBoost 3.2    Booster.predict(DMatrix, pred_contribs=True) with nthread=1: a batch of 1,000 rows (the DMatrix
                   built outside the timing) and one row per call (DMatrix built inside: what a caller pays)

Each figure is the median of repeated timings; the process is expected to be pinned to one core by the caller.
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import json  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import lightgbm as lgb  # noqa: E402
import numpy as np  # noqa: E402
import xgboost as xgb  # noqa: E402

BATCH = 1000


def median_seconds(fn, seconds: float) -> float:
    fn()
    laps = []
    end = time.perf_counter() + seconds
    while time.perf_counter() < end or len(laps) < 3:
        t0 = time.perf_counter()
        fn()
        laps.append(time.perf_counter() - t0)
    return statistics.median(laps)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", default="target/bench-models")
    ap.add_argument("--out", default="target/bench-results/ref_contrib.json")
    ap.add_argument("--seconds", type=float, default=3.0)
    ap.add_argument("--batch", type=int, default=BATCH, help="rows per batch call (default 1000)")
    args = ap.parse_args()
    d = Path(args.models)
    manifest = json.loads((d / "manifest.json").read_text())
    out = {"libraries": {"lightgbm": lgb.__version__, "xgboost": xgb.__version__}, "models": {}}
    for m in manifest["models"]:
        if m["kind"] != "trees" or m["library"] not in ("lightgbm", "xgboost"):
            continue
        name = m["name"]
        rows = np.fromfile(d / m["rows_file"], dtype="<f8").reshape(-1, m["features"])
        batch = np.ascontiguousarray(rows[: args.batch])
        one = [np.ascontiguousarray(rows[i : i + 1]) for i in range(200)]
        k = iter(range(10**12))
        if m["library"] == "lightgbm":
            b = lgb.Booster(model_file=str(d / f"{name}.native"))
            batch_s = median_seconds(lambda: b.predict(batch, pred_contrib=True, num_threads=1), args.seconds)
            single_s = median_seconds(
                lambda: b.predict(one[next(k) % len(one)], pred_contrib=True, num_threads=1), args.seconds)
        else:
            b = xgb.Booster()
            b.load_model(str(d / f"{name}.native"))
            b.set_param({"nthread": 1})
            names = b.feature_names
            dm = xgb.DMatrix(batch, nthread=1, feature_names=names)
            batch_s = median_seconds(lambda: b.predict(dm, pred_contribs=True), args.seconds)
            single_s = median_seconds(
                lambda: b.predict(xgb.DMatrix(one[next(k) % len(one)], nthread=1, feature_names=names),
                                  pred_contribs=True), args.seconds)
        out["models"][name] = {
            "library": m["library"],
            "batch_us_per_row": batch_s / args.batch * 1e6,
            "single_us_per_row": single_s * 1e6,
        }
        print(f"{name}: {batch_s / args.batch * 1e6:.1f} us/row in batches, {single_s * 1e6:.1f} us one row a call", flush=True)
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(out, indent=1) + "\n")


if __name__ == "__main__":
    main()
