"""The lgcp_sites model (a shared LGCP field plus site deviations, models/lgcp_sites.py):
its density against outside references, coverage and shrinkage on sites simulated from its
prior, and a run through the pipeline (outputs, gate, export of one site, bad input).

References:
- The white coordinates of the S + 1 fields: for the map (u_f, u_s) → (f, d_s) (per-field
  linear maps, the shear of d_s by the shared field) the density of the coordinates is
  N(f; 0, C_σ) Π_s N(d_s; 0, C_σd) times |det J| (change of variables; J by jax autodiff,
  triangular since d_s depends on f but f not on d_s); checked
  against scipy.stats.multivariate_normal of each torus field with the dense torus
  covariance built from its first row (block-circulant, Wood & Chan 1994).
- The integrated site baselines: ∫ Π_c Pois(N_sc | ρ E_sc e^{g_sc}) Gamma(ρ | 1/τ², e^{−η}/τ²) dρ
  per site by scipy.integrate.quad with scipy.stats.poisson / gamma (the Gamma–Poisson
  mixture, Gelman et al., BDA3 §2.6), and log m = η − ⟨f⟩_W under scipy.stats.norm.
- Exposures with gates: |W_k| = |W| − (gates in scan k)·πr² for disc gates wholly inside the
  window and apart (elementary geometry; conftest.lane_gate_recording).
- Coverage: pooled fraction of the cells (of every site) whose 90 % interval covers the true
  log intensity; cells of one data set are correlated, so the band is a t-interval on the
  per-data-set fractions (two-sided 99 %, scipy.stats.t), as in tests/test_lgcp.py.
- Rates of one pipeline fit: |z| < 3.5 against the simulator's truth (single replicate).
"""

from __future__ import annotations

import json
import math
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.sparse as sp
import scipy.stats as st
from scipy import integrate

from conftest import batched_nuts, box_case, lane_gate_recording, write_csv
from sceneprior.binning import BinnedStats
from sceneprior.fields.embedding import implied_first_row
from sceneprior.fields.preconditioning import field_and_prior
from sceneprior.geometry import Region
from sceneprior.models import lgcp, lgcp_sites
from sceneprior.models.registry import get_model, resolve_prior
from sceneprior.spec import ModelSpec

BOX = 600.0  # m, square region


def _site_stats(tmp_path, per_scan_counts, sites, n=4):
    """BinnedStats of a recording on an n × n grid of the BOX square with per-scan cell counts
    (K, n²), and a scans table with the sites; returns (stats, ModelSpec of lgcp_sites)."""
    reg = Region("cartesian", (0.0, BOX), (0.0, BOX))
    g = reg.grid((n, n))
    area = g.cell_area().ravel()
    per_scan = np.asarray(per_scan_counts, np.int64)
    K = per_scan.shape[0]
    stats = BinnedStats(reg, g, per_scan.sum(axis=0), K * area, area, area, K, np.arange(K), per_scan.sum(axis=1),
                        sp.csr_matrix(per_scan))
    path = write_csv(tmp_path / "scans.csv", ["scan", "site"], zip(range(K), sites))
    return stats, ModelSpec("lgcp_sites", {}, {"kernel": "matern32", "_scans": {"path": str(path), "scan": "scan"}})


# --------------------------------------------------------------------------- exact pieces
def test_log_density_matches_dense_fields_and_quadrature(tmp_path):
    """The model's log joint at random points differs from an independent evaluation by one
    constant: HalfNormal/Beta/Normal priors (scipy.stats), each torus field under its dense
    multivariate normal, and each site's baseline integrated out by quadrature."""
    from numpyro.infer.util import log_density

    rng = np.random.default_rng(17)
    K = (12, 5)
    sites = ["north"] * K[0] + ["quay"] * K[1]
    per_scan = rng.poisson(0.8, (sum(K), 16))
    stats, mspec = _site_stats(tmp_path, per_scan, sites)
    kind = get_model("lgcp_sites")
    prior = resolve_prior(kind, {"length_scale_min": 150.0, "length_scale_max": 300.0, "rate_log_sd": 1.0}, "test")
    setup = kind.setup(stats, prior, mspec)
    inp = setup.inputs
    kern = inp["kernels"]
    spectrum = kern.spectrum
    m0, m1 = spectrum.geom.torus_shape
    n_t = m0 * m1
    counts, exposure, wa = inp["counts"], inp["exposure"], inp["window_area"]
    # per-site statistics from the scans' labels: N_sc and E_sc = K_s |c ∩ W|
    np.testing.assert_array_equal(counts, [per_scan[:K[0]].sum(0), per_scan[K[0]:].sum(0)])
    np.testing.assert_allclose(exposure, np.outer(K, wa))
    i0, i1 = np.meshgrid(np.arange(m0), np.arange(m1), indexing="ij")
    i0, i1 = i0.ravel(), i1.ravel()

    def dense_cov(variance, ls):
        row = np.asarray(implied_first_row(np.asarray(spectrum.eigenvalues(np.resize(ls, 2), variance)), (m0, m1)))
        return row[(i0[:, None] - i0[None, :]) % m0, (i1[:, None] - i1[None, :]) % m1]

    def torus_fields(p, as_numpy=True):
        """The torus fields f, d_s at the white coordinates p (the model's composition of
        preconditioning.field_and_prior maps, every torus cell returned)."""
        p = {k: jnp.asarray(v) for k, v in p.items()}
        ls = np.asarray(inp["ls_lo"] * (inp["ls_hi"] / inp["ls_lo"]) ** p["ls_unit"])
        unit = jnp.maximum(spectrum.eigenvalues(jnp.asarray(np.resize(ls, 2)), 1.0), 0.0)
        lam_f, lam_d = p["sigma"] ** 2 * unit, p["sigma_dev"] ** 2 * unit
        rot = lgcp.FieldKernels(spectrum, kern.use_pad).rotate
        pre, pre_d = inp["precond"], inp["dev_precond"]
        w = (pre["w_scale"] * inp["site_share"])[:, None, None]
        info = lam_f * jnp.sum(w / (1.0 + lam_d[None] * w), axis=0)
        f, _ = field_and_prior(rot(p["u_soft"], p["u_rest"], pre["householder"]), lam_f, pre, (m0, m1), kern.use_pad,
                               info=info)
        F = jnp.fft.rfft2(f.reshape(m0, m1))
        zero = jnp.ones_like(unit).at[0, 0].set(0.0)
        conv = np.asarray if as_numpy else (lambda x: x)
        out = [conv(f)]
        for s in range(2):
            ps = {k: v[s] for k, v in pre_d.items()}
            shift = ps["w_scale"] * zero * jnp.sqrt(lam_d / (1.0 + ps["w_scale"] * zero * lam_d)) * F
            d, _ = field_and_prior(rot(p["dev_soft"][s], p["dev_rest"][s], ps["householder"]), lam_d, ps, (m0, m1),
                                   kern.use_pad_dev, shift=shift)
            out.append(conv(d))
        return ls, out

    def jacobian_logdet(p):
        """log |det ∂(f, d_1, d_2)/∂(u_soft, u_rest, dev_soft, dev_rest)| at p (jax.jacfwd, dense
        slogdet): depends on σ, σ_d, ℓ, so it is not part of the constant."""
        sizes = [1, n_t - 1, 2, 2 * (n_t - 1)]

        def fields_of(z):
            a, b, c, d = jnp.split(z, np.cumsum(sizes)[:-1])
            q = {**p, "u_soft": a[0], "u_rest": b, "dev_soft": c, "dev_rest": d.reshape(2, n_t - 1)}
            return jnp.concatenate([jnp.ravel(x) for x in torus_fields(q, as_numpy=False)[1]])

        z = jnp.concatenate([jnp.atleast_1d(jnp.asarray(p["u_soft"])), jnp.asarray(p["u_rest"]),
                             jnp.asarray(p["dev_soft"]), jnp.ravel(jnp.asarray(p["dev_rest"]))])
        sign, logdet = np.linalg.slogdet(np.asarray(jax.jacfwd(fields_of)(z)))
        assert sign != 0
        return float(logdet)

    def site_loglik(g, N, E, eta, cv):
        """log ∫ Π_c Pois(N_c | ρ E_c e^{g_c}) Gamma(ρ | 1/τ², rate e^{−η}/τ²) dρ (quadrature in log ρ)."""
        a = 1.0 / cv**2
        mu_c = E * np.exp(g)

        def log_integrand(x):
            return (st.poisson.logpmf(N, math.exp(x) * mu_c).sum()
                    + st.gamma.logpdf(math.exp(x), a, scale=1.0 / (a * math.exp(-eta))) + x)

        mode = math.log((a + N.sum()) / (a * math.exp(-eta) + mu_c.sum()))  # where to centre the window
        half = 40.0 / math.sqrt(a + N.sum())
        shift = log_integrand(mode)
        val, _ = integrate.quad(lambda x: math.exp(log_integrand(x) - shift), mode - half, mode + half,
                                points=[mode], epsabs=0, epsrel=1e-11, limit=400)
        return math.log(val) + shift

    diffs = []
    for _ in range(4):
        p = {"sigma": rng.uniform(0.3, 1.2), "sigma_dev": rng.uniform(0.15, 0.8), "ls_unit": rng.uniform(0.2, 0.8, 1),
             "cv": rng.uniform(0.2, 1.5), "level": inp["mu_loc"] + rng.normal(0.0, 0.5),
             "u_soft": rng.normal(), "u_rest": rng.normal(size=n_t - 1),
             "dev_soft": rng.normal(size=2), "dev_rest": rng.normal(size=(2, n_t - 1))}
        model_lp, tr = log_density(kind.fn, (), inp, {k: jnp.asarray(v) for k, v in p.items()})
        ls, fields = torus_fields(p)
        grid = [fl.reshape(m0, m1)[:4, :4].reshape(-1) for fl in fields]
        mean_w = [float(x @ wa / wa.sum()) for x in grid]
        np.testing.assert_allclose(np.asarray(tr["field"]["value"]), grid[0] - mean_w[0], atol=2e-6)
        np.testing.assert_allclose(np.asarray(tr["deviation"]["value"]),
                                   [grid[1] - mean_w[1], grid[2] - mean_w[2]], atol=2e-6)
        ref = (st.halfnorm(scale=prior["sigma_scale"]).logpdf(p["sigma"])
               + st.halfnorm(scale=prior["sigma_dev_scale"]).logpdf(p["sigma_dev"])
               + st.halfnorm(scale=prior["cv_scale"]).logpdf(p["cv"]) + st.beta(2, 2).logpdf(p["ls_unit"][0])
               + st.norm(inp["mu_loc"], prior["rate_log_sd"]).logpdf(p["level"] - mean_w[0]))
        ref += st.multivariate_normal(np.zeros(n_t), dense_cov(p["sigma"] ** 2, ls), allow_singular=True).logpdf(
            fields[0])
        # change of variables (u_f, u_d) → (f, d_1, d_2): log |det J| by autodiff of the map
        ref += jacobian_logdet(p)
        cov_d = dense_cov(p["sigma_dev"] ** 2, ls)
        for s in range(2):
            ref += st.multivariate_normal(np.zeros(n_t), cov_d, allow_singular=True).logpdf(fields[1 + s])
            g = (grid[0] - mean_w[0]) + (grid[1 + s] - mean_w[1 + s])
            ref += site_loglik(g, counts[s], exposure[s], p["level"], p["cv"])
        diffs.append(float(model_lp) - ref)
    np.testing.assert_allclose(diffs, diffs[0], rtol=0, atol=1e-6 * max(1.0, abs(diffs[0])))


def test_site_exposures_with_gates_match_geometry(tmp_path):
    """With disc gates, site s's exposure Σ_c E_sc = Σ_{k∈s} |W_k| (|W_k| by elementary
    geometry) and its counts the detections outside the gates (numpy hypot)."""
    from sceneprior.fitting import prepare
    from sceneprior.spec import load_spec

    rng = np.random.default_rng(8)
    K = 60
    site = np.where(np.arange(K) < 40, "breakwater", "quay")
    spec, n_out, window_scans = lane_gate_recording(tmp_path, rng, np.full(K, 6.0), np.where(site == "quay", 1.0, 0.3),
                                                    scans_columns={"site": site}, model={"kind": "lgcp_sites"})
    s = load_spec(spec)
    _, _, stats = prepare(s)
    _, sites, idx = lgcp_sites._site_labels(stats, s.model)
    N, E = lgcp_sites.site_binned(stats, idx, len(sites))
    W = 1000.0 * 500.0
    for j, name in enumerate(sites):
        np.testing.assert_allclose(E[j].sum(), W * window_scans[site == name].sum(), rtol=1e-9)
        assert N[j].sum() == n_out[site == name].sum()


# --------------------------------------------------------------------------- simulated sites
N_CELLS = 5  # 5 × 5 grid
SCANS = (60, 6)  # the second site has few scans
PER_CELL = 1.5  # prior median detections per cell per scan… over the window, at the group baseline
WARMUP, DRAWS = 150, 150
N_SETS = 12  # simulated data sets (two sites each), fitted in one compiled run


@pytest.fixture(scope="module")
def machinery(tmp_path_factory):
    """The model on a 5 × 5 grid with two sites and one NUTS run mapped over data sets
    (``conftest.batched_nuts``; tests/test_lgcp.py uses the same)."""
    tmp = tmp_path_factory.mktemp("lgcp-sites")
    kind = get_model("lgcp_sites")
    # units only: the group baseline's median is PER_CELL detections per cell per scan
    prior = resolve_prior(kind, {"rate_median": PER_CELL * N_CELLS**2, "rate_log_sd": 0.5, "cv_scale": 0.5,
                                 "sigma_scale": 0.8, "sigma_dev_scale": 0.4,
                                 "length_scale_min": 150.0, "length_scale_max": 300.0}, "test")
    sites = ["a"] * SCANS[0] + ["b"] * SCANS[1]
    per_scan = np.full((sum(SCANS), N_CELLS**2), 2)

    def make_setup(per_scan_counts, folder, start_search=True):
        folder.mkdir(exist_ok=True)
        stats, mspec = _site_stats(folder, per_scan_counts, sites, N_CELLS)
        return stats, kind.setup(stats, prior, mspec, use_pad=True, start_search=start_search)

    stats0, setup = make_setup(per_scan, tmp / "0")
    inp = dict(setup.inputs)
    kernels = inp.pop("kernels")
    model = partial(lgcp_sites.lgcp_sites_model, kernels=kernels)
    run = batched_nuts(model, inp, setup.extra["dense_mass"],
                       ("level", "cv", "sigma", "sigma_dev", "field", "deviation", "log_z", "log_window_integral",
                        "rate"), WARMUP, DRAWS, init_strategy=setup.extra["init_strategy"],
                       extra_uturn_checks=setup.extra["extra_uturn_checks"],
                       target_accept=setup.extra["target_accept"])
    return dict(kind=kind, prior=prior, setup=setup, inp=inp, spectrum=kernels.spectrum, stats0=stats0,
                run=run, make_setup=make_setup, tmp=tmp)


def _draw_truth(m, rng):
    """Sites drawn from the model's prior: log m ~ N, τ ~ HalfNormal, ρ_s ~ Gamma(1/τ², 1/(τ²m)),
    σ, σ_d ~ HalfNormal, ℓ, and f, d_s from the model's own torus covariance (every mode);
    returns the true log λ (S, n_cells) and the site rates."""
    inp, prior = m["inp"], m["prior"]
    wa = inp["window_area"]
    log_m = rng.normal(inp["mu_loc"], prior["rate_log_sd"])
    tau = abs(rng.normal(0.0, prior["cv_scale"]))
    rho = rng.gamma(1.0 / tau**2, tau**2 * math.exp(log_m), size=2)
    sigma = abs(rng.normal(0.0, prior["sigma_scale"]))
    sigma_d = abs(rng.normal(0.0, prior["sigma_dev_scale"]))
    ls = inp["ls_lo"] * (inp["ls_hi"] / inp["ls_lo"]) ** rng.beta(2.0, 2.0, size=inp["ls_lo"].shape)
    f = lgcp.simulate_field(m["spectrum"], ls, sigma, rng)
    d = np.stack([lgcp.simulate_field(m["spectrum"], ls, sigma_d, rng) for _ in range(2)])
    d = d - (d @ wa / wa.sum())[:, None]
    log_lam = np.log(rho)[:, None] + f[None, :] + d
    return log_lam, (np.exp(log_lam) * wa).sum(axis=1)


def _fit_many(m, data, seed):
    """Fit every data set (per-scan cell counts (K, n_cells)) in one compiled run; per data
    set: dict of draws incl. the exactly drawn site_mu, site_rate (complete_posterior) and
    log λ (draws, S, n_cells)."""
    from sceneprior.inference import exact_idata

    batch, setups = [], []
    # the compiled run starts every data set where the machinery's set-up starts
    # (batched_nuts' init_strategy), so the per-data-set set-ups skip the start search: it
    # would compile one value-and-gradient per data set for nothing (about 30 s of the suite)
    for i, per_scan in enumerate(data):
        _, s = m["make_setup"](per_scan, m["tmp"] / f"set{seed}-{i}", start_search=False)
        kw = dict(s.inputs)
        kw.pop("kernels")
        batch.append(kw)
        setups.append(s)
    draws = m["run"](batch, seed)
    out = []
    for i, s in enumerate(setups):
        post = {k: v[i][None] for k, v in draws.items() if k != "num_steps"}
        idata = lgcp_sites.complete_posterior(exact_idata(post), None, s, seed + i)
        p = {k: np.asarray(idata.posterior[k])[0] for k in idata.posterior.data_vars}
        p["log_lam"] = p["site_mu"][..., None] + p["field"][:, None, :] + p["deviation"]
        p["num_steps"] = draws["num_steps"][i]
        p["counts"] = s.inputs["counts"]
        p["exposure"] = s.inputs["exposure"]
        out.append(p)
    return out


@pytest.fixture(scope="module")
def simulated_fits(machinery):
    m = machinery
    rng = np.random.default_rng(2027)
    area = m["inp"]["window_area"]
    truths, data = [], []
    for _ in range(N_SETS):
        log_lam, rates = _draw_truth(m, rng)
        truths.append((log_lam, rates))
        site = np.repeat([0, 1], SCANS)
        data.append(rng.poisson(np.exp(log_lam[site]) * area[None, :]))
    return truths, _fit_many(m, data, seed=11)


def test_coverage_of_every_site_cell(simulated_fits):
    """Pooled 90 % coverage of the true cell log intensities of both sites, in a two-sided
    99 % t-band from the spread across N_SETS (12) data sets; site rates in a binomial band."""
    truths, fits = simulated_fits
    cover = np.zeros(len(fits))
    rate_hits = []
    for i, ((log_lam, rates), p) in enumerate(zip(truths, fits)):
        lo, hi = np.quantile(p["log_lam"], [0.05, 0.95], axis=0)
        cover[i] = np.mean((log_lam >= lo) & (log_lam <= hi))
        rlo, rhi = np.quantile(p["site_rate"], [0.05, 0.95], axis=0)
        rate_hits += list((rates >= rlo) & (rates <= rhi))
    half = st.t.ppf(0.995, cover.size - 1) * cover.std(ddof=1) / math.sqrt(cover.size)
    assert cover.mean() - half <= 0.90 <= cover.mean() + half, (cover.mean(), half)
    n = len(rate_hits)  # 2·N_SETS site rates: two-sided 99 % binomial band of the number covered
    lo, hi = st.binom.ppf(0.005, n, 0.9), st.binom.isf(0.005, n, 0.9)
    assert lo <= sum(rate_hits) <= hi, (sum(rate_hits), lo, hi)


def test_site_with_few_scans_is_shrunk_toward_the_shared_field(simulated_fits):
    """The 6-scan site's posterior mean map (window-mean removed) is closer to the shared
    field's than its raw empirical log intensity log((N+½)/E) is, in every data set, and is
    pulled further (as a fraction of that distance) than the 60-scan site's (one-sided paired
    t-test, scipy.stats.ttest_rel, level 0.01)."""
    truths, fits = simulated_fits
    shrink = np.zeros((len(fits), 2))
    for i, p in enumerate(fits):
        shared = p["field"].mean(axis=0)
        site_map = p["log_lam"].mean(axis=0)
        site_map = site_map - site_map.mean(axis=1, keepdims=True)
        raw = np.log((p["counts"] + 0.5) / p["exposure"])
        raw = raw - raw.mean(axis=1, keepdims=True)
        for s in range(2):
            to_shared = np.linalg.norm(site_map[s] - (shared - shared.mean()))
            raw_to_shared = np.linalg.norm(raw[s] - (shared - shared.mean()))
            shrink[i, s] = 1.0 - to_shared / raw_to_shared
        assert shrink[i, 1] > 0.0, (i, shrink[i])
    t = st.ttest_rel(shrink[:, 1], shrink[:, 0], alternative="greater")
    assert t.pvalue < 0.01, (shrink, t)


# --------------------------------------------------------------------------- pipeline
@pytest.fixture(scope="module")
def sites_run(tmp_path_factory):
    """Two sites recorded on a Cartesian 1000 m × 500 m box (conftest.box_case), 8 × 4 cells:
    a shared hot spot, and a second one at the quay only; fitted through `fit` and written.
    Returns (run path, FitResult, true site rates per scan)."""
    from sceneprior.fitting import fit
    from sceneprior.results import write_run
    from sceneprior.simulate import sample_thinning
    from sceneprior.spec import load_spec

    tmp = tmp_path_factory.mktemp("sites-run")
    rng = np.random.default_rng(44)
    reg = Region("cartesian", (0.0, 1000.0), (0.0, 500.0))

    def lam(x, y, quay):
        base = 12.0 / 5e5 * (1.0 + 3.0 * np.exp(-((x - 300.0) ** 2 + (y - 250.0) ** 2) / (2 * 150.0**2)))
        return base * (1.0 + 2.0 * np.exp(-((x - 750.0) ** 2 + (y - 150.0) ** 2) / (2 * 120.0**2)) if quay else 1.0)

    K = {"breakwater": 80, "quay": 40}
    rows, scans, truth = [], [], {}
    for name, k in K.items():
        quay = name == "quay"
        scan, x, y = sample_thinning(rng, reg, partial(lam, quay=quay), 12.0 / 5e5 * 12.5, k)
        rows += list(zip(scan + len(scans), np.round(x, 3), np.round(y, 3)))
        scans += [name] * k
        gx, gy = np.meshgrid(np.linspace(0.5, 999.5, 1000), np.linspace(0.5, 499.5, 500), indexing="ij")
        truth[name] = float(lam(gx, gy, quay).sum())  # ∫_W λ on a 1 m lattice (midpoint rule)
    scan_ids, xs, ys = zip(*rows)
    spec = box_case(tmp, scan_ids, xs, ys, n_scans_table=len(scans), name="two-masts",
                    space={"cells": [8, 4]}, model={"kind": "lgcp_sites", "kernel": "matern52"},
                    sampler={"chains": 2, "warmup": 250, "draws": 250, "seed": 9, "progress": False},
                    output={"dir": str(tmp / "runs")})
    write_csv(tmp / "scans.csv", ["scan", "site"], zip(range(len(scans)), scans))
    res = fit(load_spec(spec), progress=False, log=lambda msg: None)
    return write_run(res), res, truth


def test_run_outputs_per_site(sites_run):
    """summary.json per-site rates (against the simulated truth, |z| < 3.5), intensity.nc with
    a site dimension and CF units, cell_draws.nc per site, the gate over site rates,
    hyperparameters and every site's cells; each site's map integrates to its rate draw by
    draw (Σ_c λ_sc |c ∩ W|, DESIGN.md §4)."""
    import xarray as xr

    path, res, truth = sites_run
    s = json.loads((path / "summary.json").read_text())
    assert s["model"]["kind"] == "lgcp_sites" and "sigma_dev" in s["model"]["prior"]
    info = s["lgcp_sites"]["sites"]
    assert sorted(info) == ["breakwater", "quay"] and info["quay"]["scans"] == 40
    for name, rate in truth.items():
        z = (info[name]["rate"]["mean"] - rate) / info[name]["rate"]["sd"]
        assert abs(z) < 3.5, (name, z)
    ds = xr.open_dataset(path / "intensity.nc", engine="h5netcdf")
    assert ds["site_intensity_mean"].dims == ("site", "x", "y")
    assert [str(v) for v in ds["site"].values] == ["breakwater", "quay"]
    assert ds["site_intensity_q95"].attrs["units"] == "m-2 scan-1"
    assert ds["shared_field_mean"].dims == ("x", "y") and ds["deviation_sd"].dims == ("site", "x", "y")
    assert ds["deviation_sd"].attrs["units"] == "1"
    ds.close()
    cd = xr.open_dataset(path / "cell_draws.nc", engine="h5netcdf")
    lam = np.asarray(cd["site_intensity"].values, float)
    np.testing.assert_allclose((lam * res.stats.window_area).sum(-1), cd["site_rate"].values, rtol=1e-5)
    cd.close()
    checked = {c["variable"] for c in s["gate"]["checks"]}
    assert {"site_rate", "sigma_dev", "cv", "level"} <= checked
    assert any(v.startswith("site cell intensity (64 cells") for v in checked)


def test_export_one_site_and_bad_input(sites_run, tmp_path, capsys):
    """export --site NAME writes that site's map (its integral is the exported rate, the site's
    rate posterior beside it, schema-valid); without --site, an unknown site, --site on a run
    with one map, a missing site column and one site only: one line, exit 2."""
    import jsonschema

    from sceneprior.cli import main
    from sceneprior.evaluator import load_config
    from sceneprior.export import schema

    path, res, _ = sites_run
    code = main(["export", str(path), "--site", "quay", "--override-gate"])
    assert code == 0
    capsys.readouterr()
    doc = json.loads((path / "tracker-quay.json").read_text())
    jsonschema.validate(doc, schema())
    s = json.loads((path / "summary.json").read_text())
    assert doc["clutter"]["site"]["name"] == "quay"
    assert doc["clutter"]["rate"]["posterior"] == {k: s["lgcp_sites"]["sites"]["quay"]["rate"][k]
                                                   for k in ("mean", "sd", "q05", "q50", "q95")}
    lam = np.array([[np.nan if v is None else v for v in row] for row in doc["clutter"]["intensity"]["values"]])
    assert np.nansum(lam * res.stats.window_area.reshape(8, 4)) == pytest.approx(doc["clutter"]["rate"]["value"])
    assert load_config(path / "tracker-quay.json").rate == pytest.approx(doc["clutter"]["rate"]["value"])

    def one_line(args):
        code = main(args)
        err = [ln for ln in capsys.readouterr().err.strip().splitlines() if ln]
        return code, err

    code, err = one_line(["export", str(path), "--override-gate"])
    assert code == 2 and len(err) == 1 and "--site NAME" in err[0] and "breakwater, quay" in err[0]
    code, err = one_line(["export", str(path), "--site", "pier", "--override-gate"])
    assert code == 2 and len(err) == 1 and "no site 'pier'" in err[0]
    for cmd in (["check", str(path)], ["rank", str(path), str(path)], ["compare", str(path), str(path)]):
        code, err = one_line(cmd)  # one map per run only, for now: refused, not answered wrongly
        assert code == 2 and len(err) == 1 and "map per site" in err[0], (cmd, err)
    other = box_case(tmp_path, [0, 1], [10.0, 20.0], [10.0, 20.0], n_scans_table=3,
                     sampler={"method": "exact", "chains": 2, "draws": 300, "seed": 1, "progress": False},
                     output={"dir": str(tmp_path / "runs")})
    assert main(["fit", str(other), "--quiet"]) == 0
    capsys.readouterr()
    code, err = one_line(["export", str(tmp_path / "runs" / "case"), "--site", "quay"])
    assert code == 2 and len(err) == 1 and "--site applies to runs with a map per site" in err[0]
    # fit refusals: no site column; one site only (say to use kind = "lgcp")
    write_csv(tmp_path / "scans.csv", ["scan", "mast"], [[0, "a"], [1, "b"], [2, "a"]])
    bad = box_case(tmp_path, [0, 1], [10.0, 20.0], [10.0, 20.0], model={"kind": "lgcp_sites"},
                   data={"detections": "det.csv", "scans": "scans.csv"}, output={"dir": str(tmp_path / "runs")})
    code, err = one_line(["fit", str(bad), "--quiet"])
    assert code == 2 and len([e for e in err if "error" in e]) == 1 and "'site' column" in err[-1]
    write_csv(tmp_path / "scans.csv", ["scan", "site"], [[0, "a"], [1, "a"], [2, "a"]])
    code, err = one_line(["fit", str(bad), "--quiet"])
    assert code == 2 and "at least two sites" in err[-1] and 'kind = "lgcp"' in err[-1]


def test_setup_inputs_pickle_for_chain_processes(tmp_path):
    """Large grids run their chains in spawned processes (``inference.run_chains_in_processes``),
    which receive the model's inputs pickled: the field kernels rebuild their jitted maths and
    evaluate as the originals do (same log density at a random point)."""
    import pickle

    import jax
    from numpyro.infer.util import initialize_model, log_density

    rng = np.random.default_rng(3)
    sites = ["north"] * 6 + ["quay"] * 4
    stats, mspec = _site_stats(tmp_path, rng.poisson(0.8, (10, 16)), sites)
    cases = []
    kind = get_model("lgcp_sites")
    prior = resolve_prior(kind, {"length_scale_min": 150.0, "length_scale_max": 300.0}, "test")
    cases.append((kind, kind.setup(stats, prior, mspec)))
    single = get_model("lgcp")
    prior1 = resolve_prior(single, {"length_scale_min": 150.0, "length_scale_max": 300.0}, "test")
    for kept, dropped in ((1.0, "auto"), (0.99, "leave_out"), (0.99, "per_cell")):  # torus field, truncated
        # field, truncated field with the per-cell term
        cases.append((single, single.setup(stats, prior1, ModelSpec("lgcp", {}, {
            "kernel": "matern32", "variance_kept": kept, "dropped_modes": dropped}))))
    assert cases[-1][1].inputs["kernels"].cell_term and not cases[-2][1].inputs["kernels"].cell_term
    for kind_, setup in cases:
        inputs = setup.inputs
        back = pickle.loads(pickle.dumps(inputs))
        assert type(back["kernels"]) is type(inputs["kernels"])
        info = initialize_model(jax.random.PRNGKey(0), kind_.fn, model_kwargs=inputs)
        z = jax.tree_util.tree_map(lambda v: v + 0.1 * rng.normal(size=np.shape(v)), info.param_info.z)
        params = info.postprocess_fn(z)
        params = {k: v for k, v in params.items() if k in z}
        a = log_density(kind_.fn, (), inputs, params)[0]
        b = log_density(kind_.fn, (), back, params)[0]
        np.testing.assert_allclose(float(b), float(a), rtol=1e-12)


def test_chains_start_around_the_conditional_mode_of_the_model_density(tmp_path):
    """The S + 1 fields' white coordinates start around the mode of their conditional
    posterior, the hyperparameters held at their start values. Reference: numpyro's
    ``potential_energy`` of ``lgcp_sites_model``: between 0 and the mode it falls by the gain
    the search reports, and its gradient in the white coordinates at the mode is ~0 against
    that at 0 (a stationary point, calculus); each chain starts within START_RADIUS of the
    mode per coordinate, at different points for different keys."""
    from conftest import check_chain_start

    rng = np.random.default_rng(23)
    sites = ["north"] * 30 + ["quay"] * 20
    truth = np.exp(rng.normal(0.0, 0.8, 16))
    stats, mspec = _site_stats(tmp_path, rng.poisson(2.0 * truth, (50, 16)), sites)
    kind = get_model("lgcp_sites")
    prior = resolve_prior(kind, {"length_scale_min": 150.0, "length_scale_max": 300.0}, "test")
    setup = kind.setup(stats, prior, mspec)
    values = setup.extra["init_strategy"].keywords["values"]
    assert set(setup.extra["init_strategy"].keywords["centred"]) == {"u_soft", "u_rest", "dev_soft", "dev_rest"}

    def logit(p):
        return jnp.log(p) - jnp.log1p(-p)

    held = {"sigma": jnp.log(values["sigma"]), "sigma_dev": jnp.log(values["sigma_dev"]),
            "cv": jnp.log(values["cv"]), "ls_unit": logit(jnp.asarray(values["ls_unit"])),
            "level": jnp.asarray(values["level"])}
    check_chain_start(kind.fn, setup.inputs, setup.extra["init_strategy"], setup.extra["chain_start"], held,
                      lgcp.START_RADIUS, still="sigma_dev")
