"""Replicate-weight designs: the codebook key, intake of the replicate columns, and the
analyses that do not use replicates yet refusing by name. Their estimates are checked against
R's svrepdesign in tests/test_against_r.py; here a JK1 design built by hand (each respondent
left out in turn) is checked against the textbook delete-one jackknife of a mean (Wolter 2007,
ch. 4: (n - 1)/n times the squared spread of the leave-one-out means), computed with numpy."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tracker import Study, TrackerError
from tracker.codebook import parse_codebook

BOOK = """title: replicates
id: rid
weight: w
{extra}variables:
  score: {{type: number}}
  group: {{type: category, codes: {{1: a, 2: b}}}}
groups:
  group: {{variable: group}}
metrics:
  mean_score: {{variable: score, mean: true}}
  share_a: {{variable: group, share: [1]}}
"""


def _jk1_wave(rng, n=30):
    w = rng.uniform(0.5, 2.0, n)
    frame = pd.DataFrame({"rid": [f"r{i}" for i in range(n)], "w": w, "score": rng.normal(50, 10, n),
                          "group": rng.integers(1, 3, n)})
    for k in range(n):  # replicate k leaves respondent k out and weights the rest by n / (n - 1)
        frame[f"rw{k + 1}"] = np.where(np.arange(n) == k, 0.0, w * n / (n - 1))
    return frame


def _jk1_study(tmp_path, frames, panel: bool = False):
    """A study declaring the JK1 replicates of ``_jk1_wave`` frames, one quarterly wave per frame."""
    n = sum(c.startswith("rw") for c in frames[0].columns)
    extra = ("panel: true\n" if panel else "") + f"replicates: {{method: jk1, prefix: rw, count: {n}}}\n"
    (tmp_path / "book.yaml").write_text(BOOK.format(extra=extra))
    study = Study.create(tmp_path / "s", tmp_path / "book.yaml")
    for k, frame in enumerate(frames):
        label = f"2025-Q{k + 1}"
        frame.to_csv(tmp_path / f"{label}.csv", index=False)
        study.add(tmp_path / f"{label}.csv", label, f"2025-{3 * k + 2:02d}-15")
    return study


def test_a_hand_built_jackknife_equals_the_textbook_one(tmp_path):
    rng = np.random.default_rng(3)
    frame = _jk1_wave(rng)
    n = len(frame)
    study = _jk1_study(tmp_path, [frame])
    est = study.estimates(by=[]).iloc[0]
    x, w = frame["score"].to_numpy(), frame["w"].to_numpy()
    loo = np.array([np.average(np.delete(x, k), weights=np.delete(w, k)) for k in range(n)])
    want = (n - 1) / n * ((loo - loo.mean()) ** 2).sum()
    assert est["value"] == pytest.approx(np.average(x, weights=w), rel=1e-12)
    assert est["se"] ** 2 == pytest.approx(want, rel=1e-10)
    assert est["df"] == n - 1  # the rank of the replicate weights minus one


@pytest.mark.parametrize("extra, says", [
    ("replicates: {columns: [rw1, rw2]}\n", "method"),
    ("replicates: {method: fay, columns: [rw1, rw2]}\n", "Fay's method needs its rho"),
    ("replicates: {method: jkn, columns: [rw1, rw2]}\n", "needs each replicate's scale"),
    ("replicates: {method: jk1}\n", "name the replicate weight columns"),
    ("strata: group\nreplicates: {method: jk1, columns: [rw1, rw2]}\n", "leave out strata"),
    ("waves_share_clusters: true\nreplicates: {method: brr, prefix: rw, count: 4}\n", "leave out waves_share_clusters"),
    ("replicates: {method: jkn, columns: [rw1, rw2], rscales: [0.5]}\n", "one scale per replicate"),
])
def test_a_replicate_key_that_cannot_work_is_refused(extra, says):
    with pytest.raises(TrackerError, match=says):
        parse_codebook(BOOK.format(extra=extra), "book")


def test_scales_follow_the_method():
    # R's svrepdesign defaults by type (from memory of its documentation): JK1 (R-1)/R, BRR 1/R,
    # Fay 1/(R (1-rho)^2), bootstrap 1/(R-1), successive difference 4/R
    def scale(spec):
        return parse_codebook(BOOK.format(extra=f"replicates: {spec}\n"), "b").replicates.scale

    assert scale("{method: jk1, prefix: rw, count: 10}") == pytest.approx(0.9)
    assert scale("{method: brr, prefix: rw, count: 8}") == pytest.approx(1 / 8)
    assert scale("{method: fay, fay_rho: 0.5, prefix: rw, count: 8}") == pytest.approx(1 / (8 * 0.25))
    assert scale("{method: bootstrap, prefix: rw, count: 51}") == pytest.approx(1 / 50)
    assert scale("{method: sdr, prefix: rw, count: 80}") == pytest.approx(4 / 80)


def test_replicate_columns_are_checked_at_intake_and_stored(tmp_path):
    rng = np.random.default_rng(4)
    frame = _jk1_wave(rng, 12)
    (tmp_path / "book.yaml").write_text(BOOK.format(extra="replicates: {method: jk1, prefix: rw, count: 12}\n"))
    study = Study.create(tmp_path / "s", tmp_path / "book.yaml")
    bad = frame.copy()
    bad.loc[3, "rw2"] = -1.0
    bad = bad.drop(columns=["rw5"])
    bad.to_csv(tmp_path / "bad.csv", index=False)
    text = "\n".join(study.check(tmp_path / "bad.csv", "2025-Q1", "2025-02-15").lines())
    assert "column rw5: the replicate weight column is missing" in text
    assert "column rw2: replicate weight is negative, not finite or above 1e12 [1 row: 5]" in text
    frame.to_csv(tmp_path / "w.csv", index=False)
    study.add(tmp_path / "w.csv", "2025-Q1", "2025-02-15")
    assert [f"rw{k}" for k in range(1, 13)] == [c for c in study.load("2025-Q1").columns if c.startswith("rw")]
    # the make-up test's replicate covariance of a level's share is that share's replicate variance
    from tracker.answers import share_covariance

    table = study.load("2025-Q1")
    inside = np.ones(len(table), bool)
    cells = np.column_stack([table["group"] == 1, table["group"] == 2]).astype(float)
    share = (table["w"].to_numpy() @ cells) / table["w"].sum()
    cov, df = share_covariance(study.codebook.replicates, table, inside, cells, share)
    est = study.estimates(metrics="share_a", by=[]).iloc[0]
    assert cov[0, 0] == pytest.approx(est["se"] ** 2, rel=1e-10) and df == 11
    frame.assign(rid=[f"x{i}" for i in range(len(frame))]).to_csv(tmp_path / "w2.csv", index=False)
    study.add(tmp_path / "w2.csv", "2025-Q2", "2025-05-15")
    tests = study.composition(groups=["group"]).tests
    assert len(tests) == 1 and np.isfinite(tests["p_raw"].iloc[0] if "p_raw" in tests else tests.iloc[0, -1])
    gaps = study.gaps(by="group").table  # from the replicates (checked against R in tests/test_against_r.py)
    pairs = gaps[gaps["comparison"] != "across all levels"]
    assert set(pairs["df"]) == {11.0}  # the rank of the 12 replicate weights minus one


def test_a_panel_whose_waves_share_no_respondent_compares_them_as_independent(tmp_path):
    # common practice, no source: with no respondent in both waves there is no covariance to take,
    # and the change's variance is the sum of the two waves' replicate variances
    rng = np.random.default_rng(5)
    study = _jk1_study(tmp_path, [_jk1_wave(rng).assign(rid=lambda f, p=prefix: p + f["rid"]) for prefix in "ab"],
                       panel=True)
    row = study.changes(by=[], metrics="mean_score").table.iloc[0]
    est = study.estimates(by=[], metrics="mean_score").set_index("wave")
    assert row["covariance_from"] == "none"
    assert row["se"] ** 2 == pytest.approx(est.loc["2025-Q1", "se"] ** 2 + est.loc["2025-Q2", "se"] ** 2, rel=1e-12)


def test_the_brief_of_a_replicate_study_names_its_variance_method(tmp_path):
    from tracker.brief import build_brief

    rng = np.random.default_rng(6)
    study = _jk1_study(tmp_path, [_jk1_wave(rng), _jk1_wave(rng)])
    said = " ".join(i.text if hasattr(i, "text") else str(i) for i in build_brief(study, charts=False).method)
    assert "30 replicate weights (the delete-a-group jackknife, JK1) rather than from linearization" in said


def test_building_replicates_refuses_what_cannot_be_built(tmp_path):
    # common practice, no source: a jackknife drops one PSU of a stratum and needs another to
    # carry its weight; JK1 is the jackknife of a design without strata
    from click.testing import CliRunner

    from tracker.cli import main
    from tracker.replication import build_replicates

    w = np.ones(6)
    with pytest.raises(TrackerError, match="1 stratum\\(s\\) hold a single PSU"):
        build_replicates(w, np.array([0, 0, 0, 1, 1, 1]), np.array([0, 1, 2, 3, 3, 3]), "jkn")
    with pytest.raises(TrackerError, match="use jkn"):
        build_replicates(w, np.array([0, 0, 0, 1, 1, 1]), None, "jk1")
    _jk1_study(tmp_path, [_jk1_wave(np.random.default_rng(7))])
    done = CliRunner().invoke(main, ["replicates", str(tmp_path / "s"), "-o", str(tmp_path / "r.csv")])
    assert done.exit_code == 1 and "already carries replicate weights" in done.output
    done = CliRunner().invoke(main, ["replicates", str(tmp_path / "s"), "-o", str(tmp_path / "r.txt")])
    assert done.exit_code == 1 and "give a file ending in .csv or .parquet" in done.output
    assert not (tmp_path / "r.csv").exists() and not (tmp_path / "r.txt").exists()
    # the key's file beside the weights is vetted before anything is written
    linear = tmp_path / "linear"
    linear.mkdir()
    (linear / "book.yaml").write_text(BOOK.format(extra=""))
    Study.create(linear / "s", linear / "book.yaml").add(tmp_path / "2025-Q1.csv", "2025-Q1", "2025-02-15")
    (tmp_path / "w.replicates.yaml").mkdir()
    done = CliRunner().invoke(main, ["replicates", str(linear / "s"), "-o", str(tmp_path / "w.csv")])
    assert done.exit_code == 1 and "w.replicates.yaml: is a folder" in done.output
    assert not (tmp_path / "w.csv").exists()


def test_a_jackknife_of_one_stratum_is_the_textbook_delete_one_jackknife():
    # Wolter 2007, ch. 4: replicate k drops unit k and weights the rest by n / (n - 1); the JK1
    # scale is (n - 1) / n (computed here with numpy)
    from tracker.replication import build_replicates

    w = np.array([1.0, 2.0, 1.5, 0.5, 3.0])
    W, scale, rscales = build_replicates(w, None, None, "jk1")
    want = np.where(np.eye(5) == 1, 0.0, w[:, None] * 5 / 4)
    np.testing.assert_allclose(W, want, rtol=1e-15)
    assert scale == pytest.approx(4 / 5) and np.all(rscales == 1.0)


def test_a_replicate_panel_change_is_the_replicates_spread_of_the_change_in_every_cell(tmp_path):
    # Wolter 2007, ch. 4 (a replicate variance of any statistic, here a change): each cell's
    # change variance is (n - 1)/n times the spread of the delete-one changes, computed with numpy
    # for two metrics, in total and in both subgroups (the covariance must meet its own cell)
    rng = np.random.default_rng(8)
    n = 30
    first = _jk1_wave(rng, n)
    second = first.assign(score=first["score"] + rng.normal(2, 3, n),
                          group=np.where(rng.random(n) < 0.2, 3 - first["group"], first["group"]))
    study = _jk1_study(tmp_path, [first, second], panel=True)
    got = study.changes().table.set_index(["metric", "subgroup"])
    checked = 0
    W = first[[f"rw{k + 1}" for k in range(n)]].to_numpy()
    w = first["w"].to_numpy()
    for metric in ("mean_score", "share_a"):
        for subgroup, code in (("Total", None), ("a", 1), ("b", 2)):
            def estimate(frame, weights):
                inside = np.ones(n, bool) if code is None else (frame["group"] == code).to_numpy()
                y = frame["score"].to_numpy() if metric == "mean_score" else (frame["group"] == 1).to_numpy(float)
                ww = weights * inside[:, None] if weights.ndim == 2 else weights * inside
                return (ww.T @ y) / ww.sum(axis=0)
            change_r = estimate(second, W) - estimate(first, W)
            var = (n - 1) / n * ((change_r - change_r.mean()) ** 2).sum()
            row = got.loc[(metric, subgroup)]
            if np.isnan(row["se"]):
                continue  # a cell the reliability rule does not test
            assert row["change"] == pytest.approx(estimate(second, w) - estimate(first, w), rel=1e-10, abs=1e-12)
            assert row["se"] ** 2 == pytest.approx(var, rel=1e-9)
            assert row["covariance_from"] == "shared respondents"
            checked += 1
    assert checked >= 4
