"""The per-wave statistics cache: derived data that is never the source of truth."""

from __future__ import annotations

import fcntl
import os
import shutil

import numpy as np
import pandas as pd
import pytest

from tracker import Study, store
from tracker.cache import read_cells


@pytest.fixture
def demo_copy(demo_study, tmp_path):
    shutil.copytree(demo_study.root, tmp_path / "study")
    shutil.rmtree(tmp_path / "study" / "cache", ignore_errors=True)
    return tmp_path / "study"


def fresh(root):
    """Estimates computed from the waves themselves (the cache moved away and back)."""
    shutil.rmtree(root / "cache", ignore_errors=True)
    return Study(root).estimates(detail=True)


def test_cached_estimates_equal_the_computed_ones_exactly(demo_copy):
    first = Study(demo_copy).estimates(detail=True)  # computes and stores
    assert sorted(p.stem for p in (demo_copy / "cache").glob("*.npz")) == sorted(Study(demo_copy).labels)
    again = Study(demo_copy).estimates(detail=True)  # reads the cache
    pd.testing.assert_frame_equal(first, again)


def test_a_replaced_wave_or_a_changed_codebook_rebuilds_the_entry(demo_copy):
    s = Study(demo_copy)
    s.estimates()
    label = s.labels[-1]
    key = s.cellstore.key(label)
    assert read_cells(demo_copy, label, key) is not None
    table = s.load(label)
    path = demo_copy.parent / "again.parquet"
    table.iloc[:-5].to_parquet(path)  # the wave replaced by a different file: a new file, a new key
    s.add(path, label, s.dates()[label], replace=True)
    s2 = Study(demo_copy)
    assert s2.cellstore.key(label) != key and read_cells(demo_copy, label, key) is None  # the old entry is gone
    got = read_cells(demo_copy, label, s2.cellstore.key(label))  # add stored the new wave's
    assert got is not None and got.stats["base"][0].max() <= len(table) - 5
    text = (demo_copy / "codebook.yaml").read_text()
    (demo_copy / "codebook.yaml").write_text(text + "\n# a comment changes the codebook's SHA-256\n")
    from tracker.amending import amend

    amend(demo_copy, "a comment added")  # an edit in place is recorded before the study is used again
    s3 = Study(demo_copy)
    assert read_cells(demo_copy, label, s3.cellstore.key(label)) is None


def test_a_damaged_entry_is_ignored_and_rewritten(demo_copy):
    expected = fresh(demo_copy)
    for p in (demo_copy / "cache").glob("*.npz"):
        p.write_bytes(b"not an npz file")
    got = Study(demo_copy).estimates(detail=True)
    pd.testing.assert_frame_equal(expected, got)
    s = Study(demo_copy)
    assert all(read_cells(demo_copy, w, s.cellstore.key(w)) is not None for w in s.labels)


def test_a_busy_study_is_read_without_writing_the_cache(demo_copy):
    fd = os.open(demo_copy / store.LOCK, os.O_RDWR)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # another writer at work
        est = Study(demo_copy).estimates()
        assert len(est) and not list((demo_copy / "cache").glob("*.npz"))
    finally:
        os.close(fd)


def test_a_study_that_cannot_be_written_still_answers(demo_copy, monkeypatch):
    import contextlib
    import errno

    @contextlib.contextmanager
    def refused(path, durable=True):  # a read-only folder (the test may run as root, who could write anyway)
        raise PermissionError(errno.EACCES, "Permission denied")
        yield

    monkeypatch.setattr(store, "incoming", refused)
    assert len(Study(demo_copy).estimates()) and not list((demo_copy / "cache").glob("*.npz"))


def test_verify_leaves_the_cache_alone_and_sweeps_its_leftovers(demo_copy):
    Study(demo_copy).estimates()
    assert store.verify(demo_copy).ok
    dead = demo_copy / "cache" / ".incoming-999999999-x.tmp"
    dead.write_bytes(b"half")
    found = store.verify(demo_copy)
    assert not found.ok and any("cache/.incoming-999999999-x.tmp" in line for line in found.problems)
    store.verify(demo_copy, repair=True)
    assert not dead.exists() and store.verify(demo_copy).ok


def test_add_stores_the_new_waves_statistics(demo_copy, tmp_path):
    s = Study(demo_copy)
    label = s.labels[-1]
    assert read_cells(demo_copy, label, s.cellstore.key(label)) is None
    table = s.load(label)
    path = tmp_path / "again.parquet"
    table.to_parquet(path)
    s.add(path, label, s.dates()[label], replace=True, allow_duplicate=True)
    s2 = Study(demo_copy)
    cells = read_cells(demo_copy, label, s2.cellstore.key(label))
    assert cells is not None
    assert np.allclose(cells.stats["value"], s2.cellstore.cells(label).stats["value"], equal_nan=True)
