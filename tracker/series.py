"""The series side of a study: trend patterns over the waves, the expected range of the next
wave, surprises in an arriving one, and smoothed series. Works from the codebook, the stored
waves (tracker.waves) and the estimates, never from the Study."""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from .codebook import Codebook
from .comparing import metric_breaks, smallest_changes
from .errors import TrackerError
from .intake import wave_in_span
from .options import check_adjust, check_level, parse_date
from .selection import pick_groups, pick_metrics
from .waves import StoredWaves

__all__ = ["Series"]


def bridge_note(row) -> str:
    """'bridged across the wording break at 2024-Q1: jump +6.8 points (interval +2.3 to +11.3
    points)': how every output labels a bridged series."""
    from .wording import signed, span

    return (f"bridged across the wording break at {row.break_wave}: jump {signed(row.kind, row.jump)} (interval "
            f"{span(row.kind, row.jump_low, row.jump_high)})")


class Series:
    """Patterns, expected ranges, surprises and smoothing of a study's series.

    Parameters
    ----------
    codebook : Codebook
    waves : StoredWaves
    estimates : callable
        The study's estimates (``Study.estimates``: memoized, with the same arguments).
    memory : dict
        Shared with the Study, which clears it in place when a wave changes.
    """

    def __init__(self, codebook: Codebook, waves: StoredWaves, estimates: Callable[..., pd.DataFrame],
                 memory: dict[Any, Any]):
        self.codebook, self.waves, self.estimates, self.memory = codebook, waves, estimates, memory

    def window(self, last: int | None, since: str | None, until: str | None = None) -> list[str]:
        labels = self.waves.pick()
        if until is not None:
            self.waves.entry(until)
            labels = labels[:labels.index(until) + 1]
        if since is not None:
            if since not in labels:
                raise TrackerError(f"since {since}: no stored wave has that label")
            labels = labels[labels.index(since):]
        if last is not None:
            if last < 1:
                raise TrackerError(f"last {last}: give a number of waves of 1 or more")
            labels = labels[-last:]
        return labels

    def segment_starts(self, metrics: list, labels: list[str]) -> dict[str, str]:
        """For metrics with a wording break inside ``labels``: the wave their current series starts at."""
        order = self.waves.dates()
        out: dict[str, str] = {}
        for m in metrics:
            for _, b in metric_breaks(self.codebook, m):
                after = [w for w in labels if wave_in_span(w, b, None, order)]
                if after and after[0] != labels[0] and (
                        m.name not in out or labels.index(after[0]) > labels.index(out[m.name])):
                    out[m.name] = after[0]
        return out

    def trends(self, metrics=None, by=None, last: int | None = None, since: str | None = None,
               adjust: str = "bh", level: float = 0.95, until: str | None = None, family: str = "brief",
               bridge: bool = False):
        """Slope per year, extra variation, and the pattern (tracker.trends.PATTERNS) of every
        metric x subgroup series; see docs/methods.md.

        The pattern tests are adjusted in one family: by default (``family="brief"``) every
        metric in total and in every subgroup over the same waves, the family the brief uses,
        whatever ``metrics`` and ``by`` narrow the rows to; ``family="asked"`` adjusts across
        only the series asked for (``df.attrs["family"]`` says which, and its size)."""
        from .trends import fit_trends

        check_level(level)
        check_adjust(adjust)
        if family not in ("brief", "asked"):
            raise TrackerError(f"family {family}: use brief (every metric and subgroup) or asked")
        ms = pick_metrics(self.codebook, metrics)
        gs = pick_groups(self.codebook, by)
        labels = self.window(last, since, until)
        fam_ms, fam_by = (pick_metrics(self.codebook), None) if family == "brief" else (ms, by)
        key = ("trends", tuple(m.name for m in fam_ms), None if fam_by is None else tuple(gs), tuple(labels), adjust,
               level, bridge)
        if key not in self.memory:
            est = self.estimates(metrics=[m.name for m in fam_ms], by=fam_by, waves=labels, level=level)
            starts = self.segment_starts(fam_ms, labels)
            if bridge:
                self.memory[key] = self._bridged_trends(est, starts, adjust, level)
            else:
                self.memory[key] = fit_trends(est, starts, adjust, level, matters=smallest_changes(self.codebook),
                                              cycle=self.codebook.seasons)
        out = self.memory[key]
        size = int(out["pattern_p_adjusted"].notna().sum())
        keep = out["metric"].isin([m.name for m in ms]) & out["group"].isin(["total", *gs])
        out = out[keep].reset_index(drop=True)
        out.attrs.update(family=family, family_size=size)
        return out

    def bridged(self, est: pd.DataFrame, starts: dict[str, str], level: float) -> tuple[pd.DataFrame, pd.DataFrame,
                                                                                       dict[str, str]]:
        """(the estimates bridged across their wording breaks, the jumps, the breaks still
        restarting a series: those of metrics none of whose series could be bridged)."""
        from .bridging import break_jumps, bridge

        jumps = break_jumps(est, starts, level)
        done = set(jumps.loc[jumps["bridged"], "metric"])
        return bridge(est, jumps), jumps, {m: w for m, w in starts.items() if m not in done}

    def _bridged_trends(self, est: pd.DataFrame, starts: dict[str, str], adjust: str, level: float) -> pd.DataFrame:
        """Trends of the bridged series; each bridged series' note gives its jump."""
        from .trends import fit_trends

        bridged, jumps, restart = self.bridged(est, starts, level)
        out = fit_trends(bridged, restart, adjust, level, matters=smallest_changes(self.codebook),
                         cycle=self.codebook.seasons)
        keys = ["metric", "group", "subgroup"]
        j = out[keys + ["kind"]].merge(jumps, on=keys, how="left")
        said = [bridge_note(r) if r.bridged is True else
                (f"series starts at {r.break_wave} (wording break: too few waves on one side to bridge)"
                 if isinstance(r.break_wave, str) and r.metric not in restart else "")
                for r in j.itertuples()]
        note = out["note"].fillna("").astype(str).to_numpy(object)
        out["note"] = [b if not a else (f"{b}; {a}" if b else a) for a, b in zip(note, said)]
        return out

    # -- before and after a wave (tracker.expected) -----------------------------------------
    def next_date(self) -> str:
        """The expected fieldwork date of the next wave: the latest plus the median gap."""
        dates = [dt.date.fromisoformat(d) for d in self.waves.dates().values()]
        days = [(b - a).days for a, b in zip(sorted(dates), sorted(dates)[1:])]
        gap = int(np.median(days)) if days else 91
        return (max(dates) + dt.timedelta(days=max(gap, 1))).isoformat()

    def expected(self, base: float | None = None, metrics=None, by=None, date: str | None = None,
                 adjust: str = "bh", level: float = 0.95, bridge: bool = False) -> pd.DataFrame:
        """The expected range of the next wave for every metric x subgroup series: the
        prediction interval from the series' pattern, its wave-to-wave variation and the
        sampling variance at the expected base (tracker.expected). ``base``: the next
        wave's expected respondents in total (default: the mean of the last three waves);
        subgroups get their recent share of it."""
        check_adjust(adjust)
        from .expected import RANGE_COLUMNS, next_ranges

        check_level(level)
        if base is not None and not base > 0:
            raise TrackerError(f"base {base}: give the expected number of respondents, above 0")
        from .expected import WINDOW

        labels = self.waves.pick()
        date = parse_date(date) if date else self.next_date()
        if date <= self.waves.dates()[labels[-1]]:
            raise TrackerError(f"date {date}: the next wave must come after the latest, {labels[-1]} "
                               f"({self.waves.dates()[labels[-1]]})")
        labels = labels[-WINDOW:]
        hist = self.estimates(level=level, detail=True, waves=labels)
        patterns = self.trends(adjust=adjust, level=level, last=len(labels), bridge=bridge)
        rows = float(np.mean([self.waves.entry(w)["rows"] for w in labels[-3:]]))
        starts = self.segment_starts(pick_metrics(self.codebook), labels)
        jumps = None
        if bridge:
            hist, jumps, starts = self.bridged(hist, starts, level)
        pred = next_ranges(self.codebook, hist, patterns, labels, date, base, rows, starts, level)
        if jumps is not None and len(jumps):
            keys = ["metric", "group", "subgroup"]
            j = pred[keys + ["kind"]].merge(jumps, on=keys, how="left")
            said = np.array([bridge_note(r) if r.bridged is True else "" for r in j.itertuples()], dtype=object)
            pred["basis"] = np.where(said != "", pred["basis"].astype(str) + "; " + said, pred["basis"])
        ms, gs = pick_metrics(self.codebook, metrics), pick_groups(self.codebook, by)
        keep = pred["metric"].isin([m.name for m in ms]) & pred["group"].isin(["total", *gs])
        out = pred[keep][RANGE_COLUMNS].reset_index(drop=True)
        out.attrs.update(date=date, after=labels[-1], level=level)
        return out

    def surprises(self, wave: str | None = None, adjust: str = "bh", level: float = 0.95,
                  table: pd.DataFrame | None = None, date: str | None = None) -> pd.DataFrame:
        """Every cell of ``wave`` (default: the latest) against the range the waves before it
        predict, with the surprises marked under false discovery control across all cells
        (tracker.expected). With ``table`` and ``date``, a wave not yet stored is judged
        against every stored wave fielded before it (``check`` and ``add`` do this)."""
        check_adjust(adjust)
        from .estimates import cell_arrays, estimates_frame
        from .expected import SURPRISE_COLUMNS, WINDOW, predict, surprise_table
        from .trends import MIN_WAVES

        check_level(level)
        labels = self.waves.pick()
        ms = pick_metrics(self.codebook)
        order = self.waves.dates()
        if table is None:
            wave = wave or labels[-1]
            self.waves.entry(wave)
            date = order[wave]
            new = self.estimates(waves=[wave], level=level)
        else:
            if date is None:
                raise TrackerError("judging a wave not yet stored needs its fieldwork date")
            wave = wave or "new"
            cells = cell_arrays(self.codebook, table, ms, list(self.codebook.groups))
            new = estimates_frame([(wave, date, cells)], ms, level)
            new = new[new["base"] > 0].reset_index(drop=True)
            order = {**order, wave: date}
        before = [w for w in labels if order[w] < date and w != wave][-WINDOW:]
        if len(before) < MIN_WAVES:
            return pd.DataFrame(columns=SURPRISE_COLUMNS)
        key = ("surprise history", tuple(before), adjust, level)
        if key not in self.memory:
            self.memory[key] = (self.estimates(waves=before, level=level),
                                self.trends(adjust=adjust, level=level, until=before[-1], last=len(before)))
        hist, patterns = self.memory[key]
        pred = predict(hist, patterns, date, None, self.segment_starts(ms, before), level, self.codebook.seasons)
        # a wording break between the last wave fitted and this one restarts the series: no prediction
        for m in ms:
            for vname, b in metric_breaks(self.codebook, m):
                if wave_in_span(wave, b, None, order) and not wave_in_span(before[-1], b, None, order):
                    pred.loc[pred["metric"] == m.name, ["expected", "prediction_sd", "fit_sd"]] = np.nan
        return surprise_table(pred, new, adjust, level)

    def smoothed(self, metrics=None, by=None, waves=None, level: float = 0.95,
                 until: str | None = None) -> pd.DataFrame:
        """The estimates with a smoothed value beside each direct one: signal extraction in a
        local-level model with each wave's known sampling variance, fitted per series over
        every stored wave (tracker.methods.statespace). Adds ``smoothed``, ``smoothed_low``,
        ``smoothed_high`` and ``signal_sd`` (the random walk's SD per wave); a wording break
        restarts the series, and cells before the current segment get no smoothed value.
        ``until`` fits only the waves up to that one (as a brief of that wave sees them)."""
        from .smoothing import smooth_estimates

        check_level(level)
        upto = self.window(None, None, until)
        key = ("smoothed", level, tuple(upto))
        if key not in self.memory:
            est = self.estimates(level=level, waves=upto)
            self.memory[key] = smooth_estimates(est, self.segment_starts(pick_metrics(self.codebook), upto), level,
                                                self.codebook.seasons)
        out = self.memory[key]
        ms, gs, ws = pick_metrics(self.codebook, metrics), pick_groups(self.codebook, by), self.waves.pick(waves)
        keep = out["metric"].isin([m.name for m in ms]) & out["group"].isin(["total", *gs]) & out["wave"].isin(ws)
        return out[keep].reset_index(drop=True)

