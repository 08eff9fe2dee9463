"""Fourier-mode parametrisation of the torus field, truncated to the modes that matter.

The circulant-embedded field (:mod:`sceneprior.fields.embedding`) is, on the torus, a
sum of independent Fourier modes with variances Lambda_k / N (N = m0 m1 torus cells):

    f(x) = (1/N) sum_k sqrt(Lambda_k) xi_k exp(2 pi i k.x / m),   xi Hermitian,
    xi_k = sqrt(N/2) (a_k + i b_k) for the pair {k, -k},  xi_k = sqrt(N) a_k if k = -k,

with a_k, b_k ~ N(0, 1) independent (Wood & Chan 1994, §2; the real Fourier basis of a
stationary field on the torus, e.g. Dietrich & Newsam 1997). Each real coefficient is one
real degree of freedom, N in all, and Var f(x) = (1/N) sum_k Lambda_k = sigma^2.

Truncation (item 5 of the lgcp issue). The set of retained modes is fixed for the whole
run and chosen at the SHORTEST length scales the prior allows (the widest spectrum):
keep the smallest set of modes, largest Lambda first, holding >= 1 - delta of the prior
variance there. Because S_l(s) = l0 l1 S_1(l0 s0, l1 s1) (Rasmussen & Williams 2006,
eq. 4.15 / 4.20), a longer length scale concentrates the spectrum further inside the same
low-frequency set, so the retained fraction only grows with the length scale (checked
numerically in the tests, and reported per draw by :meth:`RetainedModes.retained_fraction`).
The dropped part is a pointwise variance deficit of delta sigma^2 at most (exactly,
because the torus field is stationary: every cell loses the same variance).

Preconditioning: :meth:`RetainedModes.coefficients_to_field` is linear in the real
coefficients x; the model can sample them non-centred (x = amplitude * z, z ~ N(0, I),
:meth:`white_to_field`), centred (x ~ N(0, amplitude^2)), or partially non-centred per
mode (Papaspiliopoulos, Roberts & Sköld 2007), since the prior is diagonal in this basis.

:func:`aliased_eigenvalues` gives eigenvalues that are non-negative by construction, from
the spectral density and the Poisson summation formula, for tori too small for a valid
circulant embedding of the minimum-image row.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import jax.numpy as jnp
import numpy as np

from sceneprior.errors import InputError
from sceneprior.fields.embedding import TorusGeometry, _pair, half_multiplicity
from sceneprior.fields.kernels import _xp, spectral_density

__all__ = [
    "RetainedModes",
    "select_modes",
    "count_modes",
    "modes_for_box",
    "aliased_eigenvalues",
]


def _representatives(torus_shape):
    """Half-spectrum entries standing for the mode pairs {k, -k}.

    Returns (rep flat indices, partner flat indices (or -1 when the partner is outside
    the half spectrum), self-conjugate flags), all over the half spectrum (m0, m1//2+1).
    In columns k1 = 0 and k1 = m1/2 (even m1) the partner (-k0 mod m0, k1) lies in the
    half spectrum; there the entry with k0 <= partner is the representative.
    """
    m0, m1 = torus_shape
    h1 = m1 // 2 + 1
    k0, k1 = np.meshgrid(np.arange(m0), np.arange(h1), indexing="ij")
    edge = (k1 == 0) | ((m1 % 2 == 0) & (k1 == m1 // 2))
    p0 = (-k0) % m0
    is_rep = ~edge | (k0 <= p0)
    selfconj = edge & (k0 == p0)
    flat = k0 * h1 + k1
    partner = np.where(edge & ~selfconj, p0 * h1 + k1, -1)
    return flat[is_rep], partner[is_rep], selfconj[is_rep]


def _ranked(eig_half, torus_shape):
    """Representatives sorted by decreasing Lambda, with full-mode multiplicities."""
    lam = np.maximum(np.asarray(eig_half, dtype=float), 0.0).reshape(-1)
    rep, partner, selfconj = _representatives(torus_shape)
    mult = np.where(selfconj, 1, 2)
    order = np.lexsort((rep, -lam[rep]))  # largest first, ties by index (deterministic)
    return rep[order], partner[order], selfconj[order], mult[order], lam[rep[order]]


def _n_kept(weights, level):
    """Smallest prefix of ``weights`` (sorted) whose sum is >= level * total."""
    cum = np.cumsum(weights)
    total = cum[-1]
    if total <= 0:
        raise InputError("all eigenvalues are zero: the field has no variance")
    return int(min(np.searchsorted(cum, level * total, side="left") + 1, len(weights)))


def count_modes(eig_half, torus_shape, level: float = 0.999) -> int:
    """Number of torus Fourier modes (= real degrees of freedom) holding ``level`` of
    the variance, largest eigenvalues first (clipped at 0).

    Counts full-spectrum modes: a pair {k, -k} counts 2, a self-conjugate mode 1, so
    the count of all modes is m0 m1.
    """
    _, _, _, mult, lam = _ranked(eig_half, torus_shape)
    kept = _n_kept(mult * lam, level)
    return int(mult[:kept].sum())


@dataclass(frozen=True, eq=False)
class RetainedModes:
    """A fixed set of retained torus modes and the linear map to the grid field.

    n_params real coefficients; the scatter plans put coefficient p, times ``re_coef`` /
    ``im_coef``, into the real / imaginary part of half-spectrum entry ``re_target`` /
    ``im_target``. ``param_rep`` is the half-spectrum entry whose eigenvalue gives the
    prior variance of coefficient p. Build it with :func:`select_modes`.
    """

    grid_shape: tuple[int, int]
    torus_shape: tuple[int, int]
    delta: float
    selection_length_scales: tuple[float, float]
    retained_fraction_at_selection: float
    param_rep: np.ndarray
    re_target: np.ndarray
    re_param: np.ndarray
    re_coef: np.ndarray
    im_target: np.ndarray
    im_param: np.ndarray
    im_coef: np.ndarray
    kept_mask: np.ndarray  # (m0, m1//2+1) weight: multiplicity of kept half entries, else 0

    @property
    def n_params(self) -> int:
        return int(self.param_rep.shape[0])

    @property
    def n_torus(self) -> int:
        return self.torus_shape[0] * self.torus_shape[1]

    @property
    def dropped_variance_fraction(self) -> float:
        """Variance fraction dropped at the selection (shortest) length scales, <= delta."""
        return 1.0 - self.retained_fraction_at_selection

    def amplitudes(self, eig_half):
        """Prior sd of each retained coefficient: sqrt(max(Lambda, 0)) of its mode."""
        xp = _xp(eig_half)
        lam = xp.maximum(eig_half, 0.0).reshape(-1)
        return xp.sqrt(lam[self.param_rep])

    def coefficients_to_field(self, x):
        """Grid field (n0, n1) from the real mode coefficients x (n_params,).

        f = irfft2(xi)[:n0, :n1] with xi the Hermitian half spectrum assembled from x
        (module docstring; the real Fourier series of the torus field). Linear in x;
        jit- and grad-friendly. Cov f = sum over kept modes when x ~ N(0, amplitudes^2).
        """
        xp = _xp(x)
        size = self.torus_shape[0] * (self.torus_shape[1] // 2 + 1)
        if xp is np:
            re = np.zeros(size)
            im = np.zeros(size)
            np.add.at(re, self.re_target, self.re_coef * x[self.re_param])
            np.add.at(im, self.im_target, self.im_coef * x[self.im_param])
        else:
            re = jnp.zeros(size, dtype=x.dtype).at[self.re_target].add(
                self.re_coef * x[self.re_param])
            im = jnp.zeros(size, dtype=x.dtype).at[self.im_target].add(
                self.im_coef * x[self.im_param])
        xi = (re + 1j * im).reshape(self.torus_shape[0], self.torus_shape[1] // 2 + 1)
        f = xp.fft.irfft2(xi, s=self.torus_shape)
        n0, n1 = self.grid_shape
        return f[:n0, :n1]

    def white_to_field(self, z, eig_half):
        """Non-centred map: white noise z ~ N(0, I_{n_params}) -> grid field (n0, n1)."""
        return self.coefficients_to_field(self.amplitudes(eig_half) * z)

    def retained_fraction(self, eig_half):
        """Fraction of the torus variance held by the kept modes at these eigenvalues.

        sum_kept Lambda / sum_all Lambda (Parseval); jit-friendly, so a model can record
        it per draw. The pointwise variance of the truncated field is this fraction of
        the full field's (1/N) sum Lambda.
        """
        xp = _xp(eig_half)
        lam = xp.maximum(eig_half, 0.0)
        mult = half_multiplicity(self.torus_shape)
        return xp.sum(self.kept_mask * lam) / xp.sum(mult * lam)

    def report(self) -> dict:
        return {
            "n_modes": self.n_params,
            "n_torus_modes": self.n_torus,
            "delta": self.delta,
            "selection_length_scales": list(self.selection_length_scales),
            "dropped_variance_fraction_at_selection": self.dropped_variance_fraction,
        }


def select_modes(geom: TorusGeometry, min_length_scales, delta: float = 1e-3,
                 eigenvalues=None) -> RetainedModes:
    """Retain the fewest modes holding >= 1 - delta of the variance at the shortest
    length scales the prior allows.

    Ranking by Lambda at ``min_length_scales`` (variance 1; the ranking does not depend
    on the variance). ``eigenvalues`` is a function (length_scales, variance) -> half
    spectrum, default ``geom.eigenvalues`` (circulant embedding); pass
    ``lambda l, v: aliased_eigenvalues(geom, l, v)`` for the spectral-density version.
    delta = 0 keeps every mode (the full embedding, N real coefficients). Runs once, in
    NumPy float64, at plan time.
    """
    if not (0.0 <= delta < 1.0):
        raise InputError(f"dropped variance fraction delta must be in [0, 1), got {delta!r}")
    ls = np.atleast_1d(np.asarray(min_length_scales, dtype=float))
    ls = np.repeat(ls, 2) if ls.shape == (1,) else ls
    if ls.shape != (2,) or np.any(ls <= 0):
        raise InputError(f"smallest length scale must be positive, got {min_length_scales!r}")
    eig_fn = geom.eigenvalues if eigenvalues is None else eigenvalues
    lam_half = np.asarray(eig_fn(ls, 1.0), dtype=float)
    shape = geom.torus_shape
    rep, partner, selfconj, mult, lam = _ranked(lam_half, shape)
    weights = mult * lam
    kept = len(rep) if delta == 0.0 else _n_kept(weights, 1.0 - delta)
    retained = float(np.sum(weights[:kept]) / np.sum(weights))
    rep, partner, selfconj, mult = rep[:kept], partner[:kept], selfconj[:kept], mult[:kept]

    n = geom.n_torus
    # parameter layout: for each kept representative, one (self-conjugate) or two reals
    first = np.concatenate([[0], np.cumsum(mult)[:-1]])
    p_re = first                       # real-part coefficient of each representative
    pair = ~selfconj
    p_im = first[pair] + 1             # imaginary-part coefficient of the pairs
    param_rep = np.empty(int(mult.sum()), dtype=np.int64)
    param_rep[p_re] = rep
    param_rep[p_im] = rep[pair]

    s_half = math.sqrt(n / 2.0)
    s_self = math.sqrt(float(n))
    re_coef_rep = np.where(selfconj, s_self, s_half)
    # the representative itself
    re_target = [rep]
    re_param = [p_re]
    re_coef = [re_coef_rep]
    im_target = [rep[pair]]
    im_param = [p_im]
    im_coef = [np.full(pair.sum(), s_half)]
    # the conjugate partner when it lies in the half spectrum (columns 0 and m1/2)
    has_partner = partner >= 0
    re_target.append(partner[has_partner])
    re_param.append(p_re[has_partner])
    re_coef.append(np.full(has_partner.sum(), s_half))
    hp_pair = has_partner[pair]
    im_target.append(partner[pair][hp_pair])
    im_param.append(p_im[hp_pair])
    im_coef.append(np.full(hp_pair.sum(), -s_half))

    kept_mask = np.zeros(lam_half.size)
    kept_mask[rep] = np.where(partner >= 0, 1.0, mult)
    kept_mask[partner[has_partner]] = 1.0
    return RetainedModes(
        grid_shape=geom.grid_shape,
        torus_shape=shape,
        delta=float(delta),
        selection_length_scales=(float(ls[0]), float(ls[1])),
        retained_fraction_at_selection=retained,
        param_rep=param_rep,
        re_target=np.concatenate(re_target).astype(np.int64),
        re_param=np.concatenate(re_param).astype(np.int64),
        re_coef=np.concatenate(re_coef),
        im_target=np.concatenate(im_target).astype(np.int64),
        im_param=np.concatenate(im_param).astype(np.int64),
        im_coef=np.concatenate(im_coef),
        kept_mask=kept_mask.reshape(lam_half.shape),
    )


def aliased_eigenvalues(geom: TorusGeometry, length_scales, variance, n_alias: int = 2):
    """Torus eigenvalues of the periodised kernel from the spectral density.

    Poisson summation on the lattice h Z^2 (Stein & Weiss 1971, ch. VII; from memory): the DFT
    of the periodised row c_per[i] = sum_j k(i h + j T) (T_a = m_a h_a) is

        Lambda_k = 1/(h0 h1) sum_{q in Z^2} S((k_a + q_a m_a) / T_a)

    with S the spectral density (Rasmussen & Williams 2006, eq. 4.15 / 4.20; here
    :func:`sceneprior.fields.kernels.spectral_density`). The alias sum is truncated to
    |q_a| <= n_alias. Every term is >= 0, so the embedding is valid on any torus; the
    price is the covariance of the periodised kernel (wrap error k(T - lag) instead of
    the minimum-image row's) and the alias truncation, which lowers the variance to
    (1/N) sum Lambda (compute it to report the deficit; it is largest for Matérn 1/2,
    whose spectrum decays like s^-3). Half spectrum (m0, m1//2+1); jit/grad-friendly.
    """
    xp = _xp(length_scales, variance)
    ls = _pair(length_scales, xp)
    (m0, m1), (h0, h1) = geom.torus_shape, geom.spacing
    t0, t1 = m0 * h0, m1 * h1
    k0 = np.fft.fftfreq(m0, d=1.0 / m0)            # signed integer frequencies
    k1 = np.arange(m1 // 2 + 1, dtype=float)
    q = np.arange(-n_alias, n_alias + 1, dtype=float)
    s0 = ((k0[:, None] + q[None, :] * m0) / t0)     # (m0, Q)
    s1 = ((k1[:, None] + q[None, :] * m1) / t1)     # (h1, Q)
    dens = spectral_density(
        geom.kernel,
        (xp.asarray(s0)[:, None, :, None], xp.asarray(s1)[None, :, None, :]),
        variance, ls)
    return dens.sum(axis=(2, 3)) / (h0 * h1)


def modes_for_box(kernel: str, cells: int, length_scale: float, pad_factor: float = 2.0,
                  level: float = 0.999, eigen: str = "embedding") -> dict:
    """Mode count for the set-up quoted in the lgcp issue: square box of side L = 1 with
    cells x cells cells, torus side round(pad_factor * cells), length scale in units of L.

    Returns n_modes (holding ``level`` of the variance), n_torus, their ratio and the
    min eigenvalue ratio of the embedding (negative values are clipped before counting).
    ``eigen`` = "embedding" (FFT of the minimum-image row) or "aliased".
    """
    h = 1.0 / cells
    m = int(round(pad_factor * cells))
    geom = TorusGeometry(kernel, (cells, cells), (h, h), (m, m))
    ls = np.array([length_scale, length_scale])
    if eigen == "embedding":
        lam = geom.eigenvalues(ls, 1.0)
    elif eigen == "aliased":
        lam = aliased_eigenvalues(geom, ls, 1.0)
    else:
        raise InputError(f"unknown eigenvalue source {eigen!r}: use embedding or aliased")
    lam = np.asarray(lam)
    n_modes = count_modes(lam, geom.torus_shape, level)
    return {
        "kernel": kernel,
        "cells": cells,
        "length_scale": length_scale,
        "torus": m,
        "n_modes": n_modes,
        "n_torus": m * m,
        "fraction": n_modes / (m * m),
        "min_eigenvalue_ratio": float(lam.min() / lam.max()),
    }
