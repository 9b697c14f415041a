"""Readable terminal tables: the columns a reader needs, in words and units, fitted to the
terminal's width. Machine formats (csv, json, md) are rendered by tracker.formatting with
every column at full precision; this module is for people at a terminal only.

Shares and balances show in percent and their changes in percentage points; means keep
their own units to two decimals; p-values to three decimals (below 0.001 as "<0.001");
bases with thousands separators; degrees of freedom as whole numbers.
"""

from __future__ import annotations

import math
import shutil
from dataclasses import dataclass

import pandas as pd

#: Width used when the terminal's cannot be measured (a pipe, a file).
DEFAULT_WIDTH = 100


@dataclass(frozen=True)
class Col:
    """One shown column: its source, its header, how its cells read, and how long it stays
    when the table must narrow (lower ``keep`` stays longer)."""

    source: str | tuple[str, str]
    title: str
    how: str = "text"   # text | value | change | span | p | count | int | sd | slope
    keep: int = 5


VIEWS: dict[str, list[Col]] = {
    "estimates": [
        Col("wave", "wave", keep=0), Col("metric_label", "metric", keep=0), Col("subgroup", "subgroup", keep=0),
        Col("value", "value", "value", 0), Col(("ci_low", "ci_high"), "interval", "span", 1),
        Col("base", "base", "count", 1), Col("effective_base", "eff. base", "count", 2),
        Col("design_effect", "deff", "deff", 4), Col("se", "SE", "sd", 3), Col("flags", "flags", keep=2),
        Col("pooled_waves", "pooled", keep=1), Col("group", "split", keep=6),
    ],
    "composition": [
        Col("group", "group", keep=0), Col("level", "level", keep=0),
        Col("share_from_weighted", "from", "value", 0), Col("share_to_weighted", "to", "value", 0),
        Col("move_weighted", "move", "change", 0), Col("share_from_unweighted", "unweighted from", "value", 2),
        Col("share_to_unweighted", "unweighted to", "value", 2), Col("move_unweighted", "unweighted move", "change", 1),
    ],
    "changes": [
        Col("metric_label", "metric", keep=0), Col("subgroup", "subgroup", keep=0),
        Col("value_from", "from", "value", 1), Col("value_to", "to", "value", 0),
        Col("change", "change", "change", 0), Col(("change_low", "change_high"), "interval", "span_change", 1),
        Col("p_adjusted", "p adj.", "p", 1), Col("verdict", "verdict", keep=0),
        Col("min_detectable_change", "detectable", "size", 3), Col("base_to", "base", "count", 2),
        Col("flags", "flags", keep=2), Col("group", "split", keep=6), Col("p_raw", "p raw", "p", 7),
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


def _is_mean(kind) -> bool:
    return str(kind) == "mean"


def _cell(how: str, v, kind, v2=None) -> str:
    if how == "text":
        return "" if v is None or (isinstance(v, float) and math.isnan(v)) else str(v)
    if how == "count":
        return "" if pd.isna(v) else f"{float(v):,.0f}"
    if how == "int":
        return "" if pd.isna(v) else f"{int(v)}"
    if how == "deff":
        return "" if pd.isna(v) else f"{float(v):.2f}"
    if how == "p":
        return "" if pd.isna(v) else ("<0.001" if v < 0.001 else f"{float(v):.3f}")
    if pd.isna(v) or (v2 is not None and pd.isna(v2)):
        return ""
    if how in ("change", "span_change"):  # no "-0.0": a change that rounds to nothing reads as none
        v = 0.0 if abs(v) < (0.005 if _is_mean(kind) else 0.0005) else v
        v2 = v2 if v2 is None or abs(v2) >= (0.005 if _is_mean(kind) else 0.0005) else 0.0
    mean = _is_mean(kind)
    f = 1.0 if mean else 100.0
    if how == "value":
        return f"{v:.2f}" if mean else f"{v * f:.1f}%"
    if how == "change":
        return _signed(v, 2) if mean else f"{_signed(v * f, 1)} pts"
    if how in ("size", "sd"):
        return f"{v:.2f}" if mean else f"{v * f:.1f} pts"
    if how == "span":
        return f"{v:.2f} to {v2:.2f}" if mean else f"{v * f:.1f} to {v2 * f:.1f}"
    if how == "span_change":
        return f"{_signed(v, 2)} to {_signed(v2, 2)}" if mean else f"{_signed(v * f, 1)} to {_signed(v2 * f, 1)}"
    raise ValueError(how)


def _signed(v: float, digits: int) -> str:
    """A signed number, with no sign on a value that rounds to zero."""
    text = f"{v:+.{digits}f}"
    return text[1:] if float(text) == 0 else text


def terminal_width() -> int:
    return shutil.get_terminal_size((DEFAULT_WIDTH, 24)).columns


def human_table(frame: pd.DataFrame, view: str, width: int | None = None, wide: bool = False) -> tuple[str, list[str]]:
    """The table as text for a person, and the footer lines it needs (what was left out).

    Columns are dropped from the least needed (highest ``keep``) until the table fits
    ``width`` (default: the terminal's, or DEFAULT_WIDTH), unless ``wide``."""
    if frame.empty:
        return "(no rows)\n", []
    width = width or terminal_width()
    kinds = frame["kind"] if "kind" in frame else pd.Series("share", index=frame.index)
    cols = [c for c in VIEWS[view] if all(s in frame for s in ((c.source,) if isinstance(c.source, str) else c.source))]
    if "group" in frame and frame["group"].nunique() <= 1:
        cols = [c for c in cols if c.source != "group"]
    cells = {}
    for c in cols:
        if isinstance(c.source, tuple):
            a, b = frame[c.source[0]].to_numpy(), frame[c.source[1]].to_numpy()
            cells[c.title] = [_cell(c.how, x, k, y) for x, y, k in zip(a, b, kinds)]
        else:
            cells[c.title] = [_cell(c.how, x, k) for x, k in zip(frame[c.source].to_numpy(object), kinds)]
    right = {c.title for c in cols if c.how not in ("text",)}
    widths = {t: max(len(t), *(len(x) for x in v)) for t, v in cells.items()}
    shown = [c.title for c in cols]
    dropped: list[str] = []

    def total(ts):
        return sum(widths[t] for t in ts) + 2 * (len(ts) - 1)

    names_for_labels = False

    def cut(t, to):
        nonlocal names_for_labels
        if t == "metric" and "metric" in frame and not names_for_labels:
            # a cut label can make two metrics look alike; their short names never do
            names = [str(x) for x in frame["metric"]]
            if max(map(len, names)) < widths[t]:
                cells[t], widths[t] = names, max(len(t), *map(len, names))
                names_for_labels = True
                return
        to = max(len(t), to)
        if to < widths[t]:
            cells[t] = [x if len(x) <= to else x[: to - 1] + "…" for x in cells[t]]
            widths[t] = to

    if not wide:
        # narrow in steps: drop the least needed columns, then shorten long labels to 24
        # characters, then drop what is left to drop, then shorten labels further
        order = sorted((c for c in cols if c.keep > 0), key=lambda c: -c.keep)
        texts = [t for t in shown if t not in right]
        while total(shown) > width:
            if order and order[0].keep >= 2:
                c = order.pop(0)
            elif any(widths[t] > 24 for t in texts if t in shown):
                t = max((t for t in texts if t in shown), key=lambda t: widths[t])
                cut(t, max(24, widths[t] - (total(shown) - width)))
                continue
            elif order:
                c = order.pop(0)
            else:
                t = max((t for t in texts if t in shown), key=lambda t: widths[t])
                if widths[t] <= max(8, len(t)):
                    break
                cut(t, max(8, widths[t] - (total(shown) - width)))
                continue
            shown.remove(c.title)
            dropped.append(c.title)
    lines = ["  ".join(t.rjust(widths[t]) if t in right else t.ljust(widths[t]) for t in shown).rstrip()]
    for i in range(len(frame)):
        lines.append("  ".join(cells[t][i].rjust(widths[t]) if t in right else cells[t][i].ljust(widths[t])
                               for t in shown).rstrip())
    notes = []
    if names_for_labels:
        notes.append("Metrics are shown by their short names to fit; --wide shows their labels.")
    if dropped:
        notes.append(f"Left out to fit {width} characters: {', '.join(dropped)}; --wide shows them, and --format csv "
                     f"or json gives every column at full precision.")
    return "\n".join(lines) + "\n", notes
