"""Estimates and changes checked against published worked examples and reference libraries.

Sources are named beside each check. Data generated here only feeds the reference
libraries; the expected values come from those libraries or the publications.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from scipy import stats

from tracker import Study
from tracker.cli import main
from tracker.methods import adjust_pvalues, min_detectable_change, newcombe_interval, wilson_interval

BOOK = """\
title: test study
id: rid
{weight}
{strata}
{clusters}
variables:
  q:
    label: A five-point rating
    type: scale
    codes: {{1: a, 2: b, 3: c, 4: d, 5: e}}
    missing: {{9: dk}}
  g:
    label: Group
    type: category
    codes: {{1: one, 2: two, 3: three}}
groups:
  g: {{variable: g}}
metrics:
  top2:
    label: Top two
    variable: q
    share: [4, 5]
  avg:
    label: Mean
    variable: q
    mean: true
  bal:
    label: Balance
    variable: q
    balance: {{plus: [4, 5], minus: [1, 2]}}
"""


def make_study(tmp_path, waves, weight=False, strata=False, clusters=False, name="s", panel=False):
    book = tmp_path / f"{name}.yaml"
    book.write_text(BOOK.format(weight="weight: w" if weight else "", strata="strata: st" if strata else "",
                                clusters="clusters: cl" if clusters else "") + ("panel: true\n" if panel else ""))
    study = Study.create(tmp_path / name, book)
    for i, frame in enumerate(waves):
        path = tmp_path / f"{name}-w{i}.csv"
        frame.to_csv(path, index=False)
        study.add(path, f"W{i + 1}", f"2025-{i + 1:02d}-15")
    return Study(tmp_path / name)


def random_wave(rng, n, weighted=True, design=True, prefix="r"):
    frame = pd.DataFrame({
        "rid": [f"{prefix}{i}" for i in range(n)],
        "q": rng.choice([1, 2, 3, 4, 5, 9], n, p=[0.1, 0.15, 0.2, 0.3, 0.2, 0.05]),
        "g": rng.integers(1, 4, n),
    })
    if weighted:
        frame["w"] = np.round(rng.lognormal(0, 0.4, n), 5)
    if design:
        frame["st"] = rng.integers(1, 5, n)
        frame["cl"] = frame["st"] * 100 + rng.integers(1, 8, n)
    return frame


# -- published worked examples -------------------------------------------------------------

def test_wilson_interval_newcombe_1998_example():
    # Newcombe (1998, Stat Med 17:857), Table I: 81/263 -> 0.2553 to 0.3662
    lo, hi = wilson_interval(81 / 263, 263)
    assert round(float(lo), 4) == 0.2553 and round(float(hi), 4) == 0.3662
    # statsmodels proportion_confint(method="wilson") agrees
    from statsmodels.stats.proportion import proportion_confint

    ref = proportion_confint(81, 263, method="wilson")
    assert np.allclose([lo, hi], ref, atol=1e-12)


def test_newcombe_hybrid_score_difference_examples():
    # Newcombe (1998, Stat Med 17:873), method 10: 56/70 - 48/80 -> 0.0524 to 0.3339
    lo, hi = newcombe_interval(56 / 70, 70, 48 / 80, 80)
    assert (round(float(lo), 4), round(float(hi), 4)) == (0.0524, 0.3339)
    # ... and 9/10 - 3/10 -> 0.1705 to 0.8090
    lo, hi = newcombe_interval(0.9, 10, 0.3, 10)
    assert (round(float(lo), 4), round(float(hi), 4)) == (0.1705, 0.8090)
    # statsmodels confint_proportions_2indep(method="newcomb") agrees
    from statsmodels.stats.proportion import confint_proportions_2indep

    ref = confint_proportions_2indep(56, 70, 48, 80, method="newcomb")
    assert np.allclose(newcombe_interval(56 / 70, 70, 48 / 80, 80), ref, atol=1e-10)


BH_P = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240,
        0.4262, 0.5719, 0.6528, 0.7590, 1.000]


def test_benjamini_hochberg_1995_example():
    # Benjamini & Hochberg (1995, JRSS B 57:289), section 4: BH rejects 4 at 0.05,
    # Bonferroni and Holm reject 3
    from statsmodels.stats.multitest import multipletests

    assert int((adjust_pvalues(BH_P, "bh") <= 0.05).sum()) == 4
    assert int((adjust_pvalues(BH_P, "holm") <= 0.05).sum()) == 3
    assert int((np.minimum(np.array(BH_P) * 15, 1) <= 0.05).sum()) == 3
    for ours, ref in (("bh", "fdr_bh"), ("holm", "holm"), ("by", "fdr_by")):
        assert np.allclose(adjust_pvalues(BH_P, ours), multipletests(BH_P, method=ref)[1], atol=1e-12)
    shuffled = np.random.default_rng(0).permutation(BH_P)
    assert np.allclose(adjust_pvalues(shuffled, "bh"), multipletests(shuffled, method="fdr_bh")[1])
    assert np.array_equal(adjust_pvalues(BH_P, "none"), np.array(BH_P))


def test_min_detectable_change_matches_statsmodels_power():
    # statsmodels NormalIndPower: effect size (in SD units) found with 80 % power
    from statsmodels.stats.power import NormalIndPower

    n1, n2 = 400, 600
    effect = NormalIndPower().solve_power(nobs1=n1, ratio=n2 / n1, alpha=0.05, power=0.8)
    ours = float(min_detectable_change(np.sqrt(1 / n1 + 1 / n2)))
    assert ours == pytest.approx(effect, rel=1e-4)  # statsmodels adds the negligible far tail


def test_kish_effective_base(tmp_path):
    # Kish (1965) effective base (sum w)^2 / sum w^2: equal weights give n;
    # weights 1, 2, 3 give 36 / 14 (hand computation)
    frame = pd.DataFrame({"rid": ["a", "b", "c"], "q": [4, 5, 1], "g": [1, 1, 2], "w": [1.0, 2.0, 3.0]})
    equal = frame.assign(w=2.5, rid=["d", "e", "f"])
    study = make_study(tmp_path, [frame, equal], weight=True)
    est = study.estimates(metrics=["top2"], by=[])
    assert est.loc[0, "effective_base"] == pytest.approx(36 / 14, abs=1e-12)
    assert est.loc[1, "effective_base"] == pytest.approx(3.0, abs=1e-12)
    assert est.loc[0, "value"] == pytest.approx(3 / 6)


# -- unweighted, no design: the textbook tests ------------------------------------------------

def test_unweighted_changes_match_statsmodels_and_scipy(tmp_path):
    rng = np.random.default_rng(42)
    a = random_wave(rng, 500, weighted=False, design=False, prefix="a")
    b = random_wave(rng, 430, weighted=False, design=False, prefix="b")
    b.loc[:150, "q"] = 5
    a["q"], b["q"] = a["q"].replace(9, 3), b["q"].replace(9, 3)  # everyone in the base (see below)
    study = make_study(tmp_path, [a, b])
    table = study.changes(by=["g"], adjust="none").table.set_index(["metric", "group", "subgroup"])
    from statsmodels.stats.proportion import test_proportions_2indep

    for group, sel_a, sel_b in [("Total", slice(None), slice(None))] + [
            (lab, a["g"] == code, b["g"] == code) for code, lab in ((1, "one"), (2, "two"), (3, "three"))]:
        qa = a.loc[sel_a, "q"]
        qb = b.loc[sel_b, "q"]
        qa, qb = qa[qa != 9], qb[qb != 9]
        key = "total" if group == "Total" else "g"
        # every kind is a t test on the design variance, which for unweighted data without
        # a design is Welch's t on what each respondent contributes: scipy ttest_ind(equal_var=False)
        values = {"top2": lambda q: q.isin([4, 5]).astype(float), "avg": lambda q: q.astype(float),
                  "bal": lambda q: q.isin([4, 5]).astype(float) - q.isin([1, 2])}
        for metric, f in values.items():
            ref = stats.ttest_ind(f(qb), f(qa), equal_var=False)
            row = table.loc[(metric, key, group)]
            if key == "total":
                assert row["df"] == pytest.approx(ref.df, abs=1e-8)
                assert row["statistic"] == pytest.approx(ref.statistic, abs=1e-10)
                assert row["p_raw"] == pytest.approx(ref.pvalue, abs=1e-10)
            else:
                # a subgroup is a domain: its variance is c s^2 / n_g with c = N (n_g - 1) / ((N - 1) n_g),
                # the whole wave's N/(N-1) (samplics' domain convention) where Welch has n_g/(n_g-1)
                def dvar(q, wave):
                    N, ng = len(wave), len(q)
                    return N * (ng - 1) / ((N - 1) * ng) * np.var(q, ddof=1) / ng
                vb, va = dvar(f(qb), b), dvar(f(qa), a)
                assert row["statistic"] == pytest.approx((f(qb).mean() - f(qa).mean()) / np.sqrt(vb + va), abs=1e-10)
        # statsmodels' Wald z for two shares uses p(1-p)/n where the design variance has
        # p(1-p)/(n-1): the two agree to O(1/n)
        row = table.loc[("top2", key, group)]
        ref = test_proportions_2indep(int(qb.isin([4, 5]).sum()), len(qb), int(qa.isin([4, 5]).sum()), len(qa),
                                      method="wald")
        assert row["statistic"] == pytest.approx(ref.statistic, rel=3 / min(len(qa), len(qb)))
        # balance: the multinomial variance (p+ + p- - (p+ - p-)^2)/(n - 1) per wave (docs/methods.md)
        row = table.loc[("bal", key, group)]
        def bal(q):
            pp, pm = q.isin([4, 5]).mean(), q.isin([1, 2]).mean()
            return pp - pm, (pp + pm - (pp - pm) ** 2) / (len(q) - 1)
        (b1, v1), (b0, v0) = bal(qb), bal(qa)
        assert row["change"] == pytest.approx(b1 - b0, abs=1e-12)
        if key == "total":
            assert row["statistic"] == pytest.approx((b1 - b0) / np.sqrt(v1 + v0), abs=1e-10)


def test_unweighted_estimates_match_textbook_formulas(tmp_path):
    rng = np.random.default_rng(5)
    a = random_wave(rng, 300, weighted=False, design=False)
    a["q"] = a["q"].replace(9, 3)  # everyone answers, so the base is the whole wave
    study = make_study(tmp_path, [a])
    est = study.estimates(by=[]).set_index("metric")
    q = a["q"]
    # mean: SE = s / sqrt(n) and a t interval (scipy.stats.t)
    assert est.loc["avg", "se"] == pytest.approx(q.std(ddof=1) / np.sqrt(len(q)), abs=1e-12)
    lo, hi = stats.t.interval(0.95, len(q) - 1, loc=q.mean(), scale=q.std(ddof=1) / np.sqrt(len(q)))
    assert (est.loc["avg", "ci_low"], est.loc["avg", "ci_high"]) == (pytest.approx(lo), pytest.approx(hi))
    # share: Wilson interval on the effective base p(1-p)/V = n - 1 with the t quantile on
    # n - 1 df; Wilson with quantile t on m equals Wilson with z on m (z/t)^2, so statsmodels
    # proportion_confint(method="wilson") on that base is the reference
    from statsmodels.stats.proportion import proportion_confint

    n = len(q)
    k = int(q.isin([4, 5]).sum())
    m = (n - 1) * (stats.norm.ppf(0.975) / stats.t.ppf(0.975, n - 1)) ** 2
    ref = proportion_confint(k / n * m, m, method="wilson")
    assert (est.loc["top2", "ci_low"], est.loc["top2", "ci_high"]) == (pytest.approx(ref[0], abs=1e-12),
                                                                        pytest.approx(ref[1], abs=1e-12))
    # Kish design effect V / (p(1-p)/n): the with-replacement variance p(1-p)/(n-1) makes it n/(n-1)
    assert est.loc["top2", "design_effect"] == pytest.approx(n / (n - 1), abs=1e-12)
    assert est.loc["top2", "df"] == n - 1


# -- weighted, stratified, clustered: samplics ------------------------------------------------

@pytest.mark.parametrize("design", ["weights", "strata", "clusters"])
def test_design_based_estimates_match_samplics(tmp_path, design):
    warnings.simplefilter("ignore")
    from samplics import PopParam, TaylorEstimator

    rng = np.random.default_rng(7)
    a = random_wave(rng, 600)
    study = make_study(tmp_path, [a], weight=True, strata=design in ("strata", "clusters"),
                       clusters=design == "clusters")
    est = study.estimates(by=["g"]).set_index(["metric", "group", "subgroup"])
    ok = a["q"] != 9
    w = a["w"].to_numpy()
    st = a["st"].to_numpy() if design != "weights" else None
    cl = a["cl"].to_numpy() if design == "clusters" else None
    ys = {"top2": a["q"].isin([4, 5]).astype(float), "avg": a["q"].astype(float),
          "bal": a["q"].isin([4, 5]).astype(float) - a["q"].isin([1, 2])}
    for metric, y in ys.items():
        y = y.where(ok, 0.5)  # rows outside the base: any value (samplics divides by the "out" domain's mean)
        # samplics domain estimation over the answered respondents (dk leaves the base)
        domain = np.where(ok, "in", "out")
        e = TaylorEstimator(PopParam.mean)
        e.estimate(y.to_numpy(), samp_weight=w, stratum=st, psu=cl, domain=domain)
        row = est.loc[(metric, "total", "Total")]
        assert row["value"] == pytest.approx(e.point_est["in"], abs=1e-8)
        assert row["se"] == pytest.approx(e.stderror["in"], abs=1e-8)
        for code, lab in ((1, "one"), (2, "two"), (3, "three")):
            dom = np.where(ok & (a["g"] == code), "in", "out")
            y_dom = y.where(ok & (a["g"] == code), 0.5)
            e = TaylorEstimator(PopParam.mean)
            e.estimate(y_dom.to_numpy(), samp_weight=w, stratum=st, psu=cl, domain=dom)
            row = est.loc[(metric, "g", lab)]
            assert row["value"] == pytest.approx(e.point_est["in"], abs=1e-8)
            assert row["se"] == pytest.approx(e.stderror["in"], abs=1e-8)


# -- calibration by simulation ----------------------------------------------------------------

def test_calibration_under_no_change_and_power_under_a_planted_change():
    """Seeded simulation through the vectorised core (common practice, no source).

    With no true change the raw tests reject about 5 %, and the BH family's false discovery
    proportion stays at or below 0.05 on average; a change of twice the minimum detectable
    change is found with power near the normal theory value Phi(2 * 2.8016 - 1.96).
    """
    from tracker.changes import compare
    from tracker.estimates import finish


    rng = np.random.default_rng(2026)
    reps, cells, n = 2000, 40, 800
    p_true = np.tile(rng.uniform(0.2, 0.8, cells), reps)  # one call holds every replicate
    size = reps * cells

    def cells_frame(p_hat, label):
        names = [f"m{i}" for i in range(size)]
        return finish(pd.DataFrame({
            "metric": names, "group": "total", "subgroup": "Total",
            "base": n, "weighted_base": float(n), "sum_w2": float(n), "value": p_hat,
            "variance": p_hat * (1 - p_hat) / (n - 1), "unit_variance": p_hat * (1 - p_hat),
            "n_psu": n, "design_df": n - 1}), dict.fromkeys(names, "share")).assign(wave=label, metric_label="m")

    a = rng.binomial(n, p_true) / n
    b = rng.binomial(n, p_true) / n
    p_raw = compare(cells_frame(b, "B"), cells_frame(a, "A"), adjust="none")["p_raw"].to_numpy()
    rate = np.mean(p_raw <= 0.05)
    assert abs(rate - 0.05) < 3 * np.sqrt(0.05 * 0.95 / size)
    # each replicate is its own BH family; all nulls are true, so FDP = 1 if anything is rejected
    fdp = [float((adjust_pvalues(p_raw[r * cells:(r + 1) * cells], "bh") <= 0.05).any()) for r in range(reps)]
    assert np.mean(fdp) <= 0.05 + 2 * np.sqrt(0.05 * 0.95 / reps)
    # planted change: twice the minimum detectable change
    mde = 2.8016 * np.sqrt(2 * p_true * (1 - p_true) / n)
    c = rng.binomial(n, np.clip(p_true + 2 * mde, 0, 1)) / n
    p_power = compare(cells_frame(c, "C"), cells_frame(a, "A"), adjust="none")["p_raw"].to_numpy()
    theory = stats.norm.cdf(2 * 2.8016 - 1.96) + stats.norm.cdf(-2 * 2.8016 - 1.96)
    assert abs(np.mean(p_power <= 0.05) - theory) < 0.01
    # a change of exactly one minimum detectable change is found about 80 % of the time
    c = rng.binomial(n, np.clip(p_true + mde, 0, 1)) / n
    p_one = compare(cells_frame(c, "C"), cells_frame(a, "A"), adjust="none")["p_raw"].to_numpy()
    assert abs(np.mean(p_one <= 0.05) - 0.80) < 0.02


# -- what the commands show ---------------------------------------------------------------------

def test_paired_covariance_equals_scipy_ttest_rel(tmp_path):
    rng = np.random.default_rng(12)
    a = random_wave(rng, 250, weighted=False, design=False)
    a["q"] = rng.integers(1, 6, 250)  # no don't-knows: every respondent in both bases
    b = a.copy()
    b["q"] = np.clip(a["q"] + rng.choice([-1, 0, 0, 1, 1], 250), 1, 5)
    study = make_study(tmp_path, [a, b], panel=True)
    result = study.changes(by=[])
    assert any(n.startswith("250 respondents answered both waves (the codebook declares a panel)")
               for n in result.notes)
    row = result.table.set_index("metric").loc["avg"]
    ref = stats.ttest_rel(b["q"], a["q"])  # scipy paired t: statistic, df n - 1 and p
    assert row["statistic"] == pytest.approx(ref.statistic, rel=1e-10)
    assert row["df"] == ref.df == 249 and row["covariance_from"] == "shared respondents"
    assert row["p_raw"] == pytest.approx(ref.pvalue, rel=1e-9)


def test_ids_that_coincide_are_not_a_panel_unless_declared(tmp_path):
    # two independent samples whose ids are row numbers: compared as independent (scipy
    # ttest_ind, Welch), with one note on the overlap
    rng = np.random.default_rng(13)
    a = random_wave(rng, 200, weighted=False, design=False)
    b = random_wave(rng, 200, weighted=False, design=False)
    a["q"], b["q"] = rng.integers(1, 6, 200), rng.integers(2, 6, 200)  # no don't-knows: whole-sample bases
    study = make_study(tmp_path, [a, b])
    result = study.changes(by=[])
    assert sum("200 respondent ids appear in both waves; they are taken as different people" in n
               for n in result.notes) == 1
    row = result.table.set_index("metric").loc["avg"]
    ref = stats.ttest_ind(b["q"], a["q"], equal_var=False)  # scipy Welch t
    assert row["statistic"] == pytest.approx(ref.statistic, rel=1e-10)
    assert row["p_raw"] == pytest.approx(ref.pvalue, rel=1e-9) and row["covariance_from"] == "none"


def test_year_ago_pooled_and_breaks(tmp_path):
    rng = np.random.default_rng(3)
    waves = [random_wave(rng, 200, weighted=False, design=False, prefix=f"w{i}-") for i in range(5)]
    study = make_study(tmp_path, waves)
    with pytest.raises(Exception, match="no stored wave lies within 6 weeks"):
        study.changes(against="year-ago")
    pooled = study.changes(against="pooled:3", by=[])
    assert pooled.against == "W2, W3, W4"
    assert (pooled.table["base_from"] > 500).all()
    with pytest.raises(Exception, match="cannot pool 5"):
        study.changes(against="pooled:5")


def test_changes_command_lists_significant_first_with_footer(tmp_path):
    rng = np.random.default_rng(9)
    a = random_wave(rng, 800, weighted=False, design=False, prefix="a")
    b = random_wave(rng, 800, weighted=False, design=False, prefix="b")
    b.loc[:300, "q"] = 5
    make_study(tmp_path, [a, b])
    result = CliRunner().invoke(main, ["changes", str(tmp_path / "s"), "--format", "csv", "--by", "total"])
    assert result.exit_code == 0, result.output
    shown = pd.read_csv(__import__("io").StringIO(result.output))
    assert set(shown["metric"]) == {"top2", "avg", "bal"} and shown["significant"].all()
    result = CliRunner().invoke(main, ["changes", str(tmp_path / "s"), "--by", "g", "--adjust", "holm"])
    words = " ".join(result.output.split())  # the footer is wrapped to the terminal's width
    assert "Holm family-wise error rate adjustment across" in words
    assert "Significance is not importance" in words
    result = CliRunner().invoke(main, ["changes", str(tmp_path / "s"), "--against", "W9"])
    assert result.exit_code == 1 and "not 'previous', 'year-ago', 'pooled:K' or a stored wave label" in result.output


def test_low_base_cells_are_flagged_and_never_significant(tmp_path):
    rng = np.random.default_rng(4)
    a = random_wave(rng, 400, weighted=False, design=False, prefix="a")
    b = random_wave(rng, 400, weighted=False, design=False, prefix="b")
    a.loc[a["g"] == 3, "q"] = 1
    b.loc[b["g"] == 3, "q"] = 5
    a = pd.concat([a[a["g"] != 3], a[a["g"] == 3].head(12)])
    b = pd.concat([b[b["g"] != 3], b[b["g"] == 3].head(12)])
    study = make_study(tmp_path, [a, b])
    t = study.changes(by=["g"]).table.set_index(["metric", "subgroup"])
    row = t.loc[("top2", "three")]
    assert row["change"] == 1.0
    assert not row["significant"] and row["verdict"] == "not tested"
    assert "effective base under 30" in row["flags"]


def test_nchs_rules_from_memory():
    # NCHS Data Presentation Standards for Proportions (Parker et al. 2017), rules as
    # remembered (from memory), read on the Korn-Graubard interval; the interval widths
    # behind each case come from statsmodels proportion_confint(method="beta")
    from statsmodels.stats.proportion import proportion_confint

    from tracker.kinds import KINDS, flag_text

    p = np.array([0.5, 0.5, 0.5, 0.02, 0.04, 0.5])
    base = np.array([29, 40, 1000, 1000, 120, 1000.0])
    df = np.array([50, 50, 999, 999, 119, 7.0])
    widths = [np.subtract(*proportion_confint(pp * nn, nn, method="beta")[::-1]) for pp, nn in zip(p, base)]
    assert widths[1] >= 0.30 and widths[3] <= 0.05 and 0.05 < widths[4] and widths[4] / 0.04 > 1.30
    reliable, pairs = KINDS["share"].reliability(p, None, None, base, base, df, 0.95)
    flags = flag_text(pairs, len(p))
    assert reliable.tolist() == [False, False, True, True, False, True]
    assert flags[0] == "effective base under 30"
    assert flags[1] == "interval 30 points wide or more"
    assert flags[4] == "interval too wide for the value"
    assert flags[5] == "under 8 degrees of freedom"


def test_estimates_command_json_agrees_with_the_api(tmp_path):
    rng = np.random.default_rng(21)
    make_study(tmp_path, [random_wave(rng, 300, prefix="a"), random_wave(rng, 300, prefix="b")], weight=True)
    result = CliRunner().invoke(main, ["estimates", str(tmp_path / "s"), "--metric", "top2", "--by", "g",
                                       "--wave", "W2", "--format", "json"])
    assert result.exit_code == 0, result.output
    shown = pd.read_json(__import__("io").StringIO(result.output))
    api = Study(tmp_path / "s").estimates(metrics=["top2"], by=["g"], waves=["W2"])
    assert list(shown["subgroup"]) == ["Total", "one", "two", "three"]
    assert np.allclose(shown["value"], api["value"], atol=1e-10)
    assert np.allclose(shown["se"], api["se"], atol=1e-10)
    assert list(shown["base"]) == list(api["base"])
    result = CliRunner().invoke(main, ["estimates", str(tmp_path / "s"), "--metric", "nope"])
    assert result.exit_code == 1 and "--metric nope: not a metric of this study" in result.output


def test_intervals_at_another_level_come_from_the_kept_statistics(demo_study):
    """at_level re-finishes the estimates at another level from their sufficient statistics;
    the result equals asking for that level (common practice, no source: statsmodels' results
    give conf_int(alpha) the same way)."""
    from tracker.estimates import at_level

    at95 = demo_study.estimates(detail=True, waves=demo_study.labels[-2:])
    at90 = demo_study.estimates(detail=True, waves=demo_study.labels[-2:], level=0.90)
    again = at_level(at95, 0.90)
    for col in ("ci_low", "ci_high", "value", "se", "design_base", "reliable", "flags"):
        if not pd.api.types.is_numeric_dtype(again[col]):
            assert (again[col].astype(str) == at90[col].astype(str)).all(), col
        else:
            np.testing.assert_allclose(again[col].to_numpy(float), at90[col].to_numpy(float), rtol=0, atol=0,
                                       err_msg=col)
    assert (again["ci_high"] - again["ci_low"] < at95["ci_high"] - at95["ci_low"]).any()
