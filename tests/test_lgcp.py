"""The LGCP model: its reparametrisation and integrated baseline against outside references,
simulation-based calibration, coverage, and runs through the pipeline.

References:
- The sampler's coordinates: for a linear map f = T u the density of u is
  N(T u; 0, C)·|det T| (change of variables); checked against scipy.stats.multivariate_normal
  with the dense torus covariance built from the kernel's first row (Wood & Chan 1994).
- The integrated baseline: ∫ Π_c Pois(N_c | ρ E_c e^{f_c}) Gamma(ρ | a, b) dρ by
  scipy.integrate.quad against the closed form (Gelman et al., BDA3 §2.6).
- Simulation-based calibration: Talts, Betancourt, Simpson, Vehtari & Gelman (2018),
  "Validating Bayesian inference algorithms with simulation-based calibration": for data
  simulated from the prior, the rank of the true value among L posterior draws (thinned
  to be roughly independent) is uniform on {0, …, L}. Uniformity by scipy.stats.chisquare,
  one test per quantity at a Bonferroni level of 0.01 over the quantities tested; truths
  moved by 1 posterior sd must fail it (negative control, ``conftest.check_sbc``).
- The truth is simulated from the model's full torus field (every mode; the model keeps
  every mode too, so nothing is truncated).
- Coverage: pooled fraction of cells whose 90 % interval covers the true intensity. Cells
  of one data set are spatially correlated, so the band is set from the spread of the
  per-data-set coverage fractions across data sets (a t-interval on their mean, two-sided
  99 %, scipy.stats.t), not from a binomial over all cells.
"""

from __future__ import annotations

import math
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.sparse as sp
import scipy.stats as st
from scipy import integrate

from conftest import batched_nuts, check_sbc
from sceneprior.binning import BinnedStats
from sceneprior.fields.embedding import implied_first_row
from sceneprior.fields.preconditioning import build_preconditioner, field_and_prior
from sceneprior.geometry import Region
from sceneprior.models import lgcp
from sceneprior.models.registry import get_model, resolve_prior
from sceneprior.spec import ModelSpec

N = 6  # 6 × 6 cells: the statistics need many replications, not big grids
K_SCANS = 50
PER_CELL = 20.0  # prior median detections per cell in total: strong enough that the padding
#                  correction and the soft direction are far from the identity


def _stats(counts, K=K_SCANS):
    reg = Region("cartesian", (0.0, 600.0), (0.0, 600.0))
    g = reg.grid((N, N))
    area = g.cell_area().ravel()
    return BinnedStats(reg, g, np.asarray(counts, np.int64), K * area, area, area, K, np.arange(K),
                       np.zeros(K, np.int64), sp.csr_matrix((K, g.n_cells)))


WARMUP, DRAWS = 200, 200


@pytest.fixture(scope="module")
def machinery():
    """The LGCP model on a 6 × 6 grid and one compiled NUTS run mapped over data sets
    (``conftest.batched_nuts``)."""
    kind = get_model("lgcp")
    # units only: a baseline median of PER_CELL detections per cell over K_SCANS scans
    prior = resolve_prior(kind, {"rate_median": PER_CELL * N * N / K_SCANS, "rate_log_sd": 0.5,
                                 "sigma_scale": 0.7, "length_scale_min": 120.0,
                                 "length_scale_max": 300.0}, "test")
    stats0 = _stats(np.full(N * N, int(PER_CELL)))
    setup = kind.setup(stats0, prior, ModelSpec("lgcp", {}, {"kernel": "matern32"}), use_pad=True)
    # full torus: warmup trees uncapped, chain groups one after another; warmup's mass block
    # starts at INITIAL_HYPER_VARIANCE for σ and ℓ (one ℓ: isotropic), 1 for the soft direction
    assert setup.extra["warmup_tree_depth"] is None and setup.extra["vectorize_chain_groups"] is False
    np.testing.assert_array_equal(setup.extra["initial_inverse_mass"][("sigma", "ls_unit", "u_soft")],
                                  np.diag([lgcp.INITIAL_HYPER_VARIANCE] * 2 + [1.0]))
    # NUTS trees with the extra U-turn checks (sceneprior.nuts_tree), the step size fixed
    assert setup.extra["extra_uturn_checks"] is True and setup.extra["step_size_jitter"] == 0.0
    inp = dict(setup.inputs)
    kernels = inp.pop("kernels")
    model = partial(lgcp.lgcp_model, kernels=kernels)
    run = batched_nuts(model, inp, setup.extra["dense_mass"],
                       ("sigma", "length_scale", "field", "log_z", "log_window_integral"), WARMUP, DRAWS,
                       extra_uturn_checks=setup.extra["extra_uturn_checks"],
                       inverse_mass_matrix=setup.extra["initial_inverse_mass"],
                       target_accept=setup.extra["target_accept"])
    return dict(kind=kind, prior=prior, setup=setup, inp=inp, kernels=kernels, run=run,
                spectrum=kernels.spectrum)


def _draw_truth(m, rng):
    inp = m["inp"]
    rho0 = rng.gamma(inp["gamma_a"], 1.0 / inp["gamma_b"])
    sigma = abs(rng.normal(0.0, inp["sigma_scale"]))
    u = rng.beta(2.0, 2.0, size=inp["ls_lo"].shape)
    ls = inp["ls_lo"] * (inp["ls_hi"] / inp["ls_lo"]) ** u
    f = lgcp.simulate_field(m["spectrum"], ls, sigma, rng)
    return math.log(rho0), sigma, float(ls[0]), math.log(rho0) + f


def _fit_many(m, counts, scans, seed):
    """Fit every data set (rows of ``counts``, with its number of scans) in one compiled
    run; returns per data set dicts of draws (mu, sigma, length_scale, rate) and log λ
    (draws, n_cells), μ drawn exactly from its conjugate Gamma (``complete_posterior``)."""
    from sceneprior.inference import exact_idata

    inp, batch, stats_list = m["inp"], [], []
    for c, K in zip(counts, scans):
        stats = _stats(c, K)
        pre = build_preconditioner(m["spectrum"], (N, N), c, stats.exposure, "matern32", inp["ls_lo"],
                                   inp["ls_hi"], inp["sigma_scale"], use_pad=True)
        kw = dict(inp)
        kw.update(counts=jnp.asarray(stats.counts[inp["obs"]], float), exposure=jnp.asarray(stats.exposure[inp["obs"]]),
                  precond=pre.arrays())
        batch.append(kw)
        stats_list.append(stats)
    draws = m["run"](batch, seed)
    out = []
    for i, (kw, stats) in enumerate(zip(batch, stats_list)):
        post = {k: v[i][None] for k, v in draws.items() if k != "num_steps"}
        setup = type(m["setup"])(inputs={**kw, "counts": np.asarray(kw["counts"])}, extra=m["setup"].extra)
        idata = lgcp.complete_posterior(exact_idata(post), stats, setup, seed + i)
        p = {k: np.asarray(idata.posterior[k])[0] for k in ("mu", "sigma", "length_scale", "field", "rate")}
        p["num_steps"] = draws["num_steps"][i]
        out.append((p, p["field"].astype(float) + p["mu"][:, None]))
    return out


# --------------------------------------------------------------------------- exact pieces
def test_white_coordinates_have_the_field_prior_density():
    """log p(u) from ``field_and_prior`` differs from log N(T u; 0, C) by a constant (the
    log-Jacobian of the fixed map), for the padding correction on and off: checked on a
    tiny torus against scipy.stats.multivariate_normal with the dense torus covariance."""
    kind = get_model("lgcp")
    prior = resolve_prior(kind, {"length_scale_min": 150.0, "length_scale_max": 300.0}, "test")
    rng = np.random.default_rng(3)
    counts = rng.poisson(30.0, N * N)
    stats = _stats(counts)
    spectrum = lgcp.plan(stats, "matern52", prior)[0]
    m0, m1 = spectrum.geom.torus_shape
    ls, sigma = np.array([180.0, 180.0]), 0.8
    lam = np.asarray(spectrum.eigenvalues(ls, sigma**2))
    cov_row = np.asarray(implied_first_row(lam, (m0, m1)))
    i0, i1 = np.meshgrid(np.arange(m0), np.arange(m1), indexing="ij")
    i0, i1 = i0.ravel(), i1.ravel()
    C = cov_row[(i0[:, None] - i0[None, :]) % m0, (i1[:, None] - i1[None, :]) % m1]
    for use_pad in (True, False):
        pre = build_preconditioner(spectrum, (N, N), counts, stats.exposure, "matern52", [150.0], [300.0],
                                   1.0, use_pad=use_pad)
        arrays = pre.arrays()
        assert pre.soft_scale > 1.0  # the soft direction is in play, not the identity

        def torus_field(u):  # the full torus field: same maths, every torus cell returned
            f, logp = field_and_prior(jnp.asarray(u), jnp.asarray(lam), arrays, (m0, m1), use_pad)
            return np.asarray(f), float(logp)

        us = [rng.standard_normal((m0, m1)) for _ in range(3)]
        ref, got = [], []
        for u in us:
            f, logp = torus_field(u)
            ref.append(st.multivariate_normal(np.zeros(m0 * m1), C, allow_singular=True).logpdf(f))
            got.append(logp)
        diffs = np.array(got) - np.array(ref)
        np.testing.assert_allclose(diffs, diffs[0], rtol=0, atol=1e-6 * max(1.0, abs(diffs[0])))


def test_integrated_baseline_matches_quadrature():
    """The model's likelihood factor Σ N_c f_c − (a + S) log(b + Z) equals, up to a term free
    of f, log ∫ Π_c Pois(N_c | ρ E_c e^{f_c}) Gamma(ρ | a, b) dρ (scipy.integrate.quad)."""
    from numpyro import handlers

    rng = np.random.default_rng(11)
    counts = rng.poisson(5.0, N * N)
    stats = _stats(counts)
    kind = get_model("lgcp")
    prior = resolve_prior(kind, {"rate_median": 5.0 * N * N / K_SCANS, "rate_log_sd": 1.0,
                                 "length_scale_min": 150.0, "length_scale_max": 300.0}, "test")
    setup = kind.setup(stats, prior, ModelSpec("lgcp", {}, {"kernel": "matern32"}))
    inp = setup.inputs
    a, b = inp["gamma_a"], inp["gamma_b"]
    E = stats.exposure

    def quad_loglik(f):
        mu_f = E * np.exp(f)
        mode = math.log(counts.sum() / mu_f.sum())  # the integrand's peak in log ρ (for scaling)

        def log_integrand(log_rho):
            rho = math.exp(log_rho)
            return (st.poisson.logpmf(counts, rho * mu_f).sum() + st.gamma.logpdf(rho, a, scale=1.0 / b)
                    + log_rho)  # dρ = ρ d log ρ

        shift = log_integrand(mode)
        val, _ = integrate.quad(lambda x: math.exp(log_integrand(x) - shift), mode - 2.0, mode + 2.0,
                                epsabs=0, epsrel=1e-11, limit=200)
        return math.log(val) + shift

    vals = []
    for seed in range(3):
        tr = handlers.trace(handlers.seed(lgcp.lgcp_model, seed)).get_trace(**inp)
        f = np.asarray(tr["field"]["value"], float)
        site = tr["loglik"]
        model_ll = float(site["fn"].log_prob(site["value"]))
        assert abs(float(tr["log_z"]["value"]) - np.log((E * np.exp(f)).sum())) < 1e-4
        vals.append(model_ll - quad_loglik(f))
    # the difference is the same constant (log Γ(a+S) − log Γ(a) + a log b − Σ log N_c! + Σ N_c log E_c)
    np.testing.assert_allclose(vals, vals[0], atol=1e-6)


def test_rate_is_the_window_integral_of_the_map(machinery):
    """rate = Σ_c λ_c |c ∩ W| draw by draw (DESIGN.md §4), λ_c = exp(μ + f_c)."""
    rng = np.random.default_rng(5)
    _, _, _, log_lam = _draw_truth(machinery, rng)
    counts = rng.poisson(np.exp(log_lam) * _stats(np.zeros(N * N)).exposure)
    (post, fit_log_lam), = _fit_many(machinery, [counts], [K_SCANS], seed=5)
    area = _stats(np.zeros(N * N)).window_area
    np.testing.assert_allclose((np.exp(fit_log_lam) * area).sum(-1), post["rate"], rtol=2e-6)


# --------------------------------------------------------------------------- calibration
@pytest.mark.slow
def test_simulation_based_calibration(machinery):
    m = machinery
    rng = np.random.default_rng(2018)
    reps, L = 100, 19  # 19 thinned draws → 20 possible ranks
    cells = [0, 14, 35]
    names = ["mu", "sigma", "length_scale"] + [f"cell {c}" for c in cells]
    area = _stats(np.zeros(N * N)).exposure
    truths, data = [], []
    for r in range(reps):
        mu, sigma, ls, log_lam = _draw_truth(m, rng)
        truths.append(np.array([mu, sigma, ls] + [log_lam[c] for c in cells]))
        data.append(rng.poisson(np.exp(log_lam) * area))
    fits = _fit_many(m, data, [K_SCANS] * reps, seed=2018)
    draws = [np.column_stack([post["mu"], post["sigma"], post["length_scale"][:, 0]]
                             + [fit_log_lam[:, c] for c in cells]) for post, fit_log_lam in fits]
    # 200 draws thinned to L = 19 evenly spaced ones (about every 10th), within the ESS of
    # each quantity (check_sbc measures it; σ's is the least: median 58, 10th percentile
    # 20.7), so that ranks are roughly independent draws; 5 groups
    # of 4 ranks, 20 expected each; with the negative control (truth moved 1 posterior sd)
    check_sbc(draws, truths, names, thin_to=L, bins=5)


@pytest.mark.slow
def test_coverage_and_more_scans_shrink_error(machinery):
    m = machinery
    rng = np.random.default_rng(7)
    n_sets = 20
    cover = np.zeros(n_sets)
    rmse = np.zeros((n_sets, 2))
    area = _stats(np.zeros(N * N)).exposure / K_SCANS  # per-scan cell areas
    truths, data, scans = [], [], []
    for i in range(n_sets):
        _, _, _, log_lam = _draw_truth(m, rng)
        truths.append(log_lam)
        for K in (K_SCANS, 4 * K_SCANS):
            data.append(rng.poisson(np.exp(log_lam) * area * K))
            scans.append(K)
    fits = _fit_many(m, data, scans, seed=7)
    for i, log_lam in enumerate(truths):
        for j in range(2):
            _, fit_log_lam = fits[2 * i + j]
            if j == 0:
                lo, hi = np.quantile(fit_log_lam, [0.05, 0.95], axis=0)
                cover[i] = np.mean((log_lam >= lo) & (log_lam <= hi))
            rmse[i, j] = np.sqrt(np.mean((fit_log_lam.mean(axis=0) - log_lam) ** 2))
    half = st.t.ppf(0.995, n_sets - 1) * cover.std(ddof=1) / np.sqrt(n_sets)
    assert cover.mean() - half <= 0.90 <= cover.mean() + half, (cover.mean(), half)
    # ×4 scans: the posterior-mean error shrinks on average, and a one-sided sign test over
    # the data sets rejects "no improvement" (Binomial(n_sets, ½), scipy.stats.binom) at 0.01
    assert rmse[:, 1].mean() < rmse[:, 0].mean()
    k = int((rmse[:, 1] < rmse[:, 0]).sum())
    assert st.binom.sf(k - 1, n_sets, 0.5) < 0.01, (k, rmse)


# --------------------------------------------------------------------------- pipeline
def test_bad_lgcp_input_is_one_line_exit_2(tmp_path, capsys):
    """Unknown kernel, zones outside the region, negative thresholds, impossible grids, length
    scales the torus cannot embed."""
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
    assert code == 2 and "coarser grid" in err and "at most about" in err
    # length scales the 2× torus cannot embed (covariance off by more than WRAP_LIMIT·σ²)
    code, err = run(model={"kind": "lgcp", "prior": {"length_scale_max": 900.0}})
    assert code == 2 and "periodic boundaries" in err and "use length_scale_max ≤" in err


@pytest.mark.parametrize("variance_kept", [1.0, 0.99])
def test_lgcp_run_outputs_on_a_polar_masked_grid(tmp_path, variance_kept):
    """A short LGCP fit through the pipeline on simulated Lowmarsh-like data: both polar
    units, exceedance maps, zone rates, the embedding and parametrisation reports; the rate
    against the simulator's truth (∫_W λ by quadrature) with |z| < 3.5. With every torus
    mode and with spectral truncation (the kept modes and variance reported)."""
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
        "model": {"kind": "lgcp", "kernel": "matern52", "variance_kept": variance_kept},
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
    assert "halves of every merged subtree" in s["sampler"]["nuts_trees"]
    assert s["sampler"]["step_size_after_warmup"] == "the adapted step size, fixed"
    assert s["sampler"]["step_size_adaptation_target"]["mean_acceptance_probability"] == 0.8  # numpyro's default
    assert s["lgcp"]["field_parameters"]["variance_kept"] == variance_kept
    assert s["lgcp"]["field_parameters"]["variance_kept_source"] == "model.variance_kept"
    if variance_kept == 1.0:
        assert s["lgcp"]["field_parameters"]["truncation"].startswith("none")
    else:
        tr = s["lgcp"]["field_parameters"]["truncation"]
        assert tr["modes_kept"] < tr["torus_modes"]
        assert variance_kept <= tr["variance_fraction_kept_at_shortest_length_scale"] <= 1.0
        assert s["lgcp"]["embedding"]["method"] == "periodised"
        # weak data (150 scans over 70 cells): the dropped modes are far below what the data
        # leave uncertain, so no warning (tests/test_truncation.py checks the check itself)
        dm = s["lgcp"]["field_parameters"]["dropped_modes"]
        assert 0.0 < dm["dropped_variance_per_cell"] < dm["median_posterior_variance"]
        assert dm["predicted_coverage_of_true_log_intensity"]["90"] > 0.85 and not dm["warning"]
    assert s["lgcp"]["notes"] == []
    assert ("padding_correction" if variance_kept == 1.0 else "mode_map") in s["lgcp"]["parametrisation"]
    # warmup started σ and both length scales (range, bearing) — on the full torus also the
    # soft direction — at their own mass block, which numpyro took (a wrong size would not run)
    start = s["lgcp"]["parametrisation"]["warmup_mass_start"]
    assert len(s["lgcp"]["posterior"]["length_scale"]) == 2
    block = start["sigma+ls_unit+u_soft" if variance_kept == 1.0 else "sigma+ls_unit"]
    assert block["variance_per_unconstrained_coordinate"] == ([lgcp.INITIAL_HYPER_VARIANCE] * 3
                                                              + [1.0] * (variance_kept == 1.0))
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


def test_prior_draws_rate_mean_and_prior_predictive_check(tmp_path):
    """``lgcp.prior_draws`` (used by `sceneprior check`'s prior predictive): the mean of the
    prior rate equals E[ρ₀]·|W|·E[exp(σ²/2)] = (a/b)·|W|·(1 − s²)^(-1/2) for σ ~ HalfNormal(s),
    s < 1 — the lognormal mean E[e^f] = exp(σ²/2) at fixed σ (Møller, Syversveen &
    Waagepetersen 1998) and the χ²₁ moment generating function E[exp(tχ²₁)] = (1 − 2t)^(-1/2)
    (from memory) — within 4 Monte Carlo standard errors; and `check` runs its prior side on
    an LGCP run (it crashed before prior_draws existed)."""
    from conftest import box_case
    from sceneprior.checks import check_run
    from sceneprior.fitting import fit
    from sceneprior.results import write_run
    from sceneprior.spec import load_spec

    rng = np.random.default_rng(31)
    K = 40
    n = rng.poisson(12.0, K)
    scans = np.repeat(np.arange(K), n)
    prior = {"rate_median": 12.0, "rate_log_sd": 0.3, "sigma_scale": 0.5}
    spec_path = box_case(tmp_path, scans, rng.uniform(0, 1000, n.sum()), rng.uniform(0, 500, n.sum()),
                         n_scans_table=K, model={"kind": "lgcp", "prior": prior},
                         sampler={"chains": 2, "warmup": 150, "draws": 150, "seed": 2, "progress": False},
                         output={"dir": str(tmp_path / "runs")})
    res = fit(load_spec(spec_path), progress=False, log=lambda m: None)
    a, b = res.setup.extra["gamma_prior"]
    draws = lgcp.prior_draws(res.prior, res.stats, res.setup, np.random.default_rng(5), 4000)
    ref = a / b * res.stats.window_total / math.sqrt(1.0 - prior["sigma_scale"] ** 2)
    mcse = draws["rate"].std(ddof=1) / math.sqrt(draws["rate"].size)
    assert abs(draws["rate"].mean() - ref) < 4 * mcse, (draws["rate"].mean(), ref, mcse)
    out = check_run(write_run(res), prior_side=True, sensitivity=False)
    pp = out["prior_predictive"]
    assert "status" not in pp and 0.0 <= pp["observed_quantile"] <= 1.0
    assert pp["prior_rate_q05"] < pp["prior_rate_q50"] < pp["prior_rate_q95"]


def test_smooth_kernel_gradient_stays_finite_where_eigenvalues_underflow():
    """A squared-exponential field on a fine grid: e^{−2π²ℓ²s²} underflows to exactly 0 at
    high frequencies, and the gradient of the potential in σ and ℓ must stay finite there
    (√ of a zero eigenvalue once made it NaN: NUTS diverged on every draw or found no start).
    Reference: the analytic derivative of √(σ²·0) in σ is 0 (calculus, no library)."""
    import scipy.sparse as sp
    from numpyro.infer.util import potential_energy

    from sceneprior.binning import BinnedStats
    from sceneprior.geometry import Region
    from sceneprior.models.registry import get_model, resolve_prior
    from sceneprior.spec import ModelSpec

    n, K = 256, 100
    reg = Region("cartesian", (0.0, 1000.0), (0.0, 1000.0))
    g = reg.grid((n, n))
    area = g.cell_area().ravel()
    counts = np.random.default_rng(3).poisson(0.3, n * n)
    stats = BinnedStats(reg, g, counts, K * area, area, area, K, np.arange(K), np.zeros(K, np.int64),
                        sp.csr_matrix((K, n * n)))
    kind = get_model("lgcp")
    prior = resolve_prior(kind, {"length_scale_min": 50.0, "length_scale_max": 250.0}, "test")
    setup = kind.setup(stats, prior, ModelSpec("lgcp", {}, {"kernel": "squared_exponential", "variance_kept": 1.0}))
    n_t = setup.extra["geom"].geom.n_torus
    lam = np.asarray(setup.extra["geom"].eigenvalues(np.array([50.0, 50.0]), 1.0))
    assert (lam == 0).any()  # the case under test: eigenvalues that underflow
    rng = np.random.default_rng(0)
    q = {"sigma": jnp.log(0.05), "ls_unit": jnp.asarray([-2.9]), "u_soft": jnp.asarray(0.3),
         "u_rest": jnp.asarray(rng.uniform(-2, 2, n_t - 1))}  # unconstrained: σ = 0.05, ℓ near its minimum
    grad = jax.grad(lambda z: potential_energy(kind.fn, (), setup.inputs, z))(q)
    assert all(np.isfinite(np.asarray(v)).all() for v in grad.values()), grad


@pytest.mark.parametrize("variance_kept", [1.0, 0.99])
def test_chains_start_around_the_conditional_mode_of_the_model_density(variance_kept):
    """The white coordinates' start: ``conditional_mode`` must optimise the model's own
    density. Reference: numpyro's ``potential_energy`` of ``lgcp_model`` (σ, ℓ held at the
    pilot): between the start 0 and the mode it must fall by the gain the search reports
    (the integrated baseline and the field prior are the model's; a constant cancels), and
    its gradient at the mode must be ~0 against that at 0 (the mode is a stationary point
    of the model's density, calculus). ``init_near`` must put each chain
    within START_RADIUS of the mode per coordinate, at different points per key."""
    from conftest import check_chain_start

    kind = get_model("lgcp")
    prior = resolve_prior(kind, {"rate_median": PER_CELL * N * N / K_SCANS, "rate_log_sd": 0.5,
                                 "sigma_scale": 0.7, "length_scale_min": 120.0, "length_scale_max": 300.0}, "test")
    rng = np.random.default_rng(11)
    counts = rng.poisson(PER_CELL * np.exp(rng.normal(0, 0.6, N * N)))
    setup = kind.setup(_stats(counts), prior, ModelSpec("lgcp", {}, {"kernel": "matern32",
                                                                     "variance_kept": variance_kept}))
    values = setup.extra["init_strategy"].keywords["values"]
    white = setup.extra["init_strategy"].keywords["centred"]
    assert set(white) == ({"u_modes"} if variance_kept < 1 else {"u_soft", "u_rest"})
    # unconstrained σ, ℓ held at the start's values
    held = {"sigma": jnp.log(values["sigma"]), "ls_unit": jnp.log(values["ls_unit"]) - jnp.log1p(-values["ls_unit"])}
    check_chain_start(kind.fn, setup.inputs, setup.extra["init_strategy"], setup.extra["chain_start"], held,
                      lgcp.START_RADIUS, still="sigma")
    # without the search (a caller that starts its chains itself) the white coordinates are
    # left to numpyro's start and the report says so; the rest of the set-up is the same
    bare = kind.setup(_stats(counts), prior, ModelSpec("lgcp", {}, {"kernel": "matern32",
                                                                    "variance_kept": variance_kept}),
                      start_search=False)
    assert bare.extra["init_strategy"].keywords["centred"] == ()
    assert set(white).isdisjoint(bare.extra["init_strategy"].keywords["values"])
    assert bare.extra["chain_start"] == lgcp.NOT_SEARCHED
    assert bare.extra["init_strategy"].keywords["values"]["sigma"] == values["sigma"]


def test_cells_gated_out_in_every_scan_are_marked_as_extrapolated(tmp_path):
    """A moored object gated (disc, 80 m) in every scan at the centre of a 100 m cell removes
    the whole cell from the window of every scan (a disc of radius r ≥ 50√2 m covers the
    square around its centre: elementary geometry), so that cell has no exposure. Its value
    is the field's prediction from its neighbours: intensity.nc flags it, the export keeps
    its value and flags it, and the report's maps mark it."""
    import json

    import xarray as xr

    from conftest import box_case, write_csv
    from sceneprior.export import export_run
    from sceneprior.fitting import fit
    from sceneprior.report import build_report
    from sceneprior.results import load_run, write_run
    from sceneprior.spec import load_spec

    rng = np.random.default_rng(8)
    K = 40
    n = rng.poisson(20.0, K)
    s = np.repeat(np.arange(K), n)
    x, y = rng.uniform(0, 1000, s.size), rng.uniform(0, 500, s.size)
    keep = np.hypot(x - 450.0, y - 250.0) > 80.0  # detections in the gate would be dropped anyway
    write_csv(tmp_path / "obj.csv", ["scan", "object", "x", "y"], [(k, "buoy", 450.0, 250.0) for k in range(K)])
    spec = box_case(tmp_path, s[keep], np.round(x[keep], 3), np.round(y[keep], 3), n_scans_table=K,
                    data={"detections": "det.csv", "scans": "scans.csv", "objects": "obj.csv",
                          "gates": {"radius": 80.0}},
                    model={"kind": "lgcp", "kernel": "matern32"},
                    sampler={"chains": 2, "warmup": 150, "draws": 150, "seed": 2, "progress": False})
    res = fit(load_spec(spec), progress=False, log=lambda m: None)
    hole = 4 * 5 + 2  # cell (x 400–500 m, y 200–300 m), flat C-order on the 10 × 5 grid
    assert res.stats.exposure[hole] == 0.0 and (np.delete(res.stats.exposure, hole) > 0).all()
    path = write_run(res, tmp_path / "runs")
    with xr.open_dataset(path / "intensity.nc", engine="h5netcdf") as ds:
        flag = np.asarray(ds["extrapolated"].values, bool)
        mean = np.asarray(ds["intensity_mean"].values, float)
    assert flag.sum() == 1 and flag.reshape(-1)[hole]
    assert np.isfinite(mean.reshape(-1)[hole]) and mean.reshape(-1)[hole] > 0  # predicted, not masked
    run = load_run(path)
    doc = json.loads(json.dumps(export_run(run, override_gate=True)[0]))  # short chains: gate overridden
    assert np.asarray(doc["clutter"]["grid"]["extrapolated"], bool).reshape(-1)[hole]
    assert doc["clutter"]["intensity"]["values"][4][2] is not None
    assert "Dotted: 1 cell inside the window without exposure" in build_report(run)
