"""The light distribution functions against scipy.stats (the reference library they replace)."""

import numpy as np
import pytest
from scipy import stats

from tracker.methods import distributions as d

RNG = np.random.default_rng(20261203)
Q = RNG.random(5000)
X = RNG.normal(0, 4, 5000)
DF = np.concatenate([RNG.uniform(1, 400, 4990), np.full(10, np.inf)])
A = RNG.uniform(0.05, 800, 5000)
B = RNG.uniform(0.05, 800, 5000)


def close(mine, ref, rtol=1e-12):
    mine, ref = np.asarray(mine, float), np.asarray(ref, float)
    assert np.array_equal(np.isnan(mine), np.isnan(ref))
    ok = ~np.isnan(ref)
    assert np.all(np.abs(mine[ok] - ref[ok]) <= rtol * np.maximum(np.abs(ref[ok]), 1e-300) + 1e-300)


@pytest.mark.parametrize("name", ["norm_ppf", "norm_sf", "t_ppf", "t_sf", "beta_ppf", "chi2_sf", "f_sf"])
def test_against_scipy_stats(name):
    # reference: scipy.stats (same quantities through its distribution objects)
    cases = {
        "norm_ppf": lambda: (d.norm_ppf(Q), stats.norm.ppf(Q)),
        "norm_sf": lambda: (d.norm_sf(X), stats.norm.sf(X)),
        "t_ppf": lambda: (d.t_ppf(Q, DF), stats.t.ppf(Q, DF)),
        "t_sf": lambda: (d.t_sf(X, DF), stats.t.sf(X, DF)),
        "beta_ppf": lambda: (d.beta_ppf(Q, A, B), stats.beta.ppf(Q, A, B)),
        "chi2_sf": lambda: (d.chi2_sf(np.abs(X[:-10]) * 5, DF[:-10]), stats.chi2.sf(np.abs(X[:-10]) * 5, DF[:-10])),
        "f_sf": lambda: (d.f_sf(np.abs(X), A, B), stats.f.sf(np.abs(X), A, B)),
    }
    mine, ref = cases[name]()
    close(mine, ref)


def test_scalars_stay_scalars():
    assert isinstance(d.t_ppf(0.975, 10), float)
    assert d.t_ppf(0.975, 10) == pytest.approx(2.228138851986273, abs=1e-12)  # scipy.stats.t.ppf(0.975, 10)
    assert d.t_ppf(0.975, np.inf) == pytest.approx(1.959963984540054, abs=1e-12)  # normal quantile
