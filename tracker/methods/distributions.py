"""Quantiles and tail areas of the normal, Student t, beta, chi-square and F distributions.

Thin names over ``scipy.special`` (the Cephes / Boost routines that ``scipy.stats`` calls
for the same quantities), so that a command computing estimates does not import
``scipy.stats`` (about 0.6 s at start-up). tests/test_distributions.py checks every one
against ``scipy.stats`` to 1e-12.
"""

from __future__ import annotations

import numpy as np
from scipy import special

__all__ = ["beta_ppf", "chi2_sf", "f_sf", "norm_ppf", "norm_sf", "t_ppf", "t_sf"]


def norm_ppf(q):
    """Standard normal quantile (``scipy.stats.norm.ppf``)."""
    return special.ndtri(q)


def norm_sf(x):
    """Standard normal upper tail P(Z > x) (``scipy.stats.norm.sf``)."""
    return special.ndtr(-np.asarray(x, float))


def t_ppf(q, df):
    """Student t quantile (``scipy.stats.t.ppf``); infinite df gives the normal quantile."""
    q, df = np.broadcast_arrays(np.asarray(q, float), np.asarray(df, float))
    return np.where(np.isinf(df), special.ndtri(q), special.stdtrit(np.where(np.isinf(df), 1.0, df), q))[()]


def t_sf(x, df):
    """Student t upper tail P(T > x) (``scipy.stats.t.sf``); infinite df gives the normal tail."""
    x, df = np.broadcast_arrays(np.asarray(x, float), np.asarray(df, float))
    return np.where(np.isinf(df), special.ndtr(-x), special.stdtr(np.where(np.isinf(df), 1.0, df), -x))[()]


def beta_ppf(q, a, b):
    """Beta quantile (``scipy.stats.beta.ppf``, the same Boost routine)."""
    return special.betaincinv(a, b, q)


def chi2_sf(x, df):
    """Chi-square upper tail (``scipy.stats.chi2.sf``)."""
    return special.chdtrc(df, x)


def f_sf(x, dfn, dfd):
    """F upper tail (``scipy.stats.f.sf``)."""
    return special.fdtrc(dfn, dfd, x)
