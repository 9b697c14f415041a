"""Measure the rates the tool promises by seeded simulation and write docs/validation.md.

    .venv/bin/python scripts/calibrate.py            # full run (about 10 minutes on 2 cores)
    .venv/bin/python scripts/calibrate.py --quick    # fewer replicates (about 2 minutes)

The simulation itself is tracker/calibration.py (the test suite runs a smaller tier of it).
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import sys
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # small products: one BLAS thread is fastest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

from tracker.calibration import (  # noqa: E402
    BRIDGE_DESIGN, BRIDGE_REPS, SEASON_DESIGN, SEASON_REPS, DESIGNS, DRIVER_DESIGN, DRIVER_REPS, FEW_DESIGN, FEW_REPS, FORECAST_DESIGN, FORECAST_REPS, LONE_DESIGN, LONE_REPS, RAKED_DESIGN, RAKED_REPS,
    RARE_DESIGN, RARE_REPS, TIERS, TREND_DESIGN, TREND_REPS, Report, run,
)


def _limits() -> str:
    """What one series of the trend setting can tell at best, computed (not simulated)."""
    from scipy import stats

    from tracker.trends import BUDGET

    K, noise = 14, np.hypot(1.6, 1.5)
    t, one = np.arange(K) / 4, np.ones(K)

    def distance(y, X):  # residual norm of y off the columns of X, in noise SDs
        return float(np.linalg.norm(y - X @ np.linalg.lstsq(X, y, rcond=None)[0]) / noise)

    step = -6.0 * (np.arange(K) >= 7)
    d_step = distance(step, np.column_stack([one, t]))
    d_line = min(distance(3.0 * t, np.column_stack([one, np.arange(K) >= j])) for j in range(2, K - 1))
    # a known between-wave SD: the blip's z against the Sidak bound over its 11 candidate waves
    z_blip = 8.0 / (noise * np.sqrt(1 + 1 / (K - 1)))
    crit = stats.norm.isf((1 - (1 - 0.05 * BUDGET["blip"]) ** (1 / 11)) / 2)
    power = stats.norm.sf(crit - z_blip)
    return (f"These hit rates have hard limits here. A 6-point step at mid-series lies {d_step:.2f} noise SDs from "
            f"its best straight line, and a 3-point-a-year slope {d_line:.2f} from its best step, so even with "
            f"the step's wave known the best rule between the two shapes errs about "
            f"{stats.norm.cdf(-d_step / 2):.0%} of the time each way; the search over waves only adds to that. "
            f"An 8-point blip is {z_blip:.2f} noise SDs from the level, which even with the between-wave SD known "
            f"exactly would be found about {power:.0%} of the time at its share of the 5 % budget; estimating "
            "that SD from 14 waves costs the rest. The rows below measure both at the classifier's own false-call "
            "rate: the blip test alone given every false call (its threshold the null series' quantile), and a "
            "detector that knows the noise (the limit). The first is what a blip detector that estimates the "
            "wave-to-wave variation, with the sampling variance as its floor, can reach; the classifier gets "
            "there only by taking the false calls from lines and steps. That floor buys little: a test valid for "
            "every wave-to-wave variance must hold where the sampling variance is negligible, where only t on "
            "k - 2 df is exact, and thresholds that relax with the floor gained under 1 point in our trials.")


def _pct(x: float) -> str:
    return f"{x * 100:.1f}%"


def _fmt(rate, value: float) -> str:
    return f"{value:.3f}" if rate.what.startswith(("SE of change", "SE / SD")) else _pct(value)


def render(report: Report) -> str:
    tier = TIERS[report.tier]
    out = [
        "# Validation: the rates the tool promises, measured",
        "",
        f"Made by `scripts/calibrate.py{' --quick' if report.tier == 'quick' else ''}` on "
        f"{dt.date.today().isoformat()} (seed {report.seed}, {report.seconds / 60:.1f} minutes on "
        f"{platform.machine()} with {os.cpu_count()} cores, Python {platform.python_version()}). Each wave is drawn "
        "from a known superpopulation and goes through the same functions as a stored wave: the estimates, the "
        "covariance of shared clusters and respondents, the change test and the make-up test "
        "(tracker/calibration.py describes the model).",
        "",
        f"Replicates: {tier.pairs:,} wave pairs per sharing scenario (coverage uses both waves of the independent "
        f"pairs), {tier.power_pairs:,} pairs per share and effect size for power, {tier.fdr_reps:,} families of 80 "
        "tests. *MC SE* is the Monte Carlo standard error of the measured rate; a rate that misses its target by "
        "less than about two of them is not evidence of a fault.",
        "",
        "## Designs",
        "",
    ]
    for d in DESIGNS:
        lo, mid, hi = report.deff.get(d.name, (float("nan"),) * 3)
        out.append(f"- **{d.name}**: {d.describe()}. Design effect of the share 0.5 in total (Kish, V / V_srs): "
                   f"median {mid:.2f} (range {lo:.2f} to {hi:.2f}).")
    out += ["", "Intervals: Wilson on the design base p(1-p)/V (never above the Kish base of the weights) with the t "
            "quantile on the design degrees of freedom (the default), and Korn-Graubard (`--interval "
            "korn-graubard`); means and balances use t. Change tests: t on V_to + V_from - 2 Cov with Satterthwaite "
            "degrees of freedom for independent waves and the paired design's when waves share clusters or "
            "respondents (declared in the codebook, as the scenarios here are). Sharing scenarios keep "
            "the cluster labels, with cluster effects correlated 0.8 between waves, and bring back 30 % or 70 % of "
            "each cluster's respondents with latents correlated 0.6.", ""]
    sections = [(d.name, "") for d in DESIGNS] + [(FORECAST_DESIGN, (
        f"{FORECAST_REPS[report.tier]:,} series per setting of 14 quarterly waves and the one after, sampling SE "
        "1.6 points, between-wave SD 1.5 points, through tracker/expected.py: the pattern classifier, then a "
        "line through each series' waves (through the waves since a step; without a blip's wave) as a "
        "random-effects meta-regression, and the prediction interval of the next wave with its sampling "
        "variance (Satterthwaite df). Surprises: families of 100 cells judged at once with Benjamini-Hochberg "
        "at 5 %; with no change anywhere a family's false discovery rate is the chance of any surprise. The "
        "SE of a surprise test is the prediction's SD (about 2.3 points here: sampling, wave-to-wave variation "
        "and the fit), so a move of 5 sampling SEs is only about 3.5 of them; both are shown. Smoothing: a "
        "subgroup of 150 respondents (a share near 0.6, SE about 4 points) whose true value walks at random, "
        "through tracker/methods/statespace.py (the local-level smoother averaged over the signal variance); the "
        "coverage counts every wave of every series against its true value."))] + [(TREND_DESIGN, (
        f"One series of 14 quarterly waves at a time ({TREND_REPS[report.tier]:,} per setting), sampling SE 1.6 "
        "points and between-wave SD 1.5 points, through the pattern classifier of tracker/trends.py: one test per "
        "series for a trend, a step or a blip: a straight line, a step at any wave and a one-wave blip at any wave "
        "(Sidak over the effective number of candidate waves, weighted Bonferroni across the three), then the "
        "shape that fits best, or 'moved up/down' when the waves cannot tell a trend from a step. " + _limits()))]
    sections += [(RARE_DESIGN, (
        f"{RARE_REPS[report.tier]:,} waves of 1,500 respondents, no clusters, lognormal weights of Kish efficiency "
        "0.42 (log SD 0.93), a true share of 0.05 whose chance of a 'yes' rises with the square root of the weight "
        "(informative weights), and four subgroups of 10, 15, 25 and 50 % of the sample. The design base is never "
        "above the Kish base of the weights and is the Kish base at 0 %; the reliability rule also refuses a share "
        "resting on fewer than 15 respondents on its rarer side (share x base; tracker/kinds.py). Promised: coverage "
        "of every cell at least 93 %, and of the cells the rule passes at least 92 % where it passes a fifth of "
        "them or more. Where it refuses more than four fifths (the subgroups of effective base about 100-170), the "
        "few cells it passes are reported: they are mostly those whose estimate came out well above the truth "
        "(a few heavy-weighted 'yes' answers), whose relative width then passes the rule, and they cover about "
        "80 %; the rule's refusal of the rest is what protects the reader there."))]
    sections += [(FEW_DESIGN, (
        f"{FEW_REPS[report.tier]:,} wave pairs per scenario, no change in truth, cluster effect SD 0.3. Recurring "
        "clusters keep their labels and correlated effects (0.8) and are declared (`waves_share_clusters: true`): "
        "the change uses their covariance on the paired design's degrees of freedom (10 clusters minus 5 strata). "
        "New clusters under reused labels (interview days, say) have independent effects: not declared, the waves "
        "are independent; wrongly declared, the covariance of unrelated clusters is used (reported, not promised: "
        "the reason the codebook must say so). Every cell here has 5 degrees of freedom, and the reliability rule "
        "refuses a share whose interval is 30 points wide or more: with so few clusters that is mostly a wave "
        "whose variance estimate came out large, so the comparisons left to test lean to small variances, and "
        "among them the test rejects more often than 5 % (reported). What a reader meets is the rate of "
        "no-change comparisons called a move, a refused comparison never being one: that is the promise. A "
        "mean has no width rule and is tested in nearly every pair."))]
    sections += [(RAKED_DESIGN, (
        f"{RAKED_REPS[report.tier]:,} waves of 1,000 respondents drawn with region a at half its population "
        "share (base weights correct it) and raked to the population margins of region (0.5 / 0.3 / 0.2) and "
        "age band (0.6 / 0.4) by the tool's own raking, as `add --rake` does. Each wave is estimated twice: with "
        "the calibration-aware variance (the residuals of the regression on the margins' indicators, the "
        "default for raked waves) and, for comparison, with the weights taken as fixed (reported). The interval "
        "of a raked wave's share is on its design base capped at the respondents, not at the Kish base: the "
        "calibration's gain is real."))]
    sections += [(LONE_DESIGN, (
        f"{LONE_REPS[report.tier]:,} pairs of independent waves of 12 strata with their own effects, 6 holding two "
        "clusters and 6 holding one (a draw from its stratum, not a certainty), 40 respondents a cluster, no "
        "change in truth; each pair is judged under each rule for one-cluster strata. Promised: `centre` (the "
        "default) never rejects more than 6 % (it may reject less: it counts the strata's differences as "
        "variance); `average` and `certainty` are reported: `certainty` leaves the lone strata's variance out, "
        "which is right only for strata taken with certainty."))]
    sections += [(DRIVER_DESIGN, (
        f"{DRIVER_REPS[report.tier]:,} samples of 10 strata x 6 clusters x 30 respondents (1,800), lognormal weights "
        "(log SD 0.4) independent of the answers. Three attributes of unit variance, correlated 0.5 within clusters, "
        "each with a cluster effect of variance 0.3; the headline is 0.5, 0.3 and 0.1 times them plus a cluster "
        "effect (variance 0.2) and noise (variance 1). The truth is the population's relative weights and R^2, "
        "from its covariance matrix. Promised: the delete-one-cluster jackknife intervals of `tracker drivers` "
        "(t on the design's 50 df) cover each raw weight and R^2 95 % of the time, within 93 % to 97 %."))]
    sections += [(BRIDGE_DESIGN, (
        f"{BRIDGE_REPS[report.tier]:,} series of 14 quarterly waves per setting, a wording break at the 7th wave "
        "moving the level by 8 points, sampling SE 1.6 points and a wave-to-wave SD of 1 point, the series flat or "
        "rising 2 points a year. The jump is estimated by `trends --bridge` (tracker/bridging.py: the trend "
        "model with a step at the break). Promised: its 95 % interval covers the true jump 94 % to 98 % of the "
        "time (it leans conservative: the wave-to-wave variance is estimated with a floor at zero and t has the "
        "fit's 11 df)."))]
    sections += [(SEASON_DESIGN, (
        f"{SEASON_REPS[report.tier]:,} monthly series per setting: 24 waves of history (two cycles) and the next "
        "wave, a 12-month cycle of amplitude 3 points, sampling SE 1.6 points and wave-to-wave SD 1.5 points. With "
        "the codebook's `seasons: 12` the expected range averages a model without seasons and one with the "
        "seasons' harmonics as random effects, by their likelihood (tracker/trends.py, seasonal_regression). "
        "Promised: 94 % to 96 % coverage at the seasonal peak, the trough and the seasonal mean with the key, and "
        "for a series without seasons under the key; without the key a seasonal series is reported (its ranges "
        "miss peaks and troughs and are too wide at the mean). The key's cost for a series without seasons: "
        "surprises found at most 1 point less often than without it (the same cells judged both ways; the "
        "loss's MC SE from the paired differences). The prior odds of no seasons (2 to 1) and the smallest "
        "seasonal variance considered (0.15 sampling variances) were set on this setting; fixed effects for "
        "every month, tried first, lost 25 points of that power. False pattern calls: the pattern tests on the "
        "same 24-wave histories with nothing but the seasons moving (promised at most 5 % with the key, and for "
        "a series without seasons). Smoothing: a subgroup of 150 respondents whose truth walks at random about "
        "the cycle, or with no seasons; with the key the smoother fits the yearly wave beside its walk "
        "(coverage promised 93 % to 97 % with the key; its cost for a series without seasons is the "
        "smoothed/direct error ratio, reported)."))]
    for name, intro in sections:
        out += [f"## {name[0].upper() + name[1:]}", ""] + ([intro, ""] if intro else []) + [
                "| what | setting | nominal | measured | MC SE | target | meets |",
                "| --- | --- | --- | --- | --- | --- | --- |"]
        for r in (r for r in report.rates if r.design == name):
            nominal = "" if r.nominal is None else _fmt(r, r.nominal)
            target = "reported" if r.target is None else f"at most {_fmt(r, r.target[1])}" if r.target[0] <= -1 \
                else f"{_fmt(r, r.target[0])} to {_fmt(r, r.target[1])}"
            meets = {None: "", True: "yes", False: "no"}[r.meets]
            out.append(f"| {r.what} | {r.setting} | {nominal} | {_fmt(r, r.measured)} | {_fmt(r, r.mc_se)} | "
                       f"{target} | {meets} |")
        out.append("")
    misses = [r for r in report.rates if r.meets is False]
    out += ["## Reading the misses", ""]
    if not misses:
        out.append("Every rate with a target meets it.")
    else:
        far = [r for r in misses if not r.within_mc(2.0)]
        out.append(f"{len(misses)} of {sum(r.target is not None for r in report.rates)} rates with a target miss it; "
                   f"{len(far)} of those by more than two Monte Carlo standard errors:")
        out.append("")
        out += [f"- {r.design}, {r.what}, {r.setting}: {_fmt(r, r.measured)} (target "
                f"{_fmt(r, r.target[0])} to {_fmt(r, r.target[1])}, MC SE {_fmt(r, r.mc_se)})" for r in far] or \
               ["- none: the misses are within Monte Carlo error."]
        if any(r.design == TREND_DESIGN for r in far):
            out += ["", f"The {TREND_DESIGN} misses are hit rates near the limit of what one series of 14 waves "
                    "can tell (see that section); the classifier is tuned to keep its wrong calls (false patterns, "
                    "a trend read as a step or a step as a trend) within target instead."]
        over = [r for r in far if r.design != TREND_DESIGN and r.measured > r.target[1]]
        under = [r for r in far if r.design != TREND_DESIGN and r.measured < r.target[0]]
        if over:
            out += ["", f"{len(over)} miss(es) lie above their target: intervals wider than they need be, never "
                    "narrower. For a 3 % share the cause is the cap of the design base at the Kish base of the "
                    "weights (the price of the rare-share promise: a rare share's design variance is too often too "
                    "small); for a share's change between two waves of 5 strata x 2 clusters it is Newcombe's "
                    "interval, built from each wave's Wilson limits on that wave's 5 degrees of freedom, which is "
                    "wider than the test on the change's own degrees of freedom (the test's size is within target)."]
        if under:
            out += ["", f"{len(under)} other miss(es) lie below their target and are open faults: "
                    + "; ".join(f"{r.design}, {r.what}, {r.setting}" for r in under) + "."]
        if not over and not under:
            out += ["", "Every other miss is within Monte Carlo error."]
    out += ["", "Coverage among cells that pass the reliability rule is promised in the rare-share design and "
            "reported in the others: a thin subgroup's cell of a rare share passes a width rule mostly when its "
            "estimate came out on one side, so the cells that pass are a biased selection. The rule's floor of 15 "
            "respondents on the rarer side refuses most of such cells (without it, 10 % of the cells of a 0.05 share "
            "in a subgroup of effective base about 170 passed and covered 72-78 %; with it, 7 % pass); pooled waves "
            "or the total are the better source for them.",
            "", "Smoothing is promised for a slowly moving series (1 point a wave); at twice that speed (reported) "
            "the smoother still cuts the squared error by about two thirds, but its interval covers less than "
            "promised, since the signal variance is then harder to learn from 14 waves of a thin subgroup.", ""]
    return "\n".join(out)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="fewer replicates (about 2 minutes)")
    parser.add_argument("--seed", type=int, default=2026)
    parser.add_argument("-o", "--output", default=str(ROOT / "docs" / "validation.md"))
    parser.add_argument("-q", "--quiet", action="store_true", help="no progress lines")
    args = parser.parse_args()
    report = run("quick" if args.quick else "full", args.seed, verbose=not args.quiet)
    Path(args.output).write_text(render(report), encoding="utf-8")
    print(f"wrote {args.output} ({report.seconds / 60:.1f} minutes)")


if __name__ == "__main__":
    main()
