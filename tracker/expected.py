"""Before and after a wave: the expected range of the next wave, and surprises at intake.

For every metric x subgroup series a straight line is fitted as a random-effects
meta-regression (tracker.trends.meta_regression) through its waves, where the pattern of
tracker.trends says so through the waves since its step, and without the wave of a one-wave
blip; a new wave's value is predicted with the prediction interval of Higgins, Thompson &
Spiegelhalter (2009, JRSS A 172:137, section 2.3) extended by the new wave's own sampling
variance:

  y_new ~ x' b  +/-  t_df sqrt(x' Cov(b) x + tau^2 + v_new),

df by Satterthwaite (1946), each wave's total variance tau^2 + v taken as estimated on k - p
degrees of freedom (k the waves fitted, p the pattern's parameters); tau^2 is the between-wave variance and
v_new the sampling variance of the new wave: for the expected range, the recent waves'
variance scaled to the expected base (v = unit variance x design effect / base); for a
surprise, the new cell's own variance. A surprise is a cell whose two-sided p-value under
that distribution survives false discovery control (Benjamini & Hochberg 1995) across every
cell of the wave. With tau^2 = 0 the interval is the closed form of
the weighted least-squares prediction with its known-variance standard error plus v_new
(tests/test_expected.py checks it against statsmodels WLS).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from .methods.distributions import t_ppf, t_sf
from .methods.tests import adjust_pvalues
from .trends import MIN_WAVES, _series_arrays, meta_regression, seasonal_regression, seasons_covered

__all__ = ["MODELS", "RANGE_COLUMNS", "SURPRISE_COLUMNS", "WINDOW", "basis_text", "next_ranges", "predict",
           "recent_mask", "shown",
           "surprise_lines", "surprise_table"]

KEYS = ["metric", "group", "subgroup"]

#: The pattern of a series -> the model its next wave is predicted from. A line for every
#: pattern: the seeded simulation (docs/validation.md) found a constant level for series with
#: no pattern, and a level after a step, too narrow when a slow slope went unseen or was read
#: as a step.
MODELS = {"rising": "line", "falling": "line", "moved up": "line", "moved down": "line",
          "shifted up": "step", "shifted down": "step", "no pattern found": "line", "flat": "line",
          "one-wave blip": "line"}

#: Predictions use the latest this many waves (six years of quarters, two of months): the
#: recent series is what a new wave should follow, and judging a wave at intake then costs
#: the same however long the study has run.
WINDOW = 24

#: Columns of the expected-range table (docs/columns.md).
RANGE_COLUMNS = ["metric", "metric_label", "kind", "group", "subgroup", "expected", "low", "high", "basis",
                 "model", "waves_used", "expected_base", "prediction_sd", "fit_sd", "between_wave_sd",
                 "sampling_sd", "df"]
#: Columns of the surprises table.
SURPRISE_COLUMNS = ["wave", "metric", "metric_label", "kind", "group", "subgroup", "value", "expected", "low",
                    "high", "base", "effective_base", "z", "p_raw", "p_adjusted", "surprise", "model"]


def _years(date: str, t0: str) -> float:
    return (dt.date.fromisoformat(date) - dt.date.fromisoformat(t0)).days / 365.25


def predict(hist: pd.DataFrame, patterns: pd.DataFrame, at_date: str, v_new: pd.Series | None = None,
            segment_start: dict[str, str] | None = None, level: float = 0.95, cycle: int | None = None
            ) -> pd.DataFrame:
    """The predictive distribution of a new wave at ``at_date`` for every series of ``hist``
    (estimates rows of the waves before it, in fieldwork order).

    ``patterns`` holds each series' pattern, shift wave and blip wave (tracker.trends);
    ``v_new`` the new wave's sampling variance per series (indexed by metric, group,
    subgroup; missing or None: the mean variance of the last three waves). Returns one row
    per series with expected, the interval (low, high), the standard deviations of its
    parts and the degrees of freedom; a series with fewer than MIN_WAVES usable waves, or
    not fitted, gets NaN and its reason in ``basis``. With a seasonal ``cycle`` (12 or 4) a
    series whose fitted waves cover every season twice gets seasonal effects in its line as far as
    its waves show them (tracker.trends.seasonal_regression), and the new wave its season's.
    """
    series, waves, y, v, ok, years = _series_arrays(hist, segment_start)
    S, K = y.shape
    widx = {w: i for i, w in enumerate(waves)}
    pat = series.merge(patterns[[*KEYS, "pattern", "shift_wave", "blip_wave"]], on=KEYS, how="left")
    model = pat["pattern"].map(MODELS).fillna("none").to_numpy()
    blip = pat["blip_wave"].map(widx).to_numpy(dtype=float)
    has = np.flatnonzero(~np.isnan(blip))
    ok[has, blip[has].astype(int)] = False  # the blip is one wave's deviation: left out of the fit
    k = ok.sum(axis=1)
    model = np.where(k >= MIN_WAVES, model, "none")
    t0 = hist.sort_values("fieldwork_date")["fieldwork_date"].iloc[0]
    t_new = _years(at_date, t0)
    if v_new is None:
        v_new = pd.Series(dtype=float)
    last3 = recent_mask(ok)
    with np.errstate(invalid="ignore"):
        recent = np.where(last3, v, 0.0).sum(axis=1) / last3.sum(axis=1)
    given = pd.MultiIndex.from_frame(series).map(v_new.to_dict()) if len(v_new) else np.full(S, np.nan)
    vn = np.where(np.isnan(np.asarray(given, float)), recent, np.asarray(given, float))

    expected = np.full(S, np.nan)
    fit_var = np.full(S, np.nan)
    tau2 = np.full(S, np.nan)
    df = np.full(S, np.nan)
    vbar = np.full(S, np.nan)
    seasonal = np.zeros(S, bool)
    for name in ("line", "step"):  # a loop over the models; every series of a model at once
        rows = np.flatnonzero(model == name)
        if not rows.size:
            continue
        yy, vv, oo = y[rows], np.where(ok[rows], v[rows], 1.0), ok[rows]
        one = np.ones((rows.size, K))
        if name == "line":
            tbar = (oo * years[None, :]).sum(axis=1) / np.maximum(oo.sum(axis=1), 1)
            X = np.stack([one, np.where(oo, years[None, :] - tbar[:, None], 0.0)], axis=2)
            x_new = np.stack([np.ones(rows.size), t_new - tbar], axis=1)
        else:  # the step restarts the series: a line through the waves since it
            at = pat["shift_wave"].iloc[rows].map(widx).to_numpy(dtype=float)
            since = oo & (np.arange(K)[None, :] >= at[:, None])
            oo = np.where((since.sum(axis=1) >= MIN_WAVES)[:, None], since, oo)
            tbar = (oo * years[None, :]).sum(axis=1) / np.maximum(oo.sum(axis=1), 1)
            X = np.stack([one, np.where(oo, years[None, :] - tbar[:, None], 0.0)], axis=2)
            x_new = np.stack([np.ones(rows.size), t_new - tbar], axis=1)
            k[rows] = oo.sum(axis=1)
        # with a seasonal cycle, series that cover every season twice get seasonal effects;
        # the others are fitted as before
        parts = [(np.ones(rows.size, bool), X, x_new)]
        if cycle:
            dates = hist.drop_duplicates("wave").set_index("wave")["fieldwork_date"]
            enough = seasons_covered(oo, [dates[w] for w in waves], cycle)
            Xs, xs = _with_seasons(X, x_new, hist, waves, at_date, cycle)
            parts = [(enough, Xs, xs), (~enough, X, x_new)]
            seasonal[rows] = enough
        for sel, XX, xn in parts:
            if not sel.any():
                continue
            r, o = rows[sel], oo[sel]
            fit = (seasonal_regression(yy[sel], vv[sel], XX[sel], o, X.shape[2]) if XX is not X else
                   meta_regression(yy[sel], vv[sel], XX[sel], o))
            expected[r] = (fit["beta"] * xn[sel]).sum(axis=1)
            fit_var[r] = np.einsum("sp,spq,sq->s", xn[sel], fit["cov"], xn[sel])
            tau2[r] = fit["tau2"]
            df[r] = np.maximum(fit["df"], 1)
            vbar[r] = np.where(o, vv[sel], 0.0).sum(axis=1) / np.maximum(o.sum(axis=1), 1)
    sd = np.sqrt(fit_var + tau2 + vn)
    # Satterthwaite (1946): each wave's total variance tau^2 + v is estimated on k - p degrees
    # of freedom; the prediction's variance, mostly known sampling variance, gets more
    with np.errstate(invalid="ignore", divide="ignore"):
        df = np.where(np.isnan(df), np.nan, np.maximum(df * sd**4 / (tau2 + vbar) ** 2, 1.0))
    half = t_ppf(0.5 + level / 2, np.where(np.isnan(df), 1.0, df)) * sd
    out = series.copy()
    out["expected"] = expected
    out["low"], out["high"] = expected - half, expected + half
    out["model"] = model
    out["waves_used"] = k
    out["prediction_sd"] = sd
    out["fit_sd"] = np.sqrt(fit_var)
    out["between_wave_sd"] = np.sqrt(tau2)
    out["sampling_sd"] = np.sqrt(vn)
    out["df"] = df
    out["seasonal"] = seasonal
    out["reason"] = np.where(model != "none", "", np.where(k < MIN_WAVES, f"fewer than {MIN_WAVES} usable waves",
                                                           "no pattern fitted"))
    return out


def _with_seasons(X, x_new, hist: pd.DataFrame, waves: list[str], at_date: str, cycle: int):
    """The design and the new wave's row with the waves' seasonal effects added."""
    from .trends import season_columns

    dates = hist.drop_duplicates("wave").set_index("wave")["fieldwork_date"]
    cols = season_columns([dates[w] for w in waves], cycle)
    S = X.shape[0]
    extra = np.broadcast_to(cols[None], (S, *cols.shape))
    new = np.broadcast_to(season_columns([at_date], cycle), (S, cycle - 1))
    return np.concatenate([X, extra], axis=2), np.concatenate([x_new, new], axis=1)


def recent_mask(ok: np.ndarray, n: int = 3) -> np.ndarray:
    """The last ``n`` usable waves of each series (series x waves)."""
    from_right = np.cumsum(ok[:, ::-1], axis=1)[:, ::-1]
    return ok & (from_right <= n)


def shown(kind: str, v: float) -> str:
    """A value as the brief writes it (the kind's own form, tracker.kinds)."""
    if not np.isfinite(v):
        return "n/a"
    from .kinds import kind_of

    return kind_of(kind).fmt_value(v)


def basis_text(row) -> str:
    """What a prediction rests on, in words."""
    if row.model == "none":
        return row.reason
    what = {"line": "line", "step": "line since the step"}[row.model]
    parts = [f"{what} ({int(row.waves_used)} waves)" + (" with seasonal effects" if getattr(row, "seasonal", False)
                                                         else "")]
    if row.between_wave_sd > 0:
        parts.append("wave-to-wave variation")
    if np.isfinite(row.expected_base):
        parts.append(f"base {row.expected_base:,.0f}")
    return "; ".join(parts)


def surprise_lines(table: pd.DataFrame, level: float = 0.95) -> list[str]:
    """The surprises of a wave in words (one line each), after a line saying how many were tested."""
    tested = int(table["p_raw"].notna().sum())
    if not tested:
        return []
    hits = table[table["surprise"]].sort_values("p_adjusted")
    rate = f"false discovery rate {1 - level:.0%}"
    if hits.empty:
        return [f"no cell lies outside its expected range ({tested:,} cells tested; {rate})"]
    out = [(f"{len(hits)} of {tested:,} cells lie outside their expected range ({rate}; a second look is due, "
           f"not a conclusion):")]
    for r in hits.itertuples():
        who = "in total" if r.group == "total" else f"{r.group} = {r.subgroup}"
        out.append(f"  {r.metric_label}, {who}: {shown(r.kind, r.value)} against an expected "
                   f"{shown(r.kind, r.low)} to {shown(r.kind, r.high)} (base {int(r.base):,})")
    return out


def surprise_table(pred: pd.DataFrame, new: pd.DataFrame, adjust: str = "bh", level: float = 0.95) -> pd.DataFrame:
    """Every cell of a new wave (estimates rows) against its predicted range: z, the two-sided
    p on the prediction's t distribution, p adjusted across all cells (one family), and
    ``surprise`` where the adjusted p is at most 1 - level. Cells that fail the reliability
    rule, or have no prediction, are listed but not tested."""
    m = new.drop(columns=[c for c in ("df", "model") if c in new.columns]).merge(
        pred[[*KEYS, "expected", "prediction_sd", "fit_sd", "between_wave_sd", "df", "model"]], on=KEYS, how="left")
    # the new cell's own sampling variance replaces the recent waves' in the prediction
    sd = np.sqrt(m["fit_sd"] ** 2 + m["between_wave_sd"] ** 2 + m["se"] ** 2)
    tested = (m["reliable"].to_numpy(bool) & np.isfinite(sd.to_numpy()) & (sd.to_numpy() > 0)
              & np.isfinite(m["expected"].to_numpy(float)))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(tested, (m["value"] - m["expected"]) / sd, np.nan)
    df = m["df"].to_numpy(float)
    p = np.where(tested, 2 * t_sf(np.abs(np.nan_to_num(z)), np.where(np.isnan(df), 1.0, df)), np.nan)
    p_adj = adjust_pvalues(p, adjust)
    q = t_ppf(0.5 + level / 2, np.where(np.isnan(df), 1.0, df))
    m["low"], m["high"] = m["expected"] - q * sd, m["expected"] + q * sd
    m["z"], m["p_raw"], m["p_adjusted"] = z, p, p_adj
    m["surprise"] = np.nan_to_num(p_adj, nan=1.0) <= 1 - level
    return m[SURPRISE_COLUMNS].reset_index(drop=True)


def next_ranges(book, hist: pd.DataFrame, patterns: pd.DataFrame, labels: list[str], date: str,
                base: float | None, rows: float, segment_starts: dict[str, str], level: float = 0.95
                ) -> pd.DataFrame:
    """The expected range of the next wave, fielded at ``date``, for every series of ``hist``
    (the estimates of the waves ``labels``, with their sufficient statistics) given their
    ``patterns`` (tracker.trends): the prediction interval plus the sampling variance at the
    expected base. Each series' base is its mean over the last three reliable waves, or, with
    ``base`` (the next wave's respondents in total), its recent share of ``base`` (``rows``:
    the mean respondents of the last three waves). Values stay within their kind's range."""
    from .kinds import KINDS

    series, _, _, v, ok, _ = _series_arrays(hist)
    # recent bases and variance x base (unit variance x design effect) per series
    wide = hist.pivot_table(index=["metric", "group", "subgroup"], columns="wave", values="base", aggfunc="first")
    wide = wide.reindex(pd.MultiIndex.from_frame(series))[[w for w in labels if w in wide.columns]]
    bases = wide.to_numpy(float)
    last3 = recent_mask(ok)
    with np.errstate(invalid="ignore", divide="ignore"):
        n_recent = np.where(last3, bases, 0.0).sum(axis=1) / last3.sum(axis=1)
        vb = np.where(last3, v * bases, 0.0).sum(axis=1) / last3.sum(axis=1)
    n_new = n_recent
    if base is not None:  # each series keeps its recent share of the respondents
        n_new = base * n_recent / rows
    with np.errstate(invalid="ignore", divide="ignore"):
        v_new = pd.Series(vb / n_new, index=pd.MultiIndex.from_frame(series))
    pred = predict(hist, patterns, date, v_new, segment_starts, level, book.seasons)
    pred["expected_base"] = n_new
    pred["metric_label"] = pred["metric"].map({m.name: m.label for m in book.metrics.values()})
    pred["kind"] = pred["metric"].map({m.name: m.kind for m in book.metrics.values()})
    lo_edge = pred["kind"].map({k: (kind.bounds or (-np.inf, np.inf))[0] for k, kind in KINDS.items()})
    hi_edge = pred["kind"].map({k: (kind.bounds or (-np.inf, np.inf))[1] for k, kind in KINDS.items()})
    for col in ("expected", "low", "high"):  # a value cannot leave its kind's range
        pred[col] = np.clip(pred[col].to_numpy(float), lo_edge.to_numpy(float), hi_edge.to_numpy(float))
    pred["basis"] = [basis_text(r) for r in pred.itertuples()]
    return pred
