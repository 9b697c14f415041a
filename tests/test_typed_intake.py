"""Intake at the speed of the file, with nothing changed but the speed.

The fast readers (pyarrow's CSV parser, typed Parquet, SPSS, Stata and spreadsheet columns that
never go through text) must give exactly what the careful reader gives: the same harmonized
table, the same problems with the same row numbers, the same content fingerprint. The careful
reader is the reference here (the project's own earlier path, checked by the rest of the suite);
pandas is the reference for the row hashes; the statistics computed a block of metrics at a
time must equal those computed at once.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tests.conftest import EXAMPLE_CODEBOOK, example_wave
from tracker import Study
from tracker import estimates as est
from tracker import intake
from tracker.adding import combined_hashes, content_fingerprint
from tracker.codebook import load_codebook


@pytest.fixture
def study(tmp_path):
    (tmp_path / "book.yaml").write_text(EXAMPLE_CODEBOOK.read_text())
    return Study.create(tmp_path / "s", tmp_path / "book.yaml")


def _careful(monkeypatch):
    monkeypatch.setattr(intake, "_read_csv_arrow", lambda *a, **k: None)


def _checked(study, path, **kw):
    report, table, _ = __import__("tracker.adding", fromlist=["check_file"]).check_file(
        study, path, "2025-Q3", "2025-08-15", None, False, **kw)
    return report, table


def _frame_with_trouble() -> pd.DataFrame:
    frame = example_wave(n=40, seed=8).astype(object)
    frame.loc[3, "satisfaction"] = " 4 "  # spaces around a code
    frame.loc[5, "age"] = ""  # a blank
    frame.loc[7, "cleanliness"] = "7"  # a code the codebook does not know
    frame.loc[9, "wt"] = "heavy"  # text where a weight belongs
    frame.loc[11, "recommend"] = "1e1"  # a number in another notation
    frame["note"] = ""
    frame.loc[13, "note"] = 'said "fine",\nthen left'  # quotes, a delimiter and a line break
    return frame


@pytest.mark.parametrize("shape", ["plain", "crlf", "bom", "blank lines", "quoted breaks", "semicolons",
                                   "decimal comma"])
def test_the_arrow_csv_reader_equals_the_careful_one(study, tmp_path, monkeypatch, shape):
    # reference: the careful (Python csv + pandas) reader of tracker.intake, forced by switching the fast one off
    frame = _frame_with_trouble()
    if shape != "quoted breaks":
        frame["note"] = frame["note"].str.replace("\n", " ")
    sep = ";" if shape in ("semicolons", "decimal comma") else ","
    if shape == "decimal comma":
        frame["wt"] = [str(v).replace(".", ",") for v in frame["wt"]]
    text = frame.to_csv(index=False, sep=sep)
    if shape == "blank lines":
        lines = text.splitlines()
        text = "\n".join(lines[:4] + [""] + lines[4:20] + ["", ""] + lines[20:]) + "\n"
    if shape == "crlf":
        text = text.replace("\n", "\r\n")
    data = text.encode("utf-8")
    if shape == "bom":
        data = b"\xef\xbb\xbf" + data
    path = tmp_path / "w.csv"
    path.write_bytes(data)
    decimal = "," if shape == "decimal comma" else None
    fast = intake.read_wave_file(path, decimal=decimal)
    assert isinstance(fast.table.dtypes.iloc[0], pd.ArrowDtype)  # the fast reader did read it
    fast_report, fast_table = _checked(study, path, decimal=decimal)
    _careful(monkeypatch)
    slow = intake.read_wave_file(path, decimal=decimal)
    assert not isinstance(slow.table.dtypes.iloc[0], pd.ArrowDtype)  # and now the careful one
    slow_report, slow_table = _checked(study, path, decimal=decimal)
    assert fast.first_row == slow.first_row
    assert list(fast.row_numbers) == list(slow.row_numbers)
    assert [p.describe("w") for p in fast_report.problems] == [p.describe("w") for p in slow_report.problems]
    pd.testing.assert_frame_equal(fast_table, slow_table)
    if len(fast_table):
        assert content_fingerprint(fast_table) == content_fingerprint(slow_table)


@pytest.mark.parametrize("text, says", [
    ("member_id,wt\nA,1\nB\n", "do not have the header's"),  # a row cut short
    ("member_id,wt\nA,1\r\nB,2\rC,3\n", None),  # lone CR line ends: the careful reader decides
])
def test_files_the_fast_reader_leaves_to_the_careful_one(tmp_path, text, says):
    # common practice, no source: a file the fast reader cannot vouch for goes to the careful reader
    path = tmp_path / "w.csv"
    path.write_bytes(text.encode())
    assert intake._read_csv_arrow(path, None, None) is None
    if says:
        with pytest.raises(Exception, match=says):
            intake.read_wave_file(path)


def test_bytes_that_are_not_utf8_are_named_by_their_line(tmp_path):
    path = tmp_path / "w.csv"
    path.write_bytes(b"member_id,wt\nA,1\nB\xe9,2\n")
    assert intake._read_csv_arrow(path, None, None) is None
    with pytest.raises(Exception, match="line 3: byte 0xe9"):
        intake.read_wave_file(path)


@pytest.mark.parametrize("kind", ["parquet", "xlsx", "sav", "dta"])
def test_typed_files_give_the_harmonized_table_of_the_same_data_as_csv(study, tmp_path, kind):
    # reference: the same respondents written as CSV and read by the careful reader
    frame = example_wave(n=60, seed=9)
    frame.loc[4, "age"] = np.nan  # a blank number in a typed column
    csv = tmp_path / "w.csv"
    frame.to_csv(csv, index=False)
    path = tmp_path / f"w.{kind}"
    if kind == "parquet":
        frame.to_parquet(path)
    elif kind == "xlsx":
        frame.to_excel(path, index=False)
    else:
        pyreadstat = pytest.importorskip("pyreadstat")
        (pyreadstat.write_sav if kind == "sav" else pyreadstat.write_dta)(frame, str(path))
    typed = intake.read_wave_file(path)
    numeric = [c for c in typed.table.columns if pd.api.types.is_numeric_dtype(typed.table[c].dtype)]
    assert "satisfaction" in numeric and "age" in numeric  # never turned into text
    _, from_csv = _checked(study, csv)
    report, from_typed = _checked(study, path)
    assert report.ok, report.lines()
    pd.testing.assert_frame_equal(from_typed, from_csv, check_dtype=False)
    assert content_fingerprint(from_typed) == content_fingerprint(from_csv)


def test_a_typed_column_is_checked_as_numbers(study, tmp_path):
    frame = example_wave(n=30, seed=10)
    frame["cleanliness"] = frame["cleanliness"].astype(float)
    frame.loc[6, "cleanliness"] = 4.5
    frame.loc[8, "wt"] = -1.0
    path = tmp_path / "w.parquet"
    frame.to_parquet(path)
    report, _ = _checked(study, path)
    text = "\n".join(report.lines())
    assert "code(s) 4.5 not in the codebook for cleanliness" in text and "[1 row: 7]" in text
    assert "weight is zero or negative [1 row: 9]" in text


def test_row_hashes_equal_pandas(rng=np.random.default_rng(4)):
    # reference: pandas.util.hash_pandas_object of the whole frame (what the fingerprint always used)
    frame = pd.DataFrame({"a": rng.normal(size=50), "b": [f"x{i}" for i in range(50)],
                          "c": rng.integers(0, 5, 50).astype(float)})
    frame.loc[3, "a"] = np.nan
    want = pd.util.hash_pandas_object(frame, index=False).to_numpy()
    got = combined_hashes((pd.util.hash_pandas_object(frame[c], index=False).to_numpy() for c in frame), 3)
    assert np.array_equal(got, want)
    empty = pd.DataFrame(index=range(4))
    assert np.array_equal(combined_hashes(iter(()), 0, 4), pd.util.hash_pandas_object(empty, index=False).to_numpy())


@pytest.mark.parametrize("design", ["clusters", "strata only", "raked"])
def test_statistics_a_block_of_metrics_at_a_time_equal_all_at_once(monkeypatch, design):
    # reference: the same function with every metric in one block
    book = load_codebook(EXAMPLE_CODEBOOK)
    frame = example_wave(n=400, seed=11)
    from tracker.intake import WaveFile, check_wave

    table, problems = check_wave(book, WaveFile(EXAMPLE_CODEBOOK, frame.astype(str), 2, ""), "2025-Q3", {})
    assert not [p for p in problems if p.severity == "error"]
    if design == "strata only":
        book = book.__class__(**{**book.__dict__, "clusters": None})
    if design == "raked":
        from tracker.weighting import rake_table

        table, _ = rake_table(book, table)
    metrics, groups = list(book.metrics.values()), list(book.groups)
    whole = est.cell_arrays(book, table, metrics, groups, keep_psu=True)
    monkeypatch.setattr(est, "BLOCK_CELLS", len(table))  # one metric per block
    blocks = est.cell_arrays(book, table, metrics, groups, keep_psu=True)
    for k, v in whole.stats.items():
        np.testing.assert_allclose(blocks.stats[k], v, rtol=1e-12, atol=1e-15, err_msg=k)
    if whole.psu is not None:
        np.testing.assert_allclose(blocks.psu.totals, whole.psu.totals, rtol=1e-12, atol=1e-15)
        assert list(blocks.psu_names) == list(whole.psu_names)
