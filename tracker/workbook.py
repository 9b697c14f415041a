"""The brief as a workbook to hand to a client (``brief -o x.xlsx``).

Numbers stay numbers, shown by their kind: shares as percentages, changes of shares in points,
means with two decimals (tracker.kinds). Headers are words, not column names. One wide sheet
holds every metric in every wave, in total and in each subgroup, with flagged cells marked by
style and a comment giving the reason, and the brief's wave's moves marked by word and shape
(never by a colour pair). Native line charts show the headline metrics over the waves. Every
sheet's header is frozen and its columns sized; text that a spreadsheet could run as a formula
is kept as text.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd

from .plain import safe_cell

__all__ = ["TITLES", "change_cell", "table_bytes", "value_cell", "workbook_bytes"]

#: Column titles of the workbook's tables (the machine formats keep the names of docs/columns.md).
TITLES = {
    "metric_label": "Measure", "group": "Split", "subgroup": "Subgroup", "wave_from": "From wave",
    "wave_to": "To wave", "value_from": "Then", "value_to": "Now", "change": "Change", "change_low": "Change, low",
    "change_high": "Change, high", "adjusted_low": "Adjusted interval, low",
    "adjusted_high": "Adjusted interval, high", "adjusted_level": "Adjusted level", "base_from": "Base then",
    "base_to": "Base now",
    "effective_base_from": "Effective base then", "effective_base_to": "Effective base now", "p_raw": "p",
    "p_adjusted": "p (adjusted)", "min_detectable_change": "Detectable change", "verdict": "Verdict",
    "flags": "Read with care", "first_wave": "First wave", "last_wave": "Last wave", "waves": "Waves",
    "latest_value": "Latest", "slope_per_year": "Slope a year", "slope_low": "Slope, low", "slope_high": "Slope, high",
    "wave_to_wave_sd": "Wave-to-wave SD", "excess_variation_p": "p (extra variation)", "pattern": "Pattern",
    "pattern_p_adjusted": "p (pattern, adjusted)", "shift_wave": "Shift at", "level_before": "Level before",
    "level_after": "Level after", "blip_wave": "Blip at", "note": "Note", "wave": "Wave",
    "fieldwork_date": "Fieldwork", "metric": "Metric", "kind": "Kind", "value": "Value", "base": "Base",
    "weighted_base": "Weighted base", "effective_base": "Effective base", "design_effect": "Design effect",
    "design_base": "Design base", "se": "Standard error", "ci_low": "Interval, low", "ci_high": "Interval, high",
    "df": "Degrees of freedom", "unit_variance": "Unit variance", "reliable": "Reliable",
}
#: How each column's numbers read: a value, a change, or a plain format.
VALUES = {"value", "value_from", "value_to", "latest_value", "level_before", "level_after", "ci_low", "ci_high"}
CHANGES = {"change", "change_low", "change_high", "adjusted_low", "adjusted_high", "min_detectable_change",
           "slope_per_year", "slope_low",
           "slope_high", "wave_to_wave_sd", "se"}
PLAIN = {"adjusted_level": "0.0000",
         "p_raw": "0.0000", "p_adjusted": "0.0000", "excess_variation_p": "0.0000", "pattern_p_adjusted": "0.0000",
         "design_effect": "0.00", "unit_variance": "0.0000", "df": "#,##0.0"}
MARKS = {"rise": "▲ Up", "fall": "▼ Down", "held": "= Held", "flat": "= Held", "note": ""}


def _kind(name: str):
    from .kinds import kind_of

    return kind_of(name)


def value_cell(kind: str, v: float) -> tuple[float, str]:
    """(number stored, Excel format) of a value of a metric kind: a share as a fraction shown
    as a percentage, others scaled as the tool shows them."""
    k = _kind(kind)
    dec = "0." + "0" * k.decimals if k.decimals else "0"
    if k.unit == "%":
        return float(v), dec + "%"
    return float(v) * k.scale, dec + (f'" {k.unit}"' if k.unit else "")


def change_cell(kind: str, d: float) -> tuple[float, str]:
    """(number stored, Excel format) of a change: in points for shares and balances, signed."""
    k = _kind(kind)
    dec = "0." + "0" * k.decimals if k.decimals else "0"
    unit = f'" {k.change_unit}"' if k.change_unit else ""
    return float(d) * k.scale, f"+{dec}{unit};-{dec}{unit};{dec}{unit}"


def _put(ws, row: int, col: int, value, kind: str, column: str, points: bool = True):
    """Write one cell with the format its column and the row's kind give it; with ``points``
    False a change stays the difference of fractions the machine formats promise."""
    cell = ws.cell(row, col)
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return cell
    if isinstance(value, (np.bool_, bool)):
        cell.value = "yes" if value else "no"
    elif isinstance(value, (int, float, np.integer, np.floating)):
        if column in VALUES:
            cell.value, cell.number_format = value_cell(kind, float(value))
        elif column in CHANGES and points:
            cell.value, cell.number_format = change_cell(kind, float(value))
        elif column in CHANGES:
            cell.value, cell.number_format = float(value), "+0.0000;-0.0000;0.0000"
        elif column in PLAIN:
            cell.value, cell.number_format = float(value), PLAIN[column]
        elif "base" in column or column in ("waves",):
            cell.value, cell.number_format = float(value), "#,##0"
        else:
            cell.value = float(value)
    else:
        cell.value = safe_cell(str(value))
        cell.data_type = "s"  # never a formula, whatever the text
    return cell


def _table_sheet(wb, name: str, table: pd.DataFrame, titles: bool = True) -> None:
    from openpyxl.styles import Font
    from openpyxl.utils import get_column_letter

    ws = wb.create_sheet(name[:31])
    cols = [c for c in table.columns if c != "kind" or not titles]
    kinds = table["kind"].astype(str).to_numpy() if "kind" in table else np.full(len(table), "mean")
    for j, c in enumerate(cols, start=1):
        ws.cell(1, j, TITLES.get(c, c.replace("_", " ").capitalize()) if titles else c).font = Font(bold=True)
        ws.column_dimensions[get_column_letter(j)].width = 34 if c in ("metric_label", "flags", "note") else 14
    data = [table[c].to_numpy(object) for c in cols]
    for i in range(len(table)):  # a loop over rows: openpyxl writes cell by cell
        for j, c in enumerate(cols):
            _put(ws, i + 2, j + 1, data[j][i], kinds[i], c, points=titles)
    ws.freeze_panes = "B2" if cols and cols[0] == "metric_label" else "A2"


def _brief_sheet(wb, brief) -> None:
    from openpyxl.styles import Alignment, Font

    from .brief import _sections, _subtitle

    ws = wb.active
    ws.title = "Brief"
    ws.column_dimensions["A"].width = 10
    ws.column_dimensions["B"].width = 110
    wrap = Alignment(wrap_text=True, vertical="top")

    def line(text: str, mark: str = "", bold: bool = False, size: int = 11) -> None:
        ws.append([MARKS.get(mark, ""), safe_cell(text)])
        r = ws.max_row
        ws.cell(r, 2).alignment = wrap
        ws.cell(r, 2).data_type = "s"
        if bold:
            ws.cell(r, 2).font = Font(bold=True, size=size)

    line(brief.title, bold=True, size=14)
    line(_subtitle(brief, lambda x: x))
    for text in brief.intro:
        line(text)
    for attr, heading, empty in _sections(brief):
        items = getattr(brief, attr)
        if not items and not empty:
            continue
        ws.append([])
        line(heading, bold=True)
        for item in items or ():
            line(item.text, item.mark)
        if not items:
            line(empty)
    for heading, lines in (("Method", brief.method), ("Cautions", brief.cautions)):
        ws.append([])
        line(heading, bold=True)
        for text in lines:
            line(text)
    ws.freeze_panes = "A3"


def _notes_sheet(wb, brief) -> None:
    from openpyxl.styles import Alignment, Font

    from .changes import VERDICT_NAMES, VERDICTS

    ws = wb.create_sheet("Notes")
    ws.column_dimensions["A"].width = 24
    ws.column_dimensions["B"].width = 110
    wrap = Alignment(wrap_text=True, vertical="top")
    for heading, rows in (("Verdicts", [(VERDICT_NAMES[k], v) for k, v in VERDICTS.items()]),
                          ("Cautions", [("", c) for c in brief.cautions])):
        ws.append([heading])
        ws.cell(ws.max_row, 1).font = Font(bold=True)
        for a, b in rows:
            ws.append([safe_cell(a), safe_cell(b)])
            ws.cell(ws.max_row, 2).alignment = wrap
        ws.append([])


def _wide(history: pd.DataFrame, moves: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
    """Every metric x split x subgroup (rows) by wave (columns): values and flags."""
    waves = list(dict.fromkeys(history["wave"]))
    keys = ["metric", "metric_label", "kind", "group", "subgroup"]
    order = history.drop_duplicates(keys)[keys].reset_index(drop=True)
    value = history.pivot_table(index=["metric", "group", "subgroup"], columns="wave", values="value",
                                aggfunc="first")
    flags = history.assign(flags=history["flags"].fillna("").astype(str)).pivot_table(
        index=["metric", "group", "subgroup"], columns="wave", values="flags", aggfunc="first")
    idx = pd.MultiIndex.from_frame(order[["metric", "group", "subgroup"]])
    value = value.reindex(index=idx, columns=waves)
    flags = flags.reindex(index=idx, columns=waves)
    mark = pd.Series("", index=idx)
    if len(moves):
        sig = moves[moves["verdict"].isin(["rise", "fall"])].set_index(["metric", "group", "subgroup"])["verdict"]
        mark = sig.reindex(idx).map({"rise": "▲ Up", "fall": "▼ Down"}).fillna("")
    out = order.assign(**{f"v:{w}": value[w].to_numpy() for w in waves}, **{f"f:{w}": flags[w].to_numpy()
                                                                           for w in waves}, move=mark.to_numpy())
    return out, waves


def _wide_sheet(wb, history: pd.DataFrame, moves: pd.DataFrame, wave: str):
    """The sheet of every metric in every wave; returns it and each metric's total row."""
    from openpyxl.comments import Comment
    from openpyxl.styles import Font
    from openpyxl.utils import get_column_letter

    wide, waves = _wide(history, moves)
    ws = wb.create_sheet("Every wave")
    head = ["Measure", "Split", "Subgroup", *waves, f"Moved in {wave}"]
    for j, h in enumerate(head, start=1):
        ws.cell(1, j, h).font = Font(bold=True)
    ws.column_dimensions["A"].width = 36
    ws.column_dimensions["B"].width = 14
    ws.column_dimensions["C"].width = 20
    for j in range(len(waves) + 1):
        ws.column_dimensions[get_column_letter(4 + j)].width = 11
    careful = Font(italic=True, color="808080")
    totals: dict[str, int] = {}
    cols = {w: (wide[f"v:{w}"].to_numpy(float), wide[f"f:{w}"].to_numpy(object)) for w in waves}
    for i, r in enumerate(wide.itertuples(index=False)):  # a loop over rows: openpyxl writes cell by cell
        row = i + 2
        ws.cell(row, 1, safe_cell(r.metric_label)).data_type = "s"
        ws.cell(row, 2, "total" if r.group == "total" else safe_cell(str(r.group)))
        ws.cell(row, 3, safe_cell(str(r.subgroup)))
        if r.group == "total":
            totals.setdefault(r.metric, row)
        for j, w in enumerate(waves):
            v, f = cols[w][0][i], cols[w][1][i]
            if not np.isfinite(v):
                continue
            cell = ws.cell(row, 4 + j)
            cell.value, cell.number_format = value_cell(r.kind, v)
            if isinstance(f, str) and f:
                cell.font = careful
                cell.comment = Comment(f"Read with care: {f}", "tracker")
        ws.cell(row, 4 + len(waves), r.move)
    ws.freeze_panes = "D2"
    return ws, totals, waves


def _charts(wb, ws, totals: dict[str, int], metrics: list[tuple[str, str]], waves: list[str]) -> None:
    """A native line chart per headline metric, drawn from its total row of the wide sheet."""
    from openpyxl.chart import LineChart, Reference, Series

    sheet = wb.create_sheet("Charts")
    sheet.cell(1, 1, "The headline measures over every wave (total sample). Marked cells and intervals are in "
                     "'Every wave' and 'Estimates'.")
    cats = Reference(ws, min_col=4, max_col=3 + len(waves), min_row=1)
    for k, (metric, label) in enumerate(metrics):
        row = totals.get(metric)
        if row is None:
            continue
        chart = LineChart()
        chart.title = label[:80]
        chart.height, chart.width = 7.5, 16
        chart.legend = None
        series = Series(Reference(ws, min_col=4, max_col=3 + len(waves), min_row=row), title=label[:80])
        series.marker.symbol = "circle"
        chart.series.append(series)
        chart.set_categories(cats)
        sheet.add_chart(chart, f"A{3 + 16 * k}")


def table_bytes(frame: pd.DataFrame) -> bytes:
    """A result table as a workbook (``-o x.xlsx``): the column names and values of
    docs/columns.md (shares as fractions, changes as differences of fractions) at full
    precision, values shown by their row's kind (a share as a percentage); the header frozen,
    the columns sized, formula-like text kept as text."""
    from openpyxl import Workbook

    wb = Workbook()
    wb.remove(wb.active)
    _table_sheet(wb, "tracker", frame, titles=False)
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def workbook_bytes(brief) -> bytes:
    """The client workbook of a brief (see the module's description)."""
    from openpyxl import Workbook

    wb = Workbook()
    _brief_sheet(wb, brief)
    history = brief.tables.get("Every wave")
    moves = brief.tables.get("All changes", pd.DataFrame())
    if history is not None and len(history):
        ws, totals, waves = _wide_sheet(wb, history, moves.assign(metric=moves.get("metric")), brief.wave)
        heads = list(dict.fromkeys(i.metric for i in brief.headline if i.metric)) or \
            list(dict.fromkeys(history["metric"]))[:4]
        labels = dict(zip(history["metric"], history["metric_label"]))
        _charts(wb, ws, totals, [(m, labels[m]) for m in heads[:8] if m in labels], waves)
    for name, table in brief.tables.items():
        if name != "Every wave":
            _table_sheet(wb, name, table.drop(columns=[c for c in ("metric",) if c in table and name != "Estimates"]))
    _notes_sheet(wb, brief)
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()
