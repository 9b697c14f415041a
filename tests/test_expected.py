"""Expected ranges of the next wave and surprises at intake (tracker.expected)."""

from __future__ import annotations

import shutil

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from tracker import Study
from tracker.cli import main
from tracker.expected import predict, surprise_table
from tracker.methods.distributions import t_ppf


def series_rows(values, ses, dates=None, metric="m", kind="share"):
    k = len(values)
    dates = dates or [f"{2020 + i // 4}-{3 * (i % 4) + 2:02d}-15" for i in range(k)]
    return pd.DataFrame({"metric": metric, "metric_label": metric, "kind": kind, "group": "total",
                         "subgroup": "Total", "wave": [f"W{i:02d}" for i in range(k)], "fieldwork_date": dates,
                         "value": values, "se": ses, "reliable": True, "base": 1000, "effective_base": 900.0})


def test_with_no_between_wave_variation_the_range_is_the_closed_form():
    # reference: statsmodels WLS with weights 1/v and the scale fixed at 1 (known variances):
    # its prediction and standard error at the new wave's time, plus the new wave's own v;
    # the t quantile's df is Satterthwaite's, here (k - 2) sd^4 / mean(v)^2
    import statsmodels.api as sm

    y = np.array([0.50, 0.51, 0.49, 0.50, 0.51, 0.50, 0.49, 0.50])
    se = np.array([0.02, 0.025, 0.02, 0.03, 0.02, 0.02, 0.025, 0.02])
    hist = series_rows(y, se)
    pats = pd.DataFrame({"metric": ["m"], "group": ["total"], "subgroup": ["Total"], "pattern": ["no pattern found"],
                         "shift_wave": [None], "blip_wave": [None]})
    v_new = pd.Series([0.02**2], index=pd.MultiIndex.from_tuples([("m", "total", "Total")]))
    got = predict(hist, pats, "2022-05-15", v_new).iloc[0]
    assert got["between_wave_sd"] == 0.0  # these waves vary less than their sampling error
    years = np.array([(pd.Timestamp(d) - pd.Timestamp(hist["fieldwork_date"][0])).days / 365.25
                      for d in [*hist["fieldwork_date"], "2022-05-15"]])
    X = sm.add_constant(years[:-1])
    fit = sm.WLS(y, X, weights=1 / se**2).fit(cov_type="fixed scale")
    ref = fit.get_prediction(np.array([[1.0, years[-1]]]))
    sd = np.sqrt(ref.se_mean[0] ** 2 + 0.02**2)
    df = (len(y) - 2) * sd**4 / np.mean(se**2) ** 2
    assert got["expected"] == pytest.approx(ref.predicted_mean[0], abs=1e-10)
    assert got["prediction_sd"] == pytest.approx(sd, abs=1e-10)
    assert got["df"] == pytest.approx(df, rel=1e-9)
    half = t_ppf(0.975, df) * sd
    assert (got["low"], got["high"]) == pytest.approx((got["expected"] - half, got["expected"] + half), abs=1e-12)


def test_a_wave_that_continues_its_trend_is_not_a_surprise_and_a_jump_is():
    years = np.arange(12) / 4
    y = 0.40 + 0.04 * years + np.array([0.004, -0.006, 0.003, 0.0, -0.004, 0.005, -0.002, 0.001, 0.003, -0.005,
                                        0.002, 0.0])
    hist = series_rows(y, np.full(12, 0.01))
    pats = pd.DataFrame({"metric": ["m"], "group": ["total"], "subgroup": ["Total"], "pattern": ["rising"],
                         "shift_wave": [None], "blip_wave": [None]})
    pred = predict(hist, pats, "2023-02-15")
    on_trend = 0.40 + 0.04 * 3.0
    assert pred["expected"].iloc[0] == pytest.approx(on_trend, abs=0.01)
    for value, expect in ((on_trend, False), (on_trend + 0.08, True)):
        new = series_rows([value], [0.01], ["2023-02-15"]).assign(wave="NEW")
        assert bool(surprise_table(pred, new)["surprise"].iloc[0]) is expect


def test_the_demo_expected_ranges(demo_study):
    t = demo_study.expected()
    for col in ("metric", "group", "subgroup", "low", "high", "expected", "basis"):
        assert col in t.columns
    assert len(t) == len(demo_study.trends())  # every series
    shares = t[t["kind"] == "share"]
    assert ((shares["low"] >= 0) & (shares["high"] <= 1) & (shares["low"] < shares["expected"])
            & (shares["expected"] < shares["high"])).all()
    assert t.attrs["date"] > demo_study.dates()[demo_study.labels[-1]]
    # a sample twice the size: the sampling part shrinks by sqrt(2), the rest stays
    rows = np.mean([demo_study.entry(w)["rows"] for w in demo_study.labels[-3:]])
    big = demo_study.expected(base=2 * rows)
    a = t.set_index(["metric", "group", "subgroup"])
    b = big.set_index(["metric", "group", "subgroup"])
    assert np.allclose(b["sampling_sd"], a["sampling_sd"] / np.sqrt(2), rtol=1e-9, equal_nan=True)
    assert np.allclose(b["between_wave_sd"], a["between_wave_sd"], equal_nan=True)


def test_the_demo_blip_is_a_surprise_when_its_wave_arrives(demo_study):
    # the demo plants a one-wave dip in clean_good at 2024-Q3 (tracker/demo.py docstring)
    t = demo_study.surprises("2024-Q3")
    hits = t[t["surprise"]]
    assert ("clean_good", "total") in set(zip(hits["metric"], hits["group"]))
    assert t["p_raw"].notna().sum() == 89  # one family: every reliable cell with a prediction
    # and the latest wave, which only continues its series, holds none
    assert not demo_study.surprises()["surprise"].any()


def test_a_wording_break_restarts_the_series(demo_study):
    # the demo's 'safe' question changed wording at 2024-Q1: that wave cannot be judged against the old wording
    t = demo_study.surprises("2024-Q1")
    safe = t[t["metric"] == "safe"]
    assert len(safe) and safe["p_raw"].isna().all()


def test_check_and_add_report_the_surprises_of_an_incoming_wave(demo_study, tmp_path):
    # replay: the study up to 2024-Q2, then the 2024-Q3 file arrives
    root = tmp_path / "study"
    shutil.copytree(demo_study.root, root)
    s = Study(root)
    source = tmp_path / "q3.parquet"
    s.load("2024-Q3").to_parquet(source)
    from tracker import store

    ledger = store.read_ledger(root)
    keep = [w for w in ledger["waves"] if w["date"] < s.dates()["2024-Q3"]]

    store.write_ledger(root, {**ledger, "waves": keep})
    shutil.rmtree(root / "cache", ignore_errors=True)
    out = CliRunner().invoke(main, ["check", str(root), str(source), "--wave", "2024-Q3", "--date",
                                    demo_study.dates()["2024-Q3"]])
    assert out.exit_code == 0, out.output
    assert "cells lie outside their expected range" in out.output
    assert "Cleanliness good or very good, in total:" in out.output
    report = Study(root).add(source, "2024-Q3", demo_study.dates()["2024-Q3"], allow_duplicate=True)
    assert any("Cleanliness good or very good, in total:" in line for line in report.lines())


def test_the_commands(demo_study, tmp_path):
    out = CliRunner().invoke(main, ["expect", str(demo_study.root), "--format", "csv", "--by", "total"])
    assert out.exit_code == 0, out.output
    head = out.output.splitlines()[0].split(",")
    assert head[:8] == ["metric", "metric_label", "kind", "group", "subgroup", "expected", "low", "high"]
    assert len(out.output.strip().splitlines()) == 1 + len(demo_study.codebook.metrics)
    bad = CliRunner().invoke(main, ["expect", str(demo_study.root), "--date", "2020-01-01"])
    assert bad.exit_code == 1 and "must come after the latest" in bad.output
    sur = CliRunner().invoke(main, ["surprises", str(demo_study.root), "--wave", "2024-Q3", "--format", "json"])
    assert sur.exit_code == 0
    import json

    rows = json.loads(sur.output)
    assert rows and all(r["surprise"] for r in rows)


def test_the_analysis_and_the_brief_json_carry_the_surprises(demo_study):
    doc = demo_study.analysis(wave="2024-Q3").to_dict()
    assert doc["surprises_tested"] == 89
    assert any(r["metric"] == "clean_good" and r["group"] == "total" for r in doc["surprises"])


def test_the_readme_shows_what_the_command_prints(demo_study):
    from pathlib import Path

    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text()
    block = readme.split("on the demo it finds the planted one-wave dip")[1].split("```")[1].strip().splitlines()
    out = CliRunner().invoke(main, ["surprises", str(demo_study.root), "--wave", "2024-Q3"]).output.splitlines()
    assert block[:4] == out[:4]


def _prediction_and_mixture(y: np.ndarray, dates: list[str], at: str, cycle: int, se: float = 0.016):
    """The tool's prediction of the wave at ``at`` and, for the same series, the seasons model's
    mixture recomputed by tests/seasonal_reference.py; with the new wave's design row."""
    from tracker.expected import predict
    from tracker.trends import fit_trends, season_columns

    from .seasonal_reference import mixture

    K = len(y)
    hist = pd.DataFrame({"metric": "m", "metric_label": "m", "kind": "share", "group": "total", "subgroup": "Total",
                         "wave": [f"W{i:02d}" for i in range(K)], "fieldwork_date": dates, "value": y, "se": se,
                         "reliable": True, "base": 1000, "effective_base": 900.0})
    pred = predict(hist, fit_trends(hist), at, cycle=cycle).iloc[0]
    years = np.array([(pd.Timestamp(d) - pd.Timestamp(dates[0])).days / 365.25 for d in dates])
    mean, cov, p_seasons = mixture(y, np.full(K, se**2), np.column_stack([np.ones(K), years - years.mean()]),
                                   season_columns(dates, cycle))
    t_new = (pd.Timestamp(at) - pd.Timestamp(dates[0])).days / 365.25 - years.mean()
    x_new = np.concatenate([[1.0, t_new], season_columns([at], cycle)[0]])
    return pred, float(x_new @ mean), float(x_new @ cov @ x_new), p_seasons


def test_seasonal_prediction_is_the_likelihood_weighted_mixture_of_mixed_models():
    # reference: tests/seasonal_reference.py recomputes the seasons model from the full data, its
    # likelihoods with scipy's multivariate normal and its fits with statsmodels WLS
    rng = np.random.default_rng(8)
    K, se = 30, 0.016
    dates = [f"{2010 + i // 12}-{i % 12 + 1:02d}-15" for i in range(K)]
    y = 0.6 + 0.03 * np.sin(2 * np.pi * np.arange(K) / 12) + rng.normal(0, se, K)
    pred, expected, fit_var, p_seasons = _prediction_and_mixture(y, dates, "2012-07-15", 12)
    assert p_seasons > 0.99  # a 3-point yearly wave over 30 months stands out
    assert pred["expected"] == pytest.approx(expected, rel=1e-9)
    assert pred["fit_sd"] ** 2 == pytest.approx(fit_var, rel=1e-7)
    # the same series without its wave: the models share the weight, and the mixture is still exact
    pred, expected, fit_var, p_seasons = _prediction_and_mixture(0.6 + rng.normal(0, se, K), dates, "2012-07-15", 12)
    assert 0.01 < p_seasons < 0.9
    assert pred["expected"] == pytest.approx(expected, rel=1e-9)
    assert pred["fit_sd"] ** 2 == pytest.approx(fit_var, rel=1e-7)
    assert bool(pred["seasonal"])


def test_quarterly_seasons_are_the_same_mixture():
    # reference: tests/seasonal_reference.py, for a quarterly cycle (the yearly wave and the
    # alternating quarter-to-quarter harmonic)
    rng = np.random.default_rng(21)
    K, se = 12, 0.016
    dates = [f"{2020 + i // 4}-{3 * (i % 4) + 2:02d}-15" for i in range(K)]
    y = 0.6 + 0.04 * np.cos(2 * np.pi * np.arange(K) / 4) + rng.normal(0, se, K)
    pred, expected, fit_var, p_seasons = _prediction_and_mixture(y, dates, "2023-02-15", 4)
    assert p_seasons > 0.9 and bool(pred["seasonal"])
    assert pred["expected"] == pytest.approx(expected, rel=1e-9)
    assert pred["fit_sd"] ** 2 == pytest.approx(fit_var, rel=1e-7)
