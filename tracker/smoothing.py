"""Smoothed series for thin subgroups: signal extraction in a local-level model with each
wave's known sampling variance (tracker.methods.statespace), beside the direct estimates,
never replacing them."""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["smooth_estimates"]


def smooth_estimates(est: pd.DataFrame, segment_starts: dict[str, str], level: float = 0.95,
                     cycle: int | None = None) -> pd.DataFrame:
    """The estimates ``est`` with a smoothed value beside each direct one, fitted per series
    over the waves it holds (Scott & Smith 1974; Harvey 1989: the local-level Kalman filter
    and fixed-interval smoother, the signal variance averaged over its likelihood, as
    :func:`tracker.methods.statespace.smooth_over_q`). Adds ``smoothed``, ``smoothed_low``,
    ``smoothed_high`` (the interval at ``level``) and ``signal_sd`` (the random walk's SD per
    wave); ``segment_starts`` (metric -> first wave after a wording break) restarts a series,
    and cells before the current segment get no smoothed value."""
    from .methods.distributions import norm_ppf
    from .methods.statespace import smooth_over_q, smooth_with_seasons
    from .trends import _series_arrays, season_columns, seasons_covered

    series, labels, y, v, ok, _ = _series_arrays(est, segment_starts)
    ok = ok & np.isfinite(y) & (v > 0)
    fit = smooth_over_q(y, v, ok)
    dates = est.drop_duplicates("wave").set_index("wave")["fieldwork_date"]
    seasonal = seasons_covered(ok, [dates[w] for w in labels], cycle)
    if seasonal.any():
        H = season_columns([dates[w] for w in labels], cycle)  # type: ignore[arg-type]  # set when seasonal
        # the yearly wave alone: a thin subgroup's series cannot carry eleven seasonal effects
        # (in our trials they more than doubled the smoothed value's mean squared error)
        with_seasons = smooth_with_seasons(y[seasonal], v[seasonal], ok[seasonal], H[:, :2])
        for key in ("mean", "var", "q_ml"):
            fit[key][seasonal] = with_seasons[key]
    q = fit["q_ml"]
    z = norm_ppf(0.5 + level / 2)
    sd = np.sqrt(fit["var"])
    frame = pd.DataFrame({
        "metric": np.repeat(series["metric"].to_numpy(), len(labels)),
        "group": np.repeat(series["group"].to_numpy(), len(labels)),
        "subgroup": np.repeat(series["subgroup"].to_numpy(), len(labels)),
        "wave": np.tile(labels, len(series)),
        "smoothed": fit["mean"].ravel(), "smoothed_low": (fit["mean"] - z * sd).ravel(),
        "smoothed_high": (fit["mean"] + z * sd).ravel(), "signal_sd": np.repeat(np.sqrt(q), len(labels)),
    })
    return est.merge(frame, on=["metric", "group", "subgroup", "wave"], how="left")
