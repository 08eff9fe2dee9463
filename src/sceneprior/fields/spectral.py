"""Torus eigenvalues of a stationary field: two valid constructions, chosen once per fit.

"embedding": the FFT of the minimum-image first row of the torus covariance (Wood & Chan
    1994; ``TorusGeometry.eigenvalues``), used when it is valid (no eigenvalue below
    −1e-10·max) on a torus at most twice the grid per axis;
"periodised": the spectral density summed over aliases, Poisson summation on the lattice
    h·Z² (Stein & Weiss 1971, ch. VII; from memory):

        Λ_k = 1/(h₀h₁) Σ_q S((k + q∘m)/T),   T_a = m_a h_a,

    the DFT of the periodised row c_per[i] = Σ_j k(i h + j T), so its covariance is the
    periodised kernel's — non-negative on any torus. It differs from the planar kernel by
    the wrap error (reported), and the alias sum is truncated at |q_a| ≤ n_alias, which
    lowers the variance by the reported deficit (largest for Matérn 1/2, whose spectrum
    decays like s⁻³). Used on the 2×-padded torus when the minimum-image row would need
    more padding (Matérn 3/2 and 1/2 at long length scales need 10–12 length scales).

S is the 2-D spectral density (Rasmussen & Williams 2006, eq. 4.15 / 4.20;
``kernels.unit_spectral_density``). Every function is jit/grad-friendly in the length
scales and the variance, the torus geometry static. The model keeps every torus mode.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import jax
import jax.numpy as jnp
import numpy as np

from sceneprior.fields.embedding import TorusGeometry, implied_first_row
from sceneprior.fields.kernels import anisotropic_kernel, unit_spectral_density

__all__ = ["Spectrum", "aliased_eigenvalues", "periodised_report", "wrap_error", "longest_within_wrap",
           "N_ALIAS", "WRAP_NOTE", "WRAP_LIMIT"]

#: alias terms per side of the periodised spectrum used by the model (3 × 3 terms)
N_ALIAS = 1

#: wrap errors (fractions of σ², :func:`wrap_error`) beyond which a fit notes (WRAP_NOTE) or
#: refuses (WRAP_LIMIT) its prior's longest length scales (``models.lgcp.plan``): the
#: periodised covariance is then a noticeably, or materially, different prior from the
#: kernel asked for — a field with periodic boundaries. Our own limits, no published
#: source. Measured (``wrap_error`` on 6², 8², 16², 64² grids, 2× torus, every kernel): a
#: maximum of a quarter of the region's extent (the default) gives at most 0.018 (Matérn 1/2
#: at 64²); half the extent 0.066–0.19; 0.625 of it 0.18–0.37; 0.75 of it 0.41–0.60; the
#: whole extent above 1.
WRAP_NOTE = 0.05
WRAP_LIMIT = 0.25


def _alias_tables(geom: TorusGeometry, n_alias: int):
    """Squared frequencies (cycles per axis unit) of the alias terms, per axis: rows
    (m0//2+1, 2·n_alias+1) for |k0| = 0..m0/2 — the density depends on s0² only and the
    alias set {(k0 + q·m0)²} is the same for −k0 — columns (m1//2+1, ·), and the row index
    that mirrors |k0| back to the m0 rows of the half spectrum."""
    (m0, m1), (h0, h1) = geom.torus_shape, geom.spacing
    q = np.arange(-n_alias, n_alias + 1, dtype=float)
    k0 = np.arange(m0 // 2 + 1, dtype=float)
    k1 = np.arange(m1 // 2 + 1, dtype=float)
    s0 = ((k0[:, None] + q[None, :] * m0) / (m0 * h0)) ** 2
    s1 = ((k1[:, None] + q[None, :] * m1) / (m1 * h1)) ** 2
    rows = np.abs(np.fft.fftfreq(m0, d=1.0 / m0)).astype(np.int64)
    return s0, s1, rows


def aliased_eigenvalues(geom: TorusGeometry, length_scales, variance, n_alias: int = N_ALIAS):
    """Half spectrum (m0, m1//2+1) of the periodised kernel (module docstring): variance ·
    ℓ₀ℓ₁/(h₀h₁) Σ_q S₁(|(ℓ₀ s₀, ℓ₁ s₁)|), S₁ the unit-length-scale density. Length scales:
    one value or one per axis.

    The alias sum is a Python loop of (2·n_alias+1)² two-dimensional terms rather than one
    4-D broadcast summed over its short trailing axes: XLA on the CPU vectorises the
    (m0//2+1, m1//2+1) planes. Measured at 128² cells (Matérn 3/2, 256² torus): gradient
    of the spectrum in ℓ, σ 2.1–2.3 ms → 0.83 ms; of the whole log density 5.7–6.5 ms →
    3.6–4.7 ms (alternating runs). bench/bench_lgcp.py part (d) prints the current figures
    (column spectrum_grad_ms)."""
    xp = jnp if isinstance(length_scales, jax.Array) or isinstance(variance, jax.Array) else np
    ls = xp.asarray(length_scales)
    ls = xp.stack([ls.reshape(()), ls.reshape(())]) if ls.size == 1 else ls
    s0, s1, rows = _alias_tables(geom, n_alias)
    a = s0.T * ls[0] ** 2  # (Q, m0//2+1)
    b = s1.T * ls[1] ** 2  # (Q, m1//2+1)
    dens = 0.0
    for i in range(a.shape[0]):
        for j in range(b.shape[0]):
            dens = dens + unit_spectral_density(geom.kernel, a[i][:, None] + b[j][None, :], xp)
    h0, h1 = geom.spacing
    return variance * ls[0] * ls[1] * dens[rows] / (h0 * h1)


@dataclass(frozen=True, eq=False)
class Spectrum:
    """The torus eigenvalues a fit uses: method "embedding" or "periodised" (module
    docstring)."""

    geom: TorusGeometry
    method: str

    def eigenvalues(self, length_scales, variance):
        """Half spectrum (m0, m1//2+1)."""
        if self.method == "embedding":
            return self.geom.eigenvalues(length_scales, variance)
        return aliased_eigenvalues(self.geom, length_scales, variance)


def wrap_error(spec: Spectrum, length_scales, images: int = 3) -> float:
    """The periodised kernel's departure from the planar one caused by the torus's period T
    (per axis m·h): max over the grid's lags τ of Σ_{j ≠ 0} k(τ + j∘T), |j_a| ≤ ``images``,
    as a fraction of σ², at ``length_scales`` (per axis) — summed in space (the periodised
    row of the module docstring without its j = 0 term). It grows with the length scales
    (every kernel here decreases with distance over ℓ), so a bisection can find the longest
    within a limit. The alias sum's truncation is a separate figure (the variance deficit
    of :func:`periodised_report`)."""
    geom = spec.geom
    n0, n1 = geom.grid_shape
    (m0, m1), (h0, h1) = geom.torus_shape, geom.spacing
    ls = np.resize(np.asarray(length_scales, float), 2)
    i0 = (h0 * np.arange(n0))[:, None]
    i1 = (h1 * np.arange(n1))[None, :]
    total = np.zeros((n0, n1))
    for j0 in range(-images, images + 1):
        for j1 in range(-images, images + 1):
            if j0 or j1:
                total += anisotropic_kernel(geom.kernel, (np.abs(i0 + j0 * m0 * h0), np.abs(i1 + j1 * m1 * h1)), 1.0, ls)
    return float(total.max())


def longest_within_wrap(spec: Spectrum, lo2, hi2, limit: float, steps: int = 16):
    """The largest length scales t·hi2 (one factor t ≤ 1 for both axes, t·hi2 ≥ lo2) whose
    :func:`wrap_error` stays within ``limit``, by bisection on log t (about 4 significant
    digits); None when even the shortest, lo2, exceed it."""
    lo2, hi2 = np.asarray(lo2, float), np.asarray(hi2, float)
    if wrap_error(spec, hi2) <= limit:
        return hi2
    lo_t, hi_t = float(np.max(lo2 / hi2)), 1.0
    if wrap_error(spec, lo_t * hi2) > limit:
        return None
    for _ in range(steps):
        mid = math.sqrt(lo_t * hi_t)
        lo_t, hi_t = (mid, hi_t) if wrap_error(spec, mid * hi2) <= limit else (lo_t, mid)
    return lo_t * hi2


def periodised_report(spec: Spectrum, lo2, hi2) -> dict:
    """Wrap error of the periodised covariance against the planar kernel on grid lags (at
    the largest length scales, :func:`wrap_error`: the torus's images, without the alias
    sum's truncation), and the variance lost by truncating the alias sum (at the shortest),
    both as fractions of σ²."""
    geom = spec.geom
    n0, n1 = geom.grid_shape
    wrap = wrap_error(spec, hi2)
    var_lo = float(np.asarray(implied_first_row(np.asarray(spec.eigenvalues(lo2, 1.0)), geom.torus_shape))[0, 0])
    return {"method": "periodised", "torus_shape": list(geom.torus_shape), "grid_shape": [n0, n1],
            "wrap_error": wrap, "wrap_error_limit": WRAP_LIMIT, "alias_terms_per_side": N_ALIAS,
            "alias_variance_deficit_at_shortest_length_scale": max(0.0, 1.0 - var_lo),
            "valid": "eigenvalues are non-negative by construction"}
