"""The brief as an editable slide deck (``brief -o x.pptx``, python-pptx).

A title slide; one slide per headline move, with a native chart of the measure over every
wave (its value and interval, the moved wave's point marked and labelled) and the brief's
plain sentence; a slide of what held within its margin or could not be told apart from no
change; the gaps between subgroups that moved and what goes with the headline when the brief
has them; a slide of method and cautions. Each move's speaker notes carry its numbers. Text
is sized to fit its box (:func:`fit_size`), so that the longest labels stay inside.
"""

from __future__ import annotations

import io

import pandas as pd

__all__ = ["BOX", "deck_bytes", "fit_size", "lines_needed"]

WIDE, HIGH = 13.333, 7.5  # inches: a 16:9 slide
#: Text boxes (left, top, width, height in inches) and their largest and smallest font sizes.
BOX = {"title": (0.6, 0.35, 12.1, 1.0, 30, 18), "sentence": (0.6, 5.55, 12.1, 1.6, 18, 11),
       "body": (0.6, 1.45, 12.1, 5.6, 18, 10), "subtitle": (0.6, 3.6, 12.1, 1.4, 22, 14)}
#: The widest a character of the deck's font runs, as a share of the font size (a
#: conservative figure for proportional sans-serif text; common practice, no source).
CHAR_WIDTH = 0.55
LINE_HEIGHT = 1.2
MAX_MOVES = 12


def lines_needed(text: str, width_in: float, size_pt: float) -> int:
    """How many lines ``text`` takes in a box ``width_in`` wide at ``size_pt`` (each paragraph
    wrapped at words, at CHAR_WIDTH times the size a character)."""
    per_line = max(1, int(width_in * 72 / (CHAR_WIDTH * size_pt)))
    total = 0
    for para in text.split("\n"):
        words, line = para.split(), 0
        total += 1
        for w in words:
            add = len(w) + (1 if line else 0)
            if line + add > per_line and line:
                total += 1
                line = len(w)
            else:
                line += add
            while line > per_line:  # a word longer than a line runs on
                total += 1
                line -= per_line
    return total


def fit_size(text: str, box: str) -> float:
    """The largest font size (points) at which ``text`` fits the box, down to its smallest."""
    _l, _t, width, height, biggest, smallest = BOX[box]
    size = biggest
    while size > smallest and lines_needed(text, width - 0.2, size) * size * LINE_HEIGHT > (height - 0.1) * 72:
        size -= 1
    return size


def _text(slide, box: str, text: str, bold: bool = False):
    from pptx.util import Inches, Pt

    left, top, width, height, _b, _s = BOX[box]
    shape = slide.shapes.add_textbox(Inches(left), Inches(top), Inches(width), Inches(height))
    frame = shape.text_frame
    frame.word_wrap = True
    size = fit_size(text, box)
    for k, para in enumerate(text.split("\n")):
        p = frame.paragraphs[0] if k == 0 else frame.add_paragraph()
        p.text = para
        for run in p.runs:
            run.font.size = Pt(size)
            run.font.bold = bold
    shape.name = box
    return shape


def _chart(slide, history: pd.DataFrame, metric: str, wave: str, mark: str):
    """A native line chart of a measure's total over the waves: value, interval low and high;
    the brief's wave marked."""
    from pptx.chart.data import CategoryChartData
    from pptx.enum.chart import XL_CHART_TYPE, XL_LEGEND_POSITION
    from pptx.util import Inches, Pt

    from .kinds import kind_of

    rows = history[(history["metric"] == metric) & (history["group"] == "total")]
    k = kind_of(rows["kind"].iloc[0])
    data = CategoryChartData()
    data.categories = list(rows["wave"])
    scale = k.scale
    data.add_series("value", [round(v * scale, 6) for v in rows["value"]])
    data.add_series("interval, low", [round(v * scale, 6) for v in rows["ci_low"]])
    data.add_series("interval, high", [round(v * scale, 6) for v in rows["ci_high"]])
    frame = slide.shapes.add_chart(XL_CHART_TYPE.LINE_MARKERS, Inches(0.6), Inches(1.4), Inches(12.1),
                                   Inches(4.1), data)
    chart = frame.chart
    chart.has_legend = True
    chart.legend.position = XL_LEGEND_POSITION.BOTTOM
    chart.legend.include_in_layout = False
    chart.legend.font.size = Pt(11)
    for s in list(chart.plots[0].series)[1:]:
        s.format.line.dash_style = 4  # dashed (MSO_LINE.DASH): the interval, not a measure
        s.format.line.width = Pt(1)
        s.smooth = False
    value = chart.plots[0].series[0]
    value.smooth = False
    if wave in list(rows["wave"]):
        point = value.points[list(rows["wave"]).index(wave)]
        point.marker.size = 12
        point.data_label.has_text_frame = True
        point.data_label.text_frame.text = mark
    chart.value_axis.has_major_gridlines = True
    chart.value_axis.tick_labels.font.size = Pt(11)
    chart.category_axis.tick_labels.font.size = Pt(10)
    return chart


def _notes(slide, row) -> None:
    """The speaker notes of a move: every number behind its sentence."""
    from .kinds import kind_of

    k = kind_of(row.kind)
    slide.notes_slide.notes_text_frame.text = (
        f"{row.metric_label}, {row.subgroup}: {k.fmt_value(row.value_from)} in {row.wave_from}, "
        f"{k.fmt_value(row.value_to)} in {row.wave_to}; change {k.fmt_change(row.change, signed=True)}, adjusted "
        f"interval {k.fmt_change(row.adjusted_low, signed=True)} to {k.fmt_change(row.adjusted_high, signed=True)} "
        f"at the {100 * row.adjusted_level:.1f}% level; adjusted p {row.p_adjusted:.4f}; bases {int(row.base_from):,} "
        f"and {int(row.base_to):,}; verdict: {row.verdict}.")


def deck_bytes(brief) -> bytes:
    """The slide deck of a brief (see the module's description)."""
    from pptx import Presentation
    from pptx.util import Inches

    from .brief import Item, _subtitle

    deck = Presentation()
    deck.slide_width, deck.slide_height = Inches(WIDE), Inches(HIGH)
    blank = deck.slide_layouts[6]
    first = deck.slides.add_slide(blank)
    _text(first, "title", brief.title, bold=True)
    _text(first, "subtitle", _subtitle(brief, lambda x: x) + "\n" + " ".join(brief.intro))
    history = brief.tables.get("Every wave", pd.DataFrame())
    changes = brief.tables.get("All changes", pd.DataFrame())
    moves = [i for i in brief.headline if i.mark in ("rise", "fall")][:MAX_MOVES]
    for item in moves:
        slide = deck.slides.add_slide(blank)
        label = changes.loc[changes["metric"] == item.metric, "metric_label"]
        _text(slide, "title", (label.iloc[0] if len(label) else item.metric) + (": up" if item.mark == "rise"
                                                                                  else ": down"), bold=True)
        if len(history) and item.metric in set(history["metric"]):
            _chart(slide, history, item.metric, brief.wave, "▲ rose" if item.mark == "rise" else "▼ fell")
        _text(slide, "sentence", item.text)
        row = changes[(changes["metric"] == item.metric) & (changes["group"] == "total")]
        if len(row):
            _notes(slide, next(row.itertuples()))
    if brief.first_wave:
        _list_slide(deck, "Where the measures stand", [("", brief.levels)], blank)
    else:
        _list_slide(deck, "What held, and what could not be told",
                    [("Held within the margin", brief.held),
                     ("Not significant: could not be told from no change", brief.not_significant)], blank)
    if brief.gap_moves:
        _list_slide(deck, "Gaps between subgroups that moved", [("", brief.gap_moves[:8])], blank)
    if brief.drivers:
        _list_slide(deck, "What goes with the headline", [("", brief.drivers[:8])], blank)
    _list_slide(deck, "Method and cautions", [("Method", [Item(m) for m in brief.method]),
                                              ("Cautions", [Item(c) for c in brief.cautions])], blank)
    buf = io.BytesIO()
    deck.save(buf)
    return buf.getvalue()


def _list_slide(deck, title: str, parts, layout) -> None:
    """A slide of headed lists; with nothing to list, a sentence saying so."""
    slide = deck.slides.add_slide(layout)
    _text(slide, "title", title, bold=True)
    lines = []
    for heading, items in parts:
        if not items:
            continue
        if heading:
            lines.append(heading + ":")
        lines += [f"• {i.text}" for i in items]
    cut = 0
    _l, _t, width, height, _b, smallest = BOX["body"]
    # the last lines go (and the slide says how many) until the rest fits at the smallest size
    while len(lines) > 1 and lines_needed("\n".join(lines), width - 0.2, smallest) * smallest * LINE_HEIGHT \
            > (height - 0.1) * 72:
        lines.pop()
        cut += 1
    if cut:
        lines[-1] = f"(and {cut} more: see the workbook or the HTML brief)"
    _text(slide, "body", "\n".join(lines) or "Nothing this wave.")


def check_fits(path) -> list[str]:
    """Every text box of a deck whose text would not fit at its font size (by lines_needed)."""
    from pptx import Presentation

    out = []
    for n, slide in enumerate(Presentation(str(path)).slides, start=1):
        for shape in slide.shapes:
            if not shape.has_text_frame or shape.name not in BOX:
                continue
            _l, _t, width, height, _b, _s = BOX[shape.name]
            size = max((r.font.size.pt for p in shape.text_frame.paragraphs for r in p.runs if r.font.size),
                       default=18)
            text = "\n".join(p.text for p in shape.text_frame.paragraphs)
            lines = lines_needed(text, width - 0.2, size)
            if lines * size * LINE_HEIGHT > (height - 0.1) * 72 + 1e-9:
                out.append(f"slide {n}, {shape.name}: {lines} lines at {size} pt")
    return out
