"""The uniform model against the conjugate Gamma–Poisson posterior.

Reference: Gelman et al., Bayesian Data Analysis, 3rd ed., §2.6 — a Gamma(a, b) prior on a
Poisson rate with N events over exposure E gives the posterior Gamma(a + N, b + E); the
moments are taken from scipy.stats.gamma. The box area and counts are computed by hand in
the test, not by the package.
"""

from __future__ import annotations

import json

import arviz as az
import numpy as np
import pytest
import scipy.stats as st

from conftest import box_case
from sceneprior.fitting import fit
from sceneprior.results import summary_dict, write_run
from sceneprior.spec import load_spec

BOX_AREA = 1000.0 * 500.0  # m², the box of conftest.box_case


def _simulate(rng, n_scans, rate_per_scan):
    n = rng.poisson(rate_per_scan, n_scans)
    scans = np.repeat(np.arange(n_scans), n)
    return scans, rng.uniform(0, 1000, n.sum()), rng.uniform(0, 500, n.sum())


@pytest.mark.parametrize(
    "shape,rate",
    [
        (30.0, 5.0),  # informative, shape ≠ rate: a shape/rate mix-up moves the mean 3×
        (1.0, 0.1),  # the weak default
    ],
)
def test_nuts_matches_conjugate_posterior(tmp_path, shape, rate):
    rng = np.random.default_rng(7)
    K = 20
    scans, x, y = _simulate(rng, K, 2.0)
    spec_path = box_case(tmp_path, scans, x, y, n_scans_table=K,
                         model={"kind": "uniform", "prior": {"shape": shape, "rate": rate}},
                         sampler={"chains": 4, "warmup": 500, "draws": 2000, "seed": 11, "progress": False})
    res = fit(load_spec(spec_path), progress=False, log=lambda m: None)
    N = len(scans)
    # prior on the rate per scan Gamma(shape, rate [scans]) ⇔ on ρ: Gamma(shape, rate·|W|)
    exact = st.gamma(shape + N, scale=1.0 / (rate * BOX_AREA + K * BOX_AREA))
    post = res.idata.posterior["intensity"]
    mean, sd = float(post.mean()), float(post.std())
    mcse_mean = float(az.mcse(res.idata, var_names=["intensity"], method="mean")["intensity"])
    mcse_sd = float(az.mcse(res.idata, var_names=["intensity"], method="sd")["intensity"])
    assert abs(mean - exact.mean()) < 4 * mcse_mean, (mean, exact.mean(), mcse_mean)
    assert abs(sd - exact.std()) < 4 * mcse_sd, (sd, exact.std(), mcse_sd)
    # and the swapped parametrisation is far away (the check has power against the mix-up)
    if shape == 30.0:
        swapped = st.gamma(rate + N, scale=1.0 / (shape * BOX_AREA + K * BOX_AREA))
        assert abs(mean - swapped.mean()) > 20 * mcse_mean


def test_empty_scans_give_hand_computed_posterior(tmp_path):
    """70 % empty scans: the exact path equals Gamma(a + N, b|W| + K|W|) computed by hand,
    and the empty scans lower the rate (they are data)."""
    rng = np.random.default_rng(3)
    K = 200
    busy = rng.choice(K, size=60, replace=False)  # 140 of 200 scans (70 %) stay empty
    n = rng.poisson(3.0, busy.size) + 1
    scans = np.repeat(busy, n)
    x, y = rng.uniform(0, 1000, scans.size), rng.uniform(0, 500, scans.size)
    spec_path = box_case(tmp_path, scans, x, y, n_scans_table=K,
                         sampler={"method": "exact", "chains": 4, "draws": 5000, "seed": 1, "progress": False})
    res = fit(load_spec(spec_path), progress=False, log=lambda m: None)
    assert res.stats.n_scans == K
    assert int((res.stats.scan_counts == 0).sum()) == K - busy.size == 140
    s = summary_dict(res)
    a_post = 1.0 + scans.size
    b_post = 0.1 * BOX_AREA + K * BOX_AREA
    ex = s["exact_posterior"]
    assert ex["shape"] == pytest.approx(a_post, rel=1e-12)
    assert ex["rate_m2_scan"] == pytest.approx(b_post, rel=1e-12)
    # rate per scan = ρ·|W| ~ Gamma(a + N, b + K): compare the draws' mean to it (4 MC s.e.)
    ref = st.gamma(a_post, scale=1.0 / (0.1 + K))
    draws = res.rate_draws().reshape(-1)
    assert abs(draws.mean() - ref.mean()) < 4 * ref.std() / np.sqrt(draws.size)
    assert s["data"]["empty_scans"] == 140


def test_no_scan_list_is_refused(tmp_path):
    from sceneprior.errors import InputError

    spec_path = box_case(tmp_path, [0, 1], [10.0, 20.0], [10.0, 20.0])
    with pytest.raises(InputError, match="no scan list"):
        load_spec(spec_path)


def test_same_seed_same_summary(tmp_path):
    rng = np.random.default_rng(5)
    scans, x, y = _simulate(rng, 30, 1.5)
    spec_path = box_case(tmp_path, scans, x, y, n_scans_table=30,
                         sampler={"chains": 2, "warmup": 200, "draws": 300, "seed": 9, "progress": False})
    spec = load_spec(spec_path)
    out = []
    for sub in ("a", "b"):
        res = fit(spec, progress=False, log=lambda m: None)
        path = write_run(res, tmp_path / sub)
        d = json.loads((path / "summary.json").read_text())
        for volatile in ("timing_s", "written_utc"):
            d.pop(volatile)
        out.append(d)
    assert out[0] == out[1]
    assert out[0]["rate"]["mean"] > 0
