"""The registry of metric kinds: everything that differs between a share, a mean and a balance.

Each kind says what a respondent contributes, how its interval, reliability, change
interval and minimum detectable change are made (from :mod:`tracker.methods`), and how its
values are shown. A new kind is one class here plus its entry in :data:`KINDS`.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from .methods.intervals import korn_graubard_interval, newcombe_interval, t_interval, wilson_interval
from .methods.power import min_detectable_change, min_detectable_share_change
from .wording import fixed, shown_change

__all__ = ["INTERVALS", "KINDS", "Kind", "flag_text"]

#: Interval choices for shares (means and balances always use t).
INTERVALS = {
    "wilson": "Wilson score interval on the effective base, t quantile on the design degrees of freedom",
    "korn-graubard": "Korn-Graubard exact interval on the degrees-of-freedom adjusted effective base",
}

Mask = Callable[[tuple], tuple[np.ndarray, np.ndarray]]

#: A share resting on fewer respondents than this on its rarer side (p or 1 - p times the
#: base) is not reliable. Common practice puts the floor of a normal-theory interval for a
#: proportion at 10 to 15 answers on each side (no single source). Counted on the design base
#: instead, the rule would refuse half the tests of a 3 % share in a sample of 1,000 and leave
#: the rest at a 2 % size; on the base it keeps the designs' sizes and refuses most cells of a
#: rare share whose interval the weights make unstable (docs/validation.md, rare shares).
MIN_EVENTS = 15


def flag_text(pairs: list[tuple[np.ndarray, str]], n: int) -> np.ndarray:
    """Join the texts of the masks that hold, per cell ('; ' between), without repeats: each
    cell's set of flags as one integer, and the text made once per distinct set."""
    code = np.zeros(n, dtype=np.int64)
    for i, (mask, _) in enumerate(pairs):
        code |= np.asarray(mask, bool).astype(np.int64) << i
    sets, inverse = np.unique(code, return_inverse=True)
    texts = np.array(["; ".join(dict.fromkeys(t for i, (_, t) in enumerate(pairs) if c >> i & 1)) for c in sets],
                     dtype=object)
    return texts[inverse.ravel()] if n else np.full(0, "", dtype=object)


class Kind:
    """Base of the metric kinds; the subclasses fill in what differs."""

    name = ""
    test = "t on the design variance"
    scale = 1.0          # shown values are value x scale
    unit = ""            # after a shown value
    change_unit = ""     # after a shown change
    decimals = 2
    order = 9            # reading order in tables: shares, balances, means (sizes in one unit together)
    bounds: tuple[float, float] | None = None  # the range a value (and a predicted one) cannot leave
    chart_unit = ""      # the y-axis word of a trend chart
    axis_title = ""      # the x-axis of the change overview, shared by the kinds in the same units

    def values(self, codes_mask: Mask, numeric: Callable[[], tuple[np.ndarray, np.ndarray]], metric) \
            -> tuple[np.ndarray, np.ndarray]:
        """(what each respondent contributes, who has an answer)."""
        raise NotImplementedError

    def sql(self, codes_mask: Callable[[tuple], tuple[str, str]], numeric: Callable[[], tuple[str, str]],
            metric) -> tuple[str, str]:
        """The same as :meth:`values` as SQL expressions (the DuckDB engine, tracker.scale):
        (what each respondent contributes, as DOUBLE; who has an answer, as BOOLEAN)."""
        raise NotImplementedError

    def interval(self, value, se, design_base, n, df, level, method="wilson"):
        return t_interval(value, se, df, level)

    def reliability(self, value, lo, hi, design_base, n, df, level):
        """(reliable, flag texts): not reliable under an effective base of 30 (common practice,
        no source); flagged for review under 8 degrees of freedom."""
        low_n = ~(np.minimum(design_base, n) >= 30)
        return ~low_n, [(low_n, "effective base under 30"), (df < 8, "under 8 degrees of freedom")]

    def change_interval(self, d, se, df, level, p1, n1, df1, p0, n0, df0, paired):
        return t_interval(d, se, df, level)

    def min_detectable(self, p0, v0, n1, cov, se, df, level):
        return min_detectable_change(se, level, df=df)

    # display: the same decimals for a kind everywhere, no "-0" (tracker.wording)
    def fmt_value(self, v: float) -> str:
        return fixed(v * self.scale, self.decimals) + self.unit

    def fmt_change(self, d: float, signed: bool = False) -> str:
        text = fixed(d * self.scale, self.decimals, signed=True) if signed else fixed(abs(d) * self.scale,
                                                                                      self.decimals)
        return text + (f" {self.change_unit}" if self.change_unit else "")

    def fmt_number(self, d: float) -> str:
        return fixed(abs(d) * self.scale, self.decimals)

    def shown_change(self, v_from: float, v_to: float) -> float:
        """The change as the printed values show it, in value units (tracker.wording)."""
        return shown_change(v_from, v_to, self.scale, self.decimals) / self.scale


class Share(Kind):
    name = "share"
    test = "t on the design variance (shares)"
    scale, unit, change_unit, decimals = 100.0, "%", "points", 1
    order, bounds, chart_unit = 0, (0.0, 1.0), "%"
    axis_title = "shares and balances (percentage points)"

    def values(self, codes_mask, numeric, metric):
        y, answered = codes_mask(metric.codes)
        return y.astype(float), answered

    def sql(self, codes_mask, numeric, metric):
        y, answered = codes_mask(metric.codes)
        return f"CAST({y} AS DOUBLE)", answered

    def interval(self, value, se, design_base, n, df, level, method="wilson"):
        """Wilson or Korn-Graubard on the design base (both on the same base); a share of 0
        or 1 always gets Korn-Graubard (Clopper-Pearson on the Kish base with the degrees-of-
        freedom adjustment, as the NCHS 2017 standard for proportions does), whose limit
        away from the edge is wider than Wilson's there."""
        kg = korn_graubard_interval(value, design_base, n, df, level)
        if method == "korn-graubard":
            return kg
        lo, hi = wilson_interval(value, design_base, level, df)
        edge = (value <= 0) | (value >= 1)
        return np.where(edge, kg[0], lo), np.where(edge, kg[1], hi)

    def reliability(self, value, lo, hi, design_base, n, df, level):
        """NCHS Data Presentation Standards for Proportions (Parker et al. 2017), from memory
        (check the document's wording): not reliable when the effective base is under 30,
        when the Korn-Graubard interval is 0.30 or more wide, or when it is wider than 0.05
        and its width relative to the share is above 130 %; flagged for review under 8
        degrees of freedom and at 0 % or 100 %. The rule always reads the Korn-Graubard
        interval, whatever interval is shown."""
        kg_lo, kg_hi = korn_graubard_interval(value, design_base, n, df, level)
        width = kg_hi - kg_lo
        low_n = ~(np.minimum(design_base, n) >= 30)
        wide = ~low_n & (width >= 0.30)
        with np.errstate(divide="ignore", invalid="ignore"):
            rel = np.where(value > 0, width / value, np.inf)
        unstable = ~low_n & ~wide & (width > 0.05) & (rel > 1.30)
        edge = (value == 0) | (value == 1)
        # a rare answer: about fewer than MIN_EVENTS respondents gave it, or its opposite (share x base)
        rare = ~low_n & ~wide & ~unstable & (np.minimum(value, 1 - value) * n < MIN_EVENTS)
        reliable = ~(low_n | wide | unstable | rare)
        return reliable, [(low_n, "effective base under 30"), (wide, "interval 30 points wide or more"),
                          (unstable, "interval too wide for the value"),
                          (rare, f"under {MIN_EVENTS} respondents give this answer"),
                          (df < 8, "under 8 degrees of freedom"), (edge, "0% or 100%")]

    def change_interval(self, d, se, df, level, p1, n1, df1, p0, n0, df0, paired):
        lo, hi = newcombe_interval(p1, n1, p0, n0, level, df1, df0)
        # with shared respondents or clusters the two waves are not independent: Wald form
        wl, wh = t_interval(d, se, df, level)
        return np.where(paired, wl, lo), np.where(paired, wh, hi)

    def min_detectable(self, p0, v0, n1, cov, se, df, level):
        return min_detectable_share_change(p0, v0, n1, cov, level, df=df)[0]



class Mean(Kind):
    name = "mean"
    test = "t on the design variance (means)"
    order, chart_unit, axis_title = 2, "mean", "means (scale points)"

    def values(self, codes_mask, numeric, metric):
        x, answered = numeric()
        return np.where(answered, x, 0.0), answered

    def sql(self, codes_mask, numeric, metric):
        x, answered = numeric()
        return f"(CASE WHEN {answered} THEN {x} ELSE 0.0 END)", answered


class Balance(Kind):
    name = "balance"
    test = "t on the design variance (balances)"
    scale, unit, change_unit, decimals = 100.0, "", "points", 1
    order, bounds, chart_unit = 1, (-1.0, 1.0), "points"
    axis_title = "shares and balances (percentage points)"

    def values(self, codes_mask, numeric, metric):
        plus, answered = codes_mask(metric.plus)
        minus, _ = codes_mask(metric.minus)
        return plus.astype(float) - minus, answered

    def sql(self, codes_mask, numeric, metric):
        plus, answered = codes_mask(metric.plus)
        minus, _ = codes_mask(metric.minus)
        return f"(CAST({plus} AS DOUBLE) - CAST({minus} AS DOUBLE))", answered

    def fmt_value(self, v: float) -> str:
        return fixed(v * 100, self.decimals, signed=True)


KINDS: dict[str, Kind] = {k.name: k for k in (Share(), Mean(), Balance())}


def kind_of(name) -> Kind:
    """The kind called ``name``; a table without a kind column reads as shares (the default)."""
    return KINDS.get(str(name), KINDS["share"])


def attribute(kinds, name: str, default=None) -> list:
    """One attribute of each row's kind (a column's worth, for pandas ``map``)."""
    return [getattr(KINDS[k], name) if k in KINDS else default for k in kinds]
