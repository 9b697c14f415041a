"""The codebook's history: an edit made in place is never used silently (every command says what
to run, verify names it); `amend` records the version with a note and names the stored waves
whose results change, computing each wave under both versions (common practice, no source: a
changed definition must be visible as such)."""

from __future__ import annotations

import json
import shutil

import pytest
from click.testing import CliRunner

from tracker import Study, TrackerError
from tracker.cli import main


@pytest.fixture
def copy(demo_study, tmp_path):
    root = tmp_path / "study"
    shutil.copytree(demo_study.root, root)
    return root


def test_an_edit_in_place_stops_every_command_until_it_is_recorded(copy):
    text = (copy / "codebook.yaml").read_text()
    (copy / "codebook.yaml").write_text(text.replace("share: [4, 5]", "share: [5]", 1))
    result = CliRunner().invoke(main, ["estimates", str(copy)])
    assert result.exit_code == 1
    assert "edited after the study recorded it; record the change with 'tracker amend" in " ".join(result.output.split())
    verify = CliRunner().invoke(main, ["verify", str(copy)])
    assert verify.exit_code == 1 and "tracker amend" in verify.output
    done = CliRunner().invoke(main, ["amend", str(copy), "--note", "satisfied now top box only"])
    assert done.exit_code == 0, done.output
    assert "results change in 13 wave(s)" in done.output  # the satisfied metric of every wave
    ledger = json.loads((copy / "ledger.json").read_text())
    history = ledger["codebook_history"]
    assert [h["note"] for h in history][-1] == "satisfied now top box only"
    assert history[-1]["sha256"] == ledger["codebook_sha256"] == Study(copy).codebook.sha256
    assert CliRunner().invoke(main, ["verify", str(copy)]).exit_code == 0


def test_amend_names_only_the_waves_a_scoped_change_touches(copy, tmp_path):
    text = (copy / "codebook.yaml").read_text()
    assert "map: {4: 3}" in text  # the demo's recode of ticket, in 2023-Q1 and 2023-Q2
    new = tmp_path / "new.yaml"
    # a label changes nothing; a recode scoped to one wave changes that wave only if a metric reads it
    new.write_text(text.replace("Satisfied overall (top-2 box)", "Satisfied overall (top two)"))
    report = CliRunner().invoke(main, ["amend", str(copy), "--note", "a label", "--codebook", str(new)])
    assert report.exit_code == 0 and "results change in 0 wave(s); unchanged in 13" in report.output
    assert Study(copy).codebook.metrics["satisfied"].label == "Satisfied overall (top two)"


def test_a_note_is_required_and_a_broken_codebook_is_refused(copy, tmp_path):
    with pytest.raises(TrackerError, match="^note: "):
        from tracker.amending import amend

        amend(copy, " ")
    bad = tmp_path / "bad.yaml"
    bad.write_text("title: x\n")
    before = (copy / "ledger.json").read_bytes()
    result = CliRunner().invoke(main, ["amend", str(copy), "--note", "x", "--codebook", str(bad)])
    assert result.exit_code == 1 and (copy / "ledger.json").read_bytes() == before


def test_a_wave_is_removed_with_its_file_kept_and_verify_clean(copy):
    before = Study(copy)
    label = before.labels[-1]
    file = before.entry(label)["file"]
    result = CliRunner().invoke(main, ["remove", str(copy), "--wave", label, "--note", "fieldwork rerun"])
    assert result.exit_code == 0, result.output
    after = Study(copy)
    assert label not in after.labels and (copy / file).is_file()
    ledger = json.loads((copy / "ledger.json").read_text())
    assert ledger["removed"][-1]["label"] == label and ledger["removed"][-1]["note"] == "fieldwork rerun"
    assert CliRunner().invoke(main, ["verify", str(copy)]).exit_code == 0  # the kept file is no orphan
    assert after.changes().wave == after.labels[-1]


def test_a_wave_is_renamed_and_its_results_stay(copy):
    before = Study(copy)
    est = before.estimates(waves=["2025-Q4"]).drop(columns=["wave"]).reset_index(drop=True)
    result = CliRunner().invoke(main, ["rename", str(copy), "--wave", "2025-Q4", "--to", "2025-Q4b"])
    assert result.exit_code == 0, result.output
    after = Study(copy)
    assert "2025-Q4b" in after.labels and "2025-Q4" not in after.labels
    again = after.estimates(waves=["2025-Q4b"]).drop(columns=["wave"]).reset_index(drop=True)
    import pandas as pd

    pd.testing.assert_frame_equal(est, again)
    assert after.entry("2025-Q4b")["renamed_from"][0]["label"] == "2025-Q4"
    assert CliRunner().invoke(main, ["verify", str(copy)]).exit_code == 0


def test_remove_and_rename_refuse_what_would_break_the_study(copy):
    runner = CliRunner()
    named = runner.invoke(main, ["remove", str(copy), "--wave", "2024-Q1", "--note", "x"])
    assert named.exit_code == 1 and "the codebook names wave 2024-Q1" in named.output  # the demo's wording break
    taken = runner.invoke(main, ["rename", str(copy), "--wave", "2025-Q3", "--to", "2025-Q4"])
    assert taken.exit_code == 1 and "already stored" in taken.output
    bad = runner.invoke(main, ["rename", str(copy), "--wave", "2025-Q3", "--to", "bad label"])
    assert bad.exit_code == 1 and "not a valid wave label" in bad.output
    missing = runner.invoke(main, ["remove", str(copy), "--wave", "1999-Q1", "--note", "x"])
    assert missing.exit_code == 1 and "no wave labelled '1999-Q1'" in missing.output
