"""Minimum detectable change: the smallest true change a test would find with given power."""

from __future__ import annotations

import numpy as np

from .distributions import norm_ppf, t_ppf
from .intervals import by_unique

__all__ = ["min_detectable_change", "min_detectable_share_change", "power_factor"]


def power_factor(level: float = 0.95, power: float = 0.80, df=None):
    """t_{1-alpha/2} + t_{power} (normal quantiles when df is None or infinite)."""
    if df is None:
        return norm_ppf(0.5 + level / 2) + norm_ppf(power)
    df = np.maximum(np.asarray(df, float), 1.0)
    return by_unique(lambda d: t_ppf(0.5 + level / 2, d) + t_ppf(power, d), df)


def min_detectable_change(se_diff, level: float = 0.95, power: float = 0.80, df=None):
    """Smallest true change a two-sided test at ``level`` finds with ``power`` when the
    standard error of the difference does not depend on the change (means, balances):
    (t_{1-alpha/2} + t_power) x SE, the quantity statsmodels ``NormalIndPower`` solves for
    (normal quantiles when df is None)."""
    return power_factor(level, power, df) * np.asarray(se_diff, float)


def min_detectable_share_change(p0, v0, n1, cov=0.0, level: float = 0.95, power: float = 0.80, df=None):
    """Minimum detectable change of a share, with the later wave's variance taken under
    the alternative: the delta solving

      delta = k sqrt(v0 + (p0 + s delta)(1 - p0 - s delta) / n1 - 2 cov),   s = +1 or -1,

    with k = t_{1-alpha/2} + t_power, v0 the earlier wave's variance, n1 the later wave's
    effective base (p(1 - p)/V) and cov the covariance of the two waves. For a share far
    from 0.5 the variance grows with a move towards 0.5, so the rise and the fall differ;
    this returns (the larger of the two, rise, fall). A direction that would leave [0, 1]
    is NaN. The squared equation is a quadratic in delta (derived in docs/methods.md); at
    p0 = 0.5 both roots equal the symmetric formula to first order.
    """
    p0, v0, n1, cov = (np.asarray(x, float) for x in (p0, v0, n1, cov))
    k2 = power_factor(level, power, df) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        q = 1.0 / n1
        a = 1 + k2 * q
        c = k2 * (np.maximum(v0 - 2 * cov, 0.0) + q * p0 * (1 - p0))
        out = []
        for s in (1.0, -1.0):  # rise, fall
            b = k2 * q * s * (1 - 2 * p0)
            delta = (b + np.sqrt(b * b + 4 * a * c)) / (2 * a)
            inside = (p0 + s * delta >= 0) & (p0 + s * delta <= 1)
            out.append(np.where(inside, delta, np.nan))
    rise, fall = out
    return np.fmax(rise, fall), rise, fall
