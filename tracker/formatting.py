"""Plain renderings of result tables for the command line: table, csv, json, md."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .names import FORMATS  # noqa: E402


from .plain import FORMULA_START, safe_cell  # noqa: F401 - re-exported for older imports
from .plain import md_cell as _md


def render(frame: pd.DataFrame, fmt: str = "table", digits: int = 4) -> str:
    """Render a DataFrame; numbers are rounded for the table and md forms only. CSV text
    cells that a spreadsheet would run as formulas are neutralised (``safe_cell``); the md
    form escapes HTML, so a label cannot inject markup into a rendered page."""
    if fmt == "csv":
        out = frame.copy()
        for col in out.columns:
            if not pd.api.types.is_numeric_dtype(out[col]) and not pd.api.types.is_bool_dtype(out[col]):
                out[col] = out[col].astype(object).map(safe_cell)
        return out.to_csv(index=False)
    if fmt == "json":
        return frame.to_json(orient="records", indent=1, double_precision=10)
    shown = frame.copy()
    for col in shown.columns:
        if not pd.api.types.is_numeric_dtype(shown[col]) and not pd.api.types.is_bool_dtype(shown[col]):
            shown[col] = shown[col].astype(object).where(shown[col].notna(), "")
        elif pd.api.types.is_float_dtype(shown[col]):
            shown[col] = shown[col].map(lambda v: "" if pd.isna(v) else (f"{v:.{digits}f}" if np.isfinite(v) else str(v)))
    if fmt == "md":
        head = "| " + " | ".join(shown.columns) + " |"
        rule = "|" + "|".join("---" for _ in shown.columns) + "|"
        body = ["| " + " | ".join(_md(v) for v in row) + " |" for row in shown.itertuples(index=False)]
        return "\n".join([head, rule, *body]) + "\n"
    if shown.empty:
        return "(no rows)\n"
    return shown.to_string(index=False) + "\n"


def write_table(frame: pd.DataFrame, path) -> "Path":
    """Write a result table to ``path`` by its suffix (.csv, .json, .md, .xlsx), every column
    at full precision, atomically; formula-like text cells are neutralised in CSV and XLSX."""
    import io
    from pathlib import Path

    from .errors import TrackerError
    from .store import write_atomic

    path = Path(path)
    if not path.parent.is_dir():
        raise TrackerError(f"{path}: the folder {path.parent} does not exist")
    suffix = path.suffix.lower()
    if suffix in (".csv", ".json", ".md"):
        data = render(frame, suffix[1:]).encode("utf-8")
    elif suffix == ".xlsx":
        out = frame.copy()
        for col in out.columns:
            if not pd.api.types.is_numeric_dtype(out[col]) and not pd.api.types.is_bool_dtype(out[col]):
                out[col] = out[col].astype(object).map(safe_cell)
        buf = io.BytesIO()
        out.to_excel(buf, index=False)
        data = buf.getvalue()
    else:
        raise TrackerError(f"{path}: give a file ending in .csv, .json, .md or .xlsx")
    write_atomic(path, data)
    return path
