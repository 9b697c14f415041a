"""The data each chart draws, gathered from a study's results (estimates, patterns, each
step's verdict, smoothed series): the one place where charting asks the study for anything.
tracker.charts renders what this hands it and computes nothing."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .charts import trend_spec
from .errors import TrackerError
from .kinds import KINDS

__all__ = ["chart_table", "trend_chart", "trend_charts", "trend_frame"]


def chart_table(study, labels: list[str], adjust: str, level: float) -> pd.DataFrame:
    """Every estimate of the waves ``labels`` (all metrics, total and subgroups) with what a
    trend chart adds: the fitted line or levels and the pattern of the analysis of the last
    wave, and each step's verdict against the wave before. Made once per study object and
    shared by every chart of a brief."""
    from .trends import fitted_values

    est = study.estimates(waves=labels, level=level)
    every = study.trends(adjust=adjust, level=level, until=labels[-1])
    est["fitted"] = fitted_values(every, est, study.dates()[labels[0]]).to_numpy() if len(est) else np.nan
    keys = ["metric", "group", "subgroup"]
    est = est.merge(every[[*keys, "pattern"]], on=keys, how="left")
    steps = study.wave_steps(waves=labels, adjust=adjust, level=level)
    if len(steps):
        steps = steps.rename(columns={"wave_to": "wave", "flags": "change_flags"})[
            [*keys, "wave", "verdict", "change", "p_adjusted", "change_flags"]]
        est = est.merge(steps, on=[*keys, "wave"], how="left")
    else:
        est["verdict"], est["change"], est["p_adjusted"], est["change_flags"] = "first wave", np.nan, np.nan, ""
    est["verdict"] = est["verdict"].fillna("first wave")
    return est


def trend_frame(study, metric: str, by: str | None = None, adjust: str = "bh", level: float = 0.95,
                until: str | None = None, smooth: bool = False) -> pd.DataFrame:
    """Everything the trend chart draws, one row per wave x subgroup (a plain DataFrame).
    ``until`` ends the series at that wave (a brief of an earlier wave sees no later one)."""
    labels = study.labels
    if until is not None:
        labels = labels[:labels.index(until) + 1]
    base = study.memo(("chart table", tuple(labels), adjust, level),
                      lambda: chart_table(study, labels, adjust, level))
    m = study.codebook.metrics[metric]
    if by is not None and by not in study.codebook.groups:
        study.pick_groups([by])  # the usual message for an unknown split
    out = base[(base["metric"] == metric) & (base["group"] == (by or "total"))].reset_index(drop=True)
    starts = study.segment_starts([m], labels)
    out["segment"] = "series"
    if metric in starts:
        start_rank = labels.index(starts[metric])
        out["segment"] = np.where(out["wave"].map(labels.index) >= start_rank, "after wording change",
                                  "before wording change")
    f = KINDS[m.kind].scale
    for col in ("value", "ci_low", "ci_high", "fitted"):
        out[col + "_shown"] = out[col] * f
    out["change_shown"] = out["change"] * f
    if smooth:  # the smoothed series beside the direct one (tracker.methods.statespace), never instead of it
        sm = study.smoothed(metrics=[metric], by=[by] if by else [], waves=labels, level=level, until=labels[-1])
        out = out.merge(sm[["metric", "group", "subgroup", "wave", "smoothed"]], how="left",
                        on=["metric", "group", "subgroup", "wave"])
        out["smoothed_shown"] = out["smoothed"] * f
    out["panel"] = np.where(out["group"] == "total", "Total", out["subgroup"])
    out["date"] = pd.to_datetime(out["fieldwork_date"])
    tested = base["p_adjusted"].notna() & (base["metric"] == metric) & base["group"].isin(["total", by or "total"])
    out.attrs.update(metric=metric, label=m.label, kind=m.kind, break_wave=starts.get(metric),
                     n_steps=int(tested.sum()), adjust=adjust, level=level)
    return out


def trend_chart(study, metric: str, by: str | None = None, adjust: str = "bh", level: float = 0.95,
                width: int | None = None, height: int = 200, until: str | None = None,
                compact: bool = False, smooth: bool = False) -> dict:
    """The metric wave by wave: interval band, line, marked significant steps, fitted trend
    or shift levels, a wording break as a gap with a note, bases under the axis.

    ``compact``: a small chart for a grid (no subtitle, no bases), for series that held.
    ``smooth``: also the smoothed series (tracker.methods.statespace), dotted and labelled "smoothed"."""
    if metric not in study.codebook.metrics:
        raise TrackerError(f"metric {metric}: not a metric of this study ({', '.join(study.codebook.metrics)})")
    return trend_spec(trend_frame(study, metric, by, adjust, level, until, smooth), by, adjust, level, width, height,
                      compact)


def trend_charts(study, metric: str, by: list[str] | tuple[str, ...] = (), adjust: str = "bh",
                 level: float = 0.95, until: str | None = None, smooth: bool = False) -> dict:
    """The trend chart of ``metric``: in total, by one split, or one block of panels per split."""
    if len(by) <= 1:
        return trend_chart(study, metric, by=by[0] if by else None, adjust=adjust, level=level, until=until,
                           smooth=smooth)
    return {"vconcat": [trend_chart(study, metric, by=g, adjust=adjust, level=level, until=until, smooth=smooth)
                        for g in by]}


