"""Spectral truncation of the LGCP field (``fields.truncation``, model option variance_kept).

References:
- Circulant embedding (Wood & Chan 1994, §2): the covariance of a torus field is the
  inverse DFT of its eigenvalues; a field that keeps a subset of modes has the inverse
  DFT of the eigenvalues with the others set to zero. Built here with numpy's FFT
  (``implied_first_row``), independently of the model's two dense products.
- Change of variables: with f = J u linear and log p(u) = −½ uᵀ P u + const, Cov f =
  J P⁻¹ Jᵀ, whatever fixed preconditioning map sits inside J and P.
- Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari & Gelman 2018): ranks
  of the truth among thinned posterior draws are uniform; χ² per quantity
  (scipy.stats.chisquare) at a Bonferroni level of 0.01. The data are simulated from the
  FULL torus field (every mode), so the check sees the truncation (its power against the
  dropped variance is unmeasured). Negative control (``conftest.check_sbc``): truths moved
  by 1 posterior sd must fail the same χ² test for every quantity.
"""

from __future__ import annotations

import math
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.sparse as sp

from conftest import batched_nuts, check_sbc
from sceneprior.binning import BinnedStats
from sceneprior.fields.kernels import get_kernel
from sceneprior.fields.embedding import TorusGeometry, grid_covariance, half_multiplicity, implied_first_row
from sceneprior.fields.spectral import aliased_eigenvalues
from sceneprior.fields.truncation import field_from_coefficients, mode_basis
from sceneprior.geometry import Region
from sceneprior.models import cell_term, lgcp
from sceneprior.models.registry import get_model, resolve_prior
from sceneprior.spec import ModelSpec

CASES = [("matern32", (6, 5), (12, 10)), ("squared_exponential", (5, 7), (11, 13)), ("matern12", (4, 4), (9, 8))]


def _design(basis, lam_rep):
    """G (n_cells, n_latent): the grid field of each unit coefficient at amplitudes √Λ."""
    arr = basis.arrays()
    amp = jnp.sqrt(jnp.asarray(lam_rep))
    return np.asarray(jax.vmap(lambda e: field_from_coefficients(e, amp, arr, basis.box_shape,
                                                                 basis.geom.grid_shape))(jnp.eye(basis.n_latent))).T


def _kept_half_mask(basis):
    (m0, m1) = basis.geom.torus_shape
    mask = np.zeros((m0, m1 // 2 + 1))
    for k0, k1 in zip(basis.rep_k0.astype(int), basis.rep_k1.astype(int)):
        mask[k0 % m0, k1] = 1.0
        if k1 == 0 or (m1 % 2 == 0 and k1 == m1 // 2):
            mask[(-k0) % m0, k1] = 1.0  # its mirror in the same column
    return mask


@pytest.mark.parametrize("kernel,grid,torus", CASES)
def test_every_mode_gives_the_circulant_covariance(kernel, grid, torus):
    geom = TorusGeometry(kernel, grid, (1.0, 1.5), torus)
    basis = mode_basis(geom, np.array([1.0, 1.5]), np.array([3.0, 3.0]), 1.0)
    ls = np.array([1.7, 2.2])
    G = _design(basis, basis.eigenvalues(ls, 1.3))
    ref = grid_covariance(implied_first_row(np.asarray(aliased_eigenvalues(geom, ls, 1.3)), torus), grid)
    np.testing.assert_allclose(G @ G.T, ref, atol=1e-12)
    assert basis.report["modes_kept"] == geom.n_torus


@pytest.mark.parametrize("kernel,grid,torus", CASES)
def test_truncated_field_has_the_kept_modes_covariance(kernel, grid, torus):
    geom = TorusGeometry(kernel, grid, (1.0, 1.5), torus)
    lo = np.array([1.0, 1.5])
    basis = mode_basis(geom, lo, np.array([3.0, 3.0]), 0.9)
    assert basis.report["modes_kept"] < geom.n_torus
    ls = np.array([1.7, 2.2])
    lam = np.asarray(aliased_eigenvalues(geom, ls, 1.3))
    mask = _kept_half_mask(basis)
    G = _design(basis, basis.eigenvalues(ls, 1.3))
    ref = grid_covariance(implied_first_row(lam * mask, torus), grid)
    np.testing.assert_allclose(G @ G.T, ref, atol=1e-12)
    # the reported kept fraction at the shortest length scales is the kept share of the sum
    lam_lo = np.asarray(aliased_eigenvalues(geom, lo, 1.0))
    mult = half_multiplicity(torus)
    kept = np.sum(mult * lam_lo * mask) / np.sum(mult * lam_lo)
    assert kept == pytest.approx(basis.report["variance_fraction_kept_at_shortest_length_scale"], abs=1e-12)
    assert kept >= 0.9


@pytest.mark.parametrize("kernel,grid,torus", CASES)
def test_dropped_variance_is_what_the_truncation_removes_at_each_cell(kernel, grid, torus):
    """The dropped modes' prior variance per cell is the full torus field's variance at a
    point (the circulant covariance's first entry, numpy FFT of the eigenvalues: Wood & Chan
    1994) less the truncated field's variance at each cell (the diagonal of G Gᵀ through the
    sampler's own map); a basis that keeps every mode drops nothing."""
    geom = TorusGeometry(kernel, grid, (1.0, 1.5), torus)
    basis = mode_basis(geom, np.array([1.0, 1.5]), np.array([3.0, 3.0]), 0.8)
    ls = np.array([1.7, 2.2])
    G = _design(basis, basis.eigenvalues(ls, 1.3))
    full = implied_first_row(np.asarray(aliased_eigenvalues(geom, ls, 1.3)), torus)[0, 0]
    v = basis.dropped_variance(ls, 1.3)
    assert v > 0.01 * full
    np.testing.assert_allclose(full - np.diag(G @ G.T), v, rtol=1e-10, atol=1e-12)
    every = mode_basis(geom, np.array([1.0, 1.5]), np.array([3.0, 3.0]), 1.0)
    assert every.dropped_variance(ls, 1.3) == 0.0


def test_dropped_mode_check_predicts_the_coverage_of_the_full_truth():
    """``dropped_mode_check``'s coverage against a direct simulation of its own premise:
    per cell, posterior draws N(m_c, s_c²) and a truth m_c + e_c with e_c ~ N(0, s_c² + v)
    (the kept part's posterior error plus the dropped part); the fraction of cells whose
    central interval of the draws covers the truth (5 000 cells) against the predicted
    pooled coverage. With nothing dropped the prediction is the nominal level exactly
    (standard normal quantiles, scipy.stats.norm)."""
    from sceneprior.fields.truncation import dropped_mode_check

    geom = TorusGeometry("matern32", (8, 8), (1.0, 1.0), (16, 16))
    basis = mode_basis(geom, np.array([1.0, 1.0]), np.array([3.0, 3.0]), 0.8)
    ls, sig = np.array([1.5, 1.5]), 0.9
    v = basis.dropped_variance(ls, sig**2)
    rng = np.random.default_rng(2)
    n_cells, n_draws = 5000, 2000
    s = np.sqrt(v) * rng.uniform(0.3, 3.0, n_cells)  # from strong (s² < v) to weak data
    m = rng.normal(0.0, 1.0, n_cells)
    draws = m + s * rng.standard_normal((n_draws, n_cells))
    truth = m + np.sqrt(s**2 + v) * rng.standard_normal(n_cells)
    out = dropped_mode_check(basis, np.full(n_draws, sig), np.tile(ls, (n_draws, 1)), np.var(draws, axis=0))
    assert out["dropped_variance_per_cell"] == pytest.approx(v, rel=1e-12)
    for p in (0.5, 0.9):
        lo, hi = np.quantile(draws, [0.5 - p / 2, 0.5 + p / 2], axis=0)
        seen = np.mean((truth >= lo) & (truth <= hi))
        pred = out["predicted_coverage_of_true_log_intensity"][f"{int(100 * p)}"]
        assert pred < p - 0.05  # the dropped part matters at these posterior widths
        assert abs(seen - pred) < 4 * math.sqrt(pred * (1 - pred) / n_cells) + 0.01, (p, seen, pred)
    every = mode_basis(geom, np.array([1.0, 1.0]), np.array([3.0, 3.0]), 1.0)
    out = dropped_mode_check(every, np.full(n_draws, sig), np.tile(ls, (n_draws, 1)), np.var(draws, axis=0))
    assert out["predicted_coverage_of_true_log_intensity"] == pytest.approx({"50": 0.5, "90": 0.9}, abs=1e-12)
    assert not out["warning"]


@pytest.mark.parametrize("kernel", ["matern12", "matern32", "squared_exponential"])
def test_reported_minimum_kept_fraction(kernel):
    """The reported minimum of the kept variance fraction over the prior's length scales is
    the minimum over those length scales of the kept modes' share of the full spectrum
    (computed here from the mask and the full periodised spectrum), on anisotropic tori
    where the continuum argument (kept fraction least at ℓ_min) fails on the lattice; and
    at the isotropic Cartesian set-up the product uses, the fraction stays at or above q."""
    rng = np.random.default_rng(11)
    for _ in range(3):
        m = tuple(int(v) for v in rng.integers(9, 30, 2))
        geom = TorusGeometry(kernel, (m[0] // 2, m[1] // 2), tuple(rng.uniform(0.5, 2.0, 2)), m)
        lo = rng.uniform(1.0, 2.5, 2)
        hi = lo * rng.uniform(2.0, 5.0, 2)
        basis = mode_basis(geom, lo, hi, 0.9)
        mask = _kept_half_mask(basis)
        mult = half_multiplicity(m)
        seen = []
        for l0 in np.geomspace(lo[0], hi[0], 5):
            for l1 in np.geomspace(lo[1], hi[1], 5):
                lam = np.asarray(aliased_eigenvalues(geom, np.array([l0, l1]), 1.0))
                seen.append(np.sum(mult * lam * mask) / np.sum(mult * lam))
        assert basis.report["variance_fraction_kept_min_over_prior_length_scales"] == pytest.approx(min(seen), abs=1e-12)
    geom = TorusGeometry(kernel, (32, 32), (1.0, 1.0), (64, 64))
    basis = mode_basis(geom, np.array([2.0, 2.0]), np.array([8.0, 8.0]), 0.95)
    assert basis.report["variance_fraction_kept_min_over_prior_length_scales"] >= 0.95


def _stats(n, side, counts, K):
    reg = Region("cartesian", (0.0, side), (0.0, side))
    g = reg.grid((n, n))
    area = g.cell_area().ravel()
    return BinnedStats(reg, g, np.asarray(counts, np.int64), K * area, area, area, K, np.arange(K),
                       np.zeros(K, np.int64), sp.csr_matrix((K, g.n_cells)))


def _strong_8x8(seed):
    """The strong-data covariance tests' set-up: the lgcp kind, n = 8 cells per side, a prior
    for ≈ 40 detections per cell over 20 scans with ℓ in [150, 400] m, a generator and the
    empty 800 m grid's stats."""
    kind = get_model("lgcp")
    n = 8
    prior = resolve_prior(kind, {"rate_median": 40.0 * n * n / 20, "length_scale_min": 150.0,
                                 "length_scale_max": 400.0}, "test")
    return kind, n, prior, np.random.default_rng(seed), _stats(n, 800.0, np.zeros(n * n), 20)


@pytest.mark.parametrize("band,row_share,entries,dense_all", [(1.5, 1.0, None, False), (4.0, 1.0, None, False),
                                                              (1.5, 0.9, None, False), (1.5, 0.9, 600, False),
                                                              (1.5, 0.9, 600, True)])
def test_model_prior_on_the_field_is_the_truncated_field(monkeypatch, band, row_share, entries, dense_all):
    """At hyperparameters away from the pilot, with the data-built map y = L z in place
    (dense, and low rank with band 4 or a cap of 600 entries; on every coefficient, and on
    the rows that carry 90 % of the correction; and the dense H^{-1/2} on every coefficient
    that replaces a cap too small for the far directions), the model's prior density of its
    coordinates implies exactly the truncated field's covariance on the grid (change of
    variables; Wood & Chan 1994), and its normaliser is right as σ, ℓ move: for a Gaussian
    density log p(0) − ½ log det P is the same constant at every θ."""
    import sceneprior.fields.truncation as tr

    monkeypatch.setattr(tr, "LOW_RANK_BAND", band)
    monkeypatch.setattr(tr, "ROW_SHARE", row_share)
    if entries is not None:
        monkeypatch.setattr(tr, "MAP_ENTRIES", entries)
        monkeypatch.setattr(tr, "NEAR_ENTRIES", entries)
        # the cap leaves far directions out; the dense map on every row replaces it only when allowed
        monkeypatch.setattr(tr, "DENSE_MAP_ENTRIES", tr.MAP_MAX_COEFFICIENTS**2 if dense_all else entries)
    kind, n, prior, rng, stats0 = _strong_8x8(4)
    spectrum = lgcp.truncated_plan(stats0, "matern52", prior, 0.99)[0]
    f = lgcp.simulate_field(spectrum, 250.0, 1.0, rng)
    counts = rng.poisson(40.0 * np.exp(f))  # strong data: the map L is far from the identity
    setup = kind.setup(_stats(n, 800.0, counts, 20), prior, ModelSpec("lgcp", {}, {
        "kernel": "matern52", "variance_kept": 0.99, "dropped_modes": "leave_out"}))
    kern, pre = setup.inputs["kernels"], setup.inputs["precond"]
    rep = setup.extra["embedding"]["truncation"]["mode_preconditioner"]
    assert rep["rank"] > 0 and not kern.cell_term
    # with the map: the model's warmup depth (uncapped by default), vectorised chain groups and
    # the (σ, ℓ) mass block warmup starts from (one ℓ here: isotropic)
    assert setup.extra["warmup_tree_depth"] == lgcp.WARMUP_TREE_DEPTH
    assert setup.extra["vectorize_chain_groups"] is True
    np.testing.assert_array_equal(setup.extra["initial_inverse_mass"][("sigma", "ls_unit")],
                                  lgcp.INITIAL_HYPER_VARIANCE * np.eye(1 + setup.inputs["ls_lo"].size))
    low_rank = band == 4.0 or (entries is not None and not dense_all)
    assert ("low_rank_vectors" in pre) == low_rank and ("dense" in pre) == (not low_rank), rep
    # a share below 1 leaves some coefficients alone: the map acts on a subset of rows, except
    # the dense map that replaces a cap too small, which acts on every one
    subset = row_share < 1.0 and not dense_all
    assert ("map_rows" in pre) == subset and (rep["rows"] < kern.n_latent) == subset, rep
    assert rep["beyond_far_band"] > 0 and ("reason" in rep) == dense_all, rep
    inp = setup.inputs
    basis = setup.extra["modes"]
    # the stored map is float32 (truncation.MAP_DTYPE, memory traffic); the exact checks below
    # run it in float64 — any fixed map must give the exact prior — and the float32 product
    # must be that map up to float32 rounding
    map_keys = ("dense", "low_rank_vectors", "low_rank_scale")
    assert all(pre[k].dtype == jnp.float32 for k in map_keys if k in pre)
    pre64 = {k: (jnp.asarray(v, jnp.float64) if k in map_keys else v) for k, v in pre.items()}
    u1 = jnp.asarray(rng.normal(size=kern.n_latent))
    f32, f64 = (kern.evaluate(u1, 0.8, jnp.asarray([320.0]), p_, inp["exposure"], inp["obs"], inp["window_area"])[0]
                for p_ in (pre, pre64))
    np.testing.assert_allclose(f32, f64, rtol=0, atol=1e-5 * float(jnp.abs(f64).max()))
    # ... and the log density (prior of the coordinates + Poisson log-likelihood with the
    # baseline integrated, up to constants) and its gradient agree with the float64 map's to
    # within rounding: far below the O(0.1–1) energy errors NUTS accepts or rejects on
    # (tolerances: common practice, no source)
    n_total = float(np.sum(counts))

    def log_density(u, p_):
        f, logp, log_z = kern.evaluate(u, 0.8, jnp.asarray([320.0]), p_, inp["exposure"], inp["obs"],
                                       inp["window_area"])[:3]
        return logp + jnp.dot(p_["counts_grid"], f) - n_total * log_z

    v32, g32 = jax.value_and_grad(log_density)(u1, pre)
    v64, g64 = jax.value_and_grad(log_density)(u1, pre64)
    assert abs(float(v32 - v64)) < 1e-3
    np.testing.assert_allclose(g32, g64, rtol=0, atol=1e-4 * float(jnp.abs(g64).max()))
    pre = pre64
    consts = []
    for s_, l_ in ((0.8, 320.0), (0.3, 180.0), (1.4, 400.0)):  # not the pilot
        sigma, ls = jnp.asarray(s_), jnp.asarray([l_])

        def parts(u):
            return kern.evaluate(u, sigma, ls, pre, inp["exposure"], inp["obs"], inp["window_area"])[:2]

        u0 = jnp.zeros(kern.n_latent)
        J = np.asarray(jax.jacfwd(lambda u: parts(u)[0])(u0))
        P = -np.asarray(jax.hessian(lambda u: parts(u)[1])(u0))
        cov = J @ np.linalg.solve(P, J.T)
        lam = np.asarray(aliased_eigenvalues(basis.geom, np.array([l_, l_]), s_**2))
        ref = grid_covariance(implied_first_row(lam * _kept_half_mask(basis), basis.geom.torus_shape), (n, n))
        np.testing.assert_allclose(cov, ref, atol=1e-9 * ref.max())
        consts.append(float(parts(u0)[1]) - 0.5 * np.linalg.slogdet(P)[1])
    np.testing.assert_allclose(consts, consts[0], atol=1e-8 * abs(consts[0]) + 1e-8)


@pytest.mark.parametrize("kernel", ["matern32", "matern12"])
def test_per_cell_term_restores_the_kernels_variance_at_every_cell(kernel):
    """With model.dropped_modes = "per_cell" (strong data, the pilot map in place), the
    model's prior density of its coordinates (modes and one per cell) implies, by change of
    variables, the truncated field's covariance off the diagonal (Wood & Chan 1994, numpy FFT
    of the kept eigenvalues) and on it the periodised kernel at lag 0 — σ² (Rasmussen &
    Williams 2006, eq. 4.14: k(0) = σ²) plus the kernel at the torus's wraps, kept + dropped
    variance — at hyperparameters away from the
    pilot, with a normaliser that is right as σ, ℓ move. Fails if the term's variance or its
    log-density terms are wrong, or its per-cell centring is applied to the scale and the
    density inconsistently (the reference for the diagonal re-computes the same wrapped
    sum from the closed-form kernels, so it checks the plumbing, not that definition)."""
    kind, n, prior, rng, stats0 = _strong_8x8(5)
    spectrum = lgcp.truncated_plan(stats0, kernel, prior, 0.9)[0]
    counts = rng.poisson(40.0 * np.exp(lgcp.simulate_field(spectrum, 250.0, 1.0, rng)))
    setup = kind.setup(_stats(n, 800.0, counts, 20), prior, ModelSpec("lgcp", {}, {
        "kernel": kernel, "variance_kept": 0.9, "dropped_modes": "per_cell"}))
    kern, inp, basis = setup.inputs["kernels"], setup.inputs, setup.extra["modes"]
    # sampled: the level (the term integrated out); with per-scan terms the term's n² values
    assert kern.cell_term and setup.extra["n_latent"] == basis.n_latent + 1
    assert setup.extra["with_scan_terms"] == {"grid_latent": True, "vectorize_chain_groups": False,
                                              "exclude_sites": ["u_modes", "u_cells"],
                                              "n_latent": basis.n_latent + n * n}
    term = setup.extra["embedding"]["truncation"]["cell_term"]
    assert term["on"] and term["source"] == "model.dropped_modes" and term["variance_at_pilot"] > 0
    assert any("term per cell" in line and "per_cell" in line for line in setup.extra["advice"])  # printed
    pre = {k: (jnp.asarray(v, jnp.float64) if k in ("dense", "low_rank_vectors", "low_rank_scale") else v)
           for k, v in inp["precond"].items()}
    assert float(jnp.max(pre["cell_weights"])) > 0  # the per-cell centring is exercised
    K = kern.n_latent
    consts = []
    for s_, l_ in ((0.8, 320.0), (0.3, 180.0), (1.4, 400.0)):
        sigma, ls = jnp.asarray(s_), jnp.asarray([l_])

        def parts(x):
            return kern.evaluate(x[:K], sigma, ls, pre, inp["exposure"], inp["obs"], inp["window_area"], x[K:])[:2]

        x0 = jnp.zeros(K + n * n)
        J = np.asarray(jax.jacfwd(lambda x: parts(x)[0])(x0))
        P = -np.asarray(jax.hessian(lambda x: parts(x)[1])(x0))
        cov = J @ np.linalg.solve(P, J.T)
        lam = np.asarray(aliased_eigenvalues(basis.geom, np.array([l_, l_]), s_**2))
        kept = grid_covariance(implied_first_row(lam * _kept_half_mask(basis), basis.geom.torus_shape), (n, n))
        off = ~np.eye(n * n, dtype=bool)
        np.testing.assert_allclose(cov[off], kept[off], atol=1e-9 * kept.max())
        # the periodised kernel at lag 0: σ² plus the kernel at the torus's wraps (±2 sides per axis)
        (m0, m1), (h0, h1) = basis.geom.torus_shape, basis.geom.spacing
        wraps = [(a * m0 * h0, b * m1 * h1) for a in range(-2, 3) for b in range(-2, 3)]
        c0 = sum(float(get_kernel(kernel)(math.hypot(*w), s_**2, l_)) for w in wraps)
        np.testing.assert_allclose(np.diag(cov), c0, rtol=1e-9)
        assert s_**2 <= c0 < 1.2 * s_**2 and np.all(np.diag(kept) < 0.995 * c0)  # dropped, and now back
        consts.append(float(parts(x0)[1]) - 0.5 * np.linalg.slogdet(P)[1])
    np.testing.assert_allclose(consts, consts[0], atol=1e-8 * abs(consts[0]) + 1e-8)


def test_integrated_per_cell_term_density_against_its_parts():
    """The model's log density with the per-cell term integrated out (no per-scan terms; 8 × 8,
    strong data, three cells without exposure) against its parts computed independently: σ ~
    HalfNormal and the length scale's Beta(2, 2) by scipy.stats, ρ₀ = e^μ ~ Gamma(a, b) by
    scipy.stats.gamma plus μ (the log Jacobian of ρ₀ → μ), each exposed cell's
    Poisson–lognormal likelihood by scipy.integrate.quad_vec over scipy.stats.poisson and norm,
    and the kept modes' prior density (the sampled form's, checked above) — as differences
    between three parameter points, so that the constants cancel. Fails if the level's
    Jacobian or the baseline's prior is wrong, or cells without exposure contribute."""
    import scipy.integrate
    import scipy.stats
    from numpyro.infer.util import log_density

    kind, n, prior, rng, stats0 = _strong_8x8(3)
    spectrum = lgcp.truncated_plan(stats0, "matern32", prior, 0.9)[0]
    counts = rng.poisson(40.0 * np.exp(lgcp.simulate_field(spectrum, 250.0, 1.0, rng)))
    area = stats0.window_area
    exposure = 20 * area
    exposure[[0, 9, 63]] = 0.0
    counts[[0, 9, 63]] = 0
    stats = BinnedStats(stats0.region, stats0.grid, np.asarray(counts, np.int64), exposure, area, area, 20,
                        np.arange(20), np.zeros(20, np.int64), sp.csr_matrix((20, n * n)))
    setup = kind.setup(stats, prior, ModelSpec("lgcp", {}, {"kernel": "matern32", "variance_kept": 0.9,
                                                            "dropped_modes": "per_cell"}))
    inp, kern, basis = setup.inputs, setup.inputs["kernels"], setup.extra["modes"]
    assert kern.cell_term and not any("u_cells" in k for k in setup.extra["init_strategy"].keywords["values"])
    # the model's structure at 1e-5 needs a rule that accurate at every point below (σ up to 1.2):
    # the set-up sizes its own for the posterior's neighbourhood (tests/test_cell_term.py)
    kern = inp["kernels"] = lgcp.TruncatedFieldKernels(basis, True, cell_term.GH_NODES)
    pre = inp["precond"]
    a, b = inp["gamma_a"], inp["gamma_b"]
    lo, hi = np.asarray(inp["ls_lo"]), np.asarray(inp["ls_hi"])
    exposed = exposure > 0

    def reference(sigma, u01, u, level):
        ls = lo * (hi / lo) ** u01
        f, log_prior_u = (np.asarray(x, float) for x in kern.evaluate(jnp.asarray(u), sigma, jnp.asarray(ls), pre,
                                                                       inp["exposure"], inp["obs"],
                                                                       inp["window_area"])[:2])
        lam = np.maximum(np.asarray(basis.eigenvalues(np.resize(ls, 2), sigma**2), float), 0.0)
        v = float(basis.residual_variance(lam, sigma**2, np.resize(ls, 2)))
        mu = float(pre["level_centre"] + pre["level_scale"] * level - np.dot(np.asarray(pre["level_weights"]), f))
        rate = exposure[exposed] * np.exp(mu + f[exposed])
        per_cell = scipy.integrate.quad_vec(  # every exposed cell at once (the same ε range)
            lambda e: np.exp(scipy.stats.poisson.logpmf(counts[exposed], rate * math.exp(e))
                             + scipy.stats.norm.logpdf(e, 0.0, math.sqrt(v))),
            -12 * math.sqrt(v), 12 * math.sqrt(v), epsabs=0.0, epsrel=1e-11, limit=400)[0]
        cells = float(np.sum(np.log(per_cell)))
        return (scipy.stats.halfnorm(scale=inp["sigma_scale"]).logpdf(sigma)
                + np.sum(scipy.stats.beta(2.0, 2.0).logpdf(u01)) + log_prior_u
                + scipy.stats.gamma(a, scale=1.0 / b).logpdf(math.exp(mu)) + mu + cells)

    model = partial(lgcp.lgcp_model, **inp)
    got, ref = [], []
    for sigma, u01, scale, level in ((0.8, 0.4, 0.3, 0.2), (0.5, 0.7, 0.6, -1.5), (1.2, 0.2, 0.1, 0.9)):
        u = scale * rng.standard_normal(kern.n_latent)
        got.append(float(log_density(model, (), {}, {"sigma": sigma, "ls_unit": jnp.asarray([u01]),
                                                       "u_modes": jnp.asarray(u), "level": level})[0]))
        ref.append(reference(sigma, np.asarray([u01]), u, level))
    np.testing.assert_allclose(np.diff(got), np.diff(ref), atol=1e-5)
    assert np.ptp(got) > 1.0  # the points differ by more than the tolerance


@pytest.mark.parametrize("key,bad,says", [("variance_kept", v, "[0.5, 1]") for v in (0.2, 1.5, True, "most")]
                         + [("dropped_modes", v, "'per_cell'") for v in ("cells", 1, True, ["per_cell"])])
def test_bad_truncation_options_are_refused(tmp_path, capsys, key, bad, says):
    """model.variance_kept outside [0.5, 1] and an unknown model.dropped_modes: one line, exit 2."""
    from conftest import box_case
    from sceneprior.cli import main

    spec = box_case(tmp_path, [0, 1], [10.0, 20.0], [10.0, 20.0], n_scans_table=3, model={"kind": "lgcp", key: bad})
    code = main(["fit", str(spec), "--out", str(tmp_path / "runs"), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and f"model.{key}" in err[-1] and says in err[-1]


@pytest.mark.parametrize("kernel,given,expected,source", [
    ("squared_exponential", None, 0.999, "default for kernel squared_exponential"),
    ("squared_exponential", 1, None, "model.variance_kept"),
    ("matern32", None, None, "default for kernel matern32"),
    ("matern52", None, None, "default for kernel matern52"),
    ("matern32", 0.95, 0.95, "model.variance_kept")])
def test_variance_kept_default_depends_on_the_kernel(kernel, given, expected, source):
    """Left out of the spec, variance_kept is 0.999 for the squared exponential (the setting
    the SBC below calibrates) and 1 (every torus mode) for the Matérn kernels; a value in
    the spec wins, and the set-up (summary.json's field parameters) says where it came from."""
    kind = get_model("lgcp")
    prior = resolve_prior(kind, {"length_scale_min": 150.0, "length_scale_max": 400.0}, "test")
    opts = {"kernel": kernel} | ({} if given is None else {"variance_kept": given})
    setup = kind.setup(_stats(N, SIDE, np.full(N * N, 3), K_SCANS), prior, ModelSpec("lgcp", {}, opts),
                       start_search=False)
    assert setup.extra["variance_kept_source"] == source
    # a small torus: no long-run note; ℓ up to half the 800 m box: the periodic-boundary note
    # (wrap error above fields.spectral.WRAP_NOTE, below WRAP_LIMIT)
    assert [a for a in setup.extra["advice"] if "periodic boundaries" not in a] == []
    assert len(setup.extra["advice"]) == 1 and "use length_scale_max ≤" in setup.extra["advice"][0]
    if expected is None:
        assert setup.extra["modes"] is None  # every torus mode
        return
    trunc = setup.extra["embedding"]["truncation"]
    assert trunc["variance_kept_target"] == expected and trunc["variance_kept_source"] == source
    assert trunc["modes_kept"] < trunc["torus_modes"]


@pytest.mark.parametrize("kernel,hint", [("matern32", "variance_kept = 0.98"), ("matern12", "coarser grid")])
def test_large_full_torus_fit_is_told_what_shortens_it(kernel, hint):
    """Beyond LONG_RUN_TORUS_CELLS on every mode the set-up hands the fit a note (printed
    before sampling) that names the cost and what shortens it, per kernel."""
    kind = get_model("lgcp")
    prior = resolve_prior(kind, {}, "test")
    n = 72  # a torus of at least 144² cells
    stats = _stats(n, 1000.0, np.random.default_rng(1).poisson(0.3, n * n), K_SCANS)
    setup = kind.setup(stats, prior, ModelSpec("lgcp", {}, {"kernel": kernel}), start_search=False)
    assert setup.extra["n_latent"] > lgcp.LONG_RUN_TORUS_CELLS
    (note,) = setup.extra["advice"]
    assert f"{setup.extra['n_latent']} torus modes" in note and hint in note


# --------------------------------------------------------------------------- calibration
N, SIDE, K_SCANS, PER_CELL, KEPT = 8, 800.0, 50, 5.0, 0.95
STRONG = 300.0  # detections per cell: strong data
WARMUP, DRAWS = 200, 200


def _as_dense(pre):
    """The map y = L z (low rank, dense, on a subset of rows or none) as the same map in
    dense form over every coefficient (fixed shapes across data sets for one compiled run)."""
    pre = dict(pre)
    K = pre["modes"]["coef_rep"].shape[0]
    rows = np.asarray(pre.pop("map_rows", np.arange(K)))
    block = np.eye(rows.size)
    if "low_rank_vectors" in pre:
        V, s = np.asarray(pre.pop("low_rank_vectors")), np.asarray(pre.pop("low_rank_scale"))
        block = block + (V * s) @ V.T
    elif "dense" in pre:
        block = np.asarray(pre["dense"])  # kept in its stored precision
    full = np.eye(K, dtype=block.dtype)
    full[np.ix_(rows, rows)] = block
    pre["dense"] = jnp.asarray(full)
    return pre


def _replicated_truncated_fits(kernel, kept, per_cell, dropped, reps, seed, n=N, side=SIDE, ls=(150.0, 400.0),
                               warmup=WARMUP, draws=DRAWS):
    """One compiled truncated model (n × n Cartesian grid of side ``side`` m, ℓ in ``ls`` m,
    no mask, no per-scan terms, model.dropped_modes = ``dropped``) fitted by ``batched_nuts``
    (``warmup`` + ``draws``) to ``reps``
    data sets of ``per_cell`` expected detections per cell, each simulated from the FULL
    torus field (every mode) with ρ₀, σ, ℓ drawn from the prior. Returns (set-up, truths
    (reps, 3 + cells): μ, σ, ℓ, the cells' log intensity, draws: per data set (draws, 3 +
    cells) of the same quantities)."""
    from sceneprior.inference import exact_idata

    kind = get_model("lgcp")
    prior = resolve_prior(kind, {"rate_median": per_cell * n * n / K_SCANS, "rate_log_sd": 0.5,
                                 "sigma_scale": 0.7, "length_scale_min": ls[0], "length_scale_max": ls[1]}, "test")
    stats0 = _stats(n, side, np.full(n * n, int(per_cell)), K_SCANS)
    opts = {"kernel": kernel, "variance_kept": kept, "dropped_modes": dropped}
    # no start search: the chains start as batched_nuts starts them, and the per-cell quadrature
    # is sized by the table for any data set, not on stats0's cells (lgcp.size_quadrature)
    setup = kind.setup(stats0, prior, ModelSpec("lgcp", {}, opts), start_search=False)
    basis = setup.extra["modes"]
    assert basis.report["modes_kept"] < basis.report["torus_modes"]  # something is dropped
    assert kept <= basis.report["variance_fraction_kept_at_shortest_length_scale"] < 1.0
    inp = dict(setup.inputs)
    kernels = inp.pop("kernels")
    inp["precond"] = _as_dense(inp["precond"])
    keep = ("sigma", "length_scale", "field") + (("mu", "term_variance") if kernels.cell_term  # integrated out
                                                 else ("log_z", "log_window_integral"))
    run = batched_nuts(partial(lgcp.lgcp_model, kernels=kernels), inp, setup.extra["dense_mass"], keep, warmup, draws,
                       extra_uturn_checks=setup.extra["extra_uturn_checks"],
                       inverse_mass_matrix=setup.extra["initial_inverse_mass"],
                       target_accept=setup.extra["target_accept"])
    full = setup.extra["geom"]  # the periodised spectrum on the same torus, EVERY mode
    rng = np.random.default_rng(seed)
    area = stats0.exposure
    truths, batch, stats_list = [], [], []
    for _ in range(reps):
        rho0 = rng.gamma(inp["gamma_a"], 1.0 / inp["gamma_b"])
        sigma = abs(rng.normal(0.0, inp["sigma_scale"]))
        ls = inp["ls_lo"] * (inp["ls_hi"] / inp["ls_lo"]) ** rng.beta(2.0, 2.0, size=inp["ls_lo"].shape)
        log_lam = math.log(rho0) + lgcp.simulate_field(full, ls, sigma, rng)
        truths.append(np.concatenate([[math.log(rho0), sigma, float(ls[0])], log_lam]))
        counts = rng.poisson(np.exp(log_lam) * area)
        stats = _stats(n, side, counts, K_SCANS)
        _, arrays, _ = lgcp.truncated_preconditioner(basis, counts, stats.exposure, inp["ls_lo"], inp["ls_hi"],
                                                     inp["sigma_scale"],
                                                     cell_term="per_cell" if kernels.cell_term else "leave_out")
        kw = dict(inp)
        kw.update(counts=jnp.asarray(counts[inp["obs"]], float),
                  precond=_as_dense({**arrays, **lgcp.grid_data(counts[inp["obs"]].astype(float),
                                                                stats.exposure[inp["obs"]], inp["obs"], n * n)}))
        batch.append(kw)
        stats_list.append(stats)
    out = run(batch, seed)
    per_rep = []
    for i, (kw, stats) in enumerate(zip(batch, stats_list)):
        post = {k: v[i][None] for k, v in out.items() if k != "num_steps"}
        s = type(setup)(inputs={**kw, "counts": np.asarray(kw["counts"])}, extra=setup.extra)
        idata = lgcp.complete_posterior(exact_idata(post), stats, s, seed + i)
        mu = np.asarray(idata.posterior["mu"])[0]
        field = np.asarray(idata.posterior["field"])[0].astype(float) + mu[:, None]
        per_rep.append(np.column_stack([mu, np.asarray(idata.posterior["sigma"])[0],
                                        np.asarray(idata.posterior["length_scale"])[0][:, 0], field]))
    return setup, np.array(truths), per_rep


@pytest.mark.slow
@pytest.mark.parametrize("kernel,kept,dropped,per_cell", [
    ("matern32", KEPT, "leave_out", PER_CELL),
    ("squared_exponential", lgcp.DEFAULT_VARIANCE_KEPT["squared_exponential"], "leave_out", PER_CELL),
    ("matern32", KEPT, "per_cell", STRONG)])
def test_simulation_based_calibration_with_truncation(kernel, kept, dropped, per_cell):
    """SBC of the truncated model with data from the full torus field: μ, σ, ℓ and three
    cells' log intensity, 100 replications, on an 8 × 8 Cartesian grid (no mask, no
    per-scan terms). Matérn 3/2 keeps 95 % of the prior variance at ℓ_min (145 of 256 torus
    modes); the squared exponential its default, 99.9 % (129 of 256). With ≈ 5 detections
    per cell the dropped modes are left out; with ≈ 300 (strong data, where leaving them out
    narrows the intervals) the per-cell term carries them (model.dropped_modes). With strong
    data the check has power against leaving the modes out: the same set-up with
    dropped_modes = "leave_out" failed it (scratch run: σ's ranks 45/17/16/12/10 over the 5
    groups, χ² p = 3 × 10⁻⁸; pooled 90 % coverage of the cells 0.80, against 0.88 with the
    term). With ≈ 5 detections per cell its power against the dropped variance is not
    established: it shows that those truncations do not break calibration detectably at 100
    replications, not that any would be caught."""
    cells = [0, 27, 63]
    _, truths, per_rep = _replicated_truncated_fits(kernel, kept, per_cell, dropped, 100, 2018)
    cols = [0, 1, 2] + [3 + c for c in cells]
    names = ["mu", "sigma", "length_scale"] + [f"cell {c}" for c in cells]
    # L = 19 draws, about every 10th of 200; 5 groups of 4 ranks; with the negative control
    check_sbc([d[:, cols] for d in per_rep], list(truths[:, cols]), names, thin_to=19, bins=5)


def test_strong_data_truncated_fit_warns_that_the_intervals_are_too_narrow(tmp_path):
    """Through the pipeline: a truncated field (q 0.8, 16², ℓ in [100, 300] m) on strong
    data (≈ 300 detections per cell) whose truth is a draw of the FULL torus field (every
    mode, circulant embedding: Wood & Chan 1994; σ = 1, ℓ = 150 m). The truth is known, so
    the test measures the pooled coverage of the true cell log intensity by the fit's 90 %
    intervals: far below nominal (0.33 in a scratch run of this set-up), the predicted
    coverage at or below it (the estimate errs low: 0.02 there), and summary.json, the
    printed lines and report.html carry the note."""
    import json

    from conftest import write_csv, write_spec
    from sceneprior.fitting import fit
    from sceneprior.report import write_report
    from sceneprior.results import human_summary, load_run, write_run
    from sceneprior.spec import load_spec

    rng = np.random.default_rng(8)
    n, side, K, per_cell = 16, 1000.0, 50, 300.0
    stats = _stats(n, side, np.zeros(n * n), K)
    bounds = {"length_scale_min": 100.0, "length_scale_max": 300.0}
    prior = resolve_prior(get_model("lgcp"), bounds, "test")
    f = lgcp.simulate_field(lgcp.plan(stats, "matern32", prior)[0], 150.0, 1.0, rng)
    mean = per_cell * np.exp(f - 0.5)
    xs, ys = [], []
    for c, lam in enumerate(mean):
        k = rng.poisson(lam)
        i, j = divmod(c, n)
        xs.append(rng.uniform(i, i + 1, k) * side / n)
        ys.append(rng.uniform(j, j + 1, k) * side / n)
    xs, ys = np.concatenate(xs), np.concatenate(ys)
    write_csv(tmp_path / "det.csv", ["scan", "x", "y"], zip(rng.integers(0, K, xs.size), xs, ys))
    spec = {"name": "strong-truncated", "data": {"detections": "det.csv", "n_scans": K},
            "space": {"frame": "cartesian", "x": [0.0, side], "y": [0.0, side], "cells": [n, n]},
            "model": {"kind": "lgcp", "kernel": "matern32", "variance_kept": 0.8, "dropped_modes": "leave_out",
                      "prior": bounds},
            "sampler": {"chains": 2, "warmup": 150, "draws": 150, "seed": 2, "progress": False},
            "output": {"dir": "runs"}}
    res = fit(load_spec(write_spec(tmp_path / "spec.toml", spec)), progress=False, log=lambda m: None)
    truth = np.log(mean / (K * (side / n) ** 2))  # per m² per scan
    draws = np.log(res.cell_intensity()).reshape(-1, n * n)
    lo, hi = np.quantile(draws, [0.05, 0.95], axis=0)
    covered = float(np.mean((truth >= lo) & (truth <= hi)))
    assert covered < 0.75, covered  # the intervals miss the dropped modes
    path = write_run(res, tmp_path / "runs")
    s = json.loads((path / "summary.json").read_text())
    dm = s["lgcp"]["field_parameters"]["dropped_modes"]
    assert dm["warning"] and dm["ratio_median"] > 1.0
    # the set-up's screen saw it coming: "auto" would have put the per-cell term in
    screen = s["lgcp"]["embedding"]["truncation"]["cell_term"]["screen"]
    assert screen["needed"] and not s["lgcp"]["embedding"]["truncation"]["cell_term"]["on"]
    assert dm["predicted_coverage_of_true_log_intensity"]["90"] < min(0.85, covered + 0.05)
    assert len(s["lgcp"]["notes"]) == 1 and "raise model.variance_kept" in s["lgcp"]["notes"][0]
    assert "  note: the truncated field (model.variance_kept = 0.8)" in human_summary(s, path)
    assert "Note: the truncated field" in write_report(load_run(path)).read_text()
    # and the tracker configuration carries it (short chains: the gate is overridden here)
    from sceneprior.export import build_config, describe

    doc = build_config(load_run(path), override_gate=True)
    assert doc["provenance"]["model_notes"] == s["lgcp"]["notes"]
    assert "note from the fit: the truncated field" in describe(doc, [tmp_path / "tracker.json"])


@pytest.mark.parametrize("overdispersion", [False, True])
def test_per_cell_term_through_the_pipeline(tmp_path, monkeypatch, overdispersion):
    """The per-cell term end to end on a small strong-data recording (8 × 8 cells, ≈ 200
    detections per cell, q 0.9, short chains): `auto` switches it on, the fit writes its
    run, summary.json says how the dropped variance is carried (no dropped-mode note), the
    printed lines and report.html carry no such note, and the prior draws the `check`
    command uses include the term. Without per-scan terms the term is integrated out (the
    level sampled, no per-cell site) and drawn afterwards, the written field and the rate
    agreeing; with over-dispersion it is sampled. Plumbing only: calibration is the SBC's
    strong-data case (and the draws of ε: tests/test_cell_term.py)."""
    import json

    from conftest import write_csv, write_spec
    from sceneprior.fitting import fit
    from sceneprior.report import write_report
    from sceneprior.results import human_summary, load_run, write_run
    from sceneprior.spec import load_spec

    rng = np.random.default_rng(11)
    n, side, K = 8, 800.0, 20
    bounds = {"length_scale_min": 150.0, "length_scale_max": 400.0}
    stats = _stats(n, side, np.zeros(n * n), K)
    f = lgcp.simulate_field(lgcp.plan(stats, "matern32", resolve_prior(get_model("lgcp"), bounds, "test"))[0],
                            200.0, 1.0, rng)
    counts = rng.poisson(200.0 * np.exp(f - 0.5))
    cell = np.repeat(np.arange(n * n), counts)
    i, j = np.divmod(cell, n)
    xs, ys = (i + rng.uniform(size=cell.size)) * side / n, (j + rng.uniform(size=cell.size)) * side / n
    write_csv(tmp_path / "det.csv", ["scan", "x", "y"], zip(rng.integers(0, K, cell.size), xs, ys))
    spec = {"name": "per-cell", "data": {"detections": "det.csv", "n_scans": K},
            "space": {"frame": "cartesian", "x": [0.0, side], "y": [0.0, side], "cells": [n, n]},
            "model": {"kind": "lgcp", "kernel": "matern32", "variance_kept": 0.9, "prior": bounds}
            | ({"overdispersion": True} if overdispersion else {}),
            "sampler": {"chains": 2, "warmup": 60, "draws": 60, "seed": 1, "progress": False},
            "output": {"dir": "runs"}}
    lines = []
    res = fit(load_spec(write_spec(tmp_path / "spec.toml", spec)), progress=False, log=lines.append)
    assert res.setup.inputs["kernels"].cell_term
    assert any("term per cell" in line for line in lines)
    path = write_run(res, tmp_path / "runs")
    s = json.loads((path / "summary.json").read_text())
    lg = s[res.model.name]["lgcp"] if overdispersion else s["lgcp"]  # a composite kind nests the base's section
    term = lg["embedding"]["truncation"]["cell_term"]
    assert term["on"] and term["option"] == "auto" and term["screen"]["needed"]
    # the quadrature sized on the run's own cells at the chains' start: the fewest candidate
    # nodes within the budget (lgcp.size_quadrature; the choice itself: tests/test_cell_term.py)
    sized = term["quadrature"]
    errors = {int(k): e for k, e in sized["summed_error_nats_by_nodes"].items()}
    assert sized["nodes"] == res.setup.inputs["kernels"].nodes == max(errors)
    assert errors[sized["nodes"]] <= lgcp.QUADRATURE_NOTE_NATS
    assert all(e > lgcp.QUADRATURE_NOTE_NATS for k, e in errors.items() if k < sized["nodes"])
    dm = lg["field_parameters"]["dropped_modes"]
    assert dm["treatment"].startswith("per-cell term") and dm["term_variance_per_cell"] > 0 and not dm["warning"]
    described = lg["parametrisation"]["description"]
    assert lg["notes"] == [] and ("per cell, partially centred" if overdispersion
                                         else "integrated out cell by cell") in described
    post = res.idata.posterior
    assert res.setup.extra["grid_latent"]  # chain processes either way
    if overdispersion:
        assert "term_variance" not in post and dm["form"].startswith("sampled")
    else:  # the written field is the kept field plus exact draws of ε: μ + f + ε, with the rate from it
        assert "level" in post and "u_cells" not in post and dm["form"].startswith("integrated out")
        assert 0.0 <= dm["quadrature_error_nats"] < lgcp.QUADRATURE_NOTE_NATS
        assert dm["quadrature_nodes"] == sized["nodes"] and dm["nodes_rule"] == sized["rule"]
        assert dm["quadrature"] == sized["quadrature"] == cell_term.rule_name(sized["nodes"])
        # the Laplace expansion only up to the largest variance it was measured at, 16 nodes above
        kern = res.setup.inputs["kernels"]
        bound = max(sized["term_variances"]) if sized["nodes"] == cell_term.LAPLACE else math.inf
        assert kern.laplace_up_to == bound == dm.get("laplace_up_to_variance", math.inf)
        assert dm["nodes_sized_for_variance"] == max(sized["term_variances"])
        assert post["field"].attrs["includes_cell_term"]
        before = np.asarray(post["field"]).copy()
        lgcp.complete_posterior(res.idata, res.stats, res.setup, 3)  # a second call adds nothing
        np.testing.assert_array_equal(np.asarray(res.idata.posterior["field"]), before)
        monkeypatch.setattr(lgcp, "QUADRATURE_NOTE_NATS", -1.0)
        (note,) = lgcp.summary(res)["notes"]  # a quadrature error beyond the threshold
        assert "per-cell term's variance reached" in note and dm["quadrature"] in note
        rate = np.exp(np.asarray(post["mu"]) + np.asarray(post["log_window_integral"]))
        np.testing.assert_allclose(np.asarray(post["rate"]), rate, rtol=1e-10)
        lam = np.exp(np.asarray(post["field"], float) + np.asarray(post["mu"])[..., None])
        np.testing.assert_allclose(np.asarray(post["rate"]), np.sum(lam * res.stats.window_area, axis=-1), rtol=1e-5)
    assert "note: the truncated field" not in human_summary(s, path)
    assert "Note: the truncated field" not in write_report(load_run(path)).read_text()
    draws = lgcp.prior_draws(res.prior, res.stats, res.setup, np.random.default_rng(2), 50)
    assert np.all(np.isfinite(draws["rate"])) and np.all(draws["rate"] > 0)


def test_composite_kinds_carry_the_base_kinds_notes(monkeypatch, request):
    """A composite kind (here lgcp+overdispersion) nests the base kind's summary under its
    name; its notes are lifted to the composite's own section, which `sceneprior fit`'s
    lines, report.html and the export read."""
    import dataclasses

    from sceneprior.models import registry, scanterms
    from sceneprior.models.variants import variant_kind

    variant_kind.cache_clear()  # composite kinds are cached: build them from the patched base, and forget them after
    request.addfinalizer(variant_kind.cache_clear)
    base = dataclasses.replace(registry.MODELS["lgcp"], summary=lambda result: {"notes": ["dropped too much"]})
    monkeypatch.setitem(registry.MODELS, "lgcp", base)
    monkeypatch.setattr(scanterms, "summary", lambda result, tokens: {"base_rate": {}})
    out = variant_kind("lgcp+overdispersion").summary(None)
    assert out["notes"] == ["dropped too much"] and out["lgcp"]["notes"] == ["dropped too much"]
    monkeypatch.setitem(registry.MODELS, "lgcp", dataclasses.replace(base, summary=lambda result: {"notes": []}))
    variant_kind.cache_clear()
    assert "notes" not in variant_kind("lgcp+overdispersion").summary(None)
