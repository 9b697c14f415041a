"""Benchmark: the tool side by side with a plain numpy floor on a realistic clustered study.

The study (synthetic, seeded): 24 waves x 2,000 respondents, 100 share metrics, 5 subgroup
splits of 4 levels (21 levels with the total), 10 strata of 20 clusters each (200 cluster
labels, the same in every wave), lognormal weights: 50,400 cells. Measured in one run:

* the floor: one pass per wave of weighted sums and cluster totals per cell (np.bincount
  and one sparse product), the least work any tool must do; kept here, and checked
  against the tool's values and standard errors to 1e-12;
* the tool's Python API (``Study.estimates``), without and with the per-wave cache;
* a samplics per-split loop (one ``TaylorEstimator`` call per wave x metric x split, the
  usual way to use that library) on a sample of calls, extrapolated and labelled so;
* the command line end to end, each command a fresh process, with its peak memory;
* one wave of 1,000,000 respondents (20 metrics, 3 splits): add, estimates, the floor;
* the time of ``add`` with 4, 24 and 60 waves stored.

Run:  python scripts/benchmark.py            (everything; about 15 minutes on 2 cores)
      python scripts/benchmark.py --quick    (the clustered study only)
The figures go in docs/performance.md; no test enforces them.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# one BLAS thread, as the command line sets it (docs/performance.md: two fight on two cores)
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import scipy.sparse as sp  # noqa: E402

SHARE_CODES = (4, 5)
MISSING = 9


# -- the synthetic study ---------------------------------------------------------------------

def codebook_text(metrics: int, groups: int, design: bool = True) -> str:
    lines = ["title: benchmark", "id: rid", "weight: w"]
    if design:
        lines += ["strata: s", "clusters: c"]
    lines.append("variables:")
    if design:
        lines += ["  s: {type: text}", "  c: {type: text}"]
    for g in range(groups):
        lines += [f"  g{g}:", "    type: category", "    codes: {1: a, 2: b, 3: c, 4: d}"]
    for m in range(metrics):
        lines += [f"  q{m}:", "    type: scale", "    codes: {1: a, 2: b, 3: c, 4: d, 5: e}", "    missing: {9: dk}"]
    lines.append("groups:")
    lines += [f"  g{g}: {{variable: g{g}}}" for g in range(groups)]
    lines.append("metrics:")
    for m in range(metrics):
        lines += [f"  m{m}:", f"    variable: q{m}", "    share: [4, 5]"]
    return "\n".join(lines) + "\n"


def make_wave(rng: np.random.Generator, k: int, n: int, metrics: int, groups: int, strata: int,
              clusters: int) -> pd.DataFrame:
    """One wave's respondents: clusters drawn at random, each with its own level per metric."""
    frame: dict[str, object] = {"rid": [f"{k}-{i}" for i in range(n)], "w": rng.lognormal(0, 0.4, n)}
    if clusters:
        c = rng.integers(0, clusters, n)
        frame["s"] = [f"s{v}" for v in c * strata // clusters]
        frame["c"] = [f"c{v}" for v in c]
        shift = rng.normal(0, 0.4, (clusters, metrics))[c]
    else:
        shift = np.zeros((n, metrics))
    for g in range(groups):
        frame[f"g{g}"] = rng.integers(1, 5, n)
    answers = np.clip(np.rint(3 + shift + rng.normal(0, 1.2, (n, metrics))), 1, 5).astype(int)
    answers[rng.random((n, metrics)) < 0.05] = MISSING
    for m in range(metrics):
        frame[f"q{m}"] = answers[:, m]
    return pd.DataFrame(frame)


def empty_study(root: Path, metrics: int, groups: int, design: bool = True):
    """A new study folder ``root/study`` with the synthetic codebook (and ``root/codebook.yaml``)."""
    from tracker import Study

    root.mkdir(parents=True, exist_ok=True)
    book = root / "codebook.yaml"
    book.write_text(codebook_text(metrics, groups, design=design))
    return Study.create(root / "study", book)


def build(root: Path, waves: int = 24, n: int = 2000, metrics: int = 100, groups: int = 5, strata: int = 10,
          clusters: int = 200, seed: int = 1) -> Path:
    """Make the study under ``root`` (study folder ``root/study``) by ``tracker add`` of each wave."""
    study = empty_study(root, metrics, groups, design=bool(clusters))
    rng = np.random.default_rng(seed)
    for k in range(waves):
        path = root / f"w{k:03d}.parquet"
        make_wave(rng, k, n, metrics, groups, strata, clusters).to_parquet(path)
        study.add(path, label(k), date(k))
        path.unlink()
    return root / "study"


def label(k: int) -> str:
    return f"W{k:03d}"


def date(k: int) -> str:
    return f"{2000 + k // 12}-{k % 12 + 1:02d}-15"


# -- the floor ----------------------------------------------------------------------------------

def floor_wave(table: pd.DataFrame, metrics: list[str], groups: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Values and Taylor standard errors (levels x metrics) of one wave's share cells.

    The least work: the answers as one integer matrix, subgroup membership as a 0/1 matrix,
    weighted sums by matrix products and each cell's cluster totals of the linearized
    values by one sparse (cluster x level) product; the with-replacement estimator within
    strata (Wolter 2007, ch. 6)."""
    X = table[metrics].to_numpy()
    w = table["w"].to_numpy(float)
    e = X != MISSING
    y = (X >= SHARE_CODES[0]) & (X <= SHARE_CODES[1])
    G = table[groups].to_numpy()
    N = len(table)
    D = np.concatenate([np.ones((N, 1)), (G[:, :, None] == np.arange(1, 5)).reshape(N, -1)], axis=1)
    we = e * w[:, None]
    wey = we * y
    sw = D.T @ we
    value = (D.T @ wey) / sw
    L = D.shape[1]
    if "c" in table.columns:
        s_code, s_names = pd.factorize(table["s"])
        c_code = pd.factorize(table["s"].astype(str) + "|" + table["c"].astype(str))[0]
        P = c_code.max() + 1
        psu_stratum = np.zeros(P, dtype=np.int64)
        psu_stratum[c_code] = s_code
        H = len(s_names)
    else:
        c_code = np.arange(N)
        P = N
        psu_stratum = np.zeros(N, dtype=np.int64)
        H = 1
    rows, lev = np.nonzero(D)
    CD = sp.csr_matrix((np.ones(rows.size), (c_code[rows] * L + lev, rows)), shape=(P * L, N))
    t = ((CD @ wey).reshape(P, L, -1) - value[None] * (CD @ we).reshape(P, L, -1)) / sw[None]
    t = t.reshape(P, -1)
    S = sp.csr_matrix((np.ones(P), (psu_stratum, np.arange(P))), shape=(H, P))
    s1, s2 = S @ t, S @ (t * t)
    n_h = np.bincount(psu_stratum, minlength=H)[:, None].astype(float)
    var = (n_h / (n_h - 1) * (s2 - s1 * s1 / n_h)).sum(axis=0).reshape(L, -1)
    return value, np.sqrt(var)


def floor_study(study: Path, waves: list[str]) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    ledger = json.loads((study / "ledger.json").read_text())
    files = {w["label"]: w["file"] for w in ledger["waves"]}
    out = {}
    for lab in waves:
        table = pd.read_parquet(study / files[lab])
        metrics = [c for c in table.columns if c.startswith("q")]
        groups = [c for c in table.columns if c.startswith("g")]
        out[lab] = floor_wave(table, metrics, groups)
    return out


def agreement(est: pd.DataFrame, floor: dict[str, tuple[np.ndarray, np.ndarray]]) -> float:
    """Largest absolute difference between the tool's values/SEs and the floor's."""
    worst = 0.0
    for lab, (value, se) in floor.items():
        part = est[est["wave"] == lab]
        v = part["value"].to_numpy().reshape(value.shape)
        s = part["se"].to_numpy().reshape(se.shape)
        worst = max(worst, float(np.nanmax(np.abs(v - value))), float(np.nanmax(np.abs(s - se))))
    return worst


# -- samplics -----------------------------------------------------------------------------------

def samplics_loop(study: Path, calls: int = 60, seed: int = 2) -> tuple[float, int, float]:
    """Median seconds per samplics call (one wave x metric x split, domain estimation), the
    number of calls the whole study needs, and the largest difference from the tool on the
    sampled calls."""
    import warnings

    warnings.simplefilter("ignore")
    from samplics import PopParam, TaylorEstimator

    from tracker import Study

    s = Study(study)
    waves = s.labels
    metrics = list(s.codebook.metrics)
    groups = list(s.codebook.groups)
    est = s.estimates()
    rng = np.random.default_rng(seed)
    times, worst = [], 0.0
    for _ in range(calls):
        lab, m, g = waves[rng.integers(len(waves))], rng.integers(len(metrics)), groups[rng.integers(len(groups))]
        t = s.load(lab)
        x = t[f"q{m}"].to_numpy()
        keep = x != MISSING
        y = ((x >= 4) & (x <= 5)).astype(float)[keep]
        t0 = time.perf_counter()
        te = TaylorEstimator(PopParam.mean)  # a share is the mean of a 0/1 answer
        te.estimate(y=y, samp_weight=t["w"].to_numpy()[keep], stratum=t["s"].to_numpy()[keep],
                    psu=t["c"].to_numpy()[keep], domain=t[g].to_numpy()[keep], remove_nan=True)
        times.append(time.perf_counter() - t0)
        mine = est[(est["wave"] == lab) & (est["metric"] == f"m{m}") & (est["group"] == g)]
        for _, r in mine.iterrows():
            code = float("abcd".index(r["subgroup"]) + 1)
            worst = max(worst, abs(te.stderror[code] - r["se"]))
    total_calls = len(waves) * len(metrics) * (len(groups) + 1)
    return statistics.median(times), total_calls, worst


# -- processes --------------------------------------------------------------------------------------

def run_cli(args: list[str], env: dict | None = None) -> tuple[float, float]:
    """(wall seconds, peak memory in MB) of one fresh ``tracker`` process."""
    probe = ("import resource, subprocess, sys, time; t = time.perf_counter(); "
             "subprocess.run(sys.argv[1:], check=True, stdout=subprocess.DEVNULL); "
             "print(time.perf_counter() - t, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    out = subprocess.run([sys.executable, "-c", probe, sys.executable, "-m", "tracker", *args],
                         check=True, capture_output=True, text=True, env=env).stdout.split()
    return float(out[0]), float(out[1]) / 1024


def run_python(code: str) -> tuple[float, float, str]:
    """(wall seconds, peak memory in MB, printed text) of a fresh Python process running ``code``
    (the script's folder importable)."""
    probe = ("import resource, subprocess, sys, time; t = time.perf_counter(); "
             "r = subprocess.run(sys.argv[1:], check=True, capture_output=True, text=True); "
             "print(time.perf_counter() - t, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss); print(r.stdout)")
    here = str(Path(__file__).resolve().parent)
    out = subprocess.run([sys.executable, "-c", probe, sys.executable, "-c",
                          f"import sys; sys.path.insert(0, {here!r}); " + code],
                         check=True, capture_output=True, text=True).stdout
    first, _, rest = out.partition("\n")
    sec, kb = first.split()
    return float(sec), float(kb) / 1024, rest.strip()


def median_cli(args: list[str], runs: int = 3) -> tuple[float, float]:
    got = [run_cli(args) for _ in range(runs)]
    return statistics.median(g[0] for g in got), max(g[1] for g in got)


def clear_cache(study: Path) -> None:
    import shutil

    shutil.rmtree(study / "cache", ignore_errors=True)


# -- the parts ---------------------------------------------------------------------------------------

def part_clustered(tmp: Path, rows: list, quick: bool) -> None:
    from tracker import Study

    t = time.perf_counter()
    study = build(tmp / "clustered")
    built = time.perf_counter() - t
    rows.append(("clustered study: add of each of 24 waves (mean)", f"{built / 24:.2f} s", ""))
    labels = Study(study).labels

    floor_times = []
    for _ in range(3):
        t = time.perf_counter()
        floor = floor_study(study, labels)
        floor_times.append(time.perf_counter() - t)
    floor_t = statistics.median(floor_times)
    rows.append(("floor: values and SEs of all 50,400 cells (numpy, read included)", f"{floor_t:.2f} s", ""))

    api = []
    for _ in range(3):
        clear_cache(study)
        t = time.perf_counter()
        est = Study(study).estimates()
        api.append(time.perf_counter() - t)
    api_t = statistics.median(api)
    gap = agreement(est, floor)
    rows.append(("tool API, Study(...).estimates(), no cache", f"{api_t:.2f} s",
                 f"{api_t / floor_t:.1f}x the floor; largest difference {gap:.1e}"))
    if gap > 1e-12:
        raise SystemExit(f"the tool and the floor differ by {gap:g}")
    t = time.perf_counter()
    Study(study).estimates()
    rows.append(("tool API, estimates() from the per-wave cache", f"{time.perf_counter() - t:.2f} s", ""))

    per_call, calls, worst = samplics_loop(study, calls=20 if quick else 60)
    rows.append(("samplics per-split loop (EXTRAPOLATED from sampled calls)", f"{per_call * calls:.0f} s",
                 f"{calls:,} calls x {per_call * 1000:.0f} ms; SE agrees to {worst:.1e}"))

    clear_cache(study)
    for name, args in [
        ("cli: estimates (first run, builds the cache)", ["estimates", str(study), "--format", "csv"]),
        ("cli: estimates (all cells, csv)", ["estimates", str(study), "--format", "csv"]),
        ("cli: estimates (terminal view)", ["estimates", str(study)]),
        ("cli: changes", ["changes", str(study)]),
        ("cli: trends", ["trends", str(study), "--format", "csv"]),
        ("cli: brief -o x.html", ["brief", str(study), "-o", str(tmp / "x.html")]),
        ("cli: brief -o x.xlsx (the client workbook)", ["brief", str(study), "-o", str(tmp / "x.xlsx")]),
        ("cli: brief -o x.pptx (the slide deck)", ["brief", str(study), "-o", str(tmp / "x.pptx")]),
    ]:
        sec, mb = run_cli(args) if "first" in name else median_cli(args, 1 if quick else 3)
        rows.append((name, f"{sec:.2f} s", f"peak {mb:,.0f} MB"))

    beside(study, rows, quick)

    checked, hashed = [], []
    for _ in range(7):  # alternating, so that the machine's drift falls on both alike
        checked.append(run_cli(["changes", str(study)])[0])
        (study / "cache" / "hashed.json").unlink(missing_ok=True)  # every stored file's SHA-256 again
        hashed.append(run_cli(["changes", str(study)])[0])
    changes_t, again = statistics.median(checked), statistics.median(hashed)
    rows.append(("cli: changes, every stored file hashed again", f"{again:.2f} s",
                 f"+{100 * (again / changes_t - 1):.0f} % on the checked-once run ({changes_t:.2f} s)"))

    n0 = len(labels)
    rng = np.random.default_rng(99)
    path = tmp / "extra.parquet"
    make_wave(rng, 99, 2000, 100, 5, 10, 200).to_parquet(path)
    sec, mb = run_cli(["add", str(study), str(path), "--wave", "X1", "--date", "2030-01-15", "-q"])
    rows.append((f"cli: add a 2,000-row wave to {n0} stored", f"{sec:.2f} s", f"peak {mb:,.0f} MB"))


def beside(study: Path, rows: list, quick: bool) -> None:
    """The analyses beside the trend on the clustered study: the within-wave comparisons of one
    wave over every split against `changes`, every code of a question, and a driver analysis
    of one headline over 10 attributes pooled over 8 waves."""
    runs = 1 if quick else 3
    changes_t, _ = median_cli(["changes", str(study), "--format", "csv"], runs)
    gaps_t, mb = median_cli(["gaps", str(study), "--all", "--format", "csv"], runs)
    rows.append(("cli: gaps (one wave, 100 metrics x 5 splits: 5,500 tests)", f"{gaps_t:.2f} s",
                 f"{gaps_t / changes_t:.2f}x changes --format csv ({changes_t:.2f} s); target 2x; peak {mb:,.0f} MB"))
    sec, mb = median_cli(["answers", str(study), "q0", "--format", "csv"], runs)
    rows.append(("cli: answers of one question (24 waves, every split)", f"{sec:.2f} s", f"peak {mb:,.0f} MB"))
    attrs = " ".join(f"--attribute m{k}" for k in range(1, 11))
    sec, mb = median_cli(["drivers", str(study), "--headline", "m0", *attrs.split(), "--last", "8"], runs)
    rows.append(("cli: drivers, 1 headline x 10 attributes x 8 waves", f"{sec:.2f} s",
                 f"target 5 s; delete-one-cluster jackknife over 1,600 clusters; peak {mb:,.0f} MB"))


def part_million(tmp: Path, rows: list) -> None:
    from tracker import Study

    root = tmp / "million"
    empty_study(root, 20, 3)
    path = root / "big.parquet"
    make_wave(np.random.default_rng(5), 0, 1_000_000, 20, 3, 10, 200).to_parquet(path)
    sec, mb = run_cli(["add", str(root / "study"), str(path), "--wave", "W000", "--date", "2000-01-15", "-q"])
    rows.append(("1,000,000 respondents: cli add", f"{sec:.1f} s", f"peak {mb:,.0f} MB"))
    st = str(root / "study")
    f_sec, f_mb, _ = run_python(f"import benchmark as b; b.floor_study(__import__('pathlib').Path({st!r}), ['W000'])")
    rows.append(("1,000,000 respondents: floor (fresh process)", f"{f_sec:.1f} s", f"peak {f_mb:,.0f} MB"))
    clear_cache(root / "study")
    a_sec, a_mb, _ = run_python(f"from tracker import Study; Study({st!r}).estimates()")
    rows.append(("1,000,000 respondents: tool API, no cache (fresh process)", f"{a_sec:.1f} s",
                 f"{a_sec / f_sec:.1f}x the floor's time, {a_mb / f_mb:.1f}x its peak memory ({a_mb:,.0f} MB)"))
    floor = floor_study(root / "study", ["W000"])
    est = Study(root / "study").estimates()
    rows.append(("1,000,000 respondents: tool against the floor", f"{agreement(est, floor):.1e}", "largest difference"))
    clear_cache(root / "study")
    for name in ("first run", "from the cache"):
        sec, mb = run_cli(["estimates", st, "--format", "csv"])
        rows.append((f"1,000,000 respondents: cli estimates ({name})", f"{sec:.1f} s", f"peak {mb:,.0f} MB"))
    clear_cache(root / "study")
    sec, mb = run_cli(["prepare", st, "--engine", "duckdb", "-q"])
    rows.append(("1,000,000 respondents: prepare --engine duckdb", f"{sec:.1f} s", f"peak {mb:,.0f} MB"))


def part_intake(tmp: Path, rows: list) -> None:
    """`tracker add` of a 1,000,000-row wave (30 share metrics, 3 splits, 10 strata x 200
    clusters) as CSV and as Parquet, side by side with the floor: pyarrow reading the CSV and
    the plain numpy pass of :func:`floor_wave` computing every cell's value and SE. Memory
    is set against the harmonized table's size in memory (pandas' deep memory usage)."""
    from tracker import Study

    root = tmp / "intake"
    empty_study(root, 30, 3)
    frame = make_wave(np.random.default_rng(5), 0, 1_000_000, 30, 3, 10, 200)
    csv, parquet = root / "big.csv", root / "big.parquet"
    frame.to_csv(csv, index=False)
    frame.to_parquet(parquet)
    del frame
    f_sec, f_mb, _ = run_python(
        "import benchmark as b, pyarrow.csv as c; t = c.read_csv(" + repr(str(csv)) + ").to_pandas(); "
        "b.floor_wave(t, [x for x in t.columns if x.startswith('q')], [x for x in t.columns if x.startswith('g')])")
    rows.append(("1,000,000 x 30 metrics: floor (pyarrow reads the CSV, numpy computes)", f"{f_sec:.1f} s",
                 f"peak {f_mb:,.0f} MB"))
    for name, path in (("CSV", csv), ("Parquet", parquet)):
        study = root / f"study_{name}"
        Study.create(study, root / "codebook.yaml")
        sec, mb = run_cli(["add", str(study), str(path), "--wave", "W000", "--date", "2000-01-15", "-q"])
        if name == "CSV":
            ledger = json.loads((study / "ledger.json").read_text())
            table_mb = pd.read_parquet(study / ledger["waves"][0]["file"]).memory_usage(deep=True).sum() / 1e6
        note = (f"{sec / f_sec:.2f}x the floor's time; peak {mb:,.0f} MB = 2 x the table ({table_mb:,.0f} MB) "
                f"+ {mb - 2 * table_mb:,.0f} MB")
        rows.append((f"1,000,000 x 30 metrics: cli add ({name})", f"{sec:.1f} s", note))


def part_cost(rows: list) -> None:
    """How one wave's statistics cost grows with respondents, metrics and splits (the
    computation alone, on tables in memory); waves add their costs one by one."""
    from tracker.codebook import parse_codebook
    from tracker.estimates import cell_arrays

    def timed(n, metrics, groups):
        book = parse_codebook(codebook_text(metrics, groups))
        table = make_wave(np.random.default_rng(3), 0, n, metrics, groups, 10, 200)
        for col in ("w", *[f"g{g}" for g in range(groups)], *[f"q{m}" for m in range(metrics)]):
            table[col] = table[col].astype(float)
        best = []
        for _ in range(3):
            t = time.perf_counter()
            cell_arrays(book, table, list(book.metrics.values()), list(book.groups), keep_psu=True)
            best.append(time.perf_counter() - t)
        return min(best)

    base = timed(2000, 100, 5)
    rows.append(("one wave's statistics, 2,000 x 100 metrics x 5 splits (in memory)", f"{base * 1000:.0f} ms", "1.0x"))
    for label, args in [("respondents 8,000", (8000, 100, 5)), ("respondents 32,000", (32000, 100, 5)),
                        ("metrics 400", (2000, 400, 5)), ("splits 20 (81 levels)", (2000, 100, 20))]:
        sec = timed(*args)
        rows.append((f"  same with {label}", f"{sec * 1000:.0f} ms", f"{sec / base:.1f}x"))


def part_ten_million(tmp: Path, rows: list) -> None:
    """A continuous tracker: 10 waves of 1,000,000 respondents (20 metrics, 3 splits, 10
    strata, 200 clusters): its statistics by DuckDB in this process and on 2 local
    workers, then the everyday commands from the cache."""
    root = tmp / "ten"
    empty_study(root, 20, 3)
    rng = np.random.default_rng(11)
    for k in range(10):
        path = root / "w.parquet"
        make_wave(rng, k, 1_000_000, 20, 3, 10, 200).to_parquet(path)
        run_cli(["add", str(root / "study"), str(path), "--wave", label(k), "--date", date(k), "-q"])
    study = str(root / "study")
    for name, args in [("pandas engine, in this process", ["--engine", "pandas"]),
                       ("DuckDB engine, in this process", ["--engine", "duckdb"]),
                       ("DuckDB engine, 2 local Dask workers", ["--engine", "duckdb", "--workers", "2"])]:
        clear_cache(root / "study")
        sec, mb = run_cli(["prepare", study, "-q", *args])
        rows.append((f"10,000,000 respondents: prepare, {name}", f"{sec:.1f} s", f"peak {mb:,.0f} MB (this process)"))
    for name, args in [("estimates", ["estimates", study, "--format", "csv"]), ("changes", ["changes", study]),
                       ("trends", ["trends", study])]:
        sec, mb = run_cli(args)
        rows.append((f"10,000,000 respondents: {name} from the cache", f"{sec:.2f} s", f"peak {mb:,.0f} MB"))


def part_growth(tmp: Path, rows: list) -> None:
    root = tmp / "growth"
    study = empty_study(root, 100, 5)
    rng = np.random.default_rng(7)
    for k in range(61):
        path = root / "w.parquet"
        make_wave(rng, k, 2000, 100, 5, 10, 200).to_parquet(path)
        if k in (4, 24, 60):
            sec, mb = run_cli(["add", str(root / "study"), str(path), "--wave", label(k), "--date", date(k), "-q"])
            rows.append((f"cli add with {k} waves stored", f"{sec:.2f} s", f"peak {mb:,.0f} MB"))
        else:
            study.add(path, label(k), date(k))


def part_wide_header(tmp: Path, rows: list) -> None:
    """`check` of a wave whose header holds 20,000, 40,000 and 80,000 columns the codebook does
    not know (50 respondents): the time should grow in proportion to the columns."""
    root = tmp / "wide"
    empty_study(root, 10, 2)
    for k in (20_000, 40_000, 80_000):
        frame = make_wave(np.random.default_rng(3), 0, 50, 10, 2, 10, 5)
        extra = pd.DataFrame(np.zeros((50, k), dtype=np.int8), columns=[f"extra_{i}" for i in range(k)])
        path = root / f"w{k}.csv"
        pd.concat([frame, extra], axis=1).to_csv(path, index=False)
        sec, mb = run_cli(["check", str(root / "study"), str(path)])
        rows.append((f"cli check of a header of {k:,} columns", f"{sec:.2f} s", f"peak {mb:,.0f} MB"))


def part_seasons(rows: list) -> None:
    """The cost of the codebook's seasons: 12 on trends, expected ranges and the smoother: 3,000
    monthly series (metric x subgroup) of 24 waves, the library functions timed with and
    without the key (median of 3 runs)."""
    from tracker.expected import predict
    from tracker.smoothing import smooth_estimates
    from tracker.trends import fit_trends

    rng = np.random.default_rng(5)
    S, K = 3000, 24
    dates = [f"{2024 + i // 12}-{i % 12 + 1:02d}-15" for i in range(K)]
    y = 0.6 + 0.03 * np.sin(2 * np.pi * np.arange(K) / 12)[None] + rng.normal(0, 0.02, (S, K))
    est = pd.DataFrame({"metric": np.repeat([f"m{i}" for i in range(S)], K), "metric_label": "m", "kind": "share",
                        "group": "total", "subgroup": "Total", "wave": np.tile([f"W{i:02d}" for i in range(K)], S),
                        "fieldwork_date": np.tile(dates, S), "value": y.ravel(), "se": 0.016, "reliable": True,
                        "base": 1000, "effective_base": 900.0})

    def timed(fn) -> float:
        times = []
        for _ in range(3):
            t = time.perf_counter()
            fn()
            times.append(time.perf_counter() - t)
        return float(np.median(times))

    pats = fit_trends(est)
    for what, fn in (("trends", lambda c: fit_trends(est, cycle=c)),
                     ("expected ranges", lambda c: predict(est, pats, "2026-01-15", cycle=c)),
                     ("smoother", lambda c: smooth_estimates(est, {}, 0.95, c))):
        plain, seasonal = timed(lambda: fn(None)), timed(lambda: fn(12))
        rows.append((f"{what} of {S:,} monthly series of {K} waves, seasons: 12", f"{seasonal:.2f} s",
                     f"{plain:.2f} s without the key ({seasonal / plain:.1f}x)"))


class Rows(list):
    """The result rows, each printed as it comes (the whole run takes a while)."""

    def append(self, row) -> None:
        super().append(row)
        print(f"| {row[0]} | {row[1]} | {row[2]} |", flush=True)


def machine() -> str:
    try:
        info = np.show_config(mode="dicts")["Build Dependencies"]["blas"]
        blas = f"{info['name']} {info.get('version', '')}".strip()
    except Exception:  # older numpy: no dict form
        blas = "BLAS not reported"
    blas += f", {os.environ.get('OPENBLAS_NUM_THREADS', 'default')} BLAS thread(s)"
    return (f"{os.cpu_count()} cores, {platform.machine()}, Python {platform.python_version()}, "
            f"numpy {np.__version__}, {blas}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="the clustered study only")
    ap.add_argument("--ten-million", action="store_true", help="also the 10,000,000-respondent study (scale extra)")
    ap.add_argument("--wide-header", action="store_true", help="only the check of headers of 20,000 to 80,000 columns")
    ap.add_argument("--intake", action="store_true", help="only the add of a 1,000,000-row wave against its floor")
    ap.add_argument("--seasons", action="store_true", help="only the cost of the seasons key (library functions)")
    args = ap.parse_args()
    print(f"machine: {machine()}; {time.strftime('%Y-%m-%d')}")
    print("| measurement | time | note |\n|---|---|---|", flush=True)
    rows = Rows()
    with tempfile.TemporaryDirectory() as tmp:
        if args.wide_header:
            part_wide_header(Path(tmp), rows)
            return
        if args.intake:
            part_intake(Path(tmp), rows)
            return
        if args.seasons:
            part_seasons(rows)
            return
        part_clustered(Path(tmp), rows, args.quick)
        if not args.quick:
            part_cost(rows)
            part_million(Path(tmp), rows)
            part_intake(Path(tmp), rows)
            part_growth(Path(tmp), rows)
            part_wide_header(Path(tmp), rows)
            part_seasons(rows)
            if args.ten_million:
                part_ten_million(Path(tmp), rows)


if __name__ == "__main__":
    main()
