"""The words a reader sees, made in one place: the number rules every sentence and table
follows, and the sentences of the brief (moves, margins, patterns, method, cautions).

The number rules, written once:

- No negative zero: a value that rounds to zero is written 0 (never "-0" or "-0.0").
- p-values below 0.001 are written "below 0.001", others with three decimals.
- Counts take the singular for one ("1 comparison") and thousands separators.
- A change in a sentence is the difference of the two values as printed beside it
  (:func:`shown_change`), so the words never contradict the figures; intervals are computed
  from the unrounded figures (the brief's method section says so).

The decimals of each metric kind live with the kind (tracker.kinds): the same everywhere.
"""

from __future__ import annotations

import math

from .names import ADJUST_METHODS

__all__ = [
    "CAUTIONS",
    "change_footer",
    "change_sentence",
    "composition_lines",
    "count",
    "design_lines",
    "driver_sentence",
    "fixed",
    "gap_sentence",
    "held_sentence",
    "method_lines",
    "not_significant_sentence",
    "not_tested_sentence",
    "p_text",
    "plural",
    "shown_change",
    "slopes_sentence",
    "study_lines",
    "trend_sentence",
]


def _kinds():
    from .kinds import KINDS  # at call time: the kinds use the number rules below

    return KINDS


def fixed(x: float, decimals: int, signed: bool = False) -> str:
    """``x`` with ``decimals`` decimals; a value that rounds to zero is '0' (with its decimals,
    never signed). ``signed`` puts '+' before a positive value.

    >>> fixed(-0.04, 1), fixed(-0.4, 0), fixed(3.15, 1, signed=True), fixed(0.0, 1, signed=True)
    ('0.0', '0', '+3.1', '0.0')
    """
    if x is None or not math.isfinite(x):
        return "n/a"
    r = round(x, decimals)
    if r == 0:
        return f"{0:.{decimals}f}"
    return f"{r:+.{decimals}f}" if signed else f"{r:.{decimals}f}"


def p_text(p: float) -> str:
    """A p-value as a reader sees it: 'below 0.001', or three decimals.

    >>> p_text(0.00003), p_text(0.0432), p_text(1.0)
    ('below 0.001', '0.043', '1.000')
    """
    if p is None or not math.isfinite(p):
        return "n/a"
    return "below 0.001" if p < 0.001 else f"{p:.3f}"


def plural(n: int, one: str, many: str | None = None) -> str:
    """The word for ``n`` things: ``one`` for exactly one, else ``many`` (default: one + 's')."""
    return one if n == 1 else (many if many is not None else one + "s")


def count(n: int, one: str, many: str | None = None) -> str:
    """'1 comparison', '1,234 comparisons'.

    >>> count(1, "comparison"), count(1234, "comparison"), count(2, "series", "series")
    ('1 comparison', '1,234 comparisons', '2 series')
    """
    return f"{n:,} {plural(n, one, many)}"


def shown_change(v_from: float, v_to: float, scale: float, decimals: int) -> float:
    """The change between two values as printed (each rounded to ``decimals`` after
    ``scale``), in the printed units: what a reader gets by subtracting the printed figures.

    >>> shown_change(0.7349, 0.7664, 100, 1)   # 73.5% to 76.6%: 3.1 points
    3.1
    """
    return round(round(v_to * scale, decimals) - round(v_from * scale, decimals), decimals)


# -- the brief's sentences -------------------------------------------------------------------

CAUTIONS = (
    ("Significance is not importance: a significant change can be too small to matter, and a change "
    "that matters can miss significance on a small base. Read the size and its interval."),
    ("The intervals cover sampling error only, not coverage gaps, non-response, or changes in how "
    "questions were asked or answered."),
    "A change in the sample's make-up can move a measure even when nothing changed within any group.",
    ("Small bases are flagged and never reported as significant; pooled or longer-run figures are "
    "safer for thin subgroups."),
)



def fmt_value(kind: str, v: float) -> str:
    return _kinds()[kind].fmt_value(v)


def fmt_size(kind: str, d: float) -> str:
    return _kinds()[kind].fmt_change(d)


def number(kind: str, d: float) -> str:
    return _kinds()[kind].fmt_number(d)


def who(row) -> str:
    return row.metric_label if row.group == "total" else f"{row.metric_label}, {row.subgroup}"


def was(row) -> str:
    """'61.0% (was 62.0%)'"""
    return f"{fmt_value(row.kind, row.value_to)} (was {fmt_value(row.kind, row.value_from)})"


def printed(row) -> float:
    """The change as the two printed values show it (tracker.wording.shown_change)."""
    return _kinds()[row.kind].shown_change(row.value_from, row.value_to)


def change_sentence(row) -> str:
    """'Punctuality rated good fell from 75.0% to 61.8%, down 13.2 points (adjusted interval 8.1
    to 18.3 points; bases 1,020 and 998).' The interval is the one adjusted with the verdict."""
    kind = row.kind
    down = row.change < 0
    lo, hi = (-row.adjusted_high, -row.adjusted_low) if down else (row.adjusted_low, row.adjusted_high)
    verb, word = ("fell", "down") if down else ("rose", "up")
    return (f"{who(row)} {verb} from {fmt_value(kind, row.value_from)} to {fmt_value(kind, row.value_to)}, "
            f"{word} {fmt_size(kind, printed(row))} (adjusted interval {number(kind, lo)} to "
            f"{fmt_size(kind, hi)}; bases {int(row.base_from):,} and {int(row.base_to):,}).")


def held_sentence(row, limit: float) -> str:
    """'Information rated good: 61.0% (was 62.0%); held within the margin: the adjusted interval of
    the change (-2.1 to +1.5 points) lies within 3.0 points either way, the smallest change that
    matters for this measure.'"""
    kind = row.kind
    return (f"{who(row)}: {was(row)}; held within the margin: the adjusted interval of the change "
            f"({span(kind, row.adjusted_low, row.adjusted_high)}) lies within {fmt_size(kind, limit)} either way, "
            f"the smallest change that matters for this measure.")


def not_significant_sentence(row) -> str:
    """A change that is not significant: its size, its adjusted interval, and what could have
    been detected. Never a claim that the measure held."""
    kind = row.kind
    return (f"{who(row)}: {was(row)}, a change of {signed(kind, printed(row))}; not significant (adjusted "
            f"interval {span(kind, row.adjusted_low, row.adjusted_high)}). This comparison could have detected "
            f"a change of about {fmt_size(kind, row.min_detectable_change)}.")


def not_tested_sentence(row) -> str:
    return f"{row.metric_label}: {was(row)}; not tested: {row.flags}."


def per_year(kind: str, x: float) -> str:
    """A slope in the kind's shown units: '+1.2 points' or '+0.05'."""
    k = _kinds()[kind]
    return fixed(x * k.scale, k.decimals, signed=True) + (f" {k.change_unit}" if k.change_unit else "")


def trend_sentence(row, level: float) -> str:
    """One series' pattern in words (tracker.trends.PATTERNS)."""
    kind = row.kind
    name = who(row)
    over = f"over {row.waves} waves ({row.first_wave} to {row.last_wave})"
    if str(row.pattern).startswith("shifted"):
        return (f"{name} {row.pattern} at {row.shift_wave}: {fmt_value(kind, row.level_before)} "
                f"({fmt_value(kind, row.level_before_low)} to {fmt_value(kind, row.level_before_high)}) before, "
                f"{fmt_value(kind, row.level_after)} ({fmt_value(kind, row.level_after_low)} to "
                f"{fmt_value(kind, row.level_after_high)}) since; the new level has held.")
    if row.pattern in ("rising", "falling"):
        return (f"{name} is {row.pattern}: {per_year(kind, row.slope_per_year)} a year ({level:.0%} interval "
                f"{per_year(kind, row.slope_low)} to {per_year(kind, row.slope_high)}) {over}.")
    if row.pattern in ("moved up", "moved down"):
        return (f"{name} {row.pattern} {over}: {per_year(kind, row.slope_per_year)} a year on a straight-line "
                f"reading, but the waves cannot tell a gradual trend from a one-off step; brief the move, not its "
                f"shape.")
    if row.pattern == "flat":
        return (f"{name} is flat {over}: its slope, {per_year(kind, row.slope_per_year)} a year, stays within the "
                f"smallest change that matters per year.")
    if row.pattern == "one-wave blip":
        side = "below" if row.blip_size < 0 else "above"
        return (f"{name}: {row.blip_wave} was a one-wave blip ({fmt_size(kind, row.blip_size)} {side} the rest "
                f"of the series, which does not move with it). The series did not turn; do not brief it as a change "
                f"of direction.")
    return f"{name}: {row.pattern}."


def method_lines(adjust: str, level: float, adj_level: float, family: int, n_sig: int,
                  margins: bool) -> tuple[str, ...]:
    """The method section: what the words mean and how the numbers were made, with sources."""
    from .changes import VERDICTS

    interval = {"bh": f"false-coverage-rate adjusted intervals (Benjamini and Yekutieli 2005) at the "
                      f"{adj_level:.2%} level, which fits {count(n_sig, 'significant change')} among "
                      f"{count(family, 'comparison')}",
                "by": f"false-coverage-rate adjusted intervals at the {adj_level:.2%} level (the Benjamini-"
                      f"Yekutieli form)",
                "holm": f"intervals at the {adj_level:.2%} level, the last step of Holm's procedure",
                "none": f"{level:.0%} intervals, with no adjustment"}[adjust]
    words = [f"'{name}': {VERDICTS[code]}." for code, name in
             (("rise", "Significant rise"), ("fall", "Significant fall"), ("not significant", "Not significant"),
              ("held", "Held within the margin"))]
    if not margins:
        words[-1] = ("'Held within the margin' is never said here: the codebook declares no smallest change that "
                     "matters, and without one a change that is not significant is only that.")
    return (
        (f"Significance: {ADJUST_METHODS[adjust]} adjustment across the {count(family, 'comparison')} at the "
        f"{1 - level:g} level; only adjusted results are called significant. The interval beside each change is "
        f"the one that agrees with that verdict: {interval}."),
        *words,
        ("Every change is tested with t on its design-based variance (Taylor linearization with the study's weights, "
        "strata and clusters; minus the covariance of shared clusters or respondents) on the design's degrees of "
        "freedom. The figures in sentences are rounded; a change in a sentence is the difference of the two values "
        "as printed, and intervals are computed from the unrounded figures."),
        ("Minimum detectable change: the change each comparison would find with 80% power at the unadjusted level "
        "(for shares, the larger of a rise and a fall, with the variance the changed share would have)."),
        ("Series: each one (sampling error plus the variation between waves) is tested once for a trend, a step at "
        "any wave or a one-wave blip at any wave, with the search accounted for; those tests are adjusted together "
        "across every series, and a series that moved gets the shape that fits it best ('moved up/down' when its "
        "waves cannot tell a trend from a step). 'No pattern found' is not a claim that nothing moved; 'flat' is "
        "said only where the codebook declares the smallest change that matters. Slopes are per year of fieldwork "
        "time."),
        ("Reliability: cells below an effective base of 30, with too wide a Korn-Graubard interval or resting on "
        "fewer than 15 respondents on the rarer side (after the NCHS presentation standard for proportions, 2017) "
        "are flagged and not tested."),
        ("Thin subgroups' smoothed lines: a local-level model with each wave's known sampling error (signal "
        "extraction for repeated surveys, Scott and Smith 1974)."),
        "The make-up of the sample is compared with a Rao-Scott corrected test on the weighted shares.",
    )


#: How a replicate method is named in the brief's method section.
REPLICATE_NAMES = {"jk1": "the delete-a-group jackknife, JK1", "jkn": "the stratified jackknife, JKn",
                   "brr": "balanced repeated replication", "fay": "Fay's balanced repeated replication",
                   "bootstrap": "the bootstrap", "sdr": "successive difference replication"}


def study_lines(book) -> tuple[str, ...]:
    """What the study's codebook changes in the method: replicate weights instead of
    linearization, and seasons fitted in the series."""
    out = []
    if book.replicates is not None:
        out.append(f"Variances here come from the study's {len(book.replicates.columns)} replicate weights "
                   f"({REPLICATE_NAMES[book.replicates.method]}) rather than from linearization, and their degrees "
                   f"of freedom from the replicates.")
    if book.seasons:
        cycle = "12 months" if book.seasons == 12 else "4 quarters"
        out.append(f"Seasons: the codebook says the waves follow a cycle of {cycle}. A series with every season in "
                   f"two of its waves or more has its seasons fitted as far as its waves show them, in its trend, its "
                   f"expected range and its smoothed line; a change against a year ago compares the same season.")
    return tuple(out)


def design_lines(result) -> tuple[str, ...]:
    """How the waves' sharing was treated, from the comparisons' typed covariance column."""
    used = set(result.table["covariance_from"]) - {"none"}
    out = []
    if "shared respondents" in used:
        out.append("Some respondents answered both waves (the study is a panel): the comparisons take the link "
                   "between their answers into account.")
    if "shared clusters" in used:
        out.append("The waves share sampling clusters: the comparisons take the link between them into account.")
    return tuple(out)


def gap_sentence(row) -> str:
    """'Staff helpfulness rated good: the gap between Southbank and the rest of the sample went
    from -21.4 to -15.7 points, a change of +5.7 points (adjusted interval +1.2 to +10.2 points).'
    The change is the difference of the two printed gaps; the interval is the one adjusted with
    the verdict."""
    k = _kinds()[row.kind]
    shown = round(row.gap_to * k.scale, k.decimals) - round(row.gap_from * k.scale, k.decimals)
    return (f"{row.metric_label}: the gap between {row.first} and {row.second} went from "
            f"{k.fmt_change(row.gap_from, signed=True)} to {k.fmt_change(row.gap_to, signed=True)}, a change of "
            f"{k.fmt_change(shown / k.scale, signed=True)} (adjusted interval "
            f"{span(row.kind, row.adjusted_low, row.adjusted_high)}).")


def slopes_sentence(row, split: str) -> str:
    """'Staff helpfulness rated good: the levels of Area do not trend alike over the waves
    (Cochran's Q 12.2 on 2 df, adjusted p 0.012).'"""
    return (f"{row.metric_label}: the levels of {split} do not trend alike over the waves (Cochran's Q "
            f"{fixed(row.statistic, 1)} on {int(row.df)} df, adjusted p {p_text(row.p_adjusted)}).")


def driver_sentence(row, headline: str) -> str:
    """'Punctuality rated good: 38% of the R^2 of Satisfied overall (raw weight 0.114, interval
    0.081 to 0.147).'"""
    return (f"{row.attribute_label}: {fixed(100 * row.share_of_r2, 0)}% of the explained variation of {headline} "
            f"(raw weight {fixed(row.raw_weight, 3)}, interval {fixed(row.raw_low, 3)} to {fixed(row.raw_high, 3)}).")


def signed(kind: str, d: float) -> str:
    return _kinds()[kind].fmt_change(d, signed=True)


def span(kind: str, lo: float, hi: float) -> str:
    """'-4.5 to +3.7 points'"""
    k = _kinds()[kind]
    return f"{lo * k.scale:+.{k.decimals}f} to {k.fmt_change(hi, signed=True)}"


# -- lines under tables and in add / check ----------------------------------------------------

def change_footer(result) -> list[str]:
    """The lines under a table of comparisons (a tracker.changes.ChangeResult): what was
    tested in which family, the notes, the agreeing level, the verdicts in use, the cautions."""
    from .changes import VERDICTS

    family = result.family_size if result.family_size is not None else result.n_tests
    lines = [
        (f"{result.wave} against {result.against}: {result.n_tests} of these comparisons tested, "
         f"{result.n_significant} significant after {ADJUST_METHODS[result.adjust]} adjustment across {family} "
         f"comparisons at the {1 - result.level:g} level ({len(result.table) - result.n_tests} not tested)."),
        *result.notes,
    ]
    level = float(result.table["adjusted_level"].iloc[0]) if len(result.table) else result.level
    lines.append(f"The adjusted interval is at the {level:.2%} level, which agrees with the verdicts: zero lies "
                 f"outside it exactly when a change is significant.")
    used = [k for k in VERDICTS if k in set(result.table["verdict"])]
    lines.append("Verdicts: " + "; ".join(f"{k}: {VERDICTS[k]}" for k in used) + ".")
    lines.append("Significance is not importance; intervals cover sampling error only; a change in the "
                 "sample's make-up can move a measure; small bases are flagged and never called significant.")
    return lines


def composition_lines(result) -> list[str]:
    """The make-up tests of two waves (a tracker.composition.CompositionResult) in lines, as
    `composition`, `check` and `add` print them."""
    out = []
    for r in result.tests.itertuples():
        verdict = "shifted" if r.shifted else "no significant shift"
        out.append(f"{r.group}: {verdict} in the weighted mix (adjusted p {p_text(r.p_adjusted)}); largest "
                   f"move: {r.largest_move}")
    out.append(f"{count(len(result.tests), 'profile group')} tested (Rao-Scott), "
               f"{int(result.tests['shifted'].sum())} shifted, after "
               f"{ADJUST_METHODS[result.adjust]} adjustment at the {1 - result.level:g} level.")
    return out
