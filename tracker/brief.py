"""The briefing: what moved, what did not, and what the trends say, for non-statisticians.

:func:`build_brief` assembles a :class:`Brief` from the changes, trends and estimates;
:func:`write_brief` renders it as one self-contained HTML page, Markdown or XLSX.
"""

from __future__ import annotations

import datetime as dt
import html
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from .analysis import SMOOTH_BELOW, make_up_shares, sample_facts
from .errors import TrackerError
from .wording import (
    CAUTIONS,
    change_sentence,
    count,
    design_lines,
    fixed,
    held_sentence,
    method_lines,
    not_significant_sentence,
    not_tested_sentence,
    p_text,
    plural,
    study_lines,
    trend_sentence,
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
    held: tuple[Item, ...]
    trends: tuple[Item, ...]
    sample_notes: tuple[Item, ...]
    method: tuple[str, ...]
    mix_moves: tuple[Item, ...] = ()
    not_significant: tuple[Item, ...] = ()
    surprises: tuple[Item, ...] = ()
    data: dict = field(default_factory=dict)  # the analysis as plain data (Analysis.to_dict)
    cautions: tuple[str, ...] = CAUTIONS
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    charts: tuple[tuple[str, dict], ...] = ()
    compact_charts: tuple[tuple[str, dict], ...] = ()  # small charts of the series that did not move, in a grid
    intro: tuple[str, ...] = ()  # what the intervals and the words mean, in plain sentences
    first_wave: bool = False  # a study's first wave: levels only, nothing to compare with
    levels: tuple[Item, ...] = ()  # the first wave's levels
    gap_moves: tuple[Item, ...] = ()  # gaps between subgroups that changed, and splits whose trends differ
    drivers: tuple[Item, ...] = ()  # the attributes' importance for the headline, when the codebook declares them

    def to_html(self, path=None):
        """The one-page HTML brief (charts inline, opens offline): written to ``path``, or returned."""
        return self._out(path, ".html", render_html)

    def to_markdown(self, path=None):
        """The brief as Markdown: written to ``path``, or returned."""
        return self._out(path, ".md", render_markdown)

    def to_json(self, path=None):
        """Every comparison, pattern and section as JSON: written to ``path``, or returned."""
        return self._out(path, ".json", render_json)

    def to_xlsx(self, path=None):
        """The client workbook (tracker.workbook): written to ``path``, or its bytes."""
        return self._out(path, ".xlsx", render_xlsx)

    def to_pptx(self, path=None):
        """The slide deck (tracker.deck): written to ``path``, or its bytes."""
        from .deck import deck_bytes

        return self._out(path, ".pptx", deck_bytes)

    def _repr_html_(self) -> str:
        """In a notebook: the brief's text (the charts are in to_html's page)."""
        return html.escape(render_markdown(self)).replace("\n", "<br>")

    def _out(self, path, suffix: str, render):
        if path is None:
            return render(self)
        if Path(path).suffix.lower() not in (suffix, ".htm" if suffix == ".html" else suffix):
            raise TrackerError(f"{path}: this writes {suffix} files")
        return write_brief(self, path)


# -- assembling -----------------------------------------------------------------------------

def build_brief(study, wave: str | None = None, against: str = "previous", adjust: str = "bh",
                level: float = 0.95, charts: bool = True) -> Brief:
    """Everything the brief says, read from the wave's one analysis (Study.analysis); for a
    study's first wave, the levels alone (:func:`first_wave_brief`)."""
    from .progress import step

    labels = study.labels
    if not labels:
        raise TrackerError(f"{study.root}: the study holds no waves yet; add one first")
    if (wave or labels[-1]) == labels[0]:
        return first_wave_brief(study, labels[0], level, charts)
    step("briefing", 0, 2, "estimates, changes and trends")
    analysis = study.analysis(wave=wave, against=against, adjust=adjust, level=level)
    result = analysis.changes
    wave = result.wave
    t = result.table
    moves = _move_sections(analysis)
    matters = study.matters()
    totals = t[t["group"] == "total"]
    held = tuple(Item(held_sentence(r, matters[r.metric]), "flat", r.metric)
                 for r in totals[totals["verdict"] == "held"].itertuples())
    family = result.family_size or result.n_tests
    quiet_rows = totals[totals["verdict"] == "not significant"]
    quiet_rows = quiet_rows.reindex(quiet_rows["change"].abs().sort_values(ascending=False).index)
    not_significant = tuple(Item(not_significant_sentence(r), "note", r.metric) for r in quiet_rows.itertuples())
    headline_metrics = {i.metric for i in moves["headline"]}
    trend_items, moving = _pattern_items(analysis, headline_metrics, level)

    sample = _sample_notes(study, analysis)
    n_sig = result.n_significant
    adj_level = float(t["adjusted_level"].iloc[0]) if len(t) else level
    intro = (
        (f"Compared: {wave} with {result.against}. {count(family, 'comparison')} (every measure in total and in every "
        f"subgroup) were judged together, and {count(n_sig, 'change')} {plural(n_sig, 'was', 'were')} found "
        f"significant."),
        ("Each change is shown with its interval adjusted for all the comparisons made together: a change is called "
        "significant exactly when that interval leaves out zero."),
    )
    method = (method_lines(adjust, level, adj_level, family, n_sig, bool(matters)) + study_lines(study.codebook)
              + design_lines(result))
    sub = moves["sub_rows"]
    tables = {
        "Headline": moves["head_rows"][_TABLE_COLS].reset_index(drop=True),
        "Subgroup moves": sub[_TABLE_COLS].reset_index(drop=True),
        "All changes": result.shown(True)[_TABLE_COLS].reset_index(drop=True),
        "Trends": analysis.trends[[c for c in _TREND_COLS]].reset_index(drop=True),
        "Estimates": study.estimates(waves=[wave, *result.compared_with], level=level),
        "Every wave": study.estimates(waves=study.labels[:study.labels.index(wave) + 1], level=level),
    }
    thin_groups = {g for g, _ in analysis.thin}
    smoothed_drawn = charts and any(g in thin_groups for _, g in shown_sub_pairs(sub))  # the same words in every form
    if analysis.thin:
        where = (" In this brief's subgroup charts they also get a smoothed line, which damps that noise by "
                 "borrowing strength from the waves around each one; the figures reported stay the direct "
                 "estimates." if smoothed_drawn else "")
        sample.append(Item(
            f"Thin subgroups (effective base under {SMOOTH_BELOW} in {wave}): "
            f"{', '.join(f'{lev} ({_group_label(study, g)})' for g, lev in analysis.thin[:8])}"
            f"{' and more' if len(analysis.thin) > 8 else ''}; their estimates swing with sampling noise alone.{where}",
            "note"))
    chart_list: list[tuple[str, dict]] = []
    compact: list[tuple[str, dict]] = []
    if charts:
        moved = (headline_metrics | {i.metric for i in moves["subgroup_moves"]}
                 | {i.metric for i in moves["mix_moves"]} | set(moving["metric"]))
        chart_list, compact = _brief_charts(study, analysis, moved, sub, thin_groups)
    return Brief(
        title=study.codebook.title, wave=wave, against=result.against, headline=moves["headline"],
        subgroup_moves=moves["subgroup_moves"], held=held if matters else (), trends=tuple(trend_items),
        sample_notes=tuple(sample), method=method, tables=tables, charts=tuple(chart_list),
        compact_charts=tuple(compact), mix_moves=moves["mix_moves"], not_significant=not_significant,
        surprises=_surprise_items(analysis), data=analysis.to_dict(), intro=intro,
        gap_moves=_gap_items(study, wave, result, adjust, level), drivers=_driver_items(study, level),
    )


def _gap_items(study, wave: str, result, adjust: str, level: float) -> tuple[Item, ...]:
    """Gaps between subgroups that changed since the baseline, and splits whose levels trend
    apart (tracker.gapshift: their own family of tests)."""
    from .gapshift import gap_shifts
    from .wording import gap_sentence, slopes_sentence

    if len(result.compared_with) != 1 or not study.codebook.groups:
        return ()
    try:
        t = gap_shifts(study, wave=wave, against=result.compared_with[0], adjust=adjust, level=level).table
    except TrackerError:  # a raked wave, levels that differ between the waves: the section is left out
        return ()
    moved = t[t["verdict"].isin(["rise", "fall"])]
    moved = moved.reindex(moved["change"].abs().sort_values(ascending=False).index)
    items = [Item(gap_sentence(r) + " An association, not a cause.", r.verdict, r.metric, r.first)
             for r in moved.itertuples()]
    apart = t[(t["test"] == "slopes differ") & (t["verdict"] == "differ")]
    items += [Item(slopes_sentence(r, _group_label(study, r.group)), "note", r.metric) for r in apart.itertuples()]
    return tuple(items)


def _driver_items(study, level: float) -> tuple[Item, ...]:
    """The declared attributes' importance for the headline in the latest waves (up to four,
    pooled), largest first, with the model's R^2 and the caution that association is not cause."""
    from .drivers import fit_drivers
    from .wording import driver_sentence, fixed

    if not study.codebook.drivers:
        return ()
    try:
        fit = fit_drivers(study, waves=study.labels[-4:], level=level)
    except TrackerError as exc:
        return (Item(f"No driver analysis: {exc}", "note"),)
    head = study.codebook.metrics[fit.headline].label
    imp = fit.importance.sort_values("raw_weight", ascending=False)
    lead = Item(f"Over {', '.join(fit.waves)}, the declared attributes together account for "
                f"{fixed(100 * fit.r2, 0)}% of the variation of {head} between respondents (R^2 {fixed(fit.r2, 3)}, "
                f"interval {fixed(fit.r2_low, 3)} to {fixed(fit.r2_high, 3)}). Relative weights share that among "
                f"correlated attributes; an attribute that goes with the headline may not move it.", "note")
    return (lead, *[Item(driver_sentence(r, head), "note", r.attribute) for r in imp.itertuples()])


def _move_sections(analysis) -> dict:
    """The significant moves: the headline (totals, largest first), those that came with the
    sample's make-up, and subgroups that moved while their total did not."""
    result, mixes = analysis.changes, analysis.mix
    t = result.table
    tested_sig = t[t["significant"]]
    total_sig = tested_sig[tested_sig["group"] == "total"]
    head = total_sig.reindex(total_sig["change"].abs().sort_values(ascending=False).index)
    by_mix = {m for m, (_, explained) in mixes.items() if explained}
    headline = tuple(Item(change_sentence(r) + (" " + mixes[r.metric][0] if r.metric in mixes else ""),
                          "fall" if r.change < 0 else "rise", r.metric, r.subgroup)
                     for r in head.itertuples() if r.metric not in by_mix)
    mix_moves = tuple(Item(change_sentence(r) + " " + mixes[r.metric][0], "note", r.metric, r.subgroup)
                      for r in head.itertuples() if r.metric in by_mix)
    if not headline and mix_moves:
        headline = (Item("No measure moved in total beyond what the sample's changed make-up explains (next "
                         "section).", "note"),)
    sub = tested_sig[(tested_sig["group"] != "total") & ~tested_sig["metric"].isin(set(total_sig["metric"]))]
    sub = sub.reindex(sub["change"].abs().sort_values(ascending=False).index)
    subgroup_moves = tuple(Item(change_sentence(r) + " The total did not move significantly.",
                                "fall" if r.change < 0 else "rise", r.metric, r.subgroup) for r in sub.itertuples())
    return {"headline": headline, "mix_moves": mix_moves, "subgroup_moves": subgroup_moves, "head_rows": head,
            "sub_rows": sub}


def _pattern_items(analysis, headline_metrics: set[str], level: float) -> tuple[list[Item], pd.DataFrame]:
    """The series section: what moved over the series (totals, then subgroups whose total
    did not), a single-wave move not yet a level, flat series, and those with no pattern."""
    trends, wave = analysis.trends, analysis.wave
    moving = trends[~trends["pattern"].isin(["no pattern found", "flat", "too few waves"])]
    total_moving = moving[moving["group"] == "total"]
    sub_moving = moving[(moving["group"] != "total") & ~moving["metric"].isin(set(total_moving["metric"]))]
    items = [Item(trend_sentence(r, level), _trend_mark(r), r.metric, r.subgroup)
             for r in pd.concat([total_moving, sub_moving]).itertuples()]
    quiet = trends[(trends["group"] == "total") & trends["pattern"].isin(["no pattern found", "flat"])]
    for r in quiet[quiet["metric"].isin(headline_metrics)].itertuples():
        items.append(Item(f"{r.metric_label}: the move in {wave} is a single wave so far; before it the series "
                          f"shows no trend or shift. A step needs later waves to confirm it, so brief it as the "
                          f"latest wave's change, not yet as a new level.", "note", r.metric))
    quiet = quiet[~quiet["metric"].isin(headline_metrics)]
    for r in quiet[quiet["pattern"] == "flat"].itertuples():
        items.append(Item(trend_sentence(r, level), "flat", r.metric))
    none_found = quiet[quiet["pattern"] == "no pattern found"]
    if len(none_found):
        items.append(Item("No trend, step or blip found over the series (which is not to say nothing moved): "
                          + "; ".join(none_found["metric_label"]) + ".", "note"))
    short = trends[(trends["group"] == "total") & (trends["pattern"] == "too few waves")]
    for r in short.itertuples():
        items.append(Item(f"{r.metric_label}: {r.note}.", "note", r.metric))
    return items, moving


def _brief_charts(study, analysis, moved: set[str], sub: pd.DataFrame, thin_groups: set[str]):
    """(full-width charts, small charts): the change overview, then each metric wave by wave,
    full width when it moved (with its subgroups that moved), small in a grid otherwise."""
    from .chartdata import trend_chart
    from .charts import change_overview, chart_spec
    from .progress import step

    result, adjust, level, wave = analysis.changes, analysis.adjust, analysis.level, analysis.wave
    t = result.table
    chart_list = [("Every tested change in total", chart_spec(change_overview(result, totals_only=True)))]
    compact: list[tuple[str, dict]] = []
    shown_sub = shown_sub_pairs(sub)
    drawn = [m for m in study.codebook.metrics if m in set(t["metric"])]
    for k, metric in enumerate(drawn):
        step("drawing charts", k, len(drawn), metric)
        label = study.codebook.metrics[metric].label
        if metric not in moved:  # neither moved this wave nor follows a pattern: a small chart in a grid
            compact.append((f"{label}: wave by wave", chart_spec(trend_chart(
                study, metric, adjust=adjust, level=level, until=wave, compact=True))))
            continue
        chart_list.append((f"{label}: wave by wave", chart_spec(trend_chart(study, metric, adjust=adjust,
                                                                            level=level, until=wave))))
        for m, g in sorted(shown_sub):
            if m == metric:
                chart_list.append((f"{label} by {_group_label(study, g)}", chart_spec(trend_chart(
                    study, metric, by=g, adjust=adjust, level=level, until=wave, smooth=g in thin_groups))))
    return chart_list, compact


def _group_label(study, group: str) -> str:
    """A split as a reader knows it: the label of the variable it is made from."""
    g = study.codebook.groups.get(group)
    var = study.codebook.variables.get(g.variable) if g is not None else None
    return var.label if var is not None else group


def first_wave_brief(study, wave: str, level: float = 0.95, charts: bool = True) -> Brief:
    """The brief of a study's first wave: every measure's level with its interval, base and
    flags (in total and by subgroup), the sample's make-up, the cautions, and a plain
    statement that there is nothing earlier to compare with."""
    from .kinds import KINDS as kinds

    est = study.estimates(waves=[wave], level=level)
    totals = est[est["group"] == "total"]
    levels = []
    for r in totals.itertuples():
        k = kinds[r.kind]
        flag = f" Flagged: {r.flags}." if isinstance(r.flags, str) and r.flags else ""
        levels.append(Item(f"{r.metric_label}: {k.fmt_value(r.value)} ({level:.0%} interval {k.fmt_value(r.ci_low)} "
                           f"to {k.fmt_value(r.ci_high)}; base {int(r.base):,}).{flag}", "note", r.metric))
    facts = sample_facts(study, wave)
    sample = [Item(f"{wave}: {count(facts.respondents, 'respondent')}; effective base {facts.effective_base:,.0f} "
                   f"(weighting efficiency {facts.efficiency:.0%}).", "note")]
    for g, shares in make_up_shares(study, wave).items():
        sample.append(Item(f"Make-up by {_group_label(study, g)}: "
                           + ", ".join(f"{k} {fixed(v * 100, 1)}%" for k, v in shares.items()) + " (weighted).",
                           "note"))
    statement = (f"{wave} is the study's first wave: there is no earlier wave to compare with, so nothing is called a "
                 f"change yet. Changes are judged from the second wave on, and patterns over the series once four "
                 f"waves have a reliable value.")
    chart_list: list[tuple[str, dict]] = []
    if charts:
        from .chartdata import trend_chart
        from .charts import chart_spec

        chart_list = [(f"{study.codebook.metrics[m].label}", chart_spec(trend_chart(study, m, level=level,
                                                                                    until=wave, compact=True)))
                      for m in study.codebook.metrics if m in set(totals["metric"])]
    data = {"title": study.codebook.title, "wave": wave, "against": None, "first_wave": True, "level": level,
            "statement": statement, "comparisons": [], "patterns": [],
            "levels": _level_records(est)}
    return Brief(
        title=study.codebook.title, wave=wave, against="", headline=(), subgroup_moves=(), held=(), trends=(),
        sample_notes=tuple(sample), method=(
            (f"Levels are weighted estimates with {level:.0%} intervals from the design-based variance (Taylor "
            f"linearization with the study's weights, strata and clusters): Wilson intervals on the design's "
            f"effective base for shares, t intervals for means and balances."),
            ("Reliability: cells below an effective base of 30, with too wide a Korn-Graubard interval or resting on "
            "fewer than 15 respondents on the rarer side (after the NCHS presentation standard for proportions, "
            "2017) are flagged.")),
        tables={"Estimates": est}, charts=tuple(chart_list), data=data, intro=(statement,), first_wave=True,
        levels=tuple(levels),
    )


def _level_records(est: pd.DataFrame) -> list[dict]:
    from .analysis import _records

    cols = [c for c in ("metric", "metric_label", "kind", "group", "subgroup", "wave", "value", "ci_low", "ci_high",
                        "base", "effective_base", "flags") if c in est.columns]
    return _records(est[cols])


def shown_sub_pairs(sub: pd.DataFrame) -> set[tuple[str, str]]:
    """(metric, group) of the subgroup moves that get their own chart."""
    return {(r.metric, g) for r, g in zip(sub.itertuples(), sub["group"])}


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


_TABLE_COLS = ["metric_label", "metric", "kind", "group", "subgroup", "wave_from", "wave_to", "value_from", "value_to",
               "change", "change_low", "change_high", "adjusted_low", "adjusted_high", "adjusted_level", "base_from",
               "base_to", "effective_base_from", "effective_base_to", "p_raw", "p_adjusted", "min_detectable_change",
               "verdict", "flags"]
_TREND_COLS = ["metric_label", "kind", "group", "subgroup", "first_wave", "last_wave", "waves", "latest_value",
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
    book = study.codebook
    for f in analysis.samples:
        notes.append(Item(f"{f.wave}: {count(f.respondents, 'respondent')}; effective base {f.effective_base:,.0f} "
                          f"(weighting efficiency {f.efficiency:.0%}).", "note"))
    t = result.table
    why = t["not_tested_because"]
    untested = t[(t["group"] == "total") & (t["verdict"] == "not tested") & (why != "wording break")]
    notes.extend(Item(not_tested_sentence(r), "note", r.metric) for r in untested.itertuples())
    flagged = t[why.isin(["unreliable", "no respondents"])]
    if len(flagged):
        ex = "; ".join(f"{r.metric_label}, {r.subgroup}" for r in flagged.head(5).itertuples())
        n = len(flagged)
        notes.append(Item(f"{count(n, 'comparison')} {plural(n, 'was', 'were')} not tested because a base was too "
                          f"small or an interval too wide (for example {ex}).", "note"))
    broken = set(t.loc[why == "wording break", "metric"])
    for metric in sorted(broken):
        m = book.metrics[metric]
        for vname, at in study.breaks(m):
            notes.append(Item(f"{m.label}: the question ({book.variables[vname].label}) changed at {at}, so it is not "
                              f"compared across that wave.", "note", metric))
    for r in trends[(trends["group"] == "total") & trends["restarts_at"].notna()].itertuples():
        notes.append(Item(f"{r.metric_label}: its series starts again at {r.first_wave} after a change of wording; "
                          f"its pattern uses only the waves since.", "note", r.metric))
    notes.extend(Item(line, "note") for line in design_lines(result))
    comp = analysis.composition
    if comp is not None:
        for r in comp.tests.itertuples():
            if r.shifted:
                notes.append(Item(f"The sample's make-up shifted on {_group_label(study, r.group)}: {r.largest_move} "
                                  f"of the weighted sample (adjusted p {p_text(r.p_adjusted)}). Measures that differ "
                                  f"between these groups can move for that reason alone.", "note"))
        if not comp.tests["shifted"].any():
            names = [_group_label(study, g) for g in comp.tests["group"]]
            notes.append(Item(f"No shift in the weighted make-up on {', '.join(names)}.", "flat"))
    return notes


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
    elif suffix == ".pptx":
        from .deck import deck_bytes

        data = deck_bytes(brief)
    else:
        raise TrackerError(f"{path}: give a file ending in .html, .md, .xlsx, .pptx or .json")
    return write_output(path, data)


SECTIONS = [
    ("levels", "Where the measures stand", ""),
    ("headline", "What moved", "No measure moved significantly in total."),
    ("mix_moves", "Moved with the sample's make-up", ""),
    ("subgroup_moves", "Moves in one subgroup only", "No subgroup moved on its own."),
    ("gap_moves", "Gaps between subgroups that moved", ""),
    ("held", "Held within the margin", ""),
    ("not_significant", "Not significant", ""),
    ("surprises", "Out of line with the series", ""),
    ("trends", "Patterns over the series", "No series has enough waves for a pattern."),
    ("drivers", "What goes with the headline", ""),
    ("sample_notes", "Sample notes", ""),
]


def _sections(brief: Brief):
    """(attribute, heading, text when empty) of the sections this brief shows: a first wave has
    levels and sample notes only."""
    if brief.first_wave:
        return [x for x in SECTIONS if x[0] in ("levels", "sample_notes")]
    return [x for x in SECTIONS if x[0] != "levels"]
WORD = {"rise": "Up: ", "fall": "Down: ", "flat": "", "note": ""}


def _subtitle(brief: Brief, escape, bold: bool = False) -> str:
    wave = f"<b>{escape(brief.wave)}</b>" if bold else escape(brief.wave)
    if brief.first_wave:
        return f"Briefing for wave {wave}, the study's first."
    return f"Briefing for wave {wave}, compared with {escape(brief.against)}."


def render_json(brief: Brief) -> str:
    """The machine-readable brief: every comparison of the analysis (with its verdict), every
    series' pattern, the make-up tests, and each section's items as the other forms show them."""
    import json

    doc = dict(brief.data)
    doc["sections"] = {attr: [{"text": i.text, "mark": i.mark, "metric": i.metric, "subgroup": i.subgroup}
                              for i in getattr(brief, attr)] for attr, _, _ in _sections(brief)}
    doc["intro"] = list(brief.intro)
    doc["method"] = list(brief.method)
    doc["cautions"] = list(brief.cautions)
    return json.dumps(doc, indent=1, ensure_ascii=False, allow_nan=False) + "\n"


def render_markdown(brief: Brief) -> str:
    """The brief as Markdown; every text from the study is HTML-escaped, since Markdown
    renderers pass raw HTML through."""
    from .plain import md_text as e

    out = [f"# {e(brief.title)}", "", _subtitle(brief, e), ""] + [e(x) for x in brief.intro] + [""]
    for attr, heading, empty in _sections(brief):
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
    parts = [f"<h1>{e(brief.title)}</h1>", f'<p class="sub">{_subtitle(brief, e, bold=True)}</p>']
    parts += [f"<p>{e(x)}</p>" for x in brief.intro]
    charts = list(brief.charts)
    chart_at = {"headline": [0]} if charts and not brief.first_wave else {}
    for attr, heading, empty in _sections(brief):
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
    if len(charts) > len(chart_at) or brief.compact_charts:
        parts.append("<h2>Every measure, wave by wave</h2>")
        for k in range(len(chart_at), len(charts)):
            parts.append(f"<figure>{chart_div(k)}<figcaption class=\"muted\">{e(charts[k][0])}</figcaption></figure>")
    if brief.compact_charts:
        parts.append('<p class="muted">Not significant or held this wave, with no pattern over the series:</p>'
                     '<div class="grid">')
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
    """The brief as a client workbook (tracker.workbook)."""
    from .workbook import workbook_bytes

    return workbook_bytes(brief)
