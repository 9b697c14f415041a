"""Taylor (ultimate cluster) variance and covariance, and covariance across waves.

The linearized values z (respondents x cells) of an estimate are totalled over primary
sampling units (PSUs, the declared clusters, or respondents when none are declared); the
with-replacement estimator then compares PSU totals within each stratum (Wolter 2007,
*Introduction to Variance Estimation*, 2nd ed., ch. 6; the estimator of samplics
``TaylorEstimator`` and of the svy package). Everything here is numpy and scipy.sparse.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

__all__ = [
    "SINGLE_CLUSTER_RULES",
    "PsuTotals",
    "SingleClusterError",
    "combine_strata",
    "cross_wave_covariance",
    "psu_index",
    "psu_totals",
    "shared_per_cell",
    "single_cluster_strata",
    "taylor_covariance",
    "taylor_variance",
]

#: What a stratum holding a single PSU contributes to the variance (codebook key
#: ``single_cluster_strata``). Each rule is checked against the svy package's singleton
#: rule named in brackets (tests/test_design_variance.py).
from ..names import SINGLE_CLUSTER_RULES


class SingleClusterError(ValueError):
    """Raised under the 'refuse' rule; ``strata`` holds the stratum indices concerned."""

    def __init__(self, strata: np.ndarray):
        super().__init__(f"{len(strata)} stratum(s) hold a single cluster")
        self.strata = strata


def psu_index(strata: np.ndarray | None, psu: np.ndarray | None, n: int) -> tuple[np.ndarray, np.ndarray, int]:
    """(PSU of each respondent, stratum of each PSU, number of strata), all 0-based codes.

    PSUs are nested in strata: the same PSU label in two strata is two PSUs. With no PSUs
    each respondent is one; with no strata there is one stratum.
    """
    strata = np.zeros(n, dtype=np.int64) if strata is None else np.unique(strata, return_inverse=True)[1].ravel()
    if psu is None:
        return np.arange(n), strata, int(strata.max()) + 1 if n else 0
    psu_code = np.unique(psu, return_inverse=True)[1].ravel().astype(np.int64)
    # one integer key per (stratum, PSU): sorting it sorts the pairs as np.unique(axis=1) would
    _, psu_id = np.unique(strata.astype(np.int64) * (int(psu_code.max()) + 1) + psu_code, return_inverse=True)
    psu_id = psu_id.ravel()
    psu_stratum = np.zeros(int(psu_id.max()) + 1, dtype=np.int64)
    psu_stratum[psu_id] = strata
    return psu_id, psu_stratum, int(strata.max()) + 1


@dataclass(frozen=True)
class PsuTotals:
    """Totals of linearized values per PSU: ``totals`` (P x K) and each PSU's stratum (P,)."""

    totals: np.ndarray
    stratum: np.ndarray
    n_strata: int
    factor: np.ndarray | None = None  # per stratum, 1 - the sampling fraction (None: no correction)


def psu_totals(z: np.ndarray, strata: np.ndarray | None = None, psu: np.ndarray | None = None) -> PsuTotals:
    """Total the linearized values ``z`` (N x K) over PSUs."""
    n = z.shape[0]
    psu_id, psu_stratum, n_strata = psu_index(strata, psu, n)
    if psu is None:
        return PsuTotals(z, psu_stratum, n_strata)
    C = sp.csr_matrix((np.ones(n), (psu_id, np.arange(n))), shape=(psu_stratum.size, n))
    return PsuTotals(np.asarray(C @ z), psu_stratum, n_strata)


def _stratum_matrix(stratum: np.ndarray, n_strata: int) -> sp.csr_matrix:
    return sp.csr_matrix((np.ones(stratum.size), (stratum, np.arange(stratum.size))), shape=(n_strata, stratum.size))


def combine_strata(s1: np.ndarray, s2: np.ndarray, n_h: np.ndarray, rule: str = "centre",
                   present: np.ndarray | None = None, fpc: np.ndarray | None = None) -> np.ndarray:
    """The variance from per-stratum moments of PSU totals t: s1 = sum t, s2 = sum t^2 (H x K).

    A stratum with n_h >= 2 PSUs adds n_h / (n_h - 1) (s2 - s1^2 / n_h) (Wolter 2007, ch. 6).
    A stratum with one PSU adds, by ``rule``: 'centre', (t - t_bar)^2 with t_bar the mean
    of all PSU totals (the svy package's 'center', R survey's lonely.psu = "adjust");
    'average', the mean contribution of the strata with several PSUs (svy 'scale', R
    "average"): the sum scaled by the strata holding the column's cell over those of them
    with several PSUs in the design (``present``, H x K: which strata hold each cell;
    every stratum when not given), as R's ``onestage`` does for a domain; 'certainty',
    nothing (svy and samplics 'skip'); 'refuse' raises :class:`SingleClusterError`.

    ``fpc`` (H,): each stratum's finite population correction 1 - n_h / N_h, multiplying
    its contribution, as R's ``svydesign(fpc=)`` does (Cochran 1977, *Sampling Techniques*,
    section 5.3); None for sampling with replacement or from a population too large to matter.
    """
    n_h = np.asarray(n_h, float)
    g = np.ones(len(n_h)) if fpc is None else np.asarray(fpc, float)
    ok = n_h > 1
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.where(ok, g * n_h / (n_h - 1), 0.0)
        within = np.maximum(s2 - s1**2 / np.where(n_h > 0, n_h, 1)[:, None], 0.0)
    var = (f[:, None] * within).sum(axis=0)
    lone = n_h == 1
    if not lone.any():
        return var
    if rule == "centre":
        t_bar = s1.sum(axis=0) / n_h.sum()
        # one PSU: s1 = t and s2 = t^2, so (t - t_bar)^2 = s2 - 2 t_bar s1 + t_bar^2
        var = var + (g[lone][:, None] * (s2[lone] - 2 * t_bar * s1[lone] + t_bar**2)).sum(axis=0)
    elif rule == "average":
        held = (n_h > 0)[:, None] if present is None else np.asarray(present, bool)
        held = np.broadcast_to(held, s1.shape)
        n_held, n_ok = held.sum(axis=0), (held & ok[:, None]).sum(axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            var = np.where(n_ok > 0, var * n_held / np.where(n_ok > 0, n_ok, 1), np.nan)
    elif rule == "refuse":
        raise SingleClusterError(np.flatnonzero(lone))
    elif rule != "certainty":
        raise ValueError(f"unknown single-cluster rule {rule!r}; use one of {', '.join(SINGLE_CLUSTER_RULES)}")
    return var


def taylor_variance(z: np.ndarray, strata: np.ndarray | None = None, psu: np.ndarray | None = None,
                    rule: str = "centre", members: np.ndarray | None = None) -> np.ndarray:
    """Variance of the totals of linearized values ``z`` (N x K): one value per column.

    The with-replacement (ultimate cluster) estimator of :func:`combine_strata`, which
    samplics ``TaylorEstimator`` implements for strata with several PSUs (Wolter 2007, ch. 6).
    ``members`` (N x K, bool) says which respondents belong to each column's cell (a
    subgroup): the 'average' rule counts the strata that hold them.
    """
    t = psu_totals(np.asarray(z, float), strata, psu)
    H = _stratum_matrix(t.stratum, t.n_strata)
    n_h = np.bincount(t.stratum, minlength=t.n_strata)
    held = None
    if members is not None:
        row_stratum = np.zeros(len(z), dtype=np.int64) if strata is None else \
            np.unique(strata, return_inverse=True)[1].ravel()
        held = np.asarray(_stratum_matrix(row_stratum, t.n_strata) @ np.asarray(members, float)) > 0
    return combine_strata(np.asarray(H @ t.totals), np.asarray(H @ t.totals**2), n_h, rule, held)


def taylor_covariance(z: np.ndarray, strata: np.ndarray | None = None, psu: np.ndarray | None = None,
                      rule: str = "centre") -> np.ndarray:
    """Covariance matrix (K x K) of the totals of linearized values ``z`` (N x K): the
    estimator of :func:`taylor_variance` with cross products (Wolter 2007, ch. 6)."""
    t = psu_totals(np.asarray(z, float), strata, psu)
    k = t.totals.shape[1]
    cov = np.zeros((k, k))
    lone, n_ok = [], 0
    for h in range(t.n_strata):  # a loop over strata, not cells
        th = t.totals[t.stratum == h]
        m = th.shape[0]
        if m == 1:
            lone.append(h)
        elif m > 1:
            c = th - th.mean(axis=0)
            cov += m / (m - 1) * c.T @ c
            n_ok += 1
    if lone:
        if rule == "centre":
            c = t.totals[np.isin(t.stratum, lone)] - t.totals.mean(axis=0)
            cov += c.T @ c
        elif rule == "average":
            cov = cov * (n_ok + len(lone)) / n_ok if n_ok else np.full_like(cov, np.nan)
        elif rule == "refuse":
            raise SingleClusterError(np.array(lone))
    return cov


def single_cluster_strata(strata: np.ndarray | None, psu: np.ndarray | None,
                          members: np.ndarray | None = None) -> np.ndarray:
    """Indices (into ``np.unique(strata)``) of strata whose respondents sit in one PSU.

    With ``members`` (a boolean mask of respondents, e.g. a subgroup), only the strata
    where that subgroup's respondents all sit in a single PSU are returned (a stratum with
    none of them is not listed).
    """
    if strata is None or psu is None:
        return np.array([], dtype=np.int64)
    n = len(strata)
    psu_id, psu_stratum, n_strata = psu_index(strata, psu, n)
    if members is None:
        used = np.ones(psu_stratum.size, bool)
    else:
        used = np.bincount(psu_id, weights=np.asarray(members, float), minlength=psu_stratum.size) > 0
    per_stratum = np.bincount(psu_stratum, weights=used.astype(float), minlength=n_strata)
    return np.flatnonzero(per_stratum == 1)


def cross_wave_covariance(a: PsuTotals, keys_a: np.ndarray, b: PsuTotals, keys_b: np.ndarray,
                          rule: str = "centre") -> tuple[np.ndarray, int]:
    """Covariance of two waves' estimates from the PSUs they share (same stratum and label).

    ``a`` and ``b`` hold each wave's PSU totals of linearized values (P_a x K, P_b x K,
    columns the same cells); ``keys_a`` and ``keys_b`` name each PSU (stratum and cluster
    label, or respondent id when no clusters are declared). In each stratum h with n_a and
    n_b PSUs of which m are shared:

      Cov_h = f_h sum over shared c of (a_c - mean_h a)(b_c - mean_h b),
      f_h = 1 / (1 - 1/n_a - 1/n_b + m / (n_a n_b)),

    which is unbiased when the PSUs of each wave are independent draws and a shared PSU's
    two totals have a common covariance (derived in docs/methods.md, extending the
    overlapping-samples covariance of Kish 1965, *Survey Sampling*, section 12.4). With
    full overlap f_h = n / (n - 1), the factor of the variance, so a fully paired design
    gives the paired-test variance. A stratum with one PSU in either wave is centred at the
    grand mean with factor 1 under the 'centre' rule and adds nothing otherwise.
    Returns (covariance per column, number of shared PSUs).
    """
    common, ia, ib = np.intersect1d(keys_a, keys_b, assume_unique=True, return_indices=True)
    k = a.totals.shape[1]
    if common.size == 0:
        return np.zeros(k), 0
    cov = np.zeros(k)
    ha, hb = a.stratum[ia], b.stratum[ib]
    na = np.bincount(a.stratum, minlength=a.n_strata).astype(float)
    nb = np.bincount(b.stratum, minlength=b.n_strata).astype(float)
    mean_a = np.asarray(_stratum_matrix(a.stratum, a.n_strata) @ a.totals) / np.maximum(na, 1)[:, None]
    mean_b = np.asarray(_stratum_matrix(b.stratum, b.n_strata) @ b.totals) / np.maximum(nb, 1)[:, None]
    m = np.bincount(ha, minlength=a.n_strata).astype(float)  # shared PSUs per stratum (indexed by a's strata)
    n_a, n_b, m_h = na[ha], nb[hb], m[ha]
    lone = (n_a == 1) | (n_b == 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = 1.0 / (1 - 1 / n_a - 1 / n_b + m_h / (n_a * n_b))
    da = a.totals[ia] - mean_a[ha]
    db = b.totals[ib] - mean_b[hb]
    g = np.ones(len(ha)) if a.factor is None else np.asarray(a.factor, float)[ha]  # 1 - f_h, as the variances
    cov += (np.where(lone, 0.0, f * g)[:, None] * da * db).sum(axis=0)
    if lone.any() and rule == "centre":
        ga = a.totals.mean(axis=0)
        gb = b.totals.mean(axis=0)
        cov += (g[lone][:, None] * (a.totals[ia][lone] - ga) * (b.totals[ib][lone] - gb)).sum(axis=0)
    return cov, int(common.size)


def shared_per_cell(a: PsuTotals, keys_a: np.ndarray, b: PsuTotals, keys_b: np.ndarray) -> np.ndarray:
    """For each column (cell), the PSUs both waves share that hold respondents of the cell in
    both (a total of linearized values that is not zero in either wave): the PSUs a paired
    comparison of that cell counts once (see :func:`tracker.methods.tests.paired_df`)."""
    _, ia, ib = np.intersect1d(keys_a, keys_b, assume_unique=True, return_indices=True)
    if ia.size == 0:
        return np.zeros(a.totals.shape[1])
    return ((a.totals[ia] != 0) & (b.totals[ib] != 0)).sum(axis=0).astype(float)
