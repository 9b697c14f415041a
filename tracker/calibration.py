"""Seeded simulation of the rates the tool promises, run through its own functions.

Waves are drawn from a known superpopulation under a stratified, clustered design with
unequal weights; each wave goes through the same code as a stored wave
(:func:`tracker.estimates.wave_estimates`, :func:`tracker.estimates.wave_covariance`,
:func:`tracker.changes.compare`, :func:`tracker.composition.compare_composition`), and the
measured rates are set beside their nominal values with Monte Carlo standard errors.
``scripts/calibrate.py`` writes the table to docs/validation.md; the test suite runs a
small tier and checks the rates within Monte Carlo bounds.

The model (common practice for such checks, no single source): every item is a latent
normal b_c + e_i, with a cluster effect b_c ~ N(0, sigma_b^2) and e_i ~ N(0, 1); a share
item is 1 below the threshold that gives the target share exactly, a 1-5 rating cuts the
latent at thresholds that give known category shares. Waves that share clusters keep
correlated cluster effects (0.8); respondents in both waves keep correlated latents (0.6).
"""

from __future__ import annotations

import datetime as dt
import sys
import time
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from .changes import compare
from .codebook import Codebook, parse_codebook
from .composition import compare_composition
from .estimates import finish, wave_covariance, wave_estimates
from .methods.tests import adjust_pvalues

__all__ = [
    "BRIDGE_DESIGN",
    "BRIDGE_REPS",
    "DESIGNS",
    "DRIVER_DESIGN",
    "DRIVER_REPS",
    "FEW_DESIGN",
    "FEW_REPS",
    "FORECAST_DESIGN",
    "LONE_DESIGN",
    "LONE_REPS",
    "RAKED_DESIGN",
    "RAKED_REPS",
    "RARE_DESIGN",
    "RARE_REPS",
    "SEASON_DESIGN",
    "SEASON_REPS",
    "TIERS",
    "Design",
    "Rate",
    "run",
]

RATING = np.array([0.10, 0.15, 0.25, 0.30, 0.20])     # category shares of the 1-5 rating
TRUTH = {"p50": 0.5, "p30": 0.3, "p10": 0.1, "p03": 0.03,
         "rating_mean": float(RATING @ np.arange(1, 6)), "rating_balance": float(RATING[3:].sum() - RATING[:2].sum())}
PROFILE = np.array([0.6, 0.4, 0.3]) / 1.3  # level 'a' drawn twice as often as its population share ...
PROFILE_WEIGHT = np.array([0.5, 1.0, 1.0])  # ... and weighted down by half
LEVEL = 0.95


@dataclass(frozen=True)
class Design:
    """A sampling design: strata x clusters x respondents per cluster."""

    name: str
    strata: int
    clusters: int
    size: int
    sigma_b: float = 0.3     # SD of the cluster effect on the latent scale
    weight_sd: float = 0.5   # SD of log weights
    subgroup: float = 80 / 960  # chance of being in the thin subgroup

    @property
    def n(self) -> int:
        return self.strata * self.clusters * self.size

    def describe(self) -> str:
        return (f"{self.strata} strata x {self.clusters} clusters x {self.size} respondents = {self.n:,}; "
                f"cluster effect SD {self.sigma_b} (latent), log-weight SD {self.weight_sd}; "
                f"a subgroup of about {self.subgroup * self.n:.0f} respondents")


DESIGNS = (Design("stratified clustered", 10, 8, 12), Design("two clusters per stratum", 30, 2, 16))


@dataclass(frozen=True)
class Tier:
    pairs: int        # wave pairs per sharing scenario (coverage, size, Rao-Scott)
    power_pairs: int  # wave pairs per share and effect size
    fdr_reps: int     # replicates of the 80-test family


TIERS = {"full": Tier(1500, 600, 600), "quick": Tier(240, 120, 120), "test": Tier(120, 80, 60)}
TREND_REPS = {"full": 20000, "quick": 4000, "test": 1500}
TREND_DESIGN = "trend patterns"


@dataclass(frozen=True)
class Rate:
    """One measured rate beside its nominal value and target."""

    design: str
    what: str
    setting: str
    measured: float
    mc_se: float
    reps: int
    target: tuple[float, float] | None = None   # (low, high); None = reported only
    nominal: float | None = None

    @property
    def meets(self) -> bool | None:
        if self.target is None:
            return None
        return self.target[0] <= self.measured <= self.target[1]

    def within_mc(self, k: float = 3.0) -> bool:
        """Inside the target widened by k Monte Carlo standard errors (what a small run can show)."""
        if self.target is None:
            return True
        return self.target[0] - k * self.mc_se <= self.measured <= self.target[1] + k * self.mc_se


def _codebook(shares: list[str], rating: bool = True, profile: bool = True, declared: bool = True) -> Codebook:
    yes_no = "{type: category, codes: {0: no, 1: yes}}"
    # ids and cluster labels recur only where a scenario shares them: declared as such
    lines = ["title: calibration", "id: rid", "weight: w", "strata: st", "clusters: cl"]
    lines += ["panel: true", "waves_share_clusters: true"] if declared else []
    lines += ["variables:"]
    lines += [f"  {s}: {yes_no}" for s in shares]
    lines += ["  sub: {type: category, codes: {1: in, 2: out}}"]
    if rating:
        lines += ["  rating: {type: scale, codes: {1: a, 2: b, 3: c, 4: d, 5: e}}"]
    if profile:
        lines += ["  prof: {type: category, codes: {1: a, 2: b, 3: c}}"]
    lines += ["groups:", "  sub: {variable: sub, merge: {in: [1]}}"]
    if profile:
        lines += ["  prof: {variable: prof}"]
    lines += ["metrics:"] + [f"  {s}: {{variable: {s}, share: [1]}}" for s in shares]
    if rating:
        lines += ["  rating_mean: {variable: rating, mean: true}",
                  "  rating_balance: {variable: rating, balance: {plus: [4, 5], minus: [1, 2]}}"]
    if profile:
        lines += ["profile: [prof]"]
    return parse_codebook("\n".join(lines) + "\n")


@dataclass
class _Wave:
    table: pd.DataFrame
    latent: np.ndarray      # respondents x items (e), kept for respondents who come back
    effects: np.ndarray     # clusters x items (b)


def _draw(rng, d: Design, items: dict[str, float], tag: str, prev: _Wave | None = None, shared: float = 0.0,
          recurring: bool = False, reuse_labels: bool = False) -> _Wave:
    """One wave. ``items`` maps each share item to its true share; the rating is always drawn.
    ``recurring``: the earlier wave's clusters again (labels kept, effects correlated);
    ``reuse_labels``: new clusters under the earlier wave's labels (interview days, say)."""
    n_cl = d.strata * d.clusters
    k = len(items) + 1
    if prev is not None and recurring:
        effects = 0.8 * prev.effects + 0.6 * rng.normal(0, d.sigma_b, (n_cl, k))
    else:
        effects = rng.normal(0, d.sigma_b, (n_cl, k))
    cluster = np.repeat(np.arange(n_cl), d.size)
    n = cluster.size
    e = rng.normal(size=(n, k))
    back = np.zeros(n, bool)
    if prev is not None and shared > 0:
        back = np.tile(np.arange(d.size) < round(shared * d.size), n_cl)
        e[back] = 0.6 * prev.latent[back] + 0.8 * e[back]
    latent = effects[cluster] + e
    sd = np.sqrt(1 + d.sigma_b**2)
    cols = {name: (latent[:, j] < stats.norm.ppf(p) * sd).astype(int) for j, (name, p) in enumerate(items.items())}
    cuts = stats.norm.ppf(np.cumsum(RATING)[:-1]) * sd
    cols["rating"] = 1 + np.searchsorted(cuts, latent[:, -1])
    u = rng.normal(0, 0.4, (n_cl, 3))
    probs = PROFILE * np.exp(u)
    probs /= probs.sum(axis=1, keepdims=True)
    prof = (rng.random(n)[:, None] > np.cumsum(probs[cluster], axis=1)).sum(axis=1)
    sub = np.where(rng.random(n) < d.subgroup, 1, 2)
    w = np.exp(rng.normal(0, d.weight_sd, n))
    ids = np.array([f"{tag}{i}" for i in range(n)], dtype=object)
    if prev is not None and shared > 0:
        old = prev.table
        ids[back] = old["rid"].to_numpy()[back]
        prof[back] = old["prof"].to_numpy()[back] - 1
        sub[back] = old["sub"].to_numpy()[back]
        w[back] = old["w"].to_numpy()[back] / PROFILE_WEIGHT[prof[back]]
    label = "R" if recurring or reuse_labels or prev is None else tag
    table = pd.DataFrame({"rid": ids, "w": w * PROFILE_WEIGHT[prof], "st": cluster // d.clusters,
                          "cl": [f"{label}{c}" for c in cluster], "sub": sub, "prof": prof + 1, **cols})
    return _Wave(table, e, effects)


def _pair(rng, book, d, items1, items2, shared, recurring, metrics, groups, reuse_labels=False):
    first = _draw(rng, d, items1, "a")
    second = _draw(rng, d, items2, "b", first, shared, recurring, reuse_labels)
    a, b = first.table, second.table
    est_a = wave_estimates(book, a, metrics, groups, "A", "2025-01-15")
    est_b = wave_estimates(book, b, metrics, groups, "B", "2025-04-15")
    cov, shared_units, unit, per_cell = wave_covariance(book, b, a, metrics, groups, est_b, est_a)
    changes = compare(est_b, est_a, None, cov if shared_units else None, "none", LEVEL,
                      shared=per_cell if shared_units else None, source=unit)
    return a, b, est_a, est_b, changes


def _prop(x) -> tuple[float, float, int]:
    x = np.asarray(x, float)
    x = x[~np.isnan(x)]
    r = float(x.mean()) if x.size else np.nan
    return r, float(np.sqrt(r * (1 - r) / max(x.size, 1))), int(x.size)


SHARES = {"p50": 0.5, "p10": 0.1, "p03": 0.03}
MEASURES = ["p50", "p10", "p03", "rating_mean", "rating_balance"]
LABELS = {"p50": "share 0.5", "p10": "share 0.1", "p03": "share 0.03", "p30": "share 0.3",
          "rating_mean": "mean of a 1-5 rating", "rating_balance": "balance (4-5 minus 1-2)"}


def _coverage_and_size(rng, d: Design, tier: Tier, out: list[Rate], deffs: list[float]) -> None:
    book = _codebook(list(SHARES))
    metrics = list(book.metrics.values())
    groups = ["sub"]
    scen = {"independent waves": (0.0, False), "30% shared respondents, recurring clusters": (0.3, True),
            "70% shared respondents, recurring clusters": (0.7, True)}
    cover: dict[tuple[str, str, str], list[float]] = {
        (m, g, iv): [] for m in MEASURES for g in ("total", "sub") for iv in ("wilson", "korn-graubard")}
    cover_reliable: dict[str, list[float]] = {m: [] for m in MEASURES}
    rs_p = []
    for name, (shared, recurring) in scen.items():
        lists: list[dict[str, list[float]]] = [{m: [] for m in MEASURES} for _ in range(4)]
        reject, inside, change, se = lists
        for _ in range(tier.pairs):
            a, b, est_a, est_b, ch = _pair(rng, book, d, SHARES, SHARES, shared, recurring, metrics, groups)
            if not shared:
                for est, table in ((est_a, a), (est_b, b)):
                    _collect_coverage(book, est, table, metrics, groups, cover, cover_reliable, deffs)
                rs = compare_composition(book, a, b, "A", "B", ["prof"], "none", LEVEL)
                rs_p.append(float(rs.tests["p"].iloc[0]) <= 1 - LEVEL)
            tot = ch[ch["group"] == "total"].set_index("metric")
            for m in MEASURES:
                r = tot.loc[m]
                reject[m].append(float(r["p_raw"] <= 1 - LEVEL) if np.isfinite(r["p_raw"]) else np.nan)
                inside[m].append(float(r["change_low"] <= 0 <= r["change_high"]))
                change[m].append(r["change"])
                se[m].append(r["se"])
        for m in MEASURES:
            rate, mc, k = _prop(reject[m])
            out.append(Rate(d.name, "change-test size", f"{LABELS[m]}, total; {name}", rate, mc, k, (0.04, 0.06), 0.05))
            rate, mc, k = _prop(inside[m])
            out.append(Rate(d.name, "change-interval coverage", f"{LABELS[m]}, total; {name}", rate, mc, k,
                            (0.94, 0.96), 0.95))
            ratio = float(np.sqrt(np.mean(np.square(se[m]))) / np.std(change[m], ddof=1))
            # delta method: the ratio's relative MC error is about 1 / sqrt(2 (reps - 1))
            out.append(Rate(d.name, "SE of change / SD of change", f"{LABELS[m]}, total; {name}", ratio,
                            ratio / np.sqrt(2 * (len(se[m]) - 1)), len(se[m]), (0.95, 1.05), 1.0))
    for (m, g, iv), hits in cover.items():
        rate, mc, k = _prop(hits)
        target: tuple[float, float] | None
        if g == "total":
            target = (0.94, 0.96)
        else:
            target = (0.93, 1.0) if m != "p03" else None
        where = "total" if g == "total" else f"subgroup of about {d.subgroup * d.n:.0f}"
        interval = "" if m.startswith("rating") else f", {iv}"
        if m.startswith("rating") and iv != "wilson":
            continue
        out.append(Rate(d.name, "95% interval coverage", f"{LABELS[m]}, {where}{interval}", rate, mc, k, target, 0.95))
    for m, hits in cover_reliable.items():
        if m in SHARES:
            rate, mc, k = _prop(hits)
            out.append(Rate(d.name, "95% interval coverage, cells passing the reliability rule",
                            f"{LABELS[m]}, subgroup of about {d.subgroup * d.n:.0f}, wilson", rate, mc, k, None, 0.95))
    rate, mc, k = _prop(rs_p)
    out.append(Rate(d.name, "Rao-Scott size", "profile with an over-sampled level (weights correct it); "
                                               "independent waves", rate, mc, k, (0.04, 0.06), 0.05))


def _collect_coverage(book, est, table, metrics, groups, cover, cover_reliable, deffs):
    # the finished estimates keep their sufficient statistics: re-finish them, no second pass over rows
    kg = finish(est, {m.name: m.kind for m in metrics}, LEVEL, "korn-graubard")
    for frame, iv in ((est, "wilson"), (kg, "korn-graubard")):
        rows = frame[frame["subgroup"].isin(["Total", "in"])]
        for r in rows.itertuples():
            g = "total" if r.group == "total" else "sub"
            truth = TRUTH[r.metric]
            hit = float(r.ci_low <= truth <= r.ci_high) if np.isfinite(r.ci_low) else np.nan
            cover[(r.metric, g, iv)].append(hit)
            if iv == "wilson" and g == "sub" and r.reliable:
                cover_reliable[r.metric].append(hit)
            if iv == "wilson" and g == "total" and r.metric == "p50":
                deffs.append(r.design_effect)


def _power(rng, d: Design, tier: Tier, out: list[Rate]) -> None:
    shares = {"p03": 0.03, "p10": 0.1, "p30": 0.3, "p50": 0.5}
    book = _codebook(list(shares), rating=False, profile=False)
    metrics = list(book.metrics.values())
    # the detectable change the tool reports under no change (median over pairs)
    reported: dict[str, list[float]] = {m: [] for m in shares}
    for _ in range(max(40, tier.power_pairs // 3)):
        *_, ch = _pair(rng, book, d, shares, shares, 0.0, False, metrics, [])
        for r in ch.itertuples():
            reported[r.metric].append(r.min_detectable_change)
    for m, p in shares.items():
        mde = float(np.median(reported[m]))
        for times in (1, 2):
            moved = dict(shares)
            moved[m] = min(p + times * mde, 0.999)  # a rise: the larger of rise and fall for p <= 0.5
            hits = []
            for _ in range(tier.power_pairs):
                *_, ch = _pair(rng, book, d, shares, moved, 0.0, False, metrics, [])
                r = ch.set_index("metric").loc[m]
                # power of the test where the tool makes it: a cell the reliability rule refuses is
                # "not tested", never called a change (the share tested is in the setting)
                hits.append(float(r["p_raw"] <= 1 - LEVEL) if np.isfinite(r["p_raw"]) else np.nan)
            rate, mc, k = _prop(hits)
            what = "power at the reported detectable change" if times == 1 else "power at twice the detectable change"
            target = (0.75, 0.85) if times == 1 else None
            out.append(Rate(d.name, what, f"{LABELS[m]} rising by {times * mde * 100:.1f} points (unadjusted test; "
                                          f"{k / tier.power_pairs:.0%} of comparisons tested)",
                            rate, mc, k, target, 0.80 if times == 1 else None))


def _fdr(rng, d: Design, tier: Tier, out: list[Rate]) -> None:
    base = np.random.default_rng(99).uniform(0.2, 0.6, 80)
    names = [f"f{i:02d}" for i in range(80)]
    book = _codebook(names, rating=False, profile=False)
    metrics = list(book.metrics.values())
    real = set(names[:8])
    before = dict(zip(names, base))
    after = {k: v + (0.09 if k in real else 0.0) for k, v in before.items()}
    fdp, power = [], []
    for _ in range(tier.fdr_reps):
        *_, ch = _pair(rng, book, d, before, after, 0.0, False, metrics, [])
        sig = adjust_pvalues(ch["p_raw"].to_numpy(), "bh") <= 1 - LEVEL
        is_real = ch["metric"].isin(real).to_numpy()
        fdp.append((sig & ~is_real).sum() / max(sig.sum(), 1))
        power.append((sig & is_real).sum() / len(real))
    fdr = float(np.mean(fdp))
    mc = float(np.std(fdp, ddof=1) / np.sqrt(len(fdp)))
    out.append(Rate(d.name, "Benjamini-Hochberg false discovery rate", "80 tests of which 8 real (+9 points)",
                    fdr, mc, len(fdp), (0.0, 0.05 + 2 * mc), 0.05))
    out.append(Rate(d.name, "Benjamini-Hochberg power", "the 8 real changes of +9 points", float(np.mean(power)),
                    float(np.std(power, ddof=1) / np.sqrt(len(power))), len(power), None, None))


def _trend_patterns(rng, reps: int, out: list[Rate]) -> None:
    """The pattern classifier (tracker.trends.fit_trends), one series at a time: 14 quarterly
    waves, sampling SE 1.6 points, between-wave SD 1.5 points (the setting of issue 10)."""
    from .trends import fit_trends

    K, se, tau = 14, 0.016, 0.015
    dates = [f"{2020 + q // 4}-{3 * (q % 4) + 2:02d}-15" for q in range(K)]
    years = np.arange(K) / 4
    scenarios = {
        "no change": (np.zeros(K), None),
        "an 8-point one-wave blip at wave 7 (5 single-wave SEs)": (np.where(np.arange(K) == 6, 0.08, 0.0), None),
        "a 6-point step down at wave 8": (np.where(np.arange(K) >= 7, -0.06, 0.0), None),
        "a slope of 3 points a year": (0.03 * years, 0.03),
    }
    limits: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    false_calls = 0.05
    for name, (signal, slope) in scenarios.items():
        # every replicate is its own series of one call; with no adjustment across series
        # this is the same as one call per series, only vectorised
        y = 0.6 + signal[None, :] + rng.normal(0, tau, (reps, K)) + rng.normal(0, se, (reps, K))
        est = pd.DataFrame({"metric": np.repeat([f"m{i}" for i in range(reps)], K), "metric_label": "m",
                            "kind": "share", "group": "total", "subgroup": "Total",
                            "wave": np.tile([f"W{i:02d}" for i in range(K)], reps),
                            "fieldwork_date": np.tile(dates, reps), "value": y.ravel(), "se": se,
                            "reliable": True})
        rows = fit_trends(est, adjust="none")
        limits[name] = _blip_limits(y, se, tau)
        calls = rows["pattern"].astype(str).tolist()
        covered = ((rows["slope_low"] <= slope) & (rows["slope_high"] >= slope)).astype(float).tolist() \
            if slope is not None else []
        calls = np.array(calls)
        moving = ~np.isin(calls, ["no pattern found", "flat", "too few waves"])
        if not signal.any():
            false_calls, mc, k = _prop(moving)
            out.append(Rate(TREND_DESIGN, "false pattern calls", name, false_calls, mc, k, (0.0, 0.05), 0.05))
        elif "blip" in name:
            rate, mc, k = _prop(calls == "one-wave blip")
            out.append(Rate(TREND_DESIGN, "called a one-wave blip", name, rate, mc, k, (0.50, 1.0)))
            # the same blips found by a blip test alone that spends every false call of the
            # classifier (its threshold the null series' quantile): with the tool's estimate of
            # the wave-to-wave variation, and knowing it (the limit)
            for i, who in enumerate(["the blip test alone, all the false calls", "knowing the noise (the limit)"]):
                cut = np.quantile(limits["no change"][i], 1 - false_calls)
                rate, mc, k = _prop(limits[name][i] > cut)
                out.append(Rate(TREND_DESIGN, f"an 8-point blip found by {who}", name, rate, mc, k))
        elif "step" in name:
            rate, mc, k = _prop(np.char.startswith(calls.astype(str), "shifted"))
            out.append(Rate(TREND_DESIGN, "called a step", name, rate, mc, k, (0.75, 1.0)))
            rate, mc, k = _prop(np.isin(calls, ["rising", "falling"]))
            out.append(Rate(TREND_DESIGN, "called a trend", name, rate, mc, k, (0.0, 0.10)))
        else:
            rate, mc, k = _prop(np.isin(calls, ["rising", "falling"]))
            out.append(Rate(TREND_DESIGN, "called a trend", name, rate, mc, k, (0.80, 1.0)))
            rate, mc, k = _prop(np.char.startswith(calls.astype(str), "shifted"))
            out.append(Rate(TREND_DESIGN, "called a step", name, rate, mc, k, (0.0, 0.10)))
            rate, mc, k = _prop(covered)
            out.append(Rate(TREND_DESIGN, "95% slope interval coverage", name, rate, mc, k, (0.94, 0.96), 0.95))


def _blip_limits(y: np.ndarray, se: float, tau: float) -> tuple[np.ndarray, np.ndarray]:
    """Two blip statistics per series (largest over the classifier's blip candidates): the
    tool's own blip test alone (1 - its p, so larger is stronger), and the blip's z with the
    sampling and wave-to-wave variances known: (y_j - mean of the others) / its SD."""
    from .trends import _candidates, _pattern_tests

    S, K = y.shape
    v = np.full((S, K), se**2)
    ok = np.ones((S, K), bool)
    years = np.arange(K) / 4.0
    X = np.stack([np.ones((S, K)), np.broadcast_to(years - years.mean(), (S, K))], axis=2)
    tool = 1 - _pattern_tests(y, v, ok, X)["blip_p"]
    _cols, valid, at = _candidates(ok, X)["blip"]
    others = (y.sum(axis=1, keepdims=True) - y) / (K - 1)
    z = np.abs(y - others) / np.sqrt((se**2 + tau**2) * (1 + 1 / (K - 1)))
    return tool, z[:, at[valid[0]]].max(axis=1)


FORECAST_DESIGN = "next wave, surprises and smoothing"
FORECAST_REPS = {"full": 20000, "quick": 4000, "test": 1500}   # series per setting
FAMILY = 100  # cells judged together at intake (one wave's family of surprises)


def _history(rng, reps: int, K: int, se: float, tau: float, rho: float = 0.0, slope: float = 0.0):
    """reps series of K + 1 quarterly waves: level 0.6 (plus a slope per year), between-wave
    deviations N(0, tau^2) (AR(1) with ``rho`` for the misspecified setting) and sampling error."""
    u = rng.normal(0, tau, (reps, K + 1))
    if rho:
        for t in range(1, K + 1):  # AR(1) deviations with the same marginal SD
            u[:, t] = rho * u[:, t - 1] + np.sqrt(1 - rho**2) * u[:, t]
    years = np.arange(K + 1) / 4
    return 0.6 + slope * years[None, :] + u + rng.normal(0, se, (reps, K + 1))


def _rows(y: np.ndarray, se: float) -> pd.DataFrame:
    reps, K = y.shape
    dates = [f"{2010 + q // 4}-{3 * (q % 4) + 2:02d}-15" for q in range(K)]
    return pd.DataFrame({"metric": np.repeat([f"m{i}" for i in range(reps)], K), "metric_label": "m",
                         "kind": "share", "group": "total", "subgroup": "Total",
                         "wave": np.tile([f"W{i:02d}" for i in range(K)], reps),
                         "fieldwork_date": np.tile(dates, reps), "value": y.ravel(), "se": se, "reliable": True,
                         "base": 1000, "effective_base": 900.0})


def _judge(y: np.ndarray, se: float, adjust: str = "bh"):
    """The tool's prediction of each series' last wave from the waves before it, and the
    surprise table of that wave (one family per call)."""
    from .expected import predict, surprise_table
    from .trends import fit_trends

    hist = _rows(y[:, :-1], se)
    pats = fit_trends(hist, adjust="bh")
    K = y.shape[1]
    date = f"{2010 + (K - 1) // 4}-{3 * ((K - 1) % 4) + 2:02d}-15"
    pred = predict(hist, pats, date)
    new = _rows(y[:, -1:], se).assign(wave="NEW", fieldwork_date=date)
    return pred, surprise_table(pred, new, adjust)


def _forecasts(rng, reps: int, out: list[Rate]) -> None:
    """Expected ranges, surprises and smoothing through tracker.expected and tracker.methods.statespace:
    14 quarterly waves before the predicted one, sampling SE 1.6 points, between-wave SD 1.5
    points (the trend setting)."""
    from .methods.statespace import smooth_over_q

    K, se, tau = 14, 0.016, 0.015
    for name, kw in [("level, as the model assumes", {}),
                     ("a slope of 3 points a year", {"slope": 0.03}),
                     ("misspecified: deviations AR(1) with rho 0.4", {"rho": 0.4})]:
        y = _history(rng, reps, K, se, tau, **kw)
        pred, _ = _judge(y, se)
        inside = (pred["low"].to_numpy() <= y[:, -1]) & (y[:, -1] <= pred["high"].to_numpy())
        rate, mc, k = _prop(inside[pred["expected"].notna().to_numpy()])
        out.append(Rate(FORECAST_DESIGN, "95% expected-range coverage of the next wave", name, rate, mc, k,
                        (0.93, 0.97), 0.95))
    families = max(reps // FAMILY, 20)
    any_false: list[float] = []
    found: list[float] = []
    found_se: list[float] = []
    # the SE of a surprise test is the prediction's SD: sampling, wave-to-wave variation and the fit
    pred_sd = np.sqrt(se**2 + tau**2 + (se**2 + tau**2) / K)
    for f in range(families):  # families of 100 cells, one wave each: a loop over families
        y = _history(rng, FAMILY, K, se, tau)
        _, table = _judge(y, se)
        any_false.append(bool(table["surprise"].any()))
        for shift, into in ((5 * pred_sd, found), (5 * se, found_se)):
            y = _history(rng, FAMILY, K, se, tau)
            y[:10, -1] += shift  # ten planted one-wave moves
            _, table = _judge(y, se)
            into.extend(table["surprise"].to_numpy()[:10].tolist())
    rate, mc, k = _prop(np.array(any_false))
    out.append(Rate(FORECAST_DESIGN, "surprise false discovery rate", f"no change, families of {FAMILY} cells",
                    rate, mc, k, (0.0, 0.05), 0.05))
    rate, mc, k = _prop(np.array(found))
    out.append(Rate(FORECAST_DESIGN, "surprise power", f"10 of {FAMILY} cells move 5 prediction SDs "
                    f"({5 * pred_sd * 100:.1f} points) in one wave", rate, mc, k, (0.70, 1.0)))
    rate, mc, k = _prop(np.array(found_se))
    out.append(Rate(FORECAST_DESIGN, "surprise power", f"10 of {FAMILY} cells move 5 sampling SEs "
                    f"({5 * se * 100:.1f} points) in one wave", rate, mc, k))
    # a thin subgroup: 150 respondents, a share near 0.6 (SE 4 points); the truth a slow random walk
    n = 150
    for walk, promised in ((0.01, True), (0.02, False)):  # slow (the promise) and twice as fast (reported)
        truth = 0.6 + np.cumsum(rng.normal(0, walk, (reps, K)), axis=1)
        v = truth * (1 - truth) / n
        direct = truth + rng.normal(0, 1, (reps, K)) * np.sqrt(v)
        fit = smooth_over_q(direct, v, np.ones((reps, K), bool))
        err, base = (fit["mean"] - truth) ** 2, (direct - truth) ** 2
        ratio = float(err.mean() / base.mean())
        # MC SE of a ratio of means by the delta method over series
        a, b = err.mean(axis=1), base.mean(axis=1)
        mc = float(np.std(a - ratio * b) / (b.mean() * np.sqrt(reps)))
        setting = f"subgroup of {n}, truth a random walk of {walk * 100:.0f} point(s) a wave"
        out.append(Rate(FORECAST_DESIGN, "smoothed MSE / direct MSE", setting, ratio, mc, reps,
                        (0.0, 0.70) if promised else None))
        half = 1.959963984540054 * np.sqrt(fit["var"])
        rate, mc, k = _prop((np.abs(fit["mean"] - truth) <= half).ravel())
        out.append(Rate(FORECAST_DESIGN, "95% smoothed-interval coverage", setting + ", every wave", rate, mc,
                        reps * K, (0.93, 0.97) if promised else None, 0.95))


@dataclass
class Report:
    rates: list[Rate]
    tier: str
    seed: int
    seconds: float
    deff: dict[str, tuple[float, float, float]] = field(default_factory=dict)  # design -> (min, median, max)


FEW_DESIGN = "few clusters: recurring or reused labels"
FEW_REPS = {"full": 2000, "quick": 400, "test": 150}


def _few_clusters(rng, reps: int, out: list[Rate]) -> None:
    """Change-test size and interval coverage with 5 strata of 2 clusters: clusters that
    recur (declared, so the paired design's df), and new clusters under reused labels
    (undeclared, so independent; and wrongly declared, reported), with 5 clusters per
    stratum for the wrong declaration too."""
    books = {True: _codebook(list(SHARES)), False: _codebook(list(SHARES), declared=False)}
    scenarios = [  # (name, design, recurring, reuse labels, declared, target)
        ("recurring clusters, declared", Design("5 x 2", 5, 2, 30), True, False, True, True),
        ("new clusters under reused labels, not declared", Design("5 x 2", 5, 2, 30), False, True, False, True),
        ("new clusters under reused labels, wrongly declared", Design("5 x 2", 5, 2, 30), False, True, True, False),
        ("5 clusters per stratum, new clusters under reused labels, wrongly declared", Design("5 x 5", 5, 5, 12),
         False, True, True, False),
    ]
    for name, d, recurring, reuse, declared, promised in scenarios:
        book = books[declared]
        metrics = list(book.metrics.values())
        reject: dict[str, list[float]] = {m: [] for m in ("p50", "rating_mean")}
        inside: dict[str, list[float]] = {m: [] for m in reject}
        for _ in range(reps):
            *_, ch = _pair(rng, book, d, SHARES, SHARES, 0.0, recurring, metrics, [], reuse_labels=reuse)
            tot = ch[ch["group"] == "total"].set_index("metric")
            for m, rejected in reject.items():
                r = tot.loc[m]
                rejected.append(float(r["p_raw"] <= 1 - LEVEL) if np.isfinite(r["p_raw"]) else np.nan)
                inside[m].append(float(r["change_low"] <= 0 <= r["change_high"]))
        setting = f"{d.strata} strata x {d.clusters} clusters x {d.size}; {name}"
        for m, rejected in reject.items():
            x = np.asarray(rejected)
            # every cell has 5 df here, and the reliability rule refuses a share whose interval is
            # 30 points wide: mostly those whose variance came out large, so the tested ones lean to
            # small variances. The promise is the reader's: no-change comparisons called a move,
            # a refused comparison never being one; the size among tested ones is reported.
            rate, mc, k = _prop(np.nan_to_num(x, nan=0.0))
            out.append(Rate(FEW_DESIGN, "false calls per comparison", f"{LABELS[m]}, total; {setting}", rate, mc, k,
                            (0.04, 0.06) if promised else None, 0.05))
            rate, mc, k = _prop(x)
            out.append(Rate(FEW_DESIGN, "change-test size among tested comparisons", f"{LABELS[m]}, total; "
                            f"{setting}", rate, mc, k, None, 0.05))
            rate, mc, k = _prop(np.isfinite(x).astype(float))
            out.append(Rate(FEW_DESIGN, "comparisons tested", f"{LABELS[m]}, total; {setting}", rate, mc, k, None,
                            None))
            rate, mc, k = _prop(inside[m])
            out.append(Rate(FEW_DESIGN, "change-interval coverage", f"{LABELS[m]}, total; {setting}", rate, mc, k,
                            (0.94, 0.96) if promised else None, 0.95))


LONE_DESIGN = "one-cluster strata"
LONE_REPS = {"full": 2000, "quick": 400, "test": 150}


def _lone_wave(rng, tag: str) -> pd.DataFrame:
    """12 strata with their own effects (SD 0.3 on the latent scale): 6 hold 2 clusters and 6
    hold one (the lone cluster is a draw from its stratum, not a certainty), 40 respondents a
    cluster, cluster effects SD 0.3, lognormal weights (SD 0.3)."""
    stratum_effect = np.linspace(-0.45, 0.45, 12)  # fixed: the strata are the same in every wave
    per = np.array([2] * 6 + [1] * 6)
    st = np.repeat(np.arange(12), per)
    cl_effect = stratum_effect[st] + rng.normal(0, 0.3, st.size)
    cl = np.repeat(np.arange(st.size), 40)
    latent = cl_effect[cl] + rng.normal(size=cl.size)
    sd = np.sqrt(1 + 0.3**2 + 0.3**2)
    cuts = stats.norm.ppf(np.cumsum(RATING)[:-1]) * sd
    return pd.DataFrame({"rid": [f"{tag}{i}" for i in range(cl.size)], "w": np.exp(rng.normal(0, 0.3, cl.size)),
                         "st": st[cl], "cl": [f"{tag}{c}" for c in cl],
                         "p50": (latent < 0).astype(int), "rating": 1 + np.searchsorted(cuts, latent)})


def _lone_clusters(rng, reps: int, out: list[Rate]) -> None:
    """Change-test size between independent waves with 6 of 12 strata holding one cluster,
    under each rule for such strata (docs/methods.md: which rule is safe when)."""
    books = {}
    for rule in ("centre", "average", "certainty"):
        books[rule] = parse_codebook("\n".join([
            "title: lone", "id: rid", "weight: w", "strata: st", "clusters: cl", f"single_cluster_strata: {rule}",
            "variables:", "  p50: {type: category, codes: {0: no, 1: yes}}",
            "  rating: {type: scale, codes: {1: a, 2: b, 3: c, 4: d, 5: e}}",
            "metrics:", "  p50: {variable: p50, share: [1]}", "  rating_mean: {variable: rating, mean: true}"]) + "\n")
    reject: dict[tuple[str, str], list[float]] = {(r, m): [] for r in books for m in ("p50", "rating_mean")}
    for _ in range(reps):
        a, b = _lone_wave(rng, "a"), _lone_wave(rng, "b")
        for rule, book in books.items():
            metrics = list(book.metrics.values())
            est_a = wave_estimates(book, a, metrics, [], "A", "2025-01-15", LEVEL)
            est_b = wave_estimates(book, b, metrics, [], "B", "2025-04-15", LEVEL)
            ch = compare(est_b, est_a, None, None, "none", LEVEL).set_index("metric")
            for m in ("p50", "rating_mean"):
                p = ch.loc[m, "p_raw"]
                reject[(rule, m)].append(float(p <= 1 - LEVEL) if np.isfinite(p) else np.nan)
    for (rule, m), hits in reject.items():
        rate, mc, k = _prop(hits)
        out.append(Rate(LONE_DESIGN, "change-test size", f"{LABELS[m]}, total; rule {rule}", rate, mc, k,
                        (0.0, 0.06) if rule == "centre" else None, 0.05))  # centre: never above 6 %


RAKED_DESIGN = "raked weights"
RAKED_REPS = {"full": 2000, "quick": 400, "test": 150}
#: Population margins of the raked design: a region of 3 levels and an age band of 2; each
#: region's share of 'yes' on the related item (a strong relation) and the unrelated item.
RAKED_REGION, RAKED_AGE = np.array([0.5, 0.3, 0.2]), np.array([0.6, 0.4])
RAKED_RELATED = np.array([0.2, 0.5, 0.8])


def _raked_codebook() -> Codebook:
    r, a = RAKED_REGION, RAKED_AGE
    return parse_codebook("\n".join([
        "title: raked", "id: rid", "weight: w", "variables:",
        "  region: {type: category, codes: {1: a, 2: b, 3: c}}", "  age: {type: category, codes: {1: young, 2: old}}",
        "  related: {type: category, codes: {0: no, 1: yes}}", "  unrelated: {type: category, codes: {0: no, 1: yes}}",
        "groups:", "  region: {variable: region}", "  age: {variable: age}",
        "metrics:", "  related: {variable: related, share: [1]}", "  unrelated: {variable: unrelated, share: [1]}",
        "  region_a: {variable: region, share: [1]}",
        "targets:", f"  region: {{a: {r[0]}, b: {r[1]}, c: {r[2]}}}", f"  age: {{young: {a[0]}, old: {a[1]}}}",
        "rake: {tolerance: 1.0e-10}"]) + "\n")


def _raked_items(rng, reps: int, out: list[Rate]) -> None:
    """Waves of 1,000 drawn with region a under-represented (drawn at half its share) and
    raked to the population margins: coverage and SE / SD of an item related to the margins
    (its share differs by region), one unrelated, and a raked margin itself."""
    from .estimates import BASE_WEIGHT
    from .weighting import rake_table

    book = _raked_codebook()
    metrics = list(book.metrics.values())
    truth = {"related": float(RAKED_REGION @ RAKED_RELATED), "unrelated": 0.3, "region_a": float(RAKED_REGION[0])}
    draw = RAKED_REGION * np.array([0.5, 1.25, 1.25])
    draw /= draw.sum()
    hits: dict[tuple[str, str], list[float]] = {(m, v): [] for m in truth for v in ("calibrated", "fixed")}
    values: dict[str, list[float]] = {m: [] for m in truth}
    ses: dict[tuple[str, str], list[float]] = {(m, v): [] for m in truth for v in ("calibrated", "fixed")}
    for _ in range(reps):
        region = rng.choice(3, 1000, p=draw)
        age = rng.choice(2, 1000, p=RAKED_AGE)
        table = pd.DataFrame({"rid": np.arange(1000).astype(str), "w": (RAKED_REGION / draw)[region],
                              "region": region + 1.0, "age": age + 1.0,
                              "related": (rng.random(1000) < RAKED_RELATED[region]).astype(float),
                              "unrelated": (rng.random(1000) < 0.3).astype(float)})
        raked, _ = rake_table(book, table)
        for how, frame in (("calibrated", raked), ("fixed", raked.drop(columns=[BASE_WEIGHT]))):
            est = wave_estimates(book, frame, metrics, [], "A", "2025-01-15", LEVEL).set_index("metric")
            for m, t in truth.items():
                r = est.loc[m]
                hits[(m, how)].append(float(r["ci_low"] <= t <= r["ci_high"]) if m != "region_a"
                                      else float(abs(r["value"] - t) < 1e-6))
                ses[(m, how)].append(r["se"])
                if how == "calibrated":
                    values[m].append(r["value"])
    labels = {"related": "an item related to the margins (0.2 / 0.5 / 0.8 by region)",
              "unrelated": "an item unrelated to them (0.3)", "region_a": "a raked margin (region a, 0.5)"}
    for m in ("related", "unrelated"):
        sd = float(np.std(values[m], ddof=1))
        for how in ("calibrated", "fixed"):
            rate, mc, k = _prop(hits[(m, how)])
            promised = how == "calibrated"
            out.append(Rate(RAKED_DESIGN, "95% interval coverage", f"{labels[m]}, weights taken as {how}", rate, mc, k,
                            (0.94, 0.96) if promised else None, 0.95))
            ratio = float(np.sqrt(np.mean(np.square(ses[(m, how)]))) / sd)
            out.append(Rate(RAKED_DESIGN, "SE / SD of the estimate", f"{labels[m]}, weights taken as {how}", ratio,
                            ratio / np.sqrt(2 * (k - 1)), k, (0.95, 1.05) if promised else None, 1.0))
    rate, mc, k = _prop([float(s < 1e-9) for s in ses[("region_a", "calibrated")]])
    out.append(Rate(RAKED_DESIGN, "share of waves whose raked margin has SE 0", labels["region_a"], rate, mc, k,
                    (1.0, 1.0), 1.0))


RARE_DESIGN = "rare shares, informative weights"
RARE_REPS = {"full": 3000, "quick": 600, "test": 200}
#: The rare-share wave: 1,500 respondents, lognormal weights with Kish efficiency exp(-s^2)
#: = 0.42, a true share of 0.05 whose chance rises with the weight (informative weights),
#: and four subgroups of 10, 15, 25 and 50 % of the sample (effective bases about 60-320).
RARE_N, RARE_SD, RARE_TRUE, RARE_SUBS = 1500, 0.93, 0.05, np.array([0.10, 0.15, 0.25, 0.50])


def _rare_codebook() -> Codebook:
    return parse_codebook(
        "title: rare shares\nid: rid\nweight: w\nvariables:\n"
        "  rare: {type: category, codes: {0: no, 1: yes}}\n"
        "  sub: {type: category, codes: {1: a, 2: b, 3: c, 4: d}}\n"
        "groups:\n  sub: {variable: sub}\nmetrics:\n  rare: {variable: rare, share: [1]}\n")


def _rare_shares(rng, reps: int, out: list[Rate]) -> None:
    """Coverage of a rare share (0.05) with informative weights, in total and in thin
    subgroups, for both intervals and for the cells the reliability rule passes."""
    book = _rare_codebook()
    metrics, groups = list(book.metrics.values()), ["sub"]
    # P(yes | w) = c w^0.5, c set so that the population (weighted) share is RARE_TRUE:
    # E[w p] / E[w] = c E[w^1.5] / E[w], with log w ~ N(0, s^2)
    c = RARE_TRUE * np.exp(RARE_SD**2 / 2) / np.exp(1.5**2 * RARE_SD**2 / 2)
    hits: dict[tuple[str, str, str], list[float]] = {}
    effective: dict[str, list[float]] = {}
    for _ in range(reps):
        w = np.exp(rng.normal(0.0, RARE_SD, RARE_N))
        yes = rng.random(RARE_N) < np.minimum(c * np.sqrt(w), 1.0)
        table = pd.DataFrame({"rid": np.arange(RARE_N).astype(str), "w": w, "rare": yes.astype(float),
                              "sub": rng.choice(4, RARE_N, p=RARE_SUBS) + 1.0})
        est = wave_estimates(book, table, metrics, groups, "A", "2025-01-15", LEVEL)
        kg = finish(est, {m.name: m.kind for m in metrics}, LEVEL, "korn-graubard")
        for frame, iv in ((est, "wilson"), (kg, "korn-graubard")):
            inside = ((frame["ci_low"] <= RARE_TRUE) & (RARE_TRUE <= frame["ci_high"])).to_numpy(float)
            for where, hit, ok, neff in zip(frame["subgroup"], inside, frame["reliable"], frame["effective_base"]):
                hits.setdefault((where, iv, "all"), []).append(hit)
                if ok:
                    hits.setdefault((where, iv, "reliable"), []).append(hit)
                if iv == "wilson":
                    effective.setdefault(where, []).append(neff)
    for (where, iv, which), h in sorted(hits.items()):
        rate, mc, k = _prop(h)
        size = f"effective base about {np.median(effective[where]):.0f}"
        if which == "all":
            out.append(Rate(RARE_DESIGN, "95% interval coverage", f"share 0.05, {where} ({size}), {iv}", rate, mc, k,
                            (0.93, 1.0), 0.95))
        else:
            share = len(h) / len(hits[(where, iv, "all")])
            out.append(Rate(RARE_DESIGN, "95% interval coverage, cells passing the reliability rule",
                            f"share 0.05, {where} ({size}), {iv}; {share:.0%} of cells pass", rate, mc, k,
                            (0.92, 1.0) if share >= 0.2 and k >= 30 else None, 0.95))


DRIVER_DESIGN = "drivers: relative weights"
DRIVER_REPS = {"full": 4000, "quick": 1000, "test": 200}
#: the population of the driver setting: three attributes of unit variance correlated 0.5
#: within clusters, a cluster effect of variance 0.3 on each, the headline b'x + a cluster
#: effect (variance 0.2) + noise (variance 1); 10 strata x 6 clusters x 30 respondents
DRIVER_B = np.array([0.5, 0.3, 0.1])
DRIVER_WITHIN = 0.5 * np.eye(3) + 0.5
DRIVER_CLUSTER, DRIVER_U, DRIVER_E = 0.3, 0.2, 1.0
DRIVER_H, DRIVER_C, DRIVER_M = 10, 6, 30


def driver_truth() -> tuple[np.ndarray, float]:
    """The population's relative weights and R^2 in the driver setting (from its covariance)."""
    from .drivers import relative_weights

    vx = DRIVER_CLUSTER * np.eye(3) + DRIVER_WITHIN
    cxy = vx @ DRIVER_B
    vy = DRIVER_B @ vx @ DRIVER_B + DRIVER_U + DRIVER_E
    cov = np.block([[vx, cxy[:, None]], [cxy[None, :], np.array([[vy]])]])
    sd = np.sqrt(np.diag(cov))
    raw, r2 = relative_weights(cov / np.outer(sd, sd))
    return raw, float(r2)


def _driver_importance(rng, reps: int, out: list[Rate]) -> None:
    """Coverage of the jackknife intervals of Johnson's relative weights and of R^2 in a
    stratified cluster sample with lognormal weights (independent of the answers)."""
    from .drivers import importance_estimates
    from .methods.intervals import critical

    truth, r2_true = driver_truth()
    n_c = DRIVER_H * DRIVER_C
    n = n_c * DRIVER_M
    cluster = np.repeat(np.arange(n_c), DRIVER_M)
    strata = cluster // DRIVER_C
    chol = np.linalg.cholesky(DRIVER_WITHIN)
    hits: list[list[float]] = [[] for _ in range(4)]
    for _ in range(reps):
        x = (rng.normal(0, np.sqrt(DRIVER_CLUSTER), (n_c, 3))[cluster] + rng.normal(size=(n, 3)) @ chol.T)
        y = x @ DRIVER_B + rng.normal(0, np.sqrt(DRIVER_U), n_c)[cluster] + rng.normal(0, np.sqrt(DRIVER_E), n)
        w = np.exp(rng.normal(0, 0.4, n))
        est = importance_estimates(np.column_stack([y, x]), w, strata, cluster)
        t = critical(LEVEL, est.df)
        se = np.sqrt(est.raw_var)
        for j in range(3):
            hits[j].append(float(abs(est.raw[j] - truth[j]) <= t * se[j]))
        hits[3].append(float(abs(est.r2 - r2_true) <= t * np.sqrt(est.r2_var)))
    names = [f"attribute {j + 1} (true raw weight {truth[j]:.3f})" for j in range(3)] + [f"R^2 (true {r2_true:.3f})"]
    for name, h in zip(names, hits):
        rate, mc, k = _prop(h)
        out.append(Rate(DRIVER_DESIGN, "95% interval coverage", f"{name}, jackknife over {n_c} clusters", rate, mc,
                        k, (0.93, 0.97), 0.95))


BRIDGE_DESIGN = "bridged wording breaks"
BRIDGE_REPS = {"full": 20000, "quick": 4000, "test": 1000}


def _bridges(rng, reps: int, out: list[Rate]) -> None:
    """Coverage of the interval of a wording break's jump (tracker.bridging): series of 14
    quarterly waves, a break at the 7th, sampling SE 1.6 points, wave-to-wave SD 1 point, a
    jump of 8 points, flat or rising 2 points a year."""
    from .bridging import break_jumps

    k, at, jump, se, tau = 14, 6, 0.08, 0.016, 0.01
    waves = [f"W{i:02d}" for i in range(k)]
    dates = [(dt.date(2020, 1, 15) + dt.timedelta(days=91 * i)).isoformat() for i in range(k)]
    for slope, name in ((0.0, "flat"), (0.02, "rising 2 points a year")):
        t = np.arange(k) / 4
        y = 0.5 + slope * t + jump * (np.arange(k) >= at) + rng.normal(0, tau, (reps, k)) + rng.normal(0, se, (reps, k))
        est = pd.DataFrame({"metric": "m", "group": "total", "subgroup": np.repeat(np.arange(reps).astype(str), k),
                            "wave": np.tile(waves, reps), "fieldwork_date": np.tile(dates, reps),
                            "value": y.ravel(), "se": se, "reliable": True})
        j = break_jumps(est, {"m": waves[at]})
        hit = ((j["jump_low"] <= jump) & (jump <= j["jump_high"])).to_numpy(float)
        rate, mc, n = _prop(hit)
        out.append(Rate(BRIDGE_DESIGN, "95% interval coverage of the jump", f"jump 8 points, series {name}", rate,
                        mc, n, (0.94, 0.98), 0.95))


SEASON_DESIGN = "seasonal series"
SEASON_REPS = {"full": 4000, "quick": 1000, "test": 200}


def _monthly_rows(y: np.ndarray, month0: int, se: float) -> pd.DataFrame:
    reps, k = y.shape
    dates = [f"{2010 + (month0 + i) // 12}-{(month0 + i) % 12 + 1:02d}-15" for i in range(k)]
    return pd.DataFrame({"metric": np.repeat([f"m{i}" for i in range(reps)], k), "metric_label": "m", "kind": "share",
                         "group": "total", "subgroup": "Total", "wave": np.tile([f"W{i:02d}" for i in range(k)], reps),
                         "fieldwork_date": np.tile(dates, reps), "value": y.ravel(), "se": se, "reliable": True,
                         "base": 1000, "effective_base": 900.0})


def _seasons(rng, reps: int, out: list[Rate]) -> None:
    """Coverage of the next wave's expected range for monthly series of 24 waves with a
    12-month cycle of amplitude 3 points (sampling SE 1.6 points, wave-to-wave SD 1.5), the
    next wave at a seasonal peak, trough or the seasonal mean, with and without the codebook's
    seasons: 12; and a series without seasons under the key (its cost: a wider range)."""
    from .expected import predict
    from .trends import fit_trends

    K, se, tau = 24, 0.016, 0.015
    for amp, where, month in ((0.03, "peak", 3), (0.03, "trough", 9), (0.03, "seasonal mean", 0),
                              (0.0, "no seasons", 3)):
        month0 = (month - K) % 12
        months = (month0 + np.arange(K + 1)) % 12
        y = (0.6 + amp * np.sin(2 * np.pi * months / 12)[None] + rng.normal(0, tau, (reps, K + 1))
             + rng.normal(0, se, (reps, K + 1)))
        hist = _monthly_rows(y[:, :-1], month0, se)
        date = f"{2010 + (month0 + K) // 12}-{(month0 + K) % 12 + 1:02d}-15"
        for cycle in (12, None):
            pats = fit_trends(hist, adjust="none", cycle=cycle)
            if where in ("peak", "no seasons"):  # the patterns see the same kind of history in every setting
                moving = ~pats["pattern"].isin(["no pattern found", "flat", "too few waves"]).to_numpy()
                rate, mc, n = _prop(moving)
                setting = (f"{'amplitude 3 points' if amp else 'a series without seasons'}, nothing else moves; "
                           f"{'seasons: 12' if cycle else 'no seasons key'}")
                out.append(Rate(SEASON_DESIGN, "false pattern calls", setting, rate, mc, n,
                                (0.0, 0.05) if cycle or not amp else None, 0.05))
            pred = predict(hist, pats, date, cycle=cycle)
            ok = pred["expected"].notna().to_numpy()
            inside = (pred["low"].to_numpy() <= y[:, -1]) & (y[:, -1] <= pred["high"].to_numpy())
            rate, mc, n = _prop(inside[ok])
            sd = float(np.median(pred["prediction_sd"])) * 100
            setting = (f"{'amplitude 3 points' if amp else 'a series without seasons'}, next wave at "
                       f"{where if amp else 'any month'}; {'seasons: 12' if cycle else 'no seasons key'} "
                       f"(median prediction SD {sd:.1f} points)")
            promised = cycle is not None or not amp
            out.append(Rate(SEASON_DESIGN, "95% expected-range coverage of the next wave", setting, rate, mc, n,
                            (0.94, 0.96) if promised else None, 0.95))
    _season_power(rng, reps, out, K, se, tau)
    _season_smoothing(rng, reps, out, K)


def _season_smoothing(rng, reps: int, out: list[Rate], K: int) -> None:
    """The smoother on a thin subgroup (150 respondents, a share near 0.6) whose truth walks
    at random (1 point a wave), about a 12-month cycle of amplitude 3 points or with no
    seasons: coverage of every wave's true value and the smoothed/direct mean squared error,
    with and without seasons: 12 (tracker.smoothing)."""
    from .smoothing import smooth_estimates

    n = 150
    months = np.arange(K) % 12
    for amp in (0.03, 0.0):
        truth = (0.6 + amp * np.sin(2 * np.pi * months / 12)[None]
                 + np.cumsum(rng.normal(0, 0.01, (reps, K)), axis=1))
        se = np.sqrt(truth * (1 - truth) / n)
        direct = truth + rng.normal(0, 1, (reps, K)) * se
        est = _monthly_rows(direct, 0, 0.0).assign(se=se.ravel())
        for cycle in (12, None):
            fit = smooth_estimates(est, {}, 0.95, cycle)
            inside = ((fit["smoothed_low"] <= truth.ravel()) & (truth.ravel() <= fit["smoothed_high"])).to_numpy()
            setting = (f"subgroup of {n}, truth a random walk of 1 point a wave"
                       f"{' about a cycle of amplitude 3 points' if amp else ', no seasons'}, every wave; "
                       f"{'seasons: 12' if cycle else 'no seasons key'}")
            rate, mc, k = _prop(inside)
            out.append(Rate(SEASON_DESIGN, "95% smoothed-interval coverage", setting, rate, mc, k,
                            (0.93, 0.97) if cycle else None, 0.95))
            err = (fit["smoothed"].to_numpy().reshape(reps, K) - truth) ** 2
            base = (direct - truth) ** 2
            ratio = float(err.mean() / base.mean())
            a, b = err.mean(axis=1), base.mean(axis=1)
            mc = float(np.std(a - ratio * b) / (b.mean() * np.sqrt(reps)))  # delta method over series
            out.append(Rate(SEASON_DESIGN, "smoothed MSE / direct MSE", setting, ratio, mc, reps))


def _season_power(rng, reps: int, out: list[Rate], K: int, se: float, tau: float) -> None:
    """The key's cost for a series without seasons: how often a one-wave move of 5 sampling SEs
    in 10 of 100 cells is called a surprise, with and without seasons: 12 (reported)."""
    from .expected import predict, surprise_table
    from .trends import fit_trends

    found: dict[int | None, list[float]] = {12: [], None: []}
    for _ in range(max(reps // FAMILY, 10)):  # families of 100 cells: a loop over families
        y = 0.6 + rng.normal(0, tau, (FAMILY, K + 1)) + rng.normal(0, se, (FAMILY, K + 1))
        y[:10, -1] += 5 * se
        hist = _monthly_rows(y[:, :-1], 0, se)
        pats = fit_trends(hist)
        date = f"{2010 + K // 12}-{K % 12 + 1:02d}-15"
        new = _monthly_rows(y[:, -1:], K, se).assign(wave="NEW", fieldwork_date=date)
        for cycle, hits in found.items():
            table = surprise_table(predict(hist, pats, date, cycle=cycle), new, "bh")
            hits.extend(table["surprise"].to_numpy()[:10].tolist())
    moved = f"a series without seasons, 10 of {FAMILY} cells move 5 sampling SEs ({5 * se * 100:.0f} points)"
    for cycle, hits in found.items():
        rate, mc, n = _prop(np.array(hits, float))
        out.append(Rate(SEASON_DESIGN, "surprise power", f"{moved}; {'seasons: 12' if cycle else 'no seasons key'}",
                        rate, mc, n))
    # the same cells judged both ways: the loss and its Monte Carlo SE from the paired differences
    lost = np.array(found[None], float) - np.array(found[12], float)
    out.append(Rate(SEASON_DESIGN, "surprise power lost to seasons: 12", moved, float(lost.mean()),
                    float(lost.std(ddof=1) / np.sqrt(lost.size)), lost.size, (-1.0, 0.01)))


def _one_design(args) -> tuple[list[Rate], tuple[float, float, float]]:
    d, tier, seed, verbose = args
    t = TIERS[tier]
    rng = np.random.default_rng(seed)
    rates: list[Rate] = []
    deffs: list[float] = []
    for step in (_coverage_and_size, _power, _fdr):
        if verbose:
            print(f"{d.name}: {step.__name__.strip('_').replace('_', ' ')}", file=sys.stderr, flush=True)
        if step is _coverage_and_size:
            _coverage_and_size(rng, d, t, rates, deffs)
        else:
            step(rng, d, t, rates)  # type: ignore[call-arg]  # the other steps take no design effects
    return rates, (float(np.min(deffs)), float(np.median(deffs)), float(np.max(deffs)))


def run(tier: str = "quick", seed: int = 2026, designs: tuple[Design, ...] = DESIGNS, verbose: bool = False,
        workers: int = 2) -> Report:
    """Every rate of docs/validation.md for ``designs`` at one tier of replicates.

    Each design runs in its own process with its own seed (``SeedSequence(seed).spawn``),
    so the results do not depend on how many workers there are."""
    start = time.perf_counter()
    seeds = np.random.SeedSequence(seed).spawn(len(designs))
    jobs = [(d, tier, s, verbose) for d, s in zip(designs, seeds)]
    if workers > 1 and len(jobs) > 1:
        from concurrent.futures import ProcessPoolExecutor

        with ProcessPoolExecutor(max_workers=min(workers, len(jobs))) as pool:
            results = list(pool.map(_one_design, jobs))
    else:
        results = [_one_design(j) for j in jobs]
    rates = [r for part, _ in results for r in part]
    deff = {d.name: dd for d, (_, dd) in zip(designs, results)}
    if verbose:
        print(f"{TREND_DESIGN}", file=sys.stderr, flush=True)
    _trend_patterns(np.random.default_rng(np.random.SeedSequence(seed).spawn(len(designs) + 1)[-1]),
                    TREND_REPS[tier], rates)
    # the single-design settings, each on its own seed stream ([seed, tag])
    for name, step, reps, tag in ((FORECAST_DESIGN, _forecasts, FORECAST_REPS, 14),
                                  (RARE_DESIGN, _rare_shares, RARE_REPS, 21), (FEW_DESIGN, _few_clusters, FEW_REPS, 22),
                                  (RAKED_DESIGN, _raked_items, RAKED_REPS, 23),
                                  (LONE_DESIGN, _lone_clusters, LONE_REPS, 24),
                                  (DRIVER_DESIGN, _driver_importance, DRIVER_REPS, 25),
                                  (BRIDGE_DESIGN, _bridges, BRIDGE_REPS, 26),
                                  (SEASON_DESIGN, _seasons, SEASON_REPS, 27)):
        if verbose:
            print(name, file=sys.stderr, flush=True)
        step(np.random.default_rng(np.random.SeedSequence([seed, tag])), reps[tier], rates)
    return Report(rates, tier, seed, time.perf_counter() - start, deff)
