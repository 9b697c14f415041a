"""An independent computation of the seasons model of tracker.trends.seasonal_regression, for
the tests: every likelihood from the full data by scipy's multivariate normal (the restricted
likelihood of Patterson & Thompson 1971, Biometrika 58:545, with the plain coefficients
integrated out), every fit by statsmodels' WLS (Henderson's equations as a weighted regression
on the data plus one pseudo-observation of 0 per seasonal coefficient, weight 1 / its variance:
the ridge form of a normal prior, common practice, no source), and the mixture's mean and
covariance by hand. Only the grid, the prior odds and the between-wave variances (the tool's
DerSimonian-Laird meta_regression, checked against statsmodels elsewhere) are taken from the tool.
"""

from __future__ import annotations

import numpy as np
import statsmodels.api as sm
from scipy import stats

from tracker import trends


def _restricted_loglik(y, Xp, V):
    """log L_R(V) = log N(y; Xp b_GLS, V) - log|Xp' V^-1 Xp| / 2 (up to a constant)."""
    Vi = np.linalg.inv(V)
    b = np.linalg.solve(Xp.T @ Vi @ Xp, Xp.T @ Vi @ y)
    return stats.multivariate_normal(Xp @ b, V).logpdf(y) - 0.5 * np.linalg.slogdet(Xp.T @ Vi @ Xp)[1]


def mixture(y: np.ndarray, v: np.ndarray, Xp: np.ndarray, H: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """The coefficients' mixture mean and covariance over (plain, seasons), and the posterior
    probability of seasons, for one series: y, v (K,), Xp (K, 2) plain columns, H (K, h) harmonics."""
    K, h = H.shape
    X = np.column_stack([Xp, H])
    ok = np.ones((1, K), bool)
    tau_y = trends.meta_regression(y[None], v[None], X[None, :, :4], ok)["tau2"][0]
    tau_p = trends.meta_regression(y[None], v[None], Xp[None], ok)["tau2"][0]
    base = _restricted_loglik(y, Xp, np.diag(v + tau_y))
    grid = [(a, b) for a in np.geomspace(trends.SMALLEST_SEASON, 10.0, 8)
            for b in np.geomspace(trends.SMALLEST_SEASON, 10.0, 5)]
    logw, means, covs = [], [], []
    for a, b in grid:
        d = v.mean() * np.where(np.arange(h) < 2, a, b)
        logw.append(_restricted_loglik(y, Xp, np.diag(v + tau_y) + H @ np.diag(d) @ H.T) - base - np.log(len(grid)))
        fit = sm.WLS(np.concatenate([y, np.zeros(h)]), np.vstack([X, np.column_stack([np.zeros((h, 2)), np.eye(h)])]),
                     weights=np.concatenate([1 / (v + tau_y), 1 / d])).fit(cov_type="fixed scale")
        means.append(fit.params)
        covs.append(fit.cov_params())
    plain = sm.WLS(y, Xp, weights=1 / (v + tau_p)).fit(cov_type="fixed scale")
    logw.append(np.log(trends.NO_SEASON_ODDS))
    means.append(np.concatenate([plain.params, np.zeros(h)]))
    cov0 = np.zeros((2 + h, 2 + h))
    cov0[:2, :2] = plain.cov_params()
    covs.append(cov0)
    w = np.exp(np.array(logw) - max(logw))
    w /= w.sum()
    mean = sum(wi * m for wi, m in zip(w, means))
    cov = sum(wi * (c + np.outer(m - mean, m - mean)) for wi, m, c in zip(w, means, covs))
    return mean, cov, float(1 - w[-1])
