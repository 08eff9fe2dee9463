"""The loglinear model against the Poisson GLM with offset log E_c (statsmodels).

Reference: with flat priors the posterior is asymptotically normal around the maximum-
likelihood estimate with covariance the inverse Fisher information (Bernstein–von Mises;
Gelman et al., BDA3 §4.2); the binned PPP likelihood Σ[N log λ − E λ] is exactly the
Poisson GLM log-likelihood with log link and offset log E_c up to a constant (McCullagh &
Nelder 1989, Generalized Linear Models, §6.2), fitted here by statsmodels.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from conftest import write_csv, write_spec
from sceneprior.covariates import design_matrix
from sceneprior.errors import InputError
from sceneprior.fitting import fit
from sceneprior.geometry import Region
from sceneprior.simulate import sample_thinning
from sceneprior.spec import load_spec

COVS = ["log_range", "bearing", "bearing^2"]


def _intensity(r, b):
    # invented sea-clutter law: λ ∝ r^-1.3 with a bearing trend and curvature (m⁻² scan⁻¹)
    return np.exp(-5.0 - 1.3 * np.log(r) + 0.004 * b - 0.0001 * b**2)


@pytest.fixture(scope="module")
def loglinear_fit(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("loglin")
    region = Region("polar", (300.0, 5000.0), (-60.0, 60.0))
    rng = np.random.default_rng(99)
    K = 2000
    lam_max = float(_intensity(300.0, 20.0)) * 1.01
    scan, r, b = sample_thinning(rng, region, _intensity, lam_max, K)
    assert scan.size >= 10_000  # ample data
    write_csv(tmp / "det.csv", ["scan", "range", "bearing"], zip(scan, r, b))
    spec = {
        "name": "loglin",
        "data": {"detections": "det.csv", "n_scans": K},
        "space": {"frame": "polar", "range": [300.0, 5000.0], "bearing": [-60.0, 60.0], "cells": [24, 20]},
        "model": {"kind": "loglinear", "covariates": COVS, "prior": {"coef_sd": float("inf")}},
        "sampler": {"chains": 4, "warmup": 500, "draws": 1000, "seed": 2, "progress": False},
    }
    path = write_spec(tmp / "spec.toml", spec)
    res = fit(load_spec(path), progress=False, log=lambda m: None)
    return res


def _glm(res, offset):
    X = design_matrix(COVS, res.stats.grid)
    obs = res.stats.exposure > 0
    design = sm.add_constant(X[obs])
    return sm.GLM(res.stats.counts[obs], design, family=sm.families.Poisson(), offset=offset[obs]).fit()


def test_flat_prior_posterior_matches_glm(loglinear_fit):
    import arviz as az

    res = loglinear_fit
    glm = _glm(res, np.log(np.where(res.stats.exposure > 0, res.stats.exposure, 1.0)))
    ess = az.ess(res.idata, var_names=["coef"])["coef"].values
    assert ess.min() >= 1000, ess
    coef = res.idata.posterior["coef"].values.reshape(-1, len(COVS))
    icpt = res.idata.posterior["intercept"].values.reshape(-1)
    post_mean = np.concatenate([[icpt.mean()], coef.mean(axis=0)])
    post_sd = np.concatenate([[icpt.std()], coef.std(axis=0)])
    # within 0.2 posterior sd of the MLE, sd within 10 % of the GLM standard error
    np.testing.assert_array_less(np.abs(post_mean - glm.params) / post_sd, 0.2)
    np.testing.assert_allclose(post_sd, glm.bse, rtol=0.10)


def test_log_range_coefficient_shifts_by_one_per_m_rad(loglinear_fit):
    """Per-m·rad intensity = per-m² intensity × r_mid: the GLM with the m·rad exposure
    (K·Δr·Δθ per cell) has a log_range coefficient exactly 1 larger, and our summary
    reports that shift."""
    from sceneprior.results import summary_dict

    res = loglinear_fit
    g = res.stats.grid
    dr = np.diff(g.edges0)[:, None] * np.ones(g.shape[1])[None, :]
    dth = np.deg2rad(np.diff(g.edges1))[None, :] * np.ones(g.shape[0])[:, None]
    e_mrad = res.stats.n_scans * (dr * dth).ravel() * (res.stats.window_area / res.stats.cell_area)
    glm_m2 = _glm(res, np.log(res.stats.exposure))
    glm_mrad = _glm(res, np.log(e_mrad))
    assert glm_mrad.params[1] - glm_m2.params[1] == pytest.approx(1.0, abs=1e-6)
    np.testing.assert_allclose(glm_mrad.params[2:], glm_m2.params[2:], atol=1e-6)
    s = summary_dict(res)["loglinear"]
    assert s["per_m_rad"]["log_range"]["mean"] - s["coefficients"]["log_range"]["mean"] == pytest.approx(1.0, abs=1e-9)


def test_rate_is_map_integral(loglinear_fit):
    res = loglinear_fit
    lam = res.cell_intensity()
    rate = (lam * res.stats.window_area).sum(axis=-1)
    np.testing.assert_allclose(rate, res.rate_draws(), rtol=1e-10)


def test_bad_covariates_and_rasters(tmp_path):
    region = Region("cartesian", (0.0, 100.0), (0.0, 50.0))
    grid = region.grid((4, 2))
    with pytest.raises(InputError, match="unknown covariate 'rnage'.*did you mean 'range'"):
        design_matrix(["rnage"], grid)
    from sceneprior.covariates import load_raster

    np.save(tmp_path / "r.npy", np.zeros((3, 2)))
    with pytest.raises(InputError, match=r"shape \(3, 2\) but the grid has \(4, 2\)"):
        load_raster("sea_state", tmp_path / "r.npy", grid)
    np.save(tmp_path / "ok.npy", np.arange(8.0).reshape(4, 2))
    X = design_matrix(["sea_state*x"], grid, {"sea_state": load_raster("sea_state", tmp_path / "ok.npy", grid)})
    np.testing.assert_allclose(X[:, 0], np.arange(8.0) * np.repeat(grid.centres0, 2))
