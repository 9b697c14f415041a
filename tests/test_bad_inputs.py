"""Every bad input the tool meets, in one table: each must end in a clear message naming
what is wrong, exit code 1, no traceback, and a byte-identical study (or no study at all).

Common practice, no source: refusing bad input atomically and saying why. The cases are
the ones a tester tried against the tool (wave files, codebooks, damaged studies).
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner

from tracker import Study
from tracker.cli import main

from .conftest import EXAMPLE_CODEBOOK, example_wave, snapshot

BOOK = EXAMPLE_CODEBOOK.read_text()


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


# -- wave files: (id, writer(tmp) -> path or (path, extra args), expected text) -------------

def csv_of(frame, name="w.csv", **kw):
    def write(tmp):
        path = tmp / name
        frame.to_csv(path, index=False, **kw)
        return path
    return write


def changed(**cols):
    frame = example_wave(n=60, seed=2)
    for col, value in cols.items():
        frame[col] = frame[col].astype(object)
        if callable(value):
            value(frame)
        else:
            frame.loc[3, col] = value
    return frame


def dropped(*cols):
    return example_wave(n=60, seed=2).drop(columns=list(cols))


def raw(data: bytes, name="w.csv"):
    def write(tmp):
        path = tmp / name
        path.write_bytes(data)
        return path
    return write


def good_csv_bytes(seed=2):
    return example_wave(n=60, seed=seed).to_csv(index=False).encode()


def parquet_named(name):
    def write(tmp):
        path = tmp / name
        example_wave(n=60, seed=2).to_parquet(path)
        return path
    return write


def parquet_twice(tmp):
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = tmp / "twice.parquet"
    pq.write_table(pa.Table.from_arrays([pa.array(["a", "b"]), pa.array(["c", "d"])],
                                        names=["member_id", "member_id"]), path)
    return path


def xlsx(build, name="w.xlsx"):
    def write(tmp):
        from openpyxl import Workbook

        wb = Workbook()
        ws = wb.active
        frame = example_wave(n=20, seed=2)
        ws.append(list(frame.columns))
        for row in frame.itertuples(index=False):
            ws.append([v.item() if hasattr(v, "item") else v for v in row])
        build(wb, ws)
        path = tmp / name
        wb.save(path)
        return path
    return write


def two_sheets(wb, ws):
    other = wb.create_sheet("notes")
    other.append(["written by the fieldwork agency"])


def merged(wb, ws):
    ws.merge_cells("H2:H6")


def formula(wb, ws):
    ws["I3"] = "=1+1"  # openpyxl stores no cached value


def dup_header(wb, ws):
    ws["B1"] = "member_id"


def short_row(tmp):
    lines = good_csv_bytes().decode().splitlines()
    lines[5] = ",".join(lines[5].split(",")[:-3])
    path = tmp / "w.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def long_row(tmp):
    lines = good_csv_bytes().decode().splitlines()
    lines[7] = lines[7] + ",1,2"
    path = tmp / "w.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def dup_column_csv(tmp):
    lines = good_csv_bytes().decode().splitlines()
    lines[0] = lines[0].replace("age", "sex", 1)
    path = tmp / "w.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def both_names(tmp):
    frame = example_wave(n=60, seed=2)
    frame["sat_overall"] = frame["satisfaction"]
    path = tmp / "w.csv"
    frame.to_csv(path, index=False)
    return path


def stored_again(tmp):
    return tmp / "first.csv", []


def redelivered(tmp):
    frame = pd.read_csv(tmp / "first.csv").sample(frac=1.0, random_state=3)
    path = tmp / "again.csv"
    path.write_bytes(frame.to_csv(index=False).replace("\n", "\r\n").encode())
    return path


def labelled(label, date="2025-06-30", extra=()):
    def write(tmp):
        path = tmp / "w.csv"
        example_wave(n=60, seed=2).to_csv(path, index=False)
        return path, ["--wave", label, "--date", date, *extra]
    return write


def latin1(tmp):
    path = tmp / "w.csv"
    frame = example_wave(n=60, seed=2)
    frame["member_id"] = frame["member_id"].astype(str) + "\u00e9"
    path.write_bytes(frame.to_csv(index=False).encode("latin-1"))
    return path


def huge_ratio(frame):
    frame["wt"] = 1.0
    frame.loc[0, "wt"] = 1e7


def nul_in_late_id(tmp):
    frame = example_wave(n=300, seed=2)
    frame["member_id"] = frame["member_id"].astype(object)
    frame.loc[250, "member_id"] = "M2-250\x00"  # past the first 4 KB the sniffing reads
    path = tmp / "w.csv"
    frame.to_csv(path, index=False)
    assert path.read_bytes().index(b"\x00") > 4096
    return path


def escape_in_id(frame):
    frame.loc[4, "member_id"] = "M2-4\x1b[31m"


def fifo(tmp):
    import os

    path = tmp / "pipe.csv"
    if not path.exists():
        os.mkfifo(path)
    return path


def sparse(size, name="big.csv"):
    def write(tmp):
        path = tmp / name
        with open(path, "wb") as fh:
            fh.write(good_csv_bytes()[:200])
            fh.truncate(size)  # sparse: no disk used
        return path
    return write


def wide_header(tmp):
    path = tmp / "wide.csv"
    path.write_text(",".join(f"c{i}" for i in range(1_000_000)) + "\n" + ",".join("1" * 1_000_000) + "\n")
    return path


def space_delimited(tmp):
    path = tmp / "w.csv"
    frame = example_wave(n=30, seed=2)
    path.write_text(frame.to_csv(index=False, sep=" "))
    return path


def unbalanced_quote(tmp):
    lines = good_csv_bytes().decode().splitlines()
    lines[4] = lines[4].replace(",", ',"', 1)  # a quote opened and never closed
    path = tmp / "w.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


WAVE_CASES = [
    ("no id column", csv_of(dropped("member_id")), "the id column is missing"),
    ("duplicate ids", csv_of(changed(member_id=lambda f: f.__setitem__("member_id", ["M1"] * len(f)))),
     "appear more than once"),
    ("blank id", csv_of(changed(member_id="")), "blank id"),
    ("no weight column", csv_of(dropped("wt")), "the weight column is missing"),
    ("blank weight", csv_of(changed(wt="")), "blank weight"),
    ("weight as text", csv_of(changed(wt="heavy")), "weight is not a number"),
    ("zero weight", csv_of(changed(wt=0)), "weight is zero or negative"),
    ("negative weight", csv_of(changed(wt=-1.5)), "weight is zero or negative"),
    ("infinite weight", csv_of(changed(wt="inf")), "weight is not finite"),
    ("weight 1e300", csv_of(changed(wt=1e300)), "weight above 1e+12"),
    ("weight ratio", csv_of(changed(wt=huge_ratio)), "times the smallest"),
    ("no strata column", csv_of(dropped("site_stratum")), "the strata column is missing"),
    ("blank stratum", csv_of(changed(site_stratum="")), "blank strata"),
    ("blank cluster", csv_of(changed(visit_day="")), "blank clusters"),
    ("code outside the frame", csv_of(changed(satisfaction=7)), "7"),
    ("text in a scale", csv_of(changed(satisfaction="good")), "text where a number belongs"),
    ("number out of range", csv_of(changed(age=150)), "150"),
    ("text in a number", csv_of(changed(age="forty")), "text where a number belongs"),
    ("multi not 0/1", csv_of(changed(use_pool=2)), "use_pool"),
    ("required column missing", csv_of(dropped("satisfaction")), "required column"),
    ("multi option missing", csv_of(dropped("use_pool")), "option column(s) of classes_used missing"),
    ("name and alias both present", both_names, "all map to variable satisfaction"),
    ("duplicate header in CSV", dup_column_csv, "the column name appears more than once"),
    ("row cut short", short_row, "do not have the header's 14 fields: line 6 (11)"),
    ("row too long", long_row, "line 8 (16)"),
    ("blank column", csv_of(changed(cleanliness=lambda f: f.__setitem__("cleanliness", ""))),
     "the column is blank in every row"),
    ("empty file", raw(b""), "the file is empty"),
    ("whitespace only", raw(b"  \n\n "), "the file is empty"),
    ("header only", raw(good_csv_bytes().splitlines()[0] + b"\n"), "a header but no respondents"),
    ("binary garbage", raw(bytes(range(256)) * 8), "binary data, not CSV text"),
    ("UTF-16 text", raw(good_csv_bytes().decode().encode("utf-16")), "UTF-16 text"),
    ("JSON named .csv", raw(json.dumps([{"member_id": 1}]).encode()), "looks like JSON"),
    ("Parquet named .csv", parquet_named("w.csv"), "Parquet although its name ends in .csv"),
    ("Parquet with a column twice", parquet_twice, "column member_id: the column name appears more than once"),
    ("CSV named .parquet", raw(good_csv_bytes(), "w.parquet"), "is it a CSV file with the wrong name"),
    ("CSV named .xlsx", raw(good_csv_bytes(), "w.xlsx"), "the file is not an XLSX workbook"),
    ("latin-1 without --encoding", latin1, "is not valid utf-8-sig text"),
    ("XLSX with two filled sheets", xlsx(two_sheets), "2 sheets hold data (Sheet, notes); choose one with --sheet"),
    ("XLSX merged cells", xlsx(merged), "merged cells (H2:H6)"),
    ("XLSX formula without a value", xlsx(formula), "formula cell(s) have no stored value (e.g. I3)"),
    ("XLSX duplicate header", xlsx(dup_header), "column member_id: the column name appears more than once"),
    ("the same file again", stored_again, "this file is already stored as wave 2025-Q1"),
    ("re-delivered data", redelivered, "the data are the same as stored wave 2025-Q1"),
    ("label with a newline", labelled("2025-Q2\n"), "is not valid"),
    ("label with a space", labelled("2025 Q2"), "is not valid"),
    ("label too long", labelled("Q" * 41), "at most 40 characters"),
    ("label already stored", labelled("2025-Q1"), "already stored; use --replace"),
    ("--replace of a missing label", labelled("2025-Q2", extra=["--replace"]), "--replace: no wave labelled 2025-Q2"),
    ("date not ISO", labelled("2025-Q2", date="30/06/2025"), "is not an ISO date"),
    ("date taken", labelled("2025-Q2", date="2025-03-31"), "already has fieldwork date 2025-03-31"),
    ("unknown encoding", lambda tmp: (raw(good_csv_bytes())(tmp), ["--encoding", "klingon"]), "unknown encoding"),
    ("NUL inside an id after 4 KB", nul_in_late_id, "id value(s) hold the control character U+0000"),
    ("escape sequence in an id", csv_of(changed(member_id=escape_in_id)), "id value(s) hold the control character U+001B"),
    ("inf in the cluster column", csv_of(changed(visit_day="inf")), "clusters 'inf' is not a finite number"),
    ("NaN in the strata column", csv_of(changed(site_stratum="NaN")), "strata 'NaN' is not a finite number"),
    ("label of another form than the codebook's waves", labelled("2025-06", date="2025-06-30"),
     "wave label '2025-06' is not of the form of the codebook's variables.membership.first_wave ('2024-Q1')"),
    ("a named pipe as the wave", fifo, "is a named pipe, not a regular file"),
    ("/dev/zero as the wave", lambda tmp: Path("/dev/zero"), "/dev/zero: is a device, not a regular file"),
    ("a folder as the wave", lambda tmp: tmp, "is a folder, not a wave file"),
    ("a 2 GB sparse file", sparse(2 << 30), "is 2 GiB, more than the 1 GiB a wave file may be"),
    ("a header of 1,000,000 columns", wide_header, "the header has more than 100,000 columns"),
    ("old .xls workbook", raw(b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(600), "w.xls"),
     "an old-style Excel workbook (.xls), which is not read; open it and save it as .xlsx"),
    (".xls renamed .csv", raw(b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(600)), "old-style Excel workbook (.xls)"),
    ("space-delimited", space_delimited, "the columns are separated by spaces"),
    ("an unbalanced quote", unbalanced_quote, "do not have the header's 14 fields"),
    ("XLSX sheet not there", lambda tmp: (xlsx(lambda wb, ws: None)(tmp), ["--sheet", "Data"]),
     "no sheet named 'Data'"),
    ("a broken Stata file", raw(b"not a stata file at all" * 10, "w.dta"), "cannot be read as a Stata data file"),
    ("a broken SPSS file", raw(b"$FL2" + bytes(300), "w.sav"), "cannot be read as an SPSS data file"),
    ("an SPSS file named .csv", raw(b"$FL2" + bytes(300)), "the file is an SPSS data file although its name ends in "
                                                              ".csv; rename it to end in .sav"),
    ("decimal commas", csv_of(example_wave(n=60, seed=2), sep=";", decimal=","),
     "the file writes decimals with a comma: give --decimal ,"),
    ("--decimal , with commas between columns",
     lambda tmp: (csv_of(example_wave(n=60, seed=2))(tmp), ["--decimal", ","]),
     "a comma cannot also be the decimal mark"),
]


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("bad")
    study = Study.create(tmp / "study", EXAMPLE_CODEBOOK)
    example_wave(n=60, seed=1).to_csv(tmp / "first.csv", index=False)
    study.add(tmp / "first.csv", "2025-Q1", "2025-03-31")
    return tmp


@pytest.mark.parametrize("name, write, expected", WAVE_CASES, ids=[c[0] for c in WAVE_CASES])
def test_a_bad_wave_file_is_refused_whole(base, name, write, expected):
    made = write(base)
    path, extra = made if isinstance(made, tuple) else (made, None)
    args = extra if extra is not None else ["--wave", "2025-Q2", "--date", "2025-06-30"]
    if extra is not None and "--wave" not in extra:
        args = ["--wave", "2025-Q2", "--date", "2025-06-30", *extra]
    before = snapshot(base / "study")
    result = run("add", base / "study", path, *args)
    assert result.exit_code == 1, result.output
    assert expected in result.output, result.output
    assert "Traceback" not in result.output and isinstance(result.exception, SystemExit)  # a message, not a crash
    assert snapshot(base / "study") == before


# -- codebooks: (id, text, expected) --------------------------------------------------------

def nested(depth):
    return "title: x\nid: i\nvariables: " + "[" * depth + "]" * depth + "\nmetrics: {}\n"


def bomb():
    lines = ["a0: &a0 [lol, lol, lol, lol, lol, lol, lol, lol, lol]"]
    lines += [f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * 9) + "]" for i in range(1, 9)]
    return "\n".join(lines) + "\n" + BOOK.replace("label: Centre usually visited", "label: *a8")


CODEBOOK_CASES = [
    ("misspelt weight", BOOK.replace("weight: wt", "wieght: wt"), "wieght: unknown key; did you mean 'weight'?"),
    ("misspelt missing", BOOK.replace("missing: {9:", "mising: {9:"),
     "variables.satisfaction.mising: unknown key; did you mean 'missing'?"),
    ("misspelt label", BOOK.replace("label: Age in years", "lable: Age in years"),
     "variables.age.lable: unknown key; did you mean 'label'?"),
    ("misspelt metric key", BOOK.replace("share: [4, 5]                     #", "shares: [4, 5]  #"),
     "unknown key; did you mean 'share'?"),
    ("duplicate key", BOOK.replace("weight: wt ", "weight: wt\nweight: wt2 "), "key 'weight' is given twice"),
    ("range with NaN", BOOK.replace("range: [16, 99]", "range: [.nan, 99]"), "both ends must be finite"),
    ("band with inf", BOOK.replace('"55+": [55, 99]', '"55+": [55, .inf]'), "both ends must be finite"),
    ("20,000 nested brackets", nested(20000), "nested more than 32 levels deep"),
    ("alias bomb as a label", bomb(), "its aliases (*name) expand to more than 200,000 values"),
    ("unknown type", BOOK.replace("type: number", "type: numeric"), "'numeric' is not one of"),
    ("share code not in the frame", BOOK.replace("share: [4, 5]                     #", "share: [4, 7]  #"),
     "code 7 is not a code of satisfaction"),
    ("metric of an unknown variable", BOOK.replace("variable: recommend", "variable: recommends"),
     "'recommends' is not a variable"),
    ("merge code twice", BOOK.replace("merge: {Female: [1], Male: [2]}", "merge: {Female: [1], Male: [1]}"),
     "code 1 is already in Female"),
    ("id also a variable", BOOK.replace("  site:\n    label: Centre", "  member_id:\n    type: text\n  site:\n    label: Centre"),
     "is the id column and cannot also be a variable"),
    ("bad single-cluster rule", BOOK.replace("title: Northgate", "single_cluster_strata: ignore\ntitle: Northgate"),
     "'ignore' is not one of"),
    ("broken YAML", BOOK.replace("codes: {1: Harbour Road", "codes: {1: [Harbour Road"), "broken YAML at line"),
    ("not a mapping", "- just\n- a list\n", "expected a mapping at the top level"),
    ("no metrics key", BOOK.split("metrics:")[0], "metrics: is required"),
    ("label a list", BOOK.replace("label: Age in years", "label: [Age, years]"), "variables.age.label: expected a text value"),
    ("group on an undeclared design column", BOOK.replace("  site: {variable: site}", "  stratum: {variable: site_stratum}"),
     "'site_stratum' is the strata column; to break results down by it, also declare it under variables"),
    ("rake.always quoted", BOOK + "rake: {always: 'false'}\n", "rake.always: 'false': write true or false, without quotes"),
    ("rake.tolerance 0", BOOK + "rake: {tolerance: 0, max_rounds: 1000}\n", "rake.tolerance: 0: give a number from 1e-12"),
    ("rake.max_rounds 1e9", BOOK + "rake: {max_rounds: 1e9}\n", "rake.max_rounds: '1e9': give a whole number from 1 to 10,000"),
    ("rake.cap not a cap", BOOK + "rake: {cap: 'abc'}\n", "rake.cap: cap 'abc': write it as LOW:HIGH"),
    ("two codes with one label in a group", BOOK.replace("2: Millfield, 3: Ashby Park", "2: Millfield, 3: Millfield"),
     "groups.site: codes 2 and 3 of site share the label 'Millfield'"),
    ("NUL in a label", BOOK.replace("label: Age in years", 'label: "Age\\0 in years"'),
     "variables.age.label: holds the control character U+0000"),
    ("escape sequence in a code label", BOOK.replace("1: Harbour Road", '1: "Harbour\\e[2J Road"'),
     "holds the control character U+001B"),
    ("wave labels of two forms", BOOK.replace("break_before: 2025-Q1", "break_before: 2026-4"),
     "is not written like variables.cleanliness.break_before ('2026-4')"),
    ("population by stratum without strata", BOOK.replace("strata: site_stratum", "") + "population: {1: 100}\n",
     "population: a mapping by stratum needs strata"),
    ("population one number with strata", BOOK + "population: 500\n", "the study has strata: give each stratum's"),
    ("population not a number", BOOK + "population: {1: many, 2: 10, 3: 10}\n", "population.1: 'many': give the"),
    ("recode to an unknown code", BOOK.replace("map: {4: 3}", "map: {4: 8}"), "code 8 is not a code of membership"),
]


@pytest.mark.parametrize("name, text, expected", CODEBOOK_CASES, ids=[c[0] for c in CODEBOOK_CASES])
def test_a_bad_codebook_makes_no_study(tmp_path, name, text, expected):
    book = tmp_path / "book.yaml"
    book.write_text(text)
    result = run("new", tmp_path / "study", "--codebook", book)
    assert result.exit_code == 1, result.output
    assert expected in result.output, result.output
    assert "Traceback" not in result.output
    assert not (tmp_path / "study").exists()


@pytest.mark.parametrize("kind", ["pipe", "device", "sparse"])
def test_a_codebook_that_is_no_file_is_refused_by_type_before_reading(tmp_path, kind):
    import os

    if kind == "pipe":
        book = tmp_path / "book.yaml"
        os.mkfifo(book)  # reading it would hang
        expected = "is a named pipe, not a regular file"
    elif kind == "device":
        book, expected = Path("/dev/zero"), "/dev/zero: is a device, not a regular file"
    else:
        book = tmp_path / "book.yaml"
        with open(book, "wb") as fh:
            fh.truncate(3 << 30)
        expected = "larger than 2 MB"
    result = run("new", tmp_path / "study", "--codebook", book)
    assert result.exit_code == 1 and expected in result.output, result.output
    assert not (tmp_path / "study").exists()


def test_a_codebook_not_in_utf8_and_one_too_large(tmp_path):
    book = tmp_path / "book.yaml"
    book.write_bytes(BOOK.replace("Centre usually visited", "Centre usually visit\u00e9d").encode("latin-1"))
    result = run("new", tmp_path / "s1", "--codebook", book)
    assert result.exit_code == 1 and "not UTF-8 text" in result.output
    book.write_text(BOOK + "#" * 2_100_000 + "\n")
    result = run("new", tmp_path / "s2", "--codebook", book)
    assert result.exit_code == 1 and "larger than 2 MB" in result.output
    assert not (tmp_path / "s1").exists() and not (tmp_path / "s2").exists()


def test_the_table_holds_at_least_sixty_distinct_bad_inputs():
    assert len(WAVE_CASES) + len(CODEBOOK_CASES) + 1 >= 60  # the floor, each case distinct
    assert len({c[0] for c in WAVE_CASES + CODEBOOK_CASES}) == len(WAVE_CASES) + len(CODEBOOK_CASES)


def test_design_columns_are_also_variables_and_groups(tmp_path):
    # results by the stratification column are a common need (common practice, no source)
    text = BOOK.replace("  site:\n    label: Centre usually visited",
                        "  site_stratum:\n    label: Sampling stratum\n    type: category\n"
                        "    codes: {1: North, 2: Central, 3: South}\n  site:\n    label: Centre usually visited")
    text = text.replace("groups:                               # subgroups",
                        "groups:\n  stratum: {variable: site_stratum}\n  # subgroups")
    (tmp_path / "book.yaml").write_text(text)
    study = Study.create(tmp_path / "s", tmp_path / "book.yaml")
    frame = example_wave(n=300, seed=4)
    frame.to_csv(tmp_path / "w.csv", index=False)
    study.add(tmp_path / "w.csv", "2025-Q1", "2025-03-31")
    est = study.estimates(metrics=["satisfied"], by=["stratum"])
    north = est[est["subgroup"] == "North"].iloc[0]
    stored = study.load("2025-Q1")
    assert north["base"] == int(((stored["site_stratum"] == 1) & stored["satisfaction"].isin([1, 2, 3, 4, 5])).sum())
    assert set(est["subgroup"]) == {"Total", "North", "Central", "South"}


def test_a_population_smaller_than_the_sample_refuses_the_wave(tmp_path):
    # each stratum holds 7 visit days (clusters) in the example wave; stratum 1's population says 5
    (tmp_path / "book.yaml").write_text(BOOK + "population: {1: 5, 2: 300, 3: 300}\n")
    Study.create(tmp_path / "s", tmp_path / "book.yaml")
    example_wave(n=200, seed=2).to_csv(tmp_path / "w.csv", index=False)
    before = snapshot(tmp_path / "s")
    result = run("add", tmp_path / "s", tmp_path / "w.csv", "--wave", "2025-Q1", "--date", "2025-03-31")
    assert result.exit_code == 1, result.output
    assert "population: stratum 1: the wave holds more clusters than the population declared" in result.output
    assert snapshot(tmp_path / "s") == before


def test_a_column_and_its_alias_both_present_is_said_once(base):
    """The message says which columns clash and to keep one, and does not also call the
    variable's column missing (common practice, no source: a message must not contradict itself)."""
    result = run("add", base / "study", both_names(base), "--wave", "2025-Q2", "--date", "2025-06-30")
    assert result.exit_code == 1 and "all map to variable satisfaction" in result.output
    assert "is missing for variable satisfaction" not in result.output
