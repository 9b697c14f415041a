"""Trends over waves: slopes with honest intervals, sustained shifts and one-wave blips.

Works only from the estimates table (one value and sampling variance per wave). All series
of a call are padded into arrays (series x waves) and fitted together.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
from scipy.special import logsumexp

from .methods.distributions import chi2_sf, norm_ppf, t_ppf, t_sf
from .methods.tests import ADJUST_METHODS, adjust_pvalues, family_level

MIN_WAVES = 4

#: The pattern of a series: its code (in every machine format) and its one definition. None
#: of these words describes a comparison of two waves (tracker.changes.VERDICTS has those).
PATTERNS = {
    "rising": "a straight-line rise over the waves, beyond what sampling and wave-to-wave variation explain",
    "falling": "a straight-line fall over the waves, beyond what sampling and wave-to-wave variation explain",
    "shifted up": "a step up to a new level that has held since",
    "shifted down": "a step down to a new level that has held since",
    "one-wave blip": "one wave out of line with a series that does not move with it",
    "moved up": "moved up over the waves, but they cannot tell a trend from a one-off step",
    "moved down": "moved down over the waves, but they cannot tell a trend from a one-off step",
    "flat": "no pattern found, and the whole adjusted interval of the slope lies within the smallest change "
            "that matters (declared in the codebook) per year",
    "no pattern found": "no trend, step or blip beyond the noise after adjustment; not a claim that nothing "
                        "moved",
    "too few waves": "fewer than four waves with a reliable value: no pattern is judged",
}

COLUMNS = [
    "metric", "metric_label", "kind", "group", "subgroup", "first_wave", "last_wave", "waves",
    "latest_value", "slope_per_year", "slope_low", "slope_high", "slope_p",
    "wave_to_wave_sd", "excess_variation_chi2", "excess_variation_p", "pattern", "pattern_p_adjusted",
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
    Xt = X.transpose(0, 2, 1)
    Xw = Xt * w0[:, None, :]  # (S, p, K): batched small products by matmul, not einsum
    Ainv = _small_pinv(Xw @ X)
    b0 = (Ainv @ (Xw @ yz[:, :, None]))[:, :, 0]
    resid = yz - (X @ b0[:, :, None])[:, :, 0]
    q = (w0 * resid**2).sum(axis=1)
    k = m.sum(axis=1)
    df = k - p
    if tau2 is None:
        B = (Xt * (w0**2)[:, None, :]) @ X
        c = w0.sum(axis=1) - (Ainv * B.transpose(0, 2, 1)).sum(axis=(1, 2))
        with np.errstate(divide="ignore", invalid="ignore"):
            tau2 = np.where(c > 0, np.maximum(0.0, (q - df) / c), 0.0)
    w = np.where(mask, 1.0 / (np.where(mask, v, 1.0) + tau2[:, None]), 0.0)
    Xw = Xt * w[:, None, :]
    cov = _small_pinv(Xw @ X)
    beta = (cov @ (Xw @ yz[:, :, None]))[:, :, 0]
    return {"beta": beta, "cov": cov, "tau2": tau2, "q": q, "df": df}


def _small_pinv(A: np.ndarray) -> np.ndarray:
    """Pseudo-inverses of a stack of small symmetric positive semi-definite matrices: the
    plain inverse (batched LU) where the matrix is well conditioned, where the two agree
    to rounding, and the SVD pseudo-inverse (np.linalg.pinv) only for the rest."""
    d = np.diagonal(A, axis1=1, axis2=2)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        # det / prod(diag) lies in (0, 1] for a positive definite matrix; near 0 it is near singular
        ratio = np.linalg.det(A) / np.prod(np.where(d > 0, d, np.nan), axis=1)
    good = np.isfinite(ratio) & (ratio > 1e-6)
    out = np.empty_like(A)
    if good.any():
        out[good] = np.linalg.inv(A[good])
    if (~good).any():
        out[~good] = np.linalg.pinv(A[~good])
    return out


def season_columns(dates, cycle: int) -> np.ndarray:
    """Seasonal effects of fieldwork dates (ISO) for a cycle of 12 (months) or 4 (quarters), as
    the cycle's harmonics (cycle - 1 columns: cos and sin of 2 pi h s / cycle for h = 1, 2, ...,
    the last harmonic's cos alone; s the season): the same effects as one per season, summing
    to zero over the cycle so that the intercept stays the level across seasons, with the
    smooth yearly wave in the first two columns (the one most seasons follow)."""
    month = np.array([int(str(d)[5:7]) for d in dates])
    season = (month - 1 if cycle == 12 else (month - 1) // 3).astype(float)
    cols = []
    for h in range(1, cycle // 2 + 1):
        angle = 2 * np.pi * h * season / cycle
        cols.append(np.cos(angle))
        if 2 * h < cycle:
            cols.append(np.sin(angle))
    return np.stack(cols, axis=1)


def seasons_covered(ok: np.ndarray, dates, cycle: int | None) -> np.ndarray:
    """Which series (rows of ``ok``, waves x their fieldwork ``dates``) can carry seasonal
    effects: every season of the cycle (month or quarter) seen in at least two usable waves,
    so that each season's effect rests on more than one wave (common practice, no source).
    A survey fielded in some months only never qualifies."""
    if not cycle:
        return np.zeros(len(ok), bool)
    month = np.array([int(str(d)[5:7]) for d in dates])
    season = month - 1 if cycle == 12 else (month - 1) // 3
    per_season = np.stack([(ok & (season == k)[None, :]).sum(axis=1) for k in range(cycle)], axis=1)
    return np.asarray((per_season >= 2).all(axis=1))


#: Prior odds of a series having no seasons at all under the seasons key (two to one: most
#: questions of a study do not follow its cycle), and the smallest seasonal variance the
#: alternative considers, per unit of the mean sampling variance (both set by the seeded
#: simulation of docs/validation.md).
NO_SEASON_ODDS = 2.0
SMALLEST_SEASON = 0.15


def seasonal_regression(y: np.ndarray, v: np.ndarray, X: np.ndarray, mask: np.ndarray, n_plain: int,
                        points: tuple[int, int] = (8, 5)) -> dict:
    """A meta-regression whose last columns of X are seasonal harmonics (season_columns), with
    the seasons kept only as far as the waves show them, for many series at once.

    Two models are averaged by their likelihood (Bayesian model averaging; Hoeting, Madigan,
    Raftery & Volinsky 1999, Stat Sci 14:382): no seasons (the plain meta-regression, prior
    odds NO_SEASON_ODDS), and seasons as random effects (a mixed model, Harville 1977, JASA
    72:320): the yearly wave's two coefficients N(0, sigma_1^2), the faster harmonics'
    N(0, sigma_r^2), beside the between-wave variance tau^2 and the known sampling variances.
    There tau^2 and its df come from the fit with the yearly wave fixed (DerSimonian-Laird, as
    meta_regression); the fit with every harmonic fixed at that tau^2 gives the seasonal
    estimates s (covariance C), which carry the restricted likelihood of the variances:
    s ~ N(0, C + D), D = diag(sigma_1^2, sigma_1^2, sigma_r^2, ...), and s ~ N(0, C) without
    seasons. Over a log-spaced grid of both variances (SMALLEST_SEASON to 10 times the mean
    sampling variance, 8 x 5 points, a flat prior on the logs) the coefficients solve
    Henderson's mixed-model equations (Henderson 1975, Biometrics 31:423),
    (X'WX + blockdiag(0, D^-1)) b = X'Wy,
    W = 1/(v + tau^2), whose inverse is the covariance of b's errors (the plain coefficients
    and the seasons' predictions). The result is the mixture's mean and covariance, so a
    prediction's variance carries the models' and the variances' uncertainty: a series whose
    seasons do not stand out of the noise is fitted nearly as without the key, and a clear
    yearly wave, estimated from every wave, is barely shrunk. tau2 and df are the mixture's
    (df: k minus the plain or the yearly-fixed coefficients); q and q_df are those of the fit
    with every harmonic fixed (the test of variation beyond the seasons). Also returns
    ``season_weight``, the posterior probability of seasons.
    """
    S, _K, p = X.shape
    ns = p - n_plain
    yearly = meta_regression(y, v, X[:, :, : n_plain + 2], mask)
    fixed = meta_regression(y, v, X, mask, tau2=yearly["tau2"])
    plain = meta_regression(y, v, X[:, :, :n_plain], mask)
    s = fixed["beta"][:, n_plain:]
    C = fixed["cov"][:, n_plain:, n_plain:]

    def loglik(V):
        logdet = np.linalg.slogdet(V)[1]
        return -0.5 * (logdet + np.einsum("si,si->s", s, np.linalg.solve(V, s[:, :, None])[:, :, 0]))

    vbar = np.where(mask, v, 0.0).sum(axis=1) / np.maximum(mask.sum(axis=1), 1)
    pairs = [(a, b) for a in np.geomspace(SMALLEST_SEASON, 10.0, points[0])
             for b in np.geomspace(SMALLEST_SEASON, 10.0, points[1])]
    w = np.where(mask, 1.0 / (np.where(mask, v, 1.0) + yearly["tau2"][:, None]), 0.0)
    Xw = X.transpose(0, 2, 1) * w[:, None, :]
    A = Xw @ X
    Xwy = Xw @ np.where(mask, y, 0.0)[:, :, None]
    G = len(pairs)
    ll, betas, covs = np.empty((S, G + 1)), np.zeros((S, G + 1, p)), np.zeros((S, G + 1, p, p))
    penalty = np.zeros((S, p, p))
    idx = np.arange(n_plain, p)
    for g, (a, b) in enumerate(pairs):  # a loop over the grid; every series at once
        d = vbar[:, None] * np.where(np.arange(ns) < 2, a, b)[None, :]
        V = C.copy()
        V[:, np.arange(ns), np.arange(ns)] += d
        ll[:, g] = loglik(V) - np.log(G)  # the seasons' prior mass, spread evenly over the grid
        penalty[:, idx, idx] = 1.0 / d
        covs[:, g] = np.linalg.inv(A + penalty)  # positive definite: every season twice, and a penalty
        betas[:, g] = (covs[:, g] @ Xwy)[:, :, 0]
    ll[:, G] = loglik(C) + np.log(NO_SEASON_ODDS)
    betas[:, G, :n_plain] = plain["beta"]
    covs[:, G, :n_plain, :n_plain] = plain["cov"]
    weight = np.exp(ll - ll.max(axis=1, keepdims=True))
    weight /= weight.sum(axis=1, keepdims=True)
    none = weight[:, G]
    beta = np.einsum("sg,sgp->sp", weight, betas)
    dev = betas - beta[:, None, :]
    cov = np.einsum("sg,sgpq->spq", weight, covs + dev[:, :, :, None] * dev[:, :, None, :])
    return {"beta": beta, "cov": cov, "tau2": none * plain["tau2"] + (1 - none) * yearly["tau2"],
            "df": none * plain["df"] + (1 - none) * yearly["df"], "q": fixed["q"], "q_df": fixed["df"],
            "season_weight": 1 - none}


def _slope_fit(est: pd.DataFrame, waves: list[str], y, v, ok, X, cycle: int | None) -> dict:
    """The slope's meta-regression; with a seasonal ``cycle``, series that cover every season
    twice (seasons_covered) get seasonal effects beside the line as far as their waves show them (seasonal_regression),
    so that their slope, its interval and their wave-to-wave variation are net of the seasons.
    ``q_df`` is the df of the excess-variation statistic q; ``season_part`` and
    ``season_var`` (series x waves) the fitted seasonal effect of each wave and its variance
    (zero for a series fitted without seasons)."""
    S, K = y.shape
    fit = meta_regression(y, np.where(ok, v, 1.0), X, ok)
    fit["q_df"] = fit["df"]
    fit["season_part"], fit["season_var"] = np.zeros((S, K)), np.zeros((S, K))
    dates = est.drop_duplicates("wave").set_index("wave")["fieldwork_date"]
    enough = seasons_covered(ok, [dates[w] for w in waves], cycle)
    fit["seasonal"] = enough
    if not enough.any():
        return fit
    cols = season_columns([dates[w] for w in waves], cycle)  # type: ignore[arg-type]  # set when enough
    Xs = np.concatenate([X[enough], np.broadcast_to(cols[None], (int(enough.sum()), *cols.shape))], axis=2)
    seasonal = seasonal_regression(y[enough], np.where(ok[enough], v[enough], 1.0), Xs, ok[enough], X.shape[2])
    for key in ("tau2", "q", "df", "q_df"):
        fit[key] = fit[key].astype(float)
        fit[key][enough] = seasonal[key]
    fit["beta"][enough] = seasonal["beta"][:, :2]
    fit["cov"][enough] = seasonal["cov"][:, :2, :2]
    fit["season_part"][enough] = seasonal["beta"][:, 2:] @ cols.T
    fit["season_var"][enough] = np.einsum("kp,spq,kq->sk", cols, seasonal["cov"][:, 2:, 2:], cols)
    return fit


def _series_arrays(est: pd.DataFrame, segment_start: dict[str, str] | None = None):
    """Pad the estimates into (series x waves) arrays, in fieldwork order. ``segment_start``
    maps a metric to the wave its current series starts at (a wording break): its earlier
    waves are marked unusable."""
    keys = ["metric", "group", "subgroup"]
    est = est.sort_values("fieldwork_date", kind="mergesort")
    # one integer per (metric, group, subgroup), numbered in order of first appearance
    codes = [pd.factorize(est[k])[0].astype(np.int64) for k in keys]
    combined = (codes[0] * (codes[1].max(initial=0) + 1) + codes[1]) * (codes[2].max(initial=0) + 1) + codes[2]
    si, firsts = pd.factorize(combined)
    first_row = np.zeros(len(firsts), dtype=np.int64)
    first_row[si[::-1]] = np.arange(len(si))[::-1]
    series = est[keys].iloc[first_row].reset_index(drop=True)
    wi, wave_names = pd.factorize(est["wave"])
    waves = list(wave_names)
    S, K = len(series), len(waves)
    y = np.full((S, K), np.nan)
    v = np.full((S, K), np.nan)
    y[si, wi] = est["value"].to_numpy(float)
    v[si, wi] = est["se"].to_numpy(float) ** 2
    ok = np.zeros((S, K), bool)
    ok[si, wi] = est["reliable"].to_numpy(bool) & (est["se"].to_numpy(float) > 0)
    firsts = est.drop_duplicates("wave")
    dates = dict(zip(firsts["wave"], firsts["fieldwork_date"]))
    t0 = dt.date.fromisoformat(dates[waves[0]])
    years = np.array([(dt.date.fromisoformat(dates[w]) - t0).days / 365.25 for w in waves])
    widx = {w: i for i, w in enumerate(waves)}
    for metric, start in (segment_start or {}).items():
        if start in widx:
            ok[(series["metric"] == metric).to_numpy(), : widx[start]] = False
    return series, waves, y, v, ok, years


def fit_trends(est: pd.DataFrame, segment_start: dict[str, str] | None = None, adjust: str = "bh",
               level: float = 0.95, min_waves: int = MIN_WAVES, matters: dict[str, float] | None = None,
               cycle: int | None = None) -> pd.DataFrame:
    """Slope, extra-variation test, shift and blip for every series in an estimates table.

    ``segment_start`` maps a metric to the wave its current series starts at (a wording
    break): earlier waves are left out for that metric. Each series gets one p-value for
    "it moved" (see ``_pattern_tests``); those p-values are adjusted together (``adjust``)
    across every series of the call, and a series that passes gets the shape that fits it
    best: rising/falling, shifted up/down, a one-wave blip, or moved up/down when the waves
    cannot tell a trend from a step (PATTERNS). A series that does not pass is 'no pattern
    found', or 'flat' where ``matters`` (metric -> smallest change that matters, in value
    units, declared in the codebook) holds the slope's interval at the family's agreeing
    level (tracker.methods.tests.family_level) within that change per year.
    """
    series, waves, y, v, ok, years = _series_arrays(est, segment_start)
    S, K = y.shape
    k = ok.sum(axis=1)
    fit_ok = k >= min_waves
    z = norm_ppf(0.5 + level / 2)

    # slope per year, centred time for stability
    tbar = (ok * years[None, :]).sum(axis=1) / np.maximum(k, 1)
    X = np.stack([np.ones((S, K)), np.where(ok, years[None, :] - tbar[:, None], 0.0)], axis=2)
    trend = _slope_fit(est, waves, y, v, ok, X, cycle)
    slope = trend["beta"][:, 1]
    slope_se = np.sqrt(trend["cov"][:, 1, 1])
    # t on k - 2 df rather than z: few waves and an estimated tau^2 make z too narrow
    df = np.maximum(trend["df"], 1)
    with np.errstate(divide="ignore", invalid="ignore"):  # a series too short to fit has no SE: NaN
        slope_p = 2 * t_sf(np.abs(slope / slope_se), df)
    tq = t_ppf(0.5 + level / 2, df)
    q_p = chi2_sf(trend["q"], np.maximum(trend["q_df"], 1))

    # the patterns (trend, step, blip) are judged on the series net of its fitted seasons, each
    # wave's variance with that of its season's estimate
    y = y - trend["season_part"]
    v = v + trend["season_var"]
    tests = _pattern_tests(y, np.where(ok, v, 1.0), ok, X)
    p_any = np.where(fit_ok, tests["p"], np.nan)
    adj = adjust_pvalues(p_any, adjust)
    moving = fit_ok & (adj <= 1 - level)
    shape = np.where(moving, tests["shape"], "none")
    up = np.where(shape == "step", tests["step_size"] > 0, slope > 0)
    pattern = np.select(
        [~fit_ok, shape == "blip", (shape == "step") & up, shape == "step", (shape == "line") & up,
         shape == "line", (shape == "unclear") & up, shape == "unclear"],
        ["too few waves", "one-wave blip", "shifted up", "shifted down", "rising", "falling", "moved up",
         "moved down"], "no pattern found")
    margin = series["metric"].map(matters or {}).to_numpy(float)
    tq_family = t_ppf(0.5 + family_level(adj, adjust, 1 - level) / 2, df)
    with np.errstate(invalid="ignore"):
        flat = ((pattern == "no pattern found") & np.isfinite(margin) & (slope - tq_family * slope_se >= -margin)
                & (slope + tq_family * slope_se <= margin))
    pattern = np.where(flat, "flat", pattern)
    is_shift, is_blip, pattern_p = shape == "step", shape == "blip", adj
    shift = _levels(y, np.where(ok, v, 1.0), ok, tests["step_at"])

    first = np.where(k > 0, ok.argmax(axis=1), 0)
    last = np.where(k > 0, K - 1 - ok[:, ::-1].argmax(axis=1), 0)
    wv = np.array(waves, dtype=object)
    latest = (y + trend["season_part"])[np.arange(S), last]
    meta = est.drop_duplicates(["metric"]).set_index("metric")
    note = np.where(~fit_ok, "fewer than " + str(min_waves) + " waves with a reliable value: no slope", "")
    if segment_start:
        seg = series["metric"].map(lambda m: f"series starts at {segment_start[m]} (wording break)"
                                   if m in segment_start else "").to_numpy(object)
        note = np.where(seg != "", np.where(note != "", seg + "; " + note, seg), note)
    if trend["seasonal"].any():
        said = "slope and pattern net of seasonal effects"
        note = np.where(trend["seasonal"], np.where(note != "", note + "; " + said, said), note)
    j = tests["step_at"]
    out = pd.DataFrame({
        "metric": series["metric"], "metric_label": series["metric"].map(meta["metric_label"]),
        "kind": series["metric"].map(meta["kind"]), "group": series["group"], "subgroup": series["subgroup"],
        "first_wave": wv[first], "last_wave": wv[last], "waves": k,
        "latest_value": latest,
        "slope_per_year": np.where(fit_ok, slope, np.nan),
        "slope_low": np.where(fit_ok, slope - tq * slope_se, np.nan),
        "slope_high": np.where(fit_ok, slope + tq * slope_se, np.nan),
        "slope_p": np.where(fit_ok, slope_p, np.nan),
        "wave_to_wave_sd": np.where(fit_ok, np.sqrt(trend["tau2"]), np.nan),
        "excess_variation_chi2": np.where(fit_ok, trend["q"], np.nan),
        "excess_variation_p": np.where(fit_ok, q_p, np.nan),
        "pattern": pattern, "pattern_p_adjusted": np.where(fit_ok, pattern_p, np.nan),
        "shift_wave": np.where(is_shift, wv[np.maximum(j, 0)], None),
        "level_before": np.where(is_shift, shift["before"], np.nan),
        "level_before_low": np.where(is_shift, shift["before"] - z * shift["before_se"], np.nan),
        "level_before_high": np.where(is_shift, shift["before"] + z * shift["before_se"], np.nan),
        "level_after": np.where(is_shift, shift["after"], np.nan),
        "level_after_low": np.where(is_shift, shift["after"] - z * shift["after_se"], np.nan),
        "level_after_high": np.where(is_shift, shift["after"] + z * shift["after_se"], np.nan),
        "blip_wave": np.where(is_blip, wv[np.maximum(tests["blip_at"], 0)], None),
        "blip_size": np.where(is_blip, tests["blip_size"], np.nan),
        "note": note,
        # typed: the wave a wording break restarts the series at (None: no restart in the window)
        "restarts_at": series["metric"].map(lambda m: (segment_start or {}).get(m)).to_numpy(object),
        "tau2": trend["tau2"], "intercept": trend["beta"][:, 0], "time_centre": tbar,
    })
    out.attrs["adjust"] = ADJUST_METHODS[adjust]
    out.attrs["level"] = level
    return out


#: Shares of the 5 % false-call budget of a series: the straight line, the step search and
#: the blip search. The blip, the weakest signal, gets the largest share: the line and the step
#: tests are strongly correlated, so their shares overlap in the false calls they make and a
#: smaller share costs them little (set by the seeded simulation of docs/validation.md: from
#: 0.2/0.3/0.5 to these, an 8-point blip is called 4 points more often, a step 1.5 points and a
#: slope 0.2 less, false calls unchanged; the line keeps enough for short series, whose t has few df).
BUDGET = {"line": 0.15, "step": 0.225, "blip": 0.625}
#: Bounds on the log Bayes factor of a step (at any candidate wave) over the straight line:
#: below the first the series reads as a trend, above the second as a step, and in between
#: the waves cannot tell the two apart. Set by the seeded simulation of docs/validation.md
#: so that a trend is read as a step, and a step as a trend, under 10 % of the time.
STEP_OVER_LINE = (-1.3, 0.3)


def effective_tests(R: np.ndarray) -> np.ndarray:
    """Effective number of independent tests among correlated ones, from the eigenvalues
    of their correlation matrix (Li & Ji 2005, Heredity 95:221): sum of I(|l| >= 1) plus
    the fractional part of |l|. R: (S, m, m)."""
    lam = np.abs(np.linalg.eigvalsh(R))
    return ((lam >= 1).astype(float) + (lam - np.floor(lam))).sum(axis=-1)


def _candidates(ok: np.ndarray, X_trend: np.ndarray) -> dict:
    """Regressors and validity of every candidate alternative to a constant level: the
    centred straight line; a step at wave j (two reliable waves before j, two from j on);
    a one-wave blip at interior wave j (two reliable waves before, one after; the latest
    wave is never a blip, it has no later neighbour yet)."""
    S, K = ok.shape
    k = ok.sum(axis=1)
    cum = np.cumsum(ok, axis=1)
    out = {"line": ([X_trend[:, :, 1]], [k >= 3], [0]), "step": ([], [], []), "blip": ([], [], [])}
    for j in range(1, K):
        before = cum[:, j - 1]
        out["step"][0].append(((np.arange(K)[None, :] >= j) & ok).astype(float))
        out["step"][1].append(ok[:, j] & (before >= 2) & (k - before >= 2))
        out["step"][2].append(j)
        if j < K - 1:
            dummy = np.zeros((S, K))
            dummy[:, j] = 1.0
            out["blip"][0].append(dummy)
            out["blip"][1].append(ok[:, j] & (before >= 2) & (k - cum[:, j] >= 1))
            out["blip"][2].append(j)
    return {name: (np.stack(c, axis=2), np.stack(val, axis=1), np.array(at)) if c else
            (np.zeros((S, K, 1)), np.zeros((S, 1), bool), np.array([-1])) for name, (c, val, at) in out.items()}


def _max_t_p(t, valid, cols, w, df):
    """p of the largest |t| among a series' candidates (t on ``df``): the Sidak bound with the
    effective number of tests (Li & Ji 2005) of the candidates' correlation under the
    constant-level model with weights ``w``. t, valid: (S, m); cols: (S, K, m)."""
    S, _K, m = cols.shape
    rows = np.arange(S)
    with np.errstate(invalid="ignore", divide="ignore"):  # a series with no weight left: no test (valid)
        centred = cols - (np.einsum("sk,skm->sm", w, cols) / w.sum(axis=1)[:, None])[:, None, :]
    G = np.einsum("skm,sk,skn->smn", centred, w, centred)
    d = np.sqrt(np.einsum("smm->sm", G))
    d = np.where(d > 0, d, 1.0)
    both = valid[:, :, None] & valid[:, None, :]
    R = np.where(both, G / d[:, :, None] / d[:, None, :], 0.0) + np.eye(m)[None] * (~valid)[:, :, None]
    meff = np.maximum(effective_tests(R) - (~valid).sum(axis=1), 1.0)
    best = t.argmax(axis=1)
    p_one = 2 * t_sf(t[rows, best], df)
    with np.errstate(divide="ignore"):
        return np.where(valid.any(axis=1), -np.expm1(meff * np.log1p(-p_one)), np.nan)


def _pattern_tests(y, v, ok, X_trend):
    """One model comparison per series: a constant level against a straight line, a step at any
    candidate wave and a one-wave blip at any candidate wave.

    Each candidate adds one regressor to the constant level and is fitted as a random-effects
    meta-regression (known sampling variances plus between-wave variance, re-estimated with
    the candidate in the model, so a blip or step does not inflate its own noise); its t is
    taken on k - 2 df. Within a kind, the largest |t| is referred to the Sidak bound with
    the effective number of tests of its candidates (Li & Ji 2005), computed from the
    correlation of the candidate estimates under the constant-level model. The series' p is the
    weighted Bonferroni combination of the three kinds, min_k p_k / budget_k, so false calls
    of any pattern stay within the level per series (measured in docs/validation.md).

    The shape of a moving series is chosen by fit, every model at one common between-wave
    variance: a blip when its t exceeds those of the step and the line; otherwise the log
    Bayes factor of a step at any candidate wave (uniform over the waves, each at its best
    fit: exp(-RSS/2) averaged) against the line decides, within the bounds STEP_OVER_LINE:
    a trend below, a step above, and in between the series moved but the waves cannot tell
    the two apart. They cannot always: a 6-point step at mid-series lies about 2.5 noise SDs
    from its best line in 14 waves (docs/validation.md).
    """
    S, K = y.shape
    one = np.ones((S, K))
    k = ok.sum(axis=1)
    df = np.maximum(k - 2, 1)
    level_fit = meta_regression(y, v, one[:, :, None], ok)
    w = np.where(ok, 1.0 / (v + level_fit["tau2"][:, None]), 0.0)
    rows = np.arange(S)
    res = {}
    cands = _candidates(ok, X_trend)
    for name, (cols, valid, at) in cands.items():
        m = cols.shape[2]
        t = np.zeros((S, m))
        b = np.zeros((S, m))
        for c in range(m):  # a loop over candidate waves; every series at once
            if not valid[:, c].any():
                continue
            fit = meta_regression(y, v, np.stack([one, cols[:, :, c]], axis=2), ok)
            b[:, c] = fit["beta"][:, 1]
            with np.errstate(invalid="ignore", divide="ignore"):
                t[:, c] = fit["beta"][:, 1] / np.sqrt(fit["cov"][:, 1, 1])
        t = np.where(valid, np.abs(np.nan_to_num(t)), 0.0)
        best = t.argmax(axis=1)
        res[name] = {"t": t[rows, best], "p": _max_t_p(t, valid, cols, w, df),
                     "at": np.where(valid.any(axis=1), at[best], -1), "size": b[rows, best],
                     "cols": cols[rows, :, best]}
    with np.errstate(invalid="ignore"):
        share = np.stack([res[n]["p"] / BUDGET[n] for n in BUDGET], axis=1)
    p_any = np.minimum(1.0, np.nanmin(np.where(np.isnan(share), np.inf, share), axis=1))

    # shape by fit, every model at one common between-wave variance (the smallest of the
    # three best fits, so that no model is judged with noise another one explains)
    best = {n: np.stack([one, res[n]["cols"]], axis=2) for n in BUDGET}
    tau2 = np.min(np.stack([meta_regression(y, v, X, ok)["tau2"] for X in best.values()], axis=1), axis=1)
    wc = np.where(ok, 1.0 / (v + tau2[:, None]), 0.0)

    def half_rss(X):
        r = np.where(ok, y - np.einsum("skp,sp->sk", X, meta_regression(y, v, X, ok, tau2)["beta"]), 0.0)
        return (wc * r * r).sum(axis=1) / 2

    line = half_rss(best["line"])
    cols, valid, _ = cands["step"]
    gains = np.full(valid.shape, -np.inf)
    for c in np.flatnonzero(valid.any(axis=0)):
        gains[:, c] = np.where(valid[:, c], line - half_rss(np.stack([one, cols[:, :, c]], axis=2)), -np.inf)
    # log Bayes factor of "a step somewhere" (uniform over the candidate waves) against the
    # line, each at its best fit: averaging, not maximising, over the waves charges the step
    # for its search
    with np.errstate(divide="ignore"):
        step_over_line = logsumexp(gains, axis=1) - np.log(np.maximum(valid.sum(axis=1), 1))
    blip = (res["blip"]["at"] >= 0) & (res["blip"]["t"] > np.maximum(res["step"]["t"], res["line"]["t"]))
    shape = np.select([blip, step_over_line > STEP_OVER_LINE[1], step_over_line < STEP_OVER_LINE[0]],
                      ["blip", "step", "line"], "unclear")
    return {"p": p_any, "shape": shape, "step_over_line": step_over_line, "step_at": res["step"]["at"],
            "step_size": res["step"]["size"], "blip_at": res["blip"]["at"], "blip_size": res["blip"]["size"],
            "blip_p": res["blip"]["p"]}


def _levels(y, v, ok, at):
    """The level before and from wave ``at`` of each series (two-level random-effects fit),
    with standard errors."""
    _S, K = y.shape
    step = (np.arange(K)[None, :] >= np.maximum(at, 0)[:, None]).astype(float)
    lv = meta_regression(y, v, np.stack([1 - step, step], axis=2), ok)
    return {"before": lv["beta"][:, 0], "after": lv["beta"][:, 1],
            "before_se": np.sqrt(lv["cov"][:, 0, 0]), "after_se": np.sqrt(lv["cov"][:, 1, 1]),
            "delta": lv["beta"][:, 1] - lv["beta"][:, 0]}

def fitted_values(trend_rows: pd.DataFrame, est: pd.DataFrame, t0: str | None = None) -> pd.Series:
    """The fitted line or shift levels at each estimate row (NaN where the pattern is
    no pattern found, flat, a blip, or the wave lies outside the fitted series).

    Time zero is ``t0``, the fieldwork date of the first wave the trends were fitted on
    (default: the first date in ``est``)."""
    keys = ["metric", "group", "subgroup"]
    start = dt.date.fromisoformat(t0 or est["fieldwork_date"].min())
    years = est["fieldwork_date"].map(lambda d: (dt.date.fromisoformat(d) - start).days / 365.25)
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
