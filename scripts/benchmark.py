"""Benchmark: all estimates plus latest-vs-previous changes on a large synthetic study.

24 waves x 2,000 respondents x 100 metrics x 5 subgroup variables (4 levels each), weights,
no clusters. Run:  python scripts/benchmark.py [--waves 24] [--n 2000] [--metrics 100]
The figures go in docs/performance.md; no test enforces them.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from tracker import Study


def build(root: Path, waves: int, n: int, metrics: int, groups: int) -> Study:
    lines = ["title: benchmark", "id: rid", "weight: w", "variables:"]
    for g in range(groups):
        lines += [f"  g{g}:", "    type: category", "    codes: {1: a, 2: b, 3: c, 4: d}"]
    for m in range(metrics):
        lines += [f"  q{m}:", "    type: scale", "    codes: {1: a, 2: b, 3: c, 4: d, 5: e}", "    missing: {9: dk}"]
    lines.append("groups:")
    lines += [f"  g{g}: {{variable: g{g}}}" for g in range(groups)]
    lines.append("metrics:")
    for m in range(metrics):
        kind = ("share: [4, 5]", "mean: true", "balance: {plus: [4, 5], minus: [1, 2]}")[m % 3]
        lines += [f"  m{m}:", f"    variable: q{m}", f"    {kind}"]
    book = root / "codebook.yaml"
    book.write_text("\n".join(lines) + "\n")
    study = Study.create(root / "study", book)
    rng = np.random.default_rng(1)
    for k in range(waves):
        frame = {"rid": [f"{k}-{i}" for i in range(n)], "w": rng.lognormal(0, 0.4, n)}
        for g in range(groups):
            frame[f"g{g}"] = rng.integers(1, 5, n)
        for m in range(metrics):
            frame[f"q{m}"] = rng.choice([1, 2, 3, 4, 5, 9], n)
        path = root / f"w{k}.parquet"
        pd.DataFrame(frame).to_parquet(path)
        year, month = 2020 + k // 12, k % 12 + 1
        study.add(path, f"W{k:02d}", f"{year}-{month:02d}-15")
    return Study(root / "study")


def startup(study: Path, runs: int = 7) -> dict[str, float]:
    """Median wall time of `tracker --help` and `tracker waves STUDY` as fresh processes."""
    import statistics
    import subprocess
    import sys

    out = {}
    for name, args in (("tracker --help", ["--help"]), ("tracker waves", ["waves", str(study)])):
        times = []
        for _ in range(runs):
            t = time.perf_counter()
            subprocess.run([sys.executable, "-m", "tracker", *args], check=True, capture_output=True)
            times.append(time.perf_counter() - t)
        out[name] = statistics.median(times)
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--waves", type=int, default=24)
    ap.add_argument("--n", type=int, default=2000)
    ap.add_argument("--metrics", type=int, default=100)
    ap.add_argument("--groups", type=int, default=5)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        build(Path(tmp), args.waves, args.n, args.metrics, args.groups)
        t1 = time.perf_counter()
        study = Study(Path(tmp) / "study")
        est = study.estimates()
        t2 = time.perf_counter()
        ch = study.changes()
        t3 = time.perf_counter()
        tr = None
        if hasattr(study, "trends"):
            tr = study.trends()
        t4 = time.perf_counter()
        starts = startup(Path(tmp) / "study")
    print(f"cores: {os.cpu_count()}")
    print(f"study: {args.waves} waves x {args.n} respondents x {args.metrics} metrics x {args.groups} splits")
    print(f"building (intake of every wave): {t1 - t0:.2f} s")
    print(f"all estimates ({len(est):,} rows): {t2 - t1:.2f} s")
    print(f"latest vs previous changes ({len(ch.table):,} tests): {t3 - t2:.2f} s")
    if tr is not None:
        print(f"trends ({len(tr):,} series): {t4 - t3:.2f} s")
    print(f"estimates + changes: {t3 - t1:.2f} s")
    for name, sec in starts.items():
        print(f"start-up, {name} (median of 7 fresh processes): {sec:.2f} s")


if __name__ == "__main__":
    main()
