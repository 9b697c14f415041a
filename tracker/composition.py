"""Sample make-up: composition shifts between waves, and mix-adjusted change.

A measure can move only because the sample's make-up moved. This module compares the mix
of two waves on the codebook's profile groups (Rao-Scott corrected chi-square) and splits
a change into a part due to the mix on one group and a part within its levels (Kitagawa
1955), with the change standardised to the earlier wave's mix and its test.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy import stats

from .cells import group_labels
from .codebook import Codebook
from .estimates import cell_stats, design_of, weights_of
from .significance import ADJUST_METHODS, adjust_pvalues


def taylor_covariance(z: np.ndarray, strata: np.ndarray | None, psu: np.ndarray | None) -> np.ndarray:
    """Covariance matrix (K x K) of the totals of linearized values z (N x K): the
    with-replacement estimator of :func:`tracker.estimates.taylor_variance`, with cross
    products (Wolter 2007, ch. 6)."""
    n, k = z.shape
    strata = np.zeros(n, dtype=np.int64) if strata is None else np.asarray(strata)
    if psu is None:
        totals, psu_stratum = z, strata
    else:
        _, psu_id = np.unique(np.stack([strata, psu]), axis=1, return_inverse=True)
        psu_id = psu_id.ravel()
        n_psu = psu_id.max() + 1
        totals = sp.csr_matrix((np.ones(n), (psu_id, np.arange(n))), shape=(n_psu, n)) @ z
        psu_stratum = np.zeros(n_psu, dtype=np.int64)
        psu_stratum[psu_id] = strata
    cov = np.zeros((k, k))
    for h in np.unique(psu_stratum):  # a loop over strata
        t = totals[psu_stratum == h]
        m = t.shape[0]
        if m < 2:
            continue
        c = t - t.mean(axis=0)
        cov += m / (m - 1) * c.T @ c
    return cov


def share_covariance(labels: np.ndarray, levels: list[str], w: np.ndarray, strata, psu) -> tuple[np.ndarray, np.ndarray]:
    """Weighted shares of each level among respondents with a label, and their Taylor covariance."""
    inside = np.isin(labels, levels)
    Y = np.column_stack([(labels == lev) for lev in levels]).astype(float)
    W = max((w * inside).sum(), np.finfo(float).tiny)
    p = (w[:, None] * Y * inside[:, None]).sum(axis=0) / W
    z = (w * inside)[:, None] * (Y - p) / W
    return p, taylor_covariance(z, strata, psu)


def rao_scott(p1, V1, n1, p2, V2, n2, V1_srs, V2_srs) -> tuple[float, float, float, int]:
    """First-order Rao-Scott corrected chi-square for equal distributions in two independent samples.

    Pearson's X^2 is computed from the (weighted) shares and the unweighted bases; it is
    divided by the mean generalized design effect delta = tr(P^-1 V) / (C - 1), where V is
    the design covariance of the difference of shares and P the covariance the same data
    would give as a simple random sample (Rao & Scott 1981, JASA 76:221; 1984, Ann Stat
    12:46). X^2 / delta is referred to chi-square on C - 1 df. With equal weights and no
    design, V = P, delta = 1 and this is Pearson's chi-square (scipy ``chi2_contingency``,
    no continuity correction). Returns (X^2 corrected, delta, p, df).
    """
    p1, p2 = np.asarray(p1, float), np.asarray(p2, float)
    keep = (p1 + p2) > 0
    p1, p2 = p1[keep], p2[keep]
    C = p1.size
    if C < 2:
        return 0.0, 1.0, 1.0, 0
    pbar = (n1 * p1 + n2 * p2) / (n1 + n2)
    x2 = float(n1 * ((p1 - pbar) ** 2 / pbar).sum() + n2 * ((p2 - pbar) ** 2 / pbar).sum())
    idx = np.flatnonzero(keep)[:-1]  # C - 1 free shares
    V = (V1 + V2)[np.ix_(idx, idx)]
    P = (V1_srs + V2_srs)[np.ix_(idx, idx)]
    delta = float(np.trace(np.linalg.pinv(P) @ V) / (C - 1))
    corrected = x2 / delta if delta > 0 else x2
    return corrected, delta, float(stats.chi2.sf(corrected, C - 1)), C - 1


@dataclass(frozen=True)
class CompositionResult:
    """The make-up of two waves on the profile groups, with one test per group."""

    shares: pd.DataFrame   # one row per group x level
    tests: pd.DataFrame    # one row per group
    wave: str
    against: str
    adjust: str
    level: float

    def shifted(self) -> pd.DataFrame:
        return self.tests[self.tests["shifted"]]

    def lines(self) -> list[str]:
        out = []
        for r in self.tests.itertuples():
            verdict = "shifted" if r.shifted else "no clear shift"
            out.append(f"{r.group}: {verdict} (weighted mix: Rao-Scott chi-square {r.chi2_weighted:.1f} on {r.df} df, "
                       f"adjusted p {r.p_adjusted:.4f}; unweighted mix p {r.p_unweighted:.4f}); "
                       f"largest move: {r.largest_move}")
        out.append(f"{len(self.tests)} profile groups tested, {int(self.tests['shifted'].sum())} shifted, after "
                   f"{ADJUST_METHODS[self.adjust]} adjustment at the {1 - self.level:g} level.")
        return out


def compare_composition(book: Codebook, a: pd.DataFrame, b: pd.DataFrame, wave_a: str, wave_b: str,
                        groups: list[str] | None = None, adjust: str = "bh", level: float = 0.95) -> CompositionResult:
    """Compare the make-up of wave b (later) with wave a on each profile group, unweighted and weighted."""
    groups = list(groups if groups is not None else book.profile)
    share_rows, test_rows = [], []
    for g in groups:
        levels = list(book.groups[g].levels)
        stats_ = {}
        for key, table in (("from", a), ("to", b)):
            labels = group_labels(book, table, g)
            w = weights_of(book, table)
            strata, psu = design_of(book, table)
            inside = np.isin(labels, levels)
            n = int(inside.sum())
            pw, Vw = share_covariance(labels, levels, w, strata, psu)
            pu, Vu = share_covariance(labels, levels, np.ones(len(table)), None, None)
            stats_[key] = (n, pw, Vw, pu, Vu)
        (n1, pw1, Vw1, pu1, Vu1), (n2, pw2, Vw2, pu2, Vu2) = stats_["from"], stats_["to"]
        if n1 == 0 or n2 == 0:  # the group's variable is not in one of the waves
            continue
        chi_w, delta, p_w, df = rao_scott(pw1, Vw1, n1, pw2, Vw2, n2, Vu1, Vu2)
        chi_u, _, p_u, _ = rao_scott(pu1, Vu1, n1, pu2, Vu2, n2, Vu1, Vu2)
        moves = pw2 - pw1
        j = int(np.argmax(np.abs(moves)))
        test_rows.append({"group": g, "base_from": n1, "base_to": n2, "chi2_weighted": chi_w, "design_effect": delta,
                          "df": df, "p_weighted": p_w, "chi2_unweighted": chi_u, "p_unweighted": p_u,
                          "largest_move": f"{levels[j]} {pw1[j]:.0%} to {pw2[j]:.0%}"})
        for k, lev in enumerate(levels):
            share_rows.append({"group": g, "level": lev, "share_from_unweighted": pu1[k], "share_to_unweighted": pu2[k],
                               "share_from_weighted": pw1[k], "share_to_weighted": pw2[k],
                               "move_weighted": pw2[k] - pw1[k], "move_unweighted": pu2[k] - pu1[k]})
    tests = pd.DataFrame(test_rows, columns=["group", "base_from", "base_to", "chi2_weighted", "design_effect", "df",
                                             "p_weighted", "chi2_unweighted", "p_unweighted", "largest_move"])
    tests["p_adjusted"] = adjust_pvalues(tests["p_weighted"].to_numpy(float), adjust)
    tests["shifted"] = tests["p_adjusted"] <= 1 - level
    shares = pd.DataFrame(share_rows)
    if len(shares):
        shares = shares.reindex(shares["move_weighted"].abs().sort_values(ascending=False, kind="mergesort").index)
    return CompositionResult(shares.reset_index(drop=True), tests, wave_b, wave_a, adjust, level)


# -- mix-adjusted change ---------------------------------------------------------------------

def kitagawa(s_a, p_a, s_b, p_b) -> tuple[float, float]:
    """Kitagawa (1955, JASA 50:1168) decomposition of p_b - p_a, where p = sum s_g p_g:
    mix = sum (s_b - s_a)(p_a + p_b)/2, within = sum (p_b - p_a)(s_a + s_b)/2.
    The two parts sum exactly to the total change."""
    s_a, p_a, s_b, p_b = (np.nan_to_num(np.asarray(x, float)) for x in (s_a, p_a, s_b, p_b))
    mix = float(((s_b - s_a) * (p_a + p_b) / 2).sum())
    within = float(((p_b - p_a) * (s_a + s_b) / 2).sum())
    return mix, within


def mix_table(book: Codebook, a: pd.DataFrame, b: pd.DataFrame, metrics: list, var: str,
              level: float = 0.95) -> pd.DataFrame:
    """For each metric in total: the change split into mix on ``var`` and within its levels,
    and the standardised change (the later wave re-weighted to the earlier wave's mix on
    ``var``) with its z test.

    Respondents with no label on ``var`` form a level of their own, so the parts add up to
    the whole change. The standardised change sum_g s_a,g (p_b,g - p_a,g) treats the earlier
    wave's mix as a fixed standard and the levels' estimates as independent, so its
    variance is sum_g s_a,g^2 (v_a,g + v_b,g) (direct standardisation; common practice,
    no source).
    """
    ca = cell_stats(book, a, metrics, [var], residual=True)
    cb = cell_stats(book, b, metrics, [var], residual=True)
    rows = []
    z = stats.norm.ppf(0.5 + level / 2)
    for m in metrics:  # a loop over metrics; levels are arrays
        ta = ca[(ca["metric"] == m.name) & (ca["group"] == var)]
        tb = cb[(cb["metric"] == m.name) & (cb["group"] == var)]
        tot_a = ca[(ca["metric"] == m.name) & (ca["group"] == "total")].iloc[0]
        tot_b = cb[(cb["metric"] == m.name) & (cb["group"] == "total")].iloc[0]
        if tot_a["base"] == 0 or tot_b["base"] == 0:
            continue
        s_a = ta["weighted_base"].to_numpy() / tot_a["weighted_base"]
        s_b = tb["weighted_base"].to_numpy() / tot_b["weighted_base"]
        p_a, p_b = ta["value"].to_numpy(), tb["value"].to_numpy()
        mix, within = kitagawa(s_a, p_a, s_b, p_b)
        usable = (s_a > 0) & (s_b > 0)
        std_change = float((s_a * np.where(usable, p_b - p_a, 0.0)).sum())
        std_var = float((s_a**2 * np.where(usable, ta["variance"].to_numpy() + tb["variance"].to_numpy(), 0.0)).sum())
        se = np.sqrt(std_var)
        p = float(2 * stats.norm.sf(abs(std_change) / se)) if se > 0 else np.nan
        lost = float(s_a[~usable].sum())
        rows.append({"metric": m.name, "metric_label": m.label, "kind": m.kind, "mix_variable": var,
                     "change": float(tot_b["value"] - tot_a["value"]), "mix_part": mix, "within_part": within,
                     "standardised_change": std_change, "standardised_low": std_change - z * se,
                     "standardised_high": std_change + z * se, "standardised_p": p,
                     "share_without_match": lost})
    return pd.DataFrame(rows)

