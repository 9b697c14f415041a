"""Sample make-up: raking weights, the composition test, and the mix split of a change.

Sources beside each check: the ipfn package (raking), scipy chi2_contingency (Pearson's
chi-square), Kitagawa (1955) for the decomposition identity, hand examples.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from scipy import stats

from tracker import Study, TrackerError
from tracker.cli import main
from tracker.composition import kitagawa, stacked_shares
from tracker.methods import rao_scott_table
from tracker.weighting import rake

from .conftest import EXAMPLE_CODEBOOK, example_wave, snapshot

# -- raking ---------------------------------------------------------------------------------

def test_raking_hits_every_margin_and_matches_ipfn():
    warnings.simplefilter("ignore")
    from ipfn import ipfn

    rng = np.random.default_rng(3)
    n = 600
    area = rng.choice(["N", "C", "S"], n, p=[0.5, 0.3, 0.2])
    age = rng.choice(["y", "m", "o"], n, p=[0.2, 0.3, 0.5])
    targets = [{"N": 0.4, "C": 0.35, "S": 0.25}, {"y": 0.35, "m": 0.4, "o": 0.25}]
    result = rake([area, age], targets, tol=1e-12)
    w = result.weights
    assert result.converged
    for lab, tgt in zip((area, age), targets):
        for k, share in tgt.items():
            assert w[lab == k].sum() / w.sum() == pytest.approx(share, abs=1e-10)
    assert w.sum() == pytest.approx(n)
    # the ipfn package (a test-only reference) on the same respondents and margins
    df = pd.DataFrame({"area": area, "age": age, "total": 1.0})
    aggregates = [pd.Series(targets[0]) * n, pd.Series(targets[1]) * n]
    for agg, name in zip(aggregates, ("area", "age")):
        agg.index.name = name
    ref = ipfn.ipfn(df, aggregates, [["area"], ["age"]], weight_col="total",
                    convergence_rate=1e-12, max_iteration=5000, rate_tolerance=0).iteration()
    assert np.allclose(w, ref["total"].to_numpy(), atol=1e-7)


def test_raking_with_caps_keeps_the_ratio_and_the_margins():
    """Caps (common practice, no source): weights stay within the ratio and margins still hold."""
    rng = np.random.default_rng(4)
    n = 800
    area = rng.choice(["N", "C", "S"], n, p=[0.5, 0.3, 0.2])
    age = np.where(area == "S", rng.choice(["y", "m", "o"], n, p=[0.05, 0.35, 0.6]),
                   rng.choice(["y", "m", "o"], n, p=[0.3, 0.4, 0.3]))
    targets = [{"N": 0.4, "C": 0.35, "S": 0.25}, {"y": 0.35, "m": 0.4, "o": 0.25}]
    free = rake([area, age], targets)
    assert free.weights.max() > 2.1
    capped = rake([area, age], targets, cap=(0.3, 1.8))
    assert capped.converged
    assert capped.weights.min() >= 0.3 - 1e-6 and capped.weights.max() <= 1.8 + 1e-6
    for lab, tgt in zip((area, age), targets):
        for k, share in tgt.items():
            assert capped.weights[lab == k].sum() / capped.weights.sum() == pytest.approx(share, abs=1e-7)
    tight = rake([area, age], targets, cap=(0.9, 1.1))
    assert not tight.converged  # S must rise by a quarter at least: impossible within 1.1


def test_capped_raking_is_the_bounded_raking_solution():
    """Deville & Sarndal (1992, JASA 87:376, section 3): the bounded raking weights are
    g = clip(exp(x'lambda), lo, hi), so log g is additive in the margins' labels wherever a
    weight is inside the cap, and the additive value lies beyond the bound wherever it is at
    one (the optimality conditions, which pin down the unique solution). Base weights unequal."""
    rng = np.random.default_rng(7)
    n = 900
    area = rng.choice(["N", "C", "S"], n, p=[0.5, 0.3, 0.2])
    age = rng.choice(["y", "m", "o"], n, p=[0.2, 0.4, 0.4])
    base = rng.lognormal(0.0, 0.4, n)
    targets = [{"N": 0.4, "C": 0.35, "S": 0.25}, {"y": 0.35, "m": 0.4, "o": 0.25}]
    lo, hi = 0.55, 2.2  # free raking's ratios run from 0.48 to 2.53: both bounds bind
    result = rake([area, age], targets, base=base, cap=(lo, hi), tol=1e-12)
    assert result.converged
    g = result.weights / base
    at_lo, at_hi = np.isclose(g, lo, rtol=1e-9), np.isclose(g, hi, rtol=1e-9)
    assert at_hi.sum() > 0 and at_lo.sum() > 0
    inside = ~(at_lo | at_hi)
    x = np.column_stack([np.ones(n)] + [(area == k) * 1.0 for k in "CS"] + [(age == k) * 1.0 for k in "mo"])
    coef, *_ = np.linalg.lstsq(x[inside], np.log(g[inside]), rcond=None)
    assert np.abs(x[inside] @ coef - np.log(g[inside])).max() < 1e-9
    assert (x[at_hi] @ coef >= np.log(hi) - 1e-9).all() and (x[at_lo] @ coef <= np.log(lo) + 1e-9).all()


def _raking_study(tmp_path, **book_changes):
    text = EXAMPLE_CODEBOOK.read_text()
    for old, new in book_changes.items():
        text = text.replace(old, new)
    (tmp_path / "book.yaml").write_text(text)
    Study.create(tmp_path / "s", tmp_path / "book.yaml")
    return tmp_path / "s"


def test_rake_on_add_reports_and_records_the_weighting(tmp_path):
    root = _raking_study(tmp_path)
    frame = example_wave(n=400, seed=21).drop(columns=["wt"])
    frame.to_csv(tmp_path / "w.csv", index=False)
    result = CliRunner().invoke(main, ["add", str(root), str(tmp_path / "w.csv"), "--wave", "2025-Q1",
                                       "--date", "2025-03-31", "--rake", "--cap", "0.2:5"])
    assert result.exit_code == 0, result.output
    assert "raked to site, age_band in" in result.output and "largest margin error" in result.output
    assert "weighting efficiency" in result.output
    study = Study(root)
    entry = json.loads((root / "ledger.json").read_text())["waves"][0]
    assert entry["weighting"]["kind"] == "raked" and entry["weighting"]["cap"] == [0.2, 5.0]
    assert entry["weighting"]["targets"]["site"] == {"Harbour Road": 0.45, "Millfield": 0.35, "Ashby Park": 0.2}
    table = study.load("2025-Q1")
    w = table["wt"].to_numpy()
    site = table["site"].map({1: "Harbour Road", 2: "Millfield", 3: "Ashby Park"})
    assert w[site == "Harbour Road"].sum() / w.sum() == pytest.approx(0.45, abs=1e-8)
    assert study.waves()["weighting"].tolist() == ["raked to the codebook's targets"]


@pytest.mark.parametrize("case,message", [
    ("empty group", "raking: targets.site: no respondents in Ashby Park, so its target cannot be met"),
    ("outside targets", "raking: column age: 3 respondent(s) fall in no label of age_band"),
    ("cap", "raking: the targets cannot be met within the cap 0.95:1.05"),
])
def test_raking_refusals_leave_the_study_unchanged(tmp_path, case, message):
    root = _raking_study(tmp_path, **({"range: [16, 99]": "range: [10, 99]"} if case == "outside targets" else {}))
    frame = example_wave(n=300, seed=22)
    if case == "empty group":
        frame.loc[frame["site"] == 3, "site"] = 1
    if case == "outside targets":
        frame.loc[:2, "age"] = 12
    frame.to_csv(tmp_path / "w.csv", index=False)
    before = snapshot(root)
    args = ["add", str(root), str(tmp_path / "w.csv"), "--wave", "2025-Q1", "--date", "2025-03-31", "--rake"]
    if case == "cap":
        args += ["--cap", "0.95:1.05"]
    result = CliRunner().invoke(main, args)
    assert result.exit_code == 1
    assert message in result.output
    assert snapshot(root) == before


# -- composition -----------------------------------------------------------------------------

def _two_waves_test(labels, levels, weights, strata, psus):
    pi, V, n, df, _ = stacked_shares(labels, levels, weights, strata, psus)
    return rao_scott_table(pi, V, n, df, 2, len(levels))


def test_rao_scott_with_equal_weights_is_pearson_chi_square():
    # scipy chi2_contingency without continuity correction is the reference for X^2; with
    # equal weights and no design the design correction is 1 up to the n/(n-1) factor of
    # the with-replacement variance in each wave
    rng = np.random.default_rng(5)
    a = rng.choice(["x", "y", "z", "u"], 500, p=[0.4, 0.3, 0.2, 0.1])
    b = rng.choice(["x", "y", "z", "u"], 450, p=[0.3, 0.3, 0.25, 0.15])
    levels = ["x", "y", "z", "u"]
    rs = _two_waves_test([a, b], levels, [np.ones(500), np.ones(450)], [None, None], [None, None])
    table = np.array([[np.sum(a == k) for k in levels], [np.sum(b == k) for k in levels]])
    ref = stats.chi2_contingency(table, correction=False)
    assert rs.pearson == pytest.approx(ref.statistic, abs=1e-9)
    assert rs.chi2_df == ref.dof
    assert rs.mean_deff == pytest.approx(1.0, abs=3e-3)
    assert rs.chi2_p == pytest.approx(ref.pvalue, rel=0.02)


def test_rao_scott_equals_the_svy_package_on_a_weighted_clustered_table():
    # svy (test-only dependency) Sample(...).categorical.tabulate(wave, group): Rao-Scott
    # F, its two df and p, and the first-order chi-square p, on the stacked waves with each
    # wave's weights scaled to its respondents
    warnings.simplefilter("ignore")
    import polars as pl
    import svy

    rng = np.random.default_rng(11)
    frames = []
    for k in (1, 2):
        st = np.repeat(np.arange(6), 60)
        cl = st * 10 + rng.integers(0, 4, st.size)
        g = rng.choice(["a", "b", "c"], st.size, p=[0.3, 0.45, 0.25])
        w = rng.lognormal(0, 0.5, st.size) * np.where(g == "a", 0.5, 1.0)  # 'a' over-sampled, weights correct it
        frames.append((g, w, st.astype(str), cl.astype(str)))
    rs = _two_waves_test([f[0] for f in frames], ["a", "b", "c"], [f[1] for f in frames],
                         [f[2] for f in frames], [f[3] for f in frames])
    rows = []
    for k, (g, w, st, cl) in enumerate(frames, start=1):
        rows.append(pl.DataFrame({"wave": k, "st": [f"{k}|{x}" for x in st], "cl": [f"{k}|{x}" for x in cl],
                                  "w": w * len(w) / w.sum(), "g": g}))
    sample = svy.Sample(pl.concat(rows), svy.Design(stratum="st", psu="cl", wgt="w"))
    ref = sample.categorical.tabulate("wave", "g").stats
    assert rs.f == pytest.approx(ref.f.value, rel=1e-6)
    assert rs.f_df_num == pytest.approx(ref.f.df_num, rel=1e-6)
    assert rs.f_df_den == pytest.approx(ref.f.df_den, rel=1e-6)
    assert rs.f_p == pytest.approx(ref.f.p_value, abs=1e-6)
    assert rs.pearson == pytest.approx(ref.chisq.value, rel=1e-6)
    assert rs.chi2_p == pytest.approx(ref.chisq.p_value, abs=1e-6)


def test_rao_scott_design_effect_shrinks_the_statistic_for_clustered_data():
    """Common practice, no source: with clusters that share a category, the design effect
    exceeds 1 and the corrected statistic is smaller than Pearson's."""
    rng = np.random.default_rng(6)
    clusters = np.repeat(np.arange(50), 10)
    cat = np.where(rng.random(50) < 0.5, "x", "y")[clusters]
    flip = rng.random(500) < 0.2
    cat = np.where(flip, np.where(cat == "x", "y", "x"), cat)
    other = rng.choice(["x", "y"], 500)
    rs = _two_waves_test([cat, other], ["x", "y"], [np.ones(500)] * 2, [None, None], [clusters, clusters])
    assert rs.mean_deff > 1.5 and rs.chi2 < rs.pearson


def test_demo_mix_wave_is_flagged_and_its_move_is_mostly_mix(demo_study):
    comp = demo_study.composition(wave="2025-Q4").tests.set_index("group")
    assert comp.loc["frequency", "shifted"] and not comp.loc["area", "shifted"] and not comp.loc["age_band", "shifted"]
    assert comp.loc["frequency", "largest_move"].startswith("Most days")
    mix = demo_study.changes(wave="2025-Q4", by=[], mix="frequency").mix.set_index("metric")
    row = mix.loc["fares_fair"]
    assert row["mix_part"] + row["within_part"] == pytest.approx(row["change"], abs=1e-12)
    assert row["mix_part"] > 0.5 * row["change"] > 0
    assert not row["standardised_significant"]
    # the quiet waves show no composition shift
    assert not demo_study.composition(wave="2025-Q3").tests["shifted"].any()


def test_composition_command_and_add_summary(demo_study, tmp_path):
    result = CliRunner().invoke(main, ["composition", str(demo_study.root), "--wave", "2025-Q4"])
    assert result.exit_code == 0, result.output
    assert "frequency: shifted" in result.output and "area: no significant shift" in result.output
    from tracker.demo import build_demo

    _, reports = build_demo(tmp_path / "d")
    q4 = [r for r in reports if r.label == "2025-Q4"][0]
    assert any("frequency: shifted" in line for line in q4.lines())


# -- the mix split ---------------------------------------------------------------------------

def test_kitagawa_parts_sum_to_the_total_and_hand_examples():
    # Kitagawa (1955): the parts add up exactly (identity); hand examples
    s_a, p_a, s_b, p_b = np.array([0.5, 0.5]), np.array([0.8, 0.4]), np.array([0.7, 0.3]), np.array([0.8, 0.4])
    mix, within = kitagawa(s_a, p_a, s_b, p_b)  # same rates, new mix: the whole change is mix
    total = (s_b * p_b).sum() - (s_a * p_a).sum()
    assert within == 0.0 and mix == pytest.approx(total, abs=1e-15) and total == pytest.approx(0.08)
    mix, within = kitagawa(s_a, p_a, s_a, np.array([0.7, 0.5]))  # same mix, new rates: none is mix
    assert mix == 0.0 and within == pytest.approx(0.0, abs=1e-15)
    mix, within = kitagawa(s_a, p_a, s_a, np.array([0.9, 0.5]))
    assert mix == 0.0 and within == pytest.approx(0.1)
    rng = np.random.default_rng(7)
    for _ in range(50):
        s1, s2 = rng.dirichlet(np.ones(4)), rng.dirichlet(np.ones(4))
        q1, q2 = rng.random(4), rng.random(4)
        mix, within = kitagawa(s1, q1, s2, q2)
        assert mix + within == pytest.approx((s2 * q2).sum() - (s1 * q1).sum(), abs=1e-14)


def test_bad_mix_group_is_refused(demo_study):
    with pytest.raises(TrackerError, match="^mix colour: not a group of this study"):
        demo_study.changes(mix="colour")
