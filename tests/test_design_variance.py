"""Design-correct variance: single-cluster strata, Kish design effect, Korn-Graubard
intervals, covariance across waves and the detectable change.

References are named beside each check: the svy package and samplics (test-only
dependencies), statsmodels and scipy. Generated respondents only feed those references.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from tracker import Study, TrackerError

from .conftest import snapshot

BOOK = """\
title: design test
id: rid
weight: w
strata: st
clusters: cl
{extra}
variables:
  q:
    label: A five-point rating
    type: scale
    codes: {{1: a, 2: b, 3: c, 4: d, 5: e}}
  g:
    label: Group
    type: category
    codes: {{1: one, 2: two}}
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
"""


def clustered_wave(rng, n_strata=5, clusters=3, lone=(), prefix="r", size=(6, 14), effects=None):
    """Respondents in strata x clusters; strata listed in ``lone`` get one cluster."""
    rows = []
    for h in range(n_strata):
        for c in range(1 if h in lone else clusters):
            effect = rng.normal(0, 0.6) if effects is None else effects[(h, c)]
            for _ in range(rng.integers(*size)):
                q = int(np.clip(np.round(3 + effect + rng.normal(0, 1.1)), 1, 5))
                rows.append({"st": f"S{h}", "cl": f"S{h}-C{c}", "w": round(float(rng.lognormal(0, 0.4)), 5),
                             "q": q, "g": int(rng.integers(1, 3))})
    frame = pd.DataFrame(rows)
    frame.insert(0, "rid", [f"{prefix}{i}" for i in range(len(frame))])
    return frame


def make(tmp_path, waves, extra="", name="s"):
    book = tmp_path / f"{name}.yaml"
    book.write_text(BOOK.format(extra=extra))
    study = Study.create(tmp_path / name, book)
    reports = []
    for i, frame in enumerate(waves):
        path = tmp_path / f"{name}-w{i}.csv"
        frame.to_csv(path, index=False)
        reports.append(study.add(path, f"W{i + 1}", f"2025-{i + 1:02d}-15"))
    return Study(tmp_path / name), reports


def svy_se(frame, method, y, by=None):
    warnings.simplefilter("ignore")
    import polars as pl
    import svy

    sample = svy.Sample(pl.from_pandas(frame.assign(y=y)), svy.Design(stratum="st", psu="cl", wgt="w",
                                                                      singleton=method))
    out = sample.estimation.mean("y", by=by).to_polars()
    return out


@pytest.mark.parametrize("rule, svy_rule", [("centre", "center"), ("average", "scale"), ("certainty", "skip")])
def test_single_cluster_rules_match_the_svy_package(tmp_path, rule, svy_rule):
    # svy's singleton rules (test-only dependency): center = R's "adjust", scale = R's
    # "average", skip = certainty; value and SE in total and in a subgroup, to 1e-10
    rng = np.random.default_rng(8)
    frame = clustered_wave(rng, lone=(1, 4))
    study, _ = make(tmp_path, [frame], extra=f"single_cluster_strata: {rule}")
    est = study.estimates(metrics=["avg", "top2"]).set_index(["metric", "group", "subgroup"])
    for metric, y in (("avg", frame["q"].astype(float)), ("top2", frame["q"].isin([4, 5]).astype(float))):
        ref = svy_se(frame, svy_rule, y.to_numpy())
        row = est.loc[(metric, "total", "Total")]
        assert row["value"] == pytest.approx(ref["est"][0], abs=1e-10)
        assert row["se"] == pytest.approx(ref["se"][0], abs=1e-10)
        ref = svy_se(frame, svy_rule, y.to_numpy(), by="g").sort("g")
        for code, label in ((1, "one"), (2, "two")):
            row = est.loc[(metric, "g", label)]
            assert row["se"] == pytest.approx(ref["se"][code - 1], abs=1e-10)


def test_certainty_rule_matches_samplics_skip(tmp_path):
    # samplics TaylorEstimator(single_psu=SinglePSUEst.skip): the lone strata add nothing
    warnings.simplefilter("ignore")
    from samplics import PopParam, SinglePSUEst, TaylorEstimator

    rng = np.random.default_rng(9)
    frame = clustered_wave(rng, lone=(0,))
    study, _ = make(tmp_path, [frame], extra="single_cluster_strata: certainty")
    row = study.estimates(metrics=["avg"], by=[]).iloc[0]
    e = TaylorEstimator(PopParam.mean)
    e.estimate(frame["q"].to_numpy(float), samp_weight=frame["w"].to_numpy(), stratum=frame["st"].to_numpy(),
               psu=frame["cl"].to_numpy(), single_psu=SinglePSUEst.skip)
    assert row["se"] == pytest.approx(e.stderror, abs=1e-10)
    # samplics refuses by default (single_psu=error), as our 'refuse' rule does
    with pytest.raises(ValueError, match="Only one PSU"):
        TaylorEstimator(PopParam.mean).estimate(frame["q"].to_numpy(float), samp_weight=frame["w"].to_numpy(),
                                                stratum=frame["st"].to_numpy(), psu=frame["cl"].to_numpy())


def test_a_lone_cluster_is_never_a_silent_zero(tmp_path):
    # common practice, no source: when every stratum holds one cluster the default rule
    # still gives a positive SE, and add names the strata
    rng = np.random.default_rng(10)
    frame = clustered_wave(rng, n_strata=6, lone=tuple(range(6)))
    study, (report,) = make(tmp_path, [frame])
    est = study.estimates(metrics=["avg"], by=[]).iloc[0]
    assert est["se"] > 0 and np.isfinite(est["ci_low"])
    text = "\n".join(report.warnings)
    assert "6 stratum(s) hold a single cluster: S0, S1, S2, S3, S4, S5" in text
    assert "single_cluster_strata: centre" in text


def test_check_names_single_cluster_strata_and_refuse_rule_stops_add(tmp_path):
    rng = np.random.default_rng(12)
    frame = clustered_wave(rng, lone=(2,))
    frame.loc[(frame["st"] == "S3") & (frame["cl"] != "S3-C0"), "g"] = 1  # subgroup two sits in one cluster of S3
    study, _ = make(tmp_path, [], extra="single_cluster_strata: refuse")
    path = tmp_path / "w.csv"
    frame.to_csv(path, index=False)
    report = study.check(path, wave="W1", date="2025-01-15")
    assert not report.ok
    lines = report.lines()
    assert any(line.startswith("error: ") and "w.csv, column st: 1 stratum(s) hold a single cluster: S2; the "
               "codebook refuses" in line for line in lines)
    assert any("subgroup g = two: its respondents sit in a single cluster in 1 stratum(s): S3" in line
               for line in lines)
    before = snapshot(tmp_path / "s")
    with pytest.raises(TrackerError, match="hold a single cluster: S2"):
        study.add(path, "W1", "2025-01-15")
    assert snapshot(tmp_path / "s") == before


def test_design_effect_is_kish_and_design_base_is_p_q_over_v(tmp_path):
    # Kish (1965): deff = V / (p(1-p)/n), with V recomputed from samplics' SE; the design
    # base p(1-p)/V is the NCHS effective sample size
    warnings.simplefilter("ignore")
    from samplics import PopParam, TaylorEstimator

    rng = np.random.default_rng(14)
    frame = clustered_wave(rng, n_strata=8, clusters=2, size=(10, 25))
    study, _ = make(tmp_path, [frame])
    row = study.estimates(metrics=["top2"], by=[]).iloc[0]
    y = frame["q"].isin([4, 5]).to_numpy(float)
    e = TaylorEstimator(PopParam.mean)
    e.estimate(y, samp_weight=frame["w"].to_numpy(), stratum=frame["st"].to_numpy(), psu=frame["cl"].to_numpy())
    p, n = float(e.point_est), len(frame)
    assert row["design_effect"] == pytest.approx(e.stderror**2 / (p * (1 - p) / n), rel=1e-9)
    # never above the Kish base of the weights (tracker.methods.bases.design_base)
    kish = frame["w"].sum() ** 2 / (frame["w"] ** 2).sum()
    assert row["design_base"] == pytest.approx(min(p * (1 - p) / e.stderror**2, kish), rel=1e-9)
    assert row["df"] == 16 - 8  # clusters minus strata (all clusters hold respondents)


def test_korn_graubard_interval_equals_statsmodels_beta(tmp_path):
    # statsmodels proportion_confint(method="beta") on the df-adjusted effective base
    # n* = min(p(1-p)/V, n) x (t_{n-1} / t_df)^2 (Korn & Graubard 1998; NCHS 2017)
    from statsmodels.stats.proportion import proportion_confint

    rng = np.random.default_rng(15)
    frame = clustered_wave(rng, n_strata=4, clusters=3)
    study, _ = make(tmp_path, [frame])
    est = study.estimates(metrics=["top2"], interval="korn-graubard")
    for row in est.itertuples():
        p, v, n, df = row.value, row.se**2, row.base, row.df
        n_star = min(p * (1 - p) / v, row.effective_base) * min(1.0, (stats.t.ppf(0.975, n - 1) / stats.t.ppf(0.975, df)) ** 2)
        lo, hi = proportion_confint(p * n_star, n_star, alpha=0.05, method="beta")
        assert (row.ci_low, row.ci_high) == (pytest.approx(lo, abs=1e-10), pytest.approx(hi, abs=1e-10))
    wilson = study.estimates(metrics=["top2"])
    assert not np.allclose(wilson["ci_low"], est["ci_low"])  # the choice is real
    with pytest.raises(TrackerError, match="^interval nope"):
        study.estimates(interval="nope")


def test_cross_wave_covariance_with_full_overlap_is_the_joint_design_covariance():
    # Wolter (2007, ch. 6): when both waves use the same PSUs, the covariance of the two
    # totals is the off-diagonal of the with-replacement covariance of the stacked columns
    from tracker.methods import cross_wave_covariance, taylor_covariance
    from tracker.methods.variance import PsuTotals

    rng = np.random.default_rng(16)
    stratum = np.repeat(np.arange(5), 4)
    a = rng.normal(size=(20, 3))
    b = 0.6 * a + rng.normal(size=(20, 3))
    keys = np.array([f"{h}|{i}" for i, h in enumerate(stratum)])
    cov, shared = cross_wave_covariance(PsuTotals(a, stratum, 5), keys, PsuTotals(b, stratum, 5), keys)
    joint = taylor_covariance(np.column_stack([a, b]), stratum, np.arange(20))
    assert shared == 20
    assert np.allclose(cov, np.diag(joint[:3, 3:]), atol=1e-12)
    # no shared PSU, no covariance
    other = np.array([f"x{k}" for k in keys])
    cov, shared = cross_wave_covariance(PsuTotals(a, stratum, 5), keys, PsuTotals(b, stratum, 5), other)
    assert shared == 0 and not cov.any()


def test_changes_take_the_covariance_of_recurring_clusters(tmp_path):
    # common practice, no source: recurring clusters with lasting effects make the waves'
    # estimates covary; the SE of the change is then below the independent-waves SE
    rng = np.random.default_rng(17)
    effects = {(h, c): rng.normal(0, 0.9) for h in range(5) for c in range(3)}
    a = clustered_wave(rng, effects=effects, prefix="a")
    b = clustered_wave(rng, effects=effects, prefix="b")
    study, _ = make(tmp_path, [a, b], extra="waves_share_clusters: true", name="s1")
    result = study.changes(by=[])
    assert any("15 clusters appear in both waves" in n for n in result.notes)
    row = result.table.set_index("metric").loc["avg"]
    assert row["covariance"] > 0 and row["covariance_from"] == "shared clusters"
    assert row["df"] == 15 - 5  # the paired design: the 15 clusters held by both waves minus their 5 strata
    est = study.estimates(metrics=["avg"], by=[])
    assert row["se"] < np.sqrt((est["se"] ** 2).sum())
    for extra, name in (("waves_share_clusters: false", "s2"), ("", "s3")):
        off, _ = make(tmp_path, [a, b], extra=extra, name=name)
        result = off.changes(by=[])
        assert not any("clusters appear in both waves (the codebook" in n for n in result.notes)
        said = any("15 cluster labels appear in both waves; they are taken as different clusters" in n
                   for n in result.notes)
        assert said == (extra == "")  # a note only where the codebook does not say
        row = result.table.set_index("metric").loc["avg"]
        assert row["se"] == pytest.approx(np.sqrt((est["se"] ** 2).sum())) and row["covariance_from"] == "none"


def test_detectable_share_change_has_80_percent_power_under_its_own_variance():
    # statsmodels normal_power: at the reported detectable change, with the SE the changed
    # share would have, the normal power is 0.80 (rise for p < 0.5, fall for p > 0.5)
    from statsmodels.stats.power import normal_power

    from tracker.methods import min_detectable_share_change

    for p0 in (0.03, 0.1, 0.3, 0.5, 0.8):
        n0 = n1 = 600.0
        v0 = p0 * (1 - p0) / n0
        mde, rise, fall = min_detectable_share_change(p0, v0, n1)
        for delta, sign in ((rise, 1), (fall, -1)):
            if np.isnan(delta):
                continue
            se_alt = np.sqrt(v0 + (p0 + sign * delta) * (1 - p0 - sign * delta) / n1)
            assert normal_power(delta / se_alt, 1, 0.05) == pytest.approx(0.80, abs=1e-3)
        assert mde == pytest.approx(np.nanmax([rise, fall]))
        if p0 < 0.5:
            assert rise > fall
    # at p = 0.5 and equal bases it is within 1/sqrt(1 + k^2/n) of the symmetric formula
    # (statsmodels NormalIndPower): the variance shrinks as the share moves away from 0.5
    from statsmodels.stats.power import NormalIndPower

    mde = min_detectable_share_change(0.5, 0.25 / 600, 600.0)[0]
    effect = NormalIndPower().solve_power(nobs1=600, ratio=1, alpha=0.05, power=0.8)
    k2 = (stats.norm.ppf(0.975) + stats.norm.ppf(0.8)) ** 2
    assert float(mde) == pytest.approx(effect * np.sqrt(0.25) / np.sqrt(1 + k2 / 600), rel=1e-3)


def test_estimates_command_offers_the_korn_graubard_interval(tmp_path):
    from click.testing import CliRunner

    from tracker.cli import main

    rng = np.random.default_rng(18)
    study, _ = make(tmp_path, [clustered_wave(rng)])
    runner = CliRunner()
    args = ["estimates", str(tmp_path / "s"), "--metric", "top2", "--by", "total", "--format", "json"]
    kg = pd.read_json(__import__("io").StringIO(runner.invoke(main, args + ["--interval", "korn-graubard"]).output))
    api = study.estimates(metrics=["top2"], by=[], interval="korn-graubard")
    assert np.allclose(kg["ci_low"], api["ci_low"], atol=1e-12) and np.allclose(kg["ci_high"], api["ci_high"])
    bad = runner.invoke(main, args + ["--interval", "exact"])
    assert bad.exit_code == 2 and "'exact' is not one of 'wilson', 'korn-graubard'" in bad.output


def test_estimation_refuses_and_names_the_right_stratum():
    # the estimation path (e.g. a library call on rows that never went through add) names
    # the stratum holding one cluster, whatever the order strata first appear in
    from tracker.codebook import parse_codebook
    from tracker.estimates import cell_stats

    book = parse_codebook(BOOK.format(extra="single_cluster_strata: refuse"))
    rng = np.random.default_rng(19)
    frame = clustered_wave(rng, n_strata=3, lone=(0,))
    frame["st"] = frame["st"].map({"S0": "Z-last", "S1": "A-first", "S2": "M-mid"})
    with pytest.raises(TrackerError, match="strata Z-last hold a single cluster"):
        cell_stats(book, frame, list(book.metrics.values()), [])
