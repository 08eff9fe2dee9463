"""Spectral truncation of the torus field: only the Fourier modes that carry the prior's variance.

A stationary field on the m0 × m1 torus is a sum over its Fourier modes k with independent
coefficients of variance Λ_k (the torus eigenvalues; Wood & Chan 1994). For a kernel whose
spectral density falls off fast (squared exponential, Matérn 5/2 and 3/2 at long length
scales) most of the N = m0·m1 modes carry almost none of the variance, yet each costs the
sampler one latent dimension. This module keeps a FIXED set of modes, chosen once per fit:

    kept = {k : Λ_k(ℓ_min) ≥ c},  c the largest level at which Σ_kept Λ_k ≥ q · Σ_all Λ_k,

at the shortest length scales the prior allows (ℓ_min per axis) and a target fraction q of
the prior variance (``variance_kept``). The spectral density S(|D s|), D = diag(ℓ), is a
decreasing function of |D s| for every kernel here, so in the continuum the kept set (an
ellipse {|D_min s| ≤ r}) would carry at least the fraction q at every ℓ ≥ ℓ_min. On the
finite lattice with the periodised spectrum that holds only approximately (a review found
0.9003 at ℓ_min against 0.8707 at a longer, anisotropic ℓ for Matérn 1/2 on a small
torus), so the report gives the kept fraction at ℓ_min and its minimum over a grid of
length scales spanning the prior's range (5 per axis). The zero mode, whose level the
integrated-out baseline absorbs, counts in these fractions. The set never changes within
a run, so the model is a fixed, finite-dimensional Gaussian field — its prior is exact for
the truncated field, and the dropped variance is the price, stated in the run's summary.

Eigenvalues: the periodised spectrum (``spectral.aliased_eigenvalues``, non-negative by
construction) evaluated at the kept modes only — no torus-sized FFT of a covariance row.

Coefficients. The field is real, so the half spectrum's modes are either their own mirror
(k1 = 0 or m1/2 and k0 = 0 or −m0/2: one real coefficient) or come in conjugate pairs
(one representative, two real coefficients). White noise on the torus has rfft2
coefficients of variance N per mode (N/2 for each of the real and imaginary part of a
paired mode), so with v ~ N(0, I) on the representatives

    Y_k = √(N/2) (v_re + i v_im)  (paired),   Y_k = √N v  (self-mirrored),

and f = irfft2(√Λ · Y) is a draw of the truncated field. The grid's n0 × n1 cells are all
that the likelihood needs, so the inverse transform is two small dense products instead of
an m0 × m1 FFT: with the kept rows k0 ∈ K0 and columns k1 ∈ K1,

    f[i, j] = (1/N) Re( Σ_{k0, k1} e^{2πi k0 i/m0} Y[k0, k1] c_{k1} e^{2πi k1 j/m1} ),

c_{k1} = 1 for k1 = 0 and m1/2, 2 otherwise (the inverse real FFT's weights; numpy.fft
documentation, irfft). Cost per evaluation: n0·|K0|·|K1| + n0·n1·|K1| complex products.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

from sceneprior.fields.embedding import TorusGeometry, half_multiplicity
from sceneprior.fields.kernels import anisotropic_kernel, unit_spectral_density
from sceneprior.fields.spectral import N_ALIAS, aliased_eigenvalues

__all__ = ["ModeBasis", "mode_basis"]

#: wraps per axis in the periodised kernel's value at lag 0 (ModeBasis.point_variance): the
#: truncated field's torus is at least twice the grid, so the next wraps, 3 torus sides away,
#: are ≥ 6 grid extents off — ≥ 24 length scales at the default longest length scale (a
#: quarter of the extent), ≥ 6 as long as a spec keeps ℓ_max within the grid's extent
WRAPS = 2


@dataclass(frozen=True, eq=False)
class ModeBasis:
    """The kept modes of a truncated torus field and the arrays that map coefficients to the grid.

    geom: the torus; rep_k0, rep_k1 (n_rep,) signed row / column frequency of each
    representative mode;
    coef_rep (n_latent,) the representative of each real coefficient; scatter arrays: the
    box position, source coefficient and weight of every real and imaginary entry of the
    (|K0|, |K1|) coefficient box; A (n0, |K0|) and B (n1, |K1|) complex exponentials (B with
    the weights c_k1); report: kept modes and variance fractions.
    """

    geom: TorusGeometry
    rep_k0: np.ndarray
    rep_k1: np.ndarray
    coef_rep: np.ndarray
    box_shape: tuple[int, int]
    re_pos: np.ndarray
    re_src: np.ndarray
    re_w: np.ndarray
    im_pos: np.ndarray
    im_src: np.ndarray
    im_w: np.ndarray
    A: np.ndarray
    B: np.ndarray
    report: dict
    keep: np.ndarray  # (m0, m1//2+1) bool: the kept modes of the half spectrum

    @property
    def n_latent(self) -> int:
        return int(self.coef_rep.size)

    @property
    def nonzero(self) -> np.ndarray:
        """(n_rep,) 1.0 for every representative but the zero mode (whose level the
        integrated-out baseline absorbs: no data scaling there), 0.0 for it."""
        return ((self.rep_k0 != 0) | (self.rep_k1 != 0)).astype(float)

    def eigenvalues(self, length_scales, variance):
        """Λ at the representatives (n_rep,): the periodised spectrum (``spectral`` module),
        evaluated only there; jit/grad-friendly in ℓ (one or two values) and the variance."""
        xp = jnp if not isinstance(length_scales, np.ndarray) else np
        ls = xp.broadcast_to(xp.asarray(length_scales), (2,))
        (m0, m1), (h0, h1) = self.geom.torus_shape, self.geom.spacing
        q = np.arange(-N_ALIAS, N_ALIAS + 1, dtype=float)
        s0 = ((self.rep_k0[None, :] + q[:, None] * m0) / (m0 * h0)) ** 2  # (Q, n_rep)
        s1 = ((self.rep_k1[None, :] + q[:, None] * m1) / (m1 * h1)) ** 2
        dens = 0.0
        for i in range(q.size):
            for j in range(q.size):
                dens = dens + unit_spectral_density(self.geom.kernel, ls[0] ** 2 * s0[i] + ls[1] ** 2 * s1[j], xp)
        return variance * ls[0] * ls[1] * dens / (h0 * h1)

    def dropped_variance(self, length_scales, variance) -> float:
        """Prior variance per cell of the modes the truncation leaves out, at length scales
        ``length_scales`` (one or two values) and field variance ``variance``: (1/N) Σ over
        the dropped torus modes of Λ_k (a stationary torus field's variance at a point is
        (1/N) Σ_k Λ_k over all N modes; each half-spectrum entry counted with its mirror,
        ``half_multiplicity``). Numpy; for reports, not for the sampler."""
        lam = np.maximum(np.asarray(aliased_eigenvalues(self.geom, np.resize(np.asarray(length_scales, float), 2),
                                                        float(variance)), float), 0.0)
        mult = half_multiplicity(self.geom.torus_shape)
        return float(np.sum((mult * lam)[~self.keep]) / self.geom.n_torus)

    def point_variance(self, variance, length_scales):
        """The torus field's variance at a point: its covariance, the periodised kernel, at lag
        0 — Σ_j k(j₀·m₀h₀, j₁·m₁h₁) over the wraps j ∈ {−WRAPS … WRAPS}² (the kernel at its own
        lag 0 is σ² = ``variance``; Rasmussen & Williams 2006, eq. 4.9 and 4.14), ℓ per axis.
        Summed from the kernel, not the model's aliased eigenvalues (``spectral.N_ALIAS``), so
        for a rough kernel it is a little more than their mean (Matérn 1/2, 128², ℓ 50 m:
        the eigenvalues give 0.985 σ²). jax or numpy."""
        (m0, m1), (h0, h1) = self.geom.torus_shape, self.geom.spacing
        j = np.arange(-WRAPS, WRAPS + 1, dtype=float)
        lags = (np.repeat(j, j.size) * m0 * h0, np.tile(j, j.size) * m1 * h1)
        ls = length_scales if isinstance(length_scales, np.ndarray) else jnp.asarray(length_scales)
        xp = np if isinstance(ls, np.ndarray) else jnp
        return xp.sum(anisotropic_kernel(self.geom.kernel, lags, variance, ls))

    def residual_variance(self, lam, variance, length_scales):
        """The variance per cell that the kept modes miss: max(c₀ − (1/N) Σ_kept Λ_k, 0), c₀ the
        field's variance at a point (:meth:`point_variance`) at σ² = ``variance`` and ℓ
        (two values), Λ (n_rep,) the eigenvalues at the representatives at the same σ², ℓ
        (:meth:`eigenvalues`). Each real coefficient counts its representative once, so a
        conjugate pair (two coefficients) counts the mode and its mirror. The variance of the
        ideal torus field, so it also restores what the eigenvalues' finite aliasing
        (``spectral.N_ALIAS``) leaves out — a little more than :meth:`dropped_variance` for a
        rough kernel. jax or numpy; the per-cell term's variance (``lgcp`` model option
        dropped_modes)."""
        xp = np if isinstance(lam, np.ndarray) else jnp
        return xp.maximum(self.point_variance(variance, length_scales) - xp.sum(lam[self.coef_rep]) / self.geom.n_torus,
                          0.0)

    def arrays(self) -> dict:
        """Device arrays for the field map (model inputs)."""
        out = {k: jnp.asarray(getattr(self, k)) for k in
               ("coef_rep", "re_pos", "re_src", "re_w", "im_pos", "im_src", "im_w")}
        out.update(A_re=jnp.asarray(self.A.real), A_im=jnp.asarray(self.A.imag),
                   B_cat=jnp.asarray(np.concatenate([self.B.real, -self.B.imag], axis=1)))
        return out


def field_from_coefficients(v, amp, arr: dict, box_shape, grid_shape):
    """Grid field (n0·n1,) from the real coefficients v (n_latent,) and the amplitude per
    representative ``amp`` (n_rep,) (√Λ for a draw of the field): the module docstring's
    two dense products. Pure jax; jit/grad-friendly."""
    n_box = box_shape[0] * box_shape[1]
    x = v * amp[arr["coef_rep"]]
    re = jnp.zeros(n_box, x.dtype).at[arr["re_pos"]].add(x[arr["re_src"]] * arr["re_w"])
    im = jnp.zeros(n_box, x.dtype).at[arr["im_pos"]].add(x[arr["im_src"]] * arr["im_w"])
    re, im = re.reshape(box_shape), im.reshape(box_shape)
    # P = A Y, f = Re(P Bᵀ) = [Re P, Im P] [Re B, −Im B]ᵀ — real products only (measured at
    # 256² cells: 0.31 ms against 0.76 ms for the complex product, one core)
    p_re = arr["A_re"] @ re - arr["A_im"] @ im
    p_im = arr["A_re"] @ im + arr["A_im"] @ re
    f = jnp.concatenate([p_re, p_im], axis=1) @ arr["B_cat"].T
    return f.reshape(-1)


def _kept_mask(geom: TorusGeometry, lo2, variance_kept: float):
    lam = np.maximum(np.asarray(aliased_eigenvalues(geom, np.asarray(lo2, float), 1.0), float), 0.0)
    mult = half_multiplicity(geom.torus_shape)
    total = float(np.sum(mult * lam))
    if variance_kept >= 1.0:
        return np.ones(lam.shape, bool), lam, mult, total
    order = np.argsort(-lam, axis=None, kind="stable")
    cum = np.cumsum((mult * lam).reshape(-1)[order])
    n = int(np.searchsorted(cum, variance_kept * total)) + 1
    cut = lam.reshape(-1)[order[min(n, order.size) - 1]]
    keep = lam >= cut  # ties (mirror pairs, symmetric frequencies) kept together
    keep[0, 0] = True
    return keep, lam, mult, total


def mode_basis(geom: TorusGeometry, lo2, hi2, variance_kept: float) -> ModeBasis:
    """Choose the kept modes at the shortest length scales ``lo2`` (per axis) for a kept
    variance fraction ``variance_kept`` (module docstring) and build the coefficient maps."""
    if not 0.0 < variance_kept <= 1.0:
        raise ValueError(f"variance_kept must be in (0, 1], got {variance_kept}")
    (m0, m1), (n0, n1) = geom.torus_shape, geom.grid_shape
    N = m0 * m1
    keep, lam_lo, mult, total_lo = _kept_mask(geom, lo2, variance_kept)
    k0_all = np.rint(np.fft.fftfreq(m0, 1.0 / m0)).astype(np.int64)  # signed row frequencies
    nyq1 = m1 % 2 == 0
    rows, cols = np.nonzero(keep)
    k0s, k1s = k0_all[rows], cols.astype(np.int64)
    mirror_col = (k1s == 0) | (nyq1 & (k1s == m1 // 2))
    self_row = (k0s == 0) | ((m0 % 2 == 0) & (k0s == -(m0 // 2)))
    selfm = mirror_col & self_row
    rep = ~mirror_col | selfm | (mirror_col & (k0s > 0))
    rk0, rk1, rself = k0s[rep], k1s[rep], selfm[rep]
    # the coefficient box: every kept row frequency (mirrors included) × kept columns
    box_k0 = np.unique(k0s)
    box_k1 = np.unique(k1s)
    r_of = {int(k): i for i, k in enumerate(box_k0)}
    c_of = {int(k): i for i, k in enumerate(box_k1)}
    n_c = box_k1.size
    coef_rep, re_pos, re_src, re_w, im_pos, im_src, im_w = [], [], [], [], [], [], []
    j = 0
    for r, (a, b, s) in enumerate(zip(rk0, rk1, rself)):
        pos = r_of[int(a)] * n_c + c_of[int(b)]
        if s:
            coef_rep.append(r)
            re_pos.append(pos), re_src.append(j), re_w.append(np.sqrt(N))
            j += 1
            continue
        coef_rep += [r, r]
        w = np.sqrt(N / 2.0)
        re_pos.append(pos), re_src.append(j), re_w.append(w)
        im_pos.append(pos), im_src.append(j + 1), im_w.append(w)
        if b == 0 or (nyq1 and b == m1 // 2):  # the mirror (−k0, k1) in the same column: conjugate
            mk = -int(a) if -int(a) in r_of else int(a)  # −m0/2 is its own mirror row (handled as self above)
            mpos = r_of[mk] * n_c + c_of[int(b)]
            re_pos.append(mpos), re_src.append(j), re_w.append(w)
            im_pos.append(mpos), im_src.append(j + 1), im_w.append(-w)
        j += 2
    i0 = np.arange(n0)[:, None]
    i1 = np.arange(n1)[:, None]
    A = np.exp(2j * np.pi * i0 * box_k0[None, :] / m0) / N
    c = np.where((box_k1 == 0) | (nyq1 & (box_k1 == m1 // 2)), 1.0, 2.0)
    B = c[None, :] * np.exp(2j * np.pi * i1 * box_k1[None, :] / m1)
    kept_lo = float(np.sum((mult * lam_lo)[keep]) / total_lo)

    def kept_at(ls):
        lam = np.maximum(np.asarray(aliased_eigenvalues(geom, np.asarray(ls, float), 1.0), float), 0.0)
        return float(np.sum((mult * lam)[keep]) / np.sum(mult * lam))

    lo2, hi2 = np.asarray(lo2, float), np.asarray(hi2, float)
    axes = [np.geomspace(a, b, 5) for a, b in zip(lo2, hi2)]
    grid_ls = ([np.array([a, a * lo2[1] / lo2[0]]) for a in axes[0]] if np.allclose(lo2[0], lo2[1])
               and np.allclose(hi2[0], hi2[1]) else [np.array([a, b]) for a in axes[0] for b in axes[1]])
    kept_min = min([kept_lo] + [kept_at(ls) for ls in grid_ls])
    kept_hi = kept_at(hi2)
    report = {
        "variance_kept_target": float(variance_kept),
        "modes_kept": int(np.sum(mult[keep])), "torus_modes": int(N),
        "latent_coefficients": int(j),
        "variance_fraction_kept_at_shortest_length_scale": kept_lo,
        "variance_fraction_kept_at_longest_length_scale": kept_hi,
        "variance_fraction_kept_min_over_prior_length_scales": kept_min,
        "share_of_torus_modes_kept": float(np.sum(mult[keep]) / N),
        "box": [int(box_k0.size), int(n_c)],
        "rule": "modes with the largest prior variance at the shortest length scales, fixed for the run; "
                "the minimum is over 5 length scales per axis spanning the prior's range (zero mode included)",
    }
    return ModeBasis(geom, rk0.astype(float), rk1.astype(float), np.asarray(coef_rep, np.int64),
                     (int(box_k0.size), int(n_c)), np.asarray(re_pos, np.int64), np.asarray(re_src, np.int64),
                     np.asarray(re_w, float), np.asarray(im_pos, np.int64), np.asarray(im_src, np.int64),
                     np.asarray(im_w, float), A, B, report, keep)


def predicted_coverage(v, s2) -> dict:
    """Pooled coverage of central intervals at 50 % and 90 % when each cell's error has
    variance s² + v but the interval is sized for s²: mean over cells of 2Φ(z_p/√(1 + v/s²))
    − 1, z_p = Φ⁻¹((1 + p)/2) (scipy.stats.norm)."""
    from scipy.stats import norm

    ratio = float(v) / np.maximum(np.asarray(s2, float).reshape(-1), 1e-300)
    return {f"{int(100 * p)}": float(np.mean(2.0 * norm.cdf(norm.ppf(0.5 + p / 2) / np.sqrt(1.0 + ratio)) - 1.0))
            for p in (0.5, 0.9)}


def cell_term_screen(basis: ModeBasis, sigma: float, length_scale, w_cell: float) -> dict:
    """Before sampling: would the dropped modes narrow the intervals at pilot hyperparameters
    σ, ℓ and ``w_cell`` detections per exposed cell? The kept field's posterior variance per
    cell is approximated as if every cell carried w_cell detections, mode by mode
    (s² = (1/N) Σ_kept Λ_k/(1 + w_cell Λ_k), the Poisson curvature w per cell; the zero mode
    left out, its level being the baseline's), the dropped variance is
    :meth:`ModeBasis.residual_variance`, and the coverage follows :func:`predicted_coverage`.
    ``needed`` when the predicted 90 % coverage is below COVERAGE_WARNING. A rough rule for a
    set-up choice: it sees neither the padding nor uneven exposure."""
    ls2 = np.resize(np.asarray(length_scale, float), 2)
    lam = np.maximum(np.asarray(basis.eigenvalues(ls2, float(sigma) ** 2), float), 0.0)
    lam_c, nz = lam[basis.coef_rep], basis.nonzero[basis.coef_rep]
    s2 = float(np.sum(nz * lam_c / (1.0 + w_cell * lam_c)) / basis.geom.n_torus)
    v = float(basis.residual_variance(lam, float(sigma) ** 2, ls2))
    cover = predicted_coverage(v, [s2])
    return {"pilot_sigma": float(sigma), "pilot_length_scale": [float(x) for x in np.atleast_1d(length_scale)],
            "detections_per_exposed_cell": float(w_cell), "dropped_variance_per_cell": v,
            "approximate_posterior_variance_per_cell": s2, "predicted_coverage_without_term": cover,
            "needed": bool(cover["90"] < COVERAGE_WARNING)}


#: a truncated fit warns when the predicted coverage of its 90 % intervals for the true
#: cell log intensity (``dropped_mode_check``) falls below this
COVERAGE_WARNING = 0.85


def dropped_mode_check(basis: ModeBasis, sigma, length_scale, posterior_variance, max_points: int = 40) -> dict:
    """What the modes a truncation leaves out may cost the intervals, given the posterior.

    Under the prior the field is kept part + dropped part, independent. A truncated fit
    infers the kept part only; if the true field carries the dropped part — as rough at small
    scales as the kernel implies — a cell's posterior mean misses it, and its error has
    variance up to s_c² + v: s_c² the cell's posterior variance of the log intensity, v the
    dropped modes' prior variance per cell (:meth:`ModeBasis.dropped_variance`, averaged over
    up to ``max_points`` posterior draws of σ and ℓ). If the truth is Gaussian about the mean
    with that variance, a central interval of nominal level p covers it with probability
    2Φ(z_p / √(1 + v/s_c²)) − 1, z_p the standard normal quantile of (1 + p)/2. The estimate
    errs low, a screening value: on the grid the kept modes absorb part of the dropped field,
    the more so the closer their number comes to the number of cells (Matérn 3/2, ≈ 300
    detections per cell, truth from the full torus, 90 % intervals, measured against
    predicted in scratch runs: 16², q 0.8, 185 coefficients for 256 cells, 0.33 against 0.02;
    8², q 0.8, 141 for 64, 0.81 against 0.12; the bench's 128², q 0.98, 4 797 for 16 384, 0.71
    against 0.68), and a field smoother than the kernel loses less. With weak data s_c² ≫ v
    and nothing is lost.

    sigma (draws,), length_scale (draws,) or (draws, 2), posterior_variance (cells,): s_c² of
    the cells that carry data. Returns the mean dropped variance, the cells' median posterior
    variance, their ratio, the predicted pooled coverage at 50 % and 90 % and ``warning``
    (predicted 90 % coverage below COVERAGE_WARNING)."""
    sigma = np.asarray(sigma, float).reshape(-1)
    ls = np.asarray(length_scale, float).reshape(sigma.size, -1)
    pick = np.unique(np.linspace(0, sigma.size - 1, min(max_points, sigma.size)).round().astype(int))
    v = float(np.mean([basis.dropped_variance(ls[i], sigma[i] ** 2) for i in pick]))
    s2 = np.asarray(posterior_variance, float).reshape(-1)
    cover = predicted_coverage(v, s2)
    return {"dropped_variance_per_cell": v, "median_posterior_variance": float(np.median(s2)),
            "ratio_median": float(v / max(np.median(s2), 1e-300)),
            "predicted_coverage_of_true_log_intensity": cover,
            "warning": bool(cover["90"] < COVERAGE_WARNING),
            "rule": "if the true field is as rough as the kernel at the posterior σ, ℓ: interval error variance "
                    "up to s² + v per cell, v the dropped modes' prior variance; coverage 2Φ(z/√(1 + v/s²)) − 1 "
                    "pooled over the cells with data (errs low: the kept modes absorb part of the dropped field)"}


#: largest number of coefficients for which the pilot map is built (H is K × K float64: the
#: set-up took 12–14 s at K = 4 797 on this machine, numpy's eigh of H alone 7.5–8.8 s).
MAP_MAX_COEFFICIENTS = 6000
#: precision eigenvalues inside [1/band, band] are left alone by the low-rank preconditioner
LOW_RANK_BAND = 1.5
#: the map acts on the fewest coefficients that carry this share of the correction (each
#: coefficient's weight: its squared components in the eigenvectors outside the band, times
#: |log e| of their eigenvalue); the others are left alone (y_j = z_j)
ROW_SHARE = 0.9
#: directions whose precision eigenvalue lies beyond [1/FAR_BAND, FAR_BAND] are corrected
#: as far as MAP_ENTRIES allows; those between the two bands only within NEAR_ENTRIES
FAR_BAND = 4.0
NEAR_ENTRIES = 250_000
#: most entries of the map's matrix (rank × rows for the low-rank form, rows² for the dense
#: one): applying the map reads its matrix twice per log-density and twice per gradient, so
#: its cost is memory traffic. Measured with bench/bench_lgcp.py --one 128 matern32 weak
#: --variance-kept 0.98 (4 797 coefficients, LOW_RANK_BAND and the cap set by hand): the
#: full band-1.5 map (rank 891) made a 1 × (200 + 200) run slower than no map (129.8 s
#: against 50.4 s); rank 169 (band 8, float64) took 31 steps per draw instead of 127,
#: 4 × (1000 + 1000) in 280.9 s against 346.0 s without a map; rank 208 on every row
#: (float32) 199.9 s. Restricting the rows (2026-12-03, 4 × (1000 + 1000), one run each,
#: rows / rank / wall / min cell ESS): every row 4 797 / 208 / 191.8 s / 3970; share 0.99
#: with 250 000 entries 1 637 / 152 / 145.0 s / 3409; 0.95: 1 003 / 249 / 132.0 s / 4299;
#: 0.9: 726 / 344 / 126.9 s / 4577; 0.8: 535 / 467 / 130.0 s / 3851; 0.9 with 500 000:
#: 726 / 676 / 143.1 s / 3383; ranks under ~150 cost leapfrog steps (0.99 with 125 000:
#: rank 76, 44 steps per draw, 175.6 s). Strong data (--one 128 matern32 strong, 1 × (300 +
#: 300)) needs the rank: 0.9 with 250 000 entries for every direction (rank 70) took 868
#: steps per draw against 262 on every row — hence FAR_BAND: there this rule keeps rank 282
#: on 3 536 rows (255 steps per draw; since DENSE_MAP_ENTRIES that case takes the dense map).
MAP_ENTRIES = 1_000_000
#: most entries of the dense H^{-1/2} on every coefficient, the map used instead of the
#: low-rank form when the directions beyond FAR_BAND outnumber MAP_ENTRIES // rows — as with
#: strong data, where the torus padding (three quarters of the torus, no data) leaves most
#: coefficients' posterior scale far from 1. Measured on the 128² Matérn 3/2 strong bench
#: data (q 0.98, 4 797 coefficients; at the pilot the precision eigenvalues span 2·10⁻⁵ … 34,
#: 2 417 of them beyond FAR_BAND on the 3 536 rows of the low-rank form, which keeps rank
#: 282). Scratch script driving the production kernel, 1 × (300 + 300), seed 1: with the
#: low-rank map and σ, ℓ held at their true values, 255 leapfrog steps per draw at step size
#: 0.021 — as many as in the full fit, so the hyperparameters' coupling is not the cause; the
#: dense map, σ and ℓ sampled, 31 at 0.17 (min cell ESS 148; about 10 ms per leapfrog step
#: against 1.6 ms); the dense form on those 3 536 rows only: 31 steps but min cell ESS
#: 32.7. Full length, ``bench/bench_lgcp.py --one 128 matern32 strong --variance-kept
#: 0.98``, 4 × (1000 + 1000): 1 499.4 s, 31 steps, min cell ESS 5 568, 3.71 ESS/s, 2.82 GB,
#: against 1 150.3 s, 255 steps, 2 932, 2.55 ESS/s, 1.62 GB with the low-rank map (the
#: previous session): 1.46× the ESS per second, 1.3× the wall time (the product reads 92 MB
#: per use). Two chain processes of two vectorised chains instead (forced by hand):
#: 1 518.9 s, 4.85 GB — no gain. The weak-data bench cases and the 256² squared exponential
#: keep the low-rank or row-restricted form (fewer far directions than the cap).
DENSE_MAP_ENTRIES = MAP_MAX_COEFFICIENTS**2
#: the map is applied in float32 (half the memory traffic): the coordinates are rounded to
#: float32 before the product, so the log density carries float32 rounding (2–8 × 10⁻⁵ nats
#: in tests/test_truncation.py's strong-data case, against the float64 map)
MAP_DTYPE = np.float32


def _beyond(e, band: float):
    """Eigenvalues outside [1/band, band] (farther than a factor ``band`` from 1)."""
    return (e < 1.0 / band) | (e > band)


@partial(jax.jit, static_argnames=("box", "grid", "batch"))
def _data_precision(amp, w, arr: dict, eye, box, grid, batch: int):
    """Gᵀ (W − w wᵀ/Σw) G (n_latent × n_latent), G the map from coefficients to the grid
    field at amplitudes ``amp``: built column by column with G's transpose
    (jax.linear_transpose), ``batch`` columns at a time, ``eye`` the identity (n_latent ×
    n_latent; an argument, so the compiler cannot fold up to 6 000² entries into a
    constant). Module-level and jitted with the data as arguments, so one compiled program
    serves every data set of the same shapes."""
    K = arr["coef_rep"].shape[0]
    total = jnp.maximum(jnp.sum(w), 1e-300)

    def fwd(y):
        return field_from_coefficients(y, amp, arr, box, grid)

    fwd_t = jax.linear_transpose(fwd, jnp.zeros(K))

    def column(e):
        f = fwd(e)
        return fwd_t(w * f - w * (jnp.dot(w, f) / total))[0]

    return jax.lax.map(column, eye, batch_size=batch)


def dense_preconditioner(basis: ModeBasis, amp, d, weights, band: float | None = None, batch: int = 64):
    """Fixed symmetric map L = H^{-1/2} with y = L z, so that the coefficients y are
    ≈ N(0, H⁻¹) when z ~ N(0, I) at the pilot hyperparameters.

    H = diag(1/d_j) + Gᵀ (W − w wᵀ/Σw) G is the precision of y under the Gaussian
    approximation at the pilot: the prior y_j ~ N(0, d_j) plus the Poisson curvature of the
    likelihood (weights w_c ≈ N_c + ½ per grid cell, the level direction removed because
    the baseline is integrated out), G the linear map y → f at the pilot amplitudes
    ``amp``. It is the exact form of the two corrections the full-torus sampler makes
    approximately (``preconditioning`` steps 1–2): the window covers a quarter of the torus,
    so Fourier modes are coupled by the data, and the field's mean over the window is a
    direction no diagonal mass matrix sees. Gᵀ W G is built column by column with the
    transpose of G (jax.linear_transpose), in batches. H = V diag(e) Vᵀ (the y coordinates
    are scaled so that uniform data give H = I). The correction of the eigenvalues outside
    [1/band, band] lands mostly on a few coefficients (low frequencies), so the map acts on
    the rows J that carry ROW_SHARE of it and leaves the others alone: on J it is the
    symmetric square root of y's marginal covariance at the pilot, (H⁻¹)_JJ = U diag(c) Uᵀ
    (J = every row: H^{-1/2} itself). Of its eigenvalues outside the band the r farthest
    from 1 are corrected — all beyond FAR_BAND as far as r·|J| ≤ MAP_ENTRIES, the rest within
    NEAR_ENTRIES: L_J = I + U_r diag(c_r^{1/2} − 1) U_rᵀ, within a factor √band of the dense
    square root in scale wherever r reaches every eigenvalue outside the band; the dense
    square root when those are half the rows or more and |J|² ≤ MAP_ENTRIES. Stored in
    MAP_DTYPE. When the directions beyond FAR_BAND outnumber MAP_ENTRIES // |J| (strong
    data) and K² ≤ DENSE_MAP_ENTRIES, the map is instead the dense H^{-1/2} on every
    coefficient (report ``reason``). A constant, invertible linear map (block-diagonal: L_J
    on J, the identity elsewhere; log-Jacobian ½ Σ log c_r): the posterior is unchanged,
    only the sampler's geometry. Returns (arrays for the model: ``map_rows`` when J is not
    every row, and ``dense`` or ``low_rank_vectors``/``low_rank_scale``; report)."""
    band = LOW_RANK_BAND if band is None else band
    arr = basis.arrays()
    K = basis.n_latent
    M = _data_precision(jnp.asarray(amp), jnp.asarray(weights, float), arr, jnp.eye(K), basis.box_shape,
                        basis.geom.grid_shape, batch)
    dj = np.asarray(d)[np.asarray(arr["coef_rep"])]
    H = 0.5 * (np.asarray(M) + np.asarray(M).T) + np.diag(1.0 / dj)
    ev, V = np.linalg.eigh(H)
    outside_all = _beyond(ev, band)
    outside = int(np.sum(outside_all))
    report = {"outside_band": outside, "coefficients": K, "band": band, "far_band": FAR_BAND,
              "max_entries": MAP_ENTRIES, "near_entries": NEAR_ENTRIES, "dtype": np.dtype(MAP_DTYPE).name,
              "precision_eigenvalues_min_max": [float(ev.min()), float(ev.max())]}
    if outside == 0:
        report.update(form="identity", rank=0, rows=0)
        return {}, report
    # the coefficients the correction lands on: each row's share of the outside-band
    # directions, weighted by how far their eigenvalue is from 1; the fewest rows that carry
    # ROW_SHARE of it
    weight = np.einsum("ij,j,ij->i", V, np.where(outside_all, np.abs(np.log(ev)), 0.0), V)  # no K × K temporary
    order = np.argsort(-weight, kind="stable")
    n_rows = int(np.searchsorted(np.cumsum(weight[order]) / np.sum(weight), ROW_SHARE)) + 1
    rows = np.arange(K) if ROW_SHARE >= 1.0 else np.sort(order[:min(n_rows, K)])  # 1: every row, zero weights too
    # on those rows: the symmetric square root of y's marginal covariance (H⁻¹)_JJ at the
    # pilot (all rows: H^{-1/2} itself); elsewhere y = z
    if rows.size == K:
        c, U = 1.0 / ev, V
    else:  # eigenvalues first: the dense switch below needs no eigenvectors of this matrix
        cov_j = (V[rows] / ev) @ V[rows].T
        c, U = np.maximum(np.linalg.eigvalsh(cov_j), 1e-300), None
    J = rows.size
    out_j = int(np.sum(_beyond(c, band)))
    # the directions farthest from 1 first: every one beyond FAR_BAND as far as MAP_ENTRIES
    # allows, the rest of those outside the band within NEAR_ENTRIES
    beyond = int(np.sum(_beyond(c, FAR_BAND)))
    report["beyond_far_band"] = beyond
    if beyond > MAP_ENTRIES // J and K * K <= DENSE_MAP_ENTRIES:
        # more far directions than the low-rank form may correct (strong data): H^{-1/2} itself
        report.update(form="dense", rank=K, rows=K, row_share=1.0,
                      reason=f"{beyond} directions beyond the far band, more than MAP_ENTRIES allows on {J} rows")
        return {"dense": ((V / np.sqrt(ev)) @ V.T).astype(MAP_DTYPE)}, report
    if U is None:  # the low-rank form: eigenvectors now, and the counts from the same eigenvalues
        c, U = np.linalg.eigh(cov_j)
        c = np.maximum(c, 1e-300)
        out_j, beyond = int(np.sum(_beyond(c, band))), int(np.sum(_beyond(c, FAR_BAND)))
        report["beyond_far_band"] = beyond
    r = min(out_j, max(NEAR_ENTRIES // J, min(beyond, MAP_ENTRIES // J)))
    far = np.argsort(-np.abs(np.log(c)), kind="stable")[:r]
    report.update(rank=r, rows=J, row_share=ROW_SHARE)
    arrays = {} if J == K else {"map_rows": rows.astype(np.int64)}
    if r == 0:
        report["form"] = "identity"
        return {}, report
    if r == out_j and 2 * r >= J and J * J <= MAP_ENTRIES:
        report["form"] = "dense"
        return {**arrays, "dense": ((U * np.sqrt(c)) @ U.T).astype(MAP_DTYPE)}, report
    # y_J = z_J + U_r (√c_r − 1) U_rᵀ z_J: cost 2·J·r per product
    report["form"] = "low rank"
    return {**arrays, "low_rank_vectors": U[:, far].astype(MAP_DTYPE),
            "low_rank_scale": (np.sqrt(c[far]) - 1.0).astype(MAP_DTYPE)}, report
