"""Whole distributions and subgroups compared within a wave, through the command line.

The statistics are checked against R's survey package in tests/test_against_r.py (svymean on a
factor, svyquantile's Woodruff intervals, svyby + svycontrast, regTermTest). Here: the commands
give exactly what the library computes, the parts agree with the estimates the tool already
checks (a top-2 box is the sum of its two codes' shares, to rounding), the verdicts agree with
their intervals, and bad requests get a message, not a traceback.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from tracker.answers import answer_shares, number_summary
from tracker.cli import main
from tracker.within import GAP_VERDICTS, compare_within


def _csv(*args) -> pd.DataFrame:
    done = CliRunner().invoke(main, [str(a) for a in args] + ["--format", "csv"])
    assert done.exit_code == 0, done.output
    return pd.read_csv(io.StringIO(done.output), keep_default_na=False, na_values=[""])


def test_every_code_adds_up_and_a_top2_box_is_two_codes(demo_study):
    # common practice, no source: a question's code shares sum to one, and a share of codes
    # [4, 5] is the sum of the two codes' shares in the same base (both are ratios of the same sums)
    shares = answer_shares(demo_study, "overall", waves=["2025-Q2"], by=["area"])
    sums = shares.groupby(["group", "subgroup", "in_base"])["value"].sum()
    np.testing.assert_allclose(sums.to_numpy(), 1.0, rtol=0, atol=1e-12)
    valid = shares[shares["in_base"] == "valid answers"].set_index(["subgroup", "code"])
    est = demo_study.estimates(metrics=["satisfied"], waves=["2025-Q2"], by=["area"]).set_index("subgroup")
    for sub in est.index:
        two = valid.loc[(sub, "4"), "value"] + valid.loc[(sub, "5"), "value"]
        assert two == pytest.approx(est.loc[sub, "value"], rel=1e-12)
        assert valid.loc[(sub, "4"), "base"] == est.loc[sub, "base"]
    dk = shares[shares["missing_code"]]
    assert set(dk["in_base"]) == {"with missing codes"} and set(dk["answer"]) == {"Don't know"}


def test_the_answers_command_writes_what_the_library_computes(demo_study):
    got = _csv("answers", demo_study.root, "overall", "--wave", "2025-Q2", "--by", "area")
    want = answer_shares(demo_study, "overall", waves=["2025-Q2"], by=["area"])
    assert list(got.columns) == list(want.columns)
    np.testing.assert_allclose(got["value"], want["value"], rtol=1e-12)
    np.testing.assert_allclose(got["se"], want["se"], rtol=1e-12)
    only = _csv("answers", demo_study.root, "overall", "--wave", "2025-Q2", "--base", "valid")
    assert set(only["in_base"]) == {"valid answers"}
    numbers = _csv("answers", demo_study.root, "age", "--wave", "2025-Q2", "--by", "total")
    want = number_summary(demo_study, "age", waves=["2025-Q2"], by=[])
    np.testing.assert_allclose(numbers["value"], want["value"], rtol=1e-12)
    assert list(numbers["statistic"])[:5] == ["mean", "standard deviation", "lower quartile", "median",
                                              "upper quartile"]


def test_gaps_agree_with_their_adjusted_intervals_and_the_command(demo_study):
    result = compare_within(demo_study, wave="2025-Q2")
    t = result.table
    assert set(t["verdict"]) <= set(GAP_VERDICTS)
    pairs = t[t["comparison"] != "across all levels"]
    tested = pairs[pairs["verdict"] != "not compared"]
    outside = (tested["adjusted_low"] > 0) | (tested["adjusted_high"] < 0)
    assert (outside == tested["verdict"].isin(["higher", "lower"])).all()
    assert ((tested["verdict"] == "higher") == (outside & (tested["difference"] > 0))).all()
    # a level against the rest and the rest against it are the same test (one family, its own rows)
    assert len(pairs[pairs["comparison"] == "against the rest"]) == len(demo_study.pick_metrics()) * sum(
        len(demo_study.codebook.groups[g].levels) for g in demo_study.pick_groups())
    got = _csv("gaps", demo_study.root, "--wave", "2025-Q2", "--all")
    assert len(got) == len(t)
    np.testing.assert_allclose(got["p_adjusted"], t["p_adjusted"], rtol=1e-9)
    assert result.n_tests == int(t["p_adjusted"].notna().sum())


@pytest.mark.parametrize("args, says", [
    (["answers", "{root}", "no_such_question"], "variable 'no_such_question' is not in the codebook"),
    (["answers", "{root}", "comments"], "is a text variable"),
    (["gaps", "{root}", "--wave", "1999-Q9"], "wave '1999-Q9' is not stored"),
    (["gaps", "{root}", "--adjust", "bh", "--metric", "no_such_metric"], "no_such_metric"),
])
def test_bad_requests_get_a_message_and_exit_one(demo_study, args, says):
    done = CliRunner().invoke(main, [a.format(root=demo_study.root) for a in args])
    assert done.exit_code == 1, done.output
    assert says in done.output and "Traceback" not in done.output


def test_a_number_with_no_values_in_a_wave_is_named(tmp_path):
    from tests.conftest import EXAMPLE_CODEBOOK, example_wave
    from tracker import Study

    # age asked only from a later wave: the wave before has no age column at all
    text = EXAMPLE_CODEBOOK.read_text().replace("    range: [16, 99]\n", "    range: [16, 99]\n    first_wave: 2026-Q1\n")
    (tmp_path / "book.yaml").write_text(text)
    study = Study.create(tmp_path / "s", tmp_path / "book.yaml")
    frame = example_wave(n=80, seed=2).drop(columns=["age"])
    frame.to_csv(tmp_path / "w.csv", index=False)
    study.add(tmp_path / "w.csv", "2025-Q3", "2025-08-15")
    done = CliRunner().invoke(main, ["answers", str(study.root), "age"])
    assert done.exit_code == 1 and "age has no values in wave 2025-Q3" in done.output


def test_a_split_level_with_nobody_is_not_compared(tmp_path):
    from tests.conftest import EXAMPLE_CODEBOOK, example_wave
    from tracker import Study

    (tmp_path / "book.yaml").write_text(EXAMPLE_CODEBOOK.read_text())
    study = Study.create(tmp_path / "s", tmp_path / "book.yaml")
    frame = example_wave(n=120, seed=5)
    frame["site"] = frame["site"].where(frame["site"] != 3, 1)  # nobody at the third site
    frame.to_csv(tmp_path / "w.csv", index=False)
    study.add(tmp_path / "w.csv", "2025-Q3", "2025-08-15")
    site = next(g for g, grp in study.codebook.groups.items() if grp.variable == "site")
    t = compare_within(study, by=[site]).table
    empty = t[(t["base_first"] == 0) | (t["base_second"] == 0)]
    assert len(empty) and set(empty["verdict"]) == {"not compared"} and empty["p_adjusted"].isna().all()
    across = t[t["comparison"] == "across all levels"]
    assert across["p_raw"].notna().any()  # the two sites with respondents are still compared


def test_gap_changes_through_the_command_and_their_verdict_words(demo_study):
    from tracker.changes import VERDICTS
    from tracker.gapshift import gap_shifts

    result = gap_shifts(demo_study, wave="2025-Q4", against="2025-Q3", metrics=["satisfied", "staff_good"])
    t = result.table
    gaps = t[t["test"] != "slopes differ"]
    assert set(gaps["verdict"]) <= set(VERDICTS) and set(t[t["test"] == "slopes differ"]["verdict"]) <= set(
        GAP_VERDICTS)
    np.testing.assert_allclose(gaps["change"], gaps["gap_to"] - gaps["gap_from"], rtol=1e-12)
    # independent waves: the change's variance is the sum of the two gaps' (each checked against R)
    within_to = compare_within(demo_study, wave="2025-Q4", metrics=["satisfied", "staff_good"]).table
    within_from = compare_within(demo_study, wave="2025-Q3", metrics=["satisfied", "staff_good"]).table
    key = ["metric", "first", "second"]
    pair = within_to[within_to["comparison"] != "across all levels"].merge(
        within_from[within_from["comparison"] != "across all levels"], on=key, suffixes=("_to", "_from"))
    both = gaps.merge(pair, on=key)
    assert len(both) == len(gaps) and set(gaps["covariance_from"]) == {"none"}
    np.testing.assert_allclose(both["se"] ** 2, both["se_to"] ** 2 + both["se_from"] ** 2, rtol=1e-10)
    got = _csv("gaps", demo_study.root, "--wave", "2025-Q4", "--against", "2025-Q3", "--metric", "satisfied",
               "--metric", "staff_good", "--all")
    np.testing.assert_allclose(got["p_adjusted"], t["p_adjusted"], rtol=1e-9)


# -- drivers ---------------------------------------------------------------------------------------

ATTRS = ["on_time_good", "clean_good", "staff_good"]


def test_the_drivers_command_writes_what_the_library_fits(demo_study):
    from tracker.drivers import fit_drivers

    fit = fit_drivers(demo_study, "satisfied", ATTRS, waves=demo_study.labels[-2:])
    args = ["drivers", demo_study.root, "--headline", "satisfied", *sum((["--attribute", a] for a in ATTRS), []),
            "--last", "2"]
    got = _csv(*args)
    np.testing.assert_allclose(got["raw_weight"], fit.importance["raw_weight"], rtol=1e-12)
    assert got["raw_weight"].sum() == pytest.approx(fit.r2, rel=1e-10)  # the parts add up to R^2
    coef = _csv(*args, "--coefficients")
    assert list(coef["term"]) == ["(intercept)", *ATTRS]
    # reference: statsmodels' weighted least squares gives the same coefficients (the design only
    # changes the SEs, checked against R's svyglm in tests/test_against_r.py)
    import statsmodels.api as sm

    from tracker.cells import metric_matrix
    from tracker.estimates import weights_of

    Ys, ws = [], []
    for w in demo_study.labels[-2:]:
        table = demo_study.load(w)
        Y, E = metric_matrix(demo_study.codebook, table, demo_study.pick_metrics(["satisfied", *ATTRS]))
        keep = E.all(axis=1)
        Ys.append(Y[keep])
        ws.append(weights_of(demo_study.codebook, table)[keep])
    Y, wt = np.concatenate(Ys), np.concatenate(ws)
    ref = sm.WLS(Y[:, 0], sm.add_constant(Y[:, 1:]), weights=wt).fit()
    np.testing.assert_allclose(coef["coefficient"], ref.params, rtol=1e-9)


def test_importance_over_two_periods_is_one_family(demo_study):
    from tracker.changes import VERDICTS
    from tracker.drivers import importance_shift

    t = importance_shift(demo_study, "satisfied", ATTRS, recent=2)
    assert set(t["verdict"]) <= set(VERDICTS)
    np.testing.assert_allclose(t["change"], t["raw_weight_to"] - t["raw_weight_from"], rtol=1e-12)
    assert t["adjusted_level"].nunique() == 1


@pytest.mark.parametrize("attrs, says", [
    (["on_time_good", "on_time_good"], "collinear"),
    (["satisfied", "clean_good"], "is the headline"),
    (["no_such_metric", "clean_good"], "no_such_metric"),
])
def test_driver_sets_that_cannot_be_fitted_are_named(demo_study, attrs, says):
    args = ["drivers", demo_study.root, "--headline", "satisfied", *sum((["--attribute", a] for a in attrs), [])]
    done = CliRunner().invoke(main, [str(a) for a in args])
    assert done.exit_code == 1 and says in done.output and "Traceback" not in done.output, done.output


def test_a_constant_attribute_is_named_with_its_wave(tmp_path):
    from tests.conftest import EXAMPLE_CODEBOOK, example_wave
    from tracker import Study
    from tracker.drivers import fit_drivers

    (tmp_path / "book.yaml").write_text(EXAMPLE_CODEBOOK.read_text())
    study = Study.create(tmp_path / "s", tmp_path / "book.yaml")
    frame = example_wave(n=150, seed=7)
    frame["cleanliness"] = 4  # everyone gives the same answer
    frame.to_csv(tmp_path / "w.csv", index=False)
    study.add(tmp_path / "w.csv", "2025-Q3", "2025-08-15")
    metrics = list(study.codebook.metrics)
    clean = next(m for m, spec in study.codebook.metrics.items() if spec.variable == "cleanliness")
    head = next(m for m in metrics if m != clean and study.codebook.metrics[m].variable == "satisfaction")
    other = next(m for m in metrics if m not in (clean, head))
    with pytest.raises(Exception, match=f"metric {clean} has the same value for every respondent"):
        fit_drivers(study, head, [clean, other])


# -- in the brief --------------------------------------------------------------------------------

def _planted(tmp_path, drivers: bool):
    """Two waves of the example study in which Ashby Park's satisfaction falls far from the
    others' (a gap that moves), and satisfaction follows the recommend score (a driver)."""
    from tests.conftest import EXAMPLE_CODEBOOK, example_wave
    from tracker import Study

    text = EXAMPLE_CODEBOOK.read_text()
    if drivers:
        text = text.replace("\nprofile:", "\ndrivers: {headline: satisfaction_mean, attributes: [satisfied, "
                                          "recommend_balance]}\nprofile:")
    (tmp_path / "book.yaml").write_text(text)
    study = Study.create(tmp_path / "s", tmp_path / "book.yaml")
    rng = np.random.default_rng(12)
    for k, (label, date) in enumerate((("2025-Q3", "2025-08-15"), ("2025-Q4", "2025-11-15"))):
        frame = example_wave(n=900, seed=20 + k)
        frame["recommend"] = np.clip(2 * frame["satisfaction"].where(frame["satisfaction"] != 9, 3)
                                     + rng.integers(-1, 2, len(frame)), 0, 10)
        if k == 1:
            ashby = frame["site"] == 3
            frame.loc[ashby, "satisfaction"] = rng.choice([1, 2], int(ashby.sum()))
        frame.to_csv(tmp_path / f"{label}.csv", index=False)
        study.add(tmp_path / f"{label}.csv", label, date)
    return study


def test_the_brief_says_which_gaps_moved_and_what_goes_with_the_headline(tmp_path):
    from tracker.brief import build_brief, render_markdown

    study = _planted(tmp_path, drivers=True)
    brief = build_brief(study, charts=False)
    gaps = [i for i in brief.gap_moves if i.metric == "satisfied" and i.subgroup == "Ashby Park"]
    assert gaps and gaps[0].mark == "fall" and "the gap between Ashby Park and rest of the sample" in gaps[0].text
    assert "An association, not a cause." in gaps[0].text
    assert brief.drivers and "an attribute that goes with the headline may not move it" in brief.drivers[0].text
    assert {i.metric for i in brief.drivers[1:]} == {"satisfied", "recommend_balance"}
    md = render_markdown(brief)
    assert "## Gaps between subgroups that moved" in md and "## What goes with the headline" in md


def test_no_driver_section_without_declared_drivers(tmp_path):
    from tracker.brief import build_brief

    brief = build_brief(_planted(tmp_path, drivers=False), charts=False)
    assert brief.drivers == ()


def test_a_numbers_bands_are_shares_of_those_with_a_value(demo_study):
    # reference: numpy's weighted mean of "in the band" among respondents with an age (common practice, no source)
    got = number_summary(demo_study, "age", waves=["2025-Q2"], by=[])
    bands = got[got["statistic"].str.startswith("share ")]
    table = demo_study.load("2025-Q2")
    age, w = table["age"].to_numpy(float), table[demo_study.codebook.weight].to_numpy(float)
    ok = np.isfinite(age)
    group = next(g for g in demo_study.codebook.groups.values() if g.variable == "age" and g.bands)
    for label, (lo, hi) in group.bands.items():
        row = bands[bands["statistic"].str.startswith(f"share {label} ")]
        inside = (age >= lo) & (age <= hi)
        assert row["value"].iloc[0] == pytest.approx(np.average(inside[ok], weights=w[ok]), rel=1e-12)
    assert set(bands["kind"]) == {"share"} and set(got["kind"]) == {"share", "mean"}


def test_the_answers_tests_name_their_verdicts(demo_study):
    from tracker.answers import distribution_tests

    t = distribution_tests(demo_study, "overall", waves=["2025-Q2"])
    assert list(t["group"]) == demo_study.pick_groups() and set(t["verdict"]) <= set(GAP_VERDICTS)
    got = _csv("answers", demo_study.root, "overall", "--wave", "2025-Q2", "--tests")
    np.testing.assert_allclose(got["f"], t["f"], rtol=1e-12)


def test_the_slopes_test_is_cochrans_q_as_statsmodels_computes_it(demo_study):
    # reference: statsmodels.stats.meta_analysis.combine_effects(...).q, Cochran's Q of the
    # levels' slopes and their variances (taken from the trend model the tool fits)
    from statsmodels.stats.meta_analysis import combine_effects

    from tracker.gapshift import slope_heterogeneity
    from tracker.trends import _series_arrays, meta_regression

    metrics = demo_study.pick_metrics(["staff_good"])
    got = slope_heterogeneity(demo_study, metrics, ["area"]).iloc[0]
    est = demo_study.estimates(metrics=["staff_good"], by=["area"])
    est = est[est["group"] != "total"]
    series, _w, y, v, ok, years = _series_arrays(est, None)
    k = ok.sum(axis=1)
    tbar = (ok * years[None, :]).sum(axis=1) / k
    X = np.stack([np.ones(y.shape), np.where(ok, years[None, :] - tbar[:, None], 0.0)], axis=2)
    fit = meta_regression(y, np.where(ok, v, 1.0), X, ok)
    ref = combine_effects(fit["beta"][:, 1], fit["cov"][:, 1, 1])
    assert got["statistic"] == pytest.approx(ref.q, rel=1e-12) and got["df"] == len(series) - 1
