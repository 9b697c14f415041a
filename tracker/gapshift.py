"""Has a gap between subgroups moved? Between two waves, and over the waves.

Between two waves: the gap of each pair of subgroups (each level against the rest of the
sample, and the levels of a split pairwise) in the wave and in the baseline, and its change,
the difference in differences (a_2 - b_2) - (a_1 - b_1). Its variance holds every
covariance: within each wave the two sides' (from the PSU totals of their linearized
values, as tracker.within), and between the waves where they share clusters or a panel's
respondents (tracker.methods.variance.cross_wave_covariance on the gap's PSU totals, the
estimator the changes use); independent waves add nothing. Degrees of freedom as for a
change (Satterthwaite's for independent waves, the stacked design's where they share PSUs).

Over the waves: do the subgroups of a split have the same trend slope? Each level's slope
per year comes from the trend model of tracker.trends (a random-effects meta-regression of
its estimates on time); the test is Cochran's Q of the K slopes against their inverse-variance
mean, chi-square on K - 1 df (Cochran 1954, Biometrics 10:101). It treats the levels' slopes
as independent, which they are up to the small covariance of disjoint subgroups in one
stratified wave.

Both kinds of test of one call are adjusted in one family. A gap's change takes the verdicts
of a comparison of two waves (tracker.changes.VERDICTS: a gap that grew is a 'rise', whichever
side leads); the slopes' test those of a test across a split's levels (tracker.within.GAP_VERDICTS).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd

from .changes import resolve_against, verdict_of
from .errors import TrackerError
from .methods.distributions import chi2_sf
from .methods.tests import difference_test, paired_df, satterthwaite_df
from .options import check_adjust, check_level
from .within import REST, TestedTable, adjusted_family, comparison_pairs, pair_df, pick_wave, split_levels, wave_domains

__all__ = ["COLUMNS", "GapShiftResult", "gap_shifts", "slope_heterogeneity"]

COLUMNS = ["metric", "metric_label", "kind", "group", "test", "first", "second", "wave_from", "wave_to",
           "gap_from", "gap_to", "change", "se", "df", "statistic", "p_raw", "p_adjusted", "adjusted_low",
           "adjusted_high", "adjusted_level", "covariance_from", "verdict"]


@dataclass(frozen=True)
class GapShiftResult(TestedTable):
    """Every gap tested in one call and the family they were adjusted in."""

    against: str = ""
    view: ClassVar[str] = "gapshift"


def _cross(study, now, then, a_cols, b_cols):
    """Covariance per metric of a gap in two waves (0 for independent waves), the PSUs they
    share, and what it came from."""
    from .methods.variance import cross_wave_covariance

    book = study.codebook
    shares = (book.clusters and book.waves_share_clusters) or (not book.clusters and book.panel)
    if not shares:
        return 0.0, 0, "none"
    da = now.totals[:, a_cols[0], :] - now.totals[:, a_cols[1], :]
    db = then.totals[:, b_cols[0], :] - then.totals[:, b_cols[1], :]
    if now.replicate_df is not None:  # a panel's longitudinal replicates: the scaled deviations' products
        ha, hb = study.cellstore.id_hashes(now.wave), study.cellstore.id_hashes(then.wave)
        if ha is None or hb is None or not np.intersect1d(ha, hb).size:
            return 0.0, 0, "none"
        return (da * db).sum(axis=0), da.shape[0], "panel"
    ga, gb = now.psu_totals(da), then.psu_totals(db)
    cov, shared = cross_wave_covariance(ga, now.keys, gb, then.keys, book.single_cluster_rule)
    return (cov, shared, "clusters" if book.clusters else "panel") if shared else (0.0, 0, "none")


def gap_shifts(study, wave: str | None = None, against: str = "previous", metrics=None, by=None,
               adjust: str = "bh", level: float = 0.95, slopes: bool = True) -> GapShiftResult:
    """Test whether each gap between subgroups changed from ``against`` to ``wave`` and (with
    ``slopes``) whether the levels of each split trend alike over every stored wave."""
    check_adjust(adjust)
    check_level(level)
    wave = pick_wave(study, wave)
    base = resolve_against(study.labels, study.dates(), wave, against)
    if len(base.waves) != 1:
        raise TrackerError("a gap's change compares two single waves; give previous, year-ago or a wave label")
    other = base.waves[0]
    metric_list = study.pick_metrics(metrics)
    groups = study.pick_groups(by)
    if not groups:
        raise TrackerError("the codebook declares no subgroup splits whose gaps could move")
    now = wave_domains(study, wave, metric_list, groups)
    then = wave_domains(study, other, metric_list, groups)
    if [n[:2] for n in now.names] != [n[:2] for n in then.names]:
        raise TrackerError(f"waves {wave} and {other} do not have the same subgroup levels")
    rows = []
    for g, a, b, kind in comparison_pairs(now.names):  # a loop over pairs; every metric at once
        gap_to = now.value[a] - now.value[b]
        gap_from = then.value[a] - then.value[b]
        v_to = now.cov(now.totals[:, a] - now.totals[:, b], now.totals[:, a] - now.totals[:, b])
        v_from = then.cov(then.totals[:, a] - then.totals[:, b], then.totals[:, a] - then.totals[:, b])
        cov, shared, source = _cross(study, now, then, (a, b), (a, b))
        df_to, df_from = pair_df(now, a, b), pair_df(then, a, b)
        if shared:
            psu_to = (now.held[:, a] | now.held[:, b]).sum(axis=0)
            psu_from = (then.held[:, a] | then.held[:, b]).sum(axis=0)
            df = paired_df(psu_to, df_to, psu_from, df_from, shared)
        else:
            df = satterthwaite_df(v_to, v_from, df_to, df_from)
        ok = (now.base[a] > 0) & (now.base[b] > 0) & (then.base[a] > 0) & (then.base[b] > 0)
        rows.append(pd.DataFrame({
            "metric": [m.name for m in metric_list], "group": g, "test": f"gap change ({kind})",
            "first": now.names[a][1], "second": REST if kind == "against the rest" else now.names[b][1],
            "wave_from": other, "wave_to": wave, "gap_from": gap_from, "gap_to": gap_to,
            "change": np.where(ok, gap_to - gap_from, np.nan), "var": v_to + v_from - 2 * cov,
            "df": df, "covariance_from": source}))
    if slopes:
        rows.append(slope_heterogeneity(study, metric_list, groups))
    table = _finish(pd.concat(rows, ignore_index=True), metric_list, adjust, level, study.matters())
    return GapShiftResult(table, wave, adjust, level, against=other)


def slope_heterogeneity(study, metric_list: list, groups: list[str]) -> pd.DataFrame:
    """Cochran's Q that a split's levels share one trend slope, per metric and split (see the
    module's description); rows shaped like the gap changes', with Q as the statistic."""
    from .trends import _series_arrays, meta_regression

    est = study.estimates(metrics=[m.name for m in metric_list], by=groups)
    est = est[est["group"] != "total"]
    series, _waves, y, v, ok, years = _series_arrays(est, None)
    S, K = y.shape
    k = ok.sum(axis=1)
    tbar = (ok * years[None, :]).sum(axis=1) / np.maximum(k, 1)
    X = np.stack([np.ones((S, K)), np.where(ok, years[None, :] - tbar[:, None], 0.0)], axis=2)
    fit = meta_regression(y, np.where(ok, v, 1.0), X, ok)
    series = series.assign(slope=fit["beta"][:, 1], var=fit["cov"][:, 1, 1], fitted=k >= 3)
    out = []
    for (metric, g), part in series.groupby(["metric", "group"], sort=False):
        part = part[part["fitted"] & np.isfinite(part["var"]) & (part["var"] > 0)]
        q, p = np.nan, np.nan
        if len(part) >= 2:
            w = 1 / part["var"].to_numpy()
            b = part["slope"].to_numpy()
            q = float((w * (b - (w * b).sum() / w.sum()) ** 2).sum())
            p = float(chi2_sf(q, len(part) - 1))
        out.append({"metric": metric, "group": g, "test": "slopes differ", "first": f"all levels of {g}",
                    "second": "", "wave_from": est["wave"].iloc[0] if len(est) else "",
                    "wave_to": est["wave"].iloc[-1] if len(est) else "", "gap_from": np.nan, "gap_to": np.nan,
                    "change": np.nan, "var": np.nan, "df": len(part) - 1, "covariance_from": "none",
                    "statistic": q, "p_slopes": p})
    order = {g: i for i, g in enumerate(split_levels([(g, "", False) for g in groups]))}
    frame = pd.DataFrame(out)
    return frame.sort_values("group", key=lambda s: s.map(order), kind="stable") if len(frame) else frame


def _finish(t: pd.DataFrame, metric_list, adjust: str, level: float, matters: dict) -> pd.DataFrame:
    meta = {m.name: m for m in metric_list}
    change, var, df = (t[c].to_numpy(float) for c in ("change", "var", "df"))
    stat, p = difference_test(change, var, df)
    slopes = (t["test"] == "slopes differ").to_numpy()
    if "p_slopes" in t:
        p = np.where(slopes, t["p_slopes"].to_numpy(float), p)
        stat = np.where(slopes, t["statistic"].to_numpy(float), stat)
    p_adj, adj_level, se, half, sig = adjusted_family(p, var, df, adjust, level)
    lo, hi = change - half, change + half
    limit = t["metric"].map(matters).to_numpy(float)
    # a gap's change is a comparison of two waves (tracker.changes.VERDICTS); the slopes' test
    # compares a split's levels, as the test across levels within a wave (tracker.within.GAP_VERDICTS)
    gap_verdict = verdict_of(~np.isnan(p_adj), sig, change, lo, hi, limit)
    slope_verdict = np.where(np.isnan(p_adj), "not compared", np.where(sig, "differ", "no difference found"))
    verdict = np.where(slopes, slope_verdict, gap_verdict)
    out = t.assign(metric_label=t["metric"].map(lambda m: meta[m].label), kind=t["metric"].map(lambda m: meta[m].kind),
                   se=se, statistic=stat, p_raw=p, p_adjusted=p_adj, adjusted_low=lo, adjusted_high=hi,
                   adjusted_level=adj_level, verdict=verdict)
    return out[COLUMNS].reset_index(drop=True)
