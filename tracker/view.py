"""Readable terminal tables: the columns a reader needs, in words and units, fitted to the
terminal's width. Machine formats (csv, json, md) are rendered by tracker.formatting with
every column at full precision; this module is for people at a terminal only.

Units, scale and decimals are the metric kinds' (tracker.kinds), as in the brief: shares in
percent, balances and the changes of both in points, means in their own units to two
decimals; p-values to three decimals (below 0.001 as "<0.001");
bases with thousands separators; degrees of freedom as whole numbers.
"""

from __future__ import annotations

import math
import shutil
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .kinds import kind_of

#: Width used when the terminal's cannot be measured (a pipe, a file).
DEFAULT_WIDTH = 100


@dataclass(frozen=True)
class Col:
    """One shown column: its source, its header, how its cells read, and how long it stays
    when the table must narrow (lower ``keep`` stays longer)."""

    source: str | tuple[str, str]
    title: str
    how: str = "text"   # text | value | change | size | sd | span | span_change | p | count | int | deff
    keep: int = 5


VIEWS: dict[str, list[Col]] = {
    "estimates": [
        Col("wave", "wave", keep=0), Col("metric_label", "metric", keep=0), Col("subgroup", "subgroup", keep=0),
        Col("value", "value", "value", 0), Col(("ci_low", "ci_high"), "interval", "span", 1),
        Col("base", "base", "count", 1), Col("effective_base", "eff. base", "count", 2),
        Col("design_effect", "deff", "deff", 4), Col("se", "SE", "sd", 3), Col("flags", "flags", keep=2),
        Col("pooled_waves", "pooled", keep=1), Col("smoothed", "smoothed", "value", 1),
        Col(("smoothed_low", "smoothed_high"), "smoothed interval", "span", 2), Col("group", "split", keep=6),
    ],
    "composition": [
        Col("group", "group", keep=0), Col("level", "level", keep=0),
        Col("share_from_weighted", "from", "value", 0), Col("share_to_weighted", "to", "value", 0),
        Col("move_weighted", "move", "change", 0), Col("share_from_unweighted", "unweighted from", "value", 2),
        Col("share_to_unweighted", "unweighted to", "value", 2), Col("move_unweighted", "unweighted move", "change", 1),
    ],
    "changes": [
        Col("metric_label", "metric", keep=0), Col("subgroup", "subgroup", keep=0),
        Col("value_from", "from", "value", 0), Col("value_to", "to", "value", 0),
        Col("change", "change", "change", 0),
        Col(("adjusted_low", "adjusted_high"), "adj. interval", "span_change", 1),
        Col("p_adjusted", "p adj.", "p", 1), Col("verdict", "verdict", keep=0),
        Col("min_detectable_change", "detectable", "size", 3), Col("base_to", "base", "count", 2),
        Col("flags", "flags", keep=2), Col("group", "split", keep=6), Col("p_raw", "p raw", "p", 7),
    ],
    "answers": [
        Col("wave", "wave", keep=0), Col("subgroup", "subgroup", keep=0), Col("answer", "answer", keep=0),
        Col("value", "share", "value", 0), Col(("low", "high"), "interval", "span", 1),
        Col("base", "base", "count", 1), Col("effective_base", "eff. base", "count", 2),
        Col("in_base", "base holds", keep=1), Col("flags", "flags", keep=2), Col("code", "code", keep=3),
        Col("group", "split", keep=6),
    ],
    "numbers": [
        Col("wave", "wave", keep=0), Col("subgroup", "subgroup", keep=0), Col("statistic", "statistic", keep=0),
        Col("value", "value", "value", 0), Col(("low", "high"), "interval", "span", 1),
        Col("base", "base", "count", 1), Col("se", "SE", "sd", 3), Col("group", "split", keep=6),
    ],
    "gaps": [
        Col("metric_label", "metric", keep=0), Col("first", "subgroup", keep=0), Col("second", "against", keep=0),
        Col("value_first", "value", "value", 0), Col("value_second", "other", "value", 0),
        Col("difference", "gap", "change", 0),
        Col(("adjusted_low", "adjusted_high"), "adj. interval", "span_change", 1),
        Col("statistic", "F", "deff", 3), Col("p_adjusted", "p adj.", "p", 1), Col("verdict", "verdict", keep=0),
        Col("base_first", "base", "count", 2), Col("group", "split", keep=6), Col("p_raw", "p raw", "p", 7),
    ],
    "gapshift": [
        Col("metric_label", "metric", keep=0), Col("first", "subgroup", keep=0), Col("second", "against", keep=0),
        Col("gap_from", "gap then", "change", 0), Col("gap_to", "gap now", "change", 0),
        Col("change", "change", "change", 0),
        Col(("adjusted_low", "adjusted_high"), "adj. interval", "span_change", 1),
        Col("statistic", "Q", "deff", 3), Col("p_adjusted", "p adj.", "p", 1), Col("verdict", "verdict", keep=0),
        Col("test", "test", keep=2), Col("group", "split", keep=6), Col("p_raw", "p raw", "p", 7),
    ],
    "drivers": [
        Col("attribute_label", "attribute", keep=0), Col("raw_weight", "raw weight", "value", 0),
        Col(("raw_low", "raw_high"), "interval", "span", 1), Col("share_of_r2", "share of R^2", "value", 0),
        Col("attribute", "metric", keep=3),
    ],
    "driftdrivers": [
        Col("attribute", "attribute", keep=0), Col("raw_weight_from", "before", "value", 0),
        Col("raw_weight_to", "now", "value", 0), Col("change", "change", "change", 0),
        Col(("adjusted_low", "adjusted_high"), "adj. interval", "span_change", 1),
        Col("p_adjusted", "p adj.", "p", 1), Col("verdict", "verdict", keep=0),
    ],
    "expect": [
        Col("metric_label", "metric", keep=0), Col("subgroup", "subgroup", keep=0),
        Col("expected", "expected", "value", 0), Col(("low", "high"), "range", "span", 0),
        Col("expected_base", "base", "count", 2), Col("basis", "from", keep=1), Col("group", "split", keep=6),
    ],
    "surprises": [
        Col("metric_label", "metric", keep=0), Col("subgroup", "subgroup", keep=0),
        Col("value", "value", "value", 0), Col(("low", "high"), "expected range", "span", 0),
        Col("p_adjusted", "p adj.", "p", 1), Col("base", "base", "count", 2), Col("group", "split", keep=6),
    ],
    "mix": [
        Col("metric_label", "metric", keep=0), Col("change", "change", "change", 0),
        Col("mix_part", "from the mix", "change", 0), Col("within_part", "within groups", "change", 0),
        Col("standardised_change", "at the earlier mix", "change", 0),
        Col(("standardised_low", "standardised_high"), "interval", "span_change", 2),
        Col("standardised_p_adjusted", "p adj.", "p", 1), Col("mix_variable", "mix on", keep=3),
    ],
    "trends": [
        Col("metric_label", "metric", keep=0), Col("subgroup", "subgroup", keep=0), Col("pattern", "pattern", keep=0),
        Col("slope_per_year", "per year", "change", 1), Col(("slope_low", "slope_high"), "interval", "span_change", 2),
        Col("latest_value", "latest", "value", 2), Col("waves", "waves", "int", 3),
        Col("shift_wave", "shift at", keep=1), Col("blip_wave", "blip at", keep=1),
        Col("wave_to_wave_sd", "wave-to-wave SD", "size", 4), Col("pattern_p_adjusted", "p adj.", "p", 3),
        Col("note", "note", keep=4), Col("group", "split", keep=6),
    ],
}


#: The column a flagged row's mark follows in each view (else the first number).
MARK_AFTER = {"estimates": "value", "changes": "verdict", "trends": "pattern", "surprises": "value"}


def _num(x: np.ndarray, digits: int, signed: bool = False) -> np.ndarray:
    """Numbers as text, column at once; a value that rounds to zero gets no sign (no "-0.0")."""
    r = np.round(x, digits) + 0.0  # + 0.0 turns -0.0 into 0.0
    text = np.char.mod(f"%{'+' if signed else ''}.{digits}f", r).astype(object)
    if signed:
        text = np.where(r == 0, np.char.mod(f"%.{digits}f", np.abs(r)).astype(object), text)
    return text


def _column(how: str, a, kinds: np.ndarray, b=None) -> list[str]:
    """One shown column as text. Units, scale and decimals come from the metric kinds'
    registry (tracker.kinds), the same as the brief's; blanks stay blank."""
    if how == "text":
        return ["" if v is None or (isinstance(v, float) and math.isnan(v)) else str(v) for v in a]
    x = pd.to_numeric(pd.Series(a), errors="coerce").to_numpy(float)
    y = None if b is None else pd.to_numeric(pd.Series(b), errors="coerce").to_numpy(float)
    blank = np.isnan(x) if y is None else np.isnan(x) | np.isnan(y)
    out = np.full(len(x), "", dtype=object)
    if how == "count":
        out[~blank] = [f"{v:,.0f}" for v in x[~blank]]  # thousands separators: no vectorised form
        return list(out)
    if how in ("int", "deff", "p"):
        text = {"int": lambda v: _num(v, 0), "deff": lambda v: _num(v, 2), "p": p_text}[how](x)
        return list(np.where(blank, "", text))
    for name in np.unique(kinds):
        k = kind_of(name)
        m = (kinds == name) & ~blank
        if not m.any():
            continue
        d, v = k.decimals, x[m] * k.scale
        pts = " pts" if k.change_unit else ""
        if how == "value":
            out[m] = _num(v, d) + k.unit
        elif how == "change":
            out[m] = _num(v, d, signed=True) + pts
        elif how in ("size", "sd"):
            out[m] = _num(v, d) + pts
        elif how in ("span", "span_change"):
            assert y is not None  # a span has two columns
            signed = how == "span_change"
            out[m] = _num(v, d, signed) + " to " + _num(y[m] * k.scale, d, signed)
        else:
            raise ValueError(how)
    return list(out)


def p_text(p: np.ndarray) -> np.ndarray:
    """p-values to three decimals, below 0.001 as "<0.001"."""
    p = np.asarray(p, float)
    return np.where(p < 0.001, "<0.001", np.char.mod("%.3f", p).astype(object))


def _flagged(frame: pd.DataFrame) -> np.ndarray:
    """Rows with a flag (a non-empty flags cell)."""
    if "flags" not in frame:
        return np.zeros(len(frame), bool)
    f = frame["flags"]
    return (f.notna() & (f.astype(str).str.strip() != "") & (f.astype(str) != "nan")).to_numpy()


def terminal_width() -> int:
    return shutil.get_terminal_size((DEFAULT_WIDTH, 24)).columns


def human_table(frame: pd.DataFrame, view: str, width: int | None = None, wide: bool = False) -> tuple[str, list[str]]:
    """The table as text for a person, and the footer lines it needs (what was left out).

    Columns are dropped from the least needed (highest ``keep``) until the table fits
    ``width`` (default: the terminal's, or DEFAULT_WIDTH), unless ``wide``; a flagged row
    keeps its mark at any width."""
    if frame.empty:
        return "Nothing to show: no row matches what was asked.\n", []
    width = width or terminal_width()
    cols, cells = _view_cells(frame, view)
    right = {c.title for c in cols if c.how not in ("text",)}
    widths = {t: max(len(t), *(len(x) for x in v)) for t, v in cells.items()}
    fit = _Fit(frame, cols, cells, widths, right)
    if not wide:
        fit.narrow(width)
    shown = fit.shown
    lines = ["  ".join(t.rjust(widths[t]) if t in right else t.ljust(widths[t]) for t in shown).rstrip()]
    for i in range(len(frame)):
        lines.append("  ".join(cells[t][i].rjust(widths[t]) if t in right else cells[t][i].ljust(widths[t])
                               for t in shown).rstrip())
    notes = []
    marked = _flagged(frame)
    if marked.any():
        where = "the flags column" if "flags" in shown else "the flags column (--wide, or --format csv)"
        notes.append(f"! marks {int(marked.sum()):,} flagged {'row' if marked.sum() == 1 else 'rows'}: read them "
                     f"with care; {where} says why.")
    if fit.names_for_labels:
        notes.append("Metrics are shown by their short names to fit; --wide shows their labels.")
    if fit.dropped:
        notes.append(f"Left out to fit {width} characters: {', '.join(fit.dropped)}; --wide shows them, and --format "
                     f"csv or json gives every column at full precision.")
    return "\n".join(lines) + "\n", notes


def _view_cells(frame: pd.DataFrame, view: str) -> tuple[list[Col], dict[str, list[str]]]:
    """The view's columns present in ``frame`` (the split left out when there is one) and
    their cells as text, with the flag mark beside what it qualifies."""
    kinds = frame["kind"] if "kind" in frame else pd.Series(kind_of(None).name, index=frame.index)
    cols = [c for c in VIEWS[view] if all(s in frame for s in ((c.source,) if isinstance(c.source, str) else c.source))]
    if "group" in frame and frame["group"].nunique() <= 1:
        cols = [c for c in cols if c.source != "group"]
    kind_codes = kinds.astype(str).to_numpy()
    cells = {}
    for c in cols:
        if isinstance(c.source, tuple):
            cells[c.title] = _column(c.how, frame[c.source[0]].to_numpy(), kind_codes, frame[c.source[1]].to_numpy())
        else:
            cells[c.title] = _column(c.how, frame[c.source].to_numpy(object), kind_codes)
    marked = _flagged(frame)
    if marked.any():  # a mark that no width drops, beside what it qualifies
        after = MARK_AFTER.get(view)
        at = next((k + 1 for k, c in enumerate(cols) if c.title == after),
                  next((k for k, c in enumerate(cols) if c.how != "text"), len(cols)))
        cols.insert(at, Col("__mark__", "!", keep=0))
        cells["!"] = ["!" if m else "" for m in marked]
    return cols, cells


class _Fit:
    """Narrowing a table to a width, in steps: drop the least needed columns, then shorten
    long labels to 24 characters, then drop what is left to drop, then shorten further."""

    def __init__(self, frame: pd.DataFrame, cols: list[Col], cells: dict[str, list[str]], widths: dict[str, int],
                 right: set[str]):
        self.frame, self.cols, self.cells, self.widths, self.right = frame, cols, cells, widths, right
        self.shown = [c.title for c in cols]
        self.dropped: list[str] = []
        self.names_for_labels = False

    def total(self) -> int:
        return sum(self.widths[t] for t in self.shown) + 2 * (len(self.shown) - 1)

    def cut(self, t: str, to: int) -> None:
        if t == "metric" and "metric" in self.frame and not self.names_for_labels:
            # a cut label can make two metrics look alike; their short names never do
            names = [str(x) for x in self.frame["metric"]]
            if max(map(len, names)) < self.widths[t]:
                self.cells[t], self.widths[t] = names, max(len(t), *map(len, names))
                self.names_for_labels = True
                return
        to = max(len(t), to)
        if to < self.widths[t]:
            self.cells[t] = [x if len(x) <= to else x[: to - 1] + "…" for x in self.cells[t]]
            self.widths[t] = to

    def narrow(self, width: int) -> None:
        order = sorted((c for c in self.cols if c.keep > 0), key=lambda c: -c.keep)
        texts = [t for t in self.shown if t not in self.right]
        while self.total() > width:
            longest = max((t for t in texts if t in self.shown), key=lambda t: self.widths[t])
            if order and order[0].keep >= 2:
                c = order.pop(0)
            elif any(self.widths[t] > 24 for t in texts if t in self.shown):
                self.cut(longest, max(24, self.widths[longest] - (self.total() - width)))
                continue
            elif order:
                c = order.pop(0)
            else:
                if self.widths[longest] <= max(8, len(longest)):
                    break
                self.cut(longest, max(8, self.widths[longest] - (self.total() - width)))
                continue
            self.shown.remove(c.title)
            self.dropped.append(c.title)
