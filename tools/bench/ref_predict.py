"""Times the reference libraries' own predict paths, on one thread, on the benchmark models and rows of
make_bench_models.py: batch throughput and single-row latency, to the probability.

    .venv/bin/python tools/bench/ref_predict.py [--models target/bench-models] [--out FILE.json] [--seconds 3]

Paths timed (each library's fastest documented one we know of, one thread):
    LightGBM 4.7   batch: Booster.predict(ndarray, num_threads=1)
                   single: the C entry point LGBM_BoosterPredictForMatSingleRowFast (prepared once with
                   LGBM_BoosterPredictForMatSingleRowFastInit), called through ctypes; and Booster.predict(1 row)
    XGBoost 3.2    batch and single: Booster.inplace_predict(ndarray) with nthread=1 (it calls the C function
                   XGBoosterPredictFromDense without building a DMatrix)
    scikit-learn   batch and single: predict_proba, with OpenMP and BLAS held to one thread (threadpoolctl);
                   for the linear model on the already one-hot-encoded design matrix (the encoding is not timed)

Each figure is the median of repeated timings; the process is expected to be pinned to one core by the caller.
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import ctypes  # noqa: E402
import json  # noqa: E402
import pickle  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import lightgbm as lgb  # noqa: E402
import numpy as np  # noqa: E402
import sklearn  # noqa: E402
import xgboost as xgb  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402


def read_rows(path: Path, width: int) -> np.ndarray:
    return np.fromfile(path, dtype="<f8").reshape(-1, width)


def time_batch(fn, rows: np.ndarray, seconds: float) -> float:
    """Median rows per second of whole-batch calls."""
    fn(rows)
    laps = []
    end = time.perf_counter() + seconds
    while time.perf_counter() < end or len(laps) < 3:
        t0 = time.perf_counter()
        fn(rows)
        laps.append(time.perf_counter() - t0)
    return rows.shape[0] / statistics.median(laps)


def time_single(fn, rows: np.ndarray, seconds: float, per_lap: int = 200) -> float:
    """Median microseconds per one-row call, cycling over the rows."""
    singles = [np.ascontiguousarray(rows[i : i + 1]) for i in range(min(rows.shape[0], 1000))]
    for r in singles[:20]:
        fn(r)
    laps = []
    end = time.perf_counter() + seconds
    k = 0
    while time.perf_counter() < end or len(laps) < 3:
        t0 = time.perf_counter()
        for _ in range(per_lap):
            fn(singles[k % len(singles)])
            k += 1
        laps.append((time.perf_counter() - t0) / per_lap)
    return statistics.median(laps) * 1e6


class LightGBMSingleRowFast:
    """LightGBM's C single-row entry point (c_api.h: LGBM_BoosterPredictForMatSingleRowFastInit / ...Fast)."""

    C_API_PREDICT_NORMAL = 0
    C_API_DTYPE_FLOAT64 = 1

    def __init__(self, booster: lgb.Booster, ncol: int):
        self.lib = lgb.basic._LIB
        self.booster = booster
        self.handle = ctypes.c_void_p()
        rc = self.lib.LGBM_BoosterPredictForMatSingleRowFastInit(
            booster._handle,
            ctypes.c_int(self.C_API_PREDICT_NORMAL),
            ctypes.c_int(0),
            ctypes.c_int(-1),
            ctypes.c_int(self.C_API_DTYPE_FLOAT64),
            ctypes.c_int32(ncol),
            ctypes.c_char_p(b"num_threads=1"),
            ctypes.byref(self.handle),
        )
        if rc != 0:
            raise RuntimeError(self.lib.LGBM_GetLastError().decode())
        self.out_len = ctypes.c_int64()
        self.out = np.zeros(1, dtype=np.float64)
        self.out_ptr = self.out.ctypes.data_as(ctypes.POINTER(ctypes.c_double))
        self.fn = self.lib.LGBM_BoosterPredictForMatSingleRowFast

    def __call__(self, row: np.ndarray) -> float:
        self.fn(self.handle, row.ctypes.data_as(ctypes.c_void_p), ctypes.byref(self.out_len), self.out_ptr)
        return self.out[0]

    def __del__(self):
        if self.handle:
            self.lib.LGBM_FastConfigFree(self.handle)


def check(name: str, path: str, got: np.ndarray, want: np.ndarray) -> None:
    err = float(np.max(np.abs(got - want)))
    if err > 1e-6:
        raise SystemExit(f"{name} {path}: probabilities differ from the stored ones by {err:g}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", default="target/bench-models")
    ap.add_argument("--out", default=None, help="write the results as JSON here")
    ap.add_argument("--seconds", type=float, default=3.0, help="timing per figure (default 3)")
    ap.add_argument("--only", default=None, help="comma-separated model names")
    args = ap.parse_args()
    d = Path(args.models)
    manifest = json.loads((d / "manifest.json").read_text())
    results = {
        "libraries": {"lightgbm": lgb.__version__, "xgboost": xgb.__version__, "scikit-learn": sklearn.__version__},
        "models": {},
    }
    for m in manifest["models"]:
        name = m["name"]
        if args.only and name not in args.only.split(","):
            continue
        rows = read_rows(d / m["rows_file"], m["features"])
        want = np.fromfile(d / f"{name}.expected.f64", dtype="<f8")
        native = d / f"{name}.native"
        res: dict[str, dict] = {}
        if m["library"] == "lightgbm":
            booster = lgb.Booster(model_file=str(native))
            batch = lambda x: booster.predict(x, num_threads=1)  # noqa: E731
            check(name, "predict", batch(rows), want)
            fast = LightGBMSingleRowFast(booster, rows.shape[1])
            check(name, "SingleRowFast", np.array([fast(np.ascontiguousarray(r)) for r in rows[:200]]), want[:200])
            res["Booster.predict"] = {
                "batch_rows_per_s": time_batch(batch, rows, args.seconds),
                "single_us": time_single(batch, rows, args.seconds),
            }
            res["C PredictForMatSingleRowFast"] = {"single_us": time_single(fast, rows, args.seconds, 2000)}
        elif m["library"] == "xgboost":
            booster = xgb.Booster(model_file=str(native))
            booster.set_param({"nthread": 1})
            fn = lambda x: booster.inplace_predict(x)  # noqa: E731
            check(name, "inplace_predict", fn(rows), want)
            res["Booster.inplace_predict"] = {
                "batch_rows_per_s": time_batch(fn, rows, args.seconds),
                "single_us": time_single(fn, rows, args.seconds),
            }
        else:
            model = pickle.loads(native.read_bytes())
            x = rows if m["kind"] == "trees" else read_rows(d / m["design_file"], m["design_columns"])
            fn = lambda x: model.predict_proba(x)[:, 1]  # noqa: E731
            with threadpool_limits(limits=1):
                check(name, "predict_proba", fn(x), want)
                res["predict_proba"] = {
                    "batch_rows_per_s": time_batch(fn, x, args.seconds),
                    "single_us": time_single(fn, x, args.seconds, 50),
                }
        results["models"][name] = res
        for path, r in res.items():
            b = r.get("batch_rows_per_s")
            print(
                f"{name:18} {m['library']:13} {path:30} "
                + (f"batch {b:12,.0f} rows/s  " if b else " " * 32)
                + f"single {r['single_us']:9.2f} us",
                flush=True,
            )
    if args.out:
        Path(args.out).write_text(json.dumps(results, indent=2) + "\n")


if __name__ == "__main__":
    main()
