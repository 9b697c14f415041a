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


def _parquet_range_index_stored(frame, path):
    frame.reset_index(drop=True).to_parquet(path, index=True)  # a plain 0..n-1 index stored as a column


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
    ("0..n-1 index stored as a column", _parquet_range_index_stored, "w.parquet"),
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


# -- the study folder is the tool's alone ---------------------------------------------------

@pytest.fixture
def small_study(tmp_path):
    study = Study.create(tmp_path / "s", EXAMPLE_CODEBOOK)
    example_wave(n=120, seed=1).to_csv(tmp_path / "a.csv", index=False)
    example_wave(n=120, seed=2).to_csv(tmp_path / "b.csv", index=False)
    study.add(tmp_path / "a.csv", "2025-Q1", "2025-03-31")
    study.add(tmp_path / "b.csv", "2025-Q2", "2025-06-30")
    return tmp_path


OUTPUT_CASES = [
    ("waves", ["waves", "{s}", "-o", "{s}/ledger.json"]),
    ("waves md", ["waves", "{s}", "-o", "{s}/waves.md"]),
    ("estimates", ["estimates", "{s}", "-o", "{s}/ledger.json"]),
    ("estimates into waves/", ["estimates", "{s}", "-o", "{s}/waves/x.csv"]),
    ("changes over the codebook", ["changes", "{s}", "-o", "{s}/codebook.yaml"]),
    ("brief", ["brief", "{s}", "-o", "{s}/brief.html"]),
    ("brief json", ["brief", "{s}", "-o", "{s}/ledger.json"]),
    ("chart", ["chart", "{s}", "--metric", "satisfied", "-o", "{s}/ledger.json"]),
    ("check json", ["check", "{s}", "{t}/b.csv", "--format", "json", "-o", "{s}/ledger.json"]),
    ("check over its input", ["check", "{s}", "{t}/b.csv", "--format", "csv", "-o", "{t}/b.csv"]),
    ("a folder", ["estimates", "{s}", "-o", "{t}"]),
    ("a missing folder", ["estimates", "{s}", "-o", "{t}/nowhere/x.csv"]),
    ("a link into the study", ["estimates", "{s}", "-o", "{t}/link.json"]),
]


@pytest.mark.parametrize("name, args", OUTPUT_CASES, ids=[c[0] for c in OUTPUT_CASES])
def test_an_output_never_lands_on_the_study_or_an_input(small_study, name, args):
    t = small_study
    (t / "link.json").symlink_to(t / "s" / "ledger.json")
    before, wave_b = snapshot(t / "s"), (t / "b.csv").read_bytes()
    result = run(*[a.format(s=t / "s", t=t) for a in args])
    assert result.exit_code == 1, result.output
    message = result.output.strip().splitlines()
    assert len(message) == 1 and message[0].startswith("error: "), result.output
    assert any(w in message[0] for w in ("inside the study folder", "is an input", "is a folder",
                                         "does not exist")), message[0]
    assert snapshot(t / "s") == before and (t / "b.csv").read_bytes() == wave_b
    assert not list(t.glob(".incoming-*"))


def test_an_output_is_written_whole_or_not_at_all(small_study, monkeypatch):
    # the renaming write: a failure after the data is made leaves neither a partial file nor a temporary one
    from tracker import store

    t = small_study
    (t / "out.csv").write_text("earlier contents\n")

    def broken_replace(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(store.os, "replace", broken_replace)
    result = run("estimates", t / "s", "-o", t / "out.csv")
    assert result.exit_code == 1 and "no space left on device" in result.output
    assert (t / "out.csv").read_text() == "earlier contents\n"
    assert not list(t.glob(".incoming-*"))


def test_standard_output_failures_end_in_one_line(small_study):
    import subprocess
    import sys

    cmd = [sys.executable, "-m", "tracker", "estimates", str(small_study / "s"), "--format", "csv"]
    with open("/dev/full", "w") as full:
        done = subprocess.run(cmd, stdout=full, stderr=subprocess.PIPE, text=True, timeout=120)
    assert done.returncode == 1
    assert done.stderr.strip().splitlines() == ["error: cannot write to standard output (no space left on device)"]
    reader = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    reader.stdout.close()  # the reading program stops at once, as `| head -0` would
    err = reader.stderr.read()
    assert reader.wait(timeout=120) == 1
    assert err.strip().splitlines() == ["error: cannot write to standard output (the program reading it stopped)"]


# -- damaged data is never used silently ----------------------------------------------------

def _two_wave_study(tmp_path, n=150):
    study = Study.create(tmp_path / "s", EXAMPLE_CODEBOOK)
    for i, (label, date) in enumerate([("2025-Q1", "2025-03-31"), ("2025-Q2", "2025-06-30")]):
        example_wave(n=n + 10 * i, seed=10 + i).to_csv(tmp_path / f"{label}.csv", index=False)
        study.add(tmp_path / f"{label}.csv", label, date)
    return tmp_path / "s"


def _swap(root):
    a, b = root / "waves" / "2025-Q1.parquet", root / "waves" / "2025-Q2.parquet"
    tmp = root / "waves" / "x"
    a.rename(tmp)
    b.rename(a)
    tmp.rename(b)


def _flip_byte(root):
    path = root / "waves" / "2025-Q2.parquet"
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01  # the same size, one bit changed
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("damage", [_swap, _flip_byte], ids=["two wave files swapped", "one bit flipped"])
@pytest.mark.parametrize("command", [["estimates"], ["changes"], ["trends"], ["brief", "-o", "{out}/b.json"]],
                         ids=lambda c: c[0])
def test_a_damaged_stored_wave_is_refused_by_every_command(tmp_path, damage, command):
    root = _two_wave_study(tmp_path)
    run("estimates", root)  # the cache is filled from the sound files first
    damage(root)
    result = run(command[0], root, *[a.format(out=tmp_path) for a in command[1:]])
    assert result.exit_code == 1, result.output
    assert "is damaged or has changed since it was stored" in result.output
    assert f"run 'tracker verify {root}'" in result.output and "Traceback" not in result.output
    assert not (tmp_path / "b.json").exists()
    assert run("verify", root).exit_code != 0


def _forged(path):
    with np.load(path) as data:
        arrays = {k: data[k] for k in data.files}
    for k, v in arrays.items():
        if v.dtype.kind == "f":
            arrays[k] = np.full_like(v, 7.0)  # every statistic 7, the key kept
    np.savez(path, **arrays)


def _truncated(path):
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])


def _garbage(path):
    path.write_bytes(b"PK\x03\x04" + bytes(range(256)) * 40)


def _crc_broken(path):
    data = bytearray(path.read_bytes())
    data[len(data) // 3] ^= 0xFF  # inside a stored array: the zip member's CRC fails
    path.write_bytes(bytes(data))


def _one_cell_short(path):
    with np.load(path) as data:
        arrays = {k: data[k] for k in data.files}
    for k, v in arrays.items():
        if v.dtype.kind == "f" and v.ndim == 2:
            arrays[k] = v[:-1]
    arrays["group"], arrays["level"] = arrays["group"][:-1], arrays["level"][:-1]
    np.savez(path, **arrays)


CACHE_DAMAGE = [("forged with the right key", _forged), ("truncated", _truncated), ("garbage", _garbage),
                ("CRC broken", _crc_broken), ("one cell short", _one_cell_short)]


@pytest.mark.parametrize("name, damage", CACHE_DAMAGE, ids=[c[0] for c in CACHE_DAMAGE])
def test_a_damaged_cache_entry_is_computed_again_never_trusted(tmp_path, name, damage):
    root = _two_wave_study(tmp_path)
    want = Study(root).estimates()
    entry = root / "cache" / "2025-Q2.npz"
    assert entry.is_file()
    damage(entry)
    result = run("estimates", root, "--format", "csv")
    assert result.exit_code == 0 and "Traceback" not in result.output, result.output
    got = Study(root).estimates()
    pd.testing.assert_frame_equal(got, want)


def test_a_damaged_or_rewritten_codebook_is_caught_by_verify(tmp_path):
    root = _two_wave_study(tmp_path)
    book = root / "codebook.yaml"
    text = book.read_text()
    book.write_text(text.replace("Northgate", "Southgate", 1))
    result = run("verify", root)
    assert result.exit_code == 1 and "codebook.yaml: changed since the study recorded it" in result.output
    book.write_text(text + "\nvariables: [broken\n")
    result = run("verify", root)
    assert result.exit_code == 1 and "codebook.yaml: cannot be read" in result.output, result.output
    book.write_text(text)
    assert run("verify", root).exit_code == 0


def test_hidden_rows_of_a_workbook_are_named_before_they_are_read(tmp_path):
    from openpyxl import Workbook

    frame = example_wave(n=30, seed=5)
    wb = Workbook()
    ws = wb.active
    ws.append(list(frame.columns))
    for row in frame.itertuples(index=False):
        ws.append([v.item() if hasattr(v, "item") else v for v in row])
    for r in (5, 9):
        ws.row_dimensions[r].hidden = True  # respondents the sender filtered out of view
    wb.save(tmp_path / "w.xlsx")
    Study.create(tmp_path / "s", EXAMPLE_CODEBOOK)
    result = run("check", tmp_path / "s", tmp_path / "w.xlsx", "--wave", "2025-Q1")
    assert result.exit_code == 0, result.output
    assert "2 row(s) are hidden in the sheet (rows 5, 9); they are read like every other row" in result.output


def test_a_boolean_rake_setting_is_taken_as_written(tmp_path):
    from tracker.codebook import parse_codebook

    text = EXAMPLE_CODEBOOK.read_text()
    assert parse_codebook(text + "rake: {always: false, cap: '0.2:5'}\n").rake == {"always": False, "cap": (0.2, 5.0)}
    assert parse_codebook(text + "rake: {always: true, max_rounds: 50}\n").rake["always"] is True


# -- outputs are safe to open ---------------------------------------------------------------

PAYLOAD = "=cmd|' /C calc'!A0"
LINK = "[see](javascript:alert(1))"


@pytest.fixture(scope="module")
def hostile_study(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("hostile")
    text = EXAMPLE_CODEBOOK.read_text()
    text = text.replace("1: Harbour Road", f'1: "{PAYLOAD}"').replace("Harbour Road: 0.45", f'"{PAYLOAD}": 0.45')
    text = text.replace("2: Millfield", f'2: "{LINK}"').replace("Millfield: 0.35", f'"{LINK}": 0.35')
    text = text.replace("label: Satisfied (top-2 box)", 'label: "@SUM(1+1) top-2 <img src=x onerror=alert(1)>"')
    (tmp / "book.yaml").write_text(text)
    study = Study.create(tmp / "s", tmp / "book.yaml")
    for i, (label, date) in enumerate([("2025-Q1", "2025-03-31"), ("2025-Q2", "2025-06-30")]):
        example_wave(n=400, seed=20 + i).to_csv(tmp / f"{label}.csv", index=False)
        study.add(tmp / f"{label}.csv", label, date)
    return tmp


def _is_number(text):
    try:
        float(text)
    except ValueError:
        return False
    return True


def _csv_cells(text):
    import csv
    import io

    return [c for row in csv.reader(io.StringIO(text)) for c in row]


@pytest.mark.parametrize("args", [["estimates"], ["changes", "--all"], ["composition"], ["trends"]],
                         ids=lambda a: a[0])
def test_no_csv_or_xlsx_cell_can_run_as_a_formula(hostile_study, args):
    from openpyxl import load_workbook

    from tracker.plain import FORMULA

    t = hostile_study
    out = t / f"{args[0]}.csv"
    for result_text in (run(*args, t / "s", "--format", "csv").output,
                        (run(*args, t / "s", "-o", out), out.read_text())[1]):
        cells = [c for c in _csv_cells(result_text) if not _is_number(c)]  # a number is never a formula
        assert any(PAYLOAD in c for c in cells) or args[0] == "trends"
        assert not [c for c in cells if FORMULA.match(c)]  # OWASP, "CSV Injection"
    xlsx = t / f"{args[0]}.xlsx"
    assert run(*args, t / "s", "-o", xlsx).exit_code == 0
    ws = load_workbook(xlsx).active
    values = [c for row in ws.iter_rows() for c in row]
    assert not [c.coordinate for c in values if c.data_type == "f"]
    assert not [c.value for c in values if isinstance(c.value, str) and FORMULA.match(c.value) and not _is_number(c.value)]


def test_markdown_and_html_outputs_carry_no_live_link_or_markup(hostile_study):
    t = hostile_study
    for args, out in ((["estimates"], "e.md"), (["changes", "--all"], "c.md"), (["brief"], "b.md"),
                      (["brief"], "b.html")):
        assert run(*args, t / "s", "-o", t / out).exit_code == 0
        text = (t / out).read_text()
        assert "<img src=x onerror" not in text and 'href="javascript' not in text, out
        if out.endswith(".md"):
            assert "](javascript:" not in text, out
            assert "\\[see\\](javascript&#58;alert(1))" in text, out


def test_what_reaches_the_terminal_cannot_drive_it(hostile_study, tmp_path):
    import shutil

    t = hostile_study
    odd = tmp_path / "wave\x1b]0;owned\x07\x1b[2J.csv"
    shutil.copy(t / "2025-Q1.csv", odd)
    for result in (run("check", t / "s", odd), run("add", t / "s", odd, "--wave", "2025-Q3", "--date", "2025-09-30")):
        assert "\x1b" not in result.output and "\x07" not in result.output
        assert "wave\\x1b]0;owned\\x07\\x1b[2J.csv" in result.output


def test_a_markdown_table_of_the_waves_carries_no_markup(hostile_study, tmp_path):
    import shutil

    odd = tmp_path / "<img src=x onerror=alert(1)>.csv"
    example_wave(n=400, seed=29).to_csv(odd, index=False)
    root = tmp_path / "s"
    shutil.copytree(hostile_study / "s", root)
    assert run("add", root, odd, "--wave", "2025-Q3", "--date", "2025-09-30").exit_code == 0
    assert run("waves", root, "-o", tmp_path / "w.md").exit_code == 0
    text = (tmp_path / "w.md").read_text()
    assert "&lt;img src=x onerror=alert(1)&gt;.csv" in text and "<img" not in text


def test_a_long_label_is_shortened_in_messages(tmp_path):
    text = EXAMPLE_CODEBOOK.read_text().replace("profile: [site, age_band, sex]", "profile: [site, " + "X" * 5000 + "]")
    (tmp_path / "book.yaml").write_text(text)
    result = run("new", tmp_path / "s", "--codebook", tmp_path / "book.yaml")
    assert result.exit_code == 1 and "is not a group in groups" in result.output and "X" * 40 in result.output
    assert len(result.output) < 800


# -- files read as they are, within bounds --------------------------------------------------

def _stored_like(tmp_path, write, name):
    """Store the same wave from a plain CSV and from ``write``'s file: the two stored tables
    must be equal."""
    frame = example_wave(n=80, seed=30)
    study = Study.create(tmp_path / "s", EXAMPLE_CODEBOOK)
    frame.to_csv(tmp_path / "plain.csv", index=False)
    study.add(tmp_path / "plain.csv", "2025-Q1", "2025-03-31")
    path = tmp_path / name
    write(frame, path)
    result = run("add", tmp_path / "s", path, "--wave", "2025-Q2", "--date", "2025-06-30", "--allow-duplicate")
    assert result.exit_code == 0, result.output
    pd.testing.assert_frame_equal(Study(tmp_path / "s").load("2025-Q2"), study.load("2025-Q1"))
    return result.output


@pytest.mark.parametrize("encoding", ["utf-16-le", "utf-16-be"])
def test_utf16_without_a_byte_order_mark_is_read(tmp_path, encoding):
    out = _stored_like(tmp_path, lambda f, p: p.write_bytes(f.to_csv(index=False).encode(encoding)), "w.csv")
    assert f"read as {encoding.upper()} text (no byte-order mark)" in out


def test_cr_only_line_ends_are_read(tmp_path):
    _stored_like(tmp_path, lambda f, p: p.write_bytes(f.to_csv(index=False).replace("\n", "\r").encode()), "w.csv")


def test_trailing_empty_columns_are_ignored(tmp_path):
    def write(frame, path):
        lines = frame.to_csv(index=False).splitlines()
        path.write_text("\n".join(line + ",," for line in lines) + "\n")  # a spreadsheet's two empty columns
    out = _stored_like(tmp_path, write, "w.csv")
    assert "appears more than once" not in out


def test_a_field_over_128_kb_is_an_answer_not_an_error(tmp_path):
    def write(frame, path):
        frame = frame.copy()
        frame["comments"] = ["x" * 200_000] + [""] * (len(frame) - 1)  # a long free-text answer
        frame.to_csv(path, index=False)
    out = _stored_like(tmp_path, write, "w.csv")
    assert "1 column(s) not in the codebook are left out: comments" in out


def test_a_workbook_too_large_to_load_is_refused_while_streaming(tmp_path, monkeypatch):
    from tracker import limits

    frame = example_wave(n=40, seed=31)
    frame.to_excel(tmp_path / "w.xlsx", index=False)
    Study.create(tmp_path / "s", EXAMPLE_CODEBOOK)
    before = snapshot(tmp_path / "s")
    monkeypatch.setattr(limits, "MAX_XLSX_CELLS", 200)  # the real bound, 5,000,000 cells, made small
    result = run("add", tmp_path / "s", tmp_path / "w.xlsx", "--wave", "2025-Q1", "--date", "2025-03-31")
    assert result.exit_code == 1 and "more than 200 cells, more than a workbook is read for" in result.output
    monkeypatch.setattr(limits, "MAX_XLSX_UNPACKED", 1000)
    result = run("add", tmp_path / "s", tmp_path / "w.xlsx", "--wave", "2025-Q1", "--date", "2025-03-31")
    assert result.exit_code == 1 and "the workbook unpacks to" in result.output
    assert snapshot(tmp_path / "s") == before


def test_checking_a_wide_header_grows_with_its_width_not_its_square(tmp_path):
    """80,000 columns: the header checks are single passes (counted, not timed: the number of
    candidate columns for hints is bounded, names are counted once)."""
    from tracker import intake

    calls = {"n": 0}
    real = intake.difflib.get_close_matches

    def counting(*args, **kw):
        calls["n"] += 1
        return real(*args, **kw)

    frame = pd.DataFrame({f"q{i}": ["1"] for i in range(80_000)})
    frame.to_csv(tmp_path / "wide.csv", index=False)
    Study.create(tmp_path / "s", EXAMPLE_CODEBOOK)
    intake.difflib.get_close_matches = counting
    try:
        result = run("check", tmp_path / "s", tmp_path / "wide.csv")
    finally:
        intake.difflib.get_close_matches = real
    assert result.exit_code == 1 and "80000 column(s) not in the codebook" in result.output
    assert calls["n"] == 0  # the near-name hints are for files of a few thousand columns


def test_every_test_the_reliability_page_names_exists_and_every_case_it_quotes_too():
    import re
    from pathlib import Path

    from .test_bad_inputs import CODEBOOK_CASES, WAVE_CASES

    root = Path(__file__).resolve().parent.parent
    page = (root / "docs" / "reliability.md").read_text()
    source = "".join(p.read_text() for p in (root / "tests").glob("test_*.py"))
    named = set(re.findall(r"`(test_[a-z0-9_]+)`", page))
    assert named and not [t for t in named if f"def {t}(" not in source]
    cases = {c[0] for c in WAVE_CASES + CODEBOOK_CASES}
    in_table = {q for line in re.findall(r"bad-input table: ([^|]+)", page) for q in re.findall(r'"([^"]+)"', line)}
    assert in_table and not in_table - cases, in_table - cases
    assert f"{len(WAVE_CASES)} bad wave files and {len(CODEBOOK_CASES)} bad codebooks" in page
