"""One analysis of a wave, computed once, that every table, chart and brief renders.

It holds the wave's comparisons with its baseline in one family (every metric in total and
in every subgroup), the trend pattern of every series up to the wave, the make-up check
and the share of each headline move that is the sample's mix. Renderers read it; they do
not recompute or re-adjust.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .changes import VERDICTS, ChangeResult
from .composition import CompositionResult

__all__ = ["COMPARISON_FIELDS", "PATTERN_FIELDS", "SMOOTH_BELOW", "Analysis", "SampleFacts", "analyse",
           "make_up_shares", "sample_facts", "thin_subgroups"]

#: The fields of each comparison in the machine-readable brief (stable names).
COMPARISON_FIELDS = [
    "metric", "metric_label", "kind", "group", "subgroup", "wave_from", "wave_to", "value_from", "value_to",
    "change", "change_low", "change_high", "adjusted_low", "adjusted_high", "adjusted_level", "base_from",
    "base_to", "p_raw", "p_adjusted", "significant",
    "min_detectable_change", "verdict", "flags", "mostly_make_up",
]
#: The fields of each series' pattern.
PATTERN_FIELDS = [
    "metric", "metric_label", "group", "subgroup", "first_wave", "last_wave", "waves", "pattern",
    "slope_per_year", "slope_low", "slope_high", "shift_wave", "level_before", "level_after", "blip_wave",
    "blip_size", "note",
]


@dataclass(frozen=True)
class SampleFacts:
    """One wave's sample: respondents, and the Kish effective base of its weights."""

    wave: str
    respondents: int
    effective_base: float

    @property
    def efficiency(self) -> float:
        return self.effective_base / self.respondents if self.respondents else float("nan")


def sample_facts(study, wave: str) -> SampleFacts:
    """The sample facts of a stored wave (Kish 1965: (sum w)^2 / sum w^2)."""
    from .estimates import weights_of
    from .methods.bases import kish_base

    table = study.load(wave)
    weights = weights_of(study.codebook, table)
    return SampleFacts(wave, len(table), float(kish_base(weights.sum(), (weights**2).sum())))


def make_up_shares(study, wave: str) -> dict[str, pd.Series]:
    """The weighted make-up of a stored wave on each profile group (every group when the
    codebook declares no profile): each level's share of the weights, in the codebook's order,
    respondents in no level as '(none)'."""
    from .cells import group_labels
    from .estimates import weights_of

    book = study.codebook
    table = study.load(wave)
    weights = weights_of(book, table)
    out = {}
    for g in book.profile or list(book.groups):
        lab = pd.Series(group_labels(book, table, g))
        shares = pd.Series(weights).groupby(lab.fillna("(none)").to_numpy()).sum() / weights.sum()
        levels = book.groups[g].levels
        out[g] = shares.reindex([x for x in levels if x in shares.index] + [x for x in shares.index if x not in levels])
    return out


#: Subgroups under this effective base in the analysed wave get a smoothed line in their charts.
SMOOTH_BELOW = 300


def thin_subgroups(study, wave: str, level: float) -> tuple[tuple[str, str], ...]:
    """(group, level) of the subgroups whose median effective base over the metrics in
    ``wave`` is under SMOOTH_BELOW."""
    est = study.estimates(waves=[wave], level=level)
    sub = est[est["group"] != "total"]
    if sub.empty:
        return ()
    med = sub.groupby(["group", "subgroup"], sort=False)["effective_base"].median()
    return tuple(k for k, v in med.items() if v < SMOOTH_BELOW)


@dataclass(frozen=True)
class Analysis:
    """Everything said about one wave against its baseline."""

    title: str
    wave: str
    against: str
    adjust: str
    level: float
    changes: ChangeResult          # the family: every metric in total and in every subgroup
    trends: pd.DataFrame           # one row per metric x subgroup series, up to this wave
    composition: CompositionResult | None  # when one wave is compared and a profile is declared
    mix: dict[str, tuple[str, bool]] = field(default_factory=dict)  # metric -> (note, mostly make-up)
    surprises: pd.DataFrame | None = None  # every cell against its expected range (tracker.expected)
    samples: tuple[SampleFacts, ...] = ()  # the wave's and its baseline's samples
    thin: tuple[tuple[str, str], ...] = ()  # (group, level) of thin subgroups in the wave

    @property
    def table(self) -> pd.DataFrame:
        t = self.changes.table.copy()
        t["mostly_make_up"] = t["metric"].map(lambda m: bool(self.mix.get(m, ("", False))[1])) & (
            t["group"] == "total") & t["significant"]
        return t

    def comparisons(self) -> list[dict]:
        return _records(self.table[COMPARISON_FIELDS])

    def patterns(self) -> list[dict]:
        return _records(self.trends[PATTERN_FIELDS])

    def to_dict(self) -> dict:
        """The analysis as plain JSON-ready data (NaN as null)."""
        return {
            "title": self.title, "wave": self.wave, "against": self.against,
            "compared_with": list(self.changes.compared_with), "adjust": self.adjust, "level": self.level,
            "family_size": self.changes.family_size, "verdicts": VERDICTS,
            "comparisons": self.comparisons(), "patterns": self.patterns(),
            "make_up": [] if self.composition is None else _records(self.composition.tests),
            "surprises": [] if self.surprises is None else _records(self.surprises[self.surprises["surprise"]]),
            "surprises_tested": 0 if self.surprises is None else int(self.surprises["p_raw"].notna().sum()),
            "notes": list(self.changes.notes),
        }


def _records(frame: pd.DataFrame) -> list[dict]:
    out = []
    for row in frame.to_dict(orient="records"):
        out.append({k: _plain(v) for k, v in row.items()})
    return out


def _plain(v):
    if v is None:
        return None
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        return None if not math.isfinite(float(v)) else float(v)
    if isinstance(v, str):
        return v
    try:
        return None if pd.isna(v) else str(v)
    except (TypeError, ValueError):
        return str(v)


def analyse(study, wave: str | None = None, against: str = "previous", adjust: str = "bh",
            level: float = 0.95) -> Analysis:
    """Build the analysis of ``wave`` against ``against`` (use ``Study.analysis``, which caches it)."""
    result = study.changes(wave=wave, against=against, adjust=adjust, level=level)
    wave = result.wave
    trends = study.trends(adjust=adjust, level=level, until=wave)
    comp = None
    if study.codebook.profile and len(result.compared_with) == 1:
        comp = study.composition(wave=wave, against=result.compared_with[0], adjust=adjust, level=level)
    t = result.table
    moved = t[(t["group"] == "total") & t["significant"]]["metric"].tolist()
    mix = _mix_notes(study, result, comp, moved)
    surprises = study.surprises(wave=wave, adjust=adjust, level=level)
    samples = tuple(sample_facts(study, w) for w in [wave, *result.compared_with])
    return Analysis(study.codebook.title, wave, result.against, adjust, level, result, trends, comp, mix,
                    surprises if len(surprises) else None, samples, thin_subgroups(study, wave, level))


def _mix_notes(study, result, comp, metrics: list[str]) -> dict[str, tuple[str, bool]]:
    """For moved totals: (a note, mostly make-up) when most of the change is due to the mix on a
    shifted profile group; mostly make-up when, at the earlier wave's mix, the change is not
    significant (the move then belongs with the make-up, not the headline)."""
    from .kinds import KINDS

    if comp is None or not metrics:
        return {}
    out: dict[str, tuple[str, bool]] = {}
    for group in comp.tests.loc[comp.tests["shifted"], "group"]:
        mixed = study.changes(wave=result.wave, against=result.compared_with[0], by=[], metrics=metrics,
                              adjust=result.adjust, level=result.level, mix=group).mix
        for r in mixed.itertuples():
            if r.metric in out or not np.isfinite(r.mix_share_of_change) or r.mix_share_of_change <= 0.5:
                continue
            k = KINDS[r.kind]
            verdict = "still significant" if r.standardised_significant else "not significant"
            g = study.codebook.groups[group]
            var = study.codebook.variables.get(g.variable)
            out[r.metric] = ((f"Most of this change ({r.mix_share_of_change:.0%}) comes from the shift in the sample's "
                             f"mix on {var.label if var is not None else group}; within its groups the change is "
                             f"{k.fmt_change(r.within_part)}, and "
                             f"at the earlier wave's mix the change is {k.fmt_change(r.standardised_change, True)} "
                             f"({verdict})."), not r.standardised_significant)
    return out
