"""Past one machine: per-wave statistics by DuckDB straight from the stored Parquet, and the
per-wave work spread over a Dask cluster (the optional extra ``pip install '.[scale]'``).

A wave's sufficient statistics reduce its rows to sums per cluster (or per stratum when
each respondent is its own cluster), subgroup level and metric; every wave is independent
of the others. :func:`duckdb_cells` computes those sums with one SQL query per wave over
the Parquet file (DuckDB streams it, so a wave larger than memory is no problem) and
finishes them with the same functions as the in-process path
(:func:`tracker.estimates.clustered_from_totals`, :func:`tracker.estimates.unclustered_from_sums`);
the metric kinds say how a respondent contributes in SQL (:meth:`tracker.kinds.Kind.sql`).
:func:`prepare` fills the study's cache (tracker.cache) for every wave, in this process,
on local worker processes or on a Dask scheduler. Results equal the in-process path to
1e-12 (tests/test_scale.py).
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import pairwise
from pathlib import Path

import numpy as np
import pandas as pd

from .codebook import Codebook
from .errors import TrackerError
from .estimates import SEP, CellArrays, clustered_from_totals, fpc_factor, unclustered_from_sums
from .kinds import KINDS
from .methods.variance import SingleClusterError

__all__ = ["ENGINES", "PrepareReport", "duckdb_cells", "prepare", "wave_task"]

#: How the per-wave statistics are computed: in this process from the wave loaded into
#: pandas (the default), or by DuckDB from the Parquet file.
ENGINES = ("pandas", "duckdb")


def _need(module: str):
    from importlib import import_module

    try:
        return import_module(module)
    except ImportError:
        raise TrackerError(f"this needs the optional extra: pip install 'wavetell[scale]' ({module} is not "
                           f"installed)") from None


# -- SQL --------------------------------------------------------------------------------------

def _q(name: str) -> str:
    return '"' + str(name).replace('"', '""') + '"'


def _num(col: str) -> str:
    return f"CAST({_q(col)} AS DOUBLE)"


def _lit(values) -> str:
    return ", ".join(repr(float(v)) for v in values)


def _valid(x: str, missing) -> str:
    # DuckDB orders NaN above every number and calls NaN = NaN true: NaN is ruled out first
    out = f"({x} IS NOT NULL AND NOT isnan({x})"
    return out + (f" AND {x} NOT IN ({_lit(missing)}))" if missing else ")")


def _codes_mask(book: Codebook, columns: set[str], variable: str, codes) -> tuple[str, str]:
    """SQL for (holds one of codes, has an answer), as tracker.cells._codes_mask."""
    var = book.variables[variable]
    if var.type == "multi":
        if not all(o in columns for o in var.options):
            return "FALSE", "FALSE"
        answered = "NOT (" + " AND ".join(f"({_num(o)} IS NULL OR isnan({_num(o)}))" for o in var.options) + ")"
        chosen = [f"COALESCE(CASE WHEN isnan({_num(c)}) THEN NULL ELSE {_num(c)} END, 0.0)" for c in codes]
        held = f"(GREATEST({', '.join(chosen)}) = 1)" if chosen else "FALSE"
        return held, answered
    if variable not in columns:
        return "FALSE", "FALSE"
    x = _num(variable)
    answered = _valid(x, var.missing)
    return (f"({x} IN ({_lit(codes)}) AND {answered})" if codes else "FALSE"), answered


def _metric_sql(book: Codebook, columns: set[str], metric) -> tuple[str, str]:
    """(value contributed, in the base) of one metric, as tracker.cells.metric_matrix."""
    var = book.variables[metric.variable]

    def numeric():
        if metric.variable not in columns:
            return "0.0", "FALSE"
        x = _num(metric.variable)
        return x, _valid(x, var.missing)

    y, answered = KINDS[metric.kind].sql(lambda codes: _codes_mask(book, columns, metric.variable, codes),
                                         numeric, metric)
    if metric.base_variable:
        inbase, _ = _codes_mask(book, columns, metric.base_variable, metric.base_codes)
        answered = f"({answered} AND {inbase})"
    return y, answered


def _levels_sql(book: Codebook, columns: set[str], groups: list[str]) -> tuple[list[str], list[str], list[str]]:
    """(group, level, membership condition) of every subgroup level, total excluded."""
    gnames, lnames, conds = [], [], []
    for gname in groups:
        g = book.groups[gname]
        x = _num(g.variable)
        for label, codes in g.levels.items():
            if g.variable not in columns:
                cond = "FALSE"
            elif g.bands is not None:
                lo, hi = g.bands[label]
                cond = f"COALESCE(NOT isnan({x}) AND {x} >= {float(lo)!r} AND {x} <= {float(hi)!r}, FALSE)"
            else:
                cond = f"COALESCE({x} IN ({_lit(codes)}), FALSE)" if codes else "FALSE"
            gnames.append(gname)
            lnames.append(label)
            conds.append(cond)
    return gnames, lnames, conds


def _exclusive(book: Codebook, groups: list[str]) -> bool:
    """Whether no respondent can sit in two levels of one split (codes disjoint, bands apart)."""
    for gname in groups:
        g = book.groups[gname]
        if g.bands is not None:
            spans = sorted(g.bands.values())
            if any(lo2 <= hi1 for (_, hi1), (lo2, _) in pairwise(spans)):
                return False
        else:
            codes = [c for cs in g.levels.values() for c in cs]
            if len(codes) != len(set(codes)):
                return False
    return True


def duckdb_cells(book: Codebook, path: str | Path, keep_psu: bool = False, threads: int | None = None) -> CellArrays:
    """Every cell's statistics of one stored wave (all metrics, every split) by DuckDB,
    without loading the wave: one query sums each metric's base, weights, weighted values
    and the squares the variance needs, per cluster (or stratum) and combination of the
    splits' levels (or, when a split's levels overlap, per grouping set of each level);
    the small result is added up to every cell and finished in numpy. The same numbers as
    :func:`tracker.estimates.cell_arrays` up to rounding."""
    duckdb = _need("duckdb")
    import pyarrow.parquet as pq

    path = Path(path)
    columns = set(pq.read_schema(path).names)
    metrics = list(book.metrics.values())
    groups = list(book.groups)
    gnames, lnames, conds = _levels_sql(book, columns, groups)
    strata = book.strata if book.strata and book.strata in columns else None
    clusters = book.clusters if book.clusters and book.clusters in columns else None
    sql, exclusive, starts = _cells_sql(book, columns, metrics, groups, gnames, conds, strata, clusters)
    con = duckdb.connect(config={"threads": threads} if threads else {})
    try:
        got = con.execute(sql, [str(path)]).fetchnumpy()
    finally:
        con.close()
    got = {k: (v.filled(np.nan) if np.ma.isMaskedArray(v) and v.dtype.kind == "f" else v) for k, v in got.items()}
    rows = len(got["n_rows"])
    if exclusive:  # every row counts in the total and in its level of each split
        pairs = [(np.arange(rows), np.zeros(rows, dtype=np.int64))]
        for k, g in enumerate(groups):
            pos = np.asarray(np.ma.getdata(got[f"k{k}"]), dtype=np.int64)
            inside = np.flatnonzero(pos > 0)
            pairs.append((inside, starts.get(g, 0) + pos[inside]))  # level j sits at j + 1 (the total first)
    else:
        pairs = _set_pairs(got, rows, len(conds))
    return _finish(book, metrics, gnames, lnames, got, pairs, len(conds), strata, clusters, keep_psu)


def _cells_sql(book: Codebook, columns: set[str], metrics: list, groups: list[str], gnames: list[str],
               conds: list[str], strata: str | None, clusters: str | None) -> tuple[str, bool, dict[str, int]]:
    """The one query of a wave's cell sums: (SQL, whether each split is one column of level
    positions, the first level of each split). Each metric's base, weights, weighted values
    and the squares the variance needs, per cluster (or stratum) and combination of the
    splits' levels, or, when a split's levels overlap, per grouping set of each level."""
    w = _num(book.weight) if book.weight and book.weight in columns else "1.0"
    inner = [f"{'CAST(' + _q(strata) + ' AS VARCHAR)' if strata else chr(39) * 2} AS s_",
             f"{'CAST(' + _q(clusters) + ' AS VARCHAR)' if clusters else 'NULL'} AS c_", f"{w} AS w_"]
    exclusive = _exclusive(book, groups)
    starts: dict[str, int] = {}
    if exclusive:  # one column per split: the position of the respondent's level in it (0: none)
        for j, g in enumerate(gnames):
            starts.setdefault(g, j)
        for k, g in enumerate(groups):
            whens = " ".join(f"WHEN {conds[j]} THEN {j - starts[g] + 1}" for j in range(len(conds))
                             if gnames[j] == g)
            inner.append(f"(CASE {whens} ELSE 0 END) AS k{k}" if whens else f"0 AS k{k}")
    else:
        inner += [f"{c} AS l{j}" for j, c in enumerate(conds)]
    for j, m in enumerate(metrics):
        y, e = _metric_sql(book, columns, m)
        inner += [f"CAST({e} AS DOUBLE) AS e{j}", f"(CASE WHEN {e} THEN {y} ELSE 0.0 END) AS y{j}"]
    sums = ["COUNT(*) AS n_rows"]
    for j in range(len(metrics)):
        sums += [f"SUM(e{j}) AS cnt_{j}", f"SUM(w_ * e{j}) AS we_{j}", f"SUM(w_ * y{j}) AS wey_{j}",
                 f"SUM(w_ * w_ * e{j}) AS w2e_{j}", f"SUM(w_ * y{j} * y{j}) AS wey2_{j}"]
        if not clusters:
            sums += [f"SUM(w_ * w_ * y{j}) AS w2ey_{j}", f"SUM(w_ * w_ * y{j} * y{j}) AS w2ey2_{j}"]
    unit = "s_, c_" if clusters else "s_"
    source = f"(SELECT {', '.join(inner)} FROM read_parquet(?))"
    if exclusive:
        keys = ", ".join([unit] + [f"k{k}" for k in range(len(groups))])
        return f"SELECT {keys}, {', '.join(sums)} FROM {source} GROUP BY {keys}", exclusive, starts
    sets = [f"({unit})"] + [f"({unit}, l{j})" for j in range(len(conds))]
    levels_out = ", ".join(f"l{j}" for j in range(len(conds)))
    return (f"SELECT {unit}{', ' + levels_out if conds else ''}, {', '.join(sums)} FROM {source} "
            f"GROUP BY GROUPING SETS ({', '.join(sets)})"), exclusive, starts


def _set_pairs(got, rows: int, n_levels: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """(rows, level) of a GROUPING SETS result: in level j's set its flag is true or false,
    elsewhere NULL; the total's set has every flag NULL."""
    level = np.full(rows, -1)
    grouped = np.zeros(rows, bool)
    for j in range(n_levels):
        col = got[f"l{j}"]
        present = ~np.ma.getmaskarray(col) if np.ma.isMaskedArray(col) else np.ones(rows, bool)
        member = present & np.asarray(np.ma.getdata(col), bool)
        level[member] = j + 1
        grouped |= present
    level[~grouped] = 0
    keep = np.flatnonzero(level >= 0)
    return [(keep, level[keep])]


def _finish(book, metrics, gnames, lnames, got, pairs, n_levels, strata, clusters, keep_psu) -> CellArrays:
    L, M = 1 + n_levels, len(metrics)
    s_lab = np.asarray(np.ma.getdata(got["s_"]), dtype=object).astype(str)
    if clusters:
        c_lab = np.asarray(np.ma.getdata(got["c_"]), dtype=object).astype(str)
        names = np.char.add(np.char.add(s_lab, SEP), c_lab) if strata else c_lab.astype(str)
    else:
        names = s_lab
    rows_all = np.concatenate([r for r, _ in pairs])
    lev_all = np.concatenate([lv for _, lv in pairs])
    used = np.unique(rows_all)
    unit_of_row = np.full(len(names), -1, dtype=np.int64)
    unit_codes, unit_names = pd.factorize(pd.Series(names[used]))
    unit_of_row[used] = unit_codes
    U = len(unit_names)
    flat = unit_of_row[rows_all] * L + lev_all

    def cube(prefix):  # every cell's sums per unit: the result's rows added up by (unit, level)
        out = np.zeros((U, L, M))
        for j in range(M):
            vals = np.nan_to_num(np.asarray(got[f"{prefix}_{j}"], float))[rows_all]
            out[:, :, j] = np.bincount(flat, weights=vals, minlength=U * L).reshape(U, L)
        return out

    cnt, we, wey, w2e, wey2 = (cube(p) for p in ("cnt", "we", "wey", "w2e", "wey2"))
    n, sw, sw2, swy, swy2 = (a.sum(axis=0) for a in (cnt, we, w2e, wey, wey2))
    with np.errstate(divide="ignore", invalid="ignore"):
        value = swy / sw
        unit_var = np.maximum(swy2 / sw - value**2, 0.0)
    first = np.zeros(U, dtype=np.int64)
    first[unit_codes[::-1]] = used[::-1]
    unit_stratum = pd.factorize(pd.Series(s_lab[first]))[0] if U else np.zeros(0, dtype=np.int64)
    n_strata = int(unit_stratum.max()) + 1 if U else 1
    rule = book.single_cluster_rule
    psu = psu_names = None
    stratum_labels = pd.unique(s_lab[first]) if U else np.zeros(0, dtype=str)  # in unit_stratum's order
    try:
        if clusters:
            fpc = _fpc(book, stratum_labels, np.bincount(unit_stratum, minlength=n_strata))
            var, n_psu, df, totals = clustered_from_totals(wey, we, cnt > 0, value, sw, unit_stratum, n_strata, rule,
                                                           fpc)
            if keep_psu:
                psu, psu_names = totals, np.asarray(unit_names, dtype=str)
        else:
            total_rows = lev_all == 0
            n_h = np.bincount(unit_of_row[rows_all[total_rows]],
                              weights=np.asarray(got["n_rows"], float)[rows_all[total_rows]], minlength=U)
            held = cnt > 0  # strata x levels x metrics
            w2ey, w2ey2 = cube("w2ey"), cube("w2ey2")
            var, n_psu, df = unclustered_from_sums(wey, we, w2ey2, w2ey, w2e, held, n, value, sw,
                                                   n_h.astype(np.int64), rule,
                                                   _fpc(book, np.asarray(unit_names, dtype=str), n_h))
    except SingleClusterError as exc:
        where = np.asarray(unit_names if not clusters else pd.unique(s_lab[first]), dtype=str)
        raise TrackerError(f"strata {', '.join(map(str, where[exc.strata][:10]))} hold a single cluster, and the "
                           f"codebook says single_cluster_strata: refuse (see docs/codebook.md for the other "
                           f"rules)") from None
    with np.errstate(divide="ignore", invalid="ignore"):
        cap = sw * sw / sw2  # the Kish base (raked studies are refused by this engine)
    stats = {"base": n, "weighted_base": sw, "sum_w2": sw2, "value": value, "variance": var,
             "unit_variance": unit_var, "n_psu": np.asarray(n_psu, float), "design_df": np.asarray(df, float),
             "base_cap": cap}
    return CellArrays(tuple(m.name for m in metrics), ("total", *gnames), ("Total", *lnames), stats, psu, psu_names)


def _fpc(book: Codebook, stratum_labels: np.ndarray, n_h: np.ndarray) -> np.ndarray | None:
    """Each stratum's 1 - f_h from the codebook's population (as tracker.estimates.population_of
    and fpc_factor for the rows in memory), or None when it declares none."""
    if book.population is None:
        return None
    from .codebook import stratum_key

    keys = [stratum_key(x) for x in stratum_labels]
    missing = [k for k in keys if k not in book.population]
    if missing:
        raise TrackerError(f"codebook: population: no number for stratum {', '.join(missing[:5])}")
    return fpc_factor(np.array([book.population[k] for k in keys], float), np.arange(len(keys)), n_h)


def id_hashes(book: Codebook, path: str | Path, batch: int = 1_000_000) -> np.ndarray | None:
    """The 64-bit hashes of a stored wave's respondent ids (as tracker.study hashes them),
    read one column in batches."""
    import pyarrow.parquet as pq

    f = pq.ParquetFile(path)
    if not book.id or book.id not in f.schema_arrow.names:
        return None
    from .cache import hash_ids

    parts = [hash_ids(b.column(0).to_pandas()) for b in f.iter_batches(columns=[book.id], batch_size=batch)]
    return np.concatenate(parts) if parts else np.zeros(0, np.uint64)


# -- spreading the waves ----------------------------------------------------------------------

def wave_task(root: str, label: str, engine: str = "pandas", threads: int | None = 1):
    """One wave's (label, cache key, cell arrays, id hashes), computed where this runs (a
    worker needs the study folder at the same path; ``threads`` for DuckDB: one per worker
    process, all cores in this one)."""
    from .study import Study

    study = Study(root)
    book = study.codebook
    key = study.cellstore.key(label)
    if engine == "duckdb":
        path = study.stored_path(label)
        keep = bool(book.clusters and book.waves_share_clusters)
        return label, key, duckdb_cells(book, path, keep_psu=keep, threads=threads), id_hashes(book, path)
    return (label, key, *study.cellstore.compute(study.load(label)))


@dataclass(frozen=True)
class PrepareReport:
    """What ``prepare`` did: the waves computed, the waves already up to date, and where."""

    computed: tuple[str, ...]
    current: tuple[str, ...]
    engine: str
    where: str

    def lines(self) -> list[str]:
        return [(f"computed the statistics of {len(self.computed)} wave(s) ({self.engine}, {self.where}); "
                f"{len(self.current)} already up to date")]


def _engine_fits(study, engine: str) -> None:
    """Refuse an engine that does not compute what the study's design needs."""
    if engine not in ENGINES:
        raise TrackerError(f"engine {engine}: use one of {', '.join(ENGINES)}")
    if engine == "duckdb":
        _need("duckdb")
        if study.codebook.replicates is not None:
            raise TrackerError("engine duckdb: it does not compute replicate-weight variances; use the pandas engine")
        if study.codebook.raked_to or any((w.get("weighting") or {}).get("kind") == "raked"
                                          for w in study.wave_entries):
            raise TrackerError("engine duckdb: it does not compute the variance of raked weights yet; use the "
                               "pandas engine, which does")


def prepare(study, engine: str = "pandas", workers: int | None = None, scheduler: str | None = None,
            rebuild: bool = False, waves: list[str] | None = None) -> PrepareReport:
    """Fill the study's cache (tracker.cache) with every wave's statistics: in this process,
    on ``workers`` local processes, or on the Dask cluster at ``scheduler``. The results are
    written here, under the study's lock."""
    from .cache import read_cells, write_cells

    _engine_fits(study, engine)
    if workers is not None and scheduler is not None:
        raise TrackerError("scheduler: give a scheduler or a number of workers, not both")
    if workers is not None and workers < 1:
        raise TrackerError(f"workers {workers}: give 1 or more")
    labels = study.pick_waves(waves)
    todo = [w for w in labels if rebuild or read_cells(study.root, w, study.cellstore.key(w)) is None]
    current = tuple(w for w in labels if w not in todo)
    root = str(study.root.resolve())
    if not todo:
        return PrepareReport((), current, engine, "nothing to do")
    if workers is None and scheduler is None:
        results = [wave_task(root, w, engine, threads=None) for w in todo]
        where = "in this process"
    else:
        _need("distributed")
        from distributed import Client, LocalCluster

        if scheduler:
            try:
                client = Client(scheduler, timeout="20s")
            except (OSError, TimeoutError, ValueError) as exc:  # unreachable, or not an address at all
                raise TrackerError(f"scheduler {scheduler}: cannot reach the Dask scheduler ({exc}); give its "
                                   f"address as tcp://HOST:PORT") from None
            cluster = None
            where = f"on the Dask cluster at {scheduler}"
        else:
            cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None)
            client = Client(cluster)
            where = f"on {workers} local worker process(es)"
        try:
            futures = client.map(wave_task, [root] * len(todo), todo, [engine] * len(todo), pure=False)
            results = client.gather(futures)
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
    for label, key, cells, ids in results:
        if key != study.cellstore.key(label):
            continue  # the wave changed while it was being computed: leave it to the next reader
        write_cells(study.root, label, key, cells, ids)
    study.forget()
    return PrepareReport(tuple(todo), current, engine, where)
