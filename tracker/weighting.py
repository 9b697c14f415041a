"""Raking weights: iterative proportional fitting to population margins, with caps.

Method: Deming & Stephan (1940) iterative proportional fitting ("raking"). With a cap on
the ratio of final to base weight, bounded raking (Deville & Sarndal 1992, JASA 87:376,
section 3): the weights closest to the base weights in the raking distance among those that
meet the margins within the cap, found by Newton's method on the problem's convex dual (the
same solution as R survey's ``calibrate(calfun = "raking", bounds = )``). The margins are
checked against the ``ipfn`` package and the capped weights against R in the tests.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .cells import group_labels
from .codebook import Codebook, parse_cap  # noqa: F401 - parse_cap: the command line imports it from here
from .errors import TrackerError


@dataclass(frozen=True)
class RakeResult:
    weights: np.ndarray
    iterations: int
    max_margin_error: float
    converged: bool
    cap: tuple[float, float] | None
    targets: dict

    @property
    def efficiency(self) -> float:
        w = self.weights
        return float(w.sum() ** 2 / (w**2).sum() / w.size)

    def lines(self) -> list[str]:
        w = self.weights
        return [
            (f"raked to {', '.join(self.targets)} in {self.iterations} iterations; "
            f"largest margin error {self.max_margin_error:.2e}"),
            f"weights from {w.min():.3f} to {w.max():.3f}; weighting efficiency {self.efficiency:.1%}; "
            f"effective base {w.sum() ** 2 / (w**2).sum():,.1f}"
            + (f"; weight ratio capped to {self.cap[0]:g}:{self.cap[1]:g}" if self.cap else ""),
        ]

    def ledger_entry(self) -> dict:
        return {"kind": "raked", "targets": self.targets, "cap": list(self.cap) if self.cap else None,
                "iterations": self.iterations, "max_margin_error": self.max_margin_error}


def rake(labels: list[np.ndarray], targets: list[dict[str, float]], base: np.ndarray | None = None,
         cap: tuple[float, float] | None = None, tol: float = 1e-8, max_iter: int = 1000) -> RakeResult:
    """Rake weights so that each margin's weighted shares equal its targets.

    ``labels[k]`` gives each respondent's label on margin k; ``targets[k]`` maps label to
    population share (summing to 1). Weights keep the base total (the number of
    respondents when ``base`` is None). With ``cap=(lo, hi)`` the ratio of final to base
    weight is kept within [lo, hi] by bounded raking (the weights closest to the base ones
    in the raking distance that meet the margins within the cap: ``_bounded_raking``).
    """
    n = labels[0].size
    w0 = np.ones(n) if base is None else np.asarray(base, float)
    total = w0.sum()
    idx, tshare = [], []
    for lab, tgt in zip(labels, targets):
        keys = list(tgt)
        pos = {k: i for i, k in enumerate(keys)}
        code = np.array([pos.get(x, -1) for x in lab])
        idx.append(code)
        tshare.append(np.array([tgt[k] for k in keys]))
    if cap is not None:
        w, it, err = _bounded_raking(idx, tshare, w0, cap, tol, max_iter)
        return RakeResult(w, it, err, err < tol, cap, {})
    w = w0.copy()
    it = 0
    err = np.inf
    for it in range(1, max_iter + 1):
        for code, share in zip(idx, tshare):
            current = np.bincount(code, weights=w, minlength=share.size)
            w = w * (share * total / current)[code]
        err = _margin_error(idx, tshare, w)
        if err < tol:
            break
    return RakeResult(w * total / w.sum(), it, err, err < tol, cap, {})


def _margin_error(idx: list[np.ndarray], tshare: list[np.ndarray], w: np.ndarray) -> float:
    """The largest distance between a margin's weighted share and its target."""
    return max(float(np.abs(np.bincount(c, weights=w, minlength=s.size) / w.sum() - s).max())
               for c, s in zip(idx, tshare))


def _bounded_raking(idx: list[np.ndarray], tshare: list[np.ndarray], w0: np.ndarray,
                    cap: tuple[float, float], tol: float, max_iter: int) -> tuple[np.ndarray, int, float]:
    """Weights ``w0 * g`` minimising the raking distance sum w0 (g log g - g + 1) subject to
    the margins' totals and ``cap[0] <= g <= cap[1]`` (Deville & Sarndal 1992, section 3).

    The solution is g = clip(exp(x'lambda), lo, hi), x a respondent's margin indicators. The
    dual, D(lambda) = sum w0 psi(x'lambda) - lambda'T with psi the conjugate of the bounded
    distance (psi' = clip(exp(u), lo, hi)), is convex: Newton steps (a pseudo-inverse, since
    the margins share their total) with backtracking on D reach its minimum when the cap admits
    a solution; otherwise D falls without bound and the rounds run out (not converged).
    Respondent-level work is by bincount over each margin's codes (no dense indicator matrix).
    """
    lo, hi = cap
    total = w0.sum()
    sizes = [s.size for s in tshare]
    offsets = np.cumsum([0] + sizes[:-1])
    target = np.concatenate([s * total for s in tshare])
    lam = np.zeros(int(sum(sizes)))

    def state(lam):
        u = sum(lam[o + c] for o, c in zip(offsets, idx))
        g = np.clip(np.exp(np.minimum(u, 700.0)), lo, hi)
        psi = u * g - g * np.log(g) + g - 1.0  # the conjugate at u (g the clipped exponential)
        return u, g, float(w0 @ psi - lam @ target)

    def margins(weights):
        return np.concatenate([np.bincount(c, weights=weights, minlength=m) for c, m in zip(idx, sizes)])

    u, g, dual = state(lam)
    err = np.inf
    for it in range(1, max_iter + 1):
        grad = margins(w0 * g) - target
        inside = w0 * g * ((u > np.log(lo)) & (u < np.log(hi)))
        hess = np.empty((lam.size, lam.size))
        for a, (oa, ca, ma) in enumerate(zip(offsets, idx, sizes)):
            for b, (ob, cb, mb) in enumerate(zip(offsets, idx, sizes)):
                if b < a:
                    continue
                block = np.bincount(ca * mb + cb, weights=inside, minlength=ma * mb).reshape(ma, mb)
                hess[oa:oa + ma, ob:ob + mb] = block
                hess[ob:ob + mb, oa:oa + ma] = block.T
        # a small ridge: a label whose respondents are all at a bound has no curvature, and
        # the margins' shared total leaves one flat direction per extra margin (no gradient there)
        step = -np.linalg.solve(hess + 1e-9 * total * np.eye(lam.size), grad)
        t = 1.0
        slack = 1e-12 * (abs(dual) + total)  # near the solution the dual is flat to rounding
        while t > 1e-10:  # Armijo backtracking on the dual
            u_new, g_new, dual_new = state(lam + t * step)
            if dual_new <= dual + 1e-4 * t * float(grad @ step) + slack:
                break
            t /= 2
        lam, u, g, dual = lam + t * step, u_new, g_new, dual_new
        err = _margin_error(idx, tshare, w0 * g)
        if err < tol or t <= 1e-10:
            break
    return w0 * g, it, err


def rake_table(book: Codebook, table: pd.DataFrame, cap: tuple[float, float] | None = None,
               tol: float = 1e-8, max_iter: int = 1000) -> tuple[pd.DataFrame, RakeResult]:
    """Rake a harmonized wave to the codebook's targets; return the table with its new weights."""
    if not book.targets:
        raise TrackerError("codebook: targets: raking needs population targets in the codebook")
    if not book.weight:
        raise TrackerError("codebook: weight: raking needs a weight column name to store the weights under")
    if cap is None and book.rake.get("cap"):
        cap = book.rake["cap"]  # parsed with the codebook
    tol = float(book.rake.get("tolerance", tol))  # both checked and bounded with the codebook
    max_iter = int(book.rake.get("max_rounds", max_iter))
    labels, targets = [], []
    for gname, tgt in book.targets.items():
        lab = group_labels(book, table, gname)
        outside = np.array([x is None for x in lab])
        if outside.any():
            rows = ", ".join(str(i + 2) for i in np.flatnonzero(outside)[:5])
            var = book.groups[gname].variable
            raise TrackerError(f"raking: column {var}: {int(outside.sum())} respondent(s) fall in no label of "
                               f"{gname}, so they cannot be weighted to its targets [rows {rows}]")
        counts = pd.Series(lab).value_counts()
        empty = [k for k in tgt if counts.get(k, 0) == 0]
        if empty:
            raise TrackerError(f"raking: targets.{gname}: no respondents in {', '.join(empty)}, so its target "
                               f"cannot be met")
        labels.append(lab)
        targets.append(tgt)
    base = table[book.weight].to_numpy(float) if book.weight and book.weight in table.columns else None
    result = rake(labels, targets, base=base, cap=cap, tol=tol, max_iter=max_iter)
    if not result.converged:
        why = f" within the cap {cap[0]:g}:{cap[1]:g}" if cap else ""
        raise TrackerError(f"raking: the targets cannot be met{why} (largest margin error "
                           f"{result.max_margin_error:.3g} after {result.iterations} iterations)")
    result = RakeResult(result.weights, result.iterations, result.max_margin_error, True, cap, dict(book.targets))
    from .estimates import BASE_WEIGHT

    out = table.copy()
    out[BASE_WEIGHT] = base if base is not None else 1.0  # the variance regresses on the margins with them
    out[book.weight] = result.weights
    for col in (book.replicates.columns if book.replicates else ()):
        # each replicate raked to the same targets from its own weights (as R's rake on a
        # replicate design), so the replicates' spread carries the raking into every variance
        rep = rake(labels, targets, base=table[col].to_numpy(float), cap=cap, tol=tol, max_iter=max_iter)
        if not rep.converged or not np.isfinite(rep.weights).all():
            raise TrackerError(f"raking: replicate weight {col}: the targets cannot be met from its weights (a "
                               f"margin's level may hold only respondents the replicate leaves out)")
        out[col] = rep.weights
    return out, result
