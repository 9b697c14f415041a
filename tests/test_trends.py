"""Trends: the random-effects slope against statsmodels, exact recovery, simulation, the demo."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from tracker.cli import main
from tracker.trends import fit_trends, meta_regression

DATES = [f"{2020 + k // 4}-{3 * (k % 4) + 2:02d}-15" for k in range(16)]


def est_frame(y: np.ndarray, se: np.ndarray, dates=DATES) -> pd.DataFrame:
    """An estimates table for series y (S x K) with standard errors se."""
    S, K = y.shape
    return pd.DataFrame({
        "metric": np.repeat([f"m{i}" for i in range(S)], K), "group": "total", "subgroup": "Total",
        "wave": np.tile([f"W{k:02d}" for k in range(K)], S), "fieldwork_date": np.tile(dates[:K], S),
        "value": y.ravel(), "se": se.ravel(), "reliable": True, "metric_label": "m", "kind": "share",
    })


def years(K, dates=DATES):
    d = pd.to_datetime(pd.Series(dates[:K]))
    return ((d - d.iloc[0]).dt.days / 365.25).to_numpy()


def test_fixed_tau_equals_statsmodels_wls_with_fixed_scale():
    # statsmodels WLS, weights 1/SE^2, cov_type="fixed scale" (scale 1): slope, SE, interval
    import statsmodels.api as sm

    rng = np.random.default_rng(8)
    K = 10
    t = years(K)
    se = rng.uniform(0.01, 0.03, K)
    y = 0.4 + 0.05 * t + rng.normal(0, 1, K) * se
    X = np.column_stack([np.ones(K), t])
    fit = meta_regression(y[None], (se**2)[None], X[None], np.ones((1, K), bool), tau2=np.zeros(1))
    ref = sm.WLS(y, X, weights=1 / se**2).fit(cov_type="fixed scale")
    assert np.allclose(fit["beta"][0], ref.params, atol=1e-12)
    assert np.allclose(np.sqrt(np.diag(fit["cov"][0])), ref.bse, atol=1e-12)
    lo, hi = ref.conf_int()[1]
    b, s = fit["beta"][0, 1], np.sqrt(fit["cov"][0, 1, 1])
    assert (b - 1.959963984540054 * s, b + 1.959963984540054 * s) == (pytest.approx(lo, abs=1e-12),
                                                                       pytest.approx(hi, abs=1e-12))


def test_tau2_without_slope_equals_statsmodels_dersimonian_laird():
    # statsmodels combine_effects(method_re="dl"): DerSimonian-Laird tau^2 and the pooled mean
    from statsmodels.stats.meta_analysis import combine_effects

    rng = np.random.default_rng(9)
    K = 12
    se = rng.uniform(0.01, 0.03, K)
    y = 0.5 + rng.normal(0, 0.03, K) + rng.normal(0, 1, K) * se
    fit = meta_regression(y[None], (se**2)[None], np.ones((1, K, 1)), np.ones((1, K), bool))
    ref = combine_effects(y, se**2, method_re="dl")
    assert fit["tau2"][0] == pytest.approx(ref.tau2, abs=1e-14)
    assert fit["beta"][0, 0] == pytest.approx(ref.mean_effect_re, abs=1e-12)
    assert np.sqrt(fit["cov"][0, 0, 0]) == pytest.approx(ref.sd_eff_w_re, abs=1e-12)
    assert fit["q"][0] == pytest.approx(ref.q, abs=1e-10)


def test_noiseless_straight_series_recovers_its_slope_exactly():
    K = 8
    t = years(K)
    y = 0.3 + 0.025 * t
    out = fit_trends(est_frame(y[None], np.full((1, K), 0.01)))
    assert out.loc[0, "slope_per_year"] == pytest.approx(0.025, abs=1e-12)
    assert out.loc[0, "wave_to_wave_sd"] == 0.0
    assert out.loc[0, "pattern"] == "rising"


def test_too_few_waves_gives_no_slope():
    out = fit_trends(est_frame(np.array([[0.5, 0.52, 0.51]]), np.full((1, 3), 0.01)))
    assert out.loc[0, "pattern"] == "too few waves" and np.isnan(out.loc[0, "slope_per_year"])
    assert "fewer than 4 waves" in out.loc[0, "note"]


def test_simulated_coverage_and_false_labels():
    """Seeded simulation (common practice, no source): with between-wave variation present,
    the slope interval covers the true slope about 95 % of the time; with no trend and no
    shift, the share of series given a pattern stays at or below 0.05."""
    rng = np.random.default_rng(2027)
    S, K = 2000, 12
    t = years(K)
    se = rng.uniform(0.012, 0.02, (S, K))
    y = 0.5 + 0.02 * t[None] + rng.normal(0, 0.02, (S, K)) + rng.normal(0, 1, (S, K)) * se
    out = fit_trends(est_frame(y, se))
    coverage = np.mean((out["slope_low"] <= 0.02) & (out["slope_high"] >= 0.02))
    assert abs(coverage - 0.95) < 0.02
    labelled = []
    for _ in range(40):  # 40 calls of 20 series, each call one family
        se = rng.uniform(0.012, 0.02, (20, K))
        y = 0.5 + rng.normal(0, 0.02, (20, K)) + rng.normal(0, 1, (20, K)) * se
        labelled.append(np.mean(fit_trends(est_frame(y, se))["pattern"] != "no pattern found"))
    assert np.mean(labelled) <= 0.05


def test_flat_is_said_only_within_a_declared_margin_per_year():
    """'Flat' is a claim against a margin the codebook declares (common practice, no source);
    without one a series with no pattern is only that. The slope's interval is taken at the
    family's agreeing level (the FCR level of Benjamini & Yekutieli 2005 for BH)."""
    from tracker.methods.distributions import t_ppf
    from tracker.methods.tests import family_level

    K = 12
    rng = np.random.default_rng(5)
    se = np.full((4, K), 0.005)
    y = 0.5 + rng.normal(0, 1, (4, K)) * se
    est = est_frame(y, se)
    plain = fit_trends(est)
    assert (plain["pattern"] == "no pattern found").all()
    def margin(x):
        return {f"m{i}": x for i in range(4)}

    wide = fit_trends(est, matters=margin(0.05))
    assert (wide["pattern"] == "flat").all()
    tight = fit_trends(est, matters=margin(0.0005))
    assert (tight["pattern"] == "no pattern found").all()
    # the margin is checked against the slope's interval at the family level: by hand for one series
    lev = family_level(plain["pattern_p_adjusted"].to_numpy(), "bh", 0.05)
    half = (plain["slope_high"] - plain["slope_low"]) / 2 / t_ppf(0.975, K - 2) * t_ppf(0.5 + lev / 2, K - 2)
    edge = float((plain["slope_per_year"].abs() + half).max())
    assert (fit_trends(est, matters=margin(edge * 1.001))["pattern"] == "flat").all()
    assert (fit_trends(est, matters=margin(edge * 0.999))["pattern"] == "flat").sum() == 3


def test_planted_shift_blip_and_trend_are_told_apart():
    K = 12
    t = years(K)
    se = np.full((3, K), 0.012)
    y = np.tile(0.6, (3, K))
    y[0, 7:] -= 0.08            # a shift at wave 7
    y[1, 5] -= 0.08             # a one-wave blip at wave 5
    y[2] += 0.03 * t            # a steady trend
    y += np.random.default_rng(1).normal(0, 1, (3, K)) * se
    out = fit_trends(est_frame(y, se))
    assert list(out["pattern"]) == ["shifted down", "one-wave blip", "rising"]
    assert out.loc[0, "shift_wave"] == "W07" and out.loc[1, "blip_wave"] == "W05"
    assert out.loc[0, "level_before"] == pytest.approx(0.6, abs=0.01)
    assert out.loc[0, "level_after"] == pytest.approx(0.52, abs=0.01)


def test_demo_patterns(demo_study):
    out = demo_study.trends(by=["area"]).set_index(["metric", "subgroup"])
    assert out.loc[("satisfied", "Total"), "pattern"] == "rising"
    assert out.loc[("on_time_good", "Total"), "pattern"] == "shifted down"
    assert out.loc[("on_time_good", "Total"), "shift_wave"] == "2025-Q2"
    assert out.loc[("clean_good", "Total"), "pattern"] == "one-wave blip"
    assert out.loc[("clean_good", "Total"), "blip_wave"] == "2024-Q3"
    # the demo declares 5 points a year as the smallest change that matters for a share
    assert out.loc["info_good", "pattern"].isin(["flat", "no pattern found"]).all()
    assert out.loc[("staff_good", "Southbank"), "pattern"] == "shifted down"
    assert out.loc[("staff_good", "Southbank"), "shift_wave"] == "2025-Q3"
    assert out.loc[("staff_good", "Northfield"), "pattern"] in ("flat", "no pattern found")
    assert out.loc[("staff_good", "Town Centre"), "pattern"] in ("flat", "no pattern found")
    # the wording break: the series starts at 2024-Q1 and nothing is fitted across it
    assert out.loc[("safe", "Total"), "first_wave"] == "2024-Q1"
    assert out.loc[("safe", "Total"), "waves"] == 9
    assert "wording break" in out.loc[("safe", "Total"), "note"]


def test_trends_command_and_pooled_estimates(demo_study):
    root = str(demo_study.root)
    result = CliRunner().invoke(main, ["trends", root, "--by", "total", "--moving-only", "--format", "csv"])
    assert result.exit_code == 0, result.output
    shown = pd.read_csv(__import__("io").StringIO(result.output))
    # fares_fair: the planted one-wave jump of the sample's make-up at 2025-Q4 (a blip in total)
    assert set(shown["metric"]) == {"satisfied", "satisfaction_mean", "on_time_good", "tram_on_time",
                                    "clean_good", "staff_good", "fares_fair"}
    result = CliRunner().invoke(main, ["trends", root, "--by", "total", "--last", "3"])
    assert result.exit_code == 0 and "too few waves" in result.output
    pooled = demo_study.pooled(4, metrics=["staff_good"], by=["area"])
    first = pooled[(pooled["wave"] == "2023-Q4") & (pooled["subgroup"] == "Southbank")].iloc[0]
    assert first["pooled_waves"] == "2023-Q1..2023-Q4"
    waves = [demo_study.load(w) for w in demo_study.labels[:4]]
    assert first["base"] == sum(int(((t["area"] == 3) & t["staff"].between(1, 5)).sum()) for t in waves)
    result = CliRunner().invoke(main, ["trends", root, "--rolling", "4", "--metric", "staff_good", "--by", "area"])
    assert result.exit_code == 0 and "2023-Q1..2023-Q4" in result.output


def test_effective_number_of_tests_follows_li_and_ji():
    # Li & Ji (2005, Heredity 95:221), formula from memory: M_eff = sum I(|l| >= 1) + (|l| - floor|l|)
    # over the eigenvalues l of the correlation matrix: m independent tests count m, m identical ones 1
    from tracker.trends import effective_tests

    R = np.stack([np.eye(5), np.ones((5, 5))])
    assert list(effective_tests(R)) == pytest.approx([5.0, 1.0])
    r = 0.5  # two tests correlated 0.5: eigenvalues 1.5 and 0.5, so 1 + 0.5 + 0.5 = 2
    assert effective_tests(np.array([[[1, r], [r, 1]]]))[0] == pytest.approx(2.0)
    r = 0.9  # eigenvalues 1.9 and 0.1: 1 + 0.9 + 0.1 = 2 as well (the formula's known coarseness)
    assert effective_tests(np.array([[[1, r], [r, 1]]]))[0] == pytest.approx(2.0)


def test_between_a_step_and_a_line_the_shape_goes_line_then_undecided_then_step():
    # noiseless mixtures of a 3-point-a-year line and a 6-point step at wave 8 of 14 (sampling SE
    # 2 points): pure line reads rising, pure step shifted down, and the mixtures in between pass
    # through "moved" in that order, never back (common practice, no source: a model choice
    # must be monotone in the evidence)
    from tracker.brief import trend_sentence

    K = 14
    t = years(K)
    mix = np.linspace(0, 1, 41)
    line = -0.03 * (t - t.mean())
    step = -0.06 * (np.arange(K) >= 7)
    y = 0.6 + (1 - mix)[:, None] * line[None] + mix[:, None] * step[None]
    out = fit_trends(est_frame(y, np.full(y.shape, 0.02)), adjust="none")
    order = {"falling": 0, "moved down": 1, "shifted down": 2}
    ranks = out["pattern"].map(order).to_numpy()
    assert out["pattern"].iloc[0] == "falling" and out["pattern"].iloc[-1] == "shifted down"
    assert (np.diff(ranks) >= 0).all() and (ranks == 1).any()
    text = trend_sentence(out[out["pattern"] == "moved down"].iloc[0], 0.95)
    assert text.startswith("m moved down over 14 waves (W00 to W13): -")
    assert "cannot tell a gradual trend from a one-off step" in text


def test_a_seasonal_slope_is_that_of_the_seasons_model():
    # reference: tests/seasonal_reference.py (the seasons model from the full data with scipy's
    # multivariate normal and statsmodels WLS)
    from tracker.trends import fit_trends, season_columns

    from .seasonal_reference import mixture

    rng = np.random.default_rng(11)
    K, se = 36, 0.016
    dates = [f"{2010 + i // 12}-{i % 12 + 1:02d}-15" for i in range(K)]
    y = 0.6 + 0.01 * np.arange(K) / 12 + 0.03 * np.sin(2 * np.pi * np.arange(K) / 12) + rng.normal(0, se, K)
    est = pd.DataFrame({"metric": "m", "metric_label": "m", "kind": "share", "group": "total", "subgroup": "Total",
                        "wave": [f"W{i:02d}" for i in range(K)], "fieldwork_date": dates, "value": y, "se": se,
                        "reliable": True})
    got = fit_trends(est, cycle=12).iloc[0]
    years = np.array([(pd.Timestamp(d) - pd.Timestamp(dates[0])).days / 365.25 for d in dates])
    mean, cov, _ = mixture(y, np.full(K, se**2), np.column_stack([np.ones(K), years - years.mean()]),
                           season_columns(dates, 12))
    assert got["slope_per_year"] == pytest.approx(mean[1], rel=1e-9)
    assert "slope and pattern net of seasonal effects" in got["note"]
    plain = fit_trends(est).iloc[0]
    assert plain["wave_to_wave_sd"] > got["wave_to_wave_sd"]  # the seasons were noise to the plain line


@pytest.mark.parametrize("cycle", [12, 4])
def test_season_harmonics_span_the_seasons(cycle):
    # a periodic sequence of period c is a constant plus c - 1 harmonics (the discrete Fourier
    # basis; common practice, no source): with the intercept, the harmonics and one effect per
    # season are the same model, and the harmonics sum to zero over a cycle
    from tracker.trends import season_columns

    dates = [f"2020-{m:02d}-15" for m in range(1, 13)] * 2
    H = season_columns(dates, cycle)
    season = np.array([(m - 1) if cycle == 12 else (m - 1) // 3 for m in range(1, 13)] * 2)
    dummies = (season[:, None] == np.arange(cycle)[None, :]).astype(float)
    both = np.column_stack([np.ones(len(dates)), H])
    assert H.shape[1] == cycle - 1 and np.linalg.matrix_rank(both) == cycle
    coef = np.linalg.lstsq(both, dummies, rcond=None)[0]
    assert np.allclose(both @ coef, dummies, atol=1e-12)
    assert np.allclose(H[:12].sum(axis=0), 0.0, atol=1e-12)


SEASONAL_BOOK = """title: monthly pulse
id: rid
weight: w
{extra}variables:
  happy: {{type: category, codes: {{0: "no", 1: "yes"}}}}
metrics:
  happy_yes: {{variable: happy, share: [1]}}
"""


@pytest.fixture(scope="module")
def monthly_studies(tmp_path_factory):
    """Two studies of the same 26 monthly waves (400 respondents each, a yes share that follows
    a 10-point yearly wave), one declaring seasons: 12."""
    from tracker import Study

    tmp = tmp_path_factory.mktemp("monthly")
    rng = np.random.default_rng(12)
    files = []
    for i in range(26):
        p = 0.6 + 0.1 * np.sin(2 * np.pi * i / 12)
        frame = pd.DataFrame({"rid": [f"r{i}_{k}" for k in range(400)], "w": rng.uniform(0.5, 1.5, 400),
                              "happy": (rng.random(400) < p).astype(int)})
        frame.to_csv(tmp / f"m{i}.csv", index=False)
        files.append((tmp / f"m{i}.csv", f"{2024 + i // 12}-{i % 12 + 1:02d}", f"{2024 + i // 12}-{i % 12 + 1:02d}-15"))
    studies = {}
    for name, extra in (("plain", ""), ("seasonal", "seasons: 12\n")):
        (tmp / f"{name}.yaml").write_text(SEASONAL_BOOK.format(extra=extra))
        study = Study.create(tmp / name, tmp / f"{name}.yaml")
        for path, label, date in files:
            study.add(path, label, date)
        studies[name] = study
    return studies


def test_the_seasons_key_reaches_trends_ranges_and_the_smoother(monthly_studies):
    # reference: the library functions on the study's own estimates with the cycle given (the
    # command line and the study add nothing to them); and without the key, none of it
    from tracker.expected import predict
    from tracker.smoothing import smooth_estimates

    seasonal, plain = monthly_studies["seasonal"], monthly_studies["plain"]
    est = seasonal.estimates()
    want = fit_trends(est, adjust="bh", cycle=12).iloc[0]
    got = seasonal.trends().iloc[0]
    assert got["slope_per_year"] == pytest.approx(want["slope_per_year"], rel=1e-12)
    assert "slope and pattern net of seasonal effects" in got["note"]
    assert "seasonal" not in plain.trends().iloc[0]["note"]
    assert got["pattern"] == "no pattern found"  # the yearly wave alone is not a pattern once it is fitted
    # without the key the yearly wave is taken for wave-to-wave noise
    assert plain.trends().iloc[0]["wave_to_wave_sd"] > 2 * got["wave_to_wave_sd"]
    ranges = CliRunner().invoke(main, ["expect", str(seasonal.root), "--format", "csv"])
    assert ranges.exit_code == 0 and "with seasonal effects" in ranges.output
    # the expected range: the latest 24 waves (the window), the expected base's sampling variance
    ranged = seasonal.expected()
    rng_row = ranged.iloc[0]
    hist = seasonal.estimates(waves=seasonal.labels[-24:])
    pred = predict(hist, fit_trends(hist, cycle=12), ranged.attrs["date"],
                   pd.Series({("happy_yes", "total", "Total"): rng_row["sampling_sd"] ** 2}), cycle=12).iloc[0]
    row = pd.read_csv(__import__("io").StringIO(ranges.output)).iloc[0]
    assert row["expected"] == pytest.approx(pred["expected"], rel=1e-9) == rng_row["expected"]
    assert plain.expected().iloc[0]["expected"] != pytest.approx(rng_row["expected"], rel=1e-3)
    smoothed = seasonal.smoothed()
    assert np.allclose(smoothed["smoothed"], smooth_estimates(est, {}, 0.95, 12)["smoothed"], rtol=0, atol=1e-12)


def test_the_brief_of_a_seasonal_study_says_how_seasons_are_treated(monthly_studies):
    from tracker.brief import build_brief

    said = " ".join(i.text if hasattr(i, "text") else str(i)
                    for i in build_brief(monthly_studies["seasonal"], charts=False).method)
    assert "the waves follow a cycle of 12 months" in said and "a year ago compares the same season" in said
    plain = " ".join(i.text if hasattr(i, "text") else str(i)
                     for i in build_brief(monthly_studies["plain"], charts=False).method)
    assert "cycle of" not in plain


def test_seasons_need_every_season_twice():
    # common practice, no source: a season's effect rests on more than one wave; a survey fielded
    # every other month never sees half the months and is fitted without seasons
    from tracker.trends import seasons_covered

    monthly = [f"{2020 + i // 12}-{i % 12 + 1:02d}-15" for i in range(24)]
    ok = np.ones((3, 24), bool)
    ok[1, 5] = False  # June seen once
    assert seasons_covered(ok, monthly, 12).tolist() == [True, False, True]
    bimonthly = [f"{2020 + (2 * i) // 12}-{(2 * i) % 12 + 1:02d}-15" for i in range(30)]
    assert not seasons_covered(np.ones((1, 30), bool), bimonthly, 12)[0]
    quarterly = [f"{2020 + i // 4}-{3 * (i % 4) + 2:02d}-15" for i in range(8)]
    assert seasons_covered(np.ones((1, 8), bool), quarterly, 4)[0]
    assert not seasons_covered(np.ones((1, 8), bool), quarterly, None)[0]
