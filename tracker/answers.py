"""Whole distributions of a question: every answer code, or a number's spread and quartiles.

For a coded question (category, scale) each code's weighted share, by wave and subgroup,
with its base, effective base, standard error and interval, computed as the share metrics
of tracker.estimates are (the same Taylor variances, domain degrees of freedom and
intervals), once among the valid answers and once with the missing codes (don't know,
refused) in the base, so that both readings are shown and never confused. For a
multi-response question, each option's share among those who answered it. For a number,
the mean (with its interval), the standard deviation and the weighted quartiles with
Woodruff's intervals.

Computed from each wave's respondents (one read of the stored wave per call), not from the
cached cells: a distribution needs cells the codebook does not declare.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from .codebook import Codebook, Metric, Variable, _fmt_code
from .errors import TrackerError
from .methods.intervals import critical

__all__ = ["QUANTILES", "answer_shares", "number_summary", "weighted_quantile", "woodruff_interval"]

#: The quantiles a number's summary reports: the quartiles and the median.
QUANTILES = (0.25, 0.5, 0.75)

SHARE_COLUMNS = ["wave", "variable", "code", "answer", "missing_code", "in_base", "group", "subgroup", "value", "se",
                 "low", "high", "base", "effective_base", "flags"]


def _variable(study, name: str) -> Variable:
    book = study.codebook
    if name not in book.variables:
        known = ", ".join(sorted(book.variables)[:12])
        raise TrackerError(f"variable {name!r} is not in the codebook (known: {known} ...)")
    return book.variables[name]


def _wave_cells(study, book: Codebook, metrics: list[Metric], groups: list[str], waves: list[str], level: float):
    """The estimates rows of ad hoc ``metrics`` in ``waves`` (tracker.estimates.estimates_frame)."""
    from .estimates import cell_arrays, estimates_frame

    dates = study.dates()
    parts = [(w, dates[w], cell_arrays(book, study.load(w), metrics, groups)) for w in waves]
    return estimates_frame(parts, metrics, level)


def answer_shares(study, variable: str, waves=None, by=None, level: float = 0.95) -> pd.DataFrame:
    """Every code of a coded or multi-response variable: its weighted share in each wave and
    subgroup (SHARE_COLUMNS). ``in_base`` says whose share it is: 'valid answers' (missing
    codes and blanks left out, as every metric does) or 'with missing codes' (missing codes
    counted in the base, blanks still out); missing codes appear only in the second."""
    var = _variable(study, variable)
    if var.type not in ("category", "scale", "multi"):
        raise TrackerError(f"variable {variable} is a {var.type} variable: its distribution is a number's summary "
                           f"(mean, spread, quartiles), not shares of codes")
    book = study.codebook
    waves = study.pick_waves(waves)
    groups = study.pick_groups(by)
    frames = []
    if var.type == "multi":
        metrics = [Metric(f"@{o}", label, variable, "share", codes=(o,)) for o, label in var.options.items()]
        frames.append(_shares(study, book, metrics, groups, waves, level, var, "valid answers"))
    else:
        valid = [Metric(f"@{_fmt_code(c)}", label, variable, "share", codes=(c,)) for c, label in var.codes.items()]
        frames.append(_shares(study, book, valid, groups, waves, level, var, "valid answers"))
        if var.missing:
            # the missing codes counted as answers: the same variable with its missing codes among its codes
            wide = replace(var, codes={**var.codes, **var.missing}, missing={})
            book2 = replace(book, variables={**book.variables, variable: wide})
            every = [Metric(f"@{_fmt_code(c)}", label, variable, "share", codes=(c,))
                     for c, label in wide.codes.items()]
            frames.append(_shares(study, book2, every, groups, waves, level, var, "with missing codes"))
    out = pd.concat(frames, ignore_index=True)
    return out[out["base"] > 0].reset_index(drop=True)[SHARE_COLUMNS]


def _shares(study, book, metrics, groups, waves, level, var: Variable, in_base: str) -> pd.DataFrame:
    est = _wave_cells(study, book, metrics, groups, waves, level)
    code = est["metric"].str[1:]
    answers = {m.name: m.label for m in metrics}
    missing = {f"@{_fmt_code(c)}" for c in var.missing}
    return pd.DataFrame({
        "wave": est["wave"], "variable": var.name, "code": code, "answer": est["metric"].map(answers),
        "missing_code": est["metric"].isin(missing), "in_base": in_base, "group": est["group"],
        "subgroup": est["subgroup"], "value": est["value"], "se": est["se"], "low": est["ci_low"],
        "high": est["ci_high"],
        "base": est["base"], "effective_base": est["effective_base"], "flags": est["flags"]})


NUMBER_COLUMNS = ["wave", "variable", "group", "subgroup", "statistic", "value", "se", "low", "high", "base",
                  "design_df", "kind"]


def weighted_quantile(x: np.ndarray, w: np.ndarray, p):
    """The smallest x whose weighted share of values at or below it reaches p: the
    'mathematical' rule of R's survey package (``svyquantile(qrule="math")``: sort, cumulate
    the weights, take the last position whose cumulated weight is at most p times the total,
    and step on unless it equals p exactly). Zero weights are left out. ``p`` may be an array
    (one sort for all of them); a float for a scalar ``p``."""
    ps = np.atleast_1d(np.asarray(p, float))
    keep = w > 0
    x, w = x[keep], w[keep]
    if x.size == 0:
        out = np.full(ps.shape, np.nan)
    else:
        order = np.argsort(x, kind="stable")
        # cumulated in extended precision and rounded, as R's cumsum and sum do: with equal weights
        # p times the total often equals a cumulated weight exactly, and the rule steps on only if not
        running = np.cumsum(w[order].astype(np.longdouble))
        xs, cw, total = x[order], running.astype(float), float(running[-1])
        pos = np.searchsorted(cw, ps * total, side="right") - 1  # the last cumulated weight <= p total
        at = np.maximum(pos, 0)
        exact = (pos >= 0) & (ps - cw[at] / total == 0)
        out = np.where(pos < 0, xs[0], np.where(exact, xs[at], xs[np.minimum(pos + 1, xs.size - 1)]))
    return float(out[0]) if np.ndim(p) == 0 else out


def woodruff_interval(x: np.ndarray, w: np.ndarray, p_low, p_high):
    """Woodruff's interval for a quantile (Woodruff 1952, JASA 47:635; R's ``svyquantile``
    with interval.type="mean"): the interval of the share of values at or below the
    estimate, ``p_low`` to ``p_high`` (scalars or arrays), turned back into values by
    :func:`weighted_quantile`; NaN where it leaves [0, 1]."""
    lo, hi = np.asarray(p_low, float), np.asarray(p_high, float)
    bounds = np.concatenate([np.atleast_1d(lo), np.atleast_1d(hi)])
    inside = (bounds >= 0) & (bounds <= 1)
    got = np.where(inside, weighted_quantile(x, w, np.where(inside, bounds, 0.5)), np.nan)
    n = got.size // 2
    if np.ndim(p_low) == 0:
        return float(got[0]), float(got[1])
    return got[:n], got[n:]


def number_summary(study, variable: str, waves=None, by=None, level: float = 0.95) -> pd.DataFrame:
    """A number variable's mean (with its interval), standard deviation, and quartiles with
    Woodruff's intervals, by wave and subgroup (NUMBER_COLUMNS; one row per statistic).

    The standard deviation is the weighted one with R's ``svyvar`` divisor (n / (n - 1) times
    the weighted mean square about the mean); it carries no interval. A quartile's SE is the
    half-width of its interval over the t critical value, as ``svyquantile`` reports it; the
    t uses the cell's design degrees of freedom."""
    from .estimates import cell_arrays

    var = _variable(study, variable)
    if var.type != "number":
        raise TrackerError(f"variable {variable} is a {var.type} variable: its distribution is the shares of its "
                           f"codes (answers), not a number's summary")
    book = study.codebook
    waves = study.pick_waves(waves)
    groups = study.pick_groups(by)
    mean = Metric("@mean", "mean", variable, "mean")
    rows = []
    dates = study.dates()
    for wave in waves:  # a loop over waves: each wave's respondents are read once
        table = study.load(wave)
        if variable not in table.columns or not np.isfinite(table[variable].to_numpy(float)).any():
            raise TrackerError(f"variable {variable} has no values in wave {wave}; choose waves that asked it")
        cells = cell_arrays(book, table, [mean], groups)
        est = _finish(cells, [mean], wave, dates[wave], level)
        rows.append(_mean_rows(est, variable))
        rows.append(_quartile_rows(study, book, table, variable, groups, est, wave, level))
        rows.append(_band_rows(book, table, variable, groups, wave, dates[wave], level))
    out = pd.concat([r for r in rows if len(r)], ignore_index=True)
    out["kind"] = np.where(out["statistic"].str.startswith("share "), "share", "mean")
    return out[NUMBER_COLUMNS]


def _band_rows(book, table, variable, groups, wave, date, level) -> pd.DataFrame:
    """The share of each band of every split the codebook bands this number into (its
    'grouped bands'), among those with a value, estimated as share metrics."""
    from .estimates import cell_arrays, estimates_frame

    x = table[variable].to_numpy(float)
    frames = []
    for name, g in book.groups.items():
        if g.variable != variable or g.bands is None:
            continue
        code = np.full(len(table), np.nan)
        labels = list(g.bands)
        for k, lab in enumerate(labels, start=1):
            lo, hi = g.bands[lab]
            code[(x >= lo) & (x <= hi) & np.isnan(code)] = k
        code[np.isfinite(x) & np.isnan(code)] = 0  # a value in no band: in the base, in no band
        band = f"@band_{name}"
        var = Variable(band, band, "category", codes={float(k): lab for k, lab in enumerate(["(none)", *labels])})
        book2 = replace(book, variables={**book.variables, band: var})
        metrics = [Metric(f"@{k}", lab, band, "share", codes=(float(k),)) for k, lab in enumerate(labels, start=1)]
        est = estimates_frame([(wave, date, cell_arrays(book2, table.assign(**{band: code}), metrics, groups))],
                              metrics, level)
        est = est[est["base"] > 0]
        frames.append(pd.DataFrame({
            "wave": wave, "variable": variable, "group": est["group"], "subgroup": est["subgroup"],
            "statistic": "share " + est["metric_label"] + f" ({name})", "value": est["value"], "se": est["se"],
            "low": est["ci_low"], "high": est["ci_high"], "base": est["base"], "design_df": est["df"]}))
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()


def _finish(cells, metrics, wave, date, level):
    from .estimates import estimates_frame

    return estimates_frame([(wave, date, cells)], metrics, level)


def _mean_rows(est: pd.DataFrame, variable: str) -> pd.DataFrame:
    est = est[est["base"] > 0]
    n = est["base"].to_numpy(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        sd = np.sqrt(est["unit_variance"].to_numpy(float) * n / (n - 1))
    common = {"wave": est["wave"].to_numpy(), "variable": variable, "group": est["group"].to_numpy(),
              "subgroup": est["subgroup"].to_numpy(), "base": est["base"].to_numpy(),
              "design_df": est["design_df"].to_numpy()}
    a = pd.DataFrame({**common, "statistic": "mean", "value": est["value"].to_numpy(), "se": est["se"].to_numpy(),
                      "low": est["ci_low"].to_numpy(), "high": est["ci_high"].to_numpy()})
    b = pd.DataFrame({**common, "statistic": "standard deviation", "value": sd, "se": np.nan, "low": np.nan,
                      "high": np.nan})
    return pd.concat([a, b], ignore_index=True)


def _quartile_rows(study, book, table, variable, groups, est, wave, level) -> pd.DataFrame:
    """Each quartile of each cell, with Woodruff's interval: the share at or below the
    quartile is estimated (with its design SE) as a mean of 0/1 in the cell's domain."""
    from .cells import group_matrix
    from .estimates import cell_arrays, weights_of

    x = table[variable].to_numpy(float)
    var = book.variables[variable]
    ok = np.isfinite(x) & ~np.isin(x, list(var.missing))
    w = weights_of(book, table)
    D, levels = group_matrix(book, table, groups)
    q = np.full((D.shape[1], len(QUANTILES)), np.nan)
    for j in range(D.shape[1]):  # a loop over cells (levels), each one sort of its respondents
        inside = D[:, j] & ok
        if inside.any():
            q[j] = weighted_quantile(x[inside], w[inside], QUANTILES)
    # each split's levels are disjoint: one 0/1 column per split and quantile says "at or below
    # the quartile of my level" (the total is a split of one level)
    extra, names = {}, []
    splits: dict[str, list[int]] = {}
    for j, g in enumerate(levels.group):
        splits.setdefault(g, []).append(j)
    for g, cols in splits.items():
        for k in range(len(QUANTILES)):
            qi = np.full(len(table), np.nan)
            for j in cols:
                qi[D[:, j]] = q[j, k]
            name = f"@le_{g}_{k}"
            extra[name] = np.where(ok, (x <= qi).astype(float), np.nan)
            names.append(name)
    wide = table.assign(**extra)
    book2 = replace(book, variables={**book.variables, **{n: Variable(n, n, "number") for n in names}})
    metrics = [Metric(n, n, n, "mean") for n in names]
    cells = cell_arrays(book2, wide, metrics, groups)
    col = {n: i for i, n in enumerate(cells.metrics)}
    out = []
    for j, (g, lev) in enumerate(zip(levels.group, levels.level)):
        if not np.isfinite(q[j]).any():
            continue
        df = cells.stats["design_df"][j, col[f"@le_{g}_0"]]
        t = critical(level, df if df > 0 else None)
        idx = [col[f"@le_{g}_{k}"] for k in range(len(QUANTILES))]
        share, se = cells.stats["value"][j, idx], np.sqrt(cells.stats["variance"][j, idx])
        inside = D[:, j] & ok
        lows, highs = woodruff_interval(x[inside], w[inside], share - t * se, share + t * se)
        for k, p in enumerate(QUANTILES):
            out.append({"wave": wave, "variable": variable, "group": g, "subgroup": lev,
                        "statistic": {0.25: "lower quartile", 0.5: "median", 0.75: "upper quartile"}[p],
                        "value": q[j, k], "se": (highs[k] - lows[k]) / (2 * t), "low": lows[k], "high": highs[k],
                        "base": int(cells.stats["base"][j, idx[k]]), "design_df": df})
    return pd.DataFrame(out)


TEST_COLUMNS = ["wave", "variable", "group", "respondents", "pearson_chi2", "mean_design_effect", "f", "f_df_num",
                "f_df_den", "p_raw", "p_adjusted", "verdict"]


def distribution_tests(study, variable: str, waves=None, by=None, adjust: str = "bh", level: float = 0.95
                       ) -> pd.DataFrame:
    """Whether a coded question's answers are distributed alike in every level of a split: the
    Rao-Scott test of the (level x code) table of the valid answers (tracker.methods.raoscott,
    the second-order F of R's ``svychisq``), one per wave and split, adjusted together, with
    the verdicts of a test across levels (tracker.within.GAP_VERDICTS). A raked wave's shares
    are linearized by their residuals on the raking margins (Deville & Sarndal 1992), as its
    estimates."""
    from .cells import group_matrix
    from .estimates import calibration_of, design_of, weights_of
    from .methods.raoscott import rao_scott_table
    from .methods.tests import adjust_pvalues
    from .methods.variance import taylor_covariance
    from .options import check_adjust

    check_adjust(adjust)
    var = _variable(study, variable)
    if var.type not in ("category", "scale"):
        raise TrackerError(f"variable {variable}: only a coded question's answers are tested across subgroups")
    book = study.codebook
    groups = [g for g in study.pick_groups(by)]
    rows = []
    codes = np.array(sorted(var.codes), dtype=float)
    for wave in study.pick_waves(waves):  # a loop over waves and splits: one small table each
        table = study.load(wave)
        x = table[variable].to_numpy(float) if variable in table.columns else np.full(len(table), np.nan)
        w_all = weights_of(book, table)
        strata, psu = design_of(book, table)
        cal = calibration_of(book, table)
        for g in groups:
            D = group_matrix(book, table, [g])[0][:, 1:]
            inside = np.isin(x, codes) & D.any(axis=1)
            w = np.where(inside, w_all, 0.0)
            cells = (D[:, :, None] & (x[:, None, None] == codes[None, None, :])).reshape(len(x), -1).astype(float)
            W = w.sum()
            pi = (w[:, None] * cells).sum(axis=0) / W
            if book.replicates is not None:
                V, df = share_covariance(book.replicates, table, inside, cells, pi)
            else:
                z = w[:, None] * (cells - pi) / W
                if cal is not None:  # raked: the residuals of the regression on the margins (as the estimates)
                    u = np.where(inside[:, None], (cells - pi) / W, 0.0)
                    Mc, d = cal
                    b = np.linalg.pinv(Mc.T @ (Mc * d[:, None])) @ (Mc.T @ (u * d[:, None]))
                    z = w_all[:, None] * (u - Mc @ b)
                st = np.zeros(len(x), np.int64) if strata is None else strata
                ps = np.arange(len(x)) if psu is None else psu
                V = taylor_covariance(z, st, ps, book.single_cluster_rule)
                df = float(np.unique(ps[inside]).size - np.unique(st[inside]).size)
            rs = rao_scott_table(pi, V, int(inside.sum()), df, D.shape[1], len(codes))
            rows.append({"wave": wave, "variable": variable, "group": g, "respondents": int(inside.sum()),
                         "pearson_chi2": rs.pearson, "mean_design_effect": rs.mean_deff, "f": rs.f,
                         "f_df_num": rs.f_df_num, "f_df_den": rs.f_df_den, "p_raw": rs.f_p})
    out = pd.DataFrame(rows, columns=[c for c in TEST_COLUMNS if c not in ("p_adjusted", "verdict")])
    out["p_adjusted"] = adjust_pvalues(out["p_raw"].to_numpy(float), adjust)
    sig = np.nan_to_num(out["p_adjusted"].to_numpy(float), nan=1.0) <= 1 - level
    out["verdict"] = np.where(out["p_adjusted"].isna(), "not compared", np.where(sig, "differ", "no difference found"))
    return out[TEST_COLUMNS]


def share_covariance(reps, table: pd.DataFrame, inside: np.ndarray, cells: np.ndarray, pi: np.ndarray
                     ) -> tuple[np.ndarray, float]:
    """The replicate covariance of a table's weighted cell shares (each replicate's shares
    among the respondents ``inside``), scale * sum_r rscales_r (pi_r - c)(pi_r - c)', and the
    replicates' df (their rank minus one)."""
    W = table[list(reps.columns)].to_numpy(dtype=float) * inside[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        pis = (W.T @ cells) / W.sum(axis=0)[:, None]
    d = np.nan_to_num(pis - (pi[None] if reps.mse else pis.mean(axis=0)[None]))
    c = reps.scale * np.asarray(reps.rscales, float)
    full = table[list(reps.columns)].to_numpy(dtype=float)
    return (d * c[:, None]).T @ d, float(np.linalg.matrix_rank(full) - 1)
