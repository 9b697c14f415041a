"""Respondent-level building blocks: metric values, bases and subgroup membership.

This is the only place (with the estimates step) that reads respondent rows. It turns a
harmonized wave into matrices: ``Y`` (respondents x metrics, the value each respondent
contributes), ``E`` (respondents x metrics, who is in the metric's base) and ``D``
(respondents x subgroup levels).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .codebook import Codebook, Metric

TOTAL = "Total"


@dataclass(frozen=True)
class Levels:
    """The subgroup levels of a call, in order: (group, level) pairs; ('total', 'Total') first."""

    group: tuple[str, ...]
    level: tuple[str, ...]


def _isin(x: np.ndarray, codes) -> np.ndarray:
    """np.isin for a short list of codes, by comparisons (much faster for a few codes)."""
    codes = list(codes)
    if len(codes) > 8:
        return np.isin(x, codes)
    out = np.zeros(x.shape, bool)
    for c in codes:
        out |= x == c
    return out


class _Columns:
    """A wave's columns as float arrays, each read from the table once."""

    def __init__(self, table: pd.DataFrame):
        self.table = table
        self.n = len(table)
        self._got: dict[str, np.ndarray] = {}

    def __contains__(self, name: str) -> bool:
        return name in self.table.columns

    def __getitem__(self, name: str) -> np.ndarray:
        if name not in self._got:
            self._got[name] = self.table[name].to_numpy(dtype=float)
        return self._got[name]

    def prefetch(self, names: list[str]) -> None:
        want = [c for c in dict.fromkeys(names) if c in self.table.columns and c not in self._got]
        if want:
            block = self.table[want].to_numpy(dtype=float)
            for j, c in enumerate(want):
                self._got[c] = block[:, j]


def _codes_mask(codebook: Codebook, table, variable: str, codes: tuple) -> tuple[np.ndarray, np.ndarray]:
    """(holds one of codes, has an answer) for a coded or multi variable."""
    cols = table if isinstance(table, _Columns) else _Columns(table)
    var = codebook.variables[variable]
    n = cols.n
    if var.type == "multi":
        if not all(o in cols for o in var.options):
            return np.zeros(n, bool), np.zeros(n, bool)
        opts = np.column_stack([cols[o] for o in var.options])
        answered = ~np.isnan(opts).all(axis=1)
        chosen = np.column_stack([cols[c] for c in codes])
        return np.nan_to_num(chosen, nan=0.0).max(axis=1) == 1, answered
    if variable not in cols:
        return np.zeros(n, bool), np.zeros(n, bool)
    x = cols[variable]
    answered = ~np.isnan(x) & ~_isin(x, var.missing)
    return _isin(x, codes) & answered, answered


def metric_matrix(codebook: Codebook, table: pd.DataFrame, metrics: list[Metric]) -> tuple[np.ndarray, np.ndarray]:
    """Return (Y, E): each respondent's value for each metric, and who is in each base.

    What a respondent contributes is the metric kind's (tracker.kinds): a share 1 or 0, a
    mean the answer, a balance +1, -1 or 0 (so the weighted mean of Y is the balance).
    The base holds respondents with a valid answer (blank and missing codes leave it) who
    also pass the metric's ``base`` filter.
    """
    from .kinds import KINDS

    n = len(table)
    cols = _Columns(table)
    needed = []
    for m in metrics:
        for vname in filter(None, (m.variable, m.base_variable)):
            v = codebook.variables[vname]
            needed += list(v.options) if v.type == "multi" else [vname]
    cols.prefetch(needed)  # one conversion of every column the metrics read
    Y = np.zeros((n, len(metrics)))
    E = np.zeros((n, len(metrics)), dtype=bool)
    for j, m in enumerate(metrics):  # a loop over metric definitions, not cells
        var = codebook.variables[m.variable]

        def numeric(m=m, var=var):
            if m.variable not in cols:
                return np.zeros(n), np.zeros(n, bool)
            x = cols[m.variable]
            return x, ~np.isnan(x) & ~_isin(x, var.missing)

        def codes_mask(codes, m=m):
            return _codes_mask(codebook, cols, m.variable, codes)

        Y[:, j], answered = KINDS[m.kind].values(codes_mask, numeric, m)
        if m.base_variable:
            inbase, _ = _codes_mask(codebook, cols, m.base_variable, m.base_codes)
            answered = answered & inbase
        E[:, j] = answered
    return Y, E


def exclusions(codebook: Codebook, table: pd.DataFrame, metric: Metric) -> dict[str, int]:
    """How many respondents left the metric's base, by reason."""
    var = codebook.variables[metric.variable]
    n = len(table)
    cols = list(var.options) if var.type == "multi" else [var.name]
    if not all(c in table.columns for c in cols):
        return {"not asked in this wave": n}
    x = table[cols].to_numpy(dtype=float)
    blank = np.isnan(x).all(axis=1)
    out = {"blank": int(blank.sum())}
    if var.missing:
        out["missing code (" + ", ".join(var.missing.values()) + ")"] = int(np.isin(x[:, 0], list(var.missing)).sum())
    if metric.base_variable:
        inbase, _ = _codes_mask(codebook, table, metric.base_variable, metric.base_codes)
        answered = ~blank & ~np.isin(x[:, 0], list(var.missing))
        out[f"outside the base ({metric.base_variable})"] = int((answered & ~inbase).sum())
    return {k: v for k, v in out.items() if v}


NO_LABEL = "(no label)"


def group_matrix(codebook: Codebook, table: pd.DataFrame, groups: list[str],
                 residual: bool = False) -> tuple[np.ndarray, Levels]:
    """Return (D, levels): subgroup membership, with the whole sample as the first column.

    With ``residual`` each split also gets a level "(no label)" for respondents in none of
    its levels, so that the levels of a split add up to the whole sample.
    """
    n = len(table)
    cols = [np.ones(n, bool)]
    gnames, lnames = ["total"], [TOTAL]
    for gname in groups:
        g = codebook.groups[gname]
        x = table[g.variable].to_numpy(dtype=float) if g.variable in table.columns else np.full(n, np.nan)
        for label, codes in g.levels.items():
            if g.bands is not None:
                lo, hi = g.bands[label]
                cols.append((x >= lo) & (x <= hi))
            else:
                cols.append(_isin(x, codes))
            gnames.append(gname)
            lnames.append(label)
        if residual:
            cols.append(np.asarray(~np.column_stack(cols[-len(g.levels):]).any(axis=1)))
            gnames.append(gname)
            lnames.append(NO_LABEL)
    return np.column_stack(cols), Levels(tuple(gnames), tuple(lnames))


def group_labels(codebook: Codebook, table: pd.DataFrame, group: str) -> np.ndarray:
    """Each respondent's label in one group (None outside every level)."""
    D, levels = group_matrix(codebook, table, [group])
    labels = np.array([None, *levels.level[1:]], dtype=object)
    inside = D[:, 1:]
    idx = np.where(inside.any(axis=1), inside.argmax(axis=1) + 1, 0)
    return labels[idx]
