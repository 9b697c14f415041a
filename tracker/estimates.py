"""Estimates: one row per wave x subgroup x metric, from per-cell sufficient statistics.

For every cell (a metric within a subgroup of one wave) this computes the weighted value
(share, mean or balance), the unweighted base, the weighted base, the Kish effective base,
the design-based variance by Taylor linearization with the design's degrees of freedom,
the design effect and design base, an interval and reliability flags. The statistics come
from :mod:`tracker.methods` and the kind rules from :mod:`tracker.kinds`; this module turns
respondent rows into the arrays they take. Work is vectorised over all cells of a wave.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.sparse as sp

from .cells import group_matrix, metric_matrix
from .codebook import Codebook, Metric
from .errors import TrackerError
from .kinds import INTERVALS, KINDS, flag_text
from .methods.bases import design_base, design_effect, kish_base
from .methods.variance import (
    PsuTotals,
    SingleClusterError,
    combine_strata,
    cross_wave_covariance,
    psu_index,
    shared_per_cell,
    single_cluster_strata,
)

__all__ = [
    "COLUMNS",
    "STATS",
    "STATS_VERSION",
    "CellArrays",
    "at_level",
    "cell_arrays",
    "cell_stats",
    "cells_frame",
    "design_of",
    "finish",
    "fpc_factor",
    "population_of",
    "population_problems",
    "single_cluster_lines",
    "wave_covariance",
    "wave_estimates",
    "weights_of",
]

# Columns of the estimates table, in order.
COLUMNS = [
    "wave", "fieldwork_date", "metric", "metric_label", "kind", "group", "subgroup",
    "value", "base", "weighted_base", "effective_base", "design_effect", "design_base",
    "se", "ci_low", "ci_high", "df", "unit_variance", "reliable", "flags",
]

SEP = "\x1f"  # joins stratum and cluster labels into one key


def _codes(values) -> np.ndarray:
    return pd.factorize(pd.Series(values).astype(str))[0]


def weights_of(codebook: Codebook, table: pd.DataFrame) -> np.ndarray:
    """The respondents' weights (1 each when the study has none)."""
    if codebook.weight and codebook.weight in table.columns:
        return table[codebook.weight].to_numpy(float)
    return np.ones(len(table))


def design_labels(codebook: Codebook, table: pd.DataFrame) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(stratum labels, cluster labels) of the respondents as text, None where not declared."""
    def col(name):
        return table[name].astype(str).to_numpy() if name and name in table.columns else None
    return col(codebook.strata), col(codebook.clusters)


def design_of(codebook: Codebook, table: pd.DataFrame) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(stratum codes, PSU codes) of the respondents, None where the study declares none."""
    strata, psu = design_labels(codebook, table)
    return (None if strata is None else _codes(strata)), (None if psu is None else _codes(psu))


#: The column of a stored wave raked by ``add --rake`` that keeps each respondent's weight
#: before the raking (the design weight the calibration-aware variance regresses with).
BASE_WEIGHT = "weight_before_raking"


def calibration_of(codebook: Codebook, table: pd.DataFrame) -> tuple[np.ndarray, np.ndarray] | None:
    """(indicators of the raking margins' levels, respondents x levels; the weights their
    regression uses) when the wave's weights were raked: by ``add --rake`` (to the codebook's
    targets, with the weights before raking kept in BASE_WEIGHT) or before delivery (the
    codebook's ``weights_raked_to``, regressed with the delivered weights: the design weights
    are not known). None for weights taken as fixed."""
    if BASE_WEIGHT in table.columns and codebook.targets:
        groups, d = list(codebook.targets), table[BASE_WEIGHT].to_numpy(float)
        d = np.where(np.isnan(d), weights_of(codebook, table), d)  # pooled with waves not raked
    elif codebook.raked_to:
        groups, d = list(codebook.raked_to), weights_of(codebook, table)
    else:
        return None
    M, _ = group_matrix(codebook, table, groups)
    return M[:, 1:].astype(float), d


def _calibration_correction(cal, D, Ef, EY, w, value, sw, psu_id, P) -> np.ndarray:
    """PSU totals (P x levels x metrics) to take from each cell's linearized totals so that
    they become those of the residuals of the regression of the linearized values on the
    raking margins' indicators, weighted by the design weights (Deville & Sarndal 1992, JASA
    87:376; as R's ``calibrate`` and ``rake``): z_i = w_i (u_i - M_i b), b = (M'DM)^+ M'D u,
    u_i = d_i e_i (y_i - value) / sum w for the cell. A raked margin's own share gets 0."""
    M, d = cal
    N, p = M.shape
    L, K = value.shape
    Md = M * d[:, None]
    DMd = (Md[:, :, None] * D.astype(float)[:, None, :]).reshape(N, p * L)  # respondent x (margin level, level)
    with np.errstate(divide="ignore", invalid="ignore"):
        num = ((DMd.T @ EY).reshape(p, L, K) - value[None] * (DMd.T @ Ef).reshape(p, L, K)) / sw[None]
    num = np.where(np.isfinite(num), num, 0.0)
    beta = np.linalg.pinv(M.T @ Md) @ num.reshape(p, L * K)  # pinv: the margins' indicators are collinear
    C = sp.csr_matrix((np.ones(N), (psu_id, np.arange(N))), shape=(P, N))
    return (np.asarray(C @ (M * w[:, None])) @ beta).reshape(P, L, K)


def population_of(codebook: Codebook, table: pd.DataFrame) -> np.ndarray | None:
    """Each respondent's stratum population (PSUs in the population, or a sampling fraction
    below 1) from the codebook's key population; None when it declares none."""
    if codebook.population is None:
        return None
    strata, _ = design_labels(codebook, table)
    from .codebook import stratum_key

    labels = pd.Series(np.full(len(table), "", dtype=object) if strata is None else strata)
    keys = labels.map(dict(zip(u := labels.unique(), map(stratum_key, u))))  # one conversion per stratum
    values = keys.map(codebook.population)
    if values.isna().any():
        missing = sorted(set(keys[values.isna()].astype(str)))[:5]
        raise TrackerError(f"codebook: population: no number for stratum {', '.join(missing)}")
    return values.to_numpy(float)


def fpc_factor(pop: np.ndarray | None, row_stratum: np.ndarray, n_h: np.ndarray) -> np.ndarray | None:
    """Per stratum 1 - f_h, f_h = n_h / N_h (the PSUs sampled over those in the population)
    or the sampling fraction itself when the codebook gives one (below 1)."""
    if pop is None:
        return None
    N = np.zeros(len(n_h))
    N[row_stratum] = pop
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(N < 1, 1 - N, 1 - np.asarray(n_h, float) / np.where(N > 0, N, 1))


def population_problems(codebook: Codebook, table: pd.DataFrame) -> list[str]:
    """Strata whose declared population is smaller than what the wave sampled from them."""
    try:
        pop = population_of(codebook, table)
    except TrackerError as exc:
        return [str(exc)]
    if pop is None:
        return []
    strata, clusters = design_of(codebook, table)
    psu_id, psu_stratum, n_strata = psu_index(strata, clusters, len(table))
    n_h = np.bincount(psu_stratum, minlength=n_strata)
    factor = fpc_factor(pop, psu_stratum[psu_id], n_h)
    if factor is None:
        return []
    bad = np.flatnonzero(factor < 0)
    if not bad.size:
        return []
    labels, _ = design_labels(codebook, table)
    names = pd.factorize(pd.Series(labels if labels is not None else np.full(len(table), "")))[1]
    shown = ", ".join(str(names[b]) or "(the sample)" for b in bad[:5])
    what = "clusters" if codebook.clusters else "respondents"
    return [f"codebook: population: stratum {shown}: the wave holds more {what} than the population declared"]


def _refuse(codebook: Codebook, table: pd.DataFrame, exc: SingleClusterError) -> TrackerError:
    strata, _ = design_labels(codebook, table)
    # the variance code numbers strata in order of first appearance (pd.factorize)
    names = np.asarray(pd.factorize(pd.Series(strata))[1])[exc.strata] if strata is not None else exc.strata
    return TrackerError(f"strata {', '.join(map(str, names[:10]))} hold a single cluster, and the codebook says "
                        f"single_cluster_strata: refuse (see docs/codebook.md for the other rules)")


#: Bump when the per-cell statistics change meaning or computation: every cached copy
#: (tracker.cache) is then rebuilt.
STATS_VERSION = 6  # 3: average rule per subgroup; 4: finite population correction; 5, 6: raked weights

#: The per-cell sufficient statistics, each a (levels x metrics) array in CellArrays.
STATS = ("base", "weighted_base", "sum_w2", "value", "variance", "unit_variance", "n_psu", "design_df", "base_cap")


@dataclass(frozen=True)
class CellArrays:
    """One wave's per-cell statistics as arrays: ``stats[name]`` is (levels x metrics), the
    levels named by ``group`` and ``level`` (the total first), the columns by ``metrics``.
    With clusters declared, ``psu`` holds each cluster's totals of every cell's linearized
    values (clusters x cells, for the covariance of two waves sharing clusters) and
    ``psu_names`` names the clusters (stratum and cluster label)."""

    metrics: tuple[str, ...]
    group: tuple[str, ...]
    level: tuple[str, ...]
    stats: dict[str, np.ndarray]
    psu: PsuTotals | None = None
    psu_names: np.ndarray | None = None

    def select(self, metrics: list[str], groups: list[str]) -> CellArrays:
        """The cells of some metrics and subgroup splits, in the order a fresh computation
        for them would give (the total, then each split's levels in the order asked)."""
        col = {m: j for j, m in enumerate(self.metrics)}
        cols = np.array([col[m] for m in metrics], dtype=np.int64)
        rows = np.array([0] + [i for g in groups for i, gi in enumerate(self.group) if gi == g], dtype=np.int64)
        if len(cols) == len(self.metrics) and np.array_equal(cols, np.arange(len(cols))) \
                and np.array_equal(rows, np.arange(len(self.group))):
            return self
        psu = None
        if self.psu is not None:
            flat = (rows[:, None] * len(self.metrics) + cols[None, :]).ravel()
            psu = PsuTotals(self.psu.totals[:, flat], self.psu.stratum, self.psu.n_strata)
        return CellArrays(tuple(metrics), tuple(self.group[i] for i in rows), tuple(self.level[i] for i in rows),
                          {k: v[np.ix_(rows, cols)] for k, v in self.stats.items()}, psu, self.psu_names)


def cell_arrays(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric], groups: list[str],
                sample: np.ndarray | None = None, residual: bool = False, keep_psu: bool = False) -> CellArrays:
    """Sufficient statistics of every cell of one wave (or of pooled waves), as arrays.

    Per cell: base n, sum of weights, sum of squared weights, the weighted value, its
    Taylor variance, the unit variance sum w (y - value)^2 / sum w, the PSUs holding
    respondents of the cell and the design degrees of freedom (those PSUs minus the
    strata holding them). ``sample`` labels independent samples pooled in one table (one
    per wave): they act as extra strata. ``keep_psu`` keeps the clusters' totals of the
    linearized values (when clusters are declared).
    """
    D, levels = group_matrix(codebook, table, groups, residual)
    w = weights_of(codebook, table)
    strata, psu = design_of(codebook, table)
    pop = population_of(codebook, table)
    cal = calibration_of(codebook, table)
    if cal is not None and psu is None:
        psu = np.arange(len(table))  # each respondent its own PSU: the residuals are per respondent
    if sample is not None:
        strata = _codes(pd.Series(sample).astype(str) + "|" + ("" if strata is None else pd.Series(strata).astype(str)))
    # metrics a block at a time: a large wave's respondent x metric arrays stay within BLOCK_CELLS
    step = max(1, BLOCK_CELLS // max(len(table), 1))
    # who is in each subgroup level (as 32-bit positions while they fit: a large wave's biggest index)
    memo = {"nonzero": tuple(a.astype(np.int32) if D.shape[0] < 2**31 else a for a in np.nonzero(D))}
    rows, lev = memo["nonzero"]
    members = sp.csr_matrix((np.ones(rows.size), (lev, rows)), shape=(D.shape[1], D.shape[0]))
    del rows, lev
    design = (D, w, strata, psu, pop, cal, members, memo)  # memo: what the blocks share (_level_sums)
    try:
        parts = [_block_stats(codebook, table, metrics[i:i + step], design, keep_psu)
                 for i in range(0, max(len(metrics), 1), step)]
    except SingleClusterError as exc:
        raise _refuse(codebook, table, exc) from None
    stats = {k: np.concatenate([p[0][k] for p in parts], axis=1) for k in parts[0][0]}
    psu_totals = names = None
    if keep_psu and parts[0][1] is not None:
        t0 = parts[0][1]
        P, L = t0.totals.shape[0], len(levels.group)
        totals = np.concatenate([p[1].totals.reshape(P, L, -1) for p in parts], axis=2).reshape(P, -1)
        psu_totals = PsuTotals(totals, t0.stratum, t0.n_strata, t0.factor)
        if codebook.clusters:
            s_lab, c_lab = design_labels(codebook, table)
            assert c_lab is not None  # clusters are declared
            first_row = parts[0][2]
            names = c_lab[first_row].astype(str)
            if s_lab is not None:
                names = np.char.add(np.char.add(s_lab[first_row].astype(str), SEP), names)
    return CellArrays(tuple(m.name for m in metrics), levels.group, levels.level, stats, psu_totals, names)


#: Respondents x metrics held at once by :func:`cell_arrays` (4 million: 32 MB per float array).
BLOCK_CELLS = 4_000_000


def _block_stats(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric], design: tuple, keep_psu: bool):
    """(statistics, PSU totals, a respondent of each PSU) of the cells of some metrics."""
    D, w, strata, psu, pop, cal, members, memo = design
    Y, E = metric_matrix(codebook, table, metrics)
    Ef = E.astype(float)
    EY = np.where(E, Y, 0.0)  # a respondent outside the base contributes nothing
    del Y, E
    wE = Ef * w[:, None]
    wEY = EY * w[:, None]
    # each level's sums over its members: a sparse (level x respondent) product each
    n, sw, sw2, swy, swy2 = (np.asarray(members @ X) for X in (Ef, wE, wE * w[:, None], wEY, wEY * EY))
    del wE, wEY
    with np.errstate(divide="ignore", invalid="ignore"):
        value = swy / sw
        unit_var = np.maximum(swy2 / sw - value**2, 0.0)
    psu_totals = first_row = None
    if codebook.replicates is not None:
        var, n_psu, df = _replicate_variance(codebook.replicates, table, D, Ef, EY, value, memo)
    elif psu is None:
        var, n_psu, df = _unclustered_variance(D, Ef, EY, w, value, sw, n, strata, codebook.single_cluster_rule, pop,
                                               memo)
    else:
        var, n_psu, df, psu_totals, first_row = _clustered_variance(D, Ef, EY, w, value, sw, strata, psu,
                                                                     codebook.single_cluster_rule, pop, cal, memo)
    with np.errstate(divide="ignore", invalid="ignore"):
        # the largest base the design base may take: the Kish base of fixed weights; for raked
        # weights the respondents themselves (the calibration's gain is real, the weighting's loss is in V)
        cap = n.astype(float) if cal is not None else sw * sw / sw2
    stats = {"base": n, "weighted_base": sw, "sum_w2": sw2, "value": value, "variance": var,
             "unit_variance": unit_var, "n_psu": n_psu.astype(float), "design_df": df.astype(float), "base_cap": cap}
    return stats, (psu_totals if keep_psu else None), first_row


def cells_frame(cells: CellArrays) -> pd.DataFrame:
    """One row per subgroup level x metric (metrics vary fastest) with the statistics."""
    L, M = len(cells.group), len(cells.metrics)
    out = {"metric": np.tile(np.asarray(cells.metrics, dtype=object), L),
           "group": np.repeat(np.asarray(cells.group, dtype=object), M),
           "subgroup": np.repeat(np.asarray(cells.level, dtype=object), M)}
    for k in STATS:
        v = cells.stats[k].ravel()
        out[k] = v.astype(int) if k in ("base", "n_psu") else v
    return pd.DataFrame(out)


def cell_stats(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric], groups: list[str],
               sample: np.ndarray | None = None, residual: bool = False) -> pd.DataFrame:
    """:func:`cell_arrays` as a table: one row per subgroup level x metric with base,
    weighted_base, sum_w2, value, variance, unit_variance, n_psu and design_df."""
    return cells_frame(cell_arrays(codebook, table, metrics, groups, sample, residual))


def _replicate_variance(reps, table: pd.DataFrame, D: np.ndarray, Ef: np.ndarray, EY: np.ndarray, value: np.ndarray,
                        memo: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The replicate-weight variance of every cell: each replicate's estimate of the cell
    (its weighted sums over the cell's respondents), spread about the full-sample estimate
    (``mse``) or the replicates' mean, V = scale * sum_r rscales_r (theta_r - centre)^2, as
    R's ``svrepdesign`` computes it for its replicate types (Wolter 2007, *Introduction to
    Variance Estimation*, ch. 3-5). Degrees of freedom: the rank of the replicate weights
    minus one for every cell (R's ``degf`` of a replicate design); ``n_psu`` holds the number
    of replicates."""
    if "replicates" not in memo:
        W = table[list(reps.columns)].to_numpy(dtype=float)
        memo["replicates"] = (W, float(np.linalg.matrix_rank(W) - 1))
    W, df = memo["replicates"]
    L, M = value.shape
    R = W.shape[1]
    var = np.empty((L, M))
    rscales = np.asarray(reps.rscales, float)[:, None]
    for j in range(L):  # a loop over subgroup levels: each one product per replicate at once
        Wl = W * D[:, j][:, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            theta = (Wl.T @ EY) / (Wl.T @ Ef)  # replicates x metrics
        centre = value[j][None] if reps.mse else theta.mean(axis=0)[None]
        var[j] = reps.scale * (rscales * (theta - centre) ** 2).sum(axis=0)
    return var, np.full((L, M), R), np.full((L, M), df)


def replicate_deviations(reps, W: np.ndarray, w: np.ndarray, D: np.ndarray, EY: np.ndarray,
                         Ef: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each domain's (column of D) estimate and its replicates' deviations, scaled so that the
    sum over replicates of the products of two deviations is their replicate covariance,
    scale * sum_r rscales_r (a_r - a_c)(b_r - b_c), the centre the full-sample estimate
    (``mse``) or the replicates' mean (R's svrepdesign; as :func:`_replicate_variance`).
    W: respondents x replicates; EY, Ef: respondents x metrics. Returns value (J x M) and the
    deviations (R x J x M; 0 where a replicate leaves a domain empty)."""
    J, M, R = D.shape[1], EY.shape[1], W.shape[1]
    value, dev = np.empty((J, M)), np.empty((R, J, M))
    root = np.sqrt(reps.scale * np.asarray(reps.rscales, float))[:, None]
    for j in range(J):  # a loop over domains: every replicate and metric at once
        d = D[:, j].astype(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            value[j] = ((w * d) @ EY) / ((w * d) @ Ef)
            theta = ((W * d[:, None]).T @ EY) / ((W * d[:, None]).T @ Ef)
        centre = value[j][None] if reps.mse else theta.mean(axis=0)[None]
        dev[:, j, :] = np.nan_to_num(root * (theta - centre))
    return value, dev


def replicate_cell_deviations(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric],
                              groups: list[str]) -> np.ndarray:
    """The replicates' scaled deviations of every cell of :func:`cell_stats` (replicates x
    cells, in its order): the sum of products of two waves' deviations of a cell is the
    replicate covariance of its two estimates when replicate r of both waves comes from the
    same sample units (a panel's longitudinal replicate weights)."""
    reps = codebook.replicates
    assert reps is not None  # called for replicate-weight studies only
    Y, E = metric_matrix(codebook, table, metrics)
    D, _levels = group_matrix(codebook, table, groups)
    W = table[list(reps.columns)].to_numpy(dtype=float)
    _value, dev = replicate_deviations(reps, W, weights_of(codebook, table), D, np.where(E, Y, 0.0), E.astype(float))
    return dev.reshape(dev.shape[0], -1)


def _level_sums(D: np.ndarray, unit: np.ndarray, n_units: int, weights: list[np.ndarray],
                *mats: list[np.ndarray], tags: tuple[str, ...] = (),
                memo: dict | None = None) -> list[list[np.ndarray]]:
    """For the k-th weight vector u and each respondent x metric matrix X of the k-th list,
    the (units, levels, metrics) sums of u X over the respondents of each unit (a stratum
    or a PSU) and subgroup level: one sparse (unit x level) by respondent product per
    pair, or dense when there is one unit. With ``memo`` (one per table) and a tag naming
    each weight vector, each sparse matrix is built once for all blocks of metrics."""
    N, L = D.shape
    if n_units == 1:
        return [[((D * u[:, None]).T @ X)[None] for X in xs] for u, xs in zip(weights, mats)]
    memo = {} if memo is None else memo
    out = []
    for k, (u, xs) in enumerate(zip(weights, mats)):
        key = ("units", tags[k] if k < len(tags) else None, n_units)
        S = memo.get(key) if key[1] else None
        if S is None:
            if "nonzero" not in memo:
                memo["nonzero"] = np.nonzero(D)
            rows, lev = memo["nonzero"]
            S = sp.csr_matrix((u[rows], (unit[rows] * L + lev, rows)), shape=(n_units * L, N))
            if key[1]:
                memo[key] = S
        out.append([np.asarray(S @ X).reshape(n_units, L, -1) for X in xs])
    return out


def _unclustered_variance(D, Ef, EY, w, value, sw, members, strata, rule, pop=None, memo=None):
    """Taylor variance when each respondent is a PSU.

    Within stratum h, with z_i = d_i w_i (y_i - value) e_i / sw: sum z and sum z^2 expand
    into stratum x level sums of w e y, w e, w^2 e y^2, w^2 e y and w^2 e, so no respondent
    x cell array is built; :func:`unclustered_from_sums` finishes. Degrees of freedom:
    respondents in the cell minus strata holding them.
    """
    memo = {} if memo is None else memo
    n = D.shape[0]
    if "strata" not in memo:
        memo["strata"] = (np.zeros(n, dtype=np.int64) if strata is None
                          else np.unique(strata, return_inverse=True)[1].ravel())
    h = memo["strata"]
    n_strata = int(h.max()) + 1 if n else 1
    (a, b), (a2, ab, b2) = _level_sums(D, h, n_strata, [w, w * w], [EY, Ef], [EY * EY, EY, Ef], tags=("w", "w2"),
                                       memo=memo)
    if n_strata == 1:
        held = (members > 0)[None]
    else:
        held = _level_sums(D, h, n_strata, [np.ones(n)], [Ef], tags=("1",), memo=memo)[0][0] > 0
    n_h = np.bincount(h, minlength=n_strata)
    return unclustered_from_sums(a, b, a2, ab, b2, held, members, value, sw, n_h, rule, fpc_factor(pop, h, n_h))


def unclustered_from_sums(a, b, a2, ab, b2, held, members, value, sw, n_h, rule, fpc=None):
    """The variance of every cell from per-stratum sums (strata x levels x metrics) of
    w e y (a), w e (b), w^2 e y^2 (a2), w^2 e y (ab) and w^2 e (b2); ``held`` says which
    strata hold each cell's respondents (strata x levels x metrics), ``n_h`` the
    respondents of each stratum. The per-stratum moments go to
    :func:`tracker.methods.variance.combine_strata`."""
    n_strata = a.shape[0]
    L, M = value.shape
    with np.errstate(divide="ignore", invalid="ignore"):
        s1 = np.nan_to_num((a - value * b) / sw)
        s2 = np.nan_to_num((a2 - 2 * value * ab + value**2 * b2) / sw**2)
    held = np.broadcast_to(np.asarray(held, bool).reshape(-1, L, M), (n_strata, L, M)).reshape(n_strata, -1)
    var = combine_strata(s1.reshape(n_strata, -1), s2.reshape(n_strata, -1), n_h, rule, held, fpc).reshape(L, M)
    return var, members, members - held.sum(axis=0).reshape(L, M)


def _clustered_variance(D, Ef, EY, w, value, sw, strata, psu, rule, pop=None, cal=None, memo=None):
    """Taylor variance with declared clusters: one sparse (PSU x level) by respondent
    product per wave gives every cell's PSU totals of w e y and w e at once, and
    :func:`clustered_from_totals` finishes. Also returns a respondent of each PSU (to name it)."""
    N, _L = D.shape
    memo = {} if memo is None else memo
    if "psu" not in memo:
        memo["psu"] = psu_index(strata, psu, N)
    psu_id, psu_stratum, n_strata = memo["psu"]
    P = psu_stratum.size
    (A, B), = _level_sums(D, psu_id, P, [w], [EY, Ef], tags=("w",), memo=memo)
    # with every weight positive a PSU holds a cell's respondents exactly when its weight total is positive
    counts = (B > 0) if bool((w > 0).all()) else (
        _level_sums(D, psu_id, P, [np.ones(N)], [Ef], tags=("1",), memo=memo)[0][0] > 0)
    fpc = fpc_factor(pop, psu_stratum[psu_id], np.bincount(psu_stratum, minlength=n_strata))
    correction = None if cal is None else _calibration_correction(cal, D, Ef, EY, w, value, sw, psu_id, P)
    var, n_psu, df, totals = clustered_from_totals(A, B, counts, value, sw, psu_stratum, n_strata, rule, fpc,
                                                   correction)
    first = np.zeros(P, dtype=np.int64)
    first[psu_id[::-1]] = np.arange(N)[::-1]
    return var, n_psu, df, totals, first


def clustered_from_totals(A, B, counts, value, sw, psu_stratum, n_strata, rule, fpc=None, correction=None):
    """The variance of every cell from its PSU totals (PSUs x levels x metrics) of w e y (A)
    and w e (B): the linearized totals t = (A - value B) / sw, compared within strata by
    :func:`tracker.methods.variance.combine_strata`. ``counts`` says which PSUs hold
    respondents of each cell. Degrees of freedom per cell: those PSUs minus the strata
    holding them. Returns (variance, PSUs per cell, df, the PSU totals t)."""
    P = A.shape[0]
    L, M = value.shape
    counts = counts.reshape(P, L * M)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (A - value[None] * B) / sw[None]
    if correction is not None:  # raked weights: the totals of the regression residuals (_calibration_correction)
        t = t - correction
    t = np.where(np.isfinite(t), t, 0.0).reshape(P, L * M)
    H = sp.csr_matrix((np.ones(P), (psu_stratum, np.arange(P))), shape=(n_strata, P))
    n_h = np.bincount(psu_stratum, minlength=n_strata)
    held = np.asarray(H @ counts.astype(float)) > 0  # strata x cells
    var = combine_strata(np.asarray(H @ t), np.asarray(H @ t**2), n_h, rule, held, fpc).reshape(L, M)
    n_psu = counts.sum(axis=0).reshape(L, M)
    n_str = held.sum(axis=0).reshape(L, M)
    return var, n_psu, n_psu - n_str, PsuTotals(t, psu_stratum, n_strata, fpc)


def derived(stats: dict[str, np.ndarray], kind: np.ndarray, level: float = 0.95,
            interval: str = "wilson") -> dict[str, np.ndarray]:
    """Derived columns from sufficient statistics (flat arrays): bases, design effect, SE,
    interval, flags.

    Kish effective base (sum w)^2 / sum w^2; Kish design effect V / (sigma^2 / n) and
    design base sigma^2 / V (tracker.methods.bases); SE = sqrt(V); the interval and the
    reliability rule of each metric kind (tracker.kinds) on the design's degrees of freedom.
    """
    if interval not in INTERVALS:
        raise TrackerError(f"interval {interval}: use one of {', '.join(INTERVALS)}")
    n = np.asarray(stats["base"], float)
    var = np.asarray(stats["variance"], float)
    unit = np.asarray(stats["unit_variance"], float)
    kish = kish_base(np.asarray(stats["weighted_base"], float), np.asarray(stats["sum_w2"], float))
    # the Kish base where a table gives no cap (fixed weights: tables made before the cap existed)
    dbase = design_base(var, unit, n, np.asarray(stats["base_cap"], float) if "base_cap" in stats else kish)
    df = np.asarray(stats["design_df"], float)
    se = np.sqrt(var)
    p = np.asarray(stats["value"], float)
    lo, hi = np.full(len(n), np.nan), np.full(len(n), np.nan)
    reliable = np.zeros(len(n), bool)
    flags = np.full(len(n), "", dtype=object)
    for name, k in KINDS.items():  # a loop over the kinds, every cell of a kind at once
        m = kind == name
        if not m.any():
            continue
        lo[m], hi[m] = k.interval(p[m], se[m], dbase[m], n[m], df[m], level, interval)
        ok, pairs = k.reliability(p[m], lo[m], hi[m], dbase[m], n[m], df[m], level)
        reliable[m] = ok
        flags[m] = flag_text(pairs, int(m.sum()))
    empty = n == 0
    return {
        "effective_base": kish,
        "design_effect": design_effect(var, unit, n), "design_base": dbase, "se": se, "ci_low": lo, "ci_high": hi,
        "df": df, "kind": kind, "reliable": reliable & ~empty, "flags": np.where(empty, "no respondents", flags),
    }


def finish(cells: pd.DataFrame, kinds: dict[str, str], level: float = 0.95, interval: str = "wilson") -> pd.DataFrame:
    """:func:`derived` added to a table of sufficient statistics (one row per cell)."""
    c = cells.copy()
    kind = c["metric"].map(kinds).to_numpy()
    for k, v in derived({k: c[k].to_numpy() for k in STATS if k in c}, kind, level, interval).items():
        c[k] = v
    return c


def at_level(est: pd.DataFrame, level: float, interval: str = "wilson") -> pd.DataFrame:
    """The estimates ``est`` (asked with ``detail=True``: their sufficient statistics kept) with
    every interval, design base and flag at another confidence ``level``, from those
    statistics alone (as a statsmodels result's ``conf_int(alpha)``): no wave is read again.
    tests/test_estimates_changes.py checks it equals asking the study for that level.
    """
    from .options import check_level

    check_level(level)
    kinds = dict(zip(est["metric"], est["kind"]))
    return finish(est, kinds, level, interval)


def estimates_frame(parts: list[tuple[str, str, CellArrays]], metrics: list[Metric], level: float = 0.95,
                    interval: str = "wilson") -> pd.DataFrame:
    """The full estimates rows (sufficient statistics kept) of several waves at once, from
    each wave's (label, fieldwork date, cell arrays): one table built once, the derived
    columns computed over every cell together."""
    kinds = {m.name: m.kind for m in metrics}
    labels = {m.name: m.label for m in metrics}
    cols: dict[str, list] = {k: [] for k in ("wave", "fieldwork_date", "metric", "group", "subgroup", *STATS)}
    for label, date, cells in parts:
        L, M = len(cells.group), len(cells.metrics)
        cols["wave"].append(np.full(L * M, label, dtype=object))
        cols["fieldwork_date"].append(np.full(L * M, date, dtype=object))
        cols["metric"].append(np.tile(np.asarray(cells.metrics, dtype=object), L))
        cols["group"].append(np.repeat(np.asarray(cells.group, dtype=object), M))
        cols["subgroup"].append(np.repeat(np.asarray(cells.level, dtype=object), M))
        for k in STATS:
            cols[k].append(cells.stats[k].ravel())
    if not parts:
        text_cols = ("wave", "fieldwork_date", "metric", "group", "subgroup")
        out = {k: np.array([], dtype=object if k in text_cols else float)
               for k in cols}
    else:
        out = {k: np.concatenate(v) for k, v in cols.items()}
    metric = out["metric"]
    # the kind and label of each row by one lookup per distinct metric, not per row
    u, inv = np.unique(metric.astype(str), return_inverse=True) if metric.size else (np.array([]), np.array([], int))
    kind = np.array([kinds[m] for m in u], dtype=object)[inv] if metric.size else np.array([], dtype=object)
    label_col = np.array([labels[m] for m in u], dtype=object)[inv] if metric.size else np.array([], dtype=object)
    for k in ("base", "n_psu"):
        out[k] = out[k].astype(int)
    out.update(derived(out, kind, level, interval))
    out["metric_label"] = label_col
    return pd.DataFrame(out)


def wave_estimates(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric], groups: list[str],
                   label: str, date: str, level: float = 0.95, sample: np.ndarray | None = None,
                   interval: str = "wilson") -> pd.DataFrame:
    """The full estimates rows of one wave (with the sufficient statistics kept)."""
    cells = cell_arrays(codebook, table, metrics, groups, sample)
    return estimates_frame([(label, date, cells)], metrics, level, interval)


# -- covariance between two waves --------------------------------------------------------------

def _cell_psu_totals(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric], groups: list[str],
                     est: pd.DataFrame, by_cluster: bool) -> tuple[PsuTotals, np.ndarray]:
    """PSU totals of every cell's linearized values, and each PSU's key (stratum and cluster
    label, or stratum and respondent id)."""
    Y, E = metric_matrix(codebook, table, metrics)
    D, _ = group_matrix(codebook, table, groups)
    w = weights_of(codebook, table)
    strata, clusters = design_labels(codebook, table)
    unit = clusters if by_cluster else table[codebook.id].astype(str).to_numpy()
    assert unit is not None  # asked only when clusters or ids are there
    keys = unit if strata is None else np.char.add(np.char.add(strata.astype(str), SEP), unit.astype(str))
    key_codes, key_names = pd.factorize(pd.Series(keys))
    N, L = D.shape
    M = Y.shape[1]
    psu_id, psu_stratum, n_strata = psu_index(None if strata is None else _codes(strata), key_codes, N)
    P = psu_stratum.size
    fpc = fpc_factor(population_of(codebook, table), psu_stratum[psu_id], np.bincount(psu_stratum, minlength=n_strata))
    value = est["value"].to_numpy().reshape(L, M)
    sw = est["weighted_base"].to_numpy().reshape(L, M)
    we = E * w[:, None]
    rows, levels = np.nonzero(D)
    CD = sp.csr_matrix((np.ones(rows.size), (psu_id[rows] * L + levels, rows)), shape=(P * L, N))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (np.asarray(CD @ (we * Y)).reshape(P, L, M) - value[None] * np.asarray(CD @ we).reshape(P, L, M)) / sw[None]
    first = np.zeros(P, dtype=np.int64)
    first[psu_id[::-1]] = np.arange(N)[::-1]  # a respondent of each PSU, to name it
    names = np.asarray(key_names)[key_codes[first]]
    return PsuTotals(np.nan_to_num(t.reshape(P, L * M)), psu_stratum, n_strata, fpc), names.astype(str)


def wave_covariance(codebook: Codebook, a: pd.DataFrame, b: pd.DataFrame, metrics: list[Metric],
                    groups: list[str], est_a: pd.DataFrame, est_b: pd.DataFrame,
                    by_cluster: bool | None = None) -> tuple[np.ndarray, int, str, np.ndarray]:
    """Covariance of two waves' estimates, one per cell in the order of ``cell_stats``.

    From the clusters both waves share (same stratum and cluster label) when the study
    declares clusters and ``waves_share_clusters`` holds; otherwise from the respondents
    both share (same id), each its own PSU (then clustering is not used). See
    :func:`tracker.methods.variance.cross_wave_covariance`. ``by_cluster`` True or False
    tries only the clusters or only the respondents. Returns (covariance, shared units,
    'clusters' or 'respondents').
    """
    L = 1 + sum(len(codebook.groups[g].levels) for g in groups)
    none = (np.zeros(L * len(metrics)), 0, "", np.zeros(L * len(metrics)))
    tries = []
    if codebook.clusters and codebook.waves_share_clusters and by_cluster is not False:
        tries.append(True)
    if codebook.panel and codebook.id in a.columns and codebook.id in b.columns and by_cluster is not True:
        ids_shared = np.intersect1d(a[codebook.id].astype(str).to_numpy(), b[codebook.id].astype(str).to_numpy())
        if ids_shared.size:
            tries.append(False)
    for clustered in tries:
        ta, ka = _cell_psu_totals(codebook, a, metrics, groups, est_a, clustered)
        tb, kb = _cell_psu_totals(codebook, b, metrics, groups, est_b, clustered)
        cov, shared = cross_wave_covariance(ta, ka, tb, kb, codebook.single_cluster_rule)
        if shared:
            return cov, shared, "clusters" if clustered else "respondents", shared_per_cell(ta, ka, tb, kb)
    return none


# -- strata with a single cluster ----------------------------------------------------------------

@dataclass(frozen=True)
class SingleClusterFinding:
    """Strata holding one cluster: in the whole wave (``scope`` 'total', which the rule
    'refuse' refuses) or for one subgroup's respondents ('subgroup', always estimable)."""

    scope: str
    text: str


def single_cluster_lines(codebook: Codebook, table: pd.DataFrame,
                         groups: list[str] | None = None) -> list[SingleClusterFinding]:
    """Findings naming every stratum with one cluster, in total and in each subgroup."""
    strata, clusters = design_labels(codebook, table)
    if strata is None or clusters is None:
        return []
    # integer codes once (strata numbered as np.unique orders them): each level's check is then cheap
    names, strata = _sorted_codes(strata)
    clusters = _sorted_codes(clusters)[1]
    rule = codebook.single_cluster_rule
    out = []
    lone = single_cluster_strata(strata, clusters)
    if lone.size:
        then = ("the codebook refuses such a wave (single_cluster_strata: refuse); merge each with a neighbouring "
                "stratum in the file or choose another rule (docs/codebook.md)" if rule == "refuse" else
                f"their variance follows the rule single_cluster_strata: {rule} (docs/methods.md)"
                + ("; this rule understates the variance unless the lone clusters were taken with certainty "
                   "(certainty) or vary as the others do (average); centre does not"
                   if rule in ("average", "certainty") else ""))
        out.append(SingleClusterFinding("total", f"{lone.size} stratum(s) hold a single cluster: "
                                                 f"{_names(names[lone])}; {then}"))
    D, levels = group_matrix(codebook, table, list(codebook.groups) if groups is None else groups)
    for j in range(1, D.shape[1]):  # a loop over subgroup levels
        sub = single_cluster_strata(strata, clusters, D[:, j])
        sub = np.setdiff1d(sub, lone)
        if sub.size:
            out.append(SingleClusterFinding(
                "subgroup", f"subgroup {levels.group[j]} = {levels.level[j]}: its respondents sit in a single cluster "
                            f"in {sub.size} stratum(s): {_names(names[sub])} (estimable: the stratum's other clusters "
                            f"count as zero for it, but its degrees of freedom are fewer)"))
    return out


def _sorted_codes(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """np.unique(values, return_inverse=True) by hashing: the labels are sorted, not the rows."""
    codes, uniques = pd.factorize(pd.Series(values))
    uniques = np.asarray(uniques)
    order = np.argsort(uniques, kind="stable")
    rank = np.empty(len(order), dtype=np.int64)
    rank[order] = np.arange(len(order))
    return uniques[order], rank[codes]


def _names(values, most: int = 8) -> str:
    values = [str(v) for v in values]
    return ", ".join(values[:most]) + (f" and {len(values) - most} more" if len(values) > most else "")
