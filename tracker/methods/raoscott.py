"""The Rao-Scott test of a two-way table under a complex design."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .distributions import chi2_sf, f_sf

__all__ = ["RaoScott", "rao_scott_table"]


@dataclass(frozen=True)
class RaoScott:
    """Pearson's X^2 of the weighted table and its design corrections."""

    pearson: float      # X^2 of the weighted table scaled to the sample size (uncorrected)
    mean_deff: float    # mean generalized design effect, tr(Delta) / d
    chi2: float         # first-order corrected X^2 / mean_deff, on d df
    chi2_df: int
    chi2_p: float
    f: float            # second-order F = X^2 / tr(Delta)
    f_df_num: float
    f_df_den: float
    f_p: float


def rao_scott_table(cell_shares: np.ndarray, cov: np.ndarray, n: int, design_df: float, rows: int,
                    cols: int) -> RaoScott:
    """Rao-Scott test of independence of a rows x cols table (Rao & Scott 1981, JASA
    76:221; 1984, Ann Stat 12:46), in the form of R survey's ``svychisq`` (Lumley 2010,
    *Complex Surveys*, ch. 6), which the svy package's ``categorical.tabulate`` reports.

    ``cell_shares``: weighted cell shares (row-major, summing to 1); ``cov``: their Taylor
    covariance; ``n``: respondents; ``design_df``: PSUs minus strata. With D the diagonal
    of the shares and C the interaction contrasts made orthogonal to the main effects,
    Delta = (C' D^-1 C / n)^-1 C' D^-1 V D^-1 C, evaluated at the weighted shares (so a
    group that the weights correct is judged on its weighted share). First order:
    X^2 / mean(eig Delta) on d = (rows - 1)(cols - 1) df. Second order (the verdict): F =
    X^2 / tr(Delta) on (d0, d0 x design df) df, d0 = tr(Delta)^2 / tr(Delta^2). With equal
    weights and no design, Delta = I and the first order is Pearson's chi-square (scipy
    ``chi2_contingency``, no continuity correction).
    """
    pi = np.asarray(cell_shares, float)
    r_idx = np.repeat(np.arange(rows), cols)
    c_idx = np.tile(np.arange(cols), rows)
    X1 = np.column_stack([np.ones(rows * cols)] + [(r_idx == r).astype(float) for r in range(1, rows)]
                         + [(c_idx == c).astype(float) for c in range(1, cols)])
    X12 = np.column_stack([((r_idx == r) & (c_idx == c)).astype(float)
                           for r in range(1, rows) for c in range(1, cols)])
    Q, _ = np.linalg.qr(X1)
    C = X12 - Q @ (Q.T @ X12)
    inv = np.where(pi > 0, 1.0 / np.where(pi > 0, pi, 1.0), 0.0)
    denom = (C.T * inv) @ C / n
    numer = (C.T * inv) @ cov @ (inv[:, None] * C)
    delta = np.linalg.solve(denom, numer)
    tr, tr2 = float(np.trace(delta)), float(np.trace(delta @ delta))
    table = (pi * n).reshape(rows, cols)
    expected = np.outer(table.sum(axis=1), table.sum(axis=0)) / n
    with np.errstate(divide="ignore", invalid="ignore"):
        x2 = float(np.where(expected > 0, (table - expected) ** 2 / expected, 0.0).sum())
    d = (rows - 1) * (cols - 1)
    if not tr > 0:
        return RaoScott(x2, np.nan, np.nan, d, np.nan, np.nan, np.nan, np.nan, np.nan)
    mean_deff = tr / d
    d0 = tr * tr / tr2
    f = x2 / tr
    return RaoScott(x2, mean_deff, x2 / mean_deff, d, float(chi2_sf(x2 / mean_deff, d)),
                    f, d0, d0 * design_df, float(f_sf(f, d0, d0 * design_df)))
