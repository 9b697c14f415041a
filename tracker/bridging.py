"""Bridging a wording break: the level jump a reworded question causes, and the series joined
across it.

At a wording break (a variable's ``break_before`` in the codebook) each series of a metric
that reads the variable is fitted with an intervention term: the random-effects
meta-regression of the trend model (tracker.trends.meta_regression: the waves' known
sampling variances plus a wave-to-wave variance) of its estimates on an intercept, time and
a step at the break, y_t = a + b t + d [t >= break] + u_t + e_t. The step d is the jump the
rewording caused, beside whatever the series was doing anyway; its interval is t on the
fit's degrees of freedom. A bridged series puts the waves before the break on the new
wording's level (value + d, variance + var(d), so that the bridge's own uncertainty travels
with it) and lets trends and expected ranges use the whole series; every output that uses it
says so. Where a side of the break holds fewer than MIN_SIDE reliable waves the jump is not
estimated and the series restarts at the break, as without bridging.

The model assumes the rewording moved the level once and the slope not at all: a bridge
over a break that also changed the slope would bend the trend (the wording-change study of
the trade, a split-sample test at the break wave, is the better evidence where there is one).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .methods.intervals import critical

__all__ = ["JUMP_COLUMNS", "MIN_SIDE", "break_jumps", "bridge"]

#: Reliable waves needed on each side of a break to estimate its jump (with a slope and a
#: wave-to-wave variance to estimate as well, fewer leave the jump resting on one wave).
MIN_SIDE = 3

JUMP_COLUMNS = ["metric", "group", "subgroup", "break_wave", "jump", "jump_se", "jump_low", "jump_high", "df",
                "waves_before", "waves_after", "bridged"]


def break_jumps(est: pd.DataFrame, starts: dict[str, str], level: float = 0.95) -> pd.DataFrame:
    """The jump at each metric's break (``starts``: metric -> first wave of its new wording)
    for every series of those metrics in ``est`` (JUMP_COLUMNS; ``bridged`` false where a
    side has fewer than MIN_SIDE reliable waves)."""
    from .trends import _series_arrays, meta_regression

    est = est[est["metric"].isin(list(starts))]
    if est.empty:
        return pd.DataFrame(columns=JUMP_COLUMNS)
    series, waves, y, v, ok, years = _series_arrays(est, None)
    S, K = y.shape
    at = np.array([waves.index(starts[m]) if starts[m] in waves else K for m in series["metric"]])
    after = np.arange(K)[None, :] >= at[:, None]
    n_before, n_after = (ok & ~after).sum(axis=1), (ok & after).sum(axis=1)
    fit_ok = (n_before >= MIN_SIDE) & (n_after >= MIN_SIDE)
    k = ok.sum(axis=1)
    tbar = (ok * years[None, :]).sum(axis=1) / np.maximum(k, 1)
    X = np.stack([np.ones((S, K)), np.where(ok, years[None, :] - tbar[:, None], 0.0), after.astype(float)], axis=2)
    fit = meta_regression(y, np.where(ok, v, 1.0), X, ok & fit_ok[:, None])
    jump = fit["beta"][:, 2]
    se = np.sqrt(fit["cov"][:, 2, 2])
    df = np.maximum(fit["df"], 1)
    half = critical(level, df) * se
    return pd.DataFrame({
        "metric": series["metric"], "group": series["group"], "subgroup": series["subgroup"],
        "break_wave": [starts[m] for m in series["metric"]], "jump": np.where(fit_ok, jump, np.nan),
        "jump_se": np.where(fit_ok, se, np.nan), "jump_low": np.where(fit_ok, jump - half, np.nan),
        "jump_high": np.where(fit_ok, jump + half, np.nan), "df": np.where(fit_ok, df, np.nan),
        "waves_before": n_before, "waves_after": n_after, "bridged": fit_ok})[JUMP_COLUMNS]


def bridge(est: pd.DataFrame, jumps: pd.DataFrame) -> pd.DataFrame:
    """``est`` with every bridged series' waves before its break put on the new wording's
    level (value + jump; SE from variance + var(jump)) and flagged 'bridged across the wording
    break at W'; the waves before a break whose jump was not estimated are left out (the
    series restarts there)."""
    out = est.copy()
    if jumps.empty:
        return out
    keys = ["metric", "group", "subgroup"]
    j = out[keys].merge(jumps, on=keys, how="left")
    has_break = j["break_wave"].notna().to_numpy()
    dates = dict(zip(out["wave"], out["fieldwork_date"]))
    start = j["break_wave"].map(dates).to_numpy(object)
    before = has_break & (out["fieldwork_date"].to_numpy(object) < np.where(has_break, start, ""))
    shift = before & j["bridged"].fillna(False).to_numpy(bool)
    out.loc[shift, "value"] = out.loc[shift, "value"].to_numpy() + j.loc[shift, "jump"].to_numpy()
    out.loc[shift, "se"] = np.sqrt(out.loc[shift, "se"].to_numpy() ** 2 + j.loc[shift, "jump_se"].to_numpy() ** 2)
    note = "bridged across the wording break at " + j.loc[shift, "break_wave"].astype(str)
    flags = out.loc[shift, "flags"].fillna("").astype(str)
    out.loc[shift, "flags"] = np.where(flags == "", note, flags + "; " + note)
    return out[~(before & ~shift)].reset_index(drop=True)
