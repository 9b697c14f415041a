"""Integrity of what is read and written: answers stay with their ids whatever way a wave
was written, outputs never land on the study, repairs never remove what is needed, and
damaged stored data is refused rather than used.

Common practice, no source: a file's rows are matched to their ids by position within the
file and never by an index a writer stored beside them.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from tracker import Study
from tracker.cli import main

from .conftest import EXAMPLE_CODEBOOK, example_wave, snapshot


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def _filtered():
    frame = example_wave(n=300, seed=7)
    return frame[frame["age"] >= 30]  # a filtered frame: its index has gaps


def _parquet_default(frame, path):
    frame.to_parquet(path)  # pandas stores the index


def _parquet_index_true(frame, path):
    frame.to_parquet(path, index=True)


def _parquet_no_index(frame, path):
    frame.to_parquet(path, index=False)


def _parquet_reversed(frame, path):
    frame.iloc[::-1].to_parquet(path)  # the stored index runs backwards


def _parquet_named_index(frame, path):
    frame.set_index("member_id").to_parquet(path)  # the id lives in the index


def _arrow_preserving(frame, path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.Table.from_pandas(frame, preserve_index=True), path)


def _csv_with_index(frame, path):
    frame.to_csv(path)  # an unnamed first column of row numbers


def _csv_plain(frame, path):
    frame.to_csv(path, index=False)


def _xlsx_with_index(frame, path):
    frame.to_excel(path)


WRITERS = [
    ("to_parquet()", _parquet_default, "w.parquet"),
    ("to_parquet(index=True)", _parquet_index_true, "w.parquet"),
    ("to_parquet(index=False)", _parquet_no_index, "w.parquet"),
    ("reversed frame to_parquet()", _parquet_reversed, "w.parquet"),
    ("set_index(id).to_parquet()", _parquet_named_index, "w.parquet"),
    ("pyarrow preserve_index", _arrow_preserving, "w.parquet"),
    ("to_csv() with the index", _csv_with_index, "w.csv"),
    ("to_csv(index=False)", _csv_plain, "w.csv"),
    ("to_excel() with the index", _xlsx_with_index, "w.xlsx"),
]


@pytest.mark.parametrize("name, write, file", WRITERS, ids=[w[0] for w in WRITERS])
def test_every_answer_stays_with_its_id_however_the_frame_was_written(tmp_path, name, write, file):
    frame = _filtered()
    study = Study.create(tmp_path / "s", EXAMPLE_CODEBOOK)
    write(frame, tmp_path / file)
    study.add(tmp_path / file, "2025-Q1", "2025-03-31")
    stored = study.load("2025-Q1").set_index("member_id")
    want = frame.set_index("member_id").loc[stored.index]
    assert len(stored) == len(frame)
    for col in ["wt", "site_stratum", "visit_day", "site", "age", "sex", "satisfaction", "cleanliness",
                "use_gym", "use_pool", "use_class", "recommend", "membership"]:
        np.testing.assert_array_equal(stored[col].to_numpy(dtype=float), want[col].to_numpy(dtype=float),
                                      err_msg=f"{name}: column {col}")


def test_binary_ids_are_read_as_their_text_and_non_text_bytes_are_refused(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    frame = example_wave(n=40, seed=8)
    table = pa.Table.from_pandas(frame, preserve_index=False)
    ids = pa.array([s.encode() for s in frame["member_id"]], type=pa.binary())
    pq.write_table(table.set_column(0, "member_id", ids), tmp_path / "b.parquet")
    study = Study.create(tmp_path / "s", EXAMPLE_CODEBOOK)
    study.add(tmp_path / "b.parquet", "2025-Q1", "2025-03-31")
    assert list(study.load("2025-Q1")["member_id"]) == list(frame["member_id"])
    bad = pa.array([b"\xff\xfe" + s.encode() for s in frame["member_id"]], type=pa.binary())
    pq.write_table(table.set_column(0, "member_id", bad), tmp_path / "bad.parquet")
    before = snapshot(tmp_path / "s")
    result = run("add", tmp_path / "s", tmp_path / "bad.parquet", "--wave", "2025-Q2", "--date", "2025-06-30")
    assert result.exit_code == 1 and "column member_id: binary data that is not UTF-8 text" in result.output
    assert snapshot(tmp_path / "s") == before
