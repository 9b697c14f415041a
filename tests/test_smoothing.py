"""Signal extraction for thin subgroups (tracker.methods.statespace) against statsmodels' state-space
tools (reference library) and closed forms."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from tracker.methods.statespace import fit_local_level, local_level

# a small series of shares (invented for the check; the values are statsmodels' to match)
Y = np.array([0.52, 0.55, 0.49, 0.58, 0.61, 0.57, 0.63, 0.66, 0.60, 0.64, 0.69, 0.67])
V = 0.02**2


def _uc(y, v):
    from statsmodels.tsa.statespace.structural import UnobservedComponents

    warnings.simplefilter("ignore")
    return UnobservedComponents(y, level="llevel")  # params: sigma2.irregular, sigma2.level


def test_the_filter_and_smoother_equal_statsmodels_at_fixed_variances():
    # reference: statsmodels UnobservedComponents (local level), irregular variance fixed at V
    for q in (1e-4, 1e-3, 1e-2):
        ref = _uc(Y, V).smooth([V, q])
        mine = local_level(Y[None], np.full((1, Y.size), V), np.ones((1, Y.size), bool), np.array([q]))
        assert np.allclose(mine["mean"][0], ref.smoothed_state[0], atol=1e-6, rtol=0)
        assert np.allclose(mine["var"][0], ref.smoothed_state_cov[0, 0], atol=1e-6, rtol=0)
        assert mine["loglik"][0] == pytest.approx(ref.llf, abs=1e-6)


def test_the_signal_variance_is_the_maximum_likelihood_one():
    # reference: statsmodels' own fit with the irregular variance constrained to V
    ref = _uc(Y, V).fit_constrained({"sigma2.irregular": V}, disp=False)
    q = fit_local_level(Y[None], np.full((1, Y.size), V), np.ones((1, Y.size), bool))[0]
    assert q == pytest.approx(ref.params[1], rel=1e-3)  # statsmodels' optimiser stops at about 1e-4
    mine = local_level(Y[None], np.full((1, Y.size), V), np.ones((1, Y.size), bool), np.array([q]))
    assert mine["loglik"][0] >= ref.llf - 1e-7  # ours is at least as likely
    assert np.allclose(mine["mean"][0], ref.smoothed_state[0], atol=1e-4)


def test_known_varying_sampling_variances_and_a_missing_wave_equal_a_statsmodels_state_space_model():
    # reference: a statsmodels MLEModel with time-varying observation variance and a missing wave
    from statsmodels.tsa.statespace.mlemodel import MLEModel

    warnings.simplefilter("ignore")
    v = np.array([4, 2, 6, 3, 5, 2, 8, 3, 2, 4, 6, 3], float) * 1e-4
    y = Y.copy()
    y[5] = np.nan

    class LocalLevel(MLEModel):
        def __init__(self, endog):
            # the first wave starts the level and is left out of the likelihood, as UnobservedComponents does
            super().__init__(endog, k_states=1, initialization="diffuse", loglikelihood_burn=1)
            self["design", 0, 0] = 1.0
            self["transition", 0, 0] = 1.0
            self["selection", 0, 0] = 1.0
            self["obs_cov"] = v.reshape(1, 1, -1)

        def update(self, params, **kwargs):
            self["state_cov", 0, 0] = params[0]

    q = 5e-4
    ref = LocalLevel(y).smooth([q])
    ok = ~np.isnan(y)
    mine = local_level(np.nan_to_num(y)[None], v[None], ok[None], np.array([q]))
    assert np.allclose(mine["mean"][0], ref.smoothed_state[0], atol=1e-6, rtol=0)
    assert np.allclose(mine["var"][0], ref.smoothed_state_cov[0, 0], atol=1e-6, rtol=0)
    assert mine["loglik"][0] == pytest.approx(ref.llf, abs=1e-6)


def _monthly(K=30, seed=4):
    rng = np.random.default_rng(seed)
    y = 0.6 + np.cumsum(rng.normal(0, 0.01, K)) + 0.03 * np.sin(2 * np.pi * np.arange(K) / 12) + rng.normal(0, 0.04, K)
    dates = [f"{2010 + i // 12}-{i % 12 + 1:02d}-15" for i in range(K)]
    return y, dates


def test_the_smoother_with_seasons_equals_statsmodels_structural_model_at_fixed_variances():
    # reference: statsmodels UnobservedComponents, a local level plus a fixed (non-stochastic)
    # trigonometric season of period 12 with one harmonic, exact diffuse start; the irregular
    # variance fixed at the sampling variance. Smoothed signal (level + season), its variance,
    # and the likelihood's differences between values of q (its constant differs by the
    # diffuse terms)
    from statsmodels.tsa.statespace.structural import UnobservedComponents

    from tracker.methods.statespace import smooth_with_seasons
    from tracker.trends import season_columns

    warnings.simplefilter("ignore")
    y, dates = _monthly()
    v = 0.04**2
    H = season_columns(dates, 12)[:, :2]
    model = UnobservedComponents(y, level="llevel", freq_seasonal=[{"period": 12, "harmonics": 1}],
                                 stochastic_freq_seasonal=[False], use_exact_diffuse=True)
    lls, refs = [], []
    for f in (0.01, 0.1, 1.0):
        ref = model.smooth([v, f * v])
        mine = smooth_with_seasons(y[None], np.full((1, y.size), v), np.ones((1, y.size), bool), H,
                                   factors=np.array([f]))
        signal = ref.smoothed_state[0] + ref.smoothed_state[1]
        signal_var = (ref.smoothed_state_cov[0, 0] + ref.smoothed_state_cov[1, 1]
                      + 2 * ref.smoothed_state_cov[0, 1])
        assert np.allclose(mine["mean"][0], signal, atol=1e-10, rtol=0)
        assert np.allclose(mine["var"][0], signal_var, atol=1e-10, rtol=0)
        lls.append(mine["loglik"][0, 0])
        refs.append(ref.llf)
    assert np.allclose(np.diff(lls), np.diff(refs), atol=1e-6)


def test_the_smoother_with_no_seasons_is_the_plain_smoother():
    # reference: smooth_over_q, itself equal to statsmodels' local level at each q (above)
    from tracker.methods.statespace import smooth_over_q, smooth_with_seasons

    y, _ = _monthly()
    v = np.full((1, y.size), 0.04**2)
    ok = np.ones((1, y.size), bool)
    ok[0, 7] = False
    mine = smooth_with_seasons(y[None], v, ok, np.zeros((y.size, 0)))
    ref = smooth_over_q(y[None], v, ok)
    assert np.allclose(mine["mean"], ref["mean"], atol=1e-12) and np.allclose(mine["var"], ref["var"], atol=1e-12)


def test_with_seasons_declared_a_long_monthly_series_is_smoothed_with_its_yearly_wave():
    from tracker.methods.statespace import smooth_with_seasons
    from tracker.smoothing import smooth_estimates
    from tracker.trends import season_columns

    y, dates = _monthly()
    est = pd.DataFrame({"metric": "m", "metric_label": "m", "kind": "share", "group": "total", "subgroup": "Total",
                        "wave": [f"W{i:02d}" for i in range(y.size)], "fieldwork_date": dates, "value": y,
                        "se": 0.04, "reliable": True})
    got = smooth_estimates(est, {}, 0.95, cycle=12)
    ref = smooth_with_seasons(y[None], np.full((1, y.size), 0.04**2), np.ones((1, y.size), bool),
                              season_columns(dates, 12)[:, :2])
    assert np.allclose(got["smoothed"], ref["mean"][0], atol=1e-12)
    assert np.allclose(got["smoothed_high"] - got["smoothed"], 1.959963984540054 * np.sqrt(ref["var"][0]))
    short = smooth_estimates(est.iloc[:20], {}, 0.95, cycle=12)  # under two cycles: the plain smoother
    assert np.allclose(short["smoothed"], smooth_estimates(est.iloc[:20], {}, 0.95)["smoothed"])


def test_with_no_signal_variance_the_smoothed_level_is_the_weighted_mean():
    # closed form: a constant level seen through independent errors is their inverse-variance mean
    v = np.array([4, 2, 6, 3, 5, 2], float) * 1e-4
    y = Y[:6]
    got = local_level(y[None], v[None], np.ones((1, 6), bool), np.array([0.0]))
    w = 1 / v
    assert np.allclose(got["mean"][0], np.average(y, weights=w), atol=1e-12)
    assert np.allclose(got["var"][0], 1 / w.sum(), atol=1e-15)


def test_the_study_shows_smoothed_values_beside_the_direct_ones(demo_study):
    est = demo_study.smoothed(by=["area"])
    direct = demo_study.estimates(by=["area"])
    assert len(est) == len(direct)
    assert np.allclose(est["value"], direct["value"])  # the direct estimate is untouched
    sb = est[(est["metric"] == "staff_good") & (est["subgroup"] == "Southbank")]
    assert sb["smoothed"].notna().all() and (sb["smoothed_low"] < sb["smoothed"]).all()
    # smoothing narrows: the smoothed interval of the thin subgroup is narrower than the direct one
    assert ((sb["smoothed_high"] - sb["smoothed_low"]) < (sb["ci_high"] - sb["ci_low"])).mean() > 0.9
    # the planted shift in Southbank (demo docstring: staff_good steps down there at 2025-Q3) is followed
    assert sb["smoothed"].iloc[-2] < sb["smoothed"].iloc[0] - 0.1


def test_the_commands_and_the_chart_show_the_smoothed_series_labelled(demo_study, tmp_path):
    import json

    from click.testing import CliRunner

    from tests.test_charts import errors
    from tracker.chartdata import trend_chart
    from tracker.charts import SMOOTH_COLOUR, chart_spec
    from tracker.cli import main

    out = CliRunner().invoke(main, ["estimates", str(demo_study.root), "--smooth", "--by", "area", "--format", "csv"])
    assert out.exit_code == 0, out.output
    head = out.output.splitlines()[0].split(",")
    assert head[-4:] == ["smoothed", "smoothed_low", "smoothed_high", "signal_sd"]
    spec = chart_spec(trend_chart(demo_study, "staff_good", by="area", smooth=True))
    layers = spec["spec"]["layer"]
    lines = [la for la in layers if la["encoding"].get("y", {}).get("field") == "smoothed_shown"]
    assert {la["mark"]["type"] for la in lines} == {"line", "text"}  # the dotted line and its label
    assert all(la["mark"]["color"] == SMOOTH_COLOUR for la in lines)
    assert any(la["encoding"].get("text") == {"value": "smoothed"} for la in lines)
    assert errors(spec) == []
    plain = json.dumps(chart_spec(trend_chart(demo_study, "staff_good", by="area")))
    assert "smoothed_shown" not in plain  # only when asked
    png = CliRunner().invoke(main, ["chart", str(demo_study.root), "--metric", "staff_good", "--by", "area",
                                    "--smooth", "-o", str(tmp_path / "s.svg")])
    assert png.exit_code == 0 and (tmp_path / "s.svg").read_text().count("smoothed") >= 3
