"""Subgroups compared within one wave: each level against the rest of the sample, the levels
of a split pairwise, and a test across all levels of a split, in one family of tests.

Every estimate is a domain ratio (the share, mean or balance of a metric among a subgroup's
respondents) and is linearized as in tracker.estimates: z_i = d_i w_i e_i (y_i - value) /
sum(d w e). The two sides of a comparison come from the same sample, so their covariance is
not zero where they share clusters or strata: each side's PSU totals of z are compared within
strata, the covariance of the two from the same totals (the with-replacement estimator,
Wolter 2007, *Introduction to Variance Estimation*, ch. 6; R's ``svyby(covmat=TRUE)`` with
``svycontrast``). A level against the rest is two disjoint domains; two levels of a split
likewise. The test across a split's K levels is the design-based Wald test that their
values are equal, W = (C v)' (C V C')^-1 (C v) with C the K - 1 contrasts against the last
level, F = W / (K - 1) on (K - 1, df + 1 - K) degrees of freedom, df the wave's design
degrees of freedom (as R's ``regTermTest`` on ``svyglm(y ~ split)``).

All comparisons of a call (every metric, split and pair, and the tests across levels) form
one family: their p-values are adjusted together (tracker.methods.tests.adjust_pvalues) and
each verdict agrees with the adjusted interval beside it. Computed from the wave's
respondents (one read of the stored wave).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd

from .errors import TrackerError
from .methods.distributions import f_sf
from .methods.intervals import critical
from .methods.tests import adjust_pvalues, difference_test, family_level
from .methods.variance import PsuTotals, cross_wave_covariance, psu_index
from .options import check_adjust, check_level

__all__ = ["GAP_VERDICTS", "WithinResult", "compare_within"]

#: The verdict of a comparison within a wave: its code and its one definition. A comparison
#: of two waves (tracker.changes.VERDICTS) and a series (tracker.trends.PATTERNS) have their own.
GAP_VERDICTS = {
    "higher": "significant after adjustment: the first side's whole adjusted interval of the difference lies "
              "above zero",
    "lower": "significant after adjustment: the first side's whole adjusted interval of the difference lies "
             "below zero",
    "differ": "the test across all levels of a split is significant after adjustment: the levels are not all "
              "alike (the pairwise rows say which differ)",
    "no difference found": "not significant after adjustment: the data do not show the sides apart (which does "
                           "not show them alike)",
    "not compared": "a side with no respondents, no sampling variance, or too few degrees of freedom",
}

COLUMNS = ["wave", "metric", "metric_label", "kind", "group", "comparison", "first", "second", "value_first",
           "value_second", "difference", "se", "df", "statistic", "p_raw", "p_adjusted", "adjusted_low",
           "adjusted_high", "adjusted_level", "base_first", "base_second", "verdict"]

REST = "rest of the sample"


@dataclass(frozen=True)
class TestedTable:
    """A table of tests adjusted in one family (``adjust``, ``level``), shown in a notebook by
    its readable view."""

    table: pd.DataFrame
    wave: str
    adjust: str
    level: float
    view: ClassVar[str] = "gaps"

    @property
    def n_tests(self) -> int:
        return int(self.table["p_adjusted"].notna().sum())

    def _repr_html_(self) -> str:
        from .notebook import show

        return show(self.table, self.view)._repr_html_()


@dataclass(frozen=True)
class WithinResult(TestedTable):
    """Every comparison of one call within a wave, and the family they were adjusted in."""


def _domains(book, table, groups: list[str]):
    """The domains compared: for each split, its levels and each level's rest of the sample.
    Returns (membership N x J, [(split, level name, is rest)])."""
    from .cells import group_matrix

    D, levels = group_matrix(book, table, groups)
    cols, names = [], []
    for j in range(1, D.shape[1]):
        cols += [D[:, j], ~D[:, j]]
        names += [(levels.group[j], levels.level[j], False), (levels.group[j], levels.level[j], True)]
    if not cols:
        return np.zeros((len(table), 0), bool), names
    return np.column_stack(cols), names


def _linearized(book, table, metrics, Dm, psu_id, P, cal=None):
    """Per metric: each domain's value, base, and PSU totals of its linearized values (P x J x M),
    and which PSUs hold each domain's base (P x J x M). A raked wave's totals (``cal``, from
    tracker.estimates.calibration_of) are those of the residuals of the regression on the raking
    margins, as the estimates' (tracker.estimates._calibration_correction)."""
    import scipy.sparse as sp

    from .cells import metric_matrix
    from .estimates import _calibration_correction, weights_of

    Y, E = metric_matrix(book, table, metrics)
    w = weights_of(book, table)
    N, J = Dm.shape
    M = len(metrics)
    Df = Dm.astype(float)
    we = E * w[:, None]
    sw = Df.T @ we
    with np.errstate(divide="ignore", invalid="ignore"):
        value = (Df.T @ (we * Y)) / sw
    base = Df.T @ E.astype(float)
    S = sp.csr_matrix((np.ones(N), (psu_id, np.arange(N))), shape=(P, N))
    # z of domain j and metric m: d_j w e (y - value_jm) / sw_jm, summed per PSU
    with np.errstate(divide="ignore", invalid="ignore"):
        z = Df[:, :, None] * (we[:, None, :] * (Y[:, None, :] - value[None]) / sw[None])
    z = np.where(np.isfinite(z), z, 0.0).reshape(N, J * M)
    totals = np.asarray(S @ z).reshape(P, J, M)
    if cal is not None:
        totals = totals - _calibration_correction(cal, Df, E.astype(float), np.where(E, Y, 0.0), w, value, sw,
                                                  psu_id, P)
    held = np.asarray(S @ (Df[:, :, None] * E[:, None, :]).reshape(N, J * M)).reshape(P, J, M) > 0
    return value, base, totals, held


@dataclass(frozen=True)
class WaveDomains:
    """One wave's subgroups and their rests as domains: values and bases (domains x metrics),
    the PSU totals of their linearized values (P x domains x metrics), which PSUs hold each
    domain's base, the PSUs' strata and finite population factors, and each PSU's key (its
    stratum and cluster label, or the respondent's id) for covariances with another wave."""

    wave: str
    names: list  # (split, level, is the level's rest)
    value: np.ndarray
    base: np.ndarray
    totals: np.ndarray
    held: np.ndarray
    psu_stratum: np.ndarray
    n_strata: int
    factor: np.ndarray | None
    keys: np.ndarray
    rule: str
    replicate_df: float | None = None  # with replicate weights: totals hold the replicates' deviations

    @property
    def design_df(self) -> float:
        if self.replicate_df is not None:
            return self.replicate_df
        return float(self.psu_stratum.size - self.n_strata)

    def psu_totals(self, columns: np.ndarray) -> PsuTotals:
        """The PSU totals of some combinations of domains: ``columns`` (P x M) already combined."""
        return PsuTotals(columns, self.psu_stratum, self.n_strata, self.factor)

    def cov(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """Covariance per metric of two combinations of this wave's PSU totals (P x M each);
        with replicate weights, of two combinations of the scaled replicate deviations."""
        if self.replicate_df is not None:
            return (a * b).sum(axis=0)
        own = np.arange(self.psu_stratum.size)
        return cross_wave_covariance(self.psu_totals(a), own, self.psu_totals(b), own, self.rule)[0]


def wave_domains(study, wave: str, metric_list: list, groups: list[str]) -> WaveDomains:
    """The domains of ``wave`` for ``metric_list`` over the splits ``groups`` (WaveDomains)."""
    from .estimates import SEP, calibration_of, design_labels, design_of, fpc_factor, population_of

    book = study.codebook
    table = study.load(wave)
    if book.replicates is not None:
        return _replicate_domains(book, table, wave, metric_list, groups)
    strata, psu = design_of(book, table)
    N = len(table)
    psu_id, psu_stratum, n_strata = psu_index(strata, psu if psu is not None else np.arange(N), N)
    P = psu_stratum.size
    pop = population_of(book, table)
    factor = fpc_factor(pop, psu_stratum[psu_id], np.bincount(psu_stratum, minlength=n_strata))
    Dm, names = _domains(book, table, groups)
    value, base, totals, held = _linearized(book, table, metric_list, Dm, psu_id, P,
                                            calibration_of(book, table))
    first = np.zeros(P, dtype=np.int64)
    first[psu_id[::-1]] = np.arange(N)[::-1]
    s_lab, c_lab = design_labels(book, table)
    if c_lab is not None:
        keys = np.asarray(c_lab[first], dtype=str)
        if s_lab is not None:
            keys = np.char.add(np.char.add(np.asarray(s_lab[first], dtype=str), SEP), keys)
    else:
        keys = table[book.id].astype(str).to_numpy()[first]
    return WaveDomains(wave, names, value, base, totals, held, psu_stratum, n_strata, factor, keys,
                       book.single_cluster_rule)


def _replicate_domains(book, table: pd.DataFrame, wave: str, metric_list: list, groups: list[str]) -> WaveDomains:
    """The domains of a replicate-weight wave: each domain's estimate under every replicate,
    kept as deviations scaled so that the sum of products of two combinations is their
    replicate covariance, scale * sum_r rscales_r (a_r - a_c)(b_r - b_c) (tracker.estimates,
    replicate variance); df the rank of the replicate weights minus one."""
    from .cells import metric_matrix
    from .estimates import replicate_deviations, weights_of

    reps = book.replicates
    Y, E = metric_matrix(book, table, metric_list)
    Dm, names = _domains(book, table, groups)
    W = table[list(reps.columns)].to_numpy(dtype=float)
    EY, Ef = np.where(E, Y, 0.0), E.astype(float)
    value, dev = replicate_deviations(reps, W, weights_of(book, table), Dm, EY, Ef)
    base = Dm.astype(float).T @ Ef
    R, J, M = dev.shape
    held = np.ones((R, J, M), bool)
    return WaveDomains(wave, names, value, base, dev, held, np.zeros(R, np.int64), 1, None,
                       np.arange(R).astype(str), book.single_cluster_rule, float(np.linalg.matrix_rank(W) - 1))


def compare_within(study, wave: str | None = None, metrics=None, by=None, adjust: str = "bh",
                   level: float = 0.95) -> WithinResult:
    """Compare subgroups within ``wave`` (the latest by default) for ``metrics`` over the
    splits ``by`` (every split by default): see the module's description."""
    check_adjust(adjust)
    check_level(level)
    wave = pick_wave(study, wave)
    metric_list = study.pick_metrics(metrics)
    groups = study.pick_groups(by)
    if not groups:
        raise TrackerError("the codebook declares no subgroup splits to compare")
    d = wave_domains(study, wave, metric_list, groups)
    rows = _pairs(d) + _across(d)
    out = _finish(rows, metric_list, wave, adjust, level)
    return WithinResult(out, wave, adjust, level)


def pick_wave(study, wave: str | None) -> str:
    """The wave asked for (the latest by default), refused by name when not stored."""
    labels = study.labels
    if not labels:
        raise TrackerError("the study holds no waves yet")
    wave = wave or labels[-1]
    if wave not in labels:
        raise TrackerError(f"wave {wave!r} is not stored (stored: {', '.join(labels)})")
    return wave


def split_levels(names: list) -> dict[str, list[int]]:
    """Each split's level domains (their positions among the domains), in order."""
    out: dict[str, list[int]] = {}
    for j, (g, _lev, rest) in enumerate(names):
        if not rest:
            out.setdefault(g, []).append(j)
    return out


def comparison_pairs(names: list) -> list[tuple[str, int, int, str]]:
    """(split, first, second, kind) of every comparison of two domains: each level against its
    rest (the domain after it), then the levels of each split pairwise."""
    out = []
    for g, levels in split_levels(names).items():
        out += [(g, j, j + 1, "against the rest") for j in levels]
        out += [(g, a, b, "pairwise") for i, a in enumerate(levels) for b in levels[i + 1:]]
    return out


def _pairs(d: WaveDomains) -> list[dict]:
    """Each level against its rest, and the levels of each split pairwise."""
    out = []
    for g, a, b, kind in comparison_pairs(d.names):  # a loop over pairs of subgroups; every metric at once
        ta, tb = d.totals[:, a, :], d.totals[:, b, :]
        df = pair_df(d, a, b)
        out.append({"group": g, "comparison": kind, "first": d.names[a][1],
                    "second": REST if kind == "against the rest" else d.names[b][1],
                    "value_first": d.value[a], "value_second": d.value[b], "var": d.cov(ta - tb, ta - tb), "df": df,
                    "base_first": d.base[a], "base_second": d.base[b], "statistic": None})
    return out


def adjusted_family(p: np.ndarray, var: np.ndarray, df: np.ndarray, adjust: str, level: float):
    """One family of comparisons adjusted together: (adjusted p, the level of the intervals that
    agree with the adjusted verdicts (tracker.methods.tests.family_level), SE, their half-width,
    significant)."""
    p_adj = adjust_pvalues(p, adjust)
    adj_level = family_level(p_adj, adjust, 1 - level)
    se = np.sqrt(np.where(var > 0, var, np.nan))
    half = critical(adj_level, np.where(df >= 1, df, 1.0)) * se
    return p_adj, adj_level, se, half, np.nan_to_num(p_adj, nan=1.0) <= 1 - level


def pair_df(d: WaveDomains, a: int, b: int) -> np.ndarray:
    """Degrees of freedom per metric of a comparison of domains a and b in one wave: the PSUs
    holding either side minus the strata holding them (R's degf of the design), or the
    replicates' df."""
    if d.replicate_df is not None:
        return np.full(d.value.shape[1], d.replicate_df)
    either = d.held[:, a, :] | d.held[:, b, :]
    return either.sum(axis=0) - _strata_holding(either, d.psu_stratum, d.n_strata)


def _strata_holding(held: np.ndarray, psu_stratum: np.ndarray, n_strata: int) -> np.ndarray:
    """How many strata hold a PSU marked in each column of ``held`` (P x M)."""
    import scipy.sparse as sp

    H = sp.csr_matrix((np.ones(psu_stratum.size), (psu_stratum, np.arange(psu_stratum.size))),
                      shape=(n_strata, psu_stratum.size))
    return (np.asarray(H @ held.astype(float)) > 0).sum(axis=0)


def _across(d: WaveDomains) -> list[dict]:
    """The Wald test that all levels of a split have the same value, per metric."""
    out = []
    M = d.value.shape[1]
    for g, levels in split_levels(d.names).items():
        K = len(levels)
        V = np.zeros((M, K, K))
        for i, a in enumerate(levels):  # K (K + 1) / 2 covariances, every metric at once
            for k, b in enumerate(levels[i:], start=i):
                V[:, i, k] = V[:, k, i] = d.cov(d.totals[:, a, :], d.totals[:, b, :])
        F, p = _wald(d.value[levels].T, V, d.base[levels].T, d.design_df)
        out.append({"group": g, "comparison": "across all levels", "first": f"all levels of {g}", "second": "",
                    "value_first": np.full(M, np.nan), "value_second": np.full(M, np.nan), "var": np.full(M, np.nan),
                    "df": np.full(M, d.design_df + 1 - K), "base_first": d.base[levels].sum(axis=0),
                    "base_second": np.full(M, np.nan), "statistic": F, "p": p})
    return out


def _wald(v: np.ndarray, V: np.ndarray, base: np.ndarray, design_df: float) -> tuple[np.ndarray, np.ndarray]:
    """Per row of ``v`` (metrics x K values, V their K x K covariances): the Wald F that the
    values with respondents are equal, and its p on (k - 1, design_df + 1 - k) df."""
    M = v.shape[0]
    F, p = np.full(M, np.nan), np.full(M, np.nan)
    for m in range(M):  # a loop over metrics for the K x K solve of each
        ok = (base[m] > 0) & np.isfinite(v[m])
        k = int(ok.sum())
        df2 = design_df + 1 - k
        if k < 2 or df2 < 1:
            continue
        C = np.hstack([np.eye(k - 1), -np.ones((k - 1, 1))])
        diff = C @ v[m, ok]
        cvc = C @ V[m][np.ix_(ok, ok)] @ C.T
        if np.linalg.matrix_rank(cvc) < k - 1:
            continue
        F[m] = float(diff @ np.linalg.solve(cvc, diff)) / (k - 1)
        p[m] = f_sf(F[m], k - 1, df2)
    return F, p


def _finish(rows: list[dict], metrics, wave: str, adjust: str, level: float) -> pd.DataFrame:
    """One table of every comparison, adjusted in one family, with verdicts."""
    if not rows:
        return pd.DataFrame(columns=COLUMNS)
    M = len(metrics)
    parts = []
    for r in rows:
        parts.append(pd.DataFrame({
            "metric": [m.name for m in metrics], "metric_label": [m.label for m in metrics],
            "kind": [m.kind for m in metrics], "group": r["group"], "comparison": r["comparison"],
            "first": r["first"], "second": r["second"], "value_first": r["value_first"],
            "value_second": r["value_second"], "var": r["var"], "df": np.broadcast_to(r["df"], M),
            "base_first": r["base_first"], "base_second": r["base_second"],
            "F": r["statistic"] if r["statistic"] is not None else np.full(M, np.nan),
            "p_across": r.get("p", np.full(M, np.nan))}))
    t = pd.concat(parts, ignore_index=True)
    diff = (t["value_first"] - t["value_second"]).to_numpy(float)
    var = t["var"].to_numpy(float)
    df = t["df"].to_numpy(float)
    pairwise = t["comparison"] != "across all levels"
    stat, p = difference_test(diff, var, df)
    testable = pairwise.to_numpy() & np.isfinite(diff) & (var > 0) & (df >= 1) \
        & (t["base_first"].to_numpy(float) > 0) & (t["base_second"].to_numpy(float) > 0)
    p = np.where(testable, p, np.nan)
    across = ~pairwise.to_numpy()
    p = np.where(across, t["p_across"].to_numpy(float), p)
    stat = np.where(across, t["F"].to_numpy(float), stat)
    p_adj, adj_level, se, half, sig = adjusted_family(p, var, df, adjust, level)
    verdict = np.where(np.isnan(p_adj), "not compared",
                       np.where(~sig, "no difference found",
                                np.where(across, "differ", np.where(diff > 0, "higher", "lower"))))
    out = pd.DataFrame({
        "wave": wave, "metric": t["metric"], "metric_label": t["metric_label"], "kind": t["kind"],
        "group": t["group"], "comparison": t["comparison"], "first": t["first"], "second": t["second"],
        "value_first": t["value_first"], "value_second": t["value_second"], "difference": diff, "se": se,
        "df": df, "statistic": stat, "p_raw": p, "p_adjusted": p_adj, "adjusted_low": diff - half,
        "adjusted_high": diff + half, "adjusted_level": adj_level, "base_first": t["base_first"],
        "base_second": t["base_second"], "verdict": verdict})
    return out[COLUMNS]
