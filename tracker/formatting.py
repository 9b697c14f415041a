"""Plain renderings of result tables for the command line: table, csv, json, md."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .names import FORMATS  # noqa: F401 - the formats this module renders, one list for the tool
from .plain import FORMULA, FORMULA_START, safe_cell  # noqa: F401 - re-exported for older imports
from .plain import md_cell as _md


def safe_text(frame: pd.DataFrame) -> pd.DataFrame:
    """The frame with every text cell a spreadsheet would run as a formula made plain
    (``safe_cell``); only the cells concerned are touched."""
    out = frame
    for col in frame.columns:
        s = frame[col]
        if pd.api.types.is_numeric_dtype(s) or pd.api.types.is_bool_dtype(s):
            continue
        if s.dtype == object:  # mixed cells: only the text ones can be formulas
            fixed = s.map(safe_cell)
            if not fixed.equals(s):
                out = frame.copy() if out is frame else out
                out[col] = fixed
            continue
        risky = s.str.match(FORMULA).fillna(False).to_numpy(dtype=bool)
        if risky.any():
            out = frame.copy() if out is frame else out
            out[col] = s.astype(object).where(~risky, "'" + s.astype(str))
    return out


def render(frame: pd.DataFrame, fmt: str = "table", digits: int = 4) -> str:
    """Render a DataFrame; numbers are rounded for the table and md forms only. CSV text
    cells that a spreadsheet would run as formulas are neutralised (``safe_cell``); the md
    form escapes HTML, so a label cannot inject markup into a rendered page."""
    if fmt == "csv":
        return safe_text(frame).to_csv(index=False)
    if fmt == "json":
        return frame.to_json(orient="records", indent=1, double_precision=10)
    shown = frame.copy()
    for col in shown.columns:
        if not pd.api.types.is_numeric_dtype(shown[col]) and not pd.api.types.is_bool_dtype(shown[col]):
            shown[col] = shown[col].astype(object).where(shown[col].notna(), "")
        elif pd.api.types.is_float_dtype(shown[col]):
            shown[col] = shown[col].map(
                lambda v: "" if pd.isna(v) else (f"{v:.{digits}f}" if np.isfinite(v) else str(v)))
    if fmt == "md":
        head = "| " + " | ".join(shown.columns) + " |"
        rule = "|" + "|".join("---" for _ in shown.columns) + "|"
        body = ["| " + " | ".join(_md(v) for v in row) + " |" for row in shown.itertuples(index=False)]
        return "\n".join([head, rule, *body]) + "\n"
    if shown.empty:
        return "(no rows)\n"
    return shown.to_string(index=False) + "\n"


def write_table(frame: pd.DataFrame, path) -> Path:
    """Write a result table to ``path`` by its suffix (.csv, .json, .md, .xlsx), every column
    at full precision, atomically; formula-like text cells are neutralised in CSV and XLSX."""

    from .errors import TrackerError
    from .outputs import check_output, write_output

    path = check_output(path)
    suffix = path.suffix.lower()
    if suffix in (".csv", ".json", ".md"):
        data = render(frame, suffix[1:]).encode("utf-8")
    elif suffix == ".xlsx":
        from .workbook import table_bytes

        data = table_bytes(frame)
    else:
        raise TrackerError(f"{path}: give a file ending in .csv, .json, .md or .xlsx")
    return write_output(path, data)
