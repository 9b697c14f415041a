"""Property checks with hypothesis: the fast paths agree with the plain definitions and with
reference libraries on arbitrary inputs (statsmodels multipletests; the generic Taylor
variance of tracker.estimates, itself checked against samplics)."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from tracker.estimates import _clustered_variance, _unclustered_variance
from tracker.methods import adjust_pvalues, taylor_variance, wilson_interval

pvalues = arrays(float, st.integers(1, 60), elements=st.floats(0, 1, allow_nan=False))


@settings(max_examples=60, deadline=None)
@given(pvalues, st.sampled_from([("bh", "fdr_bh"), ("holm", "holm"), ("by", "fdr_by")]))
def test_adjusted_p_values_equal_statsmodels(p, methods):
    from statsmodels.stats.multitest import multipletests

    ours, ref = methods
    assert np.allclose(adjust_pvalues(p, ours), multipletests(p, method=ref)[1], atol=1e-12)


@settings(max_examples=40, deadline=None)
@given(st.integers(5, 80), st.integers(1, 4), st.integers(0, 2**31 - 1),
       st.sampled_from(["centre", "average", "certainty"]))
def test_fast_unclustered_variance_equals_the_generic_estimator(n, n_strata, seed, rule):
    rng = np.random.default_rng(seed)
    w = rng.uniform(0.2, 3.0, n)
    Y = rng.integers(0, 2, (n, 3)).astype(float)
    E = rng.random((n, 3)) < 0.8
    D = np.column_stack([np.ones(n, bool), rng.random(n) < 0.5])
    strata = rng.integers(0, n_strata, n)
    Df = D.astype(float)
    we = E * w[:, None]
    wey = we * Y
    sw = Df.T @ we
    with np.errstate(invalid="ignore", divide="ignore"):
        value = (Df.T @ wey) / sw
    EY = np.where(E, Y, 0.0)
    fast, _, _ = _unclustered_variance(D, E.astype(float), EY, w, value, sw, Df.T @ E.astype(float), strata, rule)
    for level in range(D.shape[1]):
        with np.errstate(invalid="ignore", divide="ignore"):
            z = np.nan_to_num(Df[:, level][:, None] * (wey - we * value[level]) / sw[level])
        slow = taylor_variance(z, strata, None, rule, members=D[:, [level]] & E)
        assert np.allclose(np.nan_to_num(fast[level]), np.nan_to_num(slow), rtol=1e-9, atol=1e-15)


@settings(max_examples=40, deadline=None)
@given(st.integers(6, 90), st.integers(1, 4), st.integers(2, 12), st.integers(0, 2**31 - 1),
       st.sampled_from(["centre", "average", "certainty"]), st.booleans())
def test_fast_clustered_variance_equals_the_generic_estimator(n, n_strata, n_psu, seed, rule, zero_weights):
    # the one-product cluster path against the plain definition: linearized values per
    # respondent, totalled by taylor_variance (itself checked against samplics)
    rng = np.random.default_rng(seed)
    w = rng.uniform(0.2, 3.0, n)
    if zero_weights:
        w[rng.random(n) < 0.2] = 0.0
    Y = rng.integers(0, 2, (n, 3)).astype(float)
    E = rng.random((n, 3)) < 0.8
    D = np.column_stack([np.ones(n, bool), rng.random(n) < 0.5])
    strata = rng.integers(0, n_strata, n)
    psu = rng.integers(0, n_psu, n)
    Df = D.astype(float)
    EY = np.where(E, Y, 0.0)
    sw = (Df * w[:, None]).T @ E
    with np.errstate(invalid="ignore", divide="ignore"):
        value = ((Df * w[:, None]).T @ EY) / sw
    fast, n_psu_cell, df, _, _ = _clustered_variance(D, E.astype(float), EY, w, value, sw, strata, psu, rule)
    key = strata * 1000 + psu
    for level in range(D.shape[1]):
        with np.errstate(invalid="ignore", divide="ignore"):
            z = np.nan_to_num(Df[:, level][:, None] * w[:, None] * E * (Y - value[level]) / sw[level])
        slow = taylor_variance(z, strata, psu, rule, members=D[:, [level]] & E)
        assert np.allclose(fast[level], slow, rtol=1e-9, atol=1e-15, equal_nan=True)
        for j in range(3):
            inside = D[:, level] & E[:, j]
            assert n_psu_cell[level, j] == np.unique(key[inside]).size
            assert df[level, j] == np.unique(key[inside]).size - np.unique(strata[inside]).size


@settings(max_examples=100, deadline=None)
@given(st.integers(1, 5000), st.data())
def test_wilson_interval_holds_the_estimate_inside_zero_one(n, data):
    k = data.draw(st.integers(0, n))
    lo, hi = wilson_interval(k / n, n)
    assert 0 <= lo <= k / n <= hi <= 1 + 1e-12
