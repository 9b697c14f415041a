"""Cell by cell against R's survey package (Lumley; Debian's r-cran-survey), the project's
outside reference, on the California school data the package ships (``data(api)``):
the stratified sample ``apistrat``, the one-stage cluster sample ``apiclus1`` and the
two-stage ``apiclus2`` (first-stage variance, as R computes it without population sizes).

tests/r/api_reference.R exports the samples and R's values; each test builds tracker studies
from the same files. Where R is not installed the tests are skipped, except under CI
(CI=true), where `.ci/run` installs it and a missing R is a failure. Published values from
the package's own test outputs are checked without R in tests/test_published.py, on copies
of two samples (tests/data/api) that a test here ties to R's own.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from tracker import Study

HERE = Path(__file__).parent
# the same schools in both waves: a panel, and (for the cluster samples) the same districts
DESIGNS = {
    "apistrat": "strata: stype\npanel: true\n",
    "apiclus1": "clusters: dnum\nwaves_share_clusters: true\npanel: true\n",
    "apiclus2": "clusters: dnum\nwaves_share_clusters: true\npanel: true\n",
}
CODEBOOK = """title: California schools ({name}, R survey package data)
id: snum
weight: pw
{design}variables:
  stype:
    label: School type
    type: category
    codes: {{1: E, 2: H, 3: M}}
  sch_wide:
    label: Met the school-wide growth target
    type: category
    codes: {{1: "Yes", 2: "No"}}
  awards:
    label: Eligible for awards
    type: category
    codes: {{1: "Yes", 2: "No"}}
  api:
    label: Academic performance index
    type: number
    range: [0, 1000]
groups:
  stype: {{variable: stype}}
  awards: {{variable: awards}}
metrics:
  api_mean:
    label: Mean API
    variable: api
    mean: true
  target_met:
    label: Met the growth target
    variable: sch_wide
    share: [1]
"""


def _need_r():
    if shutil.which("Rscript") is None:
        if os.environ.get("CI"):
            pytest.fail("Rscript is not installed; .ci/run installs r-base-core and r-cran-survey")
        pytest.skip("R is not installed (apt-get install r-base-core r-cran-survey)")


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """R's values and the tracker studies built from the same files (two waves each: the
    1999 and the 2000 index of the same schools)."""
    _need_r()
    out = tmp_path_factory.mktemp("r")
    done = subprocess.run(["Rscript", str(HERE / "r" / "api_reference.R"), str(out)], capture_output=True,
                          text=True, timeout=600, check=False)
    if done.returncode == 0:  # then the distributions and within-wave comparisons, on the files it wrote
        done = subprocess.run(["Rscript", str(HERE / "r" / "within_reference.R"), str(out)], capture_output=True,
                              text=True, timeout=600, check=False)
    if done.returncode != 0:
        if os.environ.get("CI"):
            pytest.fail(f"R's survey package did not run: {done.stderr[-2000:]}")
        pytest.skip(f"R's survey package did not run: {done.stderr[-300:]}")
    studies = {}
    for name, design in DESIGNS.items():
        data = pd.read_csv(out / f"{name}.csv")
        (out / f"{name}.yaml").write_text(CODEBOOK.format(name=name, design=design))
        study = Study.create(out / name, out / f"{name}.yaml")
        for year, column, date in (("1999", "api99", "1999-06-30"), ("2000", "api00", "2000-06-30")):
            wave = data.drop(columns=["api00", "api99", "fpc"]).assign(api=data[column])
            wave.to_csv(out / f"{name}-{year}.csv", index=False)
            study.add(out / f"{name}-{year}.csv", year, date)
        studies[name] = study
    return pd.read_csv(out / "reference.csv"), studies


def _data_dir(reference) -> Path:
    """The folder holding R's exported files."""
    return next(iter(reference[1].values())).root.parent


def _study(folder: Path, name: str, text: str, waves, rake: bool = False):
    """A study made from codebook ``text`` with ``waves`` [(file, label, date)] added."""
    (folder / f"{name}.yaml").write_text(text)
    study = Study.create(folder / name, folder / f"{name}.yaml")
    for path, label, date in waves:
        study.add(path, label, date, rake=rake)
    return study


def _api_study(folder: Path, name: str, data: pd.DataFrame, text: str, years=("2000",), rake: bool = False):
    """A study of R's exported api sample ``data``: one wave per year (api = that year's score),
    written as CSV beside R's files, under codebook ``text``."""
    waves = []
    for year in years:
        path = folder / f"{name}-{year}.csv"
        wave = pd.concat([data.drop(columns=["api00", "api99", "fpc"]), data[f"api{year[2:]}"].rename("api")], axis=1)
        wave.to_csv(path, index=False)
        waves.append((path, year, f"{year}-06-30"))
    return _study(folder, name, text, waves, rake=rake)


def _replicate_spec(folder: Path, method: str, data: pd.DataFrame) -> str:
    """The codebook key of R's exported replicate weights for ``method`` (scales as R set them)."""
    scales = pd.read_csv(folder / f"rep_{method}_scales.csv")
    spec = f"replicates:\n  method: {method}\n  prefix: rw\n  count: {sum(c.startswith('rw') for c in data.columns)}\n"
    if method == "jkn":
        spec += f"  rscales: [{', '.join(repr(float(x)) for x in scales['rscales'])}]\n"
    if method == "bootstrap":  # as.svrepdesign sets the stratified bootstrap's scale from the design
        spec += f"  scale: {float(scales['scale'].iloc[0])!r}\n"
    return spec


def _cells(study, metric):
    est = study.estimates(metrics=[metric], waves=["2000"])
    return est.set_index(["group", "subgroup"])


@pytest.mark.parametrize("design", list(DESIGNS))
def test_values_ses_and_domain_df_equal_r(reference, design):
    ref, studies = reference
    r = ref[ref["design"] == design].set_index(["group", "subgroup"])
    mean, share = _cells(studies[design], "api_mean"), _cells(studies[design], "target_met")
    for key, row in r.iterrows():
        assert mean.loc[key, "base"] == row["n"], key
        np.testing.assert_allclose(mean.loc[key, "value"], row["api00"], rtol=1e-12)
        np.testing.assert_allclose(mean.loc[key, "se"], row["api00_se"], rtol=1e-10)
        np.testing.assert_allclose(share.loc[key, "value"], row["yes"], rtol=1e-12)
        np.testing.assert_allclose(share.loc[key, "se"], row["yes_se"], rtol=1e-10)
        assert mean.loc[key, "df"] == row["df"], key


@pytest.mark.parametrize("design", list(DESIGNS))
def test_paired_changes_equal_r_with_their_se_and_df(reference, design):
    """The same schools in 1999 and 2000: R's svycontrast of the two means in one design."""
    ref, studies = reference
    r = ref[ref["design"] == design].set_index(["group", "subgroup"])
    ch = studies[design].changes(wave="2000", against="1999", metrics=["api_mean"]).table
    ch = ch.set_index(["group", "subgroup"])
    for key, row in r.iterrows():
        np.testing.assert_allclose(ch.loc[key, "change"], row["change"], rtol=1e-10)
        np.testing.assert_allclose(ch.loc[key, "se"], row["change_se"], rtol=1e-10)
        assert ch.loc[key, "df"] == row["df"], key


@pytest.mark.parametrize("design", list(DESIGNS))
def test_korn_graubard_equals_r_on_the_same_effective_base(reference, design):
    """R's svyciprop(method="beta") on p(1-p)/V; the tool caps that base at the Kish base of
    the weights (never larger: a rare share's design variance is itself unstable), so where
    R's base is larger the tool's interval is Clopper-Pearson on the Kish base with the same
    degrees-of-freedom adjustment (statsmodels proportion_confint, method="beta")."""
    from scipy import stats
    from statsmodels.stats.proportion import proportion_confint

    ref, studies = reference
    r = ref[ref["design"] == design].set_index(["group", "subgroup"])
    est = studies[design].estimates(metrics=["target_met"], waves=["2000"], interval="korn-graubard")
    est = est.set_index(["group", "subgroup"])
    for key, row in r.iterrows():
        cell = est.loc[key]
        p, v = row["yes"], row["yes_se"] ** 2
        r_base = p * (1 - p) / v if v > 0 else np.inf  # a share of 0 or 1: no design base
        if r_base <= cell["effective_base"]:
            # R: n_eff = p(1-p)/V times min(1, (t_{n-1} / t_df)^2) with n the design's rows
            np.testing.assert_allclose([cell["ci_low"], cell["ci_high"]], [row["kg_low"], row["kg_high"]],
                                       rtol=2e-3 if key[0] != "total" else 1e-9)
        else:
            n, df = cell["base"], cell["df"]
            ratio = min(1.0, (stats.t.ppf(0.975, n - 1) / stats.t.ppf(0.975, df)) ** 2)
            base = cell["effective_base"] * ratio
            lo, hi = proportion_confint(p * base, base, alpha=0.05, method="beta")
            np.testing.assert_allclose([cell["ci_low"], cell["ci_high"]], [lo, hi], rtol=1e-9)


LONELY_RULES = {"adjust": "centre", "average": "average", "certainty": "certainty"}


@pytest.fixture(scope="module")
def lonely(reference, tmp_path_factory):
    out = tmp_path_factory.mktemp("lonely")
    data_dir = _data_dir(reference)
    studies = {}
    for r_rule, rule in LONELY_RULES.items():
        text = CODEBOOK.format(name="apiclus2 by county", design="strata: county\nclusters: dnum\n")
        data = pd.read_csv(data_dir / "lonely.csv")
        data.drop(columns=["api99", "fpc"]).rename(columns={"api00": "api"}).to_csv(out / "w.csv", index=False)
        studies[r_rule] = _study(out, rule, text + f"single_cluster_strata: {rule}\n",
                                 [(out / "w.csv", "2000", "2000-06-30")])
    return pd.read_csv(data_dir / "lonely_reference.csv"), studies


@pytest.mark.parametrize("r_rule", list(LONELY_RULES))
def test_each_one_cluster_rule_equals_r_in_total_and_in_subgroups(lonely, r_rule):
    """R's survey.lonely.psu = adjust / average / certainty on 17 one-district counties; the
    'average' rule per subgroup: the strata holding it over those of them with two or more
    clusters in the design."""
    ref, studies = lonely
    r = ref[ref["rule"] == r_rule].set_index(["group", "subgroup"])
    mean, share = _cells(studies[r_rule], "api_mean"), _cells(studies[r_rule], "target_met")
    for key, row in r.iterrows():
        np.testing.assert_allclose(mean.loc[key, "se"], row["api00_se"], rtol=1e-10, err_msg=str(key))
        np.testing.assert_allclose(share.loc[key, "se"], row["yes_se"], rtol=1e-10, err_msg=str(key))


FPC = {"apistrat": "population: {1: 4421, 2: 755, 3: 1018}\n", "apiclus1": "population: 757\n"}


@pytest.fixture(scope="module")
def with_fpc(reference, tmp_path_factory):
    out = tmp_path_factory.mktemp("fpc")
    data_dir = _data_dir(reference)
    studies = {}
    for name, key in FPC.items():
        studies[name] = _study(out, name, CODEBOOK.format(name=name, design=DESIGNS[name] + key),
                               [(data_dir / f"{name}-{year}.csv", year, f"{year}-06-30") for year in ("1999", "2000")])
    return pd.read_csv(data_dir / "fpc_reference.csv"), studies


def test_the_bundled_samples_are_r_s_own(reference):
    """tests/data/api (what tests/test_published.py checks the published values on without R)
    equals R's data(api) as this run exported it."""
    data_dir = _data_dir(reference)
    for name in ("apistrat", "apiclus1"):
        pd.testing.assert_frame_equal(pd.read_csv(HERE / "data" / "api" / f"{name}.csv"),
                                      pd.read_csv(data_dir / f"{name}.csv"), check_exact=True)


@pytest.mark.parametrize("design", list(FPC))
def test_the_finite_population_correction_equals_r_cell_by_cell(with_fpc, design):
    ref, studies = with_fpc
    r = ref[ref["design"] == design].set_index(["group", "subgroup"])
    mean, share = _cells(studies[design], "api_mean"), _cells(studies[design], "target_met")
    ch = studies[design].changes(wave="2000", against="1999", metrics=["api_mean"]).table.set_index(
        ["group", "subgroup"])
    for key, row in r.iterrows():
        np.testing.assert_allclose(mean.loc[key, "se"], row["api00_se"], rtol=1e-10, err_msg=str(key))
        np.testing.assert_allclose(share.loc[key, "se"], row["yes_se"], rtol=1e-10, err_msg=str(key))
        np.testing.assert_allclose(ch.loc[key, "se"], row["change_se"], rtol=1e-10, err_msg=str(key))


RAKED_METRICS = """  elementary:
    label: Elementary school
    variable: stype
    share: [1]
  award:
    label: Eligible for awards
    variable: awards
    share: [1]
targets:
  stype: {{E: {e!r}, H: {h!r}, M: {m!r}}}
  sch_wide: {{"Yes": {yes!r}, "No": {no!r}}}
rake: {{tolerance: 1.0e-12}}
"""


@pytest.fixture(scope="module")
def raked(reference, tmp_path_factory):
    """apiclus1 raked by `add --rake` to the population margins of R's tests/rakecheck.R
    (school type 4421 / 755 / 1018, school-wide target met 5122 of 6194)."""
    out = tmp_path_factory.mktemp("raked")
    data_dir = _data_dir(reference)
    studies = {}
    for with_fpc in (False, True):
        text = CODEBOOK.format(name="apiclus1 raked", design="clusters: dnum\n" + ("population: 757\n" if with_fpc
                                                                                   else ""))
        text = text.replace("groups:\n", "groups:\n  sch_wide: {variable: sch_wide}\n")
        text += RAKED_METRICS.format(e=4421 / 6194, h=755 / 6194, m=1018 / 6194, yes=5122 / 6194, no=1072 / 6194)
        studies[with_fpc] = _study(out, "fpc" if with_fpc else "plain", text,
                                   [(data_dir / "apiclus1-2000.csv", "2000", "2000-06-30")], rake=True)
    return pd.read_csv(data_dir / "raked_reference.csv"), pd.read_csv(data_dir / "raked_weights.csv"), studies


def test_raked_weights_equal_r(raked):
    """R's rake() weights, rescaled from R's population total (6194) to the design weights'
    sum (6194.001), which tracker's weights keep: equal to 1e-9."""
    _, weights, studies = raked
    stored = studies[False].load("2000").assign(snum=lambda t: t["snum"].astype(float).astype(int))
    both = stored.merge(weights, on="snum")
    assert len(both) == 183
    design_total = stored["pw"].sum()
    np.testing.assert_allclose(both["pw"], both["raked"] * design_total / 6194, rtol=1e-9)


def test_subgroups_compared_within_a_raked_wave_equal_r(reference, raked):
    """R's svycontrast on svyby(~api00, ~stype, covmat = TRUE) and regTermTest of the raked
    design (rake() to school type and the school-wide target, no fpc): each pair's difference
    and SE, and the Wald F across the three school types, with its df and p."""
    from tracker.within import compare_within

    study = raked[2][False]
    got = compare_within(study, wave="2000", metrics="api_mean", by="stype").table
    want = pd.read_csv(_data_dir(reference) / "raked_pairs.csv")
    for r in want.itertuples():
        if r.a == 0:
            row = got[got["comparison"] == "across all levels"].iloc[0]
            assert row["statistic"] == pytest.approx(r.F, rel=1e-7) and row["df"] == r.ddf
            assert row["p_raw"] == pytest.approx(r.p, rel=1e-6)
            continue
        row = got[(got["first"] == CODES[str(r.a)]) & (got["second"] == CODES[str(r.b)])].iloc[0]
        assert row["difference"] == pytest.approx(r.diff, rel=1e-9)
        assert row["se"] == pytest.approx(r.se, rel=1e-7)


def test_a_questions_answers_across_a_split_of_a_raked_wave_equal_svychisq(reference, raked):
    # reference: R's svychisq(~stype + awards) of apiclus1 raked by rake() (no fpc)
    from tracker.answers import distribution_tests

    want = pd.read_csv(_data_dir(reference) / "raked_svychisq.csv").iloc[0]
    got = distribution_tests(raked[2][False], "stype", waves=["2000"], by=["awards"]).iloc[0]
    np.testing.assert_allclose([got["f"], got["f_df_num"], got["f_df_den"], got["p_raw"]],
                               [want["f"], want["ndf"], want["ddf"], want["p"]], rtol=1e-7)


@pytest.mark.parametrize("with_fpc", [False, True], ids=["no fpc", "fpc"])
def test_raked_variance_equals_r_calibration_aware(raked, with_fpc):
    """R's rake() variance (the residuals of the regression on the margins' indicators):
    api00 641.23 with SE 23.942 (no fpc) and 23.704 (fpc, as tests/rakecheck.Rout.save), every
    share of the design to 1e-6, a raked margin's share (elementary, target met) with SE 0."""
    ref, _, studies = raked
    r = ref[ref["fpc"] == with_fpc].set_index(["group", "subgroup"])
    study = studies[with_fpc]
    cells = {m: _cells(study, m) for m in ("api_mean", "target_met", "elementary", "award")}
    total = cells["api_mean"].loc[("total", "Total")]
    assert round(total["value"], 2) == 641.23 and round(total["se"], 3) == (23.704 if with_fpc else 23.942)
    for key, row in r.iterrows():
        np.testing.assert_allclose(cells["api_mean"].loc[key, "value"], row["api00"], rtol=1e-9, err_msg=str(key))
        np.testing.assert_allclose(cells["api_mean"].loc[key, "se"], row["api00_se"], rtol=1e-6, err_msg=str(key))
        for metric, col in (("target_met", "yes_se"), ("elementary", "elementary_se"), ("award", "award_se")):
            np.testing.assert_allclose(cells[metric].loc[key, "se"], row[col], rtol=1e-6, atol=1e-9,
                                       err_msg=f"{metric} {key}")
    assert cells["target_met"].loc[("total", "Total"), "se"] < 1e-9  # a raked margin cannot move


@pytest.fixture(scope="module")
def bounded(reference, tmp_path_factory):
    """apiclus1 raked to the same margins by `add --rake --cap 0.85:1.8` (three schools reach
    the cap) and R's calibrate(calfun = "raking", bounds = c(0.85, 1.8)) of the same design."""
    out = tmp_path_factory.mktemp("bounded")
    data_dir = _data_dir(reference)
    text = CODEBOOK.format(name="apiclus1 raked within a cap", design="clusters: dnum\n")
    text = text.replace("groups:\n", "groups:\n  sch_wide: {variable: sch_wide}\n")
    text += RAKED_METRICS.format(e=4421 / 6194, h=755 / 6194, m=1018 / 6194, yes=5122 / 6194, no=1072 / 6194)
    text = text.replace("rake: {tolerance: 1.0e-12}", "rake: {tolerance: 1.0e-12, cap: '0.85:1.8'}")
    study = _study(out, "capped", text, [(data_dir / "apiclus1-2000.csv", "2000", "2000-06-30")], rake=True)
    return (pd.read_csv(data_dir / "bounded_reference.csv"), pd.read_csv(data_dir / "bounded_weights.csv"),
            study, reference)


def test_capped_raking_equals_r_bounded_calibration(bounded):
    """R's bounded raking (calibrate(calfun = "raking", bounds = )): the same weights to 1e-9
    (the weights closest to the design weights within the cap, Deville and Sarndal 1992), and
    every value and SE of the design to 1e-6 (the variance regresses on the margins with the
    design weights, as R's, whatever the bounds)."""
    ref, weights, study, _ = bounded
    stored = study.load("2000").assign(snum=lambda t: t["snum"].astype(float).astype(int))
    both = stored.merge(weights, on="snum")
    assert len(both) == 183
    np.testing.assert_allclose(both["pw"], both["bounded"], rtol=1e-9)
    design = pd.read_csv(_data_dir(bounded[3]) / "apiclus1.csv").set_index("snum")["pw"]
    ratio = both["pw"] / both["snum"].map(design)
    assert ratio.max() == pytest.approx(1.8, abs=1e-12) and (np.abs(ratio - 1.8) < 1e-9).sum() == 3
    cells = {m: _cells(study, m) for m in ("api_mean", "target_met", "elementary", "award")}
    for key, row in ref.set_index(["group", "subgroup"]).iterrows():
        np.testing.assert_allclose(cells["api_mean"].loc[key, "value"], row["api00"], rtol=1e-9, err_msg=str(key))
        np.testing.assert_allclose(cells["award"].loc[key, "value"], row["award"], rtol=1e-9, err_msg=str(key))
        for metric, col in (("api_mean", "api00_se"), ("target_met", "yes_se"), ("elementary", "elementary_se"),
                            ("award", "award_se")):
            np.testing.assert_allclose(cells[metric].loc[key, "se"], row[col], rtol=1e-6, atol=1e-9,
                                       err_msg=f"{metric} {key}")


def test_a_raked_margin_is_never_tested(reference, raked, tmp_path):
    """Both waves raked to the codebook's targets: a margin's share is the target in each, with
    no sampling error, and its comparison says it is fixed by the weighting (common practice,
    no source: a calibrated total is not an estimate)."""
    _, _, studies = raked
    data_dir = _data_dir(reference)
    both = _study(tmp_path, "s", (studies[False].root / "codebook.yaml").read_text(),
                  [(data_dir / f"apiclus1-{year}.csv", year, f"{year}-06-30") for year in ("1999", "2000")], rake=True)
    table = both.changes(wave="2000", against="1999", metrics=["elementary", "award"], by=[]).table
    row = table.set_index("metric").loc["elementary"]
    assert row["change"] == pytest.approx(0.0, abs=1e-12)
    assert row["verdict"] == "not tested" and "fixed by the weighting" in row["flags"]
    assert "fixed by the weighting" not in table.set_index("metric").loc["award", "flags"]  # not a margin


@pytest.fixture(scope="module")
def two_samples(reference, tmp_path_factory):
    """apiclus1 and apiclus2 as two independent waves of one study (clusters, no panel)."""
    tmp = tmp_path_factory.mktemp("two")
    data_dir = _data_dir(reference)
    apiclus2 = pd.read_csv(data_dir / "apiclus2.csv")
    apiclus2.drop(columns=["api99", "fpc"]).rename(columns={"api00": "api"}).to_csv(tmp / "w2.csv", index=False)
    study = _study(tmp, "s", CODEBOOK.format(name="two samples", design="clusters: dnum\n") + "profile: [stype]\n",
                   [(data_dir / "apiclus1-2000.csv", "1", "2000-03-31"), (tmp / "w2.csv", "2", "2000-06-30")])
    return study, data_dir


def test_rao_scott_of_two_waves_make_up_equals_r(two_samples):
    """R's svychisq(~wave + stype, statistic = "F") (second order, the verdict: F, its two df
    and p) and "Chisq" (first order) on apiclus1 and apiclus2 stacked as two independent waves."""
    study, data_dir = two_samples
    ref = pd.read_csv(data_dir / "raoscott_reference.csv").iloc[0]
    test = study.composition(wave="2", against="1").tests.set_index("group").loc["stype"]
    np.testing.assert_allclose([test["f"], test["f_df_num"], test["f_df_den"], test["p"]],
                               [ref["f"], ref["f_df1"], ref["f_df2"], ref["f_p"]], rtol=1e-9)
    # R's "Chisq" reports Pearson's X^2 of the weighted table with the first-order corrected p-value
    np.testing.assert_allclose([test["pearson_chi2"], test["p_chi2"]], [ref["chisq"], ref["chisq_p"]], rtol=1e-9)


def test_an_independent_change_equals_r_two_designs(two_samples):
    """Two independent samples: the change of each cell is the difference of R's two estimates
    (svymean on each design alone), its SE the root of the sum of R's two variances, its df
    Satterthwaite's combination of R's two degf (Satterthwaite 1946), its statistic the change
    over that SE, and its p Student's t on those df (scipy) where the cells are tested."""
    from scipy import stats

    study, data_dir = two_samples
    ref = pd.read_csv(data_dir / "reference.csv")
    a = ref[ref["design"] == "apiclus1"].set_index(["group", "subgroup"])
    b = ref[ref["design"] == "apiclus2"].set_index(["group", "subgroup"])
    ch = study.changes(wave="2", against="1", metrics=["api_mean"]).table.set_index(["group", "subgroup"])
    for key in a.index:
        row = ch.loc[key]
        v1, v0 = b.loc[key, "api00_se"] ** 2, a.loc[key, "api00_se"] ** 2
        df = (v1 + v0) ** 2 / (v1**2 / b.loc[key, "df"] + v0**2 / a.loc[key, "df"])
        assert row["covariance_from"] == "none"
        np.testing.assert_allclose(row["change"], b.loc[key, "api00"] - a.loc[key, "api00"], rtol=1e-10)
        np.testing.assert_allclose(row["se"], np.sqrt(v1 + v0), rtol=1e-10, err_msg=str(key))
        np.testing.assert_allclose(row["df"], df, rtol=1e-10, err_msg=str(key))
        t = (b.loc[key, "api00"] - a.loc[key, "api00"]) / np.sqrt(v1 + v0)
        np.testing.assert_allclose(row["statistic"], t, rtol=1e-10, err_msg=str(key))
        if np.isfinite(row["p_raw"]):  # cells the reliability rule refuses (most here: 15 and 40 clusters) are not tested
            np.testing.assert_allclose(row["p_raw"], 2 * stats.t.sf(abs(t), df), rtol=1e-8, err_msg=str(key))


# -- whole distributions and subgroups compared within a wave (tests/r/within_reference.R) -------------

WITHIN = ["apistrat", "apiclus1"]
CODES = {"1": "E", "2": "H", "3": "M"}


@pytest.mark.parametrize("design", WITHIN)
def test_every_code_of_a_question_equals_r(reference, design):
    # reference: R's svymean(~factor(stype)) in total and in subset(awards == 1)
    from tracker.answers import answer_shares

    want = pd.read_csv(_data_dir(reference) / "codes.csv")
    want = want[want["design"] == design]
    got = answer_shares(reference[1][design], "stype", waves=["2000"], by=["awards"])
    got = got[got["in_base"] == "valid answers"].set_index(["group", "subgroup", "code"])
    for r in want.itertuples():
        mine = got.loc[(r.group, r.subgroup, str(r.code))]
        assert mine["value"] == pytest.approx(r.value, rel=1e-12, abs=1e-12)
        assert mine["se"] == pytest.approx(r.se, rel=1e-8, abs=1e-8)


@pytest.mark.parametrize("design", WITHIN)
def test_quartiles_and_their_woodruff_intervals_equal_r(reference, design):
    # reference: R's svyquantile(~api00, quantiles = c(.25, .5, .75), ci = TRUE) (qrule "math",
    # interval.type "mean": Woodruff), in total and in subset(awards == 1)
    from tracker.answers import number_summary

    want = pd.read_csv(_data_dir(reference) / "quartiles.csv")
    want = want[want["design"] == design]
    got = number_summary(reference[1][design], "api", waves=["2000"], by=["awards"])
    names = {0.25: "lower quartile", 0.5: "median", 0.75: "upper quartile"}
    got = got.set_index(["group", "subgroup", "statistic"])
    for r in want.itertuples():
        mine = got.loc[(r.group, r.subgroup, names[r.p])]
        assert (mine["value"], mine["low"], mine["high"]) == (r.value, r.low, r.high)
        assert mine["se"] == pytest.approx(r.se, rel=1e-10)


@pytest.mark.parametrize("design", WITHIN)
def test_subgroups_compared_within_a_wave_equal_r(reference, design):
    # reference: R's svyby(covmat = TRUE) + svycontrast for each pair of school types and each type
    # against the rest; regTermTest(svyglm(y ~ stype), ~stype) for the test across the three
    from tracker.within import compare_within

    folder = _data_dir(reference)
    got = compare_within(reference[1][design], wave="2000", by=["stype"]).table
    metric = {"api00": "api_mean", "yes": "target_met"}
    pairs = pd.read_csv(folder / "within_pairs.csv")
    for r in pairs[pairs["design"] == design].itertuples():
        second = "rest of the sample" if r.b == 0 else CODES[str(r.b)]
        row = got[(got["metric"] == metric[r.metric]) & (got["first"] == CODES[str(r.a)]) & (got["second"] == second)]
        assert len(row) == 1
        assert row["difference"].iloc[0] == pytest.approx(r.diff, rel=1e-10, abs=1e-12)
        assert row["se"].iloc[0] == pytest.approx(r.se, rel=1e-8)
    overall = pd.read_csv(folder / "within_overall.csv")
    for r in overall[overall["design"] == design].itertuples():
        row = got[(got["metric"] == metric[r.metric]) & (got["comparison"] == "across all levels")]
        assert row["statistic"].iloc[0] == pytest.approx(r.F, rel=1e-8)
        assert row["df"].iloc[0] == r.df2
        assert row["p_raw"].iloc[0] == pytest.approx(r.p, rel=1e-8)


@pytest.mark.parametrize("design", WITHIN)
def test_the_change_of_a_gap_between_two_waves_equals_r(reference, design):
    # reference: R's svyby(~api00 + api99, ~stype, covmat = TRUE) + svycontrast of
    # (E - H in 2000) - (E - H in 1999): the same schools (apistrat, a panel) and the same
    # districts (apiclus1) in both years, so the two gaps' covariance counts
    from tracker.gapshift import gap_shifts

    want = pd.read_csv(_data_dir(reference) / "gap_changes.csv")
    got = gap_shifts(reference[1][design], wave="2000", against="1999", metrics=["api_mean"], by=["stype"],
                     slopes=False).table
    assert set(got["covariance_from"]) == {"panel" if design == "apistrat" else "clusters"}
    for r in want[want["design"] == design].itertuples():
        row = got[(got["first"] == CODES[str(r.a)]) & (got["second"] == CODES[str(r.b)])]
        assert len(row) == 1
        assert row["change"].iloc[0] == pytest.approx(r.change, rel=1e-10)
        assert row["se"].iloc[0] == pytest.approx(r.se, rel=1e-8)


DRIVER_BOOK = """title: California schools (R survey package data), drivers of the API
id: snum
weight: pw
{design}variables:
  stype: {{type: category, codes: {{1: E, 2: H, 3: M}}}}
  api00: {{type: number}}
  ell: {{type: number}}
  meals: {{type: number}}
  mobility: {{type: number}}
metrics:
  api: {{variable: api00, mean: true}}
  ell_mean: {{variable: ell, mean: true}}
  meals_mean: {{variable: meals, mean: true}}
  mobility_mean: {{variable: mobility, mean: true}}
"""


@pytest.mark.parametrize("design", WITHIN)
def test_driver_coefficients_and_ses_equal_svyglm(reference, design):
    # reference: R's svyglm(api00 ~ ell + meals + mobility) on the stratified and the cluster sample
    from tracker.drivers import fit_drivers

    folder = _data_dir(reference)
    text = DRIVER_BOOK.format(design="strata: stype\n" if design == "apistrat" else "clusters: dnum\n")
    study = _study(folder, f"drivers_{design}", text, [(folder / f"drivers_{design}.csv", "2000", "2000-06-30")])
    fit = fit_drivers(study, "api", ["ell_mean", "meals_mean", "mobility_mean"])
    want = pd.read_csv(folder / "svyglm.csv")
    want = want[want["design"] == design]
    np.testing.assert_allclose(fit.coefficients["coefficient"], want["coefficient"], rtol=1e-9)
    np.testing.assert_allclose(fit.coefficients["se"], want["se"], rtol=1e-6)


def test_relative_weights_equal_the_published_mtcars_example(reference):
    # reference: the rwa package's documented example (Johnson's relative weights of mpg on cyl,
    # disp, hp and gear in R's mtcars): R^2 0.7791896; raw weights 0.2284797, 0.2221469,
    # 0.2321744, 0.0963886 (as published, to 7 decimals); mtcars exported by R itself
    from tracker.drivers import fit_drivers

    folder = _data_dir(reference)
    text = ("title: mtcars\nid: car\nvariables:\n" + "".join(f"  {v}: {{type: number}}\n" for v in
                                                                ("mpg", "cyl", "disp", "hp", "gear"))
            + "metrics:\n" + "".join(f"  {v}_m: {{variable: {v}, mean: true}}\n" for v in
                                      ("mpg", "cyl", "disp", "hp", "gear")))
    study = _study(folder, "mtcars", text, [(folder / "mtcars.csv", "1974", "1974-06-30")])
    fit = fit_drivers(study, "mpg_m", ["cyl_m", "disp_m", "hp_m", "gear_m"])
    assert fit.r2 == pytest.approx(0.7791896, abs=5e-8)
    np.testing.assert_allclose(fit.importance["raw_weight"], [0.2284797, 0.2221469, 0.2321744, 0.0963886],
                               atol=5e-8)
    assert fit.importance["raw_weight"].sum() == pytest.approx(fit.r2, rel=1e-12)


@pytest.mark.parametrize("design", WITHIN)
def test_a_questions_answers_across_a_split_equal_svychisq(reference, design):
    # reference: R's svychisq(~stype + awards) (the second-order Rao-Scott F, its df and p)
    from tracker.answers import distribution_tests

    want = pd.read_csv(_data_dir(reference) / "svychisq.csv").set_index("design").loc[design]
    got = distribution_tests(reference[1][design], "stype", waves=["2000"], by=["awards"]).iloc[0]
    np.testing.assert_allclose([got["f"], got["f_df_num"], got["f_df_den"], got["p_raw"]],
                               [want["f"], want["ndf"], want["ddf"], want["p"]], rtol=1e-8)


@pytest.mark.parametrize("method", ["jk1", "jkn", "bootstrap"])
def test_replicate_weight_designs_equal_svrepdesign(reference, method):
    # reference: R's as.svrepdesign(type = JK1 on apiclus1, JKn and a seeded bootstrap of 50 on
    # apistrat): svymean of api00 and of "met the target", in total and by school type, and degf
    folder = _data_dir(reference)
    data = pd.read_csv(folder / f"rep_{method}.csv")
    spec = _replicate_spec(folder, method, data)
    study = _api_study(folder, f"rep_{method}", data, CODEBOOK.format(name=f"replicates {method}", design=spec))
    est = study.estimates(metrics=["api_mean", "target_met"], by="stype").set_index(["metric", "subgroup"])
    _replicate_pairs_equal_r(study, folder, method)
    want = pd.read_csv(folder / "replicates.csv")
    for r in want[want["method"] == method].itertuples():
        mean, share = est.loc[("api_mean", r.subgroup)], est.loc[("target_met", r.subgroup)]
        assert mean["value"] == pytest.approx(r.api00, rel=1e-12)
        assert mean["se"] == pytest.approx(r.api00_se, rel=1e-8)
        assert share["se"] == pytest.approx(r.yes_se, rel=1e-8)
        assert mean["df"] == r.df


@pytest.mark.parametrize("method", ["jk1", "jkn", "bootstrap"])
def test_a_panel_with_replicate_weights_equals_svrepdesign(reference, method):
    # reference: R's svycontrast on svymean(~api00 + api99) and on svyby(~api00 + api99, ~stype,
    # covmat = TRUE) of the replicate designs above: the same schools in 1999 and 2000 carry the
    # same replicate weights, so a change's covariance is the replicates' (tests/r/within_reference.R)
    folder = _data_dir(reference)
    data = pd.read_csv(folder / f"rep_{method}.csv")
    spec = "panel: true\n" + _replicate_spec(folder, method, data)
    study = _api_study(folder, f"panel_{method}", data, CODEBOOK.format(name=f"panel {method}", design=spec),
                       years=("1999", "2000"))
    got = study.changes(wave="2000", against="1999", metrics="api_mean", by="stype").table.set_index("subgroup")
    gaps = study.gap_changes(wave="2000", against="1999", metrics="api_mean", by="stype").table
    want = pd.read_csv(folder / "replicate_panel.csv", dtype={"subgroup": str, "other": str})
    want = want[want["method"] == method]
    for r in want[want["what"] == "change"].itertuples():
        row = got.loc[CODES.get(str(r.subgroup), r.subgroup)]
        assert row["change"] == pytest.approx(r.value, rel=1e-10)
        assert row["se"] == pytest.approx(r.se, rel=1e-8)
        assert row["df"] == r.df and row["covariance_from"] == "shared respondents"
    for r in want[want["what"] == "gap change"].itertuples():
        row = gaps[(gaps["first"] == CODES[str(r.subgroup)]) & (gaps["second"] == CODES[str(r.other)])].iloc[0]
        assert row["change"] == pytest.approx(r.value, rel=1e-10)
        assert row["se"] == pytest.approx(r.se, rel=1e-8)
        assert row["df"] == r.df


@pytest.mark.parametrize("method, fpc", [("jk1", False), ("jkn", False), ("jkn", True)])
def test_replicate_weights_built_from_a_design_equal_as_svrepdesign(reference, method, fpc):
    # reference: R's as.svrepdesign(type = "JK1") of apiclus1 (clusters dnum) and type = "JKn" of
    # apistrat (strata stype), also with its fpc: every replicate weight, the scale and the
    # rscales (R's replicates matched to ours by the PSU each leaves out)
    from tracker.replication import replicate_weights

    folder = _data_dir(reference)
    name = "apiclus1" if method == "jk1" else "apistrat"
    design = "clusters: dnum\n" if method == "jk1" else "strata: stype\n" + (FPC["apistrat"] if fpc else "")
    stem = f"rep_{method}" + ("_fpc" if fpc else "")
    data = pd.read_csv(folder / f"{name}.csv")
    study = _api_study(folder, f"{stem}_build", data, CODEBOOK.format(name=f"built {stem}", design=design))
    built = replicate_weights(study, "2000", method)
    want = pd.read_csv(folder / f"{stem}.csv", dtype={"snum": str}).set_index("snum").loc[built.weights["snum"]]
    scales = pd.read_csv(folder / f"{stem}_scales.csv")
    mine = built.weights.drop(columns="snum").to_numpy()
    theirs = want[[c for c in want.columns if c.startswith("rw")]].to_numpy()
    assert mine.shape == theirs.shape
    order_mine, order_theirs = np.argsort(_dropped(mine)), np.argsort(_dropped(theirs))
    np.testing.assert_allclose(mine[:, order_mine], theirs[:, order_theirs], rtol=1e-12)
    np.testing.assert_allclose(np.asarray(built.rscales)[order_mine], scales["rscales"].to_numpy()[order_theirs],
                               rtol=1e-12)
    assert built.scale == pytest.approx(float(scales["scale"].iloc[0]), rel=1e-12)


def test_built_jackknife_weights_declared_in_a_codebook_give_r_standard_errors(reference):
    # reference: R's as.svrepdesign(type = "JKn") of apistrat, svymean of api00 (replicates.csv):
    # `tracker replicates` builds the weights and the codebook key, the weights are joined to the
    # wave, and a study declaring them gives R's SE and df
    from tracker.cli import main

    folder = _data_dir(reference)
    data = pd.read_csv(folder / "apistrat.csv")
    study = _api_study(folder, "cli_build", data, CODEBOOK.format(name="linearized", design="strata: stype\n"))
    done = CliRunner().invoke(main, ["replicates", str(study.root), "--method", "jkn", "-o",
                                     str(folder / "cli_built.csv")])
    assert done.exit_code == 0, done.output
    assert "wrote" in done.output and "200 replicate weights for 200 respondents" in done.output
    key = (folder / "cli_built.replicates.yaml").read_text()
    assert str(folder / "cli_built.replicates.yaml") in done.output
    joined = data.merge(pd.read_csv(folder / "cli_built.csv"), on="snum")
    replicated = _api_study(folder, "cli_replicated", joined, CODEBOOK.format(name="built replicates", design=key))
    got = replicated.estimates(metrics="api_mean", by=[]).iloc[0]
    want = pd.read_csv(folder / "replicates.csv")
    want = want[(want["method"] == "jkn") & (want["group"] == "total")].iloc[0]
    assert got["value"] == pytest.approx(want["api00"], rel=1e-12)
    assert got["se"] == pytest.approx(want["api00_se"], rel=1e-8) and got["df"] == want["df"]


def test_a_built_bootstrap_approaches_the_linearized_variance(reference):
    # reference: the linearized SE of apistrat's api00 mean (equal to R's svymean, tests above);
    # the rescaled bootstrap's variance converges to it (Rao, Wu & Yue 1992): with 4,000
    # replicates its Monte Carlo error is about 1 % of the SE
    from tracker.replication import replicate_weights

    folder = _data_dir(reference)
    data = pd.read_csv(folder / "apistrat.csv")
    study = _api_study(folder, "boot_build", data, CODEBOOK.format(name="linearized", design="strata: stype\n"))
    built = replicate_weights(study, "2000", "bootstrap", count=4000, seed=11)
    W = built.weights.drop(columns="snum").to_numpy()
    y = data.set_index("snum").loc[built.weights["snum"].astype(int), "api00"].to_numpy(float)
    theta = (W * y[:, None]).sum(axis=0) / W.sum(axis=0)
    boot_se = np.sqrt(built.scale * ((theta - theta.mean()) ** 2).sum())
    linear_se = study.estimates(metrics="api_mean", by=[]).iloc[0]["se"]
    assert boot_se == pytest.approx(linear_se, rel=0.04)
    again = replicate_weights(study, "2000", "bootstrap", count=4000, seed=11)
    assert again.weights.equals(built.weights)  # the seed makes it repeatable


def _dropped(W):
    """For each replicate (column of W), the first respondent whose weight it sets to 0: a key
    that orders two sets of jackknife replicates alike."""
    return (W == 0).argmax(axis=0)


def _replicate_pairs_equal_r(study, folder, method):
    """Subgroups compared within a replicate-weight wave against R: svyby(covmat = TRUE) +
    svycontrast for each pair of school types, regTermTest for the test across the three, and
    svychisq for school type across award eligibility."""
    from tracker.answers import distribution_tests
    from tracker.within import compare_within

    chisq = pd.read_csv(folder / "svychisq_rep.csv").set_index("method").loc[method]
    test = distribution_tests(study, "stype", waves="2000", by="awards").iloc[0]
    np.testing.assert_allclose([test["f"], test["f_df_num"], test["f_df_den"], test["p_raw"]],
                               [chisq["f"], chisq["ndf"], chisq["ddf"], chisq["p"]], rtol=1e-8)
    got = compare_within(study, wave="2000", metrics="api_mean", by="stype").table
    want = pd.read_csv(folder / "replicate_pairs.csv")
    for r in want[want["method"] == method].itertuples():
        if r.a == 0:
            row = got[got["comparison"] == "across all levels"].iloc[0]
            assert row["statistic"] == pytest.approx(r.F, rel=1e-8) and row["df"] == r.ddf
            assert row["p_raw"] == pytest.approx(r.p, rel=1e-8)
            continue
        row = got[(got["first"] == CODES[str(r.a)]) & (got["second"] == CODES[str(r.b)])].iloc[0]
        assert row["difference"] == pytest.approx(r.diff, rel=1e-10)
        assert row["se"] == pytest.approx(r.se, rel=1e-8)


def test_driver_coefficients_with_replicate_weights_equal_svyglm(reference):
    # reference: R's svyglm(api00 ~ ell + meals + mobility) on apiclus1 as a JK1 replicate design
    from tracker.drivers import fit_drivers

    folder = _data_dir(reference)
    data = pd.read_csv(folder / "drivers_rep.csv")
    n_rep = sum(c.startswith("rw") for c in data.columns)
    text = DRIVER_BOOK.format(design=f"replicates: {{method: jk1, prefix: rw, count: {n_rep}}}\n")
    study = _study(folder, "drivers_rep", text, [(folder / "drivers_rep.csv", "2000", "2000-06-30")])
    fit = fit_drivers(study, "api", ["ell_mean", "meals_mean", "mobility_mean"])
    want = pd.read_csv(folder / "svyglm_rep.csv")
    np.testing.assert_allclose(fit.coefficients["coefficient"], want["coefficient"], rtol=1e-9)
    np.testing.assert_allclose(fit.coefficients["se"], want["se"], rtol=1e-8)


def test_raking_a_replicate_design_rakes_every_replicate_as_r(reference):
    # reference: R's rake() on apiclus1 as JK1, to the school-type and growth-target counts of the
    # survey package's own rakecheck test; every replicate is raked, and svymean's SE follows
    folder = _data_dir(reference)
    data = pd.read_csv(folder / "rep_raked.csv")
    n_rep = sum(c.startswith("rw") for c in data.columns)
    types, wide = {"E": 4421, "H": 755, "M": 1018}, {"Yes": 5122, "No": 1072}
    design = (f"replicates: {{method: jk1, prefix: rw, count: {n_rep}}}\n"
              f"targets:\n  stype: {{{', '.join(f'{k}: {v / 6194!r}' for k, v in types.items())}}}\n"
              f"  sch_wide: {{{', '.join(f'{k!r}: {v / 6194!r}' for k, v in wide.items())}}}\n")
    text = CODEBOOK.format(name="replicates raked", design=design).replace("groups:\n", "groups:\n  sch_wide: "
                                                                                       "{variable: sch_wide}\n")
    study = _api_study(folder, "rep_raked", data, text, rake=True)
    est = study.estimates(metrics="api_mean", by="awards").set_index("subgroup")
    for r in pd.read_csv(folder / "rep_raked_reference.csv").itertuples():
        assert est.loc[r.subgroup, "value"] == pytest.approx(r.api00, rel=1e-8)
        assert est.loc[r.subgroup, "se"] == pytest.approx(r.api00_se, rel=1e-6)
