"""Bases: Kish effective base, design effect and design base (numpy, vectorised)."""

from __future__ import annotations

import numpy as np

__all__ = ["design_base", "design_effect", "kish_base"]


def kish_base(sum_w, sum_w2):
    """Kish (1965, *Survey Sampling*) effective base of weighting: (sum w)^2 / sum w^2.

    Weights 1, 2, 3 give 36 / 14; equal weights give n.
    """
    sum_w, sum_w2 = np.asarray(sum_w, float), np.asarray(sum_w2, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return sum_w**2 / sum_w2


def design_effect(variance, unit_variance, n):
    """Kish's design effect: the design variance over the variance of a simple random
    sample of the same size, V / (sigma^2 / n), with sigma^2 = sum w (y - value)^2 / sum w
    (for a share, p(1 - p)) (Kish 1965, section 8.2). NaN where sigma^2 is 0."""
    variance, unit_variance, n = (np.asarray(x, float) for x in (variance, unit_variance, n))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(unit_variance > 0, variance * n / unit_variance, np.nan)


def design_base(variance, unit_variance, n, kish=None):
    """The effective base of the design, sigma^2 / V = n / design effect: for a share
    p(1 - p) / V, the effective sample size of the NCHS standard for proportions (Parker et
    al. 2017, *Vital Health Stat* 2(175)), which intervals and the reliability rule read.

    With ``kish`` (the Kish base of the cell's weights) it is never larger than that base,
    and it is that base where V or sigma^2 is 0 (a share of 0 or 1), never the unweighted n:
    a rare share's design variance is itself unstable and too often too small, so a base
    above what the weights alone allow would give intervals that cover far less than they
    say (docs/validation.md, rare shares with informative weights). Without ``kish``, n
    where undefined, as the NCHS standard does.
    """
    variance, unit_variance, n = (np.asarray(x, float) for x in (variance, unit_variance, n))
    with np.errstate(divide="ignore", invalid="ignore"):
        own = np.where((variance > 0) & (unit_variance > 0), unit_variance / variance, np.nan)
    if kish is None:
        return np.where(np.isnan(own), n, own)
    kish = np.asarray(kish, float)
    return np.where(np.isnan(own), kish, np.fmin(own, kish))
