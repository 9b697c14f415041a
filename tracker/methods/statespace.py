"""Smoothed series for thin subgroups, by signal extraction in a local-level model.

A repeated survey's estimate y_t is a true value plus sampling error with a known variance
v_t (the design variance of the wave); the true value moves as a random walk with
variance q per wave (the approach for repeated surveys of Scott & Smith 1974, JASA 69:674;
Pfeffermann 1991, J Bus Econ Stat 9:163; Tiller 1992, J Off Stat 8:149):

  y_t = mu_t + e_t,  e_t ~ N(0, v_t);   mu_t = mu_{t-1} + eta_t,  eta_t ~ N(0, q).

The Kalman filter and the fixed-interval smoother (Harvey 1989, *Forecasting, Structural
Time Series Models and the Kalman Filter*, sections 3.2 and 3.6) give E(mu_t | all waves)
and its variance; mu_1 has a diffuse prior (its first observation starts the filter, and
the likelihood counts the waves after it, as exact diffuse initialisation does). q is
estimated per series by maximum likelihood, every series at once (a golden-section search
on log q, and q = 0 when that is likelier); with a constant v the filter, the smoother and
the estimate equal statsmodels ``UnobservedComponents(level="llevel")`` with the irregular
variance fixed at v (tests/test_smoothing.py). The values the tool shows average the
smoother over q (:func:`smooth_over_q`), so that the interval carries q's uncertainty. The
smoothed value is never a substitute for the direct estimate: it is shown beside it, labelled.
"""

from __future__ import annotations

import numpy as np

__all__ = ["fit_local_level", "local_level", "smooth_over_q", "smooth_with_seasons"]

LOG_2PI = float(np.log(2 * np.pi))
#: The signal variances q averaged over, as powers of ten of the series' mean sampling variance
#: (smooth_over_q says why the floor is not lower).
Q_GRID = (-2.5, 1.0)


def local_level(y: np.ndarray, v: np.ndarray, ok: np.ndarray, q: np.ndarray, smooth: bool = True) -> dict:
    """Filter (and smooth) many series at once: y, v, ok are (series x waves), q (series,).

    Returns ``loglik`` (series,), and with ``smooth`` the smoothed ``mean`` and ``var``
    (series x waves; NaN before a series' first usable wave)."""
    y = np.where(ok, y, 0.0)
    v = np.where(ok, v, 1.0)
    S, K = y.shape
    q = np.asarray(q, float)
    a = np.full((S, K), np.nan)   # filtered mean
    P = np.full((S, K), np.nan)   # filtered variance
    started = np.zeros(S, bool)
    cur_a = np.zeros(S)
    cur_p = np.zeros(S)
    loglik = np.zeros(S)
    for t in range(K):  # a loop over waves; every series at once
        pred_a = cur_a
        pred_p = cur_p + q
        obs = ok[:, t]
        first = obs & ~started
        upd = obs & started
        F = pred_p + v[:, t]
        nu = y[:, t] - pred_a
        with np.errstate(divide="ignore", invalid="ignore"):
            gain = np.where(upd, pred_p / F, 0.0)
            loglik += np.where(upd, -0.5 * (LOG_2PI + np.log(F) + nu * nu / F), 0.0)
        new_a = np.where(upd, pred_a + gain * nu, pred_a)
        new_p = np.where(upd, pred_p * (1 - gain), pred_p)
        # the diffuse start: the first observation alone fixes the level, with its own variance
        new_a = np.where(first, y[:, t], new_a)
        new_p = np.where(first, v[:, t], new_p)
        started |= obs
        cur_a = np.where(started, new_a, 0.0)
        cur_p = np.where(started, new_p, 0.0)
        a[:, t] = np.where(started, cur_a, np.nan)
        P[:, t] = np.where(started, cur_p, np.nan)
    out: dict[str, np.ndarray] = {"loglik": loglik}
    if not smooth:
        return out
    ms, vs = a.copy(), P.copy()
    for t in range(K - 2, -1, -1):  # the fixed-interval smoother, backwards over waves
        pred_p = P[:, t] + q
        with np.errstate(divide="ignore", invalid="ignore"):
            c = np.where(pred_p > 0, P[:, t] / pred_p, 0.0)
        ms[:, t] = a[:, t] + c * (ms[:, t + 1] - a[:, t])
        vs[:, t] = P[:, t] + c * c * (vs[:, t + 1] - pred_p)
    out.update(mean=ms, var=np.maximum(vs, 0.0))
    return out


def fit_local_level(y: np.ndarray, v: np.ndarray, ok: np.ndarray, iterations: int = 80) -> np.ndarray:
    """The maximum-likelihood signal variance q of every series (series x waves inputs):
    golden-section search on log q between 1e-6 and 100 times the series' mean sampling
    variance (the likelihood is unimodal in practice for this model), then q = 0 where the
    likelihood at 0 is at least as high."""
    S, _K = y.shape
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(ok, v, 0.0).sum(axis=1) / np.maximum(ok.sum(axis=1), 1)
    scale = np.where(scale > 0, scale, 1e-4)
    lo, hi = np.log(scale * 1e-6), np.log(scale * 100.0)
    g = (np.sqrt(5) - 1) / 2
    x1, x2 = hi - g * (hi - lo), lo + g * (hi - lo)
    f1 = local_level(y, v, ok, np.exp(x1), smooth=False)["loglik"]
    f2 = local_level(y, v, ok, np.exp(x2), smooth=False)["loglik"]
    for _ in range(iterations):  # each step narrows every series' bracket at once
        left = f1 >= f2
        hi = np.where(left, x2, hi)
        lo = np.where(left, lo, x1)
        x2n = np.where(left, x1, lo + g * (hi - lo))
        x1n = np.where(left, hi - g * (hi - lo), x2)
        f_new = local_level(y, v, ok, np.exp(np.where(left, x1n, x2n)), smooth=False)["loglik"]
        f1, f2 = np.where(left, f_new, f2), np.where(left, f1, f_new)
        x1, x2 = x1n, x2n
    best = np.exp((lo + hi) / 2)
    at_best = local_level(y, v, ok, best, smooth=False)["loglik"]
    at_zero = local_level(y, v, ok, np.zeros(S), smooth=False)["loglik"]
    return np.where(at_zero >= at_best, 0.0, best)


def smooth_over_q(y: np.ndarray, v: np.ndarray, ok: np.ndarray, points: int = 25) -> dict:
    """The smoothed series with the signal variance's uncertainty carried into the interval:
    the smoother at each q of a log-spaced grid (Q_GRID: 10^-2.5 to 10 times the series' mean
    sampling variance), averaged with weights proportional to the likelihood (a flat prior on
    log q over the grid). Plugging in the maximum-likelihood q alone gives intervals that cover
    too rarely (87 % for a 95 % interval in the setting of docs/validation.md), since q is often
    estimated near zero; averaging over q carries its uncertainty. The grid's floor matters as
    series grow: from 1e-4 the posterior's weight on signals too small to matter narrowed the
    interval to 90 % coverage at 24 monthly waves of a slow walk; from 10^-2.5 it covers 95 %
    there and 96 % at 14 waves (docs/validation.md). Returns mean, var (the mixture's), and
    q_ml (the grid's likeliest q, refined by :func:`fit_local_level`)."""
    _S, _K = y.shape
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(ok, v, 0.0).sum(axis=1) / np.maximum(ok.sum(axis=1), 1)
    scale = np.where(scale > 0, scale, 1e-4)
    factors = np.logspace(*Q_GRID, points)
    fits = [local_level(y, v, ok, scale * f) for f in factors]  # a loop over grid points; series at once
    ll = np.stack([f["loglik"] for f in fits])
    w = np.exp(ll - ll.max(axis=0))
    w /= w.sum(axis=0)
    mean = sum(w[i][:, None] * f["mean"] for i, f in enumerate(fits))
    second = sum(w[i][:, None] * (f["var"] + f["mean"] ** 2) for i, f in enumerate(fits))
    return {"mean": mean, "var": np.maximum(second - mean**2, 0.0), "q_ml": fit_local_level(y, v, ok)}


def smooth_with_seasons(y: np.ndarray, v: np.ndarray, ok: np.ndarray, H: np.ndarray, points: int = 25,
                        factors: np.ndarray | None = None) -> dict:
    """The local-level smoother with fixed seasonal effects, every series at once: y_t = mu_t +
    (H s)_t + e_t, mu_t a random walk (variance q per wave) from a diffuse start, s the
    seasons' coefficients (H: waves x harmonics, from tracker.trends.season_columns) with a
    diffuse prior, i.e. fixed effects (the basic structural model with a fixed seasonal
    pattern; Harvey 1989, sections 2.3 and 3.2). For each q the model is a linear mixed model:
    the start level and s are estimated by generalized least squares with V = G + diag(v),
    G = q W (W_ij = min(i, j) - first usable wave), the walk by its best linear unbiased
    predictor, and the error variance of mu_t + (H s)_t is diag((F - M) Cov(b) (F - M)') +
    diag(G - G V^-1 G), F = [1, H], M = G V^-1 F (Henderson 1975, Biometrics 31:423); the
    likelihood of q is the restricted one, which the diffuse start makes exact (de Jong 1991,
    Ann Stat 19:1073). As :func:`smooth_over_q`, the fits are averaged over a log-spaced grid
    of q with weights proportional to the likelihood (``factors``, if given, replaces the grid's
    multiples of the mean sampling variance); with no columns in H it is :func:`smooth_over_q`
    exactly. Waves before a series' first usable one get NaN; a gap wave
    is predicted. Returns mean, var and q_ml (the grid's likeliest q)."""
    S, K = y.shape
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(ok, v, 0.0).sum(axis=1) / np.maximum(ok.sum(axis=1), 1)
    scale = np.where(scale > 0, scale, 1e-4)
    first = np.where(ok.any(axis=1), ok.argmax(axis=1), 0)
    steps = np.maximum(np.arange(K)[None, :] - first[:, None], 0).astype(float)
    W = np.minimum(steps[:, :, None], steps[:, None, :])
    big = 1e10 * scale[:, None]  # a wave without a usable value carries no weight
    vv = np.where(ok, v, big)
    yy = np.where(ok, y, 0.0)
    F = np.concatenate([np.ones((K, 1)), H], axis=1)
    diag = np.arange(K)
    fits = []
    for f in np.logspace(*Q_GRID, points) if factors is None else factors:  # a loop over the grid; series at once
        G = (scale * f)[:, None, None] * W
        V = G.copy()
        V[:, diag, diag] += vv
        Vi = np.linalg.inv(V)
        ViF = Vi @ F
        info = F.T @ ViF
        cov_b = np.linalg.inv(info)
        b = np.einsum("spq,skq,sk->sp", cov_b, ViF, yy)
        r = yy - b @ F.T
        Vir = np.einsum("skj,sj->sk", Vi, r)
        mean = b @ F.T + np.einsum("skj,sj->sk", G, Vir)
        D = F[None] - G @ ViF
        var = (np.einsum("skp,spq,skq->sk", D, cov_b, D) + np.einsum("skk->sk", G)
               - np.einsum("skj,sjl,slk->sk", G, Vi, G))
        logdet_v = np.linalg.slogdet(V)[1] - np.where(ok, 0.0, np.log(big)).sum(axis=1)
        loglik = -0.5 * (logdet_v + np.linalg.slogdet(info)[1] + np.einsum("sk,sk->s", r, Vir))
        fits.append((loglik, mean, var, scale * f))
    ll = np.stack([f[0] for f in fits])
    w = np.exp(ll - ll.max(axis=0))
    w /= w.sum(axis=0)
    mean = sum(w[i][:, None] * f[1] for i, f in enumerate(fits))
    second = sum(w[i][:, None] * (f[2] + f[1] ** 2) for i, f in enumerate(fits))
    before = np.arange(K)[None, :] < first[:, None]
    q_ml = np.stack([f[3] for f in fits])[ll.argmax(axis=0), np.arange(S)]
    return {"mean": np.where(before, np.nan, mean), "var": np.where(before, np.nan, np.maximum(second - mean**2, 0.0)),
            "q_ml": q_ml, "loglik": ll.T}
