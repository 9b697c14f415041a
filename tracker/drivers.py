"""What goes with the headline score: a design-based regression of the headline on its attribute
metrics, each attribute's relative importance, and whether importance changed between periods.

The model: each respondent's headline value (1/0 for a share, the answer for a mean, +1/0/-1
for a balance, as tracker.cells.metric_matrix makes them) on the attributes' values, among the
respondents in every metric's base, by weighted least squares with the survey weights. The
coefficients' standard errors are linearized, as R's ``svyglm`` computes them (Binder 1983,
Int Stat Rev 51:279): the PSU totals of each respondent's w_i r_i x_i A^-1 (A = X'WX, r the
residual) compared within strata, on the design's degrees of freedom minus the attributes.

Relative importance is Johnson's relative weights (Johnson 2000, Multivariate Behavioral
Research 35:1): the attributes' weighted correlations are replaced by their closest
orthogonal counterparts, the headline regressed on those, and R^2 shared back in proportion
to each attribute's loadings; the raw weights add up to R^2. Their intervals come from the
stratified delete-one-PSU jackknife (JKn; Wolter 2007, *Introduction to Variance
Estimation*, ch. 4): each PSU left out in turn, its stratum's other PSUs weighted up by
n_h / (n_h - 1), the variance sum over strata of (n_h - 1) / n_h times the squared spread of
the replicates. Several waves are pooled as independent samples (each wave its own strata).

Association is not cause: an attribute that predicts the headline may not move it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .errors import TrackerError
from .methods.distributions import t_sf
from .methods.intervals import critical
from .methods.variance import psu_index

__all__ = ["COEFFICIENT_COLUMNS", "IMPORTANCE_COLUMNS", "SHIFT_COLUMNS", "DriverFit", "fit_drivers",
           "importance_shift", "relative_weights"]

COEFFICIENT_COLUMNS = ["term", "coefficient", "se", "df", "t", "p", "low", "high"]
SHIFT_COLUMNS = ["attribute", "period_from", "period_to", "raw_weight_from", "raw_weight_to", "change", "se", "df",
                 "p_raw", "p_adjusted", "adjusted_low", "adjusted_high", "adjusted_level", "verdict"]
IMPORTANCE_COLUMNS = ["attribute", "attribute_label", "raw_weight", "raw_low", "raw_high", "share_of_r2",
                      "coefficient", "coefficient_se"]


def relative_weights(corr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Johnson's relative weights from the correlation matrix of (attributes..., headline),
    batched over its leading axes: (raw weights, R^2). The raw weights add up to R^2.

    The attributes' correlations R_xx = Q L Q' give Lambda = Q L^1/2 Q' (the correlations of
    the attributes with their closest orthogonal counterparts Z); the headline's weights on Z
    are beta = Lambda^-1 r_xy, and attribute j's raw weight is sum_k Lambda_jk^2 beta_k^2
    (Johnson 2000, as the rwa package computes it)."""
    corr = np.asarray(corr, float)
    rxx, rxy = corr[..., :-1, :-1], corr[..., :-1, -1]
    vals, vecs = np.linalg.eigh(rxx)
    root = np.sqrt(np.clip(vals, 0.0, None))
    lam = (vecs * root[..., None, :]) @ np.swapaxes(vecs, -1, -2)
    beta = np.linalg.solve(lam, rxy[..., None])[..., 0]
    raw = (lam**2) @ (beta**2)[..., None]
    return raw[..., 0], (beta**2).sum(axis=-1)


@dataclass(frozen=True)
class DriverFit:
    """A driver analysis of one headline over some waves."""

    headline: str
    attributes: tuple[str, ...]
    waves: tuple[str, ...]
    respondents: int
    r2: float
    r2_low: float
    r2_high: float
    coefficients: pd.DataFrame  # COEFFICIENT_COLUMNS
    importance: pd.DataFrame  # IMPORTANCE_COLUMNS
    level: float
    raw_var: np.ndarray  # the replicate (jackknife, or the study's replicate weights) variance of each raw weight
    design_df: float  # PSUs minus strata of the pooled waves, or the replicates' rank minus one

    def _repr_html_(self) -> str:
        from .notebook import show

        return show(self.importance.assign(kind="share"), "drivers", tuple(self.lines()))._repr_html_()

    def raw_variance(self) -> np.ndarray:
        """The replicate variance of each attribute's raw weight."""
        return self.raw_var

    def lines(self) -> list[str]:
        return [(f"{self.headline} on {len(self.attributes)} attributes in {', '.join(self.waves)}: "
                 f"{self.respondents:,} respondents in every base; R^2 {self.r2:.3f} ({self.r2_low:.3f} to "
                 f"{self.r2_high:.3f})."),
                ("Relative weights (Johnson 2000) share R^2 among correlated attributes; intervals by the "
                 "delete-one-PSU jackknife. Association is not cause, and sampling error only.")]


def _design(study, waves: list[str], metrics: list):
    """The pooled respondents of ``waves`` in every metric's base: (Y, w, stratum codes, psu codes)."""
    from .cells import metric_matrix
    from .estimates import design_of, weights_of

    Ys, ws, ss, ps = [], [], [], []
    for k, wave in enumerate(waves):  # a loop over waves: each read once
        table = study.load(wave)
        Y, E = metric_matrix(study.codebook, table, metrics)
        keep = E.all(axis=1)
        strata, psu = design_of(study.codebook, table)
        n = len(table)
        s = np.zeros(n, np.int64) if strata is None else strata
        p = np.arange(n) if psu is None else psu
        Ys.append(Y[keep])
        ws.append(weights_of(study.codebook, table)[keep])
        ss.append(np.char.add(f"{k}|", s[keep].astype(str)))  # each wave its own strata
        ps.append(np.char.add(f"{k}|", np.char.add(s[keep].astype(str), np.char.add("|", p[keep].astype(str)))))
    return np.concatenate(Ys), np.concatenate(ws), np.concatenate(ss), np.concatenate(ps)


def _check(study, headline: str, attributes: list[str], Y: np.ndarray, waves: list[str]) -> None:
    """Refuse what cannot be fitted, naming the metric and waves: too few respondents, an
    attribute with no spread, attributes that are linear combinations of others."""
    p = len(attributes)
    where = f"in {', '.join(waves)}"
    if len(Y) < p + 3:
        raise TrackerError(f"drivers of {headline} {where}: {len(Y)} respondent(s) in every metric's base, too few "
                           f"for {p} attributes")
    sd = Y.std(axis=0)
    for j, name in enumerate([headline, *attributes]):
        if not sd[j] > 0:
            raise TrackerError(f"drivers of {headline} {where}: metric {name} has the same value for every "
                               f"respondent in the bases, so it cannot explain or be explained")
    X = np.column_stack([np.ones(len(Y)), Y[:, 1:]])
    if np.linalg.matrix_rank(X) < p + 1:
        raise TrackerError(f"drivers of {headline} {where}: the attributes {', '.join(attributes)} are collinear "
                           f"(one is a combination of the others); leave one out")


def _moments(Y: np.ndarray, w: np.ndarray, psu_id: np.ndarray, P: int) -> np.ndarray:
    """Each PSU's weighted moment matrix of (1, attributes, headline): P x q x q."""
    import scipy.sparse as sp

    V = np.column_stack([np.ones(len(Y)), Y[:, 1:], Y[:, 0]])
    q = V.shape[1]
    S = sp.csr_matrix((w, (psu_id, np.arange(len(Y)))), shape=(P, len(Y)))
    outer = (V[:, :, None] * V[:, None, :]).reshape(len(Y), q * q)
    return np.asarray(S @ outer).reshape(P, q, q)


def _corr(M: np.ndarray) -> np.ndarray:
    """Correlations of (attributes, headline) from moment matrices (..., q, q)."""
    n = M[..., :1, :1]
    mean = M[..., 0, 1:] / n[..., 0]
    cov = M[..., 1:, 1:] / n - mean[..., :, None] * mean[..., None, :]
    sd = np.sqrt(np.clip(np.diagonal(cov, axis1=-2, axis2=-1), 1e-300, None))
    return cov / (sd[..., :, None] * sd[..., None, :])


def fit_drivers(study, headline: str | None = None, attributes=None, waves=None, level: float = 0.95) -> DriverFit:
    """The driver analysis of ``headline`` on ``attributes`` (default: the codebook's drivers)
    over ``waves`` (default: the latest): see the module's description."""
    from .options import check_level

    check_level(level)
    book = study.codebook
    declared = getattr(book, "drivers", None) or {}
    headline = headline or declared.get("headline")
    attributes = list(attributes or declared.get("attributes") or [])
    if not headline or not attributes:
        raise TrackerError("name the headline metric and its attributes, or declare them "
                           "in the codebook under drivers")
    if headline in attributes:
        raise TrackerError(f"drivers: {headline} is the headline and cannot also be an attribute")
    metrics = study.pick_metrics([headline, *attributes])
    waves = study.pick_waves(waves) if waves else study.labels[-1:]
    Y, w, strata, psu = _design(study, waves, metrics)
    _check(study, headline, attributes, Y, waves)
    if book.replicates is not None:
        est = replicate_importance(Y, w, [_replicate_weights(study, wv, metrics) for wv in waves], book.replicates)
    else:
        est = importance_estimates(Y, w, strata, psu, level)
    coefficients = _regression_frame(est, attributes, level)
    t = critical(level, est.df if est.df > 0 else None)
    raw, se = est.raw, np.sqrt(est.raw_var)
    labels = [m.label for m in metrics[1:]]
    importance = pd.DataFrame({
        "attribute": attributes, "attribute_label": labels, "raw_weight": raw,
        "raw_low": raw - t * se, "raw_high": raw + t * se, "share_of_r2": raw / est.r2,
        "coefficient": coefficients["coefficient"].to_numpy()[1:], "coefficient_se": coefficients["se"].to_numpy()[1:]})
    r2_se = float(np.sqrt(est.r2_var))
    return DriverFit(headline, tuple(attributes), tuple(waves), len(Y), est.r2, est.r2 - t * r2_se, est.r2 + t * r2_se,
                     coefficients, importance, level, est.raw_var, est.df)


@dataclass(frozen=True)
class Importance:
    """The estimates of one driver fit from its respondents' arrays (:func:`importance_estimates`)."""

    beta: np.ndarray  # intercept, then one coefficient per attribute
    beta_cov: np.ndarray  # their linearized covariance
    raw: np.ndarray  # Johnson's raw weights
    raw_var: np.ndarray  # their jackknife variances
    r2: float
    r2_var: float
    df: float  # the design's degrees of freedom: PSUs minus strata (or the replicates' rank minus one)


def importance_estimates(Y: np.ndarray, w: np.ndarray, strata, psu, level: float = 0.95) -> Importance:
    """The regression and the relative weights of ``Y``'s first column on the others, with the
    respondents' weights, strata and PSU labels (see the module's description)."""
    psu_id, psu_stratum, n_strata = psu_index(pd.factorize(strata)[0], pd.factorize(psu)[0], len(Y))
    P = psu_stratum.size
    n_h = np.bincount(psu_stratum, minlength=n_strata).astype(float)
    beta, cov = _regression(Y, w, psu_id, psu_stratum, n_h, P)
    M = _moments(Y, w, psu_id, P)
    total = M.sum(axis=0)
    by_stratum = np.zeros((n_strata, *total.shape))
    np.add.at(by_stratum, psu_stratum, M)
    f = np.where(n_h > 1, n_h / np.maximum(n_h - 1, 1), 1.0)[psu_stratum]
    lone = n_h[psu_stratum] <= 1
    # replicate r leaves PSU r out and weights its stratum's others up by n_h / (n_h - 1)
    reps = total[None] - by_stratum[psu_stratum] + f[:, None, None] * (by_stratum[psu_stratum] - M)
    raw, r2 = relative_weights(_corr(total))
    rep_raw, rep_r2 = relative_weights(_corr(reps[~lone]))
    jk = ((n_h - 1) / n_h)[psu_stratum][~lone]
    stratum = psu_stratum[~lone]
    v_raw = _jk_variance(rep_raw, jk, stratum, n_strata)
    v_r2 = float(_jk_variance(rep_r2[:, None], jk, stratum, n_strata)[0])
    return Importance(beta, cov, raw, v_raw, float(r2), v_r2, float(P - n_strata))


def _replicate_weights(study, wave: str, metrics: list) -> np.ndarray:
    """A replicate-weight wave's replicate weights of the respondents in every metric's base."""
    from .cells import metric_matrix

    table = study.load(wave)
    keep = metric_matrix(study.codebook, table, metrics)[1].all(axis=1)
    return table[list(study.codebook.replicates.columns)].to_numpy(dtype=float)[keep]


def replicate_importance(Y: np.ndarray, w: np.ndarray, waves_W: list[np.ndarray], reps) -> Importance:
    """The regression and relative weights with the study's replicate weights: each replicate
    of each wave refits them from the moment matrices with that wave's rows re-weighted, and
    the variance is scale * sum_r rscales_r (theta_r - centre)^2 per wave, added over the
    pooled waves (independent samples), as R's svyglm on a replicate design."""
    V = np.column_stack([np.ones(len(Y)), Y[:, 1:], Y[:, 0]])
    q = V.shape[1]
    outer = (V[:, :, None] * V[:, None, :]).reshape(len(Y), q * q)
    total = (w @ outer).reshape(q, q)
    p = q - 1
    beta = np.linalg.solve(total[:p, :p], total[:p, p])
    raw, r2 = relative_weights(_corr(total))
    var_b, var_raw, var_r2, start, ranks = np.zeros((p, p)), np.zeros(raw.size), 0.0, 0, []
    c = np.asarray(reps.scale * np.asarray(reps.rscales, float))
    for W in waves_W:  # a loop over waves: every replicate of a wave at once
        rows = slice(start, start + len(W))
        start += len(W)
        own = (w[rows] @ outer[rows]).reshape(q, q)
        M = total[None] - own[None] + (W.T @ outer[rows]).reshape(-1, q, q)
        b_r = np.linalg.solve(M[:, :p, :p], M[:, :p, p][..., None])[..., 0]
        raw_r, r2_r = relative_weights(_corr(M))
        db = b_r - (beta[None] if reps.mse else b_r.mean(axis=0)[None])
        dr = raw_r - (raw[None] if reps.mse else raw_r.mean(axis=0)[None])
        d2 = r2_r - (r2 if reps.mse else r2_r.mean())
        var_b += (c[:, None, None] * db[:, :, None] * db[:, None, :]).sum(axis=0)
        var_raw += (c[:, None] * dr**2).sum(axis=0)
        var_r2 += float((c * d2**2).sum())
        ranks.append(np.linalg.matrix_rank(W) - 1)
    return Importance(beta, var_b, raw, var_raw, float(r2), var_r2, float(sum(ranks)))


def _jk_variance(reps: np.ndarray, factor: np.ndarray, stratum: np.ndarray, n_strata: int) -> np.ndarray:
    """The JKn variance of each column of ``reps``: sum over strata of (n_h - 1) / n_h times
    the replicates' squared deviations from their stratum's mean."""
    count = np.bincount(stratum, minlength=n_strata).astype(float)
    sums = np.zeros((n_strata, reps.shape[1]))
    np.add.at(sums, stratum, reps)
    mean = sums / np.maximum(count, 1)[:, None]
    return (factor[:, None] * (reps - mean[stratum]) ** 2).sum(axis=0)


def _regression(Y, w, psu_id, psu_stratum, n_h, P) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least squares of the headline on the attributes: coefficients and their
    linearized covariance (as svyglm)."""
    import scipy.sparse as sp

    X = np.column_stack([np.ones(len(Y)), Y[:, 1:]])
    y = Y[:, 0]
    A = X.T @ (X * w[:, None])
    beta = np.linalg.solve(A, X.T @ (w * y))
    r = y - X @ beta
    z = (X * (w * r)[:, None]) @ np.linalg.inv(A)
    S = sp.csr_matrix((np.ones(len(Y)), (psu_id, np.arange(len(Y)))), shape=(P, len(Y)))
    t = np.asarray(S @ z)
    H = len(n_h)
    sums = np.zeros((H, t.shape[1]))
    np.add.at(sums, psu_stratum, t)
    c = t - (sums / np.maximum(n_h, 1)[:, None])[psu_stratum]
    g = np.where(n_h > 1, n_h / np.maximum(n_h - 1, 1), 0.0)[psu_stratum]
    return beta, (c * g[:, None]).T @ c


def _regression_frame(est: Importance, attributes: list[str], level: float) -> pd.DataFrame:
    """The coefficients as a table (COEFFICIENT_COLUMNS), t on the design df minus the attributes."""
    beta, se = est.beta, np.sqrt(np.diag(est.beta_cov))
    dfr = max(est.df + 1 - beta.size, 1.0)
    tq = critical(level, dfr)
    stat = beta / se
    return pd.DataFrame({"term": ["(intercept)", *attributes], "coefficient": beta, "se": se, "df": dfr, "t": stat,
                         "p": 2 * t_sf(np.abs(stat), dfr), "low": beta - tq * se, "high": beta + tq * se})


def importance_shift(study, headline: str | None = None, attributes=None, recent: int = 4, level: float = 0.95,
                     adjust: str = "bh") -> pd.DataFrame:
    """Whether each attribute's raw weight changed between the last ``recent`` waves and the
    ``recent`` before them (two independent pooled samples): difference, its jackknife SE,
    t on Satterthwaite's df, adjusted across the attributes, with the verdicts of a
    comparison of two waves (tracker.changes.VERDICTS)."""
    from .changes import verdict_of
    from .methods.tests import adjust_pvalues, family_level, satterthwaite_df

    labels = study.labels
    if len(labels) < 2 * recent:
        raise TrackerError(f"comparing importance over two periods of {recent} waves needs {2 * recent} waves; the "
                           f"study holds {len(labels)}")
    now = fit_drivers(study, headline, attributes, labels[-recent:], level)
    then = fit_drivers(study, headline, attributes, labels[-2 * recent:-recent], level)
    v_now, v_then = now.raw_variance(), then.raw_variance()
    d = now.importance["raw_weight"].to_numpy() - then.importance["raw_weight"].to_numpy()
    df = satterthwaite_df(v_now, v_then, now.design_df, then.design_df)
    se = np.sqrt(v_now + v_then)
    stat = d / se
    p = 2 * t_sf(np.abs(stat), np.maximum(df, 1))
    p_adj = adjust_pvalues(p, adjust)
    adj_level = family_level(p_adj, adjust, 1 - level)
    half = critical(adj_level, np.maximum(df, 1)) * se
    sig = p_adj <= 1 - level
    out = pd.DataFrame({
        "attribute": list(now.attributes), "period_from": ", ".join(then.waves), "period_to": ", ".join(now.waves),
        "raw_weight_from": then.importance["raw_weight"], "raw_weight_to": now.importance["raw_weight"],
        "change": d, "se": se, "df": df, "p_raw": p, "p_adjusted": p_adj, "adjusted_low": d - half,
        "adjusted_high": d + half, "adjusted_level": adj_level,
        "verdict": verdict_of(np.isfinite(p), sig, d, d - half, d + half)})
    return out[SHIFT_COLUMNS]
