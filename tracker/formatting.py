"""Plain renderings of result tables for the command line: table, csv, json, md."""

from __future__ import annotations

import numpy as np
import pandas as pd

FORMATS = ("table", "csv", "json", "md")


def render(frame: pd.DataFrame, fmt: str = "table", digits: int = 4) -> str:
    """Render a DataFrame; numbers are rounded for the table and md forms only."""
    if fmt == "csv":
        return frame.to_csv(index=False)
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


def _md(v) -> str:
    return str(v).replace("|", "\\|").replace("\n", " ")
