"""Replicate weights built from a stored wave's design (strata, clusters, weights), for
analysts who want to hand them on with the data or analyse with them: the jackknife (JK1
without strata, JKn with them) and the rescaled bootstrap. The result says how to declare the
weights in a codebook (the key ``replicates``), so the tool itself can then use them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .errors import TrackerError

__all__ = ["BUILD_METHODS", "ReplicateSet", "build_replicates", "replicate_weights"]

#: The methods replicate weights can be built by, and what each is.
BUILD_METHODS = {
    "jk1": "delete-one-PSU jackknife for a design without strata",
    "jkn": "delete-one-PSU jackknife within strata",
    "bootstrap": "rescaled bootstrap of PSUs within strata",
}


#: The most replicate weights (respondents x replicates) built at once (400 MB of numbers).
MAX_CELLS = 50_000_000


@dataclass(frozen=True)
class ReplicateSet:
    """Replicate weights (respondents x replicates, named ``prefix``1..R, beside the ids), and
    the variance's multiplier and per-replicate scales the codebook needs."""

    weights: pd.DataFrame
    method: str
    scale: float
    rscales: tuple[float, ...]
    prefix: str
    from_unraked: bool = False  # built from the weights before the tool's raking (rake each replicate)

    def codebook_key(self) -> str:
        """The codebook lines that declare these weights (the key replicates)."""
        lines = ["replicates:", f"  method: {self.method}", f"  prefix: {self.prefix}",
                 f"  count: {len(self.rscales)}", f"  scale: {self.scale!r}"]
        if self.method == "jkn" or len(set(self.rscales)) > 1 or self.rscales[0] != 1.0:
            lines.append(f"  rscales: [{', '.join(repr(x) for x in self.rscales)}]")
        return "\n".join(lines) + "\n"


def build_replicates(weights: np.ndarray, strata: np.ndarray | None, psu: np.ndarray | None, method: str,
                     count: int = 200, seed: int = 1, fpc: np.ndarray | None = None) -> tuple[np.ndarray, float,
                                                                                            np.ndarray]:
    """Replicate weights of a stratified clustered sample (respondents x replicates), with the
    variance's scale and per-replicate scales, V = scale * sum_r rscales_r (theta_r - centre)^2.

    - ``jk1`` (no strata): replicate j sets PSU j's weights to 0 and multiplies the others by
      n / (n - 1); scale (n - 1) / n, rscales 1 - f with a finite population correction. R's
      ``as.svrepdesign(type = "JK1")`` (Wolter 2007, *Introduction to Variance Estimation*, ch. 4).
    - ``jkn``: replicate (h, j) sets PSU j of stratum h to 0 and multiplies the other PSUs of h by
      n_h / (n_h - 1), other strata unchanged; rscales (n_h - 1) / n_h, times 1 - f_h with a
      finite population correction (``fpc``: 1 - f_h per stratum); scale 1. R's
      ``as.svrepdesign(type = "JKn")``. A stratum with one PSU cannot be jackknifed.
    - ``bootstrap``: the rescaled bootstrap of Rao, Wu & Yue (1992, Survey Methodology 18:209)
      with n_h - 1 PSUs drawn with replacement in each stratum: a PSU drawn m times gets
      weight * m n_h / (n_h - 1); ``count`` replicates from numpy's generator seeded with
      ``seed``; scale 1 / (count - 1) about the replicates' mean (with the full-sample centre
      the variance is a little larger), rscales 1.

    ``weights``: the full-sample weights; ``strata``, ``psu``: codes per respondent (None: one
    stratum, each respondent its own PSU).
    """
    from .methods.variance import psu_index

    n = len(weights)
    psu_id, psu_stratum, n_strata = psu_index(strata, psu, n)
    P = psu_stratum.size
    n_h = np.bincount(psu_stratum, minlength=n_strata)
    if method == "jk1" and n_strata > 1:
        raise TrackerError("the JK1 jackknife is for a design without strata: use jkn")
    if method in ("jk1", "jkn") and (n_h < 2).any():
        raise TrackerError(f"{int((n_h < 2).sum())} stratum(s) hold a single PSU: a jackknife cannot drop it "
                           "(merge such strata, or build a bootstrap)")
    if method == "bootstrap" and (n_h < 2).any():
        raise TrackerError(f"{int((n_h < 2).sum())} stratum(s) hold a single PSU: the bootstrap draws n_h - 1 of "
                           "them (merge such strata)")
    if method in ("jk1", "jkn"):
        if n * P > MAX_CELLS:
            raise TrackerError(f"a jackknife of {P:,} PSUs makes {P:,} replicate weights for each of {n:,} "
                               f"respondents ({n * P:,} numbers): build a bootstrap with fewer replicates")
        # PSU x replicate multipliers: replicate j drops PSU j and grows the rest of its stratum
        same = psu_stratum[:, None] == psu_stratum[None, :]
        grow = (n_h / (n_h - 1))[psu_stratum]
        factor = np.where(same, grow[None, :], 1.0)
        factor[np.arange(P), np.arange(P)] = 0.0
        if method == "jk1":
            rscales = np.ones(P) * (1.0 if fpc is None else float(np.asarray(fpc, float)[0]))
            return weights[:, None] * factor[psu_id], (P - 1) / P, rscales
        rscales = ((n_h - 1) / n_h)[psu_stratum] * (1.0 if fpc is None else np.asarray(fpc, float)[psu_stratum])
        return weights[:, None] * factor[psu_id], 1.0, rscales
    if method != "bootstrap":
        raise TrackerError(f"method {method!r}: give one of {', '.join(BUILD_METHODS)}")
    if count < 2:
        raise TrackerError(f"count {count}: give 2 or more replicates")
    rng = np.random.default_rng(seed)
    draws = np.zeros((P, count))
    for h in range(n_strata):  # a loop over strata: every replicate's draws at once
        members = np.flatnonzero(psu_stratum == h)
        picked = rng.integers(0, members.size, size=(count, members.size - 1))
        counts = np.apply_along_axis(np.bincount, 1, picked, minlength=members.size)  # replicates x PSUs of h
        draws[members] = counts.T * members.size / (members.size - 1)
    return weights[:, None] * draws[psu_id], 1.0 / (count - 1), np.ones(count)


def replicate_weights(study, wave: str, method: str, count: int = 200, seed: int = 1,
                      prefix: str = "rw") -> ReplicateSet:
    """Replicate weights for a stored ``wave`` of ``study`` from its codebook's design
    (:func:`build_replicates`), one row per respondent beside its id. A wave the tool raked
    gets replicates of its weights before raking (``from_unraked``): each must then be raked
    to the same targets, as the tool does when the codebook declares them."""
    from .estimates import BASE_WEIGHT, design_of, fpc_factor, population_of, weights_of
    from .methods.variance import psu_index

    book = study.codebook
    if book.replicates is not None:
        raise TrackerError("the study already carries replicate weights (the codebook's key replicates)")
    if method not in BUILD_METHODS:
        raise TrackerError(f"method {method!r}: give one of {', '.join(BUILD_METHODS)}")
    if wave not in study.labels:
        raise TrackerError(f"wave {wave!r} is not stored; stored: {', '.join(study.labels)}")
    table = study.waves_on_disk.load(wave)
    strata, psu = design_of(book, table)
    # a wave the tool raked: the replicates start from the weights before raking, so that
    # raking each replicate to the same targets carries the raking into the variance
    raked = BASE_WEIGHT in table.columns
    w = table[BASE_WEIGHT].to_numpy(float) if raked else weights_of(book, table)
    fpc = None
    pop = population_of(book, table)
    if pop is not None:
        psu_id, psu_stratum, n_strata = psu_index(strata, psu, len(table))
        fpc = fpc_factor(pop, psu_stratum[psu_id], np.bincount(psu_stratum, minlength=n_strata))
    W, scale, rscales = build_replicates(w, strata, psu, method, count, seed, fpc)
    frame = pd.DataFrame(W, columns=[f"{prefix}{k + 1}" for k in range(W.shape[1])])
    frame.insert(0, book.id, table[book.id].to_numpy())
    return ReplicateSet(frame, method, float(scale), tuple(float(x) for x in rscales), prefix, raked)
