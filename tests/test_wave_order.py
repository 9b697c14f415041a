"""A fieldwork date that puts a wave in another order than its label (a date typed a year off)
is named at check and add, naming both waves, and marked by `waves` (common practice, no
source: labels such as 2024-Q4 or 2025-03 sort as time, so a clash is a slip of one of them)."""

from __future__ import annotations

from pathlib import Path

from click.testing import CliRunner

from tracker import Study
from tracker.cli import main
from tracker.store import order_clashes

ROOT = Path(__file__).resolve().parent.parent


def test_the_clash_is_found_only_among_labels_that_sort_as_time():
    assert order_clashes([("2024-Q3", "2024-08-20"), ("2024-Q4", "2023-12-13")]) == [("2024-Q3", "2024-Q4")]
    assert order_clashes([("2024-Q3", "2024-08-20"), ("2024-Q4", "2024-11-20")]) == []
    assert order_clashes([("W2", "2024-08-20"), ("W3", "2023-12-13")]) == []  # labels that need not sort
    assert order_clashes([("2024-03", "2024-08-20"), ("2024-Q4", "2023-12-13")]) == []  # two forms


def test_check_add_and_waves_name_a_date_out_of_label_order(tmp_path):
    study = Study.create(tmp_path / "s", ROOT / "waves" / "codebook.yaml")
    study.add(ROOT / "waves" / "riders-2023-Q3.csv", "2024-Q3", "2024-08-20")
    runner = CliRunner(env={"COLUMNS": "100"})
    args = [str(ROOT / "waves" / "riders-2023-Q4.csv"), "--wave", "2024-Q4", "--date", "2023-12-13"]
    checked = runner.invoke(main, ["check", str(study.root), *args])
    expected = ("fieldwork date 2023-12-13 puts wave 2024-Q4 before wave 2024-Q3 (2024-08-20), though their "
                "labels sort the other way; is the date or the label a slip?")
    assert expected in " ".join(checked.output.split())
    added = runner.invoke(main, ["add", str(study.root), *args])
    assert added.exit_code == 0 and expected in " ".join(added.output.split())
    listed = runner.invoke(main, ["waves", str(study.root)]).output
    assert "2024-Q4 !" in listed and "2024-Q3 !" in listed
    assert "the fieldwork dates put these waves in another order than their labels" in listed


def test_a_recode_applied_at_add_is_reported_with_its_count(tmp_path):
    """The demo codebook recodes ticket code 4 -> 3 in 2023-Q1; add says so, with the rows
    counted from the file itself (common practice, no source: nothing changes data silently)."""
    import pandas as pd

    study = Study.create(tmp_path / "s", ROOT / "waves" / "codebook.yaml")
    report = study.add(ROOT / "waves" / "riders-2023-Q1.csv", "2023-Q1", "2023-02-20")
    fours = int((pd.read_csv(ROOT / "waves" / "riders-2023-Q1.csv")["ticket"] == 4).sum())
    assert fours > 0
    assert any(f"recoded as the codebook says for 2023-Q1: code 4 -> 3 in {fours:,} row(s)" in w
               for w in report.warnings)
    later = study.add(ROOT / "waves" / "riders-2023-Q3.csv", "2023-Q3", "2023-08-20")
    assert not any("recoded" in w for w in later.warnings)  # the recode is scoped to its waves
