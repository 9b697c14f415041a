"""A codebook drafted from a wave file. The round trip: an SPSS file written by pyreadstat
with value labels and user-missing codes -> draft -> new -> add the same file gives the same
estimates as the same data delivered as CSV under the hand-written demo codebook (common
practice, no source: a draft that changes a number would mislead)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from tracker import Study
from tracker.cli import main

pyreadstat = pytest.importorskip("pyreadstat")
ROOT = Path(__file__).resolve().parent.parent
WAVE = ROOT / "waves" / "riders-2023-Q3.csv"  # a wave the demo codebook does not recode


def _labelled_sav(path: Path) -> None:
    from tracker.codebook import load_codebook

    book = load_codebook(ROOT / "waves" / "codebook.yaml")
    frame = pd.read_csv(WAVE, dtype=str, keep_default_na=False)
    frame = pd.DataFrame({c: (frame[c] if c in ("rider_id", "comments") else pd.to_numeric(frame[c].replace("", np.nan)))
                          for c in frame.columns})
    labels, missing = {}, {}
    for v in book.variables.values():
        if v.type not in ("category", "scale"):
            continue
        col = next(c for c in (v.name, *v.aliases) if c in frame.columns)
        labels[col] = {**{float(k): x for k, x in v.codes.items()}, **{float(k): x for k, x in v.missing.items()}}
        if v.missing:
            missing[col] = [float(k) for k in v.missing]
    pyreadstat.write_sav(frame, str(path), variable_value_labels=labels, missing_ranges=missing,
                         column_labels={"sat_overall": "Overall satisfaction", "punctuality": "Punctuality"})


def test_a_drafted_codebook_gives_the_hand_written_ones_estimates(tmp_path):
    sav = tmp_path / "wave.sav"
    _labelled_sav(sav)
    runner = CliRunner()
    done = runner.invoke(main, ["draft", str(sav), "-o", str(tmp_path / "draft.yaml")])
    assert done.exit_code == 0, done.output
    text = (tmp_path / "draft.yaml").read_text()
    assert "id: rider_id" in text and "weight: wt" in text and "# review:" in text
    assert "type: multi" in text and "mode_bus" in text  # the 0/1 columns sharing the stem mode_
    assert 'label: "Punctuality"' in text and "missing: {9:" in text
    drafted = Study.create(tmp_path / "d", tmp_path / "draft.yaml")
    drafted.add(sav, "2023-Q3", "2023-08-20")
    hand = Study.create(tmp_path / "h", ROOT / "waves" / "codebook.yaml")
    hand.add(WAVE, "2023-Q3", "2023-08-20")
    pairs = {"punctuality_top2": "on_time_good", "cleanliness_top2": "clean_good", "information_top2": "info_good",
             "staff_top2": "staff_good"}
    a = drafted.estimates(metrics=list(pairs), by=[]).set_index("metric")
    b = hand.estimates(metrics=list(pairs.values()), by=[]).set_index("metric")
    for mine, theirs in pairs.items():
        for col in ("value", "se", "base", "effective_base"):
            assert a.loc[mine, col] == pytest.approx(b.loc[theirs, col], rel=1e-12, abs=1e-15), (mine, col)
    again = runner.invoke(main, ["draft", str(sav), "-o", str(tmp_path / "draft.yaml")])
    assert again.exit_code == 1 and "never overwrites" in again.output


def test_a_draft_from_a_csv_file_by_inspection(tmp_path):
    done = CliRunner().invoke(main, ["draft", str(WAVE), "-o", str(tmp_path / "d.yaml"), "--title", "Riders"])
    assert done.exit_code == 0, done.output
    study = Study.create(tmp_path / "s", tmp_path / "d.yaml")
    report = study.add(WAVE, "2023-Q3", "2023-08-20")
    assert report.rows == len(pd.read_csv(WAVE))
    assert study.codebook.title == "Riders" and study.codebook.variables["age"].type == "number"
    # 1-5 with 9 beside them reads as a scale with 9 as don't know: the demo codebook's reading
    assert study.codebook.variables["punctuality"].type == "scale" and 9.0 in study.codebook.variables["punctuality"].missing
    hand = Study.create(tmp_path / "h", ROOT / "waves" / "codebook.yaml")
    hand.add(WAVE, "2023-Q3", "2023-08-20")
    a = study.estimates(metrics=["punctuality_top2"], by=[]).iloc[0]
    b = hand.estimates(metrics=["on_time_good"], by=[]).iloc[0]
    assert a["value"] == pytest.approx(b["value"], rel=1e-12) and a["se"] == pytest.approx(b["se"], rel=1e-12)


def _with_set(path: Path, line: bytes) -> None:
    """Write a multiple-response set into an SPSS file (pyreadstat reads sets but does not
    write them): an extension record of type 7, subtype 7, before the dictionary's end (record
    999), as the SPSS system-file layout has it (PSPP's documentation of the format, "Multiple
    Response Sets Records")."""
    import struct

    raw = path.read_bytes()
    end = raw.find(struct.pack("<ii", 999, 0), 176)  # after the 176-byte file header
    path.write_bytes(raw[:end] + struct.pack("<iiii", 7, 7, 1, len(line)) + line + raw[end:])


def test_the_files_multiple_response_sets_become_multi_questions(tmp_path):
    sav = tmp_path / "wave.sav"
    _labelled_sav(sav)
    _with_set(sav, b"$modes=D1 1 11 Modes used mode_bus mode_tram\n$other=D1 2 5 Other sat_overall punctuality\n")
    assert pyreadstat.read_sav(str(sav), metadataonly=True)[1].mr_sets["modes"]["variable_list"] == [
        "mode_bus", "mode_tram"]  # the record as written is read back (pyreadstat)
    done = CliRunner().invoke(main, ["draft", str(sav), "-o", str(tmp_path / "draft.yaml")])
    assert done.exit_code == 0, done.output
    text = (tmp_path / "draft.yaml").read_text()
    assert "  modes:  # the file's multiple-response set modes\n    label: \"Modes used\"\n    type: multi" in text
    assert "modes_any:" in text and "share: [mode_bus, mode_tram]" in text
    assert "set other (sat_overall, punctuality) is drafted as separate columns: it counts the value 2" in text
    drafted = Study.create(tmp_path / "d", tmp_path / "draft.yaml")
    drafted.add(sav, "2023-Q3", "2023-08-20")
    got = drafted.estimates(metrics=["modes_any"], by=[])
    frame = pd.read_csv(WAVE)
    ticked = (frame[["mode_bus", "mode_tram"]] == 1).any(axis=1)
    # reference: numpy's weighted mean of "either ticked" (common practice, no source)
    assert got["value"].iloc[0] == pytest.approx(np.average(ticked, weights=frame["wt"]), rel=1e-12)
