"""Intake: the codebook contract, the checks on wave files, storing waves, and bad input.

Every rule checked here is the codebook contract (docs/codebook.md) or common practice of
the trade (no source); expected values are counts of the generated rows themselves.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from tracker import Study, TrackerError, load_codebook, parse_codebook
from tracker.cli import main

from .conftest import EXAMPLE_CODEBOOK, example_wave, snapshot

BOOK_TEXT = EXAMPLE_CODEBOOK.read_text()


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


# -- the codebook contract ----------------------------------------------------------------

def test_example_codebook_is_accepted_as_written():
    book = load_codebook(EXAMPLE_CODEBOOK)
    assert book.id == "member_id" and book.weight == "wt"
    assert book.strata == "site_stratum" and book.clusters == "visit_day"
    assert book.variables["satisfaction"].missing == {9.0: "Don't know"}
    assert book.variables["satisfaction"].aliases == ("sat_overall",)
    assert book.variables["cleanliness"].break_before == "2025-Q1"
    assert book.variables["membership"].first_wave == "2024-Q1"
    assert book.variables["membership"].recode[0].waves == ("2024-Q1", "2024-Q2")
    assert book.variables["membership"].recode[0].map == {4.0: 3.0}
    assert book.variables["classes_used"].options == {"use_gym": "Gym floor", "use_pool": "Pool", "use_class": "Group class"}
    assert book.groups["age_band"].bands == {"16-34": (16, 34), "35-54": (35, 54), "55+": (55, 99)}
    assert book.groups["sex"].levels == {"Female": (1.0,), "Male": (2.0,)}
    assert list(book.groups["site"].levels) == ["Harbour Road", "Millfield", "Ashby Park"]
    assert book.metrics["satisfied"].codes == (4.0, 5.0)
    assert book.metrics["pool_use"].codes == ("use_pool",)
    assert book.metrics["recommend_balance"].plus == (9.0, 10.0)
    assert book.metrics["recommend_balance"].minus == tuple(float(i) for i in range(7))
    assert book.metrics["cleanliness_good"].base_variable == "classes_used"
    assert book.metrics["satisfaction_mean"].kind == "mean"
    assert book.profile == ("site", "age_band", "sex")
    assert book.targets["site"] == {"Harbour Road": 0.45, "Millfield": 0.35, "Ashby Park": 0.20}


def test_date_like_wave_labels_stay_text_and_yes_no_labels_stay_words():
    text = BOOK_TEXT.replace("break_before: 2025-Q1", "break_before: 2025-09-30")
    # every wave the codebook names is written in one form (parse_codebook refuses a mix)
    text = text.replace("2024-Q1", "2024-03-31").replace("2024-Q2", "2024-06-30")
    text = text.replace("codes: {1: Female, 2: Male, 3: Another way}", "codes: {1: Yes, 2: No, 3: Another way}")
    text = text.replace("merge: {Female: [1], Male: [2]}", "merge: {Yes: [1], No: [2]}")
    book = parse_codebook(text)
    assert book.variables["cleanliness"].break_before == "2025-09-30"
    assert book.variables["sex"].codes[1.0] == "Yes" and book.variables["sex"].codes[2.0] == "No"


BAD_CODEBOOKS = [
    ("share: [4, 5]                     # share of the base", "share: [4, 7]                     # share of the base",
     "metrics.satisfied.share: code 7 is not a code of satisfaction"),
    ("    variable: satisfaction\n    mean: true", "    variable: happiness\n    mean: true",
     "metrics.satisfaction_mean.variable: 'happiness' is not a variable"),
    ('"35-54": [35, 54]', '"35-54": [30, 54]', "groups.age_band.bands.35-54: band [30, 54] overlaps band 16-34 [16, 34]"),
    ("Ashby Park: 0.20}", "Ashby Park: 0.30}", "targets.site: shares sum to 1.1, not 1"),
    ("profile: [site, age_band, sex]", "profile: [site, region]", "profile[1]: 'region' is not a group in groups"),
    ("type: category\n    codes: {1: Full", "type: categorical\n    codes: {1: Full",
     "variables.membership.type: 'categorical' is not one of category, scale, number, multi, text"),
    ("map: {4: 3}", "map: {4: 8}", "variables.membership.recode[0].map.4: code 8 is not a code of membership"),
    ("share: [use_pool]", "share: [use_sauna]", "metrics.pool_use.share: 'use_sauna' is not an option column of classes_used"),
]


@pytest.mark.parametrize("old,new,message", BAD_CODEBOOKS)
def test_bad_codebook_names_the_key_path(tmp_path, old, new, message):
    assert old in BOOK_TEXT
    path = tmp_path / "codebook.yaml"
    path.write_text(BOOK_TEXT.replace(old, new, 1))
    result = run("new", tmp_path / "s", "--codebook", path)
    assert result.exit_code == 1
    assert message in result.output
    assert not (tmp_path / "s").exists()


def test_broken_yaml_gives_its_line_number(tmp_path):
    path = tmp_path / "codebook.yaml"
    lines = BOOK_TEXT.splitlines()
    lines[12] = "    codes: {1: Harbour Road, 2: Millfield"  # an unclosed mapping
    path.write_text("\n".join(lines))
    result = run("new", tmp_path / "s", "--codebook", path)
    assert result.exit_code == 1
    assert "broken YAML at line 14" in result.output
    assert not (tmp_path / "s").exists()


# -- commands that work ---------------------------------------------------------------------

def test_new_check_add_waves_through_the_command_line(tmp_path, wave_csv):
    result = run("new", tmp_path / "s", "--codebook", EXAMPLE_CODEBOOK)
    assert result.exit_code == 0, result.output
    assert "made study" in result.output and "5 metrics" in result.output
    path = wave_csv(n=120, seed=3)
    result = run("check", tmp_path / "s", path, "--wave", "2025-Q3", "--date", "2025-09-30")
    assert result.exit_code == 0, result.output
    assert "0 error(s)" in result.output and "can be added" in result.output
    result = run("add", tmp_path / "s", path, "--wave", "2025-Q3", "--date", "2025-09-30")
    assert result.exit_code == 0, result.output
    frame = example_wave(n=120, seed=3)
    w = frame["wt"].to_numpy()
    assert "respondents (base): 120" in result.output
    assert f"weighted base: {w.sum():,.1f}" in result.output
    assert f"effective base: {w.sum() ** 2 / (w ** 2).sum():,.1f}" in result.output
    dk = int((frame["satisfaction"] == 9).sum())
    assert f"left out of satisfied: {dk} missing code (Don't know)" in result.output
    gym_out = int((frame["use_gym"] == 0).sum())
    assert f"left out of cleanliness_good: {gym_out} outside the base (classes_used)" in result.output
    result = run("waves", tmp_path / "s")
    assert result.exit_code == 0
    assert "2025-Q3" in result.output and "2025-09-30" in result.output and "wave.csv" in result.output


def test_stored_wave_is_harmonized(study_dir, wave_csv):
    frame = example_wave(n=50, seed=4)
    frame = frame.rename(columns={"satisfaction": "sat_overall"})
    frame.loc[:4, "membership"] = 4
    path = wave_csv(frame)
    study = Study(study_dir)
    report = study.add(path, "2024-Q2", "2024-06-30")
    assert any("read as satisfaction" in w for w in report.warnings)
    stored = study.load("2024-Q2")
    assert "satisfaction" in stored.columns and "sat_overall" not in stored.columns
    assert (stored.loc[:4, "membership"] == 3).all()  # recode 4 -> 3 applied in 2024-Q2
    ledger = json.loads((study_dir / "ledger.json").read_text())
    entry = ledger["waves"][0]
    assert entry["rows"] == 50 and entry["date"] == "2024-06-30" and entry["source"] == "wave.csv"
    assert len(entry["source_sha256"]) == 64 and entry["codebook_sha256"] == study.codebook.sha256


def test_first_wave_allows_absence_and_recode_only_in_named_waves(study_dir, wave_csv):
    study = Study(study_dir)
    early = example_wave(n=30, seed=5).drop(columns=["membership"])
    report = study.check(wave_csv(early, name="early.csv"), "2023-Q4", "2023-12-31")
    assert report.ok, report.lines()
    late = example_wave(n=30, seed=6).drop(columns=["membership"])
    report = study.check(wave_csv(late, name="late.csv"), "2024-Q3", "2024-09-30")
    assert not report.ok
    assert any("required column is missing for variable membership" in line for line in report.lines())
    coded = example_wave(n=30, seed=7)
    coded.loc[[0, 3], "membership"] = 4
    report = study.check(wave_csv(coded, name="coded.csv"), "2024-Q3", "2024-09-30")
    assert report.errors[0].column == "membership" and report.errors[0].rows == (2, 5)
    assert "is the wave label right?" in report.errors[0].message


def test_replace_keeps_the_old_version(study_dir, wave_csv):
    study = Study(study_dir)
    study.add(wave_csv(n=40, seed=8, name="a.csv"), "2025-Q3", "2025-09-30")
    with pytest.raises(TrackerError, match="already stored"):
        study.add(wave_csv(n=41, seed=9, name="b.csv"), "2025-Q3", "2025-09-30")
    report = Study(study_dir).add(wave_csv(n=41, seed=9, name="b.csv"), "2025-Q3", "2025-09-30", replace=True)
    assert report.replaced
    study = Study(study_dir)
    assert len(study.load("2025-Q3")) == 41
    entry = study.wave_entries[0]
    assert entry["history"][0]["rows"] == 40
    assert (study_dir / entry["history"][0]["file"]).is_file()
    assert len(pd.read_parquet(study_dir / entry["history"][0]["file"])) == 40


def test_a_renamed_column_gets_a_hint(study_dir, wave_csv):
    frame = example_wave(n=20, seed=17).rename(columns={"recommend": "recommend_score"})
    report = Study(study_dir).check(wave_csv(frame), "2025-Q3", "2025-09-30")
    assert ("required column is missing for variable recommend; is column 'recommend_score' this variable "
            "under a new name? then add it to the variable's aliases") in report.lines()[0]


def test_reads_parquet_xlsx_semicolons_bom_and_latin1(study_dir, tmp_path):
    frame = example_wave(n=25, seed=10)
    study = Study(study_dir)
    frame.to_parquet(tmp_path / "w.parquet")
    assert study.check(tmp_path / "w.parquet").ok
    frame.to_excel(tmp_path / "w.xlsx", index=False)
    assert study.check(tmp_path / "w.xlsx").ok
    (tmp_path / "w.csv").write_text(frame.to_csv(index=False, sep=";"), encoding="utf-8-sig")
    assert study.check(tmp_path / "w.csv").ok
    text = frame.assign(note="café").to_csv(index=False)
    (tmp_path / "l.csv").write_bytes(text.encode("latin-1"))
    assert study.check(tmp_path / "l.csv", encoding="latin-1").ok


# -- bad input: message, exit code, and the study unchanged -----------------------------------

def _bad(frame_fn=None, raw=None, name="bad.csv", args=()):
    return frame_fn, raw, name, args


def _mutate(fn):
    def make():
        frame = example_wave(n=60, seed=11)
        return fn(frame) if fn else frame
    return make


def _set(col, rows, value):
    def fn(frame):
        frame[col] = frame[col].astype(object)
        frame.loc[rows, col] = value
        return frame
    return fn


BAD_FILES = {
    "empty file": (None, b"", "the file is empty", ()),
    "header only": (None, b"member_id,wt,site\n", "a header but no respondents", ()),
    "wrong delimiter": (None, None, "the header was read as a single column; is the delimiter right?", ("colon",)),
    "latin-1 without --encoding": (None, None, "is not valid utf-8-sig text; give the file's encoding with --encoding", ("latin1",)),
    "unknown code": (_mutate(_set("site", [2, 5], 7)), None, "column site: code(s) 7 not in the codebook for site [2 rows: 4, 7]", ()),
    "out-of-range number": (_mutate(_set("age", [0], 120)), None, "column age: value outside the range [16, 99] (e.g. 120) [1 row: 2]", ()),
    "text in a number column": (_mutate(_set("age", [9], "forty")), None, "column age: text where a number belongs (e.g. 'forty') [1 row: 11]", ()),
    "duplicate ids": (_mutate(_set("member_id", [1, 2], "M-dup")), None, "column member_id: 1 id(s) appear more than once (e.g. 'M-dup') [2 rows: 3, 4]", ()),
    "negative weight": (_mutate(_set("wt", [3], -1.0)), None, "column wt: weight is zero or negative [1 row: 5]", ()),
    "zero weight": (_mutate(_set("wt", [4], 0.0)), None, "column wt: weight is zero or negative [1 row: 6]", ()),
    "blank weight": (_mutate(_set("wt", [0, 1], "")), None, "column wt: blank weight [2 rows: 2, 3]", ()),
    "missing required column": (_mutate(lambda f: f.drop(columns=["site"])), None, "column site: required column is missing for variable site", ()),
    "two columns alias one variable": (_mutate(lambda f: f.assign(sat_overall=f["satisfaction"])), None, "column satisfaction, sat_overall: these columns all map to variable satisfaction", ()),
    "multi column not 0/1": (_mutate(_set("use_pool", [7], 2)), None, "column use_pool: an option column holds only 0, 1 or blank (found 2) [1 row: 9]", ()),
    "missing id column": (_mutate(lambda f: f.drop(columns=["member_id"])), None, "column member_id: the id column is missing", ()),
    "duplicate header": (None, b"member_id,member_id\n1,2\n", "column member_id: the column name appears more than once", ()),
    "bad wave label": (_mutate(None), None, "wave label 'Q3/2025' is not valid", ("label",)),
    "bad date": (_mutate(None), None, "fieldwork date '30/09/2025' is not an ISO date", ("date",)),
    "infinite weight": (_mutate(_set("wt", [2], "inf")), None, "column wt: weight is not finite [1 row: 4]", ()),
    "broken xlsx": (None, b"PK\x03\x04 not really a workbook", "cannot be read as XLSX", ("xlsx",)),
}


@pytest.mark.parametrize("case", sorted(BAD_FILES))
def test_bad_wave_file_is_refused_and_study_unchanged(case, study_dir, tmp_path, wave_csv):
    make, raw, message, flags = BAD_FILES[case]
    # one good wave first, so "unchanged" covers a study with content
    Study(study_dir).add(wave_csv(n=30, seed=99, name="first.csv"), "2025-Q1", "2025-03-31")
    before = snapshot(study_dir)
    path = tmp_path / ("bad.xlsx" if "xlsx" in flags else "bad.csv")
    if raw is not None:
        path.write_bytes(raw)
    elif "colon" in flags:
        path.write_text(example_wave(n=10).to_csv(index=False, sep=":"))
    elif "latin1" in flags:
        path.write_bytes(example_wave(n=10).assign(note="Müller").to_csv(index=False).encode("latin-1"))
    else:
        make().to_csv(path, index=False)
    label = "Q3/2025" if "label" in flags else "2025-Q3"
    date = "30/09/2025" if "date" in flags else "2025-09-30"
    result = run("add", study_dir, path, "--wave", label, "--date", date)
    assert result.exit_code == 1, result.output
    assert message in result.output
    assert "Traceback" not in result.output
    assert snapshot(study_dir) == before
    if "label" not in flags and "date" not in flags:
        check = run("check", study_dir, path)
        assert check.exit_code == 1 and message in check.output


def test_duplicate_label_same_file_and_same_date_are_refused(study_dir, wave_csv):
    path = wave_csv(n=30, seed=12, name="w.csv")
    assert run("add", study_dir, path, "--wave", "2025-Q3", "--date", "2025-09-30").exit_code == 0
    before = snapshot(study_dir)
    other = wave_csv(n=31, seed=13, name="other.csv")
    result = run("add", study_dir, other, "--wave", "2025-Q3", "--date", "2025-12-31")
    assert result.exit_code == 1 and "a wave labelled 2025-Q3 is already stored; use --replace" in result.output
    result = run("add", study_dir, path, "--wave", "2025-Q4", "--date", "2025-12-31")
    assert result.exit_code == 1 and "this file is already stored as wave 2025-Q3" in result.output
    result = run("add", study_dir, other, "--wave", "2025-Q4", "--date", "2025-09-30")
    assert result.exit_code == 1 and "wave 2025-Q3 already has fieldwork date 2025-09-30" in result.output
    assert snapshot(study_dir) == before


def test_not_a_study_and_existing_folder(tmp_path):
    result = run("waves", tmp_path)
    assert result.exit_code == 1 and "not a study folder" in result.output
    (tmp_path / "full").mkdir()
    (tmp_path / "full" / "x.txt").write_text("keep me")
    result = run("new", tmp_path / "full", "--codebook", EXAMPLE_CODEBOOK)
    assert result.exit_code == 1 and "exists and is not empty" in result.output
    assert (tmp_path / "full" / "x.txt").read_text() == "keep me"


def test_a_killed_add_leaves_no_half_wave(study_dir, wave_csv, monkeypatch):
    """Interrupt the add at the ledger write (the commit point): the study is as before."""
    from tracker import store

    study = Study(study_dir)
    study.add(wave_csv(n=30, seed=14, name="a.csv"), "2025-Q1", "2025-03-31")
    before = snapshot(study_dir)

    def interrupted(root, ledger):
        raise KeyboardInterrupt

    monkeypatch.setattr(store, "write_ledger", interrupted)
    with pytest.raises(KeyboardInterrupt):
        Study(study_dir).add(wave_csv(n=30, seed=15, name="b.csv"), "2025-Q2", "2025-06-30")
    monkeypatch.undo()
    reopened = Study(study_dir)
    assert reopened.labels == ["2025-Q1"]
    # the orphan Parquet is not part of the study; the next add reuses nothing of it
    reopened.add(wave_csv(n=30, seed=15, name="b.csv"), "2025-Q2", "2025-06-30")
    assert Study(study_dir).labels == ["2025-Q1", "2025-Q2"]
    assert len(Study(study_dir).load("2025-Q2")) == 30
    assert before["ledger.json"] != snapshot(study_dir)["ledger.json"]


def test_kill_during_parquet_write_leaves_no_temporary_file(study_dir, wave_csv, monkeypatch):
    import pandas as pd

    before = snapshot(study_dir)

    def boom(self, *a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(pd.DataFrame, "to_parquet", boom)
    with pytest.raises(KeyboardInterrupt):
        Study(study_dir).add(wave_csv(n=30, seed=16), "2025-Q1", "2025-03-31")
    assert snapshot(study_dir) == before


def test_demo_generator_is_deterministic_and_matches_the_bundled_files(tmp_path):
    from tracker.demo import bundled_waves, write_demo_waves

    write_demo_waves(tmp_path / "w")
    bundled = bundled_waves()
    for path in sorted((tmp_path / "w").iterdir()):
        assert path.read_bytes() == (bundled / path.name).read_bytes(), path.name
    manifest = pd.read_csv(bundled / "manifest.csv")
    assert len(manifest) >= 12
    sizes = [len(pd.read_csv(bundled / f)) for f in manifest["file"]]
    assert min(sizes) >= 800 and max(sizes) <= 1500


def test_demo_command_builds_the_study(tmp_path):
    result = run("demo", tmp_path / "demo")
    assert result.exit_code == 0, result.output
    study = Study(tmp_path / "demo")
    assert len(study.labels) == 13 and study.labels[0] == "2023-Q1"
    # the alias and the recode were applied on intake
    first = study.load("2023-Q1")
    assert "overall" in first.columns and set(np.unique(first["ticket"])) <= {1.0, 2.0, 3.0}
    # weights vary, so effective bases are below bases
    w = first["wt"].to_numpy()
    assert w.sum() ** 2 / (w ** 2).sum() < 0.98 * len(w)


def test_killed_add_processes_leave_whole_waves_only(study_dir, wave_csv):
    """Kill real `tracker add` processes (SIGKILL) in the write phase: the kill is triggered
    by the temporary wave file appearing, then at later moments of the write; every time the
    study opens with either the wave stored whole or not at all (common practice, no source)."""
    import signal
    import subprocess
    import sys
    import time

    from tracker import store

    path = wave_csv(n=3000, seed=31, name="big.csv")
    killed_in_write = 0
    for extra_delay in (0.0, 0.0, 0.005, 0.02, 0.05):
        proc = subprocess.Popen([sys.executable, "-m", "tracker", "add", str(study_dir), str(path),
                                 "--wave", "2025-Q3", "--date", "2025-09-30"],
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 120
        seen = False
        while proc.poll() is None and time.monotonic() < deadline:
            if list((study_dir / "waves").glob(".incoming-*.tmp")):
                seen = True
                break
            time.sleep(0.001)
        time.sleep(extra_delay)
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        killed_in_write += seen
        study = Study(study_dir)
        if study.labels:
            assert study.labels == ["2025-Q3"] and len(study.load("2025-Q3")) == 3000
            break
        # a wave not committed leaves at most a temporary file of a dead writer, which verify names
        assert store.verify(study_dir).ok or all("temporary leftover" in p or "orphan" in p
                                                 for p in store.verify(study_dir).problems)
    assert killed_in_write >= 1  # at least one kill landed in the write phase
    # whatever happened, a (re)add now leaves exactly one whole wave and sweeps the dead writers' files
    again = ["--replace", "--allow-duplicate"] if Study(study_dir).labels else []
    result = run("add", study_dir, path, "--wave", "2025-Q3", "--date", "2025-09-30", *again)
    assert result.exit_code == 0, result.output
    assert len(Study(study_dir).load("2025-Q3")) == 3000
    assert not list(study_dir.rglob(".incoming-*"))


def test_the_complete_example_of_docs_codebook_makes_a_study(tmp_path):
    # the format's own documentation: its complete example must be a codebook the tool accepts
    import re
    from pathlib import Path

    from tracker.study import Study

    doc = (Path(__file__).resolve().parent.parent / "docs" / "codebook.md").read_text()
    block = re.search(r"## A complete example.*?```yaml\n(.*?)```", doc, re.DOTALL).group(1)
    (tmp_path / "codebook.yaml").write_text(block)
    study = Study.create(tmp_path / "s", tmp_path / "codebook.yaml")
    book = study.codebook
    assert set(book.metrics) == {"rated_good", "overall_mean", "came_to_study", "return_balance", "wifi_good"}
    assert {m.kind for m in book.metrics.values()} == {"share", "mean", "balance"}
    assert book.metrics["rated_good"].label == "Visit rated good or excellent"
    assert set(book.groups) == {"branch", "age_band", "helped"} and book.weight == "w_final"
