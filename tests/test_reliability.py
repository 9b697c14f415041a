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

from tracker import Study, store
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
                assert study.entry(la)["source"] == winner.name
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
    assert result.exit_code == 0 and "ledger, codebook and 2 stored file(s) agree" in result.output
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


@pytest.mark.parametrize("suffix", ["md", "pptx", "xlsx"])
def test_an_output_that_cannot_be_written_ends_in_one_line(demo_study, tmp_path, monkeypatch, suffix):
    import contextlib

    @contextlib.contextmanager
    def refused(path, durable=True):
        raise PermissionError(errno.EACCES, "Permission denied")
        yield

    monkeypatch.setattr(store, "incoming", refused)
    result = run("brief", demo_study.root, "-o", tmp_path / f"b.{suffix}")
    assert result.exit_code == 1 and "Traceback" not in result.output
    assert f"{tmp_path / f'b.{suffix}'}: cannot write the file (permission denied); check the folder's permissions" \
        in result.output
    assert not (tmp_path / f"b.{suffix}").exists() and list(tmp_path.iterdir()) == []


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
        doc = yaml.load(book.read_text(), Loader=_Loader)
        doc = json.loads(json.dumps(doc, default=str))  # YAML keys such as 1: become text, as in JSON
        errors = [e.message for e in validator.iter_errors(doc)]
        assert not errors, (book, errors)
    bad = json.loads(json.dumps(yaml.load(EXAMPLE_CODEBOOK.read_text().replace("weight: wt", "wieght: wt"),
                                          Loader=_Loader), default=str))
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


def test_repair_waits_for_an_add_in_flight_and_never_removes_its_wave(study_dir, wave_csv):
    """`tracker add` is stopped (SIGSTOP) the moment its wave file appears, before its ledger
    commit; `verify --repair` started then must wait for the lock and then find nothing to
    remove; the add, let go, stores its wave. Common practice, no source."""
    import os
    import signal
    import time

    caught = 0
    for attempt in range(8):
        label, date = f"{2001 + attempt}-Q1", f"{2001 + attempt}-03-31"
        path = wave_csv(n=20000, seed=200 + attempt, name=f"race{attempt}.csv")
        target = study_dir / "waves" / f"{label}.parquet"
        add = subprocess.Popen([sys.executable, "-m", "tracker", "add", str(study_dir), str(path), "--wave", label,
                                "--date", date, "-q"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        deadline = time.monotonic() + 120
        while not target.exists() and add.poll() is None and time.monotonic() < deadline:
            pass
        os.kill(add.pid, signal.SIGSTOP)
        in_window = label not in json.loads((study_dir / "ledger.json").read_text())["waves"].__repr__()
        repair = subprocess.Popen([sys.executable, "-m", "tracker", "verify", str(study_dir), "--repair"],
                                  stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        time.sleep(1.5)  # the repair is now waiting for the lock the stopped add holds
        assert repair.poll() is None or not in_window, repair.communicate()
        os.kill(add.pid, signal.SIGCONT)
        out, err = add.communicate(timeout=300)
        assert add.returncode == 0, err
        rout, rerr = repair.communicate(timeout=300)
        assert repair.returncode == 0 and "removed" not in rout, rout + rerr
        assert target.is_file() and label in Study(study_dir).labels
        assert store.verify(study_dir).ok
        caught += in_window
        if caught >= 2:
            break
    assert caught >= 1  # at least one stop fell between the wave file and the ledger commit


def test_another_spelling_of_a_stored_file_is_the_same_file(study_dir, wave_csv):
    run("add", study_dir, wave_csv(n=40, seed=3), "--wave", "2025-Q1", "--date", "2025-03-31")
    ledger = json.loads((study_dir / "ledger.json").read_text())
    ledger["waves"][0]["file"] = "./waves/2025-Q1.parquet"
    (study_dir / "ledger.json").write_text(json.dumps(ledger))
    result = run("verify", study_dir, "--repair")
    assert result.exit_code == 0 and "removed" not in result.output, result.output
    assert (study_dir / "waves" / "2025-Q1.parquet").is_file()
    assert len(Study(study_dir).load("2025-Q1")) == 40


LEDGER_DAMAGE = [
    ("an absolute path", lambda w: w.__setitem__("file", "/etc/passwd"), "is not a stored wave file"),
    ("a path out of the study", lambda w: w.__setitem__("file", "waves/../../x.parquet"), "is not a stored wave file"),
    ("file null", lambda w: w.__setitem__("file", None), "is not a stored wave file"),
    ("a date as a number", lambda w: w.__setitem__("date", 20250331), "is not an ISO date"),
    ("rows as text", lambda w: w.__setitem__("rows", "forty"), "is not a whole number"),
    ("a label with a slash", lambda w: w.__setitem__("label", "../x"), "is not a wave label"),
    ("history not a list", lambda w: w.__setitem__("history", "none"), "history is not a list"),
]


@pytest.mark.parametrize("name, damage, expected", LEDGER_DAMAGE, ids=[c[0] for c in LEDGER_DAMAGE])
def test_a_ledger_damaged_in_its_facts_is_named_and_nothing_is_removed(study_dir, wave_csv, name, damage, expected):
    run("add", study_dir, wave_csv(n=40, seed=3), "--wave", "2025-Q1", "--date", "2025-03-31")
    ledger = json.loads((study_dir / "ledger.json").read_text())
    damage(ledger["waves"][0])
    (study_dir / "ledger.json").write_text(json.dumps(ledger))
    before = snapshot(study_dir)
    for args in (["verify", study_dir, "--repair"], ["estimates", study_dir], ["waves", study_dir]):
        result = run(*args)
        assert result.exit_code == 1 and expected in result.output, (args, result.output)
        assert "Traceback" not in result.output and isinstance(result.exception, SystemExit)
    assert snapshot(study_dir) == before


def test_a_ledger_nested_deeply_is_damage_not_a_crash(study_dir):
    (study_dir / "ledger.json").write_text('{"waves": ' + "[" * 100000 + "]" * 100000 + "}")
    for args in (["verify", study_dir], ["waves", study_dir]):
        result = run(*args)
        assert result.exit_code == 1 and "nested too deeply" in result.output, result.output
