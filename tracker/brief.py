"""The briefing: what moved, what did not, and what the trends say, for non-statisticians.

:func:`build_brief` assembles a :class:`Brief` from the changes, trends and estimates;
:func:`write_brief` renders it as one self-contained HTML page, Markdown or XLSX.
"""

from __future__ import annotations

import datetime as dt
import html
import io
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import TrackerError
from .estimates import weights_of
from .formatting import safe_cell
from .kinds import KINDS
from .methods.bases import kish_base
from .methods.tests import ADJUST_METHODS

CAUTIONS = (
    "Significance is not importance: a significant change can be too small to matter, and a change "
    "that matters can miss significance on a small base. Read the size and its interval.",
    "The intervals cover sampling error only, not coverage gaps, non-response, or changes in how "
    "questions were asked or answered.",
    "A change in the sample's make-up can move a measure even when nothing changed within any group.",
    "Small bases are flagged and never reported as significant; pooled or longer-run figures are "
    "safer for thin subgroups.",
)


@dataclass(frozen=True)
class Item:
    """One line of the brief, with the mark it carries (rise, fall, flat or note)."""

    text: str
    mark: str = "note"
    metric: str = ""
    subgroup: str = ""


@dataclass(frozen=True)
class Brief:
    title: str
    wave: str
    against: str
    headline: tuple[Item, ...]
    subgroup_moves: tuple[Item, ...]
    steady: tuple[Item, ...]
    trends: tuple[Item, ...]
    sample_notes: tuple[Item, ...]
    method: tuple[str, ...]
    mix_moves: tuple[Item, ...] = ()
    unclear: tuple[Item, ...] = ()
    surprises: tuple[Item, ...] = ()
    data: dict = field(default_factory=dict)  # the analysis as plain data (Analysis.to_dict)
    cautions: tuple[str, ...] = CAUTIONS
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    charts: tuple[tuple[str, dict], ...] = ()
    compact_charts: tuple[tuple[str, dict], ...] = ()  # small charts of the series that held, drawn in a grid


# -- wording --------------------------------------------------------------------------------

def fmt_value(kind: str, v: float) -> str:
    return KINDS[kind].fmt_value(v)


def fmt_size(kind: str, d: float) -> str:
    return KINDS[kind].fmt_change(d)


def _num(kind: str, d: float) -> str:
    return KINDS[kind].fmt_number(d)


def change_sentence(row, level: float) -> str:
    """'Punctuality good or very good fell from 75% to 62%, down 13.2 points (95% interval 9.2 to 17.1); ...'"""
    kind = row.kind
    down = row.change < 0
    lo, hi = (-row.change_high, -row.change_low) if down else (row.change_low, row.change_high)
    who = row.metric_label if row.group == "total" else f"{row.metric_label}, {row.subgroup}"
    verb, word = ("fell", "down") if down else ("rose", "up")
    return (f"{who} {verb} from {fmt_value(kind, row.value_from)} to {fmt_value(kind, row.value_to)}, "
            f"{word} {fmt_size(kind, row.change)} ({level:.0%} interval {_num(kind, lo)} to {_num(kind, hi)}); "
            f"base {int(row.base_from):,} and {int(row.base_to):,}.")


def steady_sentence(row, limit: float, matters_given: bool) -> str:
    """'Information good: 61% (was 62%); held steady: the change ... lies within 3.9 points either way'."""
    kind = row.kind
    what = ("the smallest change that matters for this measure" if matters_given
            else "the change this comparison could detect with 80% power")
    return (f"{row.metric_label}: {fmt_value(kind, row.value_to)} (was {fmt_value(kind, row.value_from)}); held "
            f"steady: the whole interval of the change ({_span(kind, row.change_low, row.change_high)}) "
            f"lies within {fmt_size(kind, limit)} either way, {what}.")


def unclear_sentence(row, family: int) -> str:
    """A move that is not significant but not ruled out either: never 'held steady'."""
    kind = row.kind
    who = row.metric_label if row.group == "total" else f"{row.metric_label}, {row.subgroup}"
    return (f"{who}: {fmt_value(kind, row.value_to)} (was {fmt_value(kind, row.value_from)}), a move of "
            f"{_signed(kind, row.change)} (interval {_span(kind, row.change_low, row.change_high)}). Not beyond the noise of the {family} comparisons made, but a change "
            f"of this size is not ruled out either; this comparison could detect about "
            f"{fmt_size(kind, row.min_detectable_change)}. Watch the next wave before reading it either way.")


def not_tested_sentence(row) -> str:
    kind = row.kind
    return (f"{row.metric_label}: {fmt_value(kind, row.value_to)} (was {fmt_value(kind, row.value_from)}); "
            f"not tested: {row.flags}.")


def trend_sentence(row, level: float) -> str:
    kind = row.kind
    who = row.metric_label if row.group == "total" else f"{row.metric_label}, {row.subgroup}"
    if str(row.pattern).startswith("shifted"):
        return (f"{who} {row.pattern} at {row.shift_wave}: {fmt_value(kind, row.level_before)} "
                f"({fmt_value(kind, row.level_before_low)} to {fmt_value(kind, row.level_before_high)}) before, "
                f"{fmt_value(kind, row.level_after)} ({fmt_value(kind, row.level_after_low)} to "
                f"{fmt_value(kind, row.level_after_high)}) since; the new level has held.")
    if row.pattern in ("rising", "falling"):
        unit = "" if kind == "mean" else " points"
        f = 1 if kind == "mean" else 100
        return (f"{who} is {row.pattern}: {row.slope_per_year * f:+.{2 if kind == 'mean' else 1}f}{unit} a year "
                f"({level:.0%} interval {row.slope_low * f:+.{2 if kind == 'mean' else 1}f} to "
                f"{row.slope_high * f:+.{2 if kind == 'mean' else 1}f}) over {row.waves} waves "
                f"({row.first_wave} to {row.last_wave}).")
    if row.pattern in ("moved up", "moved down"):
        unit = "" if kind == "mean" else " points"
        f = 1 if kind == "mean" else 100
        return (f"{who} {row.pattern} over {row.waves} waves ({row.first_wave} to {row.last_wave}): "
                f"{row.slope_per_year * f:+.{2 if kind == 'mean' else 1}f}{unit} a year on a straight-line reading, "
                f"but the waves cannot tell a steady trend from a one-off step; brief the move, not its shape.")
    if row.pattern == "one-wave blip":
        side = "below" if row.blip_size < 0 else "above"
        return (f"{who}: {row.blip_wave} was a one-wave blip ({fmt_size(kind, row.blip_size)} {side} the rest "
                f"of the series, which does not move with it). The series did not turn; do not brief it as a change "
                f"of direction.")
    return f"{who}: {row.pattern}."


# -- assembling -----------------------------------------------------------------------------

def build_brief(study, wave: str | None = None, against: str = "previous", adjust: str = "bh",
                level: float = 0.95, charts: bool = True) -> Brief:
    """Everything the brief says, read from the wave's one analysis (Study.analysis)."""
    from .progress import step

    step("briefing", 0, 2, "estimates, changes and trends")
    analysis = study.analysis(wave=wave, against=against, adjust=adjust, level=level)
    result = analysis.changes
    wave = result.wave
    t = result.table
    tested_sig = t[t["significant"]]
    total_sig = tested_sig[tested_sig["group"] == "total"]
    head = total_sig.reindex(total_sig["change"].abs().sort_values(ascending=False).index)
    mixes = analysis.mix
    by_mix = {m for m, (_, explained) in mixes.items() if explained}
    headline = tuple(Item(change_sentence(r, level) + (" " + mixes[r.metric][0] if r.metric in mixes else ""),
                          "fall" if r.change < 0 else "rise", r.metric, r.subgroup)
                     for r in head.itertuples() if r.metric not in by_mix)
    mix_moves = tuple(Item(change_sentence(r, level) + " " + mixes[r.metric][0], "note", r.metric, r.subgroup)
                      for r in head.itertuples() if r.metric in by_mix)
    if not headline and mix_moves:
        headline = (Item("No measure moved in total beyond what the sample's changed make-up explains (next "
                         "section).", "note"),)
    moved_totals = set(total_sig["metric"])
    sub = tested_sig[(tested_sig["group"] != "total") & ~tested_sig["metric"].isin(moved_totals)]
    sub = sub.reindex(sub["change"].abs().sort_values(ascending=False).index)
    subgroup_moves = tuple(Item(change_sentence(r, level) + " The total did not move significantly.",
                                "fall" if r.change < 0 else "rise", r.metric, r.subgroup) for r in sub.itertuples())
    totals = t[t["group"] == "total"]
    matters = study.matters()
    steady = tuple(Item(steady_sentence(r, matters.get(r.metric, r.min_detectable_change), r.metric in matters),
                        "flat", r.metric) for r in totals[totals["verdict"] == "steady"].itertuples())
    family = result.family_size or result.n_tests
    unclear_rows = totals[totals["verdict"] == "unclear"]
    unclear_rows = unclear_rows.reindex(unclear_rows["change"].abs().sort_values(ascending=False).index)
    unclear = tuple(Item(unclear_sentence(r, family), "note", r.metric) for r in unclear_rows.itertuples())

    trends = analysis.trends
    moving = trends[~trends["pattern"].isin(["steady", "too few waves"])]
    total_moving = moving[moving["group"] == "total"]
    sub_moving = moving[(moving["group"] != "total") & ~moving["metric"].isin(set(total_moving["metric"]))]
    trend_items = [Item(trend_sentence(r, level), _trend_mark(r), r.metric, r.subgroup)
                   for r in pd.concat([total_moving, sub_moving]).itertuples()]
    headline_metrics = {i.metric for i in headline}
    still = trends[(trends["group"] == "total") & (trends["pattern"] == "steady")]
    for r in still[still["metric"].isin(headline_metrics)].itertuples():
        trend_items.append(Item(f"{r.metric_label}: the move in {wave} is a single wave so far; before it the series "
                                f"shows no trend or shift. A step needs later waves to confirm it, so brief it as the "
                                f"latest wave's change, not yet as a new level.", "note", r.metric))
    still = still[~still["metric"].isin(headline_metrics)]
    if len(still):
        trend_items.append(Item("Steady over the series: " + "; ".join(still["metric_label"]) + ".", "flat"))
    short = trends[(trends["group"] == "total") & (trends["pattern"] == "too few waves")]
    for r in short.itertuples():
        trend_items.append(Item(f"{r.metric_label}: {r.note}.", "note", r.metric))

    sample = _sample_notes(study, analysis)
    n_tests, n_sig = result.n_tests, result.n_significant
    method = (
        f"Compared: {wave} with {result.against}. {n_tests} tests (every metric in total and in every subgroup), "
        f"{n_sig} significant at the {1 - level:g} level after {ADJUST_METHODS[adjust]} adjustment; only "
        f"adjusted results are called significant. 'Held steady' means the whole interval of the change lies "
        f"within the smallest change that matters (by default the change the comparison could detect); a move "
        f"that is neither is 'not clear either way'.",
        "Every change is tested with t on its design-based variance (Taylor linearization with the study's "
        "weights, strata and clusters; minus the covariance of shared clusters or respondents) and the design's "
        "degrees of freedom. Shares get Newcombe's hybrid score interval for the difference. Intervals are "
        + f"{level:.0%}.",
        "Minimum detectable change: the change each comparison would find with 80% power at the unadjusted level "
        "(for shares, the larger of a rise and a fall, with the variance the changed share would have).",
        "Trends: each series (sampling error plus the between-wave variation) is tested once for not being "
        "steady, against a straight line, a step at any wave and a one-wave blip at any wave, with the search "
        "accounted for; those tests are adjusted together across every series, and a series that moved gets "
        "the shape that fits it best ('moved up/down' when its waves cannot tell a trend from a step). Slopes "
        "are per year of fieldwork time.",
        "Reliability: cells below an effective base of 30 or with too wide a Korn-Graubard interval (NCHS "
        "presentation standard for proportions, 2017) are flagged and not tested.",
    ) + tuple(result.notes[1:])

    tables = {
        "Headline": head[_TABLE_COLS].reset_index(drop=True),
        "Subgroup moves": sub[_TABLE_COLS].reset_index(drop=True),
        "All changes": result.shown(True)[_TABLE_COLS].reset_index(drop=True),
        "Trends": trends[[c for c in _TREND_COLS]].reset_index(drop=True),
        "Estimates": study.estimates(waves=[wave, *result.compared_with], level=level),
    }
    chart_list: list[tuple[str, dict]] = []
    compact: list[tuple[str, dict]] = []
    thin = _thin_subgroups(study, wave, level)
    thin_groups = {g for g, _ in thin}
    smoothed_drawn = any(g in thin_groups for _, g in shown_sub_pairs(sub))  # the same words in every form
    if thin:
        where = ("In this brief's subgroup charts (HTML) they also get a smoothed line" if smoothed_drawn else
                 "'tracker estimates --smooth' and 'tracker chart --smooth' give them a smoothed series")
        sample.append(Item(
            f"Thin subgroups (effective base under {SMOOTH_BELOW} in {wave}): "
            f"{', '.join(f'{lev} ({g})' for g, lev in thin[:8])}{' and more' if len(thin) > 8 else ''}; their "
            f"estimates swing with sampling noise alone. {where}: a local-level model with each wave's known "
            f"sampling error (signal extraction, as for repeated surveys since Scott and Smith 1974) damps that "
            f"noise. The direct estimates stay the figures reported.", "note"))
    if charts:
        from .charts import change_overview, chart_spec, trend_chart

        chart_list.append(("Every tested change in total", chart_spec(change_overview(result, totals_only=True))))
        shown_sub = shown_sub_pairs(sub)
        drawn = [m for m in study.codebook.metrics if m in set(t["metric"])]
        # a metric that neither moved this wave nor follows a pattern gets a small chart in a grid
        moved = headline_metrics | {i.metric for i in subgroup_moves} | {i.metric for i in mix_moves} \
            | set(moving["metric"]) | set(unclear_rows["metric"])
        for k, metric in enumerate(drawn):
            step("drawing charts", k, len(drawn), metric)
            label = study.codebook.metrics[metric].label
            if metric not in moved:
                compact.append((f"{label}: wave by wave", chart_spec(trend_chart(
                    study, metric, adjust=adjust, level=level, until=wave, compact=True))))
                continue
            chart_list.append((f"{label}: wave by wave", chart_spec(trend_chart(study, metric, adjust=adjust,
                                                                                level=level, until=wave))))
            for m, g in sorted(shown_sub):
                if m == metric:
                    chart_list.append((f"{label} by {g}", chart_spec(trend_chart(
                        study, metric, by=g, adjust=adjust, level=level, until=wave, smooth=g in thin_groups))))
    return Brief(
        title=study.codebook.title, wave=wave, against=result.against, headline=headline,
        subgroup_moves=subgroup_moves, steady=steady, trends=tuple(trend_items), sample_notes=tuple(sample),
        method=method, tables=tables, charts=tuple(chart_list), compact_charts=tuple(compact),
        mix_moves=mix_moves, unclear=unclear, surprises=_surprise_items(analysis),
        data=analysis.to_dict(),
    )


#: Subgroups under this effective base in the briefed wave get a smoothed line in their charts.
SMOOTH_BELOW = 300


def shown_sub_pairs(sub: pd.DataFrame) -> set[tuple[str, str]]:
    """(metric, group) of the subgroup moves that get their own chart."""
    return {(r.metric, g) for r, g in zip(sub.itertuples(), sub["group"])}


def _thin_subgroups(study, wave: str, level: float) -> list[tuple[str, str]]:
    """(group, level) of the subgroups whose median effective base over the metrics in
    ``wave`` is under SMOOTH_BELOW."""
    est = study.estimates(waves=[wave], level=level)
    sub = est[est["group"] != "total"]
    if sub.empty:
        return []
    med = sub.groupby(["group", "subgroup"], sort=False)["effective_base"].median()
    return [k for k, v in med.items() if v < SMOOTH_BELOW]


def _surprise_items(analysis) -> tuple[Item, ...]:
    """The cells outside the range the earlier waves predicted, as sentences."""
    from .expected import shown

    t = analysis.surprises
    if t is None or not t["surprise"].any():
        return ()
    tested = int(t["p_raw"].notna().sum())
    out = []
    for r in t[t["surprise"]].sort_values("p_adjusted").itertuples():
        who = "in total" if r.group == "total" else f"among {r.subgroup} ({r.group})"
        side = "above" if r.value > r.high else "below"
        out.append(Item(f"{r.metric_label} {who}: {shown(r.kind, r.value)}, {side} the range of "
                        f"{shown(r.kind, r.low)} to {shown(r.kind, r.high)} that the earlier waves predicted "
                        f"(base {int(r.base):,}).", "note", r.metric, r.subgroup))
    out.append(Item(f"Judged against each series' own pattern and variation, with the false discovery rate held "
                    f"at {1 - analysis.level:.0%} across all {tested:,} cells: out of line asks for a second look "
                    f"(fieldwork, the make-up, an event), not a headline by itself.", "note"))
    return tuple(out)


_TABLE_COLS = ["metric_label", "group", "subgroup", "wave_from", "wave_to", "value_from", "value_to", "change",
               "change_low", "change_high", "base_from", "base_to", "effective_base_from", "effective_base_to",
               "p_raw", "p_adjusted", "min_detectable_change", "verdict", "flags"]
_TREND_COLS = ["metric_label", "group", "subgroup", "first_wave", "last_wave", "waves", "latest_value",
               "slope_per_year", "slope_low", "slope_high", "wave_to_wave_sd", "excess_variation_p", "pattern",
               "pattern_p_adjusted", "shift_wave", "level_before", "level_after", "blip_wave", "note"]


def _trend_mark(row) -> str:
    if row.pattern in ("rising", "shifted up", "moved up"):
        return "rise"
    if row.pattern in ("falling", "shifted down", "moved down"):
        return "fall"
    return "note"


def _sample_notes(study, analysis) -> list[Item]:
    result, trends = analysis.changes, analysis.trends
    notes = []
    waves = [result.wave, *result.compared_with]
    book = study.codebook
    for w in waves:
        table = study.load(w)
        weights = weights_of(book, table)
        eff = float(kish_base(weights.sum(), (weights**2).sum()))
        notes.append(Item(f"{w}: {len(table):,} respondents; effective base {eff:,.0f} "
                          f"(weighting efficiency {eff / len(table):.0%}).", "note"))
    t = result.table
    untested = t[(t["group"] == "total") & (t["verdict"] == "not tested") & ~t["flags"].str.contains("wording break")]
    notes.extend(Item(not_tested_sentence(r), "note", r.metric) for r in untested.itertuples())
    flagged = t[t["flags"].str.contains("unreliable|no respondents", regex=True)]
    if len(flagged):
        ex = "; ".join(f"{r.metric_label}, {r.subgroup}" for r in flagged.head(5).itertuples())
        notes.append(Item(f"{len(flagged)} comparisons were not tested because a base was too small or an interval "
                          f"too wide (for example {ex}).", "note"))
    for metric, rows in t[t["flags"].str.contains("wording break")].groupby("metric"):
        notes.append(Item(f"{rows['metric_label'].iloc[0]}: {rows['flags'].iloc[0].split(' | ')[0]}.", "note", metric))
    for r in trends[(trends["group"] == "total") & trends["note"].str.contains("wording break")].itertuples():
        notes.append(Item(f"{r.metric_label}: {r.note}; its trend uses only the waves since.", "note", r.metric))
    overlap = [n for n in result.notes if "answered both waves" in n or "appear in both waves" in n]
    notes.extend(Item(n + ".", "note") for n in overlap)
    comp = analysis.composition
    if comp is not None:
        for r in comp.tests.itertuples():
            if r.shifted:
                notes.append(Item(f"The sample's make-up shifted on {r.group}: {r.largest_move} of the weighted sample "
                                  f"(Rao-Scott test, adjusted p {r.p_adjusted:.4f}). Measures that differ between "
                                  f"these groups can move for that reason alone.", "note"))
        if not comp.tests["shifted"].any():
            notes.append(Item(f"No shift in the weighted make-up on {', '.join(comp.tests['group'])}.", "flat"))
    return notes


def _signed(kind: str, d: float) -> str:
    return KINDS[kind].fmt_change(d, signed=True)


def _span(kind: str, lo: float, hi: float) -> str:
    """'-4.5 to +3.7 points'"""
    k = KINDS[kind]
    return f"{lo * k.scale:+.{k.decimals}f} to {k.fmt_change(hi, signed=True)}"


# -- rendering ------------------------------------------------------------------------------

def write_brief(brief: Brief, path: str | Path) -> Path:
    """Write the brief as .html (one self-contained page), .md or .xlsx, atomically."""
    from .outputs import check_output, write_output

    path = check_output(path)  # before the rendering: a refused path costs nothing
    suffix = path.suffix.lower()
    if suffix in (".html", ".htm"):
        data = render_html(brief).encode("utf-8")
    elif suffix == ".md":
        data = render_markdown(brief).encode("utf-8")
    elif suffix == ".xlsx":
        data = render_xlsx(brief)
    elif suffix == ".json":
        data = render_json(brief).encode("utf-8")
    else:
        raise TrackerError(f"{path}: give a file ending in .html, .md, .xlsx or .json")
    return write_output(path, data)


SECTIONS = [
    ("headline", "What moved", "No measure moved significantly in total."),
    ("mix_moves", "Moved with the sample's make-up", ""),
    ("subgroup_moves", "Moves in one subgroup only", "No subgroup moved on its own."),
    ("steady", "Held steady", "No measure can be called steady: see the next section."),
    ("unclear", "Not clear either way", ""),
    ("surprises", "Out of line with the series", ""),
    ("trends", "Trends", "No series has enough waves for a trend."),
    ("sample_notes", "Sample notes", ""),
]
WORD = {"rise": "Up: ", "fall": "Down: ", "flat": "", "note": ""}


def render_json(brief: Brief) -> str:
    """The machine-readable brief: every comparison of the analysis (with its verdict), every
    series' pattern, the make-up tests, and each section's items as the other forms show them."""
    import json

    doc = dict(brief.data)
    doc["sections"] = {attr: [{"text": i.text, "mark": i.mark, "metric": i.metric, "subgroup": i.subgroup}
                              for i in getattr(brief, attr)] for attr, _, _ in SECTIONS}
    doc["method"] = list(brief.method)
    doc["cautions"] = list(brief.cautions)
    return json.dumps(doc, indent=1, ensure_ascii=False, allow_nan=False) + "\n"


def render_markdown(brief: Brief) -> str:
    """The brief as Markdown; every text from the study is HTML-escaped, since Markdown
    renderers pass raw HTML through."""
    from .plain import md_text as e

    out = [f"# {e(brief.title)}", "", f"Briefing for wave {e(brief.wave)}, compared with {e(brief.against)}.", ""]
    for attr, heading, empty in SECTIONS:
        items = getattr(brief, attr)
        if not items and not empty:
            continue
        out += [f"## {heading}", ""]
        out += [f"- {WORD[i.mark]}{e(i.text)}" for i in items] or ([f"- {empty}"] if empty else [])
        out.append("")
    out += ["## Method", ""] + [f"- {e(m)}" for m in brief.method] + [""]
    out += ["## Cautions", ""] + [f"- {e(c)}" for c in brief.cautions] + [""]
    out.append(f"Made by tracker on {dt.date.today().isoformat()}. Charts are in the HTML version of this brief.")
    return "\n".join(out) + "\n"


def render_html(brief: Brief) -> str:
    from .page import chart_div, page

    e = html.escape
    parts = [f"<h1>{e(brief.title)}</h1>",
             f'<p class="sub">Briefing for wave <b>{e(brief.wave)}</b>, compared with {e(brief.against)}.</p>']
    charts = list(brief.charts)
    chart_at = {"headline": [0]} if charts else {}
    for attr, heading, empty in SECTIONS:
        items = getattr(brief, attr)
        if not items and not empty and attr not in chart_at:
            continue
        parts.append(f"<h2>{e(heading)}</h2>")
        if items:
            parts.append("<ul>" + "".join(
                f'<li class="{i.mark}"><span class="muted">{e(WORD[i.mark])}</span>{e(i.text)}</li>' for i in items)
                + "</ul>")
        elif empty:
            parts.append(f'<p class="muted">{e(empty)}</p>')
        for k in chart_at.get(attr, []):
            parts.append(f"<figure>{chart_div(k)}<figcaption class=\"muted\">{e(charts[k][0])}</figcaption></figure>")
    if len(charts) > 1 or brief.compact_charts:
        parts.append("<h2>Every measure, wave by wave</h2>")
        for k in range(1, len(charts)):
            parts.append(f"<figure>{chart_div(k)}<figcaption class=\"muted\">{e(charts[k][0])}</figcaption></figure>")
    if brief.compact_charts:
        parts.append('<p class="muted">Held or not clear this wave, with no trend over the series:</p><div class="grid">')
        for k in range(len(charts), len(charts) + len(brief.compact_charts)):
            parts.append(f"<figure>{chart_div(k)}</figure>")
        parts.append("</div>")
    parts.append("<h2>Method</h2><ul>" + "".join(f"<li>{e(m)}</li>" for m in brief.method) + "</ul>")
    parts.append('<h2>Cautions</h2><div class="caution"><ul>' + "".join(f"<li>{e(c)}</li>" for c in brief.cautions)
                 + "</ul></div>")
    parts.append(f'<p class="muted">Made by tracker on {dt.date.today().isoformat()}.</p>')
    return page(f"{brief.title}: {brief.wave}", "\n".join(parts),
                [spec for _, spec in charts] + [spec for _, spec in brief.compact_charts])


def render_xlsx(brief: Brief) -> bytes:
    """One sheet per table, plus the brief's text; numbers keep proper formats."""
    from openpyxl import Workbook
    from openpyxl.styles import Font
    from openpyxl.utils import get_column_letter

    wb = Workbook()
    ws = wb.active
    ws.title = "Brief"
    ws.append([safe_cell(brief.title)])
    ws["A1"].font = Font(bold=True, size=14)
    ws.append([safe_cell(f"Wave {brief.wave}, compared with {brief.against}")])
    for attr, heading, empty in SECTIONS:
        if not getattr(brief, attr) and not empty:
            continue
        ws.append([])
        ws.append([heading])
        ws.cell(ws.max_row, 1).font = Font(bold=True)
        for i in getattr(brief, attr) or [Item(empty)]:
            ws.append([safe_cell(WORD[i.mark] + i.text)])
    for heading, lines in (("Method", brief.method), ("Cautions", brief.cautions)):
        ws.append([])
        ws.append([heading])
        ws.cell(ws.max_row, 1).font = Font(bold=True)
        for line in lines:
            ws.append([safe_cell(line)])
    ws.column_dimensions["A"].width = 140
    for name, table in brief.tables.items():
        sheet = wb.create_sheet(name[:31])
        sheet.append([str(c) for c in table.columns])
        for cell in sheet[1]:
            cell.font = Font(bold=True)
        for row in table.itertuples(index=False):
            sheet.append([_xlsx_value(v) for v in row])
        for j, col in enumerate(table.columns, start=1):
            fmt = _number_format(col)
            letter = get_column_letter(j)
            sheet.column_dimensions[letter].width = max(10, min(40, len(str(col)) + 2))
            if fmt:
                for cell in sheet[letter][1:]:
                    if isinstance(cell.value, (int, float)):
                        cell.number_format = fmt
        sheet.freeze_panes = "A2"
    for sheet in wb.worksheets:
        for row in sheet.iter_rows():
            for cell in row:
                if isinstance(cell.value, str):
                    cell.data_type = "s"  # never a formula, whatever the text
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def _xlsx_value(v):
    if v is None or (isinstance(v, float) and not np.isfinite(v)):
        return None
    if isinstance(v, (np.bool_, bool)):
        return bool(v)
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, np.floating):
        return float(v) if np.isfinite(v) else None
    if isinstance(v, str):
        return safe_cell(v)
    if pd.isna(v):
        return None
    return v


def _number_format(col: str) -> str | None:
    if col.startswith(("p_", "pattern_p", "slope_p")) or col == "excess_variation_p":
        return "0.0000"
    if "base" in col or col in ("waves", "df"):
        return "#,##0"
    if col in ("value", "value_from", "value_to", "change", "change_low", "change_high", "ci_low", "ci_high",
               "min_detectable_change", "latest_value", "slope_per_year", "slope_low", "slope_high",
               "wave_to_wave_sd", "level_before", "level_after", "se"):
        return "0.000"
    return None
