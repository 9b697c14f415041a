"""Rows of plain dicts rendered as table, csv, json or md with the standard library only
(for the commands that must answer at once: ``waves``, ``check``, ``add``)."""

from __future__ import annotations

import csv
import html
import io
import json

#: First characters with which a spreadsheet would read a text cell as a formula (OWASP,
#: "CSV Injection"): such cells get a leading apostrophe in CSV and XLSX output.
FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def safe_cell(value):
    """Text that a spreadsheet could run as a formula, made plain text with a leading quote."""
    if isinstance(value, str) and value[:1] in FORMULA_START:
        return "'" + value
    return value


def md_cell(v) -> str:
    return html.escape(str(v), quote=False).replace("|", "\\|").replace("\n", " ")


def render_rows(rows: list[dict], columns: list[str], fmt: str, right: tuple[str, ...] = ()) -> str:
    """``rows`` as text in ``fmt``; a missing key is an empty cell. json keeps the values'
    own types; the other forms write them as text."""
    if fmt == "json":
        return json.dumps([{c: r.get(c) for c in columns} for r in rows], indent=1) + "\n"
    text = [[("" if r.get(c) is None else str(r.get(c))) for c in columns] for r in rows]
    if fmt == "csv":
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(columns)
        w.writerows([[safe_cell(v) for v in row] for row in text])
        return buf.getvalue()
    if fmt == "md":
        lines = ["| " + " | ".join(columns) + " |", "|" + "|".join("---" for _ in columns) + "|"]
        lines += ["| " + " | ".join(md_cell(v) for v in row) + " |" for row in text]
        return "\n".join(lines) + "\n"
    if not rows:
        return "(no rows)\n"
    widths = [max(len(c), *(len(row[i]) for row in text)) for i, c in enumerate(columns)]
    out = ["  ".join(c.rjust(w) if c in right else c.ljust(w) for c, w in zip(columns, widths)).rstrip()]
    out += ["  ".join(v.rjust(w) if c in right else v.ljust(w) for c, v, w in zip(columns, row, widths)).rstrip()
            for row in text]
    return "\n".join(out) + "\n"
