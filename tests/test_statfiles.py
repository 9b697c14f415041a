"""Waves from statistics packages (SPSS, Stata, SAS) through pyreadstat: the same estimates as
the same data delivered as CSV (common practice, no source: a file format must not change a
number), and the files' value labels and user-missing codes compared with the codebook and
with the wave before. The files are written here with pyreadstat itself (a reference library
of the package registry), with the labels of the demo codebook; the check values are the
tool's own CSV intake of the same data, itself checked against R and samplics elsewhere."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from tracker import Study, TrackerError
from tracker.cli import main

pyreadstat = pytest.importorskip("pyreadstat")

ROOT = Path(__file__).resolve().parent.parent
WAVE = ROOT / "waves" / "riders-2023-Q1.csv"
BOOK = ROOT / "waves" / "codebook.yaml"


def _frame() -> pd.DataFrame:
    """The demo's first wave with numbers as numbers (blank cells missing)."""
    frame = pd.read_csv(WAVE, dtype=str, keep_default_na=False)
    out = {}
    for c in frame.columns:
        if c in ("rider_id", "comments"):
            out[c] = frame[c]
        else:
            out[c] = pd.to_numeric(frame[c].replace("", np.nan))
    return pd.DataFrame(out)


def _labels(renames: dict[str, str] | None = None) -> dict[str, dict[float, str]]:
    """The demo codebook's codes and labels, by the file's column names."""
    from tracker.codebook import load_codebook

    book = load_codebook(BOOK)
    columns = set(pd.read_csv(WAVE, nrows=0).columns)
    out = {}
    for v in book.variables.values():
        if v.type not in ("category", "scale"):
            continue
        col = next((c for c in (v.name, *v.aliases) if c in columns), None)
        if col is not None:
            out[col] = {**{float(k): lab for k, lab in v.codes.items()}, **{float(k): lab for k, lab in v.missing.items()}}
    for col, new in (renames or {}).items():
        out[col] = {**out[col], **{float(k): lab for k, lab in json.loads(new).items()}}
    return out


WRITERS = {
    ".sav": lambda df, path, labels: pyreadstat.write_sav(df, path, variable_value_labels=labels),
    ".zsav": lambda df, path, labels: pyreadstat.write_sav(df, path, variable_value_labels=labels, compress=True),
    ".dta": lambda df, path, labels: pyreadstat.write_dta(df, path, variable_value_labels=labels),
    ".xpt": lambda df, path, labels: pyreadstat.write_xport(df, path),
    ".por": lambda df, path, labels: pyreadstat.write_por(df, path),
}


def _study(tmp_path: Path, name: str) -> Study:
    return Study.create(tmp_path / name, BOOK)


@pytest.fixture(scope="module")
def csv_estimates(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("csv")
    study = Study.create(tmp / "s", BOOK)
    study.add(WAVE, "2023-Q1", "2023-02-20")
    return study.estimates()


@pytest.mark.parametrize("suffix", list(WRITERS))
def test_a_statistics_package_file_gives_the_csv_estimates(tmp_path, csv_estimates, suffix):
    frame = _frame()
    if suffix == ".por":  # pyreadstat refuses the demo's longer names in this format: see the next test
        return
    path = tmp_path / f"wave{suffix}"
    WRITERS[suffix](frame, str(path), _labels())
    study = _study(tmp_path, "s")
    report = study.add(path, "2023-Q1", "2023-02-20")
    assert report.rows == len(frame)
    got = study.estimates()
    pd.testing.assert_frame_equal(got.reset_index(drop=True), csv_estimates.reset_index(drop=True),
                                  check_exact=False, rtol=1e-12, atol=1e-12)
    entry = study.entry("2023-Q1")
    if suffix in (".sav", ".zsav", ".dta"):  # the formats that carry value labels
        assert entry["value_labels"]["overall"]["5"] == "Very satisfied"


def test_a_label_that_changed_since_the_wave_before_is_named(tmp_path):
    frame = _frame()
    first, second = tmp_path / "a.sav", tmp_path / "b.sav"
    pyreadstat.write_sav(frame, str(first), variable_value_labels=_labels())
    changed = _labels({"punctuality": json.dumps({"4": "Mostly on time"})})
    pyreadstat.write_sav(frame.assign(rider_id=frame["rider_id"] + "b"), str(second), variable_value_labels=changed)
    study = _study(tmp_path, "s")
    study.add(first, "2023-Q1", "2023-02-20")
    report = study.check(second, "2023-Q2", "2023-05-20")
    assert report.ok
    lines = [p.describe("b.sav") for p in report.problems]
    label = _labels()["punctuality"][4.0]
    hit = [line for line in lines if "code 4 was labelled" in line]
    assert hit and f"code 4 was labelled {label!r} in 2023-Q1 and is 'Mostly on time' now" in hit[0]
    assert "break_before" in hit[0]


def test_user_missing_codes_and_unknown_labels_are_named(tmp_path):
    frame = _frame()
    labels = _labels()
    labels["staff"] = {**labels["staff"], 7.0: "Refused"}
    path = tmp_path / "w.sav"
    pyreadstat.write_sav(frame, str(path), variable_value_labels=labels, missing_ranges={"fares": [1]})
    study = _study(tmp_path, "s")
    report = study.check(path, "2023-Q1", "2023-02-20")
    text = "\n".join(p.describe("w.sav") for p in report.problems)
    assert "code(s) 7 ('Refused') of staff, which the codebook does not list" in text
    assert "code(s) 1 of fares are missing values in the file but answers in the codebook" in text


def test_a_spss_file_with_another_name_is_named_for_what_it_is(tmp_path):
    path = tmp_path / "w.sav"
    pyreadstat.write_sav(_frame(), str(path))
    wrong = tmp_path / "w.csv"
    shutil.copy(path, wrong)
    result = CliRunner().invoke(main, ["check", str(_study(tmp_path, "s").root), str(wrong)])
    assert result.exit_code == 1
    assert "the file is an SPSS data file although its name ends in .csv; rename it to end in .sav" in result.output


def test_a_broken_statistics_file_is_refused_clearly(tmp_path):
    path = tmp_path / "w.dta"
    path.write_bytes(b"not a stata file at all" * 10)
    with pytest.raises(TrackerError, match=r"w.dta: cannot be read as a Stata data file"):
        _study(tmp_path, "s").check(path, "2023-Q1", "2023-02-20")


SHORT_BOOK = """title: short names
id: rid
weight: w
variables:
  q:
    label: A rating
    type: scale
    codes: {1: a, 2: b, 3: c, 4: d, 5: e}
  g:
    label: A split
    type: category
    codes: {1: one, 2: two}
groups:
  g: {variable: g}
metrics:
  top2: {label: Top two, variable: q, share: [4, 5]}
  avg: {label: Mean, variable: q, mean: true}
"""


def test_an_spss_portable_file_gives_the_csv_estimates(tmp_path):
    """The portable format holds names of 8 characters at most (pyreadstat refuses longer ones),
    so this study's names are short."""
    rng = np.random.default_rng(3)
    n = 300
    frame = pd.DataFrame({"rid": [f"r{i}" for i in range(n)], "w": rng.uniform(0.5, 2, n).round(6),
                          "q": rng.integers(1, 6, n).astype(float), "g": rng.integers(1, 3, n).astype(float)})
    frame.loc[::17, "q"] = np.nan
    (tmp_path / "book.yaml").write_text(SHORT_BOOK)
    frame.to_csv(tmp_path / "w.csv", index=False)
    pyreadstat.write_por(frame, str(tmp_path / "w.por"))
    a = Study.create(tmp_path / "a", tmp_path / "book.yaml")
    a.add(tmp_path / "w.csv", "W1", "2025-01-15")
    b = Study.create(tmp_path / "b", tmp_path / "book.yaml")
    b.add(tmp_path / "w.por", "W1", "2025-01-15")
    pd.testing.assert_frame_equal(a.estimates(), b.estimates(), check_exact=False, rtol=1e-12, atol=1e-12)
