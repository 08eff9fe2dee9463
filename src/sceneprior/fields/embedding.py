"""Circulant embedding of a stationary Gaussian field on a padded 2-D torus.

Method: Wood & Chan (1994), "Simulation of stationary Gaussian processes in [0,1]^d",
J. Comput. Graph. Statist. 3, 409-432; Dietrich & Newsam (1997), "Fast and exact
simulation of stationary Gaussian processes through circulant embedding of the
covariance matrix", SIAM J. Sci. Comput. 18, 1088-1107.

The n0 x n1 grid of cell centres (spacing h0, h1 in the units of the two grid axes) is
placed in the corner of an m0 x m1 torus (m_a >= n_a). The torus covariance is
block-circulant with first row

    c[k0, k1] = k(d0(k0), d1(k1)),   d_a(k) = h_a * min(k, m_a - k)   (minimum image)

and its eigenvalues are the 2-D DFT of that row (a block-circulant matrix with
circulant blocks is diagonalised by the 2-D Fourier matrix; Davis 1979, "Circulant
matrices"), here taken with the real FFT:

    Lambda = Re rfft2(c)          shape (m0, m1 // 2 + 1), the half spectrum.

Normalisation (NumPy / jax.numpy conventions: rfft2 unnormalised, irfft2 carries 1/N,
N = m0 m1). With w ~ N(0, I_N) real white noise on the torus,

    f = irfft2( sqrt(Lambda) * rfft2(w) )        (= Re IFFT(sqrt(Lambda) FFT(w)))

has covariance C = F^-1 diag(Lambda) F (F the unnormalised DFT), because
F^-1 diag(sqrt Lambda) F is the symmetric square root of C; so f has exactly the torus
covariance c (Var f = c[0, 0] = sigma^2). The field on the grid is f[:n0, :n1].

The covariance between two grid cells is the kernel at their minimum-image lag, which
equals the true (planar) kernel only for lags below m_a h_a / 2. The padding makes the
wrapped part small: :func:`plan_torus` sizes the torus once, for the largest length
scale the prior allows, and reports the largest wrap error over grid lags. Eigenvalues
below -1e-10 * max mean the padding is too small (InputError); tiny negatives are
round-off and are clipped to 0, which adds (1/N) sum max(-Lambda, 0) to the pointwise
variance; that amount is reported as ``clipped_variance_fraction``.

Precision: plan-time checks run in NumPy float64. The traced functions
(:meth:`TorusGeometry.first_row`, :meth:`TorusGeometry.eigenvalues`, :func:`sample_field`)
follow the input dtype; use float64 (jax_enable_x64) for the eigenvalues of smooth
kernels, whose small eigenvalues are lost in float32 round-off (~1e-7 * max).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
import scipy.fft

from sceneprior.errors import InputError
from sceneprior.fields.kernels import _xp, anisotropic_kernel, get_kernel

__all__ = [
    "EIGENVALUE_TOLERANCE",
    "DEFAULT_PADDING",
    "TorusGeometry",
    "EmbeddingReport",
    "half_multiplicity",
    "plan_torus",
    "torus_shape_for",
    "validate_embedding",
    "eigenvalue_check",
    "sample_field",
    "implied_first_row",
    "grid_covariance",
]

#: Relative tolerance: eigenvalues below -EIGENVALUE_TOLERANCE * max(Lambda) are an error.
EIGENVALUE_TOLERANCE = 1e-10

#: Starting padding per kernel, in multiples of the largest length scale (per axis):
#: the kernel at the padding distance is about 1e-3 sigma^2 or less (wrap error).
#: Validity (no eigenvalue below -1e-10 max) usually needs more once the largest
#: length scale exceeds about a tenth of the grid side; plan_torus grows it then.
DEFAULT_PADDING = {
    "matern12": 7.0,
    "matern32": 6.0,
    "matern52": 6.0,
    "squared_exponential": 6.0,
}

#: Largest torus (cells) that plan_torus accepts by default (2^24 cells: 128 MB per
#: float64 array, several of which are alive during one gradient evaluation).
MAX_TORUS_CELLS = 2**24


def _pair(length_scales, xp):
    """Length scales as a length-2 array (a scalar means isotropic)."""
    ls = xp.asarray(length_scales)
    if ls.ndim == 0:
        return xp.stack([ls, ls])
    if ls.shape != (2,):
        raise InputError(
            f"length scales must be one value or one per axis (2), got shape {ls.shape}"
        )
    return ls


def half_multiplicity(torus_shape) -> np.ndarray:
    """Number of full-spectrum modes each rfft2 half-spectrum entry stands for.

    Column k1 of the half spectrum stands for k1 and m1 - k1 (2 modes), except k1 = 0
    and, for even m1, k1 = m1/2, which are their own mirror (1 mode). Summing
    multiplicity * Lambda over the half spectrum equals the full-spectrum sum
    N * c[0, 0] (Parseval).
    """
    m0, m1 = torus_shape
    h1 = m1 // 2 + 1
    mult = np.full((m0, h1), 2.0)
    mult[:, 0] = 1.0
    if m1 % 2 == 0:
        mult[:, -1] = 1.0
    return mult


@dataclass(frozen=True)
class TorusGeometry:
    """Static geometry of a circulant embedding (hashable: usable as a jit static).

    kernel: one of :data:`sceneprior.fields.kernels.KERNEL_NAMES`.
    grid_shape: (n0, n1) cells of the grid (C order, axis 0 = x or range).
    spacing: (h0, h1) cell spacing in the unit of each axis.
    torus_shape: (m0, m1), m_a >= n_a.
    """

    kernel: str
    grid_shape: tuple[int, int]
    spacing: tuple[float, float]
    torus_shape: tuple[int, int]

    def __post_init__(self):
        get_kernel(self.kernel)
        object.__setattr__(self, "grid_shape", tuple(int(n) for n in self.grid_shape))
        object.__setattr__(self, "spacing", tuple(float(h) for h in self.spacing))
        object.__setattr__(self, "torus_shape", tuple(int(m) for m in self.torus_shape))
        if len(self.grid_shape) != 2 or len(self.torus_shape) != 2 or len(self.spacing) != 2:
            raise InputError("the field grid must be two-dimensional")
        if min(self.grid_shape) < 1 or any(
            m < n for m, n in zip(self.torus_shape, self.grid_shape)
        ):
            raise InputError(
                f"torus {self.torus_shape} smaller than the grid {self.grid_shape}: "
                "use a torus at least as large as the grid on each axis"
            )
        if not all(math.isfinite(h) and h > 0 for h in self.spacing):
            raise InputError(f"cell spacing must be positive and finite, got {self.spacing}")

    @property
    def n_torus(self) -> int:
        return self.torus_shape[0] * self.torus_shape[1]

    @property
    def half_shape(self) -> tuple[int, int]:
        return (self.torus_shape[0], self.torus_shape[1] // 2 + 1)

    def lags(self, xp=np):
        """Minimum-image lags (d0 of shape (m0, 1), d1 of shape (1, m1)), axis units."""
        (m0, m1), (h0, h1) = self.torus_shape, self.spacing
        k0 = xp.arange(m0, dtype=float)
        k1 = xp.arange(m1, dtype=float)
        d0 = h0 * xp.minimum(k0, m0 - k0)
        d1 = h1 * xp.minimum(k1, m1 - k1)
        return d0[:, None], d1[None, :]

    def first_row(self, length_scales, variance):
        """First row c of the torus covariance, shape (m0, m1), from wrapped lags.

        c[k] = k_kernel(scaled minimum-image distance) (Wood & Chan 1994, §2, the
        "minimal embedding" row built with minimum-image distances; Rasmussen &
        Williams 2006, eq. 4.9 / 4.14 for the kernel). Traceable in jax.
        """
        xp = _xp(length_scales, variance)
        ls = _pair(length_scales, xp)
        return anisotropic_kernel(self.kernel, self.lags(xp), variance, ls)

    def eigenvalues(self, length_scales, variance):
        """Eigenvalues Lambda = Re rfft2(c) of the torus covariance (half spectrum).

        Wood & Chan (1994), §2: the eigenvalues of a (block-)circulant matrix are the
        DFT of its first row. Returned unclipped, shape
        (m0, m1 // 2 + 1); jit- and grad-friendly in ``length_scales`` (scalar or one
        per axis) and ``variance`` with this geometry static.
        """
        xp = _xp(length_scales, variance)
        return xp.fft.rfft2(self.first_row(length_scales, variance)).real


def sample_field(geom: TorusGeometry, eigenvalues, w):
    """Gaussian field on the grid from torus white noise by circulant embedding.

    f = irfft2(sqrt(max(Lambda, 0)) * rfft2(w))[:n0, :n1], w of shape (m0, m1) with
    w ~ N(0, I) gives Cov f = the torus covariance (Wood & Chan 1994, §2.2; Dietrich &
    Newsam 1997, §2). Normalisation as in the module docstring. Traceable.
    """
    xp = _xp(eigenvalues, w)
    amp = xp.sqrt(xp.maximum(eigenvalues, 0.0))
    f = xp.fft.irfft2(amp * xp.fft.rfft2(w), s=geom.torus_shape)
    n0, n1 = geom.grid_shape
    return f[:n0, :n1]


def implied_first_row(eigenvalues, torus_shape):
    """First row of the covariance implied by (clipped) eigenvalues: irfft2(max(Λ, 0)).

    Inverse of Wood & Chan (1994) eq. (2.3); equals the kernel row exactly when no
    eigenvalue was clipped.
    """
    xp = _xp(eigenvalues)
    return xp.fft.irfft2(xp.maximum(eigenvalues, 0.0), s=tuple(torus_shape))


def grid_covariance(row, grid_shape) -> np.ndarray:
    """Dense (n0 n1) x (n0 n1) covariance of the grid cells from a torus first row.

    C[i, j] = row[(i0 - j0) mod m0, (i1 - j1) mod m1], cells flat in C order. For small
    grids (tests, dense baselines) only.
    """
    row = np.asarray(row)
    n0, n1 = grid_shape
    m0, m1 = row.shape
    i0, i1 = np.divmod(np.arange(n0 * n1), n1)
    return row[(i0[:, None] - i0[None, :]) % m0, (i1[:, None] - i1[None, :]) % m1]


def eigenvalue_check(eigenvalues, torus_shape, variance=1.0):
    """(min Λ / max Λ, clipped variance fraction) of a half spectrum, in float64.

    The clipped variance fraction is (1/N) sum_modes max(-Λ, 0) / sigma^2: clipping
    negative eigenvalues to 0 raises the pointwise variance of the sampled field by this
    fraction of sigma^2 (it is the negative part dropped from the spectrum).
    """
    lam = np.asarray(eigenvalues, dtype=float)
    mult = half_multiplicity(torus_shape)
    n = torus_shape[0] * torus_shape[1]
    top = float(lam.max())
    ratio = float(lam.min()) / top
    clipped = float(np.sum(mult * np.maximum(-lam, 0.0))) / n / float(variance)
    return ratio, clipped


@dataclass(frozen=True)
class EmbeddingReport:
    """Diagnostics of a planned circulant embedding (all fractions relative to sigma^2).

    min_eigenvalue_ratio: smallest min(Λ)/max(Λ) over the checked length scales.
    clipped_variance_fraction: largest variance change from clipping (see
        :func:`eigenvalue_check`) over the checked length scales.
    wrap_error: max over grid lags of |k(minimum-image lag) - k(lag)| / sigma^2 at the
        largest length scales: how far the torus field's covariance on the grid is from
        the planar kernel.
    worst_length_scales: the checked length scales giving min_eigenvalue_ratio.
    """

    kernel: str
    grid_shape: tuple[int, int]
    spacing: tuple[float, float]
    torus_shape: tuple[int, int]
    padding: float | None
    max_length_scales: tuple[float, float]
    min_length_scales: tuple[float, float]
    n_checked: int
    min_eigenvalue_ratio: float
    clipped_variance_fraction: float
    wrap_error: float
    worst_length_scales: tuple[float, float]

    def as_dict(self) -> dict:
        return asdict(self)


def _fmt(values) -> str:
    return "(" + ", ".join(f"{float(v):.4g}" for v in values) + ")"


def _pair_np(x, what):
    a = np.atleast_1d(np.asarray(x, dtype=float))
    if a.shape == (1,):
        a = np.repeat(a, 2)
    if a.shape != (2,) or not np.all(np.isfinite(a)) or np.any(a <= 0):
        raise InputError(f"{what} must be one positive value or one per axis, got {x!r}")
    return a


def _wrap_error(geom: TorusGeometry, ls) -> float:
    """max over grid lags |k(min-image lag) - k(lag)| (variance 1)."""
    (n0, n1), (m0, m1), (h0, h1) = geom.grid_shape, geom.torus_shape, geom.spacing
    k0 = np.arange(n0, dtype=float)
    k1 = np.arange(n1, dtype=float)
    true = anisotropic_kernel(geom.kernel, ((h0 * k0)[:, None], (h1 * k1)[None, :]), 1.0, ls)
    wrapped = anisotropic_kernel(
        geom.kernel,
        ((h0 * np.minimum(k0, m0 - k0))[:, None], (h1 * np.minimum(k1, m1 - k1))[None, :]),
        1.0,
        ls,
    )
    return float(np.max(np.abs(wrapped - true)))


def _checked_length_scales(max_ls, min_ls, n_per_axis=4):
    """Product of geometric ladders from min to max on each axis (the corners included)."""
    axes = [np.geomspace(lo, hi, n_per_axis) if hi > lo else np.array([hi])
            for lo, hi in zip(min_ls, max_ls)]
    return [np.array([a, b]) for a in axes[0] for b in axes[1]]


def _worst(geom, candidates):
    worst_ratio, worst_clip, worst_ls = np.inf, 0.0, candidates[0]
    for ls in candidates:
        ratio, clipped = eigenvalue_check(geom.eigenvalues(ls, 1.0), geom.torus_shape)
        if ratio < worst_ratio:
            worst_ratio, worst_ls = ratio, ls
        worst_clip = max(worst_clip, clipped)
    return worst_ratio, worst_clip, worst_ls


def validate_embedding(geom: TorusGeometry, max_length_scales, min_length_scales=None,
                       padding=None, tolerance: float = EIGENVALUE_TOLERANCE
                       ) -> EmbeddingReport:
    """Check a torus for every length scale the prior allows; InputError if invalid.

    Evaluates the eigenvalues (float64) on a 4 x 4 geometric ladder of length scales
    between the smallest and the largest per axis (Dietrich & Newsam 1997: the
    embedding fails first for long length scales, so the largest matters most) and
    raises InputError when min(Λ) < -tolerance max(Λ) anywhere (default 1e-10, DESIGN
    §3). Returns the diagnostics.
    """
    max_ls = _pair_np(max_length_scales, "largest length scale")
    min_ls = max_ls if min_length_scales is None else _pair_np(
        min_length_scales, "smallest length scale")
    if np.any(min_ls > max_ls):
        raise InputError(
            f"smallest length scale {_fmt(min_ls)} exceeds the largest {_fmt(max_ls)}")
    candidates = _checked_length_scales(max_ls, min_ls)
    ratio, clipped, worst_ls = _worst(geom, candidates)
    if ratio < -tolerance:
        hint = _suggest_padding(geom, max_ls, padding, tolerance)
        raise InputError(
            f"circulant embedding invalid for kernel {geom.kernel} on torus "
            f"{geom.torus_shape[0]}x{geom.torus_shape[1]} at length scales "
            f"({worst_ls[0]:.4g}, {worst_ls[1]:.4g}): min eigenvalue {ratio:.2e} x max "
            f"< -{tolerance:g}, the padding is too small; {hint}"
        )
    return EmbeddingReport(
        kernel=geom.kernel,
        grid_shape=geom.grid_shape,
        spacing=geom.spacing,
        torus_shape=geom.torus_shape,
        padding=None if padding is None else float(padding),
        max_length_scales=tuple(float(x) for x in max_ls),
        min_length_scales=tuple(float(x) for x in min_ls),
        n_checked=len(candidates),
        min_eigenvalue_ratio=ratio,
        clipped_variance_fraction=clipped,
        wrap_error=_wrap_error(geom, max_ls),
        worst_length_scales=tuple(float(x) for x in worst_ls),
    )


def torus_shape_for(grid_shape, spacing, max_length_scales, padding, min_factor=1.0):
    """Torus shape: m_a = next_fast_len(max(ceil(min_factor n_a), n_a + ceil(p l_a / h_a))).

    ``padding`` p in multiples of the largest length scale of axis a; next_fast_len
    (scipy.fft, real transforms) rounds up to a 2-3-5-smooth size. No validity check.
    """
    shape = []
    for n, h, ls in zip(grid_shape, _pair_np(spacing, "cell spacing"),
                        _pair_np(max_length_scales, "largest length scale")):
        need = max(int(math.ceil(min_factor * n)), n + int(math.ceil(padding * ls / h)))
        shape.append(int(scipy.fft.next_fast_len(need, real=True)))
    return tuple(shape)


def _suggest_padding(geom, max_ls, padding, tolerance):
    """Smallest padding multiple (from a ladder) whose torus is valid at max_ls."""
    base = DEFAULT_PADDING[geom.kernel] if padding is None else max(float(padding), 1.0)
    found = _search_padding(geom.kernel, geom.grid_shape, geom.spacing, max_ls, base,
                            1.0, tolerance, MAX_TORUS_CELLS)
    if found is not None:
        p, shape = found
        return (f"use padding >= {p:.3g} length scales (torus {shape[0]}x{shape[1]}) "
                "or lower the largest length scale the prior allows")
    return ("no padding up to the torus size limit works: "
            "use a smaller largest length scale in the prior")


def _search_padding(kernel, grid_shape, spacing, max_ls, start, min_factor, tolerance,
                    max_cells):
    """Grow the padding by 10 % steps from ``start`` until the embedding is valid at
    the largest length scales; (padding, shape) or None past ``max_cells``."""
    p = float(start)
    last = None
    while True:
        shape = torus_shape_for(grid_shape, spacing, max_ls, p, min_factor)
        if shape[0] * shape[1] > max_cells:
            return None
        if shape != last:
            trial = TorusGeometry(kernel, grid_shape, spacing, shape)
            ratio, _ = eigenvalue_check(trial.eigenvalues(np.asarray(max_ls), 1.0), shape)
            if ratio >= -tolerance:
                return p, shape
            last = shape
        p = p * 1.1 + 0.1


def plan_torus(kernel: str, grid_shape, spacing, max_length_scales, min_length_scales=None,
               padding: float | None = None, min_factor: float = 1.0,
               tolerance: float = EIGENVALUE_TOLERANCE,
               max_torus_cells: int = MAX_TORUS_CELLS):
    """Choose the torus once for the largest length scale the prior allows, and check it.

    Torus side per axis a (Wood & Chan 1994; Møller, Syversveen & Waagepetersen 1998
    also simulate the LGCP on an extended torus), see :func:`torus_shape_for`:

        m_a = next_fast_len( max(ceil(min_factor n_a), n_a + ceil(padding l_a,max / h_a)) )

    ``padding`` is in multiples of the largest length scale. Given explicitly, the torus
    is checked and InputError raised (with a padding that would work) when
    min(Λ) < -tolerance max(Λ) anywhere in [min, max] length scale. ``padding=None``
    starts from :data:`DEFAULT_PADDING` (wrap error about 1e-3 sigma^2) and grows it by
    10 % steps until the embedding is valid at the largest length scales, then checks
    the whole range. ``min_factor = 2`` forces at least the 2x-padded torus, on which the
    minimum-image covariance is the planar kernel for every grid lag.
    Returns (TorusGeometry, EmbeddingReport); InputError also when the torus would
    exceed ``max_torus_cells``.
    """
    get_kernel(kernel)
    grid_shape = tuple(int(n) for n in grid_shape)
    if len(grid_shape) != 2 or min(grid_shape) < 1:
        raise InputError(f"the field grid must have two positive dimensions, got {grid_shape}")
    h = tuple(_pair_np(spacing, "cell spacing"))
    max_ls = _pair_np(max_length_scales, "largest length scale")
    if padding is None:
        found = _search_padding(kernel, grid_shape, h, max_ls, DEFAULT_PADDING[kernel],
                                float(min_factor), tolerance, max_torus_cells)
        if found is None:
            raise InputError(
                f"no valid circulant embedding for kernel {kernel} on grid "
                f"{grid_shape[0]}x{grid_shape[1]} at largest length scales {_fmt(max_ls)} "
                f"within {max_torus_cells} torus cells: use a smaller largest length scale "
                "in the prior or a coarser grid"
            )
        pad = found[0]
    else:
        pad = float(padding)
        if not (math.isfinite(pad) and pad >= 0):
            raise InputError(
                f"padding must be a non-negative number of length scales, got {padding!r}")
    shape = torus_shape_for(grid_shape, h, max_ls, pad, float(min_factor))
    if shape[0] * shape[1] > max_torus_cells:
        raise InputError(
            f"torus {shape[0]}x{shape[1]} for grid {grid_shape[0]}x{grid_shape[1]} exceeds "
            f"{max_torus_cells} cells: use a coarser grid or a smaller largest length scale "
            f"(padding {pad:g} x {_fmt(max_ls)})"
        )
    geom = TorusGeometry(kernel, grid_shape, h, shape)
    report = validate_embedding(geom, max_ls, min_length_scales, padding=pad,
                                tolerance=tolerance)
    return geom, report
