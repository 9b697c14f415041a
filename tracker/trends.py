"""Trends over waves: slopes with honest intervals, sustained shifts and one-wave blips.

Works only from the estimates table (one value and sampling variance per wave). All series
of a call are padded into arrays (series x waves) and fitted together.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
from scipy import stats

from .methods.tests import ADJUST_METHODS, adjust_pvalues

MIN_WAVES = 4

COLUMNS = [
    "metric", "metric_label", "kind", "group", "subgroup", "first_wave", "last_wave", "waves",
    "latest_value", "slope_per_year", "slope_low", "slope_high", "slope_p",
    "between_wave_sd", "q_statistic", "q_p", "pattern", "pattern_p_adjusted",
    "shift_wave", "level_before", "level_before_low", "level_before_high",
    "level_after", "level_after_low", "level_after_high", "blip_wave", "blip_size", "note",
]


def meta_regression(y: np.ndarray, v: np.ndarray, X: np.ndarray, mask: np.ndarray, tau2: np.ndarray | None = None):
    """Random-effects meta-regression of many series at once (series x waves arrays).

    Model: y_i = X_i b + u_i + e_i, e_i ~ N(0, v_i) (sampling), u_i ~ N(0, tau^2) (between
    waves). tau^2 by the method of moments of DerSimonian & Laird (1986, Control Clin
    Trials 7:177), in its meta-regression form (Raudenbush 2009, in *The Handbook of
    Research Synthesis*, 2nd ed., ch. 16):
    tau^2 = max(0, (Q_E - (k - p)) / (sum w - tr((X'WX)^-1 X'W^2 X))), w = 1/v, Q_E the
    weighted residual sum of squares of the fixed-effect fit. Then b is refitted with
    weights 1/(v + tau^2) and cov(b) = (X'W*X)^-1. With no slope term tau^2 equals
    statsmodels ``combine_effects(method_re="dl")``; with tau^2 = 0, b and cov(b) equal
    statsmodels ``WLS`` with weights 1/v and a fixed scale of 1.

    y, v, mask: (S, K); X: (S, K, p). Pass ``tau2`` to fix it. Returns a dict of arrays:
    beta (S, p), cov (S, p, p), tau2 (S,), q (S,), df (S,).
    """
    p = X.shape[2]
    m = mask.astype(float)
    yz = np.where(mask, y, 0.0)
    w0 = np.where(mask, 1.0 / np.where(mask, v, 1.0), 0.0)
    Xw = X * w0[:, :, None]
    A = np.einsum("skp,skq->spq", Xw, X)
    Ainv = np.linalg.pinv(A)
    b0 = np.einsum("spq,sq->sp", Ainv, np.einsum("skp,sk->sp", Xw, yz))
    resid = yz - np.einsum("skp,sp->sk", X, b0)
    q = (w0 * resid**2).sum(axis=1)
    k = m.sum(axis=1)
    df = k - p
    if tau2 is None:
        B = np.einsum("skp,skq->spq", X * (w0**2)[:, :, None], X)
        c = w0.sum(axis=1) - np.einsum("spq,sqp->s", Ainv, B)
        with np.errstate(divide="ignore", invalid="ignore"):
            tau2 = np.where(c > 0, np.maximum(0.0, (q - df) / c), 0.0)
    w = np.where(mask, 1.0 / (np.where(mask, v, 1.0) + tau2[:, None]), 0.0)
    Xw = X * w[:, :, None]
    cov = np.linalg.pinv(np.einsum("skp,skq->spq", Xw, X))
    beta = np.einsum("spq,sq->sp", cov, np.einsum("skp,sk->sp", Xw, yz))
    return {"beta": beta, "cov": cov, "tau2": tau2, "q": q, "df": df}


def _series_arrays(est: pd.DataFrame):
    """Pad the estimates into (series x waves) arrays, in fieldwork order."""
    keys = ["metric", "group", "subgroup"]
    est = est.sort_values("fieldwork_date", kind="mergesort")
    series = est[keys].drop_duplicates().reset_index(drop=True)
    waves = list(dict.fromkeys(est["wave"]))
    si = est[keys].merge(series.reset_index(), on=keys, how="left")["index"].to_numpy()
    wi = pd.Categorical(est["wave"], categories=waves).codes
    S, K = len(series), len(waves)
    y = np.full((S, K), np.nan)
    v = np.full((S, K), np.nan)
    y[si, wi] = est["value"].to_numpy(float)
    v[si, wi] = est["se"].to_numpy(float) ** 2
    ok = np.zeros((S, K), bool)
    ok[si, wi] = est["reliable"].to_numpy(bool) & (est["se"].to_numpy(float) > 0)
    dates = dict(zip(est["wave"], est["fieldwork_date"]))
    t0 = dt.date.fromisoformat(dates[waves[0]])
    years = np.array([(dt.date.fromisoformat(dates[w]) - t0).days / 365.25 for w in waves])
    return series, waves, y, v, ok, years


def fit_trends(est: pd.DataFrame, segment_start: dict[str, str] | None = None, adjust: str = "bh",
               level: float = 0.95, min_waves: int = MIN_WAVES) -> pd.DataFrame:
    """Slope, extra-variation test, shift and blip for every series in an estimates table.

    ``segment_start`` maps a metric to the wave its current series starts at (a wording
    break): earlier waves are left out for that metric. Patterns are decided after one
    adjustment (``adjust``) across the slope, shift and blip tests of every series.
    """
    series, waves, y, v, ok, years = _series_arrays(est)
    S, K = y.shape
    widx = {w: i for i, w in enumerate(waves)}
    for metric, start in (segment_start or {}).items():
        if start in widx:
            ok[(series["metric"] == metric).to_numpy(), : widx[start]] = False
    k = ok.sum(axis=1)
    fit_ok = k >= min_waves
    z = stats.norm.ppf(0.5 + level / 2)

    # slope per year, centred time for stability
    tbar = (ok * years[None, :]).sum(axis=1) / np.maximum(k, 1)
    X = np.stack([np.ones((S, K)), np.where(ok, years[None, :] - tbar[:, None], 0.0)], axis=2)
    trend = meta_regression(y, np.where(ok, v, 1.0), X, ok)
    slope = trend["beta"][:, 1]
    slope_se = np.sqrt(trend["cov"][:, 1, 1])
    # t on k - 2 df rather than z: few waves and an estimated tau^2 make z too narrow
    df = np.maximum(trend["df"], 1)
    slope_p = 2 * stats.t.sf(np.abs(slope / slope_se), df)
    tq = stats.t.ppf(0.5 + level / 2, df)
    q_p = stats.chi2.sf(trend["q"], df)

    shift = _shift_search(y, v, ok, X)
    blip = _blip_search(y, v, ok, X)

    family = np.concatenate([np.where(fit_ok, slope_p, np.nan), np.where(fit_ok, shift["p"], np.nan),
                             np.where(fit_ok, blip["p"], np.nan)])
    adj = adjust_pvalues(family, adjust).reshape(3, S)
    alpha = 1 - level
    # a shift must also stand beyond the straight line, else a steady trend would pass
    is_shift = (adj[1] <= alpha) & (shift["p_beyond_trend"] <= alpha)
    is_blip = ~is_shift & (adj[2] <= alpha)
    is_slope = ~is_shift & ~is_blip & (adj[0] <= alpha)
    pattern = np.select(
        [~fit_ok, is_shift & (shift["delta"] > 0), is_shift, is_blip,
         is_slope & (slope > 0), is_slope],
        ["too few waves", "shifted up", "shifted down", "one-wave blip", "rising", "falling"], "steady")
    pattern_p = np.select([is_shift, is_blip], [adj[1], adj[2]], adj[0])

    first = np.where(k > 0, ok.argmax(axis=1), 0)
    last = np.where(k > 0, K - 1 - ok[:, ::-1].argmax(axis=1), 0)
    wv = np.array(waves, dtype=object)
    latest = y[np.arange(S), last]
    meta = est.drop_duplicates(["metric"]).set_index("metric")
    note = np.where(~fit_ok, "fewer than " + str(min_waves) + " waves with a reliable value: no slope", "")
    if segment_start:
        seg = series["metric"].map(lambda m: f"series starts at {segment_start[m]} (wording break)"
                                   if m in segment_start else "").to_numpy(object)
        note = np.where(seg != "", np.where(note != "", seg + "; " + note, seg), note)
    j = shift["index"]
    out = pd.DataFrame({
        "metric": series["metric"], "metric_label": series["metric"].map(meta["metric_label"]),
        "kind": series["metric"].map(meta["kind"]), "group": series["group"], "subgroup": series["subgroup"],
        "first_wave": wv[first], "last_wave": wv[last], "waves": k,
        "latest_value": latest,
        "slope_per_year": np.where(fit_ok, slope, np.nan),
        "slope_low": np.where(fit_ok, slope - tq * slope_se, np.nan),
        "slope_high": np.where(fit_ok, slope + tq * slope_se, np.nan),
        "slope_p": np.where(fit_ok, slope_p, np.nan),
        "between_wave_sd": np.where(fit_ok, np.sqrt(trend["tau2"]), np.nan),
        "q_statistic": np.where(fit_ok, trend["q"], np.nan),
        "q_p": np.where(fit_ok, q_p, np.nan),
        "pattern": pattern, "pattern_p_adjusted": np.where(fit_ok, pattern_p, np.nan),
        "shift_wave": np.where(is_shift, wv[np.maximum(j, 0)], None),
        "level_before": np.where(is_shift, shift["before"], np.nan),
        "level_before_low": np.where(is_shift, shift["before"] - z * shift["before_se"], np.nan),
        "level_before_high": np.where(is_shift, shift["before"] + z * shift["before_se"], np.nan),
        "level_after": np.where(is_shift, shift["after"], np.nan),
        "level_after_low": np.where(is_shift, shift["after"] - z * shift["after_se"], np.nan),
        "level_after_high": np.where(is_shift, shift["after"] + z * shift["after_se"], np.nan),
        "blip_wave": np.where(is_blip, wv[np.maximum(blip["index"], 0)], None),
        "blip_size": np.where(is_blip, blip["size"], np.nan),
        "note": note,
        "tau2": trend["tau2"], "intercept": trend["beta"][:, 0], "time_centre": tbar,
    })
    out.attrs["adjust"] = ADJUST_METHODS[adjust]
    out.attrs["level"] = level
    return out


def _shift_search(y, v, ok, X_trend):
    """The strongest level shift of each series, with the search accounted for.

    For every candidate wave j with at least two reliable waves before it and at least
    three from it on (the new level holds for two more waves), fit a two-level model (one
    level before j, one from j on; random effects, tau^2 re-estimated with the step in the
    model) and take the step's t on k - 2 df. The p of the series is Bonferroni over its
    candidates: min(1, m x min p). The levels before and after, with their intervals, are
    those of the chosen wave's fit. Also returned: the p of the same step added to the
    straight-line model (t on k - 3 df, no search: the wave is already chosen), which tells
    a shift from a steady trend that a step would also fit.
    """
    S, K = y.shape
    cum = np.cumsum(ok, axis=1)
    total = ok.sum(axis=1)
    best_p = np.ones(S)
    best_j = np.full(S, -1)
    n_cand = np.zeros(S)
    vv = np.where(ok, v, 1.0)
    for j in range(2, K - 2):  # a loop over candidate waves; every series at once
        before = cum[:, j - 1]
        cand = (before >= 2) & (total - before >= 3) & ok[:, j]
        if not cand.any():
            continue
        step = ((np.arange(K)[None, :] >= j) & ok).astype(float)
        fit = meta_regression(y, vv, np.stack([np.ones((S, K)), step], axis=2), ok)
        tstat = fit["beta"][:, 1] / np.sqrt(fit["cov"][:, 1, 1])
        p = 2 * stats.t.sf(np.abs(tstat), np.maximum(fit["df"], 1))
        n_cand += cand
        better = cand & (p < best_p)
        best_p = np.where(better, p, best_p)
        best_j = np.where(better, j, best_j)
    p_series = np.minimum(1.0, best_p * np.maximum(n_cand, 1))
    p_series = np.where(best_j >= 0, p_series, np.nan)
    step = (np.arange(K)[None, :] >= np.maximum(best_j, 0)[:, None]).astype(float)
    X = np.stack([1 - step, step], axis=2)
    lv = meta_regression(y, vv, X, ok)
    beyond = meta_regression(y, vv, np.concatenate([X_trend, (step * ok)[:, :, None]], axis=2), ok)
    p_beyond = 2 * stats.t.sf(np.abs(beyond["beta"][:, 2] / np.sqrt(beyond["cov"][:, 2, 2])),
                              np.maximum(beyond["df"], 1))
    return {"p": p_series, "index": best_j, "p_beyond_trend": p_beyond,
            "before": lv["beta"][:, 0], "after": lv["beta"][:, 1],
            "before_se": np.sqrt(lv["cov"][:, 0, 0]), "after_se": np.sqrt(lv["cov"][:, 1, 1]),
            "delta": lv["beta"][:, 1] - lv["beta"][:, 0]}


def _blip_search(y, v, ok, X_trend):
    """One wave that differs from both neighbours while the neighbours agree.

    For each interior wave j with reliable neighbours: the contrast
    c = y_j - (y_{j-1} + y_{j+1})/2, whose variance is v_j + (v_{j-1} + v_{j+1})/4 from
    sampling plus 1.5 tau^2 from ordinary wave-to-wave variation, with tau^2 estimated
    from the trend model without wave j (so the blip does not hide itself). t on the
    remaining k - 3 df. A candidate counts only if its neighbours do not differ from each
    other at the 5 % level. The series p is Bonferroni over its candidates. The latest
    wave is never a blip: it has no later neighbour yet.
    """
    S, K = y.shape
    none = {"p": np.full(S, np.nan), "index": np.full(S, -1), "size": np.full(S, np.nan)}
    if K < 3:
        return none
    vv = np.where(ok, v, 1.0)
    best_p = np.full(S, np.inf)
    best_j = np.full(S, -1)
    size = np.full(S, np.nan)
    n_cand = np.zeros(S)
    for j in range(1, K - 1):  # a loop over candidate waves; every series at once
        valid = ok[:, j - 1] & ok[:, j] & ok[:, j + 1]
        if not valid.any():
            continue
        without = ok.copy()
        without[:, j] = False
        tau2 = meta_regression(y, vv, X_trend, without)["tau2"]
        df = np.maximum(without.sum(axis=1) - 2, 1)
        left, mid, right = y[:, j - 1], y[:, j], y[:, j + 1]
        with np.errstate(invalid="ignore", divide="ignore"):
            c = mid - (left + right) / 2
            t = c / np.sqrt(vv[:, j] + (vv[:, j - 1] + vv[:, j + 1]) / 4 + 1.5 * tau2)
            agree = np.abs(right - left) / np.sqrt(vv[:, j - 1] + vv[:, j + 1] + 2 * tau2) < stats.norm.ppf(0.975)
        cand = valid & agree
        p = np.where(cand, 2 * stats.t.sf(np.abs(np.nan_to_num(t)), df), np.inf)
        n_cand += cand
        better = p < best_p
        best_p = np.where(better, p, best_p)
        best_j = np.where(better, j, best_j)
        size = np.where(better, c, size)
    p_series = np.where(n_cand > 0, np.minimum(1.0, best_p * np.maximum(n_cand, 1)), np.nan)
    return {"p": p_series, "index": best_j, "size": size}


def fitted_values(trend_rows: pd.DataFrame, est: pd.DataFrame, t0: str | None = None) -> pd.Series:
    """The fitted line or shift levels at each estimate row (NaN where the pattern is
    steady, a blip, or the wave lies outside the fitted series).

    Time zero is ``t0``, the fieldwork date of the first wave the trends were fitted on
    (default: the first date in ``est``)."""
    keys = ["metric", "group", "subgroup"]
    t0 = dt.date.fromisoformat(t0 or est["fieldwork_date"].min())
    years = est["fieldwork_date"].map(lambda d: (dt.date.fromisoformat(d) - t0).days / 365.25)
    m = est[keys].join(years.rename("years")).merge(trend_rows, on=keys, how="left")
    m.index = est.index
    rank = _rank(est)
    at = est["wave"].map(rank)
    inside = (at >= m["first_wave"].map(rank)) & (at <= m["last_wave"].map(rank))
    line = m["intercept"] + m["slope_per_year"] * (m["years"] - m["time_centre"])
    after = at >= m["shift_wave"].map(rank)
    levels = np.where(after, m["level_after"], m["level_before"])
    value = np.select([m["pattern"].isin(["rising", "falling"]), m["pattern"].str.startswith("shifted")],
                      [line, levels], np.nan)
    return pd.Series(np.where(inside, value, np.nan), index=est.index, name="fitted")


def _rank(est: pd.DataFrame) -> dict:
    order = est.drop_duplicates("wave").sort_values("fieldwork_date")["wave"]
    return {w: i for i, w in enumerate(order)}
