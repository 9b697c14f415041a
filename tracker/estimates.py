"""Estimates: one row per wave x subgroup x metric, from per-cell sufficient statistics.

For every cell (a metric within a subgroup of one wave) this computes the weighted value
(share, mean or balance), the unweighted base, the weighted base, the Kish effective base,
the design-based standard error by Taylor linearization, the design effect, an interval
and reliability flags. Work is vectorised over all cells of a wave: matrix products over
respondents, with a loop over subgroup levels only where primary sampling units must be
totalled.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy import stats

from .cells import group_matrix, metric_matrix
from .codebook import Codebook, Metric

# Columns of the estimates table, in order.
COLUMNS = [
    "wave", "fieldwork_date", "metric", "metric_label", "kind", "group", "subgroup",
    "value", "base", "weighted_base", "effective_base", "design_effect", "design_base",
    "se", "ci_low", "ci_high", "df", "unit_variance", "reliable", "flags",
]


def taylor_variance(z: np.ndarray, strata: np.ndarray | None, psu: np.ndarray | None) -> tuple[np.ndarray, int]:
    """Variance of a total of linearized values ``z`` (N x K) under a stratified cluster design.

    With-replacement (ultimate cluster) estimator: sum over strata h of
    n_h / (n_h - 1) * sum over PSUs c in h of (z_hc - mean_h z)^2, where z_hc are PSU totals
    (Wolter 2007, *Introduction to Variance Estimation*, 2nd ed., ch. 6; the estimator that
    samplics ``TaylorEstimator`` implements). With no clusters each respondent is a PSU;
    with no strata there is one stratum. A stratum holding a single PSU adds nothing (its
    variance cannot be estimated). Returns (variances, number of PSUs, number of strata).
    """
    n = z.shape[0]
    strata = np.zeros(n, dtype=np.int64) if strata is None else strata
    if psu is None:
        psu_id = np.arange(n)
    else:
        # PSUs are nested in strata: the same PSU label in two strata is two PSUs
        _, psu_id = np.unique(np.stack([strata, psu]), axis=1, return_inverse=True)
        psu_id = psu_id.ravel()
    n_psu = psu_id.max() + 1
    if psu is None:
        totals = z
        psu_stratum = strata
    else:
        C = sp.csr_matrix((np.ones(n), (psu_id, np.arange(n))), shape=(n_psu, n))
        totals = C @ z
        psu_stratum = np.zeros(n_psu, dtype=np.int64)
        psu_stratum[psu_id] = strata
    _, h = np.unique(psu_stratum, return_inverse=True)
    n_h = np.bincount(h).astype(float)
    H = sp.csr_matrix((np.ones(n_psu), (h, np.arange(n_psu))), shape=(n_h.size, n_psu))
    s1 = H @ totals
    s2 = H @ (totals**2)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.where(n_h > 1, n_h / (n_h - 1), 0.0)
        within = s2 - s1**2 / n_h[:, None]
    var = (f[:, None] * np.maximum(within, 0.0)).sum(axis=0)
    return var, int(n_psu), int(n_h.size)


def _codes(values: pd.Series) -> np.ndarray:
    return pd.factorize(values.astype(str))[0]


def weights_of(codebook: Codebook, table: pd.DataFrame) -> np.ndarray:
    """The respondents' weights (1 each when the study has none)."""
    if codebook.weight and codebook.weight in table.columns:
        return table[codebook.weight].to_numpy(float)
    return np.ones(len(table))


def design_of(codebook: Codebook, table: pd.DataFrame) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(stratum codes, PSU codes) of the respondents, None where the study declares none."""
    strata = _codes(table[codebook.strata]) if codebook.strata and codebook.strata in table.columns else None
    psu = _codes(table[codebook.clusters]) if codebook.clusters and codebook.clusters in table.columns else None
    return strata, psu


def cell_stats(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric], groups: list[str],
               sample: np.ndarray | None = None, residual: bool = False) -> pd.DataFrame:
    """Sufficient statistics of every cell of one wave (or of pooled waves).

    Returns one row per subgroup level x metric with: base n, sum of weights, sum of
    squared weights, the weighted value, its Taylor variance, the unit variance
    sum w (y - value)^2 / sum w, and the design degrees of freedom. ``sample`` labels
    independent samples pooled in one table (one per wave): they act as extra strata.
    """
    Y, E = metric_matrix(codebook, table, metrics)
    D, levels = group_matrix(codebook, table, groups, residual)
    w = weights_of(codebook, table)
    strata, psu = design_of(codebook, table)
    if sample is not None:
        strata = _codes(pd.Series(sample).astype(str) + "|" + ("" if strata is None else pd.Series(strata).astype(str)))
    Df = D.astype(float)
    we = E * w[:, None]
    wey = we * Y
    n = Df.T @ E.astype(float)
    sw = Df.T @ we
    sw2 = Df.T @ (we * w[:, None])
    swy = Df.T @ wey
    swy2 = Df.T @ (wey * Y)
    with np.errstate(divide="ignore", invalid="ignore"):
        value = swy / sw
        unit_var = np.maximum(swy2 / sw - value**2, 0.0)
    if psu is None:
        var, n_psu, n_strata = _unclustered_variance(Df, we, wey, value, sw, strata)
    else:
        var, n_psu, n_strata = _clustered_variance(Df, we, wey, value, sw, strata, psu)
    L, M = value.shape
    out = pd.DataFrame({
        "metric": np.tile([m.name for m in metrics], L),
        "group": np.repeat(levels.group, M),
        "subgroup": np.repeat(levels.level, M),
        "base": n.ravel().astype(int),
        "weighted_base": sw.ravel(),
        "sum_w2": sw2.ravel(),
        "value": value.ravel(),
        "variance": var.ravel(),
        "unit_variance": unit_var.ravel(),
        "n_psu": n_psu,
        "design_df": n_psu - n_strata,
    })
    return out


def _unclustered_variance(Df, we, wey, value, sw, strata):
    """Taylor variance when each respondent is a PSU, by matrix products per stratum.

    Within stratum h, with z_i = d_i (wey_i - value * we_i) / sw: sum z and sum z^2 expand
    into sums of wey, we and their products, so no respondent x cell array is built.
    Same estimator as :func:`taylor_variance`.
    """
    n = Df.shape[0]
    h = np.zeros(n, dtype=np.int64) if strata is None else np.unique(strata, return_inverse=True)[1].ravel()
    var = np.zeros_like(value)
    n_strata = int(h.max()) + 1
    with np.errstate(divide="ignore", invalid="ignore"):
        for k in range(n_strata):  # a loop over strata, not cells
            rows = h == k
            n_h = rows.sum()
            if n_h < 2:
                continue
            Dh = Df[rows].T
            a, b = Dh @ wey[rows], Dh @ we[rows]
            a2, ab, b2 = Dh @ wey[rows] ** 2, Dh @ (wey[rows] * we[rows]), Dh @ we[rows] ** 2
            s1 = (a - value * b) / sw
            s2 = (a2 - 2 * value * ab + value**2 * b2) / sw**2
            var += n_h / (n_h - 1) * np.maximum(np.nan_to_num(s2 - s1**2 / n_h), 0.0)
    return var, n, n_strata


def _clustered_variance(Df, we, wey, value, sw, strata, psu):
    var = np.empty_like(value)
    n_psu = n_strata = 0
    for l in range(Df.shape[1]):
        d = Df[:, l][:, None]  # one subgroup level at a time: PSU totals need the level's rows
        # linearized values of a ratio mean: w d e (y - value) / sum(w d e)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.nan_to_num(d * (wey - we * value[l]) / sw[l], nan=0.0, posinf=0.0, neginf=0.0)
        var[l], n_psu, n_strata = taylor_variance(z, strata, psu)
    return var, n_psu, n_strata


def wilson_interval(p, n, level: float = 0.95):
    """Wilson (1927) score interval for a proportion p on n (which may be an effective base).

    Checked against Newcombe (1998, Stat Med 17:857, method 3): 81/263 gives 0.2553 to 0.3662.
    """
    p = np.asarray(p, float)
    n = np.asarray(n, float)
    z = stats.norm.ppf(0.5 + level / 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        denom = 1 + z * z / n
        centre = (p + z * z / (2 * n)) / denom
        half = z / denom * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    # at p = 0 or 1 the limit is exactly 0 or 1; rounding must not put it past the estimate
    return np.where(p <= 0, 0.0, np.clip(centre - half, 0, 1)), np.where(p >= 1, 1.0, np.clip(centre + half, 0, 1))


def nchs_flags(p, width, design_base, df):
    """Reliability of shares by the NCHS Data Presentation Standards for Proportions (2017).

    From memory of the standard (check its wording): suppress when the effective sample size
    is under 30; when the absolute interval width is 0.30 or more; when the width is above
    0.05 and the relative width (width / p) above 130 %. Flag for review (not suppress) when
    the degrees of freedom are under 8, and note estimates of 0 or 1.
    Returns (reliable: bool array, flags: list of text).
    """
    p = np.asarray(p, float)
    width = np.asarray(width, float)
    low_n = ~(design_base >= 30)
    wide = width >= 0.30
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.where(p > 0, width / p, np.inf)
    unstable = (width > 0.05) & (rel > 1.30) & ~wide
    few_df = df < 8
    edge = (p == 0) | (p == 1)
    reliable = ~(low_n | wide | unstable)
    flags = _join_flags([(low_n, "effective base under 30"), (wide, "interval 30 points wide or more"),
                         (unstable, "interval too wide for the value"), (few_df, "under 8 degrees of freedom"),
                         (edge, "0% or 100%")])
    return reliable, flags


def _join_flags(pairs) -> list[str]:
    n = len(pairs[0][0])
    out = [[] for _ in range(n)]
    for mask, text in pairs:
        for i in np.flatnonzero(mask):
            out[i].append(text)
    return ["; ".join(x) for x in out]


def finish(cells: pd.DataFrame, kinds: dict[str, str], level: float = 0.95) -> pd.DataFrame:
    """Derived columns from sufficient statistics: bases, design effect, SE, interval, flags.

    Kish (1965) effective base (sum w)^2 / sum w^2. Design effect (Kish 1965): the Taylor
    variance over the variance the same estimator gives for an unweighted simple random
    sample of the same respondents, unit_variance / n x P / (P - H) with P PSUs and H strata
    (so it is exactly 1 for unweighted data with no design). Design base: n / design effect
    (the effective base that also carries clustering). Shares: Wilson interval on the design base; means and balances: t interval
    with min(design df, n - 1) degrees of freedom.
    """
    c = cells.copy()
    n = c["base"].to_numpy(float)
    sw = c["weighted_base"].to_numpy(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        kish = sw**2 / c["sum_w2"].to_numpy(float)
        p_psu = c["n_psu"].to_numpy(float)
        srs_var = c["unit_variance"].to_numpy(float) / n * p_psu / c["design_df"].to_numpy(float)
        deff = np.where(srs_var > 0, c["variance"].to_numpy(float) / srs_var, np.nan)
        design_base = np.where(deff > 0, n / deff, kish)
    se = np.sqrt(c["variance"].to_numpy(float))
    df = np.minimum(c["design_df"].to_numpy(float), n - 1)
    kind = c["metric"].map(kinds).to_numpy()
    is_share = kind == "share"
    p = c["value"].to_numpy(float)
    wl, wu = wilson_interval(p, design_base, level)
    with np.errstate(invalid="ignore"):
        t = stats.t.ppf(0.5 + level / 2, np.maximum(df, 1))
    lo = np.where(is_share, wl, p - t * se)
    hi = np.where(is_share, wu, p + t * se)
    reliable_share, flags_share = nchs_flags(p, hi - lo, design_base, df)
    low_n = ~(design_base >= 30)
    reliable_other = ~low_n
    flags_other = _join_flags([(low_n, "effective base under 30"), (df < 8, "under 8 degrees of freedom")])
    empty = n == 0
    c["effective_base"] = kish
    c["design_effect"] = deff
    c["design_base"] = design_base
    c["se"] = se
    c["ci_low"] = lo
    c["ci_high"] = hi
    c["df"] = df
    c["kind"] = kind
    c["reliable"] = np.where(is_share, reliable_share, reliable_other) & ~empty
    c["flags"] = np.where(empty, "no respondents", np.where(is_share, flags_share, flags_other))
    return c


def wave_estimates(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric], groups: list[str],
                   label: str, date: str, level: float = 0.95, sample: np.ndarray | None = None) -> pd.DataFrame:
    """The full estimates rows of one wave (with the sufficient statistics kept)."""
    cells = cell_stats(codebook, table, metrics, groups, sample)
    out = finish(cells, {m.name: m.kind for m in metrics}, level)
    out.insert(0, "wave", label)
    out.insert(1, "fieldwork_date", date)
    out["metric_label"] = out["metric"].map({m.name: m.label for m in metrics})
    return out


def overlap_covariance(codebook: Codebook, a: pd.DataFrame, b: pd.DataFrame, metrics: list[Metric],
                       groups: list[str], est_a: pd.DataFrame, est_b: pd.DataFrame) -> tuple[np.ndarray, int]:
    """Covariance of two waves' estimates from the respondents both waves share (by id).

    Sum over matched respondents of the product of their linearized values in the two
    waves (Kish 1965, ch. 12, overlapping samples; the respondent-level form is common
    practice, no source). Returns one covariance per cell, in the order of ``cell_stats``,
    and the number of matched respondents. Clustering is not used here.
    """
    ids_a = a[codebook.id].astype(str).to_numpy()
    ids_b = b[codebook.id].astype(str).to_numpy()
    common, ia, ib = np.intersect1d(ids_a, ids_b, return_indices=True)
    L = 1 + sum(len(codebook.groups[g].levels) for g in groups)
    if common.size == 0:
        return np.zeros(L * len(metrics)), 0

    def lin(table, idx, est):
        Y, E = metric_matrix(codebook, table, metrics)
        D, _ = group_matrix(codebook, table, groups)
        w = weights_of(codebook, table)
        value = est["value"].to_numpy().reshape(L, -1)
        sw = est["weighted_base"].to_numpy().reshape(L, -1)
        we = (E * w[:, None])[idx]
        y = Y[idx]
        d = D[idx].astype(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = d[:, :, None] * we[:, None, :] * (y[:, None, :] - value[None]) / sw[None]
        return np.nan_to_num(z, nan=0.0)

    za = lin(a, ia, est_a)
    zb = lin(b, ib, est_b)
    m = common.size
    # m/(m-1), as in the variance: with full overlap this is the paired-test variance
    factor = m / (m - 1) if m > 1 else 1.0
    return factor * (za * zb).sum(axis=0).ravel(), int(m)
