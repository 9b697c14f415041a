"""Bridged wording breaks: the level jump at a break, and the series joined across it.

The jump is the step coefficient of the trend model's meta-regression; given the wave-to-wave
variance the fit reports, it is generalised least squares with weights 1 / (v + tau^2), which
statsmodels' WLS computes (the reference here). The demo's planted 8-point jump is in
tests/test_demo_findings.py."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from tracker.bridging import MIN_SIDE, break_jumps, bridge
from tracker.cli import main


def test_the_jump_is_the_step_of_a_weighted_regression(demo_study):
    # reference: statsmodels WLS with weights 1 / (sampling variance + tau^2), scale fixed at 1
    import statsmodels.api as sm

    from tracker.trends import _series_arrays, meta_regression

    est = demo_study.estimates(metrics="safe", by=[])
    jumps = break_jumps(est, {"safe": "2024-Q1"})
    series, waves, y, v, ok, years = _series_arrays(est, None)
    after = (np.arange(len(waves)) >= waves.index("2024-Q1")).astype(float)
    t = years - years[ok[0]].mean()
    X = np.column_stack([np.ones(len(waves)), t, after])
    tau2 = meta_regression(y, v, X[None], ok)["tau2"][0]
    ref = sm.WLS(y[0][ok[0]], X[ok[0]], weights=1 / (v[0][ok[0]] + tau2)).fit(cov_type="fixed scale")
    assert jumps["jump"].iloc[0] == pytest.approx(ref.params[2], rel=1e-10)
    assert jumps["jump_se"].iloc[0] == pytest.approx(ref.bse[2], rel=1e-10)


def test_a_bridged_series_carries_its_jump_and_says_so(demo_study):
    est = demo_study.estimates(metrics="safe", by=[])
    jumps = break_jumps(est, {"safe": "2024-Q1"})
    out = bridge(est, jumps)
    j = jumps.iloc[0]
    before = est["fieldwork_date"] < demo_study.dates()["2024-Q1"]
    np.testing.assert_allclose(out.loc[before.to_numpy(), "value"], est.loc[before, "value"] + j["jump"], rtol=1e-12)
    np.testing.assert_allclose(out.loc[before.to_numpy(), "se"] ** 2, est.loc[before, "se"] ** 2 + j["jump_se"] ** 2,
                               rtol=1e-12)
    assert out.loc[before.to_numpy(), "flags"].str.contains("bridged across the wording break at 2024-Q1").all()
    assert (out.loc[~before.to_numpy(), "value"].to_numpy() == est.loc[~before, "value"].to_numpy()).all()
    trends = demo_study.trends(metrics="safe", by=[], bridge=True)
    assert trends["waves"].iloc[0] == len(demo_study.labels) and trends["note"].iloc[0].startswith("bridged")
    plain = demo_study.trends(metrics="safe", by=[])
    assert plain["waves"].iloc[0] < len(demo_study.labels) and "series starts at 2024-Q1" in plain["note"].iloc[0]
    expected = demo_study.expected(metrics="safe", by=[], bridge=True)
    assert "bridged across the wording break at 2024-Q1" in expected["basis"].iloc[0]


def test_too_few_waves_on_one_side_restart_the_series(demo_study):
    est = demo_study.estimates(metrics="safe", by=[])
    late = demo_study.labels[-MIN_SIDE + 1]  # a break with fewer than MIN_SIDE waves after it
    jumps = break_jumps(est, {"safe": late})
    assert not jumps["bridged"].any() and jumps["jump"].isna().all()
    out = bridge(est, jumps)
    assert list(out["wave"]) == demo_study.labels[demo_study.labels.index(late):]  # restarted there


def test_the_bridge_option_of_the_commands(demo_study):
    done = CliRunner().invoke(main, ["trends", str(demo_study.root), "--metric", "safe", "--by", "total", "--bridge",
                                     "--format", "csv"])
    assert done.exit_code == 0, done.output
    import io

    table = pd.read_csv(io.StringIO(done.output))
    assert table["note"].iloc[0].startswith("bridged across the wording break at 2024-Q1: jump +")
    done = CliRunner().invoke(main, ["expect", str(demo_study.root), "--metric", "safe", "--by", "total", "--bridge",
                                     "--format", "csv"])
    assert done.exit_code == 0 and "bridged across the wording break" in done.output
