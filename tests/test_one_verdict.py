"""One verdict per move: the JSON brief, `changes --all --format csv`, the chart marks and the
HTML/Markdown brief agree on every cell (common practice, no source: the same analysis read
by every renderer). Checked on the demo and on a generated study of our own."""

from __future__ import annotations

import html
import io
import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from tracker import Study
from tracker.charts import trend_frame
from tracker.cli import main

from .test_design_variance import clustered_wave, make

KEY = ["metric", "group", "subgroup"]


def _agree(study: Study, wave: str, tmp_path):
    root = str(study.root)
    runner = CliRunner()
    out = tmp_path / f"brief-{wave}.json"
    result = runner.invoke(main, ["brief", root, "--wave", wave, "-o", str(out)])
    assert result.exit_code == 0, result.output
    doc = json.loads(out.read_text())
    comps = pd.DataFrame(doc["comparisons"]).set_index(KEY)
    for field in ("metric", "group", "subgroup", "wave_from", "wave_to", "change", "change_low", "change_high",
                  "p_adjusted", "significant", "min_detectable_change", "verdict"):
        assert field in doc["comparisons"][0]
    assert doc["family_size"] == int(comps["p_adjusted"].notna().sum())

    # the table command, asked for everything, in the same family
    result = runner.invoke(main, ["changes", root, "--wave", wave, "--all", "--format", "csv"])
    assert result.exit_code == 0, result.output
    csv = pd.read_csv(io.StringIO(result.output), keep_default_na=False, na_values=[""]).set_index(KEY)
    assert set(csv.index) == set(comps.index)
    csv = csv.loc[comps.index]
    assert (csv["verdict"].to_numpy() == comps["verdict"].to_numpy()).all()
    assert (csv["significant"].astype(bool).to_numpy() == comps["significant"].astype(bool).to_numpy()).all()
    assert np.allclose(csv["p_adjusted"].to_numpy(float), comps["p_adjusted"].to_numpy(float), equal_nan=True)
    # ... and asked for one metric and one split, it still reports the family's p-values
    metric, group = comps.index[-1][0], comps.index[-1][1]
    args = ["changes", root, "--wave", wave, "--all", "--format", "csv", "--metric", metric]
    narrow = runner.invoke(main, args + (["--by", group] if group != "total" else ["--by", "total"]))
    part = pd.read_csv(io.StringIO(narrow.output), keep_default_na=False, na_values=[""]).set_index(KEY)
    assert np.allclose(part["p_adjusted"].to_numpy(float), comps.loc[part.index, "p_adjusted"].to_numpy(float),
                       equal_nan=True)
    footer = runner.invoke(main, ["changes", root, "--wave", wave, "--metric", metric]).output
    assert f"adjusted across the {doc['family_size']:,} comparisons of {wave}" in footer

    # the chart marks of this wave, and the patterns drawn
    patterns = pd.DataFrame(doc["patterns"]).set_index(KEY)
    for m in study.codebook.metrics:
        if m not in comps.index.get_level_values(0):
            continue
        for by in [None, *study.codebook.groups]:
            frame = trend_frame(study, m, by=by, until=wave)
            here = frame[frame["wave"] == wave]
            for r in here.itertuples():
                if (m, r.group, r.subgroup) in comps.index:
                    assert r.verdict == comps.loc[(m, r.group, r.subgroup), "verdict"], (m, r.group, r.subgroup)
            for r in frame.drop_duplicates("subgroup").itertuples():
                if (m, r.group, r.subgroup) in patterns.index:
                    pattern = patterns.loc[(m, r.group, r.subgroup), "pattern"]
                    assert r.pattern == pattern
                    drawn = frame.loc[frame["subgroup"] == r.subgroup, "fitted"].notna().any()
                    assert drawn == (pattern in ("rising", "falling") or pattern.startswith("shifted"))

    # the sections of the brief hold exactly the moves their verdicts put there
    sections = doc["sections"]
    totals = comps.xs("total", level="group")

    def metrics_of(name):
        return sorted(i["metric"] for i in sections[name] if i["metric"])  # a note item names no metric

    moved = totals[totals["verdict"].isin(["rise", "fall"])]
    mostly_mix = moved[moved["mostly_make_up"].astype(bool)]
    assert metrics_of("headline") == sorted(set(moved.index.get_level_values(0)) - set(mostly_mix.index.get_level_values(0)))
    assert metrics_of("mix_moves") == sorted(mostly_mix.index.get_level_values(0))
    assert metrics_of("steady") == sorted(totals.index.get_level_values(0)[totals["verdict"] == "steady"])
    assert metrics_of("unclear") == sorted(totals.index.get_level_values(0)[totals["verdict"] == "unclear"])
    for item in sections["subgroup_moves"]:
        row = comps[(comps.index.get_level_values(0) == item["metric"])
                    & (comps.index.get_level_values(2) == item["subgroup"])].iloc[0]
        assert row["verdict"] in ("rise", "fall")
    for item in (i for i in sections["headline"] if i["metric"]):
        assert item["mark"] == totals.loc[(item["metric"], "Total"), "verdict"]

    # the Markdown and HTML forms say the same sentences
    md_path, html_path = tmp_path / f"b-{wave}.md", tmp_path / f"b-{wave}.html"
    assert runner.invoke(main, ["brief", root, "--wave", wave, "-o", str(md_path)]).exit_code == 0
    assert runner.invoke(main, ["brief", root, "--wave", wave, "-o", str(html_path)]).exit_code == 0
    md, page = md_path.read_text(), html_path.read_text()
    for name, items in sections.items():
        for item in items:
            assert item["text"] in md, (name, item["text"])
            assert html.escape(item["text"]) in page, (name, item["text"])
    return doc


@pytest.mark.parametrize("wave", ["2025-Q2", "2026-Q1"])
def test_the_demo_gives_one_verdict_per_move(demo_study, wave, tmp_path):
    doc = _agree(demo_study, wave, tmp_path)
    verdicts = {c["verdict"] for c in doc["comparisons"]}
    assert {"steady", "unclear"} <= verdicts  # both kinds of 'did not move' occur
    if wave == "2026-Q1":
        # the planted make-up shift moves fares_fair; it is not a headline
        assert [i["metric"] for i in doc["sections"]["mix_moves"]] == ["fares_fair"]
        assert "fares_fair" not in [i["metric"] for i in doc["sections"]["headline"]]
        assert "beyond what the sample's changed make-up explains" in doc["sections"]["headline"][0]["text"]


def test_a_generated_study_gives_one_verdict_per_move(tmp_path):
    rng = np.random.default_rng(31)
    waves = [clustered_wave(rng, n_strata=6, clusters=4, size=(20, 30), prefix=f"w{i}-") for i in range(3)]
    waves[2].loc[waves[2]["g"] == 1, "q"] = np.minimum(waves[2].loc[waves[2]["g"] == 1, "q"] + 1, 5)
    study, _ = make(tmp_path, waves, extra="waves_share_clusters: false")
    doc = _agree(study, "W3", tmp_path)
    assert any(c["verdict"] in ("rise", "fall") for c in doc["comparisons"])


def test_steady_is_a_claim_and_smallest_change_moves_the_line(tmp_path):
    # a tight smallest change that matters turns 'steady' into 'unclear'; never the reverse
    rng = np.random.default_rng(32)
    waves = [clustered_wave(rng, n_strata=6, clusters=4, size=(25, 35), prefix=f"w{i}-") for i in range(2)]
    loose, _ = make(tmp_path, waves, extra="waves_share_clusters: false", name="loose")
    book = (tmp_path / "loose.yaml").read_text().replace("    mean: true\n", "    mean: true\n    smallest_change: 0.01\n")
    (tmp_path / "tight.yaml").write_text(book)
    tight = Study.create(tmp_path / "tight", tmp_path / "tight.yaml")
    for i, frame in enumerate(waves):
        frame.to_csv(tmp_path / f"t{i}.csv", index=False)
        tight.add(tmp_path / f"t{i}.csv", f"W{i + 1}", f"2025-{i + 1:02d}-15")
    a = loose.changes(by=[]).table.set_index("metric").loc["avg"]
    b = tight.changes(by=[]).table.set_index("metric").loc["avg"]
    assert a["change"] == b["change"] and a["p_adjusted"] == b["p_adjusted"]
    if a["verdict"] == "steady":
        assert b["verdict"] == "unclear"  # the interval cannot lie within 0.01 either way
    with pytest.raises(Exception, match="smallest_change"):
        Study.create(tmp_path / "bad", _write(tmp_path / "bad.yaml", book.replace("0.01", "-1")))


def _write(path, text):
    path.write_text(text)
    return path
