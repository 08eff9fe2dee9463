"""Tests of the Gaussian-field maths (sceneprior.fields): kernels, circulant embedding,
truncated Fourier modes.

References are outside the project: closed forms and the Bessel form of the Matérn
kernel (Rasmussen & Williams 2006), scipy.special / scipy.integrate / scipy.linalg /
scipy.spatial, the circulant-matrix eigenvalue theorem (Wood & Chan 1994), the
log-Gaussian moments (Møller, Syversveen & Waagepetersen 1998), the Poisson summation
formula and the analytic tail of the Matérn / SE spectral densities. Monte Carlo checks
use fixed seeds and tolerances derived from the exact sampling variance (stated at each
check), with a Bonferroni level over the entries tested; nothing is tuned to pass.
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import integrate, linalg, special, stats
from scipy.spatial.distance import cdist

from sceneprior.errors import InputError
from sceneprior.fields import embedding as emb
from sceneprior.fields import kernels as ker
from sceneprior.fields import spectral as spe

KERNELS = ("matern12", "matern32", "matern52", "squared_exponential")
NU = {"matern12": 0.5, "matern32": 1.5, "matern52": 2.5}


@pytest.fixture(autouse=True)
def _float64():
    # float64 for this module only (the lead owns the global configuration)
    with jax.enable_x64(True):
        yield


# ----------------------------------------------------------------- reference helpers

def bessel_matern(r, variance, length_scale, nu):
    """General Matérn, Rasmussen & Williams (2006) eq. 4.14, with scipy.special.kv."""
    r = np.asarray(r, dtype=float)
    x = math.sqrt(2.0 * nu) * r / length_scale
    out = np.full_like(r, variance)
    pos = x > 0
    out[pos] = variance * 2.0 ** (1.0 - nu) / special.gamma(nu) * x[pos] ** nu * special.kv(nu, x[pos])
    return out


def reference_kernel(name, r, variance, length_scale):
    """Kernel from outside the code under test: Bessel form (eq. 4.14), or the SE
    formula of Rasmussen & Williams (2006) eq. 4.9 written out here."""
    if name == "squared_exponential":
        return variance * np.exp(-0.5 * (np.asarray(r) / length_scale) ** 2)
    return bessel_matern(r, variance, length_scale, NU[name])


def wrapped_dense_covariance(name, grid_shape, spacing, torus_shape, variance, ls):
    """Dense covariance of the grid cells from minimum-image distances on the torus,
    built independently of the code under test (Wood & Chan 1994)."""
    n0, n1 = grid_shape
    i0, i1 = np.divmod(np.arange(n0 * n1), n1)
    d0 = np.abs(i0[:, None] - i0[None, :])
    d1 = np.abs(i1[:, None] - i1[None, :])
    d0 = np.minimum(d0, torus_shape[0] - d0) * spacing[0]
    d1 = np.minimum(d1, torus_shape[1] - d1) * spacing[1]
    r = np.sqrt((d0 / ls[0]) ** 2 + (d1 / ls[1]) ** 2)
    return reference_kernel(name, r, variance, 1.0)


def full_from_half(half, m1):
    """Full (m0, m1) spectrum from the rfft2 half spectrum by Hermitian symmetry."""
    m0 = half.shape[0]
    full = np.empty((m0, m1))
    h1 = half.shape[1]
    full[:, :h1] = half
    for k1 in range(h1, m1):
        full[:, k1] = half[(-np.arange(m0)) % m0, m1 - k1]
    return full


def linear_map_matrix(fn, x0):
    """Matrix of a linear map (its Jacobian), jitted: eager jax dispatch is slow."""
    return jax.jit(jax.jacfwd(fn))(x0)


# ----------------------------------------------------------------------------- kernels

@pytest.mark.parametrize("name", ["matern12", "matern32", "matern52"])
def test_matern_closed_forms_equal_bessel_form(name):
    # Rasmussen & Williams (2006), eq. 4.14 (general nu, scipy.special.kv) against the
    # half-integer closed forms (their eq. 4.17 and the exponential case).
    variance, ls = 1.7, 0.8
    r = np.concatenate([[0.0], np.geomspace(1e-4, 12.0, 200)])
    got = ker.get_kernel(name)(r, variance, ls)
    np.testing.assert_allclose(got, bessel_matern(r, variance, ls, NU[name]), rtol=1e-11, atol=1e-300)
    # the jax path gives the same numbers
    got_jax = ker.get_kernel(name)(jnp.asarray(r), jnp.asarray(variance), jnp.asarray(ls))
    np.testing.assert_allclose(np.asarray(got_jax), got, rtol=1e-13, atol=1e-300)


def test_scaled_distance_is_mahalanobis_distance():
    # Rasmussen & Williams (2006) eq. 5.2: (x - x')^T M (x - x'), M = diag(l)^-2, which is
    # scipy's Mahalanobis distance with VI = M.
    rng = np.random.default_rng(11)
    x = rng.uniform(-5, 5, size=(30, 2))
    y = rng.uniform(-5, 5, size=(25, 2))
    ls = np.array([0.7, 2.3])
    ref = cdist(x, y, "mahalanobis", VI=np.diag(1.0 / ls**2))
    lags = (x[:, None, 0] - y[None, :, 0], x[:, None, 1] - y[None, :, 1])
    np.testing.assert_allclose(ker.scaled_distance(lags, ls), ref, rtol=1e-13)
    # and the anisotropic kernel is the unit-length-scale kernel of that distance
    got = ker.anisotropic_kernel("matern32", lags, 2.0, ls)
    np.testing.assert_allclose(got, bessel_matern(ref, 2.0, 1.0, 1.5), rtol=1e-11)


@pytest.mark.parametrize("name", KERNELS)
def test_spectral_density_is_fourier_transform_of_kernel(name):
    # 2-D isotropic Fourier pair as a Hankel transform (Bochner's theorem; Rasmussen &
    # Williams 2006 §4.2.1): k(r) = 2 pi ∫_0^inf S(s) J0(2 pi s r) s ds, integrated with
    # scipy between the zeros of J0; the oscillating tail is bounded by the last segment
    # (alternating series), which sets the tolerance.
    variance, ls = 1.3, 0.7
    pair = np.array([ls, ls])
    for r in (0.0, 0.35, 1.4):
        def f(s):
            return 2 * math.pi * s * special.j0(2 * math.pi * s * r) * ker.spectral_density(
                name, (np.asarray(s), np.asarray(0.0)), variance, pair)
        ref = float(reference_kernel(name, np.array(r), variance, ls))
        if r == 0.0:
            val, err = integrate.quad(f, 0, np.inf, limit=500)
            tol = 10 * err + 1e-12
        else:
            pts = np.concatenate([[0.0], special.jn_zeros(0, 400) / (2 * math.pi * r)])
            parts = np.array([integrate.quad(f, a, b)[0] for a, b in zip(pts[:-1], pts[1:])])
            ps = np.cumsum(parts)
            val = 0.5 * (ps[-1] + ps[-2])
            tol = abs(parts[-1]) + 1e-12
        assert abs(val - ref) <= tol, (r, val, ref, tol)


def test_anisotropic_spectral_density_integrates_to_kernel():
    # Fourier pair in 2-D for one length scale per axis: k(x) = ∫∫ S(s) cos(2 pi s.x) ds
    # (scipy dblquad), squared exponential (Rasmussen & Williams 2006 eq. 4.9 / 4.20).
    ls = np.array([0.5, 1.6])
    x = np.array([0.3, -0.8])

    def f(s1, s0):
        return float(ker.spectral_density("squared_exponential", (np.asarray(s0), np.asarray(s1)), 2.0, ls)
                     * math.cos(2 * math.pi * (s0 * x[0] + s1 * x[1])))

    val, err = integrate.dblquad(f, -4, 4, -2, 2, epsabs=1e-11)
    ref = 2.0 * math.exp(-0.5 * ((x[0] / ls[0]) ** 2 + (x[1] / ls[1]) ** 2))
    # the truncated domain drops exp(-2 pi^2 (4 l0)^2) or less: negligible
    assert abs(val - ref) < 10 * err + 1e-10


def test_unknown_kernel_is_input_error():
    with pytest.raises(InputError, match="unknown kernel"):
        ker.get_kernel("matern72")
    with pytest.raises(InputError, match="unknown kernel"):
        emb.plan_torus("gaussianish", (8, 8), (1.0, 1.0), 2.0)


# --------------------------------------------------------------- circulant embedding

@pytest.mark.parametrize("torus", [(6, 5), (7, 8)])
def test_eigenvalues_are_spectrum_of_block_circulant_matrix(torus):
    # Wood & Chan (1994): the eigenvalues of the block-circulant torus covariance are the
    # DFT of its first row. Reference: scipy.linalg.eigvalsh of the dense N x N matrix
    # built from minimum-image distances over the whole torus.
    geom = emb.TorusGeometry("matern52", torus, (1.0, 0.7), torus)
    ls = np.array([1.1, 0.9])
    dense = wrapped_dense_covariance("matern52", torus, (1.0, 0.7), torus, 1.4, ls)
    ref = np.sort(linalg.eigvalsh(dense))
    got = np.sort(full_from_half(np.asarray(geom.eigenvalues(ls, 1.4)), torus[1]).ravel())
    np.testing.assert_allclose(got, ref, atol=1e-12 * ref.max())


@pytest.mark.parametrize("name", KERNELS)
def test_embedding_covariance_matches_wrapped_kernel(name):
    # The covariance implied by the eigenvalues, IFFT(Λ), and the exact covariance of the
    # sampling map (J J^T, J = d field / d white noise) equal the kernel's dense
    # covariance from wrapped distances (Wood & Chan 1994; Dietrich & Newsam 1997).
    grid, spacing, ls, var = (5, 4), (1.0, 1.5), np.array([2.0, 3.0]), 1.7
    geom, report = emb.plan_torus(name, grid, spacing, ls)
    assert report.min_eigenvalue_ratio >= -emb.EIGENVALUE_TOLERANCE
    assert report.clipped_variance_fraction < 1e-9
    lam = jax.jit(geom.eigenvalues)(jnp.asarray(ls), jnp.asarray(var))
    row = np.asarray(emb.implied_first_row(lam, geom.torus_shape))
    dense = wrapped_dense_covariance(name, grid, spacing, geom.torus_shape, var, ls)
    np.testing.assert_allclose(emb.grid_covariance(row, grid), dense, atol=1e-9 * var)

    def field(w):
        return emb.sample_field(geom, lam, w).reshape(-1)

    jac = linear_map_matrix(field, jnp.zeros(geom.torus_shape)).reshape(grid[0] * grid[1], -1)
    np.testing.assert_allclose(np.asarray(jac @ jac.T), dense, atol=1e-9 * var)


def test_embedding_monte_carlo_covariance():
    # Monte Carlo covariance of draws against the wrapped-distance kernel covariance.
    # Known zero mean, so c_ij = mean(f_i f_j) with Var = (C_ii C_jj + C_ij^2) / S
    # (Isserlis' theorem). z-scores over the n(n+1)/2 distinct entries, two-sided,
    # Bonferroni family level 0.01.
    grid, spacing, ls, var = (5, 4), (1.0, 1.0), np.array([1.5, 2.5]), 1.2
    geom, _ = emb.plan_torus("matern32", grid, spacing, ls)
    lam = jax.jit(geom.eigenvalues)(jnp.asarray(ls), var)
    S = 20000
    w = jax.random.normal(jax.random.PRNGKey(20240601), (S,) + geom.torus_shape)
    f = np.asarray(jax.jit(jax.vmap(lambda x: emb.sample_field(geom, lam, x)))(w)).reshape(S, -1)
    c_hat = f.T @ f / S
    C = wrapped_dense_covariance("matern32", grid, spacing, geom.torus_shape, var, ls)
    se = np.sqrt((np.outer(np.diag(C), np.diag(C)) + C**2) / S)
    iu = np.triu_indices(C.shape[0])
    z = ((c_hat - C) / se)[iu]
    zcrit = stats.norm.ppf(1 - 0.01 / (2 * z.size))
    assert np.max(np.abs(z)) < zcrit


def test_lgcp_moments_of_prior_draws():
    # Møller, Syversveen & Waagepetersen (1998): for lambda = exp(mu + f) at fixed mu,
    # sigma, E[lambda_i] = exp(mu + sigma^2/2) and E[lambda_i lambda_j] = exp(2 mu +
    # sigma^2 + C_ij). Tolerance from the exact lognormal variances:
    #   Var lambda_i = exp(2mu + sigma^2)(exp(sigma^2) - 1),
    #   Var(lambda_i lambda_j) = exp(4mu + 4 sigma^2 + 4 C_ij) - exp(4mu + 2 sigma^2 + 2 C_ij),
    # se = sqrt(Var / S); |z| below the two-sided Bonferroni 0.01 point over all
    # means and pairs. sigma^2 = 0.25 keeps the skewness of the product small
    # (<= ~6 / sqrt(S)), so the normal approximation holds at S = 40000.
    grid, spacing, ls = (6, 5), (1.0, 1.0), np.array([2.0, 2.0])
    mu, var = 0.3, 0.25
    geom, _ = emb.plan_torus("matern32", grid, spacing, ls)
    lam = jax.jit(geom.eigenvalues)(jnp.asarray(ls), var)
    S = 40000
    w = jax.random.normal(jax.random.PRNGKey(7), (S,) + geom.torus_shape)
    f = np.asarray(jax.jit(jax.vmap(lambda x: emb.sample_field(geom, lam, x)))(w)).reshape(S, -1)
    lam_i = np.exp(mu + f)
    C = wrapped_dense_covariance("matern32", grid, spacing, geom.torus_shape, var, ls)

    m_exact = math.exp(mu + var / 2)
    z_mean = (lam_i.mean(0) - m_exact) / math.sqrt(math.exp(2 * mu + var) * (math.exp(var) - 1) / S)

    iu = np.triu_indices(C.shape[0], k=1)
    second = (lam_i.T @ lam_i / S)[iu]
    c = C[iu]
    e2 = np.exp(2 * mu + var + c)
    v2 = np.exp(4 * mu + 4 * var + 4 * c) - np.exp(4 * mu + 2 * var + 2 * c)
    z_pair = (second - e2) / np.sqrt(v2 / S)

    z = np.concatenate([z_mean, z_pair])
    zcrit = stats.norm.ppf(1 - 0.01 / (2 * z.size))
    assert np.max(np.abs(z)) < zcrit
    # power: the independence alternative E = exp(2mu + sigma^2) is far outside
    z_indep = (second - math.exp(2 * mu + var)) / np.sqrt(v2 / S)
    assert np.median(np.abs(z_indep)) > 2 * zcrit


def test_invalid_padding_raises_input_error():
    # Dietrich & Newsam (1997): the minimum-image embedding of a smooth kernel with a
    # long length scale has negative eigenvalues unless the torus is large.
    with pytest.raises(InputError, match="padding is too small.*use padding"):
        emb.plan_torus("squared_exponential", (16, 16), (1.0, 1.0), 8.0, padding=0.5)
    geom = emb.TorusGeometry("matern32", (16, 16), (1.0, 1.0), (20, 20))
    with pytest.raises(InputError, match="padding is too small"):
        emb.validate_embedding(geom, 6.0)
    # check independently (numpy.fft) that this torus really is invalid
    d = np.minimum(np.arange(20), 20 - np.arange(20)).astype(float)
    r = np.hypot(d[:, None], d[None, :])
    lam = np.fft.fft2(reference_kernel("matern32", r, 1.0, 6.0)).real
    assert lam.min() < -1e-10 * lam.max()
    with pytest.raises(InputError, match="smaller than the grid"):
        emb.TorusGeometry("matern32", (16, 16), (1.0, 1.0), (12, 20))
    with pytest.raises(InputError, match="exceeds"):
        emb.plan_torus("matern32", (64, 64), (1.0, 1.0), 30.0, padding=6.0, max_torus_cells=10_000)
    with pytest.raises(InputError, match="no valid circulant embedding"):
        emb.plan_torus("matern32", (64, 64), (1.0, 1.0), 30.0, max_torus_cells=10_000)


def test_automatic_padding_is_valid_and_negatives_are_clipped():
    # padding=None grows the torus until min(Λ) >= -1e-10 max(Λ); checked here with
    # numpy.fft on a row built from the reference kernel. Then a torus with small
    # negatives: the reported clipped variance is (1/N) sum max(-Λ, 0) (numpy.fft) and
    # the sampled field's variance is sigma^2 plus exactly that.
    geom, report = emb.plan_torus("squared_exponential", (16, 16), (1.0, 1.0), 4.0)
    m0, m1 = geom.torus_shape
    d0 = np.minimum(np.arange(m0), m0 - np.arange(m0)).astype(float)
    d1 = np.minimum(np.arange(m1), m1 - np.arange(m1)).astype(float)
    lam = np.fft.fft2(reference_kernel("squared_exponential", np.hypot(d0[:, None], d1[None, :]), 1.0, 4.0)).real
    assert lam.min() >= -1e-10 * lam.max()
    assert report.wrap_error < 1e-3

    small = emb.TorusGeometry("matern52", (8, 8), (1.0, 1.0), (20, 20))
    rep = emb.validate_embedding(small, 3.0, tolerance=1e-2)
    d = np.minimum(np.arange(20), 20 - np.arange(20)).astype(float)
    lam = np.fft.fft2(reference_kernel("matern52", np.hypot(d[:, None], d[None, :]), 1.0, 3.0)).real
    clipped = np.maximum(-lam, 0).sum() / lam.size
    assert clipped > 0
    np.testing.assert_allclose(rep.clipped_variance_fraction, clipped, rtol=1e-8)
    row = emb.implied_first_row(small.eigenvalues(np.asarray(3.0), 1.0), (20, 20))
    np.testing.assert_allclose(row[0, 0], 1.0 + clipped, rtol=1e-10)


def test_grad_through_eigenvalues_is_finite_and_correct():
    # jax.grad w.r.t. the length scale(s) and variance, traced under jit with the torus
    # static; compared with a central finite difference (float64).
    geom = emb.TorusGeometry("matern32", (8, 8), (1.0, 1.0), (24, 24))
    wts = jnp.asarray(np.random.default_rng(3).uniform(size=geom.half_shape))

    def obj(ls, var):
        return jnp.sum(wts * jnp.sqrt(jnp.maximum(geom.eigenvalues(ls, var), 1e-12)))

    g = jax.jit(jax.grad(obj, argnums=(0, 1)))
    obj_jit = jax.jit(obj)
    eps = 1e-6
    for ls in (jnp.asarray(1.3), jnp.asarray([1.3, 2.1])):
        gl, gv = g(ls, jnp.asarray(0.8))
        assert np.all(np.isfinite(np.asarray(gl))) and np.isfinite(float(gv))
        for a in range(ls.size):
            e = jnp.zeros(ls.size).at[a].set(eps).reshape(ls.shape)
            fd = (obj_jit(ls + e, 0.8) - obj_jit(ls - e, 0.8)) / (2 * eps)
            np.testing.assert_allclose(np.ravel(gl)[a], fd, rtol=1e-6)
        fd_v = (obj_jit(ls, 0.8 + eps) - obj_jit(ls, 0.8 - eps)) / (2 * eps)
        np.testing.assert_allclose(gv, fd_v, rtol=1e-6)
    # jitted with traced values equals eager evaluation at two different length scales
    jit_eig = jax.jit(geom.eigenvalues)
    for ls in (1.0, 2.5):
        np.testing.assert_allclose(np.asarray(jit_eig(jnp.asarray(ls), jnp.asarray(1.0))),
                                   np.asarray(geom.eigenvalues(np.asarray(ls), 1.0)), atol=1e-11)


# -------------------------------------------------------------------- periodised spectrum

def test_spectrum_fast_form_matches_the_general_density():
    # The rsqrt form of the unit density (used on every torus mode at every gradient)
    # against the pow form of Rasmussen & Williams (2006) eq. 4.15 written out here, and
    # the periodised spectrum (one length scale per axis) against a direct double loop over
    # the half spectrum and the alias terms with the anisotropic density.
    u2 = np.linspace(0.0, 40.0, 201)
    for name, nu in NU.items():
        ref = 4 * math.pi * nu * (2 * nu) ** nu * (2 * nu + 4 * math.pi**2 * u2) ** (-(nu + 1))
        np.testing.assert_allclose(ker.unit_spectral_density(name, u2), ref, rtol=1e-13)
    geom = emb.TorusGeometry("matern32", (5, 4), (2.0, 3.0), (11, 8))
    ls, var = np.array([4.0, 5.0]), 0.7
    lam = np.asarray(spe.aliased_eigenvalues(geom, ls, var, n_alias=1))
    (m0, m1), (h0, h1) = geom.torus_shape, geom.spacing
    want = np.zeros((m0, m1 // 2 + 1))
    for i, k0 in enumerate(np.fft.fftfreq(m0, 1.0 / m0)):
        for k1 in range(m1 // 2 + 1):
            for q0 in (-1, 0, 1):
                for q1 in (-1, 0, 1):
                    s0, s1 = (k0 + q0 * m0) / (m0 * h0), (k1 + q1 * m1) / (m1 * h1)
                    want[i, k1] += ker.spectral_density("matern32", (np.array(s0), np.array(s1)), var, ls)
    np.testing.assert_allclose(lam, want / (h0 * h1), rtol=1e-12)


@pytest.mark.parametrize("name", KERNELS)
def test_aliased_eigenvalues_give_periodised_kernel(name):
    # Poisson summation: the DFT of the periodised row sum_j k(i h + j T) is
    # (1/(h0 h1)) sum_q S((k + q m)/T). Reference: the periodised kernel summed in space
    # (|j| <= 4 images, reference kernel). The alias sum kept (|q| <= 3) misses the
    # spectral mass outside the box |s_a| <= 3.5 / h_a, at most the analytic tail outside
    # the inscribed disc r = 3.5 / h, which bounds every covariance entry's error.
    torus, spacing, ls, var, n_alias = (12, 10), (1.0, 1.0), 1.5, 1.1, 3
    geom = emb.TorusGeometry(name, (6, 5), spacing, torus)
    lam = np.asarray(spe.aliased_eigenvalues(geom, jnp.asarray(ls), var, n_alias=n_alias))
    assert lam.min() > 0
    row = np.fft.irfft2(lam, s=torus)
    k0 = np.arange(torus[0])[:, None]
    k1 = np.arange(torus[1])[None, :]
    ref = np.zeros(torus)
    for j0 in range(-4, 5):
        for j1 in range(-4, 5):
            r = np.hypot((k0 + j0 * torus[0]) * spacing[0], (k1 + j1 * torus[1]) * spacing[1])
            ref += reference_kernel(name, r, var, ls)
    rcut = (n_alias + 0.5) / spacing[0]
    if name == "squared_exponential":
        tail = math.exp(-2 * math.pi**2 * ls**2 * rcut**2)
    else:
        nu = NU[name]
        tail = (1 + 4 * math.pi**2 * ls**2 * rcut**2 / (2 * nu)) ** (-nu)
    err = np.abs(row - ref).max()
    assert err <= var * tail + 1e-12, (err, var * tail)
    assert row[0, 0] <= ref[0, 0] + 1e-12  # the dropped aliases only lower the variance


def test_wrap_error_is_the_periodised_kernels_distance_from_the_planar_one():
    # The wrap error (the torus images summed in space) at length scale ℓ against the
    # periodised covariance the spectrum implies (Poisson summation, as above: the DFT of
    # the aliased spectral density, |q| <= 3) minus the planar kernel, maximised over the
    # grid's lags — the squared exponential, whose alias sum misses less than
    # exp(-2π²ℓ²(3.5/h)²) of σ² at ℓ >= 2h. It grows with ℓ for every kernel (Matérn 1/2
    # too, whose truncated alias sum would add a deficit at short ℓ). Then the bisection for
    # the longest length scale within a limit: it meets the limit, and 2 % more exceeds it.
    grid, spacing = (6, 5), (1.0, 1.0)
    torus = (12, 10)
    geom = emb.TorusGeometry("squared_exponential", grid, spacing, torus)
    spec = spe.Spectrum(geom, "periodised")
    k0 = np.arange(grid[0])[:, None]
    k1 = np.arange(grid[1])[None, :]
    for ls in (2.0, 3.0, 4.5):
        row = np.fft.irfft2(np.asarray(spe.aliased_eigenvalues(geom, np.array([ls, ls]), 1.0, n_alias=3)), s=torus)
        want = np.abs(row[: grid[0], : grid[1]] - reference_kernel("squared_exponential", np.hypot(k0, k1), 1.0, ls)).max()
        assert spe.wrap_error(spec, [ls, ls]) == pytest.approx(want, abs=1e-10)
    for name in KERNELS:
        g = spe.Spectrum(emb.TorusGeometry(name, grid, spacing, torus), "periodised")
        errs = [spe.wrap_error(g, [ls, ls]) for ls in (0.5, 1.0, 2.0, 3.0, 4.5, 6.0)]
        assert np.all(np.diff(errs) > 0), (name, errs)
    lo2, hi2 = np.array([2.0, 2.0]), np.array([6.0, 6.0])
    assert spe.wrap_error(spec, hi2) > 0.1
    fits = spe.longest_within_wrap(spec, lo2, hi2, 0.1)
    assert spe.wrap_error(spec, fits) <= 0.1 < spe.wrap_error(spec, 1.02 * fits)
    assert spe.longest_within_wrap(spec, lo2, hi2, 1e-9) is None  # even the minimum exceeds it
