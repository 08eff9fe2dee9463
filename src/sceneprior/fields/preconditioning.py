"""Data-informed reparametrisation of the torus field: fast NUTS in weak and strong data.

The field on the m0 × m1 torus is f = C^{1/2} w, w ~ N(0, I) (circulant embedding, Wood &
Chan 1994), with eigenvalues Λ_k of the torus covariance C. Only the grid's cells carry
data, and the posterior precision of f is C^{-1} + W with W = diag(λ_c E_c) on exposed grid
cells and 0 on the padding and on unexposed cells. The sampler moves in white coordinates
u (one per torus cell) mapped to the field in three exact, invertible, linear steps:

1. soft direction (rank one):  u ← u + (s − 1) g (g·u), |g| = 1, Jacobian s (constant);
2. padding correction:         y = ū + M(u − ū) − mean(M(u − ū)),  M = D + P K P,
   D / P the masks of exposed grid cells / the rest of the torus, K the circulant with
   eigenvalues κ_k = √(1 + w̄ Λ̂_k) at pilot hyperparameters (κ_0 = 1); Jacobian constant;
3. partial centring per Fourier mode:  f = irfft2( √(Λ_k / d_k) · rfft2(y) ),
   d_k = 1 + w̄ Λ_k (d_0 = 1), w̄ = detections per exposed cell (per torus cell when the
   padding correction is off, i.e. in weak data, where it matters little).

Why. Step 3 alone is the circulant preconditioner of C^{-1} + w̄ I: modes the data pin
(w̄ Λ_k ≫ 1) become centred, weakly informed ones non-centred (Papaspiliopoulos, Roberts &
Sköld 2007), with posterior scale ≈ 1 whatever σ and ℓ are. It is exact on a torus fully
covered by data; with a padded torus the data cover about a quarter of it, and the
padding's share of each strongly informed mode (posterior = prior there) would be shrunk
by 1/√d_k — NUTS then needs hundreds of leapfrog steps per draw. Step 2 undoes that
shrinkage on the padding (and on unexposed cells): there y = K u ≈ √d̂ u, so the padding
field is ≈ C^{1/2} u again (non-centred), while exposed cells keep the centred scaling.
K is fixed at pilot hyperparameters (moments of the empirical log intensity) so the
Jacobian is a constant; it is a preconditioner only — any K gives the same posterior.
The zero mode (the field's mean) is left out of the data scaling because the baseline
intensity is integrated out (conjugate Gamma), so only the field's shape meets the data.
Step 1: the field's mean over the exposed cells relative to the padding is then prior-only
but is spread over every coordinate, which a diagonal mass matrix cannot see; g is that
direction, found once by conjugate gradients on the Gaussian approximation at the pilot
(``soft_direction``), and s its posterior scale there.

Every map here is pure array maths (jax.numpy), jit- and grad-friendly; the model
(``sceneprior.models.lgcp``) holds the sample sites.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

from sceneprior.fields.embedding import half_multiplicity
from sceneprior.fields.kernels import anisotropic_kernel

__all__ = ["Preconditioner", "pilot_hyperparameters", "build_preconditioner", "field_and_prior",
           "soft_direction", "PAD_THRESHOLD"]

#: the padding correction is used when some mode's data information w̄·Λ̂_k exceeds this;
#: below it K ≈ I and the two extra FFTs per gradient buy nothing
PAD_THRESHOLD = 1.0


@dataclass(frozen=True, eq=False)
class Preconditioner:
    """Fixed arrays of the reparametrisation (model inputs; no effect on the posterior).

    torus_shape (m0, m1); exposed (m0, m1) float 1/0: exposed grid cells (D); kappa
    (m0, m1//2+1): eigenvalues of K (ones when ``use_pad`` is False); w_scale: w̄
    [detections per exposed cell]; soft (m0, m1) unit vector g and soft_scale s;
    use_pad (static): apply step 2; pilot: the pilot hyperparameters (reported).
    """

    torus_shape: tuple[int, int]
    exposed: np.ndarray
    kappa: np.ndarray
    w_scale: float
    soft: np.ndarray
    soft_scale: float
    use_pad: bool
    pilot: dict

    def arrays(self) -> dict:
        """The dynamic inputs (so a compiled model can be re-used with other data), with the
        Householder vector v that maps the first white coordinate onto g (v = 0: no soft
        direction, H = I)."""
        g = np.asarray(self.soft, float).reshape(-1)
        e0 = np.zeros_like(g)
        e0[0] = 1.0
        v = e0 - g
        nv = np.linalg.norm(v)
        v = v / nv if np.linalg.norm(g) > 0 and nv > 1e-12 else np.zeros_like(g)
        return {"exposed": jnp.asarray(self.exposed), "kappa": jnp.asarray(self.kappa),
                "w_scale": jnp.asarray(self.w_scale), "soft": jnp.asarray(self.soft),
                "soft_scale": jnp.asarray(self.soft_scale), "householder": jnp.asarray(v)}

    def report(self) -> dict:
        return {"padding_correction": bool(self.use_pad), "w_bar_detections_per_exposed_cell": self.w_scale,
                "soft_direction_scale": self.soft_scale, "pilot": self.pilot}


def _y_map(u, pre: dict, use_pad: bool):
    """Steps 1–2: white u (m0, m1) → y (m0, m1)."""
    g = pre["soft"]
    u = u + (pre["soft_scale"] - 1.0) * g * jnp.sum(g * u)
    if not use_pad:
        return u
    ub = jnp.mean(u)
    ut = u - ub
    pad = 1.0 - pre["exposed"]
    yt = pre["exposed"] * ut + pad * jnp.fft.irfft2(pre["kappa"] * jnp.fft.rfft2(pad * ut), s=u.shape)
    return yt - jnp.mean(yt) + ub


def safe_sqrt(x):
    """√x with a finite gradient where x = 0: a smooth kernel's eigenvalues underflow to
    exactly 0 at high frequencies (squared exponential: e^{−2π²ℓ²s²}), where jnp.sqrt's
    derivative is infinite and 0·∞ made the gradient in σ and ℓ NaN."""
    pos = x > 0
    return jnp.where(pos, jnp.sqrt(jnp.where(pos, x, 1.0)), 0.0)


def field_and_prior(u, lam, pre: dict, grid_shape, use_pad: bool, info=None, shift=None):
    """Grid field f (n0·n1,) and the log prior density of the white coordinates u, up to a
    constant, given the torus eigenvalues ``lam`` (m0, m1//2+1) at the sampled σ, ℓ.

    With y = T(u) (steps 1–2, a fixed linear map) and f = L_θ y (step 3), the prior
    f ~ N(0, C_θ) gives  log p(u) = −½ yᵀ(I + w̄ C_θ)⁻¹ y − ½ log det(I + w̄ C_θ) + const
    (L_θ C_θ⁻¹ L_θ = (I + w̄C_θ)⁻¹, log det L_θ = ½ log det C_θ − ½ log det(I + w̄C_θ)),
    both evaluated on the half spectrum with Parseval weights (1/N Σ_k mult_k |Y_k|²).

    Two optional generalisations for fields that share data (several fields on one torus,
    ``models/lgcp_sites.py``); both keep the formula above exact:
    ``info`` (m0, m1//2+1): the data information per mode, d_k = 1 + info_k, in place of
    w̄Λ_k (any non-negative function of θ; the zero mode stays d_0 = 1);
    ``shift`` (m0, m1//2+1) complex: subtracted from Y = rfft2(y) before step 3 — a shear
    by another field's coordinates (unit Jacobian when it does not depend on u), so that
    f = L_θ(y − y_shift) and y is replaced by y − y_shift in log p(u).
    """
    m0, m1 = u.shape
    n_torus = m0 * m1
    y = _y_map(u, pre, use_pad)
    Y = jnp.fft.rfft2(y)
    if shift is not None:
        Y = Y - shift
    lam = jnp.maximum(lam, 0.0)
    zero = jnp.ones_like(lam).at[0, 0].set(0.0)
    d = 1.0 + zero * (pre["w_scale"] * lam if info is None else info)
    mult = jnp.asarray(half_multiplicity((m0, m1)))
    quad = jnp.sum(mult * (Y.real**2 + Y.imag**2) / d) / n_torus
    logdet = jnp.sum(mult * jnp.log(d))
    f = jnp.fft.irfft2(safe_sqrt(lam / d) * Y, s=(m0, m1))
    n0, n1 = grid_shape
    return f[:n0, :n1].reshape(-1), -0.5 * quad - 0.5 * logdet


# ----------------------------------------------------------------------------- set-up
def pilot_hyperparameters(counts, exposure, grid_shape, spacing, kernel, ls_lo, ls_hi,
                          sigma_scale, offset=None) -> dict:
    """Rough σ, ℓ from moments of the empirical log intensity g_c = log((N_c+½)/E_c) on
    exposed cells: σ² = var(g) − mean Poisson noise (≈ 1/(N_c+½)), ℓ per axis from the
    lag-one correlation along that axis (solving k(h)/σ² = ρ₁), clipped to the prior's
    range. ``offset`` (n0·n1,): a log intensity explained by other fields, subtracted from
    g first (a deviation field's pilot). Only used to build the fixed preconditioner; never
    enters the posterior."""
    n0, n1 = grid_shape
    counts = np.asarray(counts, float).reshape(n0, n1)
    exposure = np.asarray(exposure, float).reshape(n0, n1)
    ok = exposure > 0
    g = np.full((n0, n1), np.nan)
    g[ok] = np.log((counts[ok] + 0.5) / exposure[ok])
    if offset is not None:
        g[ok] -= np.asarray(offset, float).reshape(n0, n1)[ok]
    noise = np.where(ok, 1.0 / (counts + 0.5), np.nan)
    s2 = float(np.nanvar(g) - np.nanmean(noise)) if ok.sum() > 1 else 0.0
    s2 = float(np.clip(s2, (0.05 * sigma_scale) ** 2, (3.0 * sigma_scale) ** 2))
    gc = g - np.nanmean(g)
    ls_lo = np.atleast_1d(np.asarray(ls_lo, float))
    ls_hi = np.atleast_1d(np.asarray(ls_hi, float))
    lags = []
    for axis in (0, 1):
        a = np.take(gc, np.arange(gc.shape[axis] - 1), axis=axis)
        b = np.take(gc, np.arange(1, gc.shape[axis]), axis=axis)
        both = np.isfinite(a) & np.isfinite(b)
        lags.append(float(np.mean(a[both] * b[both])) / s2 if both.sum() > 2 else 0.5)
    out_ls = []
    for i in range(ls_lo.size):
        rho = np.clip(np.mean(lags) if ls_lo.size == 1 else lags[i], 0.05, 0.99)
        h = spacing[0] if ls_lo.size == 1 else spacing[i]
        cand = np.geomspace(ls_lo[i], ls_hi[i], 256)
        lag = (np.array([h]), np.array([0.0]))
        vals = np.array([float(anisotropic_kernel(kernel, lag, 1.0, np.array([c, c]))[0])
                         for c in cand])
        out_ls.append(float(cand[np.argmin(np.abs(vals - rho))]))
    return {"sigma": math.sqrt(s2), "length_scale": out_ls}


def pair_correlation_pilot(counts, exposure, grid_shape, spacing, kernel, ls_lo, ls_hi, sigma_scale,
                           n_grid: int = 48) -> dict:
    """Rough σ, ℓ from the binned pair correlation, usable when cells hold few detections.

    For a log-Gaussian Cox process the pair correlation is g(τ) = exp(C(τ)) (Møller,
    Syversveen & Waagepetersen 1998), and for two different cells E[N_i N_j] =
    E_i E_j ρ̄² g(τ_ij) whatever the counts per cell, so ĝ(τ) = Σ_i N_i N_{i+τ} /
    (ρ̂² Σ_i E_i E_{i+τ}), ρ̂ = ΣN/ΣE, estimates it without the Poisson noise that swamps
    per-cell moments at 0.3 detections per cell (both sums by zero-padded FFT). log ĝ is
    then fitted by weighted least squares (weights Σ_i E_i E_{i+τ}) with C(τ; σ², ℓ) over
    lags up to the largest length scale (excluding τ = 0): σ² in closed form for each ℓ on
    a geometric grid over the prior's range (one per axis on polar grids). Only used to
    build a fixed preconditioner; never enters the posterior."""
    n0, n1 = grid_shape
    N = np.asarray(counts, float).reshape(n0, n1)
    E = np.asarray(exposure, float).reshape(n0, n1)
    N = np.where(E > 0, N, 0.0)
    if N.sum() < 2 or (E > 0).sum() < 4:
        return {"sigma": 0.05 * sigma_scale, "length_scale": list(np.atleast_1d(np.asarray(ls_lo, float)))}
    shape = (2 * n0, 2 * n1)

    def autocorr(x):
        X = np.fft.rfft2(x, s=shape)
        return np.fft.irfft2(X * np.conj(X), s=shape)

    rho = N.sum() / E.sum()
    sn, se = np.rint(autocorr(N)), autocorr(E)  # pair counts are integers: drop FFT round-off
    h0, h1 = spacing
    k0 = np.fft.fftfreq(shape[0], 1.0 / shape[0])
    k1 = np.fft.fftfreq(shape[1], 1.0 / shape[1])
    d0, d1 = np.abs(k0)[:, None] * h0, np.abs(k1)[None, :] * h1
    ls_lo = np.atleast_1d(np.asarray(ls_lo, float))
    ls_hi = np.atleast_1d(np.asarray(ls_hi, float))
    hi2 = np.resize(ls_hi, 2)
    use = (se > 1e-9 * se.max()) & (sn > 0) & ((d0 > 0) | (d1 > 0)) & (d0 <= hi2[0]) & (d1 <= hi2[1])
    if use.sum() < 3:
        return {"sigma": 0.05 * sigma_scale, "length_scale": list(ls_lo)}
    y = np.log(sn[use] / (rho**2 * se[use]))
    wt = se[use] / se[use].sum()
    lags = (d0 * np.ones_like(d1))[use], (d1 * np.ones_like(d0))[use]
    grids = [np.geomspace(a, b, n_grid) for a, b in zip(ls_lo, ls_hi)]
    best = (np.inf, None, None)
    for ls in (np.array([a, a]) for a in grids[0]) if ls_lo.size == 1 else (
            np.array([a, b]) for a in grids[0] for b in grids[1]):
        c = np.asarray(anisotropic_kernel(kernel, lags, 1.0, ls), float)
        s2 = max(float(np.sum(wt * c * y) / max(np.sum(wt * c * c), 1e-300)), 0.0)
        err = float(np.sum(wt * (y - s2 * c) ** 2))
        if err < best[0]:
            best = (err, s2, ls)
    s2 = float(np.clip(best[1], (0.05 * sigma_scale) ** 2, (3.0 * sigma_scale) ** 2))
    return {"sigma": math.sqrt(s2), "length_scale": [float(v) for v in best[2][: ls_lo.size]]}


def _energy(v, lam, pre, w, total, grid_shape, use_pad):
    """Negative log density of the Gaussian approximation at the pilot: the field prior of
    the white coordinates plus the Laplace curvature of the likelihood with weights w
    (N_c + ½), the level direction removed (the baseline is integrated out). ``pre["info"]``,
    when present, is the per-mode information of ``build_preconditioner(information=...)``."""
    f, logp = field_and_prior(v, lam, pre, grid_shape, use_pad, info=pre.get("info"))
    lik = jnp.sum(w * f**2) - jnp.dot(w, f) ** 2 / jnp.maximum(total, 1e-300)
    return -logp + 0.5 * lik


def _hvp(v, lam, pre, w, total, grid_shape, use_pad):
    grad = jax.grad(_energy)
    zero = jnp.zeros_like(v)
    return jax.jvp(lambda x: grad(x, lam, pre, w, total, grid_shape, use_pad), (zero,), (v,))[1]


@partial(jax.jit, static_argnames=("grid_shape", "use_pad", "maxiter"))
def _soft_solve(r, lam, pre, w, total, grid_shape, use_pad, maxiter=200):
    """Conjugate gradients (Hestenes & Stiefel 1952; jax.scipy.sparse.linalg.cg) for H x = r,
    and the curvature of H along the normalised solution; compiled once per grid."""
    from jax.scipy.sparse.linalg import cg

    op = lambda v: _hvp(v, lam, pre, w, total, grid_shape, use_pad)  # noqa: E731
    x, _ = cg(op, r, maxiter=maxiter)
    g = x / jnp.linalg.norm(x)
    return g, jnp.vdot(g, op(g))


def soft_direction(lam, pre: dict, w, grid_shape, use_pad: bool, maxiter: int = 200):
    """The direction of largest posterior spread that a diagonal mass matrix misses: the
    exposed cells' mean against the rest, g ∝ H⁻¹ r with r the centred indicator of the
    exposed cells and H the Hessian of the Gaussian approximation at the pilot. Returns
    (g, s) with s = (gᵀ H g)^{-1/2}, the posterior scale along g; (0, 1) if it fails."""
    exposed = np.asarray(pre["exposed"])
    r = exposed - exposed.mean()
    norm = np.linalg.norm(r)
    if norm == 0:
        return np.zeros_like(exposed), 1.0
    g, curv = _soft_solve(jnp.asarray(r / norm), lam, pre, w, jnp.asarray(float(np.sum(w))),
                          tuple(grid_shape), bool(use_pad), maxiter=maxiter)
    g, curv = np.asarray(g), float(curv)
    if not np.all(np.isfinite(g)) or not np.isfinite(curv) or curv <= 0:
        return np.zeros_like(exposed), 1.0
    return g, 1.0 / math.sqrt(curv)


def build_preconditioner(spectrum, grid_shape, counts, exposure, kernel, ls_lo, ls_hi, sigma_scale,
                         use_pad: bool | None = None, offset=None, information=None) -> Preconditioner:
    """Pilot hyperparameters, padding correction and soft direction for this data set.

    counts, exposure: (n0·n1,) per grid cell (exposure 0 where a cell carries no data).
    use_pad None: on when max_k w̄ Λ̂_k > PAD_THRESHOLD (strongly informed modes exist).
    offset: passed to :func:`pilot_hyperparameters` (a deviation field's pilot).
    information: for a field whose partial centring uses ``field_and_prior(info=...)``, a
    callable (Λ̂ at the pilot with Λ̂_0 = 0, w̄) → that per-mode information at the pilot; it
    then replaces w̄Λ̂_k in the use_pad decision, in κ_k = √(1 + info_k) and in the soft
    direction. Default (None): w̄Λ̂_k."""
    geom = spectrum.geom
    m0, m1 = geom.torus_shape
    n0, n1 = grid_shape
    counts = np.asarray(counts, float).reshape(-1)
    exposure = np.asarray(exposure, float).reshape(-1)
    pilot = pilot_hyperparameters(counts, exposure, grid_shape, geom.spacing, kernel, ls_lo, ls_hi, sigma_scale,
                                  offset=offset)
    ls_hat = np.resize(np.asarray(pilot["length_scale"], float), 2)
    lam_hat = np.maximum(np.asarray(spectrum.eigenvalues(ls_hat, pilot["sigma"] ** 2), float), 0.0)
    exposed = np.zeros((m0, m1))
    exposed[:n0, :n1] = (exposure > 0).reshape(n0, n1)
    n_exp = max(exposed.sum(), 1.0)
    w_bar = float(counts.sum() / n_exp)
    lam_nz = lam_hat.copy()
    lam_nz[0, 0] = 0.0
    mode_info = w_bar * lam_nz if information is None else np.asarray(information(lam_nz, w_bar), float)
    info = float(mode_info.max())
    if use_pad is None:
        use_pad = info > PAD_THRESHOLD
    if use_pad:
        kappa = np.sqrt(1.0 + mode_info)
    else:  # no padding correction: spread the data over the torus in the mode scaling instead
        w_bar = float(counts.sum() / (m0 * m1))
        kappa = np.ones_like(lam_hat)
    pre = {"exposed": jnp.asarray(exposed), "kappa": jnp.asarray(kappa), "w_scale": jnp.asarray(w_bar),
           "soft": jnp.zeros((m0, m1)), "soft_scale": jnp.asarray(1.0)}
    if information is not None:  # the soft direction's Gaussian approximation uses it too (_energy)
        pre["info"] = jnp.asarray(information(lam_nz, w_bar), dtype=float)
    w = np.zeros(n0 * n1)
    w[exposure > 0] = counts[exposure > 0] + 0.5
    g, s = soft_direction(jnp.asarray(lam_hat), pre, jnp.asarray(w), (n0, n1), use_pad)
    pilot = {**pilot, "max_mode_information": info}
    return Preconditioner((m0, m1), exposed, kappa, w_bar, g, float(s), bool(use_pad), pilot)
