"""Tests and intervals for differences, multiple-comparison control and detectable change.

All functions are vectorised over arrays of comparisons.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from .estimates import wilson_interval

ADJUST_METHODS = {
    "bh": "Benjamini-Hochberg false discovery rate",
    "holm": "Holm family-wise error rate",
    "by": "Benjamini-Yekutieli false discovery rate",
    "none": "no adjustment",
}


def adjust_pvalues(p, method: str = "bh") -> np.ndarray:
    """Adjusted p-values for a family of tests (NaN entries are left out of the family).

    bh: Benjamini & Hochberg (1995, JRSS B 57:289) step-up; by: Benjamini & Yekutieli
    (2001, Ann Stat 29:1165), BH with the harmonic factor sum 1/i; holm: Holm (1979,
    Scand J Stat 6:65) step-down. A test is significant at level alpha when its adjusted p
    is at most alpha. Values agree with statsmodels ``multipletests`` (fdr_bh, fdr_by, holm).
    """
    p = np.asarray(p, float)
    out = np.full(p.shape, np.nan)
    ok = ~np.isnan(p)
    q = p[ok]
    m = q.size
    if m == 0 or method == "none":
        out[ok] = q
        return out
    order = np.argsort(q, kind="mergesort")
    ranked = q[order]
    i = np.arange(1, m + 1)
    if method in ("bh", "by"):
        factor = np.sum(1.0 / i) if method == "by" else 1.0
        adj = np.minimum.accumulate((ranked * m * factor / i)[::-1])[::-1]
    elif method == "holm":
        adj = np.maximum.accumulate(ranked * (m - i + 1))
    else:
        raise ValueError(f"unknown adjustment {method!r}; use one of {', '.join(ADJUST_METHODS)}")
    res = np.empty(m)
    res[order] = np.minimum(adj, 1.0)
    out[ok] = res
    return out


def newcombe_interval(p1, n1, p2, n2, level: float = 0.95):
    """Newcombe (1998, Stat Med 17:873) hybrid score interval for p1 - p2 (his method 10).

    Built from the Wilson limits of each proportion; n1 and n2 may be effective bases.
    Checked against the paper: 56/70 - 48/80 gives 0.0524 to 0.3339; 9/10 - 3/10 gives
    0.1705 to 0.8090.
    """
    p1, p2 = np.asarray(p1, float), np.asarray(p2, float)
    l1, u1 = wilson_interval(p1, n1, level)
    l2, u2 = wilson_interval(p2, n2, level)
    d = p1 - p2
    return d - np.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2), d + np.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)


def welch_df(v1, v2, n1, n2):
    """Welch-Satterthwaite degrees of freedom (Welch 1947, Biometrika 34:28) for v1 + v2,
    each v the variance of a mean on n (effective) respondents."""
    v1, v2 = np.asarray(v1, float), np.asarray(v2, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return (v1 + v2) ** 2 / (v1**2 / (np.asarray(n1, float) - 1) + v2**2 / (np.asarray(n2, float) - 1))


def min_detectable_change(se_diff, level: float = 0.95, power: float = 0.80):
    """Smallest true change a two-sided test at ``level`` finds with ``power``:
    (z_{1-alpha/2} + z_power) x SE of the difference (normal approximation; the same
    quantity statsmodels ``NormalIndPower`` solves for with effect size 1)."""
    return (stats.norm.ppf(0.5 + level / 2) + stats.norm.ppf(power)) * np.asarray(se_diff, float)
