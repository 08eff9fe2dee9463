"""The LGCP model: simulation-based calibration, coverage, and a run through the pipeline.

References:
- Simulation-based calibration: Talts, Betancourt, Simpson, Vehtari & Gelman (2018),
  "Validating Bayesian inference algorithms with simulation-based calibration": for data
  simulated from the prior, the rank of the true value among L posterior draws (thinned
  to be roughly independent) is uniform on {0, …, L}. Uniformity by scipy.stats.chisquare,
  one test per quantity at a Bonferroni level of 0.01 over the quantities tested.
- The truth is simulated from the FULL field (every torus mode), not the truncated one
  the model samples, so the check sees the truncation (lgcp issue, item 5).
- Coverage: pooled fraction of cells whose 90 % interval covers the true intensity. Cells
  of one data set are spatially correlated, so the band is set from the spread of the
  per-data-set coverage fractions across data sets (a t-interval on their mean, two-sided
  99 %, scipy.stats.t), not from a binomial over all cells.
"""

from __future__ import annotations

from functools import partial

import jax
import numpy as np
import pytest
import scipy.sparse as sp
import scipy.stats as st

from sceneprior.binning import BinnedStats
from sceneprior.geometry import Region
from sceneprior.models import lgcp
from sceneprior.models.registry import get_model, resolve_prior
from sceneprior.spec import ModelSpec

import os

CALIBRATION = pytest.mark.skipif(
    os.environ.get("SCENEPRIOR_LGCP_CALIBRATION") != "1",
    reason="LGCP SBC (100 fits) and coverage (40 fits) take longer than the suite's 15-minute "
           "budget on 2 cores with the current sampler; run with SCENEPRIOR_LGCP_CALIBRATION=1 "
           "(the lgcp issue stays open until they fit the budget)")

N = 6  # 6 × 6 cells: the statistics need many replications, not big grids
K_SCANS = 50


def _stats(counts, K=K_SCANS):
    reg = Region("cartesian", (0.0, 600.0), (0.0, 600.0))
    g = reg.grid((N, N))
    area = g.cell_area().ravel()
    return BinnedStats(reg, g, np.asarray(counts, np.int64), K * area, area, area, K, np.arange(K),
                       np.zeros(K, np.int64), sp.csr_matrix((K, g.n_cells)))


@pytest.fixture(scope="module")
def machinery():
    """One compiled NUTS kernel re-used for every replication (jit_model_args)."""
    from numpyro.infer import MCMC, NUTS, init_to_median

    kind = get_model("lgcp")
    # a prior that gives ≈ 3 detections per cell in total at the median, scaled to units only
    prior = resolve_prior(kind, {"rate_median": 3.0 * N * N / K_SCANS, "rate_log_sd": 0.5,
                                 "sigma_scale": 0.7, "length_scale_min": 120.0,
                                 "length_scale_max": 300.0}, "test")
    stats0 = _stats(np.zeros(N * N))
    setup = kind.setup(stats0, prior, ModelSpec("lgcp", {}, {"kernel": "matern32"}))
    inp = dict(setup.inputs)
    kernels = inp.pop("kernels")
    model = partial(lgcp.lgcp_model, kernels=kernels)
    mcmc = MCMC(NUTS(model, init_strategy=init_to_median(num_samples=15),
                     dense_mass=setup.extra["dense_mass"]),
                num_warmup=150, num_samples=160, num_chains=1, progress_bar=False, jit_model_args=True)
    # the full field (all torus modes) for simulating the truth
    spectrum = kernels.spectrum
    full = lgcp.select_modes(spectrum.geom, np.resize(inp["ls_lo"], 2), delta=0.0,
                             eigenvalues=spectrum.eigenvalues)
    return dict(kind=kind, prior=prior, setup=setup, inp=inp, kernels=kernels, mcmc=mcmc,
                spectrum=spectrum, full=full)


def _draw_truth(m, rng):
    inp = m["inp"]
    mu = rng.normal(inp["mu_loc"], inp["mu_scale"])
    sigma = abs(rng.normal(0.0, inp["sigma_scale"]))
    u = rng.beta(2.0, 2.0, size=inp["ls_lo"].shape)
    ls = inp["ls_lo"] * (inp["ls_hi"] / inp["ls_lo"]) ** u
    amp = m["spectrum"].amplitudes(m["full"], np.resize(ls, 2), sigma**2)
    f = np.asarray(m["full"].coefficients_to_field(amp * rng.standard_normal(m["full"].n_params))).ravel()
    return mu, sigma, float(ls[0]), mu + f


def _fit(m, counts, K, seed):
    stats = _stats(counts, K)
    inp = dict(m["inp"])
    strength = float(np.sum(counts)) / m["spectrum"].geom.n_torus
    inp.update(counts=stats.counts[inp["obs"]].astype(float), exposure=stats.exposure[inp["obs"]],
               strength=strength)
    m["mcmc"].run(jax.random.PRNGKey(seed), **inp)
    post = m["mcmc"].get_samples()
    log_lam = lgcp.cell_log_intensity({k: np.asarray(v)[None] for k, v in post.items()}, m["setup"],
                                      strength=strength)[0]
    return post, log_lam


@CALIBRATION
@pytest.mark.slow
def test_simulation_based_calibration(machinery):
    m = machinery
    rng = np.random.default_rng(2018)
    reps, L = 100, 19  # 19 thinned draws → 20 possible ranks
    cells = [0, 15, 35]
    names = ["mu", "sigma", "length_scale"] + [f"cell {c}" for c in cells]
    ranks = np.zeros((reps, len(names)), int)
    area = _stats(np.zeros(N * N)).exposure
    for r in range(reps):
        mu, sigma, ls, log_lam = _draw_truth(m, rng)
        counts = rng.poisson(np.exp(log_lam) * area)
        post, fit_log_lam = _fit(m, counts, K_SCANS, seed=r)
        draws = np.column_stack([post["mu"], post["sigma"], post["length_scale"][:, 0]]
                                + [fit_log_lam[:, c] for c in cells])
        # thin 160 draws to L = 19 evenly spaced ones (about every 9th), close to the ESS
        # of the hyperparameters in this set-up, so that ranks are roughly independent draws
        idx = np.linspace(0, draws.shape[0] - 1, L).astype(int)
        truth = np.array([mu, sigma, ls] + [log_lam[c] for c in cells])
        ranks[r] = (draws[idx] < truth[None, :]).sum(axis=0)
    level = 0.01 / len(names)
    for j, name in enumerate(names):
        counts = np.bincount(ranks[:, j] // 4, minlength=5)  # 5 bins of 4 ranks, 20 expected each
        p = st.chisquare(counts).pvalue
        assert p > level, (name, counts, p)


@CALIBRATION
@pytest.mark.slow
def test_coverage_and_more_scans_shrink_error(machinery):
    m = machinery
    rng = np.random.default_rng(7)
    n_sets = 20
    cover = np.zeros(n_sets)
    rmse = np.zeros((n_sets, 2))
    area = _stats(np.zeros(N * N)).exposure / K_SCANS  # per-scan cell areas
    for i in range(n_sets):
        _, _, _, log_lam = _draw_truth(m, rng)
        for j, K in enumerate((K_SCANS, 4 * K_SCANS)):
            counts = rng.poisson(np.exp(log_lam) * area * K)
            _, fit_log_lam = _fit(m, counts, K, seed=100 + i)
            if j == 0:
                lo, hi = np.quantile(fit_log_lam, [0.05, 0.95], axis=0)
                cover[i] = np.mean((log_lam >= lo) & (log_lam <= hi))
            rmse[i, j] = np.sqrt(np.mean((fit_log_lam.mean(axis=0) - log_lam) ** 2))
    half = st.t.ppf(0.995, n_sets - 1) * cover.std(ddof=1) / np.sqrt(n_sets)
    assert cover.mean() - half <= 0.90 <= cover.mean() + half, (cover.mean(), half)
    # ×4 scans: the posterior-mean error shrinks on average and in most data sets
    assert rmse[:, 1].mean() < rmse[:, 0].mean()
    assert (rmse[:, 1] < rmse[:, 0]).mean() >= 0.75, rmse


def test_bad_lgcp_input_is_one_line_exit_2(tmp_path, capsys):
    """Unknown kernel, zones outside the region, negative thresholds, impossible grids."""
    from conftest import box_case
    from sceneprior.cli import main

    def run(**over):
        spec = box_case(tmp_path, [0, 1], [10.0, 20.0], [10.0, 20.0], n_scans_table=3, **over)
        code = main(["fit", str(spec), "--out", str(tmp_path / "runs"), "--quiet"])
        err = capsys.readouterr().err.strip().splitlines()
        return code, err[-1] if err else ""

    code, err = run(model={"kind": "lgcp", "kernel": "matern23"})
    assert code == 2 and "unknown kernel 'matern23'" in err and "did you mean" in err
    code, err = run(model={"kind": "lgcp"}, zones=[{"name": "far", "polygon": [[5000.0, 5000.0], [6000.0, 5000.0], [6000.0, 6000.0]]}])
    assert code == 2 and "zone 'far' has no area inside the window" in err
    code, err = run(model={"kind": "lgcp"}, output={"dir": "runs", "thresholds": [-1.0]})
    assert code == 2 and "thresholds" in err
    code, err = run(model={"kind": "lgcp"}, space={"frame": "cartesian", "x": [0.0, 1000.0], "y": [0.0, 500.0],
                                                   "cells": [2500, 2500]})
    assert code == 2 and ("coarser grid" in err or "GB" in err)


def test_lgcp_run_outputs_on_a_polar_masked_grid(tmp_path):
    """A short LGCP fit through the pipeline on simulated Lowmarsh-like data: both polar
    units, exceedance maps, zone rates, the embedding and mode reports; the rate against
    the simulator's truth (∫_W λ by quadrature) with |z| < 3.5."""
    import json

    import xarray as xr

    from conftest import write_csv, write_spec
    from sceneprior.fitting import fit
    from sceneprior.results import write_run
    from sceneprior.simulate import Lowmarsh, sample_thinning
    from sceneprior.spec import load_spec

    sc = Lowmarsh()
    region = sc.region()
    rng = np.random.default_rng(5)
    K = 150
    scan, r, b = sample_thinning(rng, region, sc.intensity, sc.lam_max(), K)
    write_csv(tmp_path / "det.csv", ["scan", "range", "bearing"], zip(scan, r, b))
    spec = {
        "name": "lgcp-small",
        "data": {"detections": "det.csv", "n_scans": K},
        "space": {"frame": "polar", "range": [200.0, 6000.0], "bearing": [-70.0, 70.0], "cells": [10, 7],
                  "masks": [{"name": "land", "bearing": [42.0, 70.0]}]},
        "model": {"kind": "lgcp", "kernel": "matern52"},
        "zones": [{"name": "shoal", "range": [2600.0, 3800.0], "bearing": [-40.0, -10.0]}],
        "sampler": {"chains": 2, "warmup": 200, "draws": 200, "seed": 4, "progress": False},
        "output": {"dir": "runs", "thresholds": [2e-7]},
    }
    res = fit(load_spec(write_spec(tmp_path / "spec.toml", spec)), progress=False, log=lambda m: None)
    path = write_run(res, tmp_path / "runs")
    s = json.loads((path / "summary.json").read_text())
    truth, _ = sc.window_rate()
    z = (s["rate"]["mean"] - truth) / s["rate"]["sd"]
    assert abs(z) < 3.5, z
    assert s["lgcp"]["embedding"]["method"] in ("embedding", "periodised")
    assert s["lgcp"]["modes"]["dropped_variance_fraction_at_selection"] <= 1e-3
    assert "range" in s["lgcp"]["stationarity"] and "shoal" in s["zones"]
    assert s["diagnostics"]["cells"]["n_cells"] > 0
    ds = xr.open_dataset(path / "intensity.nc", engine="h5netcdf")
    assert ds["intensity_polar_mean"].attrs["units"] == "m-1 rad-1 scan-1"
    assert ds["exceedance_0"].attrs["threshold"] == 2e-7
    p = ds["exceedance_0"].values
    assert np.nanmin(p) >= 0 and np.nanmax(p) <= 1
    ds.close()
    # the map integrates to the rate draw by draw (Σ_c λ_c |c ∩ W|)
    lam = res.cell_intensity()
    np.testing.assert_allclose((lam * res.stats.window_area).sum(-1), res.rate_draws(), rtol=1e-5)
