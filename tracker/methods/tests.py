"""Tests of differences and multiple-comparison control (numpy, vectorised over comparisons)."""

from __future__ import annotations

import numpy as np

from .distributions import t_sf

__all__ = ["ADJUST_METHODS", "adjust_pvalues", "difference_test", "family_level", "paired_df", "satterthwaite_df"]

from ..names import ADJUST_METHODS


def adjust_pvalues(p, method: str = "bh") -> np.ndarray:
    """Adjusted p-values for a family of tests (NaN entries are left out of the family).

    bh: Benjamini & Hochberg (1995, JRSS B 57:289) step-up; by: Benjamini & Yekutieli
    (2001, Ann Stat 29:1165), BH with the harmonic factor sum 1/i; holm: Holm (1979,
    Scand J Stat 6:65) step-down. A test is significant at level alpha when its adjusted p
    is at most alpha. Values agree with statsmodels ``multipletests`` (fdr_bh, fdr_by, holm).

    >>> p = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
    ...      0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]   # Benjamini & Hochberg (1995)
    >>> int((adjust_pvalues(p, "bh") <= 0.05).sum()), int((adjust_pvalues(p, "holm") <= 0.05).sum())
    (4, 3)
    """
    p = np.asarray(p, float)
    out = np.full(p.shape, np.nan)
    ok = ~np.isnan(p)
    q = p[ok]
    m = q.size
    if method not in ADJUST_METHODS:
        raise ValueError(f"unknown adjustment {method!r}; use one of {', '.join(ADJUST_METHODS)}")
    if m == 0 or method == "none":
        out[ok] = q
        return out
    order = np.argsort(q, kind="mergesort")
    ranked = q[order]
    i = np.arange(1, m + 1)
    if method in ("bh", "by"):
        factor = np.sum(1.0 / i) if method == "by" else 1.0
        adj = np.minimum.accumulate((ranked * m * factor / i)[::-1])[::-1]
    else:
        adj = np.maximum.accumulate(ranked * (m - i + 1))
    res = np.empty(m)
    res[order] = np.minimum(adj, 1.0)
    out[ok] = res
    return out


def family_level(p_adjusted, method: str = "bh", alpha: float = 0.05) -> float:
    """The confidence level of the intervals that agree with a family's adjusted verdicts:
    zero lies outside a comparison's interval at this level exactly when its adjusted p is
    at most ``alpha`` (for an interval dual to the comparison's own test).

    bh: the false-coverage-rate adjusted level 1 - R alpha / m for the R comparisons found
    significant of the m tested (Benjamini & Yekutieli 2005, JASA 100:71, definition 1;
    with R = 0 the level 1 - alpha / m); by: the same with alpha / sum(1/i), the factor of
    Benjamini & Yekutieli (2001); holm: 1 - alpha / (m - R + 1), the last step Holm's (1979)
    procedure took, Bonferroni's simultaneous level when nothing is significant; none:
    1 - alpha. Why these agree: a BH-significant p is at most R alpha / m and any other is
    above it (else the step-up would have gone further); a Holm-significant p is at most
    alpha / (m - R + 1) and the first one kept is above alpha / (m - R).

    >>> p = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
    ...      0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]   # Benjamini & Hochberg (1995)
    >>> round(family_level(adjust_pvalues(p, "bh"), "bh"), 6)   # R = 4 of m = 15
    0.986667
    >>> round(family_level(adjust_pvalues(p, "holm"), "holm"), 6)   # R = 3: 1 - 0.05 / 13
    0.996154
    """
    q = np.asarray(p_adjusted, float)
    q = q[np.isfinite(q)]
    m = q.size
    if method not in ADJUST_METHODS:
        raise ValueError(f"unknown adjustment {method!r}; use one of {', '.join(ADJUST_METHODS)}")
    if m == 0 or method == "none":
        return 1.0 - alpha
    r = int((q <= alpha).sum())
    if method == "holm":
        return 1.0 - alpha / (m - r + 1)
    factor = float(np.sum(1.0 / np.arange(1, m + 1))) if method == "by" else 1.0
    return 1.0 - max(r, 1) * alpha / (m * factor)


def satterthwaite_df(v1, v2, df1, df2):
    """Degrees of freedom of v1 + v2, each variance estimated on df1 and df2 degrees of
    freedom (Satterthwaite 1946, Biometrics Bull 2:110): (v1 + v2)^2 / (v1^2/df1 + v2^2/df2).
    With df_i = n_i - 1 and v_i = s_i^2 / n_i this is Welch's (1947) df, as scipy
    ``ttest_ind(equal_var=False)`` computes it. Infinite df_i count as known variances."""
    v1, v2, df1, df2 = (np.asarray(x, float) for x in (v1, v2, df1, df2))
    with np.errstate(divide="ignore", invalid="ignore"):
        denom = np.where(np.isfinite(df1), v1**2 / df1, 0.0) + np.where(np.isfinite(df2), v2**2 / df2, 0.0)
        return np.where(denom > 0, (v1 + v2) ** 2 / denom, np.inf)


def paired_df(psu_to, df_to, psu_from, df_from, shared):
    """Degrees of freedom of a change whose two waves share PSUs (clusters, or respondents
    of a panel): those of the stacked design, the PSUs holding the cell in either wave
    (each shared one counted once) minus the strata holding them, as R's ``degf`` of the
    design that holds both waves (Lumley 2010, *Complex Surveys*, section 3.4: the paired
    1999/2000 comparison of ``apistrat`` has 197). ``psu_*`` and ``df_*`` are each wave's
    PSUs and design df for the cell (strata = PSUs - df), ``shared`` the PSUs holding it in
    both. Satterthwaite's sum of the two waves' df would count a shared PSU twice and
    overstate the df (docs/validation.md: 5 strata of 2 recurring clusters)."""
    psu_to, df_to, psu_from, df_from, shared = (np.asarray(x, float) for x in (psu_to, df_to, psu_from, df_from,
                                                                               shared))
    strata = np.maximum(psu_to - df_to, psu_from - df_from)
    return np.maximum(psu_to + psu_from - shared - strata, 1.0)


def difference_test(d, var, df):
    """t statistic d / sqrt(var) and its two-sided p on ``df`` degrees of freedom (normal
    when df is infinite). NaN where the variance is not positive."""
    d, var = np.asarray(d, float), np.asarray(var, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        stat = np.where(var > 0, d / np.sqrt(np.where(var > 0, var, 1.0)), np.nan)
        p = 2 * t_sf(np.abs(stat), np.maximum(np.asarray(df, float), 1.0))
    return stat, p
