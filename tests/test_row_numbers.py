"""Row numbers in messages are the file's own: the CSV line a respondent starts on (after blank
lines and quoted line breaks) and the spreadsheet row of an XLSX sheet (after a title above the
table or a blank row before notes below it). Common practice, no source: the reader must find
the row the message names where their editor shows it."""

from __future__ import annotations

import pytest
from openpyxl import Workbook

from tests.conftest import EXAMPLE_CODEBOOK, example_wave
from tracker import Study, TrackerError


@pytest.fixture
def study(tmp_path):
    (tmp_path / "book.yaml").write_text(EXAMPLE_CODEBOOK.read_text())
    return Study.create(tmp_path / "s", tmp_path / "book.yaml")


def _rows_named(report, column: str) -> tuple[int, ...]:
    found = [p for p in report.problems if p.column == column and p.severity == "error"]
    assert found, [p.describe("f") for p in report.problems]
    return found[0].rows


def test_csv_rows_are_the_files_lines_after_blank_lines_and_quoted_breaks(study, tmp_path):
    frame = example_wave(n=12, seed=3)
    frame["wt"] = frame["wt"].astype(object)
    frame.loc[7, "wt"] = "heavy"  # the 8th respondent
    frame["note"] = ""  # a column the codebook does not know, left out with a warning
    frame.loc[3, "note"] = "line one\nline two"  # a quoted line break in the 4th respondent
    text = frame.to_csv(index=False).splitlines()
    lines = text[:3] + [""] + text[3:]  # a blank line after the 2nd respondent
    path = tmp_path / "w.csv"
    path.write_text("\n".join(lines) + "\n")
    report = study.check(path, "2025-Q3", "2025-08-15")
    # header 1, respondents 2-3, blank 4, the 3rd on 5, the 4th on 6-7, the 5th to 8th on 8-11
    assert _rows_named(report, "wt") == (11,)
    assert path.read_text().splitlines()[10].split(",")[1] == "heavy"


def test_xlsx_rows_are_the_sheets_rows_with_a_title_above_and_notes_below(study, tmp_path):
    frame = example_wave(n=6, seed=4)
    wb = Workbook()
    ws = wb.active
    ws.append(["Rider survey, wave 3"])  # row 1: a title
    ws.append([])  # row 2: blank
    ws.append(list(frame.columns))  # row 3: the header
    for row in frame.itertuples(index=False):
        ws.append(list(row))  # rows 4-9
    ws.append([])  # row 10: blank
    ws.append(["n/a"] + [None] * (len(frame.columns) - 1))  # row 11: a note under the table
    path = tmp_path / "w.xlsx"
    wb.save(path)
    report = study.check(path, "2025-Q3", "2025-08-15")
    text = "\n".join(p.describe("w.xlsx") for p in report.problems)
    assert "column names read from row 3" in text
    assert _rows_named(report, "wt") == (11,), text  # the note's row, as the sheet numbers it
    with pytest.raises(TrackerError):
        study.add(path, "2025-Q3", "2025-08-15")


def test_a_decimal_comma_is_named_as_the_cause_and_read_when_asked(study, tmp_path):
    """A semicolon file with decimal commas (as many European exports write them): the message
    names the decimal comma and the option; with --decimal , the wave reads, and its estimates
    equal those of the same data written with decimal points (common practice, no source)."""
    from click.testing import CliRunner

    from tracker.cli import main

    frame = example_wave(n=80, seed=6)
    frame.to_csv(tmp_path / "dots.csv", index=False)
    frame.to_csv(tmp_path / "commas.csv", index=False, sep=";", decimal=",")
    assert "," in (tmp_path / "commas.csv").read_text().splitlines()[1]
    runner = CliRunner(env={"COLUMNS": "200"})
    refused = runner.invoke(main, ["add", str(study.root), str(tmp_path / "commas.csv"), "--wave", "2025-Q3",
                                   "--date", "2025-08-15"])
    assert refused.exit_code == 1
    assert "the file writes decimals with a comma: give --decimal ," in " ".join(refused.output.split())
    added = runner.invoke(main, ["add", str(study.root), str(tmp_path / "commas.csv"), "--wave", "2025-Q3",
                                 "--date", "2025-08-15", "--decimal", ","])
    assert added.exit_code == 0, added.output
    (tmp_path / "b.yaml").write_text(EXAMPLE_CODEBOOK.read_text())
    other = Study.create(tmp_path / "t", tmp_path / "b.yaml")
    other.add(tmp_path / "dots.csv", "2025-Q3", "2025-08-15")
    import pandas as pd

    pd.testing.assert_frame_equal(Study(study.root).estimates(), other.estimates(), check_exact=False, rtol=1e-12)
    both = runner.invoke(main, ["check", str(study.root), str(tmp_path / "dots.csv"), "--decimal", ","])
    assert "a comma cannot also be the decimal mark" in both.output
