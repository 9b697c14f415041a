"""Intervals for one value and for a difference (numpy, vectorised over cells)."""

from __future__ import annotations

import numpy as np

from .distributions import beta_ppf, norm_ppf, t_ppf

__all__ = ["critical", "korn_graubard_interval", "newcombe_interval", "t_interval", "wilson_interval"]


def critical(level: float, df=None):
    """The two-sided critical value: normal when ``df`` is None or infinite, else Student's t."""
    if df is None:
        return norm_ppf(0.5 + level / 2)
    df = np.maximum(np.asarray(df, float), 1.0)  # fewer than one degree of freedom is read as one
    return by_unique(lambda d: t_ppf(0.5 + level / 2, d), df)


def by_unique(f, x):
    """f(x) computed once per distinct value of x (cells share a few degrees of freedom)."""
    x = np.asarray(x, float)
    if x.ndim == 0 or x.size < 64:
        return f(x)
    u, inv = np.unique(x, return_inverse=True)
    return np.asarray(f(u))[inv.reshape(x.shape)]


def wilson_interval(p, n, level: float = 0.95, df=None):
    """Wilson (1927, JASA 22:209) score interval for a share p on n (an effective base).

    With ``df`` the normal quantile is replaced by Student's t on the design's degrees of
    freedom (the same adjustment Korn & Graubard 1998 make to the exact interval; common
    practice, no single source). Limits are exactly 0 and 1 at p = 0 and 1.

    >>> lo, hi = wilson_interval(81 / 263, 263)   # Newcombe (1998, Stat Med 17:857), method 3
    >>> round(float(lo), 4), round(float(hi), 4)
    (0.2553, 0.3662)
    """
    p = np.asarray(p, float)
    n = np.asarray(n, float)
    z = critical(level, df)
    with np.errstate(divide="ignore", invalid="ignore"):
        denom = 1 + z * z / n
        centre = (p + z * z / (2 * n)) / denom
        half = z / denom * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    # at p = 0 or 1 the limit is exactly 0 or 1; rounding must not put it past the estimate
    return np.where(p <= 0, 0.0, np.clip(centre - half, 0, 1)), np.where(p >= 1, 1.0, np.clip(centre + half, 0, 1))


def korn_graubard_interval(p, n_eff, n, df, level: float = 0.95):
    """Korn & Graubard (1998, *Survey Methodology* 24:193) interval for a share: the
    Clopper-Pearson exact interval on the degrees-of-freedom adjusted effective base,
    the interval of the NCHS Data Presentation Standards for Proportions (Parker et al.
    2017).

    n* = min(n_eff, n) (the effective base is capped at the sample size), adjusted by
    (t_{n-1} / t_df)^2 when that factor is below 1; x = p n*; limits are the beta
    quantiles B(alpha/2; x, n* - x + 1) and B(1 - alpha/2; x + 1, n* - x), 0 and 1 at the
    edges. Equals statsmodels ``proportion_confint(x, n*, method="beta")``.
    """
    p, n_eff, n = (np.asarray(x, float) for x in (p, n_eff, n))
    alpha = 1 - level
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = (by_unique(lambda d: t_ppf(1 - alpha / 2, d), np.maximum(n - 1, 1)) / critical(level, df)) ** 2
        n_star = np.minimum(n_eff, n) * np.minimum(ratio, 1.0)
        x = p * n_star
        lo = np.where(x > 0, beta_ppf(alpha / 2, np.where(x > 0, x, 1), n_star - x + 1), 0.0)
        hi = np.where(x < n_star, beta_ppf(1 - alpha / 2, x + 1, np.where(x < n_star, n_star - x, 1)), 1.0)
    bad = ~(n_star > 0)
    return np.where(bad, np.nan, lo), np.where(bad, np.nan, hi)


def t_interval(value, se, df, level: float = 0.95):
    """value -/+ t_{df} x SE (Student's t on the design's degrees of freedom)."""
    value, se = np.asarray(value, float), np.asarray(se, float)
    t = critical(level, df)
    return value - t * se, value + t * se


def newcombe_interval(p1, n1, p2, n2, level: float = 0.95, df1=None, df2=None):
    """Newcombe (1998, Stat Med 17:873) hybrid score interval for p1 - p2 (his method 10),
    built from the Wilson limits of each share on its effective base (with each wave's
    degrees of freedom when given).

    >>> lo, hi = newcombe_interval(56 / 70, 70, 48 / 80, 80)   # Newcombe (1998), method 10
    >>> round(float(lo), 4), round(float(hi), 4)
    (0.0524, 0.3339)
    """
    p1, p2 = np.asarray(p1, float), np.asarray(p2, float)
    l1, u1 = wilson_interval(p1, n1, level, df1)
    l2, u2 = wilson_interval(p2, n2, level, df2)
    d = p1 - p2
    return d - np.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2), d + np.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)
