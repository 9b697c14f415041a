"""Nothing lost, nothing silently wrong: concurrent writers, damaged studies, file-system
failures and re-delivered data (docs/reliability.md lists what is promised).

Common practice, no source: a store's commit point must be atomic and its writers
serialised; the expected values below are the generated files themselves.
"""

from __future__ import annotations

import errno
import json
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor

import pandas as pd
import pytest
from click.testing import CliRunner

from tracker import Study
from tracker import store
from tracker.cli import main

from .conftest import snapshot


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def _add_process(study, path, wave, date):
    return subprocess.run([sys.executable, "-m", "tracker", "add", str(study), str(path), "--wave", wave,
                           "--date", date], capture_output=True, text=True, timeout=300)


def test_concurrent_adds_store_every_wave_once_or_refuse(study_dir, wave_csv):
    """20 pairs of `tracker add` processes started together: 10 pairs with different labels
    (both must be stored), 10 with the same label and different files (exactly one stored, the
    other refused with a non-zero exit); the ledger and the files agree after every pair."""
    with ThreadPoolExecutor(2) as pool:
        for i in range(20):
            same = i >= 10
            a = wave_csv(n=40, seed=100 + 2 * i, name=f"a{i}.csv")
            b = wave_csv(n=40, seed=101 + 2 * i, name=f"b{i}.csv")
            year = 2001 + i
            la, lb = f"{year}-Q1", (f"{year}-Q1" if same else f"{year}-Q2")
            da, db = f"{year}-03-31", (f"{year}-03-31" if same else f"{year}-06-30")
            ra, rb = pool.map(lambda args: _add_process(study_dir, *args), [(a, la, da), (b, lb, db)])
            codes = sorted([ra.returncode, rb.returncode])
            assert codes == ([0, 1] if same else [0, 0]), (ra.stderr, rb.stderr)
            for r in (ra, rb):
                assert "Traceback" not in r.stderr
            study = Study(study_dir)
            assert study.labels.count(la) == 1 and study.labels.count(lb) == 1
            check = store.verify(study_dir)
            assert check.ok, check.lines()
            if same:
                winner = a if ra.returncode == 0 else b
                stored = study.load(la)
                assert study._entry(la)["source"] == winner.name
                assert len(stored) == 40
    assert len(Study(study_dir).labels) == 30


def test_a_second_writer_waits_and_then_refuses(study_dir, wave_csv, monkeypatch):
    monkeypatch.setattr(store, "LOCK_WAIT", 0.2)
    before = snapshot(study_dir)
    with store.study_lock(study_dir):
        result = run("add", study_dir, wave_csv(n=30, seed=3), "--wave", "2025-Q1", "--date", "2025-03-31")
    assert result.exit_code == 1
    assert "another tracker command is changing this study (waited 0.2 s)" in result.output
    assert snapshot(study_dir) == before


def test_verify_finds_each_kind_of_damage_and_repair_removes_only_strays(study_dir, wave_csv):
    study = Study(study_dir)
    study.add(wave_csv(n=30, seed=1, name="a.csv"), "2025-Q1", "2025-03-31")
    study.add(wave_csv(n=30, seed=2, name="b.csv"), "2025-Q2", "2025-06-30")
    result = run("verify", study_dir)
    assert result.exit_code == 0 and "ledger and 2 stored file(s) agree" in result.output
    entry = json.loads((study_dir / "ledger.json").read_text())["waves"][0]
    assert entry["sha256"] == store.sha256_of(study_dir / entry["file"])

    # an orphan and a leftover of a dead writer
    (study_dir / "waves" / "2025-Q9.parquet").write_bytes(b"half")
    (study_dir / "waves" / ".incoming-999999999-x.tmp").write_bytes(b"half")
    # one stored file changed, one missing
    stored = study_dir / "waves" / "2025-Q1.parquet"
    stored.write_bytes(stored.read_bytes()[:-10] + b"0123456789")
    (study_dir / "waves" / "2025-Q2.parquet").unlink()
    result = run("verify", study_dir)
    assert result.exit_code == 1
    assert "waves/2025-Q1.parquet: changed or damaged since it was stored (wave 2025-Q1; SHA-256 differs)" in result.output
    assert "waves/2025-Q2.parquet: missing (wave 2025-Q2)" in result.output
    assert "waves/2025-Q9.parquet: not named by the ledger (an orphan of a failed write)" in result.output
    assert "waves/.incoming-999999999-x.tmp: a temporary leftover of an interrupted write" in result.output
    assert "4 problem(s)" in result.output

    damaged = stored.read_bytes()
    result = run("verify", study_dir, "--repair")
    assert "removed waves/2025-Q9.parquet" in result.output and result.exit_code == 1  # damage stays
    assert not (study_dir / "waves" / "2025-Q9.parquet").exists()
    assert stored.read_bytes() == damaged  # repair never touches a stored wave
    assert "2 problem(s)" in result.output


def test_commands_meeting_a_damaged_study_say_so_and_point_to_verify(study_dir, wave_csv):
    study = Study(study_dir)
    study.add(wave_csv(n=30, seed=1, name="a.csv"), "2025-Q1", "2025-03-31")
    stored = study_dir / "waves" / "2025-Q1.parquet"
    stored.write_bytes(stored.read_bytes()[:100])  # truncated
    result = run("estimates", study_dir)
    assert result.exit_code == 1 and "Traceback" not in result.output
    assert "the stored file of wave 2025-Q1 is damaged" in result.output and "tracker verify" in result.output
    stored.unlink()
    result = run("estimates", study_dir)
    assert result.exit_code == 1 and "the stored file of wave 2025-Q1 is missing" in result.output

    ledger = json.loads((study_dir / "ledger.json").read_text())
    del ledger["waves"][0]["file"]
    (study_dir / "ledger.json").write_text(json.dumps(ledger))
    result = run("waves", study_dir)
    assert result.exit_code == 1
    assert "the ledger is damaged (wave entry 1 (2025-Q1) lacks file)" in result.output
    result = run("verify", study_dir)
    assert result.exit_code == 1 and "wave entry 1 (2025-Q1) lacks file" in result.output


@pytest.mark.parametrize("code, hint", [(errno.ENOSPC, "free some disk space and try again"),
                                        (errno.EACCES, "check the folder's permissions"),
                                        (errno.EROFS, "the file system is read-only")])
def test_file_system_failures_end_in_one_line_and_leave_the_study_unchanged(study_dir, wave_csv, monkeypatch,
                                                                              code, hint):
    study = Study(study_dir)
    study.add(wave_csv(n=30, seed=1, name="a.csv"), "2025-Q1", "2025-03-31")
    before = snapshot(study_dir)

    def fail(*a, **k):
        raise OSError(code, __import__("os").strerror(code))

    for target in ("write_parquet_atomic", "write_ledger"):
        monkeypatch.setattr(store, target, fail)
        result = run("add", study_dir, wave_csv(n=30, seed=2, name="b.csv"), "--wave", "2025-Q2",
                     "--date", "2025-06-30")
        monkeypatch.undo()
        assert result.exit_code == 1 and "Traceback" not in result.output
        assert hint in result.output and "nothing was changed" in result.output
        assert len(result.output.strip().splitlines()) == 1
        assert snapshot(study_dir) == before  # no orphan Parquet left behind either


def test_an_interrupted_ledger_write_leaves_no_orphan(study_dir, wave_csv, monkeypatch):
    before = snapshot(study_dir)

    def interrupted(root, ledger):
        raise KeyboardInterrupt

    monkeypatch.setattr(store, "write_ledger", interrupted)
    with pytest.raises(KeyboardInterrupt):
        Study(study_dir).add(wave_csv(n=30, seed=15, name="b.csv"), "2025-Q2", "2025-06-30")
    assert snapshot(study_dir) == before


def test_re_delivered_data_under_a_new_label_is_refused(study_dir, wave_csv, tmp_path):
    first = wave_csv(n=50, seed=5, name="first.csv")
    Study(study_dir).add(first, "2025-Q1", "2025-03-31")
    frame = pd.read_csv(first).sample(frac=1.0, random_state=1)  # shuffled rows
    again = tmp_path / "again.csv"
    again.write_bytes(frame.to_csv(index=False).replace("\n", "\r\n").encode())  # CRLF line ends
    before = snapshot(study_dir)
    result = run("add", study_dir, again, "--wave", "2025-Q2", "--date", "2025-06-30")
    assert result.exit_code == 1
    assert "the data are the same as stored wave 2025-Q1" in result.output
    assert snapshot(study_dir) == before
    result = run("add", study_dir, again, "--wave", "2025-Q2", "--date", "2025-06-30", "--allow-duplicate")
    assert result.exit_code == 0, result.output


def test_labels_must_match_whole_and_replace_needs_a_stored_label(study_dir, wave_csv):
    path = wave_csv(n=30, seed=1)
    before = snapshot(study_dir)
    result = run("add", study_dir, path, "--wave", "2026-Q2\n", "--date", "2026-06-30")
    assert result.exit_code == 1 and "wave label '2026-Q2\\n' is not valid" in result.output
    result = run("add", study_dir, path, "--wave", "2026-Q2", "--date", "2026-06-30", "--replace")
    assert result.exit_code == 1
    assert "--replace: no wave labelled 2026-Q2 is stored (stored: none)" in result.output
    assert snapshot(study_dir) == before


def test_sweeps_never_touch_a_live_writers_temporary_file(study_dir):
    import os

    live = study_dir / f".incoming-{os.getpid()}-abc.tmp"
    dead = study_dir / ".incoming-999999999-abc.tmp"
    live.write_bytes(b"x")
    dead.write_bytes(b"x")
    store.sweep_incoming(study_dir)
    assert live.exists() and not dead.exists()


def test_implausible_fieldwork_dates_are_warned(study_dir, wave_csv):
    path = wave_csv(n=30, seed=1)
    for date in ("0001-01-01", "9999-12-31"):
        result = run("check", study_dir, path, "--wave", "2025-Q1", "--date", date)
        assert result.exit_code == 0  # a warning: the analyst may mean it
        assert f"fieldwork date {date} lies outside 1950-01-01 to" in result.output


def test_the_next_add_clears_what_a_killed_writer_left(study_dir, wave_csv):
    Study(study_dir).add(wave_csv(n=30, seed=1, name="a.csv"), "2025-Q1", "2025-03-31")
    (study_dir / "waves" / "2025-Q2.parquet").write_bytes(b"an orphan of a killed add")
    (study_dir / "waves" / ".incoming-999999999-y.tmp").write_bytes(b"half")
    assert not store.verify(study_dir).ok
    Study(study_dir).add(wave_csv(n=30, seed=2, name="b.csv"), "2025-Q2", "2025-06-30")
    check = store.verify(study_dir)
    assert check.ok, check.lines()
    assert len(Study(study_dir).load("2025-Q2")) == 30


def test_an_output_that_cannot_be_written_ends_in_one_line(demo_study, tmp_path, monkeypatch):
    import contextlib

    @contextlib.contextmanager
    def refused(path, durable=True):
        raise PermissionError(errno.EACCES, "Permission denied")
        yield

    monkeypatch.setattr(store, "incoming", refused)
    result = run("brief", demo_study.root, "-o", tmp_path / "b.md")
    assert result.exit_code == 1 and "Traceback" not in result.output
    assert f"{tmp_path / 'b.md'}: cannot write the file (permission denied); check the folder's permissions" \
        in result.output
    assert not (tmp_path / "b.md").exists()


def test_the_codebook_schema_is_valid_and_agrees_with_the_parser():
    # jsonschema (Draft 2020-12 validator) as the outside reference for the shipped schema
    import jsonschema
    import yaml

    from tracker.codebook import _Loader, _schema

    from .conftest import EXAMPLE_CODEBOOK

    schema = _schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    validator = jsonschema.Draft202012Validator(schema)
    from pathlib import Path

    for book in (EXAMPLE_CODEBOOK, Path(__file__).parents[1] / "waves" / "codebook.yaml"):
        doc = yaml.load(book.read_text(), Loader=_Loader)  # noqa: S506
        doc = json.loads(json.dumps(doc, default=str))  # YAML keys such as 1: become text, as in JSON
        errors = [e.message for e in validator.iter_errors(doc)]
        assert not errors, (book, errors)
    bad = json.loads(json.dumps(yaml.load(EXAMPLE_CODEBOOK.read_text().replace("weight: wt", "wieght: wt"),
                                          Loader=_Loader), default=str))  # noqa: S506
    assert any("wieght" in e.message for e in validator.iter_errors(bad))


def test_xlsx_with_a_notes_sheet_and_a_header_on_row_four(study_dir, tmp_path):
    from openpyxl import Workbook

    from .conftest import example_wave

    frame = example_wave(n=25, seed=6)
    wb = Workbook()
    notes = wb.active
    notes.title = "notes"
    notes.append(["fieldwork summary"])
    data = wb.create_sheet("data")
    data.append(["Rider survey export"])
    data.append([])
    data.append(["exported 2025-07-01"])
    data.append(list(frame.columns))
    for row in frame.itertuples(index=False):
        data.append([v.item() if hasattr(v, "item") else v for v in row])
    wb.save(tmp_path / "w.xlsx")
    result = run("check", study_dir, tmp_path / "w.xlsx")
    assert result.exit_code == 1 and "2 sheets hold data (notes, data); choose one with --sheet" in result.output
    result = run("add", study_dir, tmp_path / "w.xlsx", "--wave", "2025-Q1", "--date", "2025-03-31", "--sheet", "data")
    assert result.exit_code == 0, result.output
    assert "sheet data: column names read from row 4; rows above it left out" in result.output
    stored = Study(study_dir).load("2025-Q1")
    assert len(stored) == 25 and list(stored["member_id"]) == list(frame["member_id"])
    # an explicit --header-row wins, and a wrong one is refused by the checks it fails
    result = run("check", study_dir, tmp_path / "w.xlsx", "--sheet", "data", "--header-row", "3")
    assert result.exit_code == 1
