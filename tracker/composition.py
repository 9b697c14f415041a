"""Sample make-up: composition shifts between waves, and mix-adjusted change.

A measure can move only because the sample's make-up moved. This module compares the mix
of two waves on the codebook's profile groups (Rao-Scott test of the stacked waves x
levels table, tracker.methods.raoscott) and splits
a change into a part due to the mix on one group and a part within its levels (Kitagawa
1955), with the change standardised to the earlier wave's mix and its test.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .cells import group_labels
from .codebook import Codebook
from .estimates import cell_stats, design_labels, weights_of
from .methods.distributions import norm_ppf, norm_sf
from .methods.raoscott import rao_scott_table
from .methods.tests import adjust_pvalues
from .methods.variance import taylor_covariance


def stacked_shares(labels: list[np.ndarray], levels: list[str], weights: list[np.ndarray], strata: list, psus: list,
                   rule: str = "centre") -> tuple[np.ndarray, np.ndarray, int, float, list[np.ndarray]]:
    """The waves x levels table of the stacked waves: cell shares, their Taylor covariance,
    the respondents with a label, the design degrees of freedom, and each wave's weighted
    level shares.

    Each wave's weights are scaled to sum to its respondents with a label (common
    practice, no source), so the table's rows weigh as the waves' sample sizes; each wave
    keeps its own strata and clusters (the waves are independent samples).
    """
    rows_w, rows_lab, st_all, ps_all, shares = [], [], [], [], []
    for k, (lab, w, st, ps) in enumerate(zip(labels, weights, strata, psus)):
        inside = np.isin(lab, levels)
        scale = inside.sum() / max(float((w * inside).sum()), np.finfo(float).tiny)
        ww = w * inside * scale
        rows_w.append(ww)
        shown = np.asarray(lab, dtype=object).copy()
        shown[~inside] = None
        rows_lab.append(shown)
        n_k = len(lab)
        st_all.append(np.char.add(f"{k}|", (np.zeros(n_k, int) if st is None else np.asarray(st)).astype(str)))
        ps_all.append(np.char.add(f"{k}|", (np.arange(n_k) if ps is None else np.asarray(ps)).astype(str)))
        shares.append(np.array([(ww * (lab == lev)).sum() for lev in levels]) / max(ww.sum(), np.finfo(float).tiny))
    R = len(labels)
    w = np.concatenate(rows_w)
    wave = np.repeat(np.arange(R), [len(x) for x in labels])
    lab = np.concatenate(rows_lab)
    cells = np.column_stack([(wave == r) & (lab == lev) for r in range(R) for lev in levels]).astype(float)
    W = w.sum()
    pi = (w[:, None] * cells).sum(axis=0) / W
    z = w[:, None] * (cells - pi) / W
    st_codes = pd.factorize(pd.Series(np.concatenate(st_all)))[0]
    ps_codes = pd.factorize(pd.Series(np.concatenate(ps_all)))[0]
    V = taylor_covariance(z, st_codes, ps_codes, rule)
    used = w > 0
    n = int(used.sum())
    df = float(np.unique(ps_codes[used]).size - np.unique(st_codes[used]).size)
    return pi, V, n, df, shares


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

    def table(self) -> pd.DataFrame:
        """One table for machine formats: a row per group x level, carrying its group's test."""
        tests = self.tests.drop(columns=["largest_move"]).rename(
            columns={c: f"test_{c}" for c in self.tests.columns if c not in ("group", "largest_move")})
        return self.shares.merge(tests, on="group", how="left")

    def lines(self) -> list[str]:
        """The make-up tests in lines (tracker.wording.composition_lines)."""
        from .wording import composition_lines

        return composition_lines(self)


TEST_COLUMNS = ["group", "base_from", "base_to", "pearson_chi2", "design_effect", "df", "chi2_corrected", "p_chi2",
                "f", "f_df_num", "f_df_den", "p", "largest_move"]


def _replicate_stacked(book: Codebook, tables, labs, levels) -> tuple[np.ndarray, float]:
    """The covariance of the stacked waves x levels shares from each wave's replicate weights
    (the waves independent: a block per wave, each scaled by the wave's share of the table),
    and the summed replicate degrees of freedom."""
    from .answers import share_covariance

    n = [int(np.isin(lab, levels).sum()) for lab in labs]
    blocks, df = [], 0.0
    for t, lab, n_k in zip(tables, labs, n):
        inside = np.isin(lab, levels)
        cells = np.column_stack([lab == lev for lev in levels]).astype(float)
        w = weights_of(book, t) * inside
        share = (w @ cells) / w.sum()
        cov, d = share_covariance(book.replicates, t, inside, cells, share)
        blocks.append(cov * (n_k / sum(n)) ** 2)
        df += d
    L = len(levels)
    V = np.zeros((2 * L, 2 * L))
    V[:L, :L], V[L:, L:] = blocks
    return V, df


def compare_composition(book: Codebook, a: pd.DataFrame, b: pd.DataFrame, wave_a: str, wave_b: str,
                        groups: list[str] | None = None, adjust: str = "bh", level: float = 0.95) -> CompositionResult:
    """Compare the weighted make-up of wave b (later) with wave a on each profile group.

    One Rao-Scott test per group on the stacked waves x levels table (tracker.methods.raoscott;
    the verdict reads the second-order F), adjusted across the groups by ``adjust``.
    """
    groups = list(groups if groups is not None else book.profile)
    share_rows, test_rows = [], []
    for g in groups:  # a loop over profile groups
        levels = list(book.groups[g].levels)
        labs = [group_labels(book, t, g) for t in (a, b)]
        n1, n2 = (int(np.isin(lab, levels).sum()) for lab in labs)
        if n1 == 0 or n2 == 0:  # the group's variable is not in one of the waves
            continue
        designs = [design_labels(book, t) for t in (a, b)]
        pi, V, n, df, (pw1, pw2) = stacked_shares(labs, levels, [weights_of(book, t) for t in (a, b)],
                                                  [d[0] for d in designs], [d[1] for d in designs],
                                                  book.single_cluster_rule)
        if book.replicates is not None:
            V, df = _replicate_stacked(book, (a, b), labs, levels)
        keep = np.tile((pw1 + pw2) > 0, 2)  # a level empty in both waves is not part of the table
        C = int(keep.sum() // 2)
        if C < 2:
            continue
        rs = rao_scott_table(pi[keep], V[np.ix_(keep, keep)], n, df, 2, C)
        pu1, pu2 = (np.array([(lab == lev).sum() for lev in levels]) / max(1, np.isin(lab, levels).sum())
                    for lab in labs)
        moves = pw2 - pw1
        j = int(np.argmax(np.abs(moves)))
        if abs(moves[j]) < 0.0005:  # weighting to targets holds the weighted shares: say so
            ju = int(np.argmax(np.abs(pu2 - pu1)))
            largest = (f"{levels[ju]} {pu1[ju]:.1%} to {pu2[ju]:.1%} unweighted (the weights hold the "
                       f"weighted shares at their targets)")
        else:
            largest = f"{levels[j]} {pw1[j]:.1%} to {pw2[j]:.1%}"
        test_rows.append({"group": g, "base_from": n1, "base_to": n2, "pearson_chi2": rs.pearson,
                          "design_effect": rs.mean_deff, "df": rs.chi2_df, "chi2_corrected": rs.chi2,
                          "p_chi2": rs.chi2_p, "f": rs.f, "f_df_num": rs.f_df_num, "f_df_den": rs.f_df_den,
                          "p": rs.f_p, "largest_move": largest})
        for k, lev in enumerate(levels):
            share_rows.append({"group": g, "level": lev, "share_from_unweighted": pu1[k], "share_to_unweighted": pu2[k],
                               "share_from_weighted": pw1[k], "share_to_weighted": pw2[k],
                               "move_weighted": pw2[k] - pw1[k], "move_unweighted": pu2[k] - pu1[k]})
    tests = pd.DataFrame(test_rows, columns=TEST_COLUMNS)
    tests["p_adjusted"] = adjust_pvalues(tests["p"].to_numpy(float), adjust)
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
    z = norm_ppf(0.5 + level / 2)
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
        p = float(2 * norm_sf(abs(std_change) / se)) if se > 0 else np.nan
        lost = float(s_a[~usable].sum())
        rows.append({"metric": m.name, "metric_label": m.label, "kind": m.kind, "mix_variable": var,
                     "change": float(tot_b["value"] - tot_a["value"]), "mix_part": mix, "within_part": within,
                     "standardised_change": std_change, "standardised_low": std_change - z * se,
                     "standardised_high": std_change + z * se, "standardised_p": p,
                     "share_without_match": lost})
    return pd.DataFrame(rows)

