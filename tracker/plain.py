"""Rows of plain dicts rendered as table, csv, json or md with the standard library only
(for the commands that must answer at once: ``waves``, ``check``, ``add``)."""

from __future__ import annotations

import csv
import html
import io
import json
import re

#: First characters with which a spreadsheet would read a text cell as a formula (OWASP,
#: "CSV Injection"): such cells get a leading apostrophe in CSV and XLSX output.
FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
#: The same, also after leading spaces and in their full-width forms, which some
#: spreadsheets read as the plain characters.
FORMULA = re.compile(r"[\t\r]|[ \u00a0\u3000]*[=+\-@\uff1d\uff0b\uff0d\uff20]")


def safe_cell(value):
    """Text that a spreadsheet could run as a formula, made plain text with a leading quote:
    the one neutralising rule of every CSV and XLSX cell the tool writes."""
    if isinstance(value, str) and FORMULA.match(value):
        return "'" + value
    return value


#: Link schemes that run code or carry a document when a rendered page's link is followed.
_SCHEME = re.compile(r"(?i)\b(javascript|vbscript|data|file)(\s*):")


def md_text(v) -> str:
    """Text from a study made inert in Markdown: HTML escaped (renderers pass raw HTML
    through), link and image brackets escaped, and script-like link schemes defused."""
    text = html.escape(str(v), quote=False)
    text = re.sub(r"([\\\[\]])", r"\\\1", text)  # no [text](target): no link, no image
    return _SCHEME.sub(lambda m: f"{m.group(1)}{m.group(2)}&#58;", text)


def md_cell(v) -> str:
    return md_text(v).replace("|", "\\|").replace("\n", " ")


#: Characters a terminal would act on rather than show (C0 but tab and newline, DEL, C1).
_TERMINAL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]")


def terminal_text(text: str) -> str:
    """``text`` with every character a terminal would obey (an escape sequence that clears
    the screen or retitles the window) shown as its code, e.g. \\x1b."""
    return _TERMINAL.sub(lambda m: f"\\x{ord(m.group()):02x}", text)


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
        return "Nothing to show: no row matches what was asked.\n"
    widths = [max(len(c), *(len(row[i]) for row in text)) for i, c in enumerate(columns)]
    out = ["  ".join(c.rjust(w) if c in right else c.ljust(w) for c, w in zip(columns, widths)).rstrip()]
    out += ["  ".join(v.rjust(w) if c in right else v.ljust(w) for c, v, w in zip(columns, row, widths)).rstrip()
            for row in text]
    return "\n".join(out) + "\n"


def fit_rows(rows: list[dict], columns: list[str], width: int, right: tuple[str, ...] = (),
             shrink: tuple[str, ...] = ()) -> str:
    """Plain rows as a table no wider than ``width``: the ``shrink`` columns, in that order,
    are shortened (their ends shown as '…') down to their header's width; the others never."""
    text = [[("" if r.get(c) is None else str(r.get(c))) for c in columns] for r in rows]
    widths = [max(len(c), *(len(row[i]) for row in text)) if text else len(c) for i, c in enumerate(columns)]
    over = sum(widths) + 2 * (len(widths) - 1) - width
    for name in shrink:
        if over <= 0:
            break
        i = columns.index(name)
        cut = min(over, widths[i] - max(len(name), 4))
        if cut > 0:
            widths[i] -= cut
            over -= cut
    text = [[v if len(v) <= w else v[: w - 1] + "…" for v, w in zip(row, widths)] for row in text]
    out = ["  ".join(c.rjust(w) if c in right else c.ljust(w) for c, w in zip(columns, widths)).rstrip()]
    out += ["  ".join(v.rjust(w) if c in right else v.ljust(w) for c, v, w in zip(columns, row, widths)).rstrip()
            for row in text]
    return "\n".join(out) + "\n"
