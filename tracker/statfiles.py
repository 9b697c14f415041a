"""Wave files from statistics packages: SPSS (.sav, .zsav, .por), Stata (.dta) and SAS
(.sas7bdat, .xpt), read through pyreadstat with their metadata.

Numbers go to intake as numbers, dates as ISO text (2025-03-31) and text as text, so every
check of the codebook applies as to a CSV file (tracker.filecolumns); the file's value
labels and user-missing codes come along (:class:`FileLabels`) so that they can be compared
with the codebook's codes and with the labels of the wave before (:func:`label_problems`).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import TrackerError

__all__ = ["FORMATS", "FileLabels", "label_problems", "labels_for_ledger", "read_stat_file"]

#: suffix -> (what the file is, pyreadstat's reader, whether it carries user-missing codes)
FORMATS = {
    ".sav": ("an SPSS data file", "read_sav", True),
    ".zsav": ("a compressed SPSS data file", "read_sav", True),
    ".por": ("an SPSS portable file", "read_por", False),
    ".dta": ("a Stata data file", "read_dta", False),
    ".sas7bdat": ("a SAS data set", "read_sas7bdat", False),
    ".xpt": ("a SAS transport file", "read_xport", False),
}


@dataclass(frozen=True)
class FileLabels:
    """What a labelled file says of its columns: value labels (column -> code -> label) and
    user-missing codes (column -> codes)."""

    values: dict[str, dict[float, str]] = field(default_factory=dict)
    missing: dict[str, tuple[float, ...]] = field(default_factory=dict)


def read_stat_file(path: Path) -> tuple[pd.DataFrame, FileLabels]:
    """The file's columns (numbers as numbers, the rest as text, missing as '') and its labels."""
    try:
        import pyreadstat
    except ImportError:  # a dependency; only a broken install lacks it
        raise TrackerError(f"{path}: reading {FORMATS[path.suffix.lower()][0]} needs the pyreadstat package "
                           f"(pip install pyreadstat)") from None
    what, reader, has_user_missing = FORMATS[path.suffix.lower()]
    kwargs = {"user_missing": True} if has_user_missing else {}
    try:
        frame, meta = getattr(pyreadstat, reader)(str(path), **kwargs)
    except Exception as exc:  # noqa: BLE001 - pyreadstat raises its own types for a broken file
        raise TrackerError(f"{path}: cannot be read as {what} ({str(exc).splitlines()[0][:200]})") from None
    table = pd.DataFrame({str(c): _cells(frame[c]) for c in frame.columns}, columns=[str(c) for c in frame.columns])
    values = {str(col): {float(k): str(v) for k, v in labels.items() if _is_number(k)}
              for col, labels in (meta.variable_value_labels or {}).items()}
    missing: dict[str, tuple[float, ...]] = {}
    for col, codes in (getattr(meta, "missing_user_values", None) or {}).items():
        missing[str(col)] = tuple(float(c) for c in codes if _is_number(c))
    for col, ranges in (getattr(meta, "missing_ranges", None) or {}).items():
        found = [float(r["lo"]) for r in ranges if _is_number(r.get("lo")) and r.get("lo") == r.get("hi")]
        missing[str(col)] = tuple(sorted(set(missing.get(str(col), ())) | set(found)))
    return table, FileLabels(values, {k: v for k, v in missing.items() if v})


def _is_number(x) -> bool:
    return isinstance(x, (int, float, np.integer, np.floating)) and not isinstance(x, bool) and np.isfinite(x)


def _cells(col: pd.Series) -> pd.Series:
    """A column as intake reads it: numbers as they are (never through text); dates and times
    as ISO text; other cells as text, missing as ''."""
    from .filecolumns import plain_text

    if pd.api.types.is_numeric_dtype(col.dtype):
        return col
    if col.dtype == object:
        first = next((v for v in col if v is not None and not (isinstance(v, float) and np.isnan(v))), None)
        if isinstance(first, (dt.date, dt.datetime, dt.time)):
            return col.map(lambda v: v.isoformat() if isinstance(v, (dt.date, dt.datetime, dt.time)) else "")
    if pd.api.types.is_datetime64_any_dtype(col):
        return col.map(lambda v: "" if pd.isna(v) else v.isoformat())
    return plain_text(col)


def labels_for_ledger(book, labels: FileLabels) -> dict[str, dict[str, str]]:
    """The value labels of the codebook's variables, as the ledger keeps them (codes as text)."""
    from .codebook import _fmt_code

    wanted = {v.name for v in book.variables.values() if v.type in ("category", "scale")}
    wanted |= {a for v in book.variables.values() if v.type in ("category", "scale") for a in v.aliases}
    alias_of = {a: v.name for v in book.variables.values() for a in v.aliases}
    out: dict[str, dict[str, str]] = {}
    for col, values in labels.values.items():
        if col in wanted:
            out[alias_of.get(col, col)] = {_fmt_code(k): v for k, v in sorted(values.items())}
    return out


def label_problems(book, labels: FileLabels, earlier: tuple[str, dict] | None) -> list[tuple[str, str]]:
    """(column, warning) for what the file's labels say against the codebook and the wave
    before: a labelled code the codebook does not know, a user-missing code the codebook counts
    as an answer, and a code whose label changed since ``earlier`` ((wave, its ledger labels))
    or that appeared or went (a wording or code-frame change, often)."""
    from .codebook import _fmt_code

    out = []
    columns = {v.name: v for v in book.variables.values() if v.type in ("category", "scale")}
    columns |= {a: v for v in book.variables.values() if v.type in ("category", "scale") for a in v.aliases}
    now = labels_for_ledger(book, labels)
    for col, var in columns.items():
        values = labels.values.get(col, {})
        unknown = [k for k in values if k not in var.codes and k not in var.missing]
        if unknown:
            shown = ", ".join(f"{_fmt_code(k)} ({values[k]!r})" for k in unknown[:5])
            out.append((col, f"the file labels code(s) {shown} of {var.name}, which the codebook does not list"))
        valid_missing = [k for k in labels.missing.get(col, ()) if k in var.codes]
        if valid_missing:
            shown = ", ".join(_fmt_code(k) for k in valid_missing)
            out.append((col, (f"code(s) {shown} of {var.name} are missing values in the file but answers in the "
                             f"codebook; they are counted as answers unless the codebook lists them under missing")))
    if earlier is None:
        return out
    wave, before = earlier
    for name, then in before.items():
        if name not in now:
            continue
        current = now[name]
        for code in sorted(set(then) | set(current), key=float):
            old, new = then.get(code), current.get(code)
            if old == new:
                continue
            if old is None:
                change = f"code {code} is new, labelled {new!r}"
            elif new is None:
                change = f"code {code} ({old!r}) is no longer labelled"
            else:
                change = f"code {code} was labelled {old!r} in {wave} and is {new!r} now"
            out.append((name, (f"{name}: {change}: a change of wording or of the code frame? If the question "
                              f"changed, declare break_before in the codebook")))
    return out
