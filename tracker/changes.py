"""Changes between two waves (or a wave and pooled earlier waves), from their estimates.

Independent samples are assumed unless the waves share clusters or respondents, in which
case their covariance (tracker.estimates.wave_covariance) is subtracted.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .errors import TrackerError
from .kinds import KINDS
from .methods.intervals import t_interval
from .methods.tests import adjust_pvalues, difference_test, family_level, paired_df, satterthwaite_df
from .options import check_adjust

KEYS = ["metric", "group", "subgroup"]

COLUMNS = [
    "metric", "metric_label", "kind", "group", "subgroup", "wave_from", "wave_to",
    "value_from", "value_to", "change", "change_low", "change_high", "adjusted_low", "adjusted_high",
    "adjusted_level",
    "base_from", "base_to", "effective_base_from", "effective_base_to",
    "test", "statistic", "p_raw", "p_adjusted", "min_detectable_change",
    "significant", "verdict", "flags", "se", "df", "covariance", "covariance_from",
]

#: The verdict of a comparison: its code (in every machine format) and its one definition.
#: The same words never describe a series (tracker.trends.PATTERNS has its own).
VERDICTS = {
    "rise": "significant after adjustment, upwards: the whole adjusted interval of the change lies above zero",
    "fall": "significant after adjustment, downwards: the whole adjusted interval of the change lies below zero",
    "held": "the whole adjusted interval of the change lies within the smallest change that matters, as "
            "declared in the codebook",
    "not significant": "zero lies inside the adjusted interval of the change; the change the comparison could "
                       "have detected is shown beside it",
    "not tested": "a base too small, an interval too wide, a wording break, or a share fixed by the weighting",
}
#: Why a comparison was not tested (column ``not_tested_because``; empty when tested).
NOT_TESTED = ("wording break", "no respondents", "unreliable", "fixed by the weighting", "no sampling variance")

#: How each verdict is named in a sentence or a legend (one name per code).
VERDICT_NAMES = {"rise": "significant rise", "fall": "significant fall", "held": "held within the margin",
                 "not significant": "not significant", "not tested": "not tested"}


def verdict_of(testable, significant, change, adjusted_low, adjusted_high, matters=None) -> np.ndarray:
    """The verdict of each comparison (VERDICTS). 'held' is a claim and is made only against
    a smallest change that matters the codebook declares (``matters``, NaN where none): the
    whole adjusted interval lies within it either way. With no margin declared a comparison
    that is not significant is only that, whatever its interval."""
    change, lo, hi = (np.asarray(x, float) for x in (change, adjusted_low, adjusted_high))
    limit = np.full(change.shape, np.nan) if matters is None else np.asarray(matters, float)
    with np.errstate(invalid="ignore"):
        held = np.isfinite(limit) & (lo >= -limit) & (hi <= limit)
    sig = np.asarray(significant, bool)
    return np.where(~np.asarray(testable, bool), "not tested",
                    np.where(sig & (change > 0), "rise", np.where(sig & (change < 0), "fall",
                             np.where(held, "held", "not significant"))))


@dataclass(frozen=True)
class ChangeResult:
    """Every comparison of one call, and what the family of tests was."""

    table: pd.DataFrame
    wave: str
    against: str
    adjust: str
    level: float
    notes: tuple[str, ...] = field(default_factory=tuple)
    compared_with: tuple[str, ...] = ()
    mix: pd.DataFrame | None = None
    family_size: int | None = None  # the comparisons the p-values were adjusted across

    @property
    def n_tests(self) -> int:
        return int(self.table["p_adjusted"].notna().sum())

    def _repr_html_(self) -> str:
        """In a notebook: the readable table of every comparison, with its footer."""
        from .notebook import show

        return show(self.table, "changes", tuple(self.footer()))._repr_html_()

    @property
    def n_significant(self) -> int:
        return int(self.table["significant"].sum())

    def shown(self, show_all: bool = False) -> pd.DataFrame:
        """Significant changes (or everything with ``show_all``) in reading order: significant
        first, totals before subgroups, then by kind (shares, balances, means: sizes in one
        unit) and the size of the change within it."""
        t = self.table
        if not show_all:
            t = t[t["significant"]]
        kind_order = t["kind"].map({k: kind.order for k, kind in KINDS.items()}).fillna(9)
        keys = pd.DataFrame({"sig": ~t["significant"].astype(bool), "sub": t["group"] != "total",
                             "kind": kind_order, "size": -t["change"].abs().fillna(-1)}, index=t.index)
        return t.loc[keys.sort_values(["sig", "sub", "kind", "size"], kind="mergesort").index]

    def footer(self) -> list[str]:
        """The lines printed under the comparisons (tracker.wording.change_footer)."""
        from .wording import change_footer

        return change_footer(self)


@dataclass(frozen=True)
class Baseline:
    """What a wave is compared with: the waves, how results name it, and a note saying which."""

    waves: tuple[str, ...]
    label: str
    note: str


def year_ago(labels: list[str], dates: dict[str, str], wave: str, tolerance_days: int = 42) -> tuple[str | None, str]:
    """The stored wave nearest to 12 months before ``wave`` by fieldwork date, within tolerance."""
    target = dt.date.fromisoformat(dates[wave]) - dt.timedelta(days=365)
    best, gap = None, None
    for lab in labels:
        if lab == wave:
            continue
        g = abs((dt.date.fromisoformat(dates[lab]) - target).days)
        if gap is None or g < gap:
            best, gap = lab, g
    if best is None or gap is None or gap > tolerance_days:
        return None, (f"no stored wave lies within {tolerance_days // 7} weeks of {target.isoformat()} "
                      f"(12 months before {wave})")
    return best, f"year-ago wave: {_year_ago_label(best, dates, wave, target)}"


def _year_ago_label(best: str, dates: dict[str, str], wave: str, target: dt.date) -> str:
    off = (dt.date.fromisoformat(dates[best]) - target).days
    when = ("12 months before" if off == 0 else
            f"{abs(off)} day{'s' if abs(off) != 1 else ''} {'after' if off > 0 else 'before'} 12 months before")
    return f"{best} (fieldwork {dates[best]}, {when} {wave}'s {dates[wave]})"


def resolve_against(labels: list[str], dates: dict[str, str], wave: str, against: str) -> Baseline:
    """The wave(s) to compare ``wave`` with (``against``: previous, year-ago, pooled:K or a
    stored label), as a :class:`Baseline`."""
    if wave not in labels:
        raise TrackerError(f"no wave labelled {wave!r} (stored: {', '.join(labels) or 'none'})")
    i = labels.index(wave)
    if against == "previous":
        if i == 0:
            raise TrackerError(f"{wave} is the first stored wave; there is no previous wave to compare with")
        return Baseline((labels[i - 1],), labels[i - 1], f"previous wave: {labels[i - 1]}")
    if against == "year-ago":
        found, note = year_ago(labels[:i], dates, wave)
        if found is None:
            raise TrackerError(note)
        label = _year_ago_label(found, dates, wave, dt.date.fromisoformat(dates[wave]) - dt.timedelta(days=365))
        return Baseline((found,), label, note)
    if against.startswith("pooled:"):
        try:
            k = int(against.split(":", 1)[1])
        except ValueError:
            raise TrackerError(f"against {against}: write pooled:K with K a whole number, e.g. pooled:4") from None
        if k < 1 or i < k:
            raise TrackerError(f"against {against}: {wave} has {i} earlier wave(s); cannot pool {k}")
        chosen = labels[i - k:i]
        return Baseline(tuple(chosen), ", ".join(chosen), f"pooled earlier waves: {', '.join(chosen)}")
    if against not in labels:
        raise TrackerError(f"against {against}: not 'previous', 'year-ago', 'pooled:K' or a stored wave label")
    if against == wave:
        raise TrackerError(f"against {against}: a wave cannot be compared with itself")
    return Baseline((against,), f"wave {against}", f"wave {against}")


def compare(now: pd.DataFrame, then: pd.DataFrame, blocked: dict[str, str] | None = None,
            covariance: np.ndarray | None = None, adjust: str = "bh", level: float = 0.95,
            matters: dict[str, float] | None = None, shared: np.ndarray | None = None,
            source: str = "") -> pd.DataFrame:
    """Test every cell of ``now`` against the same cell of ``then`` (rows from the estimates step).

    The variance of a change is the design variance itself, V_to + V_from - 2 Cov (Cov
    from shared clusters or respondents, else 0), and the test is t = change / SE on the
    Satterthwaite (1946) combination of the two cells' design degrees of freedom when the
    waves are independent, and on the paired design's df when they share PSUs (``shared``:
    the PSUs holding each cell in both waves; tracker.methods.tests.paired_df; ``source``
    says what they are, 'respondents' or 'clusters', for the covariance_from column). With
    unweighted data and no design this is Welch's t for means (scipy
    ``ttest_ind(equal_var=False)``). The change interval and the minimum detectable change
    are the metric kind's (tracker.kinds): for shares Newcombe's (1998) hybrid score
    interval on the effective bases (the Wald form when the waves are not independent)
    and a detectable change with the variance under the alternative. ``blocked`` maps
    metric to the reason no test is made (a wording break). All tested rows form one
    family, adjusted by ``adjust``. ``matters`` maps a metric to the smallest change that
    matters, in value units (see :func:`verdict_of`).
    """
    check_adjust(adjust)
    m = now.merge(then, on=KEYS, suffixes=("_to", "_from"))
    kind = m["kind_to"].to_numpy()
    p1, p0 = m["value_to"].to_numpy(float), m["value_from"].to_numpy(float)
    nd1, nd0 = m["design_base_to"].to_numpy(float), m["design_base_from"].to_numpy(float)
    v1, v0 = m["variance_to"].to_numpy(float), m["variance_from"].to_numpy(float)
    df1, df0 = m["df_to"].to_numpy(float), m["df_from"].to_numpy(float)
    k1, k0 = m["effective_base_to"].to_numpy(float), m["effective_base_from"].to_numpy(float)
    cov = np.zeros(len(m)) if covariance is None else np.asarray(covariance, float)
    d = p1 - p0
    var = np.maximum(v1 + v0 - 2 * cov, 0.0)
    se = np.sqrt(var)
    df = satterthwaite_df(v1, v0, np.maximum(df1, 1), np.maximum(df0, 1))
    if shared is not None:
        both = np.asarray(shared, float) > 0
        pdf = paired_df(m["n_psu_to"].to_numpy(float), df1, m["n_psu_from"].to_numpy(float), df0, shared)
        df = np.where(both, pdf, df)
    stat, p_raw = difference_test(d, var, df)
    lo, hi, mde = np.full(len(m), np.nan), np.full(len(m), np.nan), np.full(len(m), np.nan)
    paired = cov != 0
    tests = np.full(len(m), "", dtype=object)
    for name, k in KINDS.items():  # a loop over the kinds, every comparison of a kind at once
        s = kind == name
        if not s.any():
            continue
        lo[s], hi[s] = k.change_interval(d[s], se[s], df[s], level, p1[s], nd1[s], df1[s], p0[s], nd0[s], df0[s],
                                         paired[s])
        mde[s] = k.min_detectable(p0[s], v0[s], nd1[s], cov[s], se[s], df[s], level)
        tests[s] = k.test

    blocked = blocked or {}
    why_blocked = np.array([blocked.get(x, "") for x in m["metric"].unique()], dtype=object)[
        pd.factorize(m["metric"])[0]] if len(m) else np.array([], dtype=object)
    empty_to, empty_from = m["base_to"].to_numpy() == 0, m["base_from"].to_numpy() == 0
    unreliable = ~(m["reliable_to"].to_numpy(bool) & m["reliable_from"].to_numpy(bool))
    cell_flags = _wave_flags(m["flags_from"], m["flags_to"], m["wave_from"], m["wave_to"])
    empty_text = np.where(empty_to, "no respondents in " + m["wave_to"].astype(str),
                          "no respondents in " + m["wave_from"].astype(str))
    detail = np.where(empty_to | empty_from, empty_text,
                      np.where(unreliable, "unreliable cell: " + cell_flags.astype(str), cell_flags))
    # a cell with spread among its respondents but no sampling variance is held by the weighting
    # (a raked margin: its share is the target): its change is the targets', never tested
    spread = (m["unit_variance_to"].to_numpy(float) > 0) & (m["unit_variance_from"].to_numpy(float) > 0)
    fixed = (spread & (np.sqrt(v1) <= 1e-9 * np.maximum(1, np.abs(p1)))
             & (np.sqrt(v0) <= 1e-9 * np.maximum(1, np.abs(p0))))
    detail = np.where(fixed, "fixed by the weighting (a raked margin: its share is the target)", detail)
    flags = _join(why_blocked, detail, " | ")
    testable = (why_blocked == "") & ~empty_to & ~empty_from & ~unreliable & ~fixed
    testable &= np.isfinite(p_raw)
    # why a comparison was not tested, as a typed value (NOT_TESTED) that readers select on
    reason = np.select([testable, why_blocked != "", empty_to | empty_from, unreliable, fixed],
                       ["", "wording break", "no respondents", "unreliable", "fixed by the weighting"],
                       "no sampling variance")
    p_adj = adjust_pvalues(np.where(testable, p_raw, np.nan), adjust)
    sig = testable & (p_adj <= 1 - level)
    # the interval dual to the test (t on the same SE and df) at the family's agreeing level:
    # zero lies outside it exactly when the comparison is significant after adjustment
    adj_level = family_level(p_adj, adjust, 1 - level)
    adj_lo, adj_hi = t_interval(d, se, np.maximum(df, 1.0), adj_level)
    adj_lo, adj_hi = np.where(testable, adj_lo, np.nan), np.where(testable, adj_hi, np.nan)
    limit = m["metric"].map(matters or {}).to_numpy(float)
    verdict = verdict_of(testable, sig, d, adj_lo, adj_hi, limit)
    out = pd.DataFrame({
        "metric": m["metric"], "metric_label": m["metric_label_to"], "kind": kind,
        "group": m["group"], "subgroup": m["subgroup"],
        "wave_from": m["wave_from"], "wave_to": m["wave_to"],
        "value_from": p0, "value_to": p1, "change": d, "change_low": lo, "change_high": hi,
        "adjusted_low": adj_lo, "adjusted_high": adj_hi, "adjusted_level": np.full(len(m), adj_level),
        "base_from": m["base_from"], "base_to": m["base_to"],
        "effective_base_from": k0, "effective_base_to": k1,
        "test": tests,
        "statistic": stat, "p_raw": np.where(testable, p_raw, np.nan), "p_adjusted": p_adj,
        "min_detectable_change": mde,
        "significant": sig, "verdict": verdict, "flags": flags,
        "se": se, "df": df, "covariance": cov,
        "covariance_from": np.where((np.asarray(shared, float) > 0) if shared is not None else np.zeros(len(m), bool),
                                    f"shared {source}" if source else "none", "none"),
        "not_tested_because": reason,  # typed, not in the machine formats' COLUMNS
    })
    return out


def _wave_flags(f_from, f_to, w_from, w_to) -> np.ndarray:
    """The two cells' flags, each named by its wave; one flag shared by both said once."""
    a = pd.Series(f_from, dtype=object).fillna("").astype(str).reset_index(drop=True)
    b = pd.Series(f_to, dtype=object).fillna("").astype(str).reset_index(drop=True)
    wa = pd.Series(w_from, dtype=object).astype(str).reset_index(drop=True)
    wb = pd.Series(w_to, dtype=object).astype(str).reset_index(drop=True)
    named = _join(np.where(a != "", wa + ": " + a, ""), np.where(b != "", wb + ": " + b, ""), "; ")
    return np.where((a == b) & (a != ""), "both waves: " + a, named).astype(object)


def _join(a: np.ndarray, b: np.ndarray, sep: str) -> np.ndarray:
    """Element-wise join of two text arrays, skipping empty parts."""
    a = pd.Series(a, dtype=object).fillna("").astype(str)
    b = pd.Series(b, dtype=object).fillna("").astype(str)
    both = (a != "") & (b != "")
    return np.where(both, a + sep + b, a + b).astype(object)
