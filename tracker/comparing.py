"""Comparisons of a wave with its baseline: one family of tests over every cell asked for,
with the covariance of shared clusters or respondents, the notes on what two waves share,
the wording breaks that block a comparison, and the mix split. Works from the codebook, the
stored waves (tracker.waves) and their per-wave statistics (tracker.cellstore), never from
the Study."""

from __future__ import annotations

from collections.abc import Iterator
from itertools import pairwise
from typing import Any

import numpy as np
import pandas as pd

from .cellstore import CellStore
from .codebook import Codebook
from .errors import TrackerError
from .intake import wave_in_span
from .options import check_adjust, check_level
from .selection import pick_groups, pick_metrics
from .waves import StoredWaves

__all__ = ["Comparisons", "metric_breaks", "smallest_changes"]


def smallest_changes(book: Codebook) -> dict[str, float]:
    """The smallest change that matters per metric, in value units: the metric's own
    ``smallest_change``, else the codebook's default for its kind; metrics with neither are
    left out (nothing is then called held or flat)."""
    from .kinds import KINDS

    out = {}
    for m in book.metrics.values():
        given = m.smallest_change if m.smallest_change is not None else book.smallest_change.get(m.kind)
        if given is not None:
            out[m.name] = given / KINDS[m.kind].scale
    return out


def metric_breaks(book: Codebook, metric) -> Iterator[tuple[str, str]]:
    """(variable, wave) for each wording break of the metric's variable and base variable."""
    for vname in filter(None, (metric.variable, metric.base_variable)):
        b = book.variables[vname].break_before
        if b is not None:
            yield vname, b


class Comparisons:
    """The comparisons of a study's waves, computed once per key in ``memory``.

    Parameters
    ----------
    codebook : Codebook
    waves : StoredWaves
    cells : CellStore
    memory : dict
        Shared with the Study, which clears it in place when a wave changes.
    """

    def __init__(self, codebook: Codebook, waves: StoredWaves, cells: CellStore, memory: dict[Any, Any]):
        self.codebook, self.waves, self.cells, self.memory = codebook, waves, cells, memory

    def wave_rows(self, label: str, metrics: list, groups: list[str], level: float,
                   interval: str = "wilson") -> pd.DataFrame:
        from .estimates import estimates_frame

        key = ("est", label, tuple(m.name for m in metrics), tuple(groups), level, interval)
        if key not in self.memory:
            cells = self.cells.cells(label).select([m.name for m in metrics], groups)
            self.memory[key] = estimates_frame([(label, self.waves.dates()[label], cells)], metrics, level, interval)
        return self.memory[key]

    def pooled_rows(self, labels: list[str], metrics: list, groups: list[str], level: float) -> pd.DataFrame:
        from .estimates import wave_estimates

        tables = [self.waves.load(lab) for lab in labels]
        table = pd.concat(tables, ignore_index=True)
        sample = np.repeat(labels, [len(t) for t in tables])
        name = f"{labels[0]}..{labels[-1]}" if len(labels) > 1 else labels[0]
        date = self.waves.dates()[labels[-1]]
        return wave_estimates(self.codebook, table, metrics, groups, name, date, level, sample)

    def break_reasons(self, metrics: list, wave_from: list[str], wave_to: str) -> dict[str, str]:
        """Metrics whose series is split by a wording break between the waves compared."""
        order = self.waves.dates()
        out = {}
        for m in metrics:
            for vname, b in metric_breaks(self.codebook, m):
                after = [wave_in_span(w, b, None, order) for w in [*wave_from, wave_to]]
                if len(set(after)) > 1:
                    out[m.name] = f"not compared: {vname} changed at {b} (wording break)"
        return out

    def family(self, wave: str, others: list[str], ms: list, gs: list[str], adjust: str, level: float):
        """One family of comparisons: (table, notes, number of comparisons tested), cached."""
        from .changes import compare

        key = ("compare", wave, tuple(others), tuple(m.name for m in ms), tuple(gs), adjust, level)
        if key in self.memory:
            table, kept, size = self.memory[key]
            return table, list(kept), size
        now = self.wave_rows(wave, ms, gs, level)
        then = (self.wave_rows(others[0], ms, gs, level) if len(others) == 1
                else self.pooled_rows(others, ms, gs, level))
        notes: list[str] = []
        cov = both = None
        unit = ""
        if len(others) == 1:
            c, shared, unit, both = self.covariance(wave, others[0], ms, gs, now, then)
            if shared and unit == "respondents":
                cov = c
                notes.append(f"{shared:,} respondents answered both waves (the codebook declares a panel): their "
                             f"covariance is taken into account, on the paired design's degrees of freedom")
            elif shared:
                cov = c
                notes.append(f"{shared:,} clusters appear in both waves (the codebook says waves_share_clusters: "
                             f"true): their covariance is taken into account, on the paired design's degrees of "
                             f"freedom")
            notes += self.overlap_notes(wave, others[0], unit)
        table = compare(now, then, self.break_reasons(ms, others, wave), cov, adjust, level,
                        smallest_changes(self.codebook),
                        shared=both if cov is not None else None, source=unit if cov is not None else "")
        size = int(table["p_adjusted"].notna().sum())
        self.memory[key] = (table, tuple(notes), size)
        return table, list(notes), size

    def overlap_notes(self, wave: str, other: str, used: str) -> list[str]:
        """Notes on ids or cluster labels two waves share that the codebook does not declare
        as the same people or clusters (so the waves are compared as independent samples)."""
        book = self.codebook
        out = []
        if used != "respondents" and book.id:
            ha, hb = self.cells.id_hashes(wave), self.cells.id_hashes(other)
            if ha is not None and hb is not None:
                k = int(np.intersect1d(ha, hb).size)
                if k and k >= 0.05 * min(ha.size, hb.size):  # a large overlap: row numbers, or a panel not declared
                    out.append(f"{k:,} respondent ids appear in both waves; they are taken as different people "
                               f"(independent samples), since the codebook does not declare panel: true")
        if used != "clusters" and book.clusters and book.waves_share_clusters is None:
            labels = [pd.read_parquet(self.waves.stored_path(w), columns=[c for c in (book.strata, book.clusters) if c])
                      .astype(str).agg("\x1f".join, axis=1).unique() for w in (wave, other)]
            k = int(np.intersect1d(labels[0], labels[1]).size)
            if k:
                out.append(f"{k:,} cluster labels appear in both waves; they are taken as different clusters "
                           f"(independent samples), since the codebook does not say waves_share_clusters: true")
        return out

    def covariance(self, wave: str, other: str, ms: list, gs: list[str], now: pd.DataFrame, then: pd.DataFrame):
        """Covariance of two waves' estimates (tracker.estimates.wave_covariance): from the
        cached cluster totals when the waves share clusters, from the respondents when they
        share respondents (found by the cached id hashes before any wave is read); for a
        panel with replicate weights, from the replicates (replicate_cell_deviations)."""
        from .estimates import wave_covariance
        from .methods.variance import PsuTotals, cross_wave_covariance, shared_per_cell

        book = self.codebook
        names = [m.name for m in ms]
        if book.clusters and book.waves_share_clusters:
            (ta, ka), (tb, kb) = self.cells.psu(wave), self.cells.psu(other)
            if ta is not None and tb is not None:
                pick = self.cells.cells(wave).select(names, gs)
                cols = _cell_columns(self.cells.cells(wave), pick)
                pa = PsuTotals(ta.totals[:, cols], ta.stratum, ta.n_strata, ta.factor)
                pb = PsuTotals(tb.totals[:, cols], tb.stratum, tb.n_strata, tb.factor)
                cov, shared = cross_wave_covariance(pa, ka, pb, kb, book.single_cluster_rule)
                if shared:
                    return cov, shared, "clusters", shared_per_cell(pa, ka, pb, kb)
        ha, hb = self.cells.id_hashes(wave), self.cells.id_hashes(other)
        if not book.panel or ha is None or hb is None or not np.intersect1d(ha, hb).size:
            return np.zeros(len(now)), 0, "", np.zeros(len(now))
        if book.replicates is not None:  # a panel's longitudinal replicates: their covariance
            from .estimates import replicate_cell_deviations

            da, db = (replicate_cell_deviations(book, self.waves.load(w), ms, gs) for w in (wave, other))
            return (da * db).sum(axis=0), da.shape[0], "respondents", np.full(len(now), float(da.shape[0]))
        return wave_covariance(book, self.waves.load(wave), self.waves.load(other), ms, gs, now, then, by_cluster=False)

    def mix(self, ms, others, wave, var, adjust, level) -> pd.DataFrame:
        from .composition import mix_table
        from .methods.tests import adjust_pvalues

        if var not in self.codebook.groups:
            raise TrackerError(f"mix {var}: not a group of this study ({', '.join(self.codebook.groups) or 'none'})")
        before = pd.concat([self.waves.load(w) for w in others], ignore_index=True)
        out = mix_table(self.codebook, before, self.waves.load(wave), ms, var, level)
        out["standardised_p_adjusted"] = adjust_pvalues(out["standardised_p"].to_numpy(float), adjust)
        out["standardised_significant"] = out["standardised_p_adjusted"] <= 1 - level
        with np.errstate(divide="ignore", invalid="ignore"):
            out["mix_share_of_change"] = out["mix_part"] / out["change"]
        return out

    def changes(self, wave: str | None = None, against: str = "previous", by=None, metrics=None,
                adjust: str = "bh", level: float = 0.95, mix: str | None = None, family: str = "brief"):
        """Test what changed in ``wave`` (default: the latest) against another wave or pooled waves.

        The p-values are adjusted in one family. By default (``family="brief"``) that is
        every metric in total and in every subgroup of the comparison, the family the brief
        tests, whatever ``metrics`` and ``by`` narrow the rows to; ``family="asked"`` adjusts
        only across the comparisons asked for (and says that it differs from the brief).

        With ``mix=GROUP``, each total change is also split into the part due to the sample's
        mix on that group and the part within its levels, with the change standardised to
        the earlier wave's mix and its test (``result.mix``; see docs/methods.md)."""
        check_adjust(adjust)
        from .changes import ChangeResult, resolve_against

        if family not in ("brief", "asked"):
            raise TrackerError(f"family {family}: use brief (every metric and subgroup) or asked")
        labels = self.waves.pick()
        wave = wave or labels[-1]
        check_level(level)
        ms, gs = pick_metrics(self.codebook, metrics), pick_groups(self.codebook, by)
        baseline = resolve_against(labels, self.waves.dates(), wave, against)
        others, note = list(baseline.waves), baseline.note
        if family == "brief":
            table, notes, size = self.family(wave, others, pick_metrics(self.codebook), pick_groups(self.codebook),
                                             adjust, level)
            keep = table["metric"].isin([m.name for m in ms]) & table["group"].isin(["total", *gs])
            table = table[keep].reset_index(drop=True)
            baseline_name = others[-1] if len(others) == 1 else "the pooled waves"
            notes.append(f"p-values adjusted across the {size:,} comparisons of {wave} against {baseline_name} "
                         f"(every metric in total and in every subgroup: the brief's family)")
        else:
            table, notes, size = self.family(wave, others, ms, gs, adjust, level)
            notes.append(f"p-values adjusted across only the {size:,} comparisons asked for: a narrower family than "
                         f"the brief's, so these verdicts can differ from the brief")
        notes = [note, *notes]
        mix_rows = None
        if mix is not None:
            mix_rows = self.mix(ms, others, wave, mix, adjust, level)
            table = table.merge(mix_rows.drop(columns=["metric_label", "kind", "change"]).assign(group="total"),
                                on=["metric", "group"], how="left")
        return ChangeResult(table, wave, baseline.label, adjust, level, tuple(notes), tuple(others), mix_rows,
                            size)

    def pooled(self, k: int, metrics=None, by=None, level: float = 0.95) -> pd.DataFrame:
        """Rolling estimates pooling each wave with the k - 1 waves before it (for thin subgroups)."""
        from .estimates import COLUMNS

        check_level(level)
        if k < 2:
            raise TrackerError(f"pool {k}: pool at least 2 waves")
        ms, gs, labels = pick_metrics(self.codebook, metrics), pick_groups(self.codebook, by), self.waves.pick()
        if len(labels) < k:
            raise TrackerError(f"pool {k}: only {len(labels)} waves are stored")
        rows = []
        for i in range(k - 1, len(labels)):
            window = labels[i - k + 1:i + 1]
            part = self.pooled_rows(window, ms, gs, level)
            part["wave"] = labels[i]
            part.insert(1, "pooled_waves", f"{window[0]}..{window[-1]}")
            rows.append(part)
        out = pd.concat(rows, ignore_index=True)
        out = out[out["base"] > 0].reset_index(drop=True)
        return out[["wave", "pooled_waves", *COLUMNS[1:]]]

    def steps(self, metrics=None, by=None, waves=None, adjust: str = "bh", level: float = 0.95) -> pd.DataFrame:
        """Every wave against the one before it, for the given metrics and subgroups. Each step
        keeps the p-values and verdicts of its own wave's comparison family (every metric in
        total and in every subgroup, as ``changes`` and the brief of that wave report them)."""
        check_adjust(adjust)
        ms, gs, labels = pick_metrics(self.codebook, metrics), pick_groups(self.codebook, by), self.waves.pick(waves)
        every, groups = pick_metrics(self.codebook), pick_groups(self.codebook)
        key = ("steps", tuple(labels), adjust, level)
        if key not in self.memory:
            parts = []
            for before, after in pairwise(labels):
                table, _, _ = self.family(after, [before], every, groups, adjust, level)
                parts.append(table)
            self.memory[key] = pd.concat(parts, ignore_index=True) if parts else None
        out = self.memory[key]
        if out is None:
            return pd.DataFrame()
        keep = out["metric"].isin([m.name for m in ms]) & out["group"].isin(["total", *gs])
        return out[keep].reset_index(drop=True)

    def composition(self, wave: str | None = None, against: str = "previous", groups=None,
                    adjust: str = "bh", level: float = 0.95):
        """The sample's weighted make-up on the profile groups (or ``groups``) against another wave."""
        check_adjust(adjust)
        check_level(level)
        from .changes import resolve_against
        from .composition import compare_composition

        labels = self.waves.pick()
        wave = wave or labels[-1]
        if against.startswith("pooled:"):
            raise TrackerError("composition compares two single waves; give previous, year-ago or a wave label")
        others = list(resolve_against(labels, self.waves.dates(), wave, against).waves)
        gs = list(self.codebook.profile) if groups is None else pick_groups(self.codebook, groups)
        if not gs:
            raise TrackerError("codebook: profile: no profile groups to compare (add 'profile: [...]' to the codebook)")
        key = ("composition", wave, others[0], tuple(gs), adjust, level)
        if key not in self.memory:  # the brief asks twice (sample notes, mix notes)
            self.memory[key] = compare_composition(self.codebook, self.waves.load(others[0]), self.waves.load(wave),
                                                   others[0], wave, gs, adjust, level)
        return self.memory[key]


def _cell_columns(full, part) -> np.ndarray:
    """Positions (in the full level x metric order) of the cells of a selection."""
    row: dict[tuple[str, str], int] = {}
    for i, (g, lev) in enumerate(zip(full.group, full.level)):
        row.setdefault((g, lev), i)
    col = {m: j for j, m in enumerate(full.metrics)}
    rows = np.array([row[(g, lev)] for g, lev in zip(part.group, part.level)], dtype=np.int64)
    cols = np.array([col[m] for m in part.metrics], dtype=np.int64)
    return (rows[:, None] * len(full.metrics) + cols[None, :]).ravel()
