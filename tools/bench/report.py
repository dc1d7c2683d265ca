"""Tables for BENCHMARKS.md from one run's results, with the ratios.

    .venv/bin/python tools/bench/report.py engine [--ref target/bench-results/ref.json] [--criterion target/criterion]
    .venv/bin/python tools/bench/report.py service [--results target/bench-results/service.jsonl]
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path


def criterion_ns(root: Path, group: str, name: str) -> float | None:
    """Criterion's mean time per iteration in nanoseconds (`new/estimates.json`, field mean.point_estimate)."""
    f = root / group / name / "new" / "estimates.json"
    if not f.exists():
        return None
    return json.loads(f.read_text())["mean"]["point_estimate"]


def engine(args) -> None:
    ref = json.loads(Path(args.ref).read_text())
    manifest = json.loads((Path(args.models) / "manifest.json").read_text())
    rows = manifest["rows"]
    crit = Path(args.criterion)
    print(
        "| model | probity batch rows/s | fastest library batch rows/s (path) | ratio | "
        "probity single-row us | fastest library single-row us (path) | ratio |"
    )
    print("|---|---:|---:|---:|---:|---:|---:|")
    for m in manifest["models"]:
        name = m["name"]
        if name not in ref["models"]:
            continue
        paths = ref["models"][name]
        batch_ns = criterion_ns(crit, "batch", name)
        single_ns = criterion_ns(crit, "single", name)
        batch = rows / (batch_ns * 1e-9) if batch_ns else None
        single = single_ns / 1e3 if single_ns else None
        best_b = max(((r["batch_rows_per_s"], p) for p, r in paths.items() if "batch_rows_per_s" in r), default=None)
        best_s = min(((r["single_us"], p) for p, r in paths.items() if "single_us" in r), default=None)
        lib = m["library"]
        cells = [f"{name} ({lib})"]
        cells.append(f"{batch:,.0f}" if batch else "-")
        cells.append(f"{best_b[0]:,.0f} ({best_b[1]})" if best_b else "-")
        cells.append(f"**{batch / best_b[0]:.2f}x**" if batch and best_b else "-")
        cells.append(f"{single:.2f}" if single else "-")
        cells.append(f"{best_s[0]:.2f} ({best_s[1]})" if best_s else "-")
        cells.append(f"**{best_s[0] / single:.1f}x**" if single and best_s else "-")
        print("| " + " | ".join(cells) + " |")
    print()
    print("All library paths timed:")
    print()
    for name, paths in ref["models"].items():
        for p, r in paths.items():
            b = r.get("batch_rows_per_s")
            print(f"- {name}, {p}: " + (f"batch {b:,.0f} rows/s, " if b else "") + f"single row {r['single_us']:.2f} us")


def service(args) -> None:
    runs = [json.loads(line) for line in Path(args.results).read_text().splitlines() if line.strip()]
    by = {(r["label"], r["concurrency"], r.get("rate")): r for r in runs}
    print(
        "| server | concurrency | rate | calls/s | p50 us | p99 us | server CPU us/call | "
        "calls/s vs bare | CPU/call minus bare | errors |"
    )
    print("|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|")
    for r in runs:
        # Each model's server against the bare server fed the same messages.
        base = "bare linear rows" if "linear" in r["label"] else "bare"
        bare = by.get((base, r["concurrency"], r.get("rate")))
        ratio = r["calls_per_s"] / bare["calls_per_s"] if bare and bare["calls_per_s"] else None
        cpu = r.get("server_cpu_us_per_call")
        extra = cpu - bare["server_cpu_us_per_call"] if bare and cpu and bare.get("server_cpu_us_per_call") else None
        rate = f"{r['rate']:,.0f}" if r.get("rate") else "closed loop"
        cpu_s = f"{cpu:.1f}" if cpu is not None else "-"
        ratio_s = f"{ratio:.2f}x" if ratio else "-"
        extra_s = f"{extra:+.1f}" if extra is not None else "-"
        print(
            f"| {r['label']} | {r['concurrency']} | {rate} | {r['calls_per_s']:,.0f} | {r['p50_us']:.0f} | "
            f"{r['p99_us']:.0f} | {cpu_s} | {ratio_s} | {extra_s} | {r['errors']} |"
        )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = ap.add_subparsers(dest="what", required=True)
    e = sub.add_parser("engine")
    e.add_argument("--ref", default="target/bench-results/ref.json")
    e.add_argument("--criterion", default="target/criterion")
    e.add_argument("--models", default="target/bench-models")
    s = sub.add_parser("service")
    s.add_argument("--results", default="target/bench-results/service.jsonl")
    args = ap.parse_args()
    engine(args) if args.what == "engine" else service(args)


if __name__ == "__main__":
    main()
