"""Read a wave file, check it against the codebook and harmonize it.

Nothing here writes to disk: :func:`check_wave` returns the harmonized table and the list
of problems; the study module decides whether to store it.
"""

from __future__ import annotations

import csv
import difflib
import hashlib
import io
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .codebook import Codebook, Variable, _fmt_code
from .errors import TrackerError

MAX_EXAMPLES = 5


@dataclass(frozen=True)
class Problem:
    """One thing wrong (or worth knowing) about a wave file."""

    severity: str  # "error" stops the add; "warning" does not
    column: str
    message: str
    rows: tuple[int, ...] = ()
    count: int = 0

    def describe(self, file: str) -> str:
        where = f"{file}, column {self.column}" if self.column else file
        text = f"{self.severity}: {where}: {self.message}"
        if self.count:
            shown = ", ".join(str(r) for r in self.rows)
            more = f" (and {self.count - len(self.rows)} more)" if self.count > len(self.rows) else ""
            text += f" [{self.count} row{'s' if self.count != 1 else ''}: {shown}{more}]"
        return text


@dataclass
class WaveFile:
    """A wave file as read: every cell as text, plus how to number its rows for messages."""

    path: Path
    table: pd.DataFrame
    first_row: int  # the spreadsheet row number of the first respondent
    sha256: str
    problems: list[Problem] = field(default_factory=list)
    content_sha256: str = ""  # of the harmonized table, set by Study's check


def file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def read_wave_file(path: str | Path, encoding: str | None = None) -> WaveFile:
    """Read CSV (delimiter sniffed, UTF-8 with or without BOM by default), Parquet or XLSX."""
    path = Path(path)
    if not path.is_file():
        raise TrackerError(f"{path}: file not found")
    if path.stat().st_size == 0:
        raise TrackerError(f"{path}: the file is empty")
    sha = file_sha256(path)
    suffix = path.suffix.lower()
    if suffix == ".parquet":
        try:
            table = pd.read_parquet(path)
        except Exception as exc:  # pyarrow raises many types for a broken file
            raise TrackerError(f"{path}: cannot be read as Parquet ({exc})") from None
        table = table.astype(object).where(table.notna(), "")
        table = table.map(lambda v: v if isinstance(v, str) else _plain(v))
        first_row = 1
    elif suffix in (".xlsx", ".xlsm"):
        try:
            table = pd.read_excel(path, dtype=object, engine="openpyxl")
        except Exception as exc:
            raise TrackerError(f"{path}: cannot be read as XLSX ({exc})") from None
        table = table.where(table.notna(), "").map(lambda v: v if isinstance(v, str) else _plain(v))
        first_row = 2
    else:
        table = _read_csv(path, encoding)
        first_row = 2
    table.columns = [str(c).strip() for c in table.columns]
    if table.shape[1] == 0:
        raise TrackerError(f"{path}: the file has no columns")
    if len(table) == 0:
        raise TrackerError(f"{path}: the file has a header but no respondents")
    return WaveFile(path, table, first_row, sha)


def _plain(v) -> str:
    """Text of a cell read from a typed file: 3.0 -> '3', so codes compare as written."""
    if isinstance(v, (bool, np.bool_)):
        return str(int(v))
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return "" if np.isnan(v) else (str(int(v)) if float(v).is_integer() else repr(float(v)))
    return str(v)


def _read_csv(path: Path, encoding: str | None) -> pd.DataFrame:
    raw = path.read_bytes()
    enc = encoding or "utf-8-sig"
    try:
        text = raw.decode(enc)
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise TrackerError(
            f"{path}: line {line}: byte 0x{raw[exc.start]:02x} is not valid {enc} text; "
            "give the file's encoding with --encoding (for example --encoding latin-1)"
        ) from None
    except LookupError:
        raise TrackerError(f"{path}: unknown encoding {enc!r}") from None
    if encoding and text.startswith("\ufeff"):
        text = text[1:]
    if not text.strip():
        raise TrackerError(f"{path}: the file is empty")
    sample = text[:65536]
    try:
        delimiter = csv.Sniffer().sniff(sample, delimiters=",;\t|").delimiter
    except csv.Error:
        delimiter = ","
    header = next(csv.reader(io.StringIO(sample), delimiter=delimiter), [])
    dupes = sorted({c.strip() for c in header if [h.strip() for h in header].count(c.strip()) > 1})
    if dupes:
        raise TrackerError(f"{path}, column {dupes[0]}: the column name appears more than once in the header")
    try:
        table = pd.read_csv(io.StringIO(text), sep=delimiter, dtype=str, keep_default_na=False,
                            skip_blank_lines=True)
    except pd.errors.ParserError as exc:
        raise TrackerError(f"{path}: cannot be read as CSV ({exc})") from None
    return table


def wave_in_span(label: str, first: str | None, last: str | None, order: dict[str, str]) -> bool:
    """Whether wave ``label`` lies within [first, last].

    Waves are ordered by fieldwork date when both labels are known to the study; otherwise
    their labels are compared as text (which orders labels such as 2025-Q1 or 2025-09).
    """
    def before(a: str, b: str) -> bool:
        if a in order and b in order:
            return order[a] < order[b]
        return a < b

    if first is not None and label != first and before(label, first):
        return False
    if last is not None and label != last and before(last, label):
        return False
    return True


def _rows(mask: np.ndarray, first_row: int) -> tuple[tuple[int, ...], int]:
    idx = np.flatnonzero(mask)
    return tuple(int(i) + first_row for i in idx[:MAX_EXAMPLES]), int(idx.size)


def check_wave(codebook: Codebook, wf: WaveFile, label: str, order: dict[str, str],
               rake: bool = False) -> tuple[pd.DataFrame, list[Problem]]:
    """Apply aliases and recodes, check every rule, and return (harmonized table, problems).

    The harmonized table has one column per codebook variable (one per option of a multi
    variable) under its codebook name, codes as floats (blank = NaN), plus the id, weight,
    strata and clusters columns.
    """
    problems: list[Problem] = []
    table = wf.table
    fr = wf.first_row
    cols = list(table.columns)

    def add(sev, col, msg, mask=None):
        rows, count = _rows(mask, fr) if mask is not None else ((), 0)
        problems.append(Problem(sev, col, msg, rows, count))

    dupes = sorted({c for c in cols if cols.count(c) > 1})
    for c in dupes:
        add("error", c, "the column name appears more than once in the header")
    if dupes:
        return pd.DataFrame(), problems

    # Which file column feeds each codebook column (aliases resolved).
    source: dict[str, str] = {}
    claimed: dict[str, list[str]] = {}
    for v in codebook.variables.values():
        if v.type == "multi":
            for opt in v.options:
                if opt in table.columns:
                    source[opt] = opt
            continue
        found = [c for c in (v.name, *v.aliases) if c in table.columns]
        if len(found) > 1:
            claimed[v.name] = found
        elif found:
            source[v.name] = found[0]
    for vname, found in claimed.items():
        add("error", ", ".join(found), f"these columns all map to variable {vname} (its name and aliases); keep one")

    out: dict[str, pd.Series] = {}

    if len(cols) == 1:
        add("error", cols[0], "the header was read as a single column; is the delimiter right?")

    # Design columns.
    for role, col in (("id", codebook.id), ("weight", codebook.weight),
                      ("strata", codebook.strata), ("clusters", codebook.clusters)):
        if col is None:
            continue
        if col not in table.columns:
            if not (role == "weight" and (rake or codebook.rake.get("always"))):
                add("error", col, f"the {role} column is missing")
            continue
        values = table[col].astype(str).str.strip()
        blank = (values == "").to_numpy()
        if role == "weight":
            num = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)
            if blank.any():
                add("error", col, "blank weight", blank)
            bad_text = np.isnan(num) & ~blank
            if bad_text.any():
                add("error", col, f"weight is not a number (e.g. {values[bad_text].iloc[0]!r})", bad_text)
            nonpos = ~np.isnan(num) & ~(num > 0)
            if nonpos.any():
                add("error", col, "weight is zero or negative", nonpos)
            inf = np.isinf(num)
            if inf.any():
                add("error", col, "weight is not finite", inf)
            out[col] = pd.Series(num, index=table.index)
        else:
            if blank.any():
                add("error", col, f"blank {role}", blank)
            if role == "id":
                dup = values.duplicated(keep=False).to_numpy() & ~blank
                if dup.any():
                    add("error", col, f"{values[dup].nunique()} id(s) appear more than once (e.g. {values[dup].iloc[0]!r})", dup)
            out[col] = values

    known = set(source.values()) | set(codebook.design_columns())
    known |= {c for found in claimed.values() for c in found}
    extra = [c for c in cols if c not in known]

    # Variables.
    order_present = []
    for v in codebook.variables.values():
        expected = wave_in_span(label, v.first_wave, v.last_wave, order)
        file_cols = list(v.options) if v.type == "multi" else [v.name]
        present = [c for c in file_cols if c in source]
        if not present:
            if expected:
                what = f"option columns {', '.join(v.options)}" if v.type == "multi" else "column"
                alias = f" (or an alias: {', '.join(v.aliases)})" if v.aliases else ""
                near = ([c for c in extra if v.name.lower() in c.lower() or c.lower() in v.name.lower()]
                        or difflib.get_close_matches(v.name, extra, n=1, cutoff=0.6)) if v.type != "multi" else []
                hint = (f"; is column {near[0]!r} this variable under a new name? then add it to the "
                        f"variable's aliases") if near else ""
                add("error", v.name, f"required {what}{alias} is missing for variable {v.name}{hint}")
            continue
        if v.type == "multi" and len(present) < len(file_cols):
            lost = [c for c in file_cols if c not in present]
            add("error", ", ".join(lost), f"option column(s) of {v.name} missing")
            continue
        if not expected:
            span = f"{v.first_wave or '...'} to {v.last_wave or '...'}"
            add("warning", v.name, f"present although the codebook says it exists only in waves {span}; kept")
        for c in file_cols:
            if source[c] != c:
                add("warning", source[c], f"read as {c} (an alias in the codebook)")
            out[c] = _check_column(v, c, table[source[c]].astype(str).str.strip(), label, add)
            order_present.append(c)

    if extra:
        shown = ", ".join(extra[:10]) + (" ..." if len(extra) > 10 else "")
        problems.append(Problem("warning", "", f"{len(extra)} column(s) not in the codebook are left out: {shown}"))

    design = [c for c in codebook.design_columns() if c in out]
    harmonized = pd.DataFrame({c: out[c] for c in design + order_present}, index=table.index).reset_index(drop=True)
    return harmonized, problems


def _check_column(v: Variable, col: str, values: pd.Series, label: str, add) -> pd.Series:
    blank = (values == "").to_numpy()
    if v.type == "text":
        return values
    num = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)
    text = np.isnan(num) & ~blank
    if text.any():
        add("error", col, f"text where a number belongs (e.g. {values[text].iloc[0]!r})", text)
    ok = ~np.isnan(num)
    if v.type == "multi":
        bad = ok & ~np.isin(num, (0.0, 1.0))
        if bad.any():
            add("error", col, f"an option column holds only 0, 1 or blank (found {_fmt_code(num[bad][0])})", bad)
        return pd.Series(num)
    if v.type == "number":
        if v.range is not None:
            lo, hi = v.range
            out_rng = ok & ((num < lo) | (num > hi))
            if out_rng.any():
                add("error", col, f"value outside the range [{lo:g}, {hi:g}] (e.g. {num[out_rng][0]:g})", out_rng)
        return pd.Series(num)
    # category / scale: recode first, then every value must be a code or a missing code
    for rc in v.recode:
        if label in rc.waves:
            old = num.copy()
            for a, b in rc.map.items():
                num[old == a] = b
    allowed = np.array(sorted(set(v.codes) | set(v.missing)), dtype=float)
    unknown = ok & ~np.isin(num, allowed)
    if unknown.any():
        codes = sorted(set(num[unknown].tolist()))
        shown = ", ".join(_fmt_code(c) for c in codes[:5])
        hint = ""
        scoped = sorted({w for rc in v.recode if set(codes) & set(rc.map) for w in rc.waves})
        if scoped and label not in scoped:
            hint = f" (the codebook recodes it in waves {', '.join(scoped)}; is the wave label right?)"
        add("error", col, f"code(s) {shown} not in the codebook for {v.name}{hint}", unknown)
    return pd.Series(num)
