"""Estimates: one row per wave x subgroup x metric, from per-cell sufficient statistics.

For every cell (a metric within a subgroup of one wave) this computes the weighted value
(share, mean or balance), the unweighted base, the weighted base, the Kish effective base,
the design-based variance by Taylor linearization with the design's degrees of freedom,
the design effect and design base, an interval and reliability flags. The statistics come
from :mod:`tracker.methods` and the kind rules from :mod:`tracker.kinds`; this module turns
respondent rows into the arrays they take. Work is vectorised over all cells of a wave.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.sparse as sp

from .cells import group_matrix, metric_matrix
from .codebook import Codebook, Metric
from .errors import TrackerError
from .kinds import INTERVALS, KINDS, flag_text
from .methods.bases import design_base, design_effect, kish_base
from .methods.variance import (
    PsuTotals, SingleClusterError, combine_strata, cross_wave_covariance, psu_index, single_cluster_strata,
)

__all__ = ["COLUMNS", "cell_stats", "design_of", "finish", "single_cluster_lines", "wave_covariance",
           "wave_estimates", "weights_of"]

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


def _refuse(codebook: Codebook, table: pd.DataFrame, exc: SingleClusterError) -> TrackerError:
    strata, _ = design_labels(codebook, table)
    # the variance code numbers strata in order of first appearance (pd.factorize)
    names = np.asarray(pd.factorize(pd.Series(strata))[1])[exc.strata] if strata is not None else exc.strata
    return TrackerError(f"strata {', '.join(map(str, names[:10]))} hold a single cluster, and the codebook says "
                        f"single_cluster_strata: refuse (see docs/codebook.md for the other rules)")


def cell_stats(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric], groups: list[str],
               sample: np.ndarray | None = None, residual: bool = False) -> pd.DataFrame:
    """Sufficient statistics of every cell of one wave (or of pooled waves).

    Returns one row per subgroup level x metric with: base n, sum of weights, sum of
    squared weights, the weighted value, its Taylor variance, the unit variance
    sum w (y - value)^2 / sum w, and the design degrees of freedom of the cell (PSUs
    holding respondents of the cell minus strata holding them). ``sample`` labels
    independent samples pooled in one table (one per wave): they act as extra strata.
    """
    Y, E = metric_matrix(codebook, table, metrics)
    D, levels = group_matrix(codebook, table, groups, residual)
    w = weights_of(codebook, table)
    strata, psu = design_of(codebook, table)
    if sample is not None:
        strata = _codes(pd.Series(sample).astype(str) + "|" + ("" if strata is None else pd.Series(strata).astype(str)))
    Df = D.astype(float)
    Ef = E.astype(float)
    we = Ef * w[:, None]
    wey = we * Y
    n = Df.T @ Ef
    sw = Df.T @ we
    sw2 = Df.T @ (we * w[:, None])
    swy = Df.T @ wey
    swy2 = Df.T @ (wey * Y)
    with np.errstate(divide="ignore", invalid="ignore"):
        value = swy / sw
        unit_var = np.maximum(swy2 / sw - value**2, 0.0)
    try:
        if psu is None:
            var, n_psu, df = _unclustered_variance(Df, Ef, we, wey, value, sw, strata, codebook.single_cluster_rule)
        else:
            var, n_psu, df = _clustered_variance(D, Ef, we, wey, value, sw, strata, psu, codebook.single_cluster_rule)
    except SingleClusterError as exc:
        raise _refuse(codebook, table, exc) from None
    L, M = value.shape
    return pd.DataFrame({
        "metric": np.tile([m.name for m in metrics], L),
        "group": np.repeat(levels.group, M),
        "subgroup": np.repeat(levels.level, M),
        "base": n.ravel().astype(int),
        "weighted_base": sw.ravel(),
        "sum_w2": sw2.ravel(),
        "value": value.ravel(),
        "variance": var.ravel(),
        "unit_variance": unit_var.ravel(),
        "n_psu": n_psu.ravel().astype(int),
        "design_df": df.ravel(),
    })


def _unclustered_variance(Df, Ef, we, wey, value, sw, strata, rule):
    """Taylor variance when each respondent is a PSU, by matrix products per stratum.

    Within stratum h, with z_i = d_i (wey_i - value * we_i) / sw: sum z and sum z^2 expand
    into sums of wey, we and their products, so no respondent x cell array is built. The
    per-stratum moments then go to :func:`tracker.methods.variance.combine_strata`. Degrees
    of freedom: respondents in the cell minus strata holding them.
    """
    n = Df.shape[0]
    h = np.zeros(n, dtype=np.int64) if strata is None else np.unique(strata, return_inverse=True)[1].ravel()
    n_strata = int(h.max()) + 1
    L, M = value.shape
    s1 = np.zeros((n_strata, L, M))
    s2 = np.zeros((n_strata, L, M))
    present = np.zeros((L, M))
    with np.errstate(divide="ignore", invalid="ignore"):
        for k in range(n_strata):  # a loop over strata, not cells
            rows = h == k
            Dh = Df[rows].T
            a, b = Dh @ wey[rows], Dh @ we[rows]
            a2, ab, b2 = Dh @ wey[rows] ** 2, Dh @ (wey[rows] * we[rows]), Dh @ we[rows] ** 2
            s1[k] = np.nan_to_num((a - value * b) / sw)
            s2[k] = np.nan_to_num((a2 - 2 * value * ab + value**2 * b2) / sw**2)
            present += (Dh @ Ef[rows]) > 0
    n_h = np.bincount(h, minlength=n_strata)
    var = combine_strata(s1.reshape(n_strata, -1), s2.reshape(n_strata, -1), n_h, rule).reshape(L, M)
    members = Df.T @ Ef
    return var, members, members - present


def _clustered_variance(D, Ef, we, wey, value, sw, strata, psu, rule):
    """Taylor variance with declared clusters: one sparse (PSU x level) by respondent
    product per wave gives every cell's PSU totals of the linearized values
    z = d (wey - value we) / sw at once; per-stratum moments then go to
    :func:`tracker.methods.variance.combine_strata`. Degrees of freedom per cell: PSUs
    holding respondents of the cell minus strata holding them."""
    N, L = D.shape
    M = value.shape[1]
    psu_id, psu_stratum, n_strata = psu_index(strata, psu, N)
    P = psu_stratum.size
    rows, levels = np.nonzero(D)
    CD = sp.csr_matrix((np.ones(rows.size), (psu_id[rows] * L + levels, rows)), shape=(P * L, N))
    A = (CD @ wey).reshape(P, L, M)
    B = (CD @ we).reshape(P, L, M)
    counts = (CD @ Ef).reshape(P, L * M) > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.nan_to_num((A - value[None] * B) / sw[None], nan=0.0, posinf=0.0, neginf=0.0).reshape(P, L * M)
    H = sp.csr_matrix((np.ones(P), (psu_stratum, np.arange(P))), shape=(n_strata, P))
    n_h = np.bincount(psu_stratum, minlength=n_strata)
    var = combine_strata(np.asarray(H @ t), np.asarray(H @ t**2), n_h, rule).reshape(L, M)
    n_psu = counts.sum(axis=0).reshape(L, M)
    n_str = (np.asarray(H @ counts.astype(float)) > 0).sum(axis=0).reshape(L, M)
    return var, n_psu, n_psu - n_str


def finish(cells: pd.DataFrame, kinds: dict[str, str], level: float = 0.95, interval: str = "wilson") -> pd.DataFrame:
    """Derived columns from sufficient statistics: bases, design effect, SE, interval, flags.

    Kish effective base (sum w)^2 / sum w^2; Kish design effect V / (sigma^2 / n) and
    design base sigma^2 / V (tracker.methods.bases); SE = sqrt(V); the interval and the
    reliability rule of each metric kind (tracker.kinds) on the design's degrees of freedom.
    """
    if interval not in INTERVALS:
        raise TrackerError(f"--interval {interval}: use one of {', '.join(INTERVALS)}")
    c = cells.copy()
    n = c["base"].to_numpy(float)
    var = c["variance"].to_numpy(float)
    unit = c["unit_variance"].to_numpy(float)
    dbase = design_base(var, unit, n)
    df = c["design_df"].to_numpy(float)
    se = np.sqrt(var)
    p = c["value"].to_numpy(float)
    kind = c["metric"].map(kinds).to_numpy()
    lo, hi = np.full(len(c), np.nan), np.full(len(c), np.nan)
    reliable = np.zeros(len(c), bool)
    flags = np.full(len(c), "", dtype=object)
    for name, k in KINDS.items():  # a loop over the kinds, every cell of a kind at once
        m = kind == name
        if not m.any():
            continue
        lo[m], hi[m] = k.interval(p[m], se[m], dbase[m], n[m], df[m], level, interval)
        ok, pairs = k.reliability(p[m], lo[m], hi[m], dbase[m], n[m], df[m], level)
        reliable[m] = ok
        flags[m] = flag_text(pairs, int(m.sum()))
    empty = n == 0
    c["effective_base"] = kish_base(c["weighted_base"].to_numpy(float), c["sum_w2"].to_numpy(float))
    c["design_effect"] = design_effect(var, unit, n)
    c["design_base"] = dbase
    c["se"] = se
    c["ci_low"] = lo
    c["ci_high"] = hi
    c["df"] = df
    c["kind"] = kind
    c["reliable"] = reliable & ~empty
    c["flags"] = np.where(empty, "no respondents", flags)
    return c


def wave_estimates(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric], groups: list[str],
                   label: str, date: str, level: float = 0.95, sample: np.ndarray | None = None,
                   interval: str = "wilson") -> pd.DataFrame:
    """The full estimates rows of one wave (with the sufficient statistics kept)."""
    cells = cell_stats(codebook, table, metrics, groups, sample)
    out = finish(cells, {m.name: m.kind for m in metrics}, level, interval)
    out.insert(0, "wave", label)
    out.insert(1, "fieldwork_date", date)
    out["metric_label"] = out["metric"].map({m.name: m.label for m in metrics})
    return out


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
    keys = unit if strata is None else np.char.add(np.char.add(strata.astype(str), SEP), unit.astype(str))
    key_codes, key_names = pd.factorize(pd.Series(keys))
    N, L = D.shape
    M = Y.shape[1]
    psu_id, psu_stratum, n_strata = psu_index(None if strata is None else _codes(strata), key_codes, N)
    P = psu_stratum.size
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
    return PsuTotals(np.nan_to_num(t.reshape(P, L * M)), psu_stratum, n_strata), names.astype(str)


def wave_covariance(codebook: Codebook, a: pd.DataFrame, b: pd.DataFrame, metrics: list[Metric],
                    groups: list[str], est_a: pd.DataFrame, est_b: pd.DataFrame) -> tuple[np.ndarray, int, str]:
    """Covariance of two waves' estimates, one per cell in the order of ``cell_stats``.

    From the clusters both waves share (same stratum and cluster label) when the study
    declares clusters and ``waves_share_clusters`` holds; otherwise from the respondents
    both share (same id), each its own PSU (then clustering is not used). See
    :func:`tracker.methods.variance.cross_wave_covariance`. Returns (covariance, shared
    units, 'clusters' or 'respondents').
    """
    L = 1 + sum(len(codebook.groups[g].levels) for g in groups)
    none = (np.zeros(L * len(metrics)), 0, "")
    tries = []
    if codebook.clusters and codebook.waves_share_clusters:
        tries.append(True)
    if codebook.id in a.columns and codebook.id in b.columns:
        ids_shared = np.intersect1d(a[codebook.id].astype(str).to_numpy(), b[codebook.id].astype(str).to_numpy())
        if ids_shared.size:
            tries.append(False)
    for by_cluster in tries:
        ta, ka = _cell_psu_totals(codebook, a, metrics, groups, est_a, by_cluster)
        tb, kb = _cell_psu_totals(codebook, b, metrics, groups, est_b, by_cluster)
        cov, shared = cross_wave_covariance(ta, ka, tb, kb, codebook.single_cluster_rule)
        if shared:
            return cov, shared, "clusters" if by_cluster else "respondents"
    return none


# -- strata with a single cluster ----------------------------------------------------------------

def single_cluster_lines(codebook: Codebook, table: pd.DataFrame, groups: list[str] | None = None) -> list[str]:
    """Warnings naming every stratum with one cluster, in total and in each subgroup."""
    strata, clusters = design_labels(codebook, table)
    if strata is None or clusters is None:
        return []
    names = np.unique(strata)
    rule = codebook.single_cluster_rule
    out = []
    lone = single_cluster_strata(strata, clusters)
    if lone.size:
        then = ("the codebook refuses such a wave (single_cluster_strata: refuse); merge each with a neighbouring "
                "stratum in the file or choose another rule (docs/codebook.md)" if rule == "refuse" else
                f"their variance follows the rule single_cluster_strata: {rule} (docs/methods.md)")
        out.append(f"{lone.size} stratum(s) hold a single cluster: {_names(names[lone])}; {then}")
    D, levels = group_matrix(codebook, table, list(codebook.groups) if groups is None else groups)
    for j in range(1, D.shape[1]):  # a loop over subgroup levels
        sub = single_cluster_strata(strata, clusters, D[:, j])
        sub = np.setdiff1d(sub, lone)
        if sub.size:
            out.append(f"subgroup {levels.group[j]} = {levels.level[j]}: its respondents sit in a single cluster in "
                       f"{sub.size} stratum(s): {_names(names[sub])} (estimable: the stratum's other clusters count "
                       f"as zero for it, but its degrees of freedom are fewer)")
    return out


def _names(values, most: int = 8) -> str:
    values = [str(v) for v in values]
    return ", ".join(values[:most]) + (f" and {len(values) - most} more" if len(values) > most else "")
