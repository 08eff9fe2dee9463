"""In-region probability mass of 2-D Gaussian components, P_j(R) = ∫_R N(x; m_j, P_j) dx.

The expected count per step of a Gaussian-mixture intensity inside a region R is
Σ_j w_j·P_j(R) (DESIGN.md §3); P_j(R) < 1 near edges and masks. Three ways to get it:

1. Axis-aligned box, diagonal covariance — exact: P = Π_d [Φ(b_d) − Φ(a_d)] with
   a_d, b_d the standardised box edges (product of normal CDF differences; independence of
   the coordinates). ``box_mass_diag`` (jax, differentiable) and ``box_mass_diag_np``.
2. Axis-aligned box, correlated covariance — one-dimensional integral of a conditional
   normal probability (sequential conditioning, Genz 1992, "Numerical computation of
   multivariate normal probabilities", J. Comput. Graph. Stat. 1:141–149; cited from
   memory):
       P = ∫_a^b φ(z) [Φ((d − ρz)/√(1−ρ²)) − Φ((c − ρz)/√(1−ρ²))] dz
   in standardised coordinates (z = (x − m_x)/s_x, [c, d] the standardised y-edges).
   [a, b] is cut to [−9, 9] (drops ≤ 2Φ(−9) ≈ 2.3e-19) and the entire integrand is
   integrated by Gauss–Legendre in z: the nodes always span the component in x, so narrow
   components are resolved; only the inner step of width √(1−ρ²)/|ρ| needs nodes (order
   64 stays below 1e-11 up to |ρ| = 0.999 in the tests). ``box_mass_corr`` (jax, fixed
   order) and ``box_mass`` (numpy, doubles the order until the error estimate meets
   ``tol``).
3. Any window (masks, polar sectors) — 2-D quadrature Σ_k ω_k N(x_k; m, P) on nodes and
   weights from ``Region.quadrature(order)`` (geometry.py; polar nodes are (range m,
   bearing deg) and are converted with x = r sin θ, y = r cos θ). ``quadrature_mass``
   (jax) and ``window_mass`` (numpy, with an error estimate).

Stated error (numerical paths). The estimate returned with a mass computed at order 2n is
|Q_2n − Q_n|, the change from doubling the Gauss–Legendre order. For integrands analytic
on the integration rectangle the Gauss–Legendre error decays geometrically in the order
(Davis & Rabinowitz, Methods of Numerical Integration, 2nd ed., ch. 2; cited from
memory), so |Q_2n − Q_n|
≈ |Q_n − Q| is an upper bound on the error of Q_2n once the rule resolves the integrand.
It is an estimate, not a proof; it fails when neither rule sees the integrand at all (a
component much narrower than the node spacing). ``window_mass`` therefore also checks
resolution a priori: a component whose smallest standard deviation is below the largest
nearest-neighbour node spacing of the order-n rule, and whose ±8 sd box meets the nodes'
bounding box, gets error = inf until the order resolves it. Errors are absolute (mass is
in [0, 1]).

All inputs are Cartesian metres; means (K, 2), covariances (K, 2, 2) in m², boxes
((x0, x1), (y0, y1)). float64 throughout (masses of edge components are differences of
numbers near 1).
"""

from __future__ import annotations

import warnings
from typing import Callable, NamedTuple

import jax

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402
from jax.scipy.special import ndtr  # noqa: E402
from scipy import special as _sps  # noqa: E402
from scipy.spatial import cKDTree  # noqa: E402

__all__ = [
    "MassEstimate",
    "box_mass",
    "box_mass_corr",
    "box_mass_corr_np",
    "box_mass_diag",
    "box_mass_diag_np",
    "chol2",
    "fixed_rule_error",
    "gauss_legendre01",
    "log_normal_pdf_chol",
    "nodes_to_xy",
    "quadrature_mass",
    "quadrature_mass_np",
    "window_mass",
]

# The conditional rule integrates over z ∈ [a, b] ∩ [−Z_CUT, Z_CUT]; the cut drops at most
# Φ(−9) ≈ 1.13e-19 of mass on each side (far below the quadrature error).
Z_CUT = 9.0


class MassEstimate(NamedTuple):
    """In-region masses P_j(R) (K,) and their absolute error estimates (K,)."""

    mass: np.ndarray
    error: np.ndarray


# --------------------------------------------------------------------------- helpers


def _box_arrays(box):
    """box (..., 2, 2) = ((x0, x1), (y0, y1)) -> lo, hi of shape (..., 1, 2), ready to
    broadcast against means (K, 2). Zero-width boxes are allowed (mass 0)."""
    b = np.asarray(box, dtype=np.float64)
    if b.shape[-2:] != (2, 2) or not np.all(b[..., 1] >= b[..., 0]):
        raise ValueError("box must be ((x0, x1), (y0, y1)) with x0 ≤ x1 and y0 ≤ y1")
    return b[..., None, :, 0], b[..., None, :, 1]


def ndtr_diff(lo, hi):
    """Φ(hi) − Φ(lo) (jax), accurate in both tails: evaluated as Φ(−lo) − Φ(−hi) when the
    interval lies mostly above 0, so no difference of two numbers near 1 is formed."""
    flip = (lo + hi) > 0
    return jnp.where(flip, ndtr(-lo) - ndtr(-hi), ndtr(hi) - ndtr(lo))


def _ndtr_diff_np(lo, hi):
    flip = (lo + hi) > 0
    return np.where(flip, _sps.ndtr(-lo) - _sps.ndtr(-hi), _sps.ndtr(hi) - _sps.ndtr(lo))


def chol2(covs):
    """Lower Cholesky factors of 2×2 covariances (..., 2, 2), closed form (jax or numpy in,
    jax out): l00 = √c00, l10 = c01/l00, l11 = √(c11 − l10²)."""
    covs = jnp.asarray(covs)
    l00 = jnp.sqrt(covs[..., 0, 0])
    l10 = covs[..., 1, 0] / l00
    l11 = jnp.sqrt(covs[..., 1, 1] - l10**2)
    z = jnp.zeros_like(l00)
    return jnp.stack([jnp.stack([l00, z], -1), jnp.stack([l10, l11], -1)], -2)


def _sd_rho(covs, xp):
    sx = xp.sqrt(covs[..., 0, 0])
    sy = xp.sqrt(covs[..., 1, 1])
    return sx, sy, covs[..., 0, 1] / (sx * sy)


def gauss_legendre01(order: int):
    """Gauss–Legendre nodes and weights on [0, 1] (numpy.polynomial.legendre.leggauss,
    mapped affinely); exact for polynomials of degree ≤ 2·order − 1."""
    t, w = np.polynomial.legendre.leggauss(int(order))
    return 0.5 * (t + 1.0), 0.5 * w


def log_normal_pdf_chol(xy, means, chol):
    """log N(x_i; m_j, L_j L_jᵀ) for points (n, 2) and components (K, 2), (K, 2, 2) lower
    Cholesky factors -> (n, K). Closed-form 2-D triangular solve (jax)."""
    xy = jnp.asarray(xy)
    d = xy[:, None, :] - means[None, :, :]  # (n, K, 2)
    l00, l10, l11 = chol[:, 0, 0], chol[:, 1, 0], chol[:, 1, 1]
    z0 = d[..., 0] / l00
    z1 = (d[..., 1] - l10 * z0) / l11
    return -0.5 * (z0**2 + z1**2) - jnp.log(2.0 * jnp.pi) - jnp.log(l00) - jnp.log(l11)


def nodes_to_xy(c0, c1, frame: str = "cartesian"):
    """Quadrature nodes in native coordinates -> Cartesian (M, 2). Polar: c0 = range [m],
    c1 = bearing [deg] clockwise from north, x = r sin θ, y = r cos θ (θ in radians here)."""
    c0 = np.asarray(c0, dtype=np.float64).ravel()
    c1 = np.asarray(c1, dtype=np.float64).ravel()
    if frame == "cartesian":
        return np.stack([c0, c1], axis=-1)
    if frame == "polar":
        th = np.deg2rad(c1)
        return np.stack([c0 * np.sin(th), c0 * np.cos(th)], axis=-1)
    raise ValueError(f"frame must be 'cartesian' or 'polar', not {frame!r}")


# ------------------------------------------------------------ 1. exact, diagonal, box


def box_mass_diag(means, sds, box):
    """Exact P_j(box) for diagonal covariances (jax, differentiable).

    means (K, 2) [m], sds (K, 2) standard deviations [m], box ((x0, x1), (y0, y1)) [m]
    or a stack of boxes (..., 2, 2) -> (K,) or (..., K).
    P = Π_d [Φ((hi_d − m_d)/s_d) − Φ((lo_d − m_d)/s_d)].
    """
    lo, hi = _box_arrays(box)
    means = jnp.asarray(means)
    sds = jnp.asarray(sds)
    p = ndtr_diff((lo - means) / sds, (hi - means) / sds)
    return jnp.prod(p, axis=-1)


def box_mass_diag_np(means, sds, box):
    """Numpy twin of :func:`box_mass_diag` (exact up to rounding, ≈1e-16)."""
    lo, hi = _box_arrays(box)
    means = np.asarray(means, dtype=np.float64)
    sds = np.asarray(sds, dtype=np.float64)
    return np.prod(_ndtr_diff_np((lo - means) / sds, (hi - means) / sds), axis=-1)


# ----------------------------------------------------- 2. correlated, box, 1-D rule


def _conditional_parts(means, sx, sy, rho, lo, hi, t, xp):
    """Nodes z (K, n) on [a, b] ∩ [−Z_CUT, Z_CUT], their weights (K, n), and the
    standardised y-limits c, d and ρ broadcast to (K, 1)."""
    a = xp.clip((lo[..., 0] - means[..., 0]) / sx, -Z_CUT, Z_CUT)
    b = xp.clip((hi[..., 0] - means[..., 0]) / sx, -Z_CUT, Z_CUT)
    c = ((lo[..., 1] - means[..., 1]) / sy)[..., None]
    d = ((hi[..., 1] - means[..., 1]) / sy)[..., None]
    z = a[..., None] + (b - a)[..., None] * t
    return z, (b - a)[..., None], c, d, rho[..., None]


def box_mass_corr(means, covs, box, order: int = 64):
    """P_j(box) for general 2×2 covariances by the conditional 1-D rule (jax, fixed
    Gauss–Legendre order, differentiable; see module docstring, method 2).

    means (K, 2), covs (K, 2, 2), box ((x0, x1), (y0, y1)) or (..., 2, 2) -> (K,) or
    (..., K). Check the error with
    :func:`box_mass` (order vs 2·order) or :func:`box_mass_corr_np` at two orders.
    """
    lo, hi = _box_arrays(box)
    t, wt = gauss_legendre01(order)
    means = jnp.asarray(means)
    sx, sy, rho = _sd_rho(jnp.asarray(covs), jnp)
    z, span, c, d, rho = _conditional_parts(means, sx, sy, rho, lo, hi, t, jnp)
    r = jnp.sqrt(1.0 - rho**2)
    g = ndtr_diff((c - rho * z) / r, (d - rho * z) / r)
    phi = jnp.exp(-0.5 * z**2) / jnp.sqrt(2.0 * jnp.pi)
    return jnp.sum(span * wt * phi * g, axis=-1)


def box_mass_corr_np(means, covs, box, order: int = 64):
    """Numpy twin of :func:`box_mass_corr`."""
    lo, hi = _box_arrays(box)
    t, wt = gauss_legendre01(order)
    means = np.atleast_2d(np.asarray(means, dtype=np.float64))
    covs = np.asarray(covs, dtype=np.float64).reshape(-1, 2, 2)
    sx, sy, rho = _sd_rho(covs, np)
    z, span, c, d, rho = _conditional_parts(means, sx, sy, rho, lo, hi, t, np)
    r = np.sqrt(1.0 - rho**2)
    g = _ndtr_diff_np((c - rho * z) / r, (d - rho * z) / r)
    phi = np.exp(-0.5 * z**2) / np.sqrt(2.0 * np.pi)
    return np.sum(span * wt * phi * g, axis=-1)


def box_mass(means, covs, box, *, order: int = 32, tol: float = 1e-12, max_order: int = 4096) -> MassEstimate:
    """P_j(box) with an error estimate (numpy); box (2, 2) or a stack (..., 2, 2) (e.g. the
    cells of a grid: expected counts per cell are w_j·P_j(cell)) -> (K,) or (..., K).

    Diagonal components (zero off-diagonal): exact CDF product, error 0 (rounding ≈1e-16).
    Correlated ones: conditional 1-D rule at orders n and 2n, n doubled from ``order``
    until every |Q_2n − Q_n| ≤ ``tol`` or 2n > ``max_order`` (then a warning). Returns
    Q_2n and |Q_2n − Q_n| per component (stated error, module docstring).
    """
    means = np.atleast_2d(np.asarray(means, dtype=np.float64))
    covs = np.asarray(covs, dtype=np.float64).reshape(-1, 2, 2)
    lead = np.asarray(box).shape[:-2]
    diag = covs[:, 0, 1] == 0.0
    mass = np.empty(lead + (len(means),))
    err = np.zeros(lead + (len(means),))
    if diag.any():
        sds = np.sqrt(np.stack([covs[diag, 0, 0], covs[diag, 1, 1]], -1))
        mass[..., diag] = box_mass_diag_np(means[diag], sds, box)
    todo = ~diag
    if todo.any():
        m, cv = means[todo], covs[todo]
        n = int(order)
        q_n = box_mass_corr_np(m, cv, box, n)
        while True:
            q_2n = box_mass_corr_np(m, cv, box, 2 * n)
            e = np.abs(q_2n - q_n)
            if e.max() <= tol or 4 * n > max_order:
                break
            n, q_n = 2 * n, q_2n
        if e.max() > tol:
            warnings.warn(f"box_mass: error estimate {e.max():.2e} above tol {tol:.0e} at order {2 * n}")
        mass[..., todo], err[..., todo] = q_2n, e
    return MassEstimate(mass, err)


# -------------------------------------------------------- 3. any window, 2-D rule


def quadrature_mass(means, covs, nodes_xy, weights):
    """Σ_k ω_k N(x_k; m_j, P_j) (jax, differentiable) -> (K,). nodes_xy (M, 2) Cartesian
    [m], weights (M,) [m²] (e.g. from ``Region.quadrature`` via :func:`nodes_to_xy`)."""
    chol = chol2(covs)
    logp = log_normal_pdf_chol(nodes_xy, jnp.asarray(means), chol)
    return jnp.asarray(weights) @ jnp.exp(logp)


def quadrature_mass_np(means, covs, nodes_xy, weights):
    """Numpy twin of :func:`quadrature_mass` (components processed in chunks so the
    (M, chunk) density table stays near 32 MB)."""
    means = np.atleast_2d(np.asarray(means, dtype=np.float64))
    covs = np.asarray(covs, dtype=np.float64).reshape(-1, 2, 2)
    xy = np.asarray(nodes_xy, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    out = np.empty(len(means))
    step = max(1, 4_000_000 // max(len(xy), 1))
    for i in range(0, len(means), step):
        m, c = means[i : i + step], covs[i : i + step]
        det = c[:, 0, 0] * c[:, 1, 1] - c[:, 0, 1] ** 2
        dx = xy[:, None, 0] - m[None, :, 0]
        dy = xy[:, None, 1] - m[None, :, 1]
        q = (c[:, 1, 1] * dx**2 - 2.0 * c[:, 0, 1] * dx * dy + c[:, 0, 0] * dy**2) / det
        out[i : i + step] = w @ (np.exp(-0.5 * q) / (2.0 * np.pi * np.sqrt(det)))
    return out


def _unresolved(means, covs, xy):
    """Components the node set cannot resolve: smallest sd < largest nearest-neighbour
    node spacing, and their ±8 sd box meets the nodes' bounding box (expanded by it)."""
    if len(xy) < 2:
        return np.ones(len(means), bool)
    dist, _ = cKDTree(xy).query(xy, k=2)
    h = float(dist[:, 1].max())
    ev = np.linalg.eigvalsh(covs)
    sd_min = np.sqrt(np.clip(ev[:, 0], 0.0, None))
    sd_x, sd_y = np.sqrt(covs[:, 0, 0]), np.sqrt(covs[:, 1, 1])
    lo, hi = xy.min(0) - h, xy.max(0) + h
    near = (
        (means[:, 0] + 8 * sd_x >= lo[0])
        & (means[:, 0] - 8 * sd_x <= hi[0])
        & (means[:, 1] + 8 * sd_y >= lo[1])
        & (means[:, 1] - 8 * sd_y <= hi[1])
    )
    return (sd_min < h) & near


def window_mass(
    means,
    covs,
    quadrature: Callable[[int], tuple],
    *,
    frame: str = "cartesian",
    order: int = 16,
    tol: float = 1e-9,
    max_order: int = 1024,
) -> MassEstimate:
    """P_j(W) over any window by a 2-D rule, with an error estimate (numpy).

    ``quadrature(order) -> (nodes_c0, nodes_c1, weights)`` in native coordinates of
    ``frame`` with weights in m² (``Region.quadrature``). Evaluates orders n and 2n, n
    doubled from ``order`` until every error ≤ ``tol`` or 2n > ``max_order`` (then a
    warning). error = |Q_2n − Q_n|, or inf for components the order-n nodes do not
    resolve (module docstring). Returns Q_2n and the error per component.
    """
    means = np.atleast_2d(np.asarray(means, dtype=np.float64))
    covs = np.asarray(covs, dtype=np.float64).reshape(-1, 2, 2)

    def q(n):
        c0, c1, w = quadrature(n)
        xy = nodes_to_xy(c0, c1, frame)
        return quadrature_mass_np(means, covs, xy, np.ravel(w)), xy

    n = int(order)
    q_n, xy_n = q(n)
    while True:
        q_2n, xy_2n = q(2 * n)
        e = np.abs(q_2n - q_n)
        e[_unresolved(means, covs, xy_n)] = np.inf
        if e.max() <= tol or 4 * n > max_order:
            break
        n, q_n, xy_n = 2 * n, q_2n, xy_2n
    if e.max() > tol:
        warnings.warn(f"window_mass: error estimate {e.max():.2e} above tol {tol:.0e} at order {2 * n}")
    return MassEstimate(q_2n, e)


def fixed_rule_error(
    means,
    covs,
    *,
    box=None,
    box_order: int = 64,
    quadrature: Callable[[int], tuple] | None = None,
    order: int | None = None,
    frame: str = "cartesian",
) -> np.ndarray:
    """Error estimate of the FIXED-order rule used inside a model, at parameter draws.

    A numpyro model evaluates P_j(R) with one fixed rule (``box_mass_corr`` of order
    ``box_order``, or a precomputed 2-D rule ``quadrature(order)``); this returns
    |Q_order − Q_2·order| for every draw and component (means (..., K, 2), covs
    (..., K, 2, 2)) -> (..., K), inf where the 2-D rule does not resolve a component.
    Report its maximum over the posterior draws beside the fit.
    """
    means = np.asarray(means, dtype=np.float64)
    covs = np.asarray(covs, dtype=np.float64)
    lead = means.shape[:-1]
    m = means.reshape(-1, 2)
    c = covs.reshape(-1, 2, 2)
    if (box is None) == (quadrature is None):
        raise ValueError("give exactly one of box= or quadrature=")
    if box is not None:
        err = np.abs(box_mass_corr_np(m, c, box, box_order) - box_mass_corr_np(m, c, box, 2 * box_order))
    else:
        if order is None:
            raise ValueError("order is required with quadrature=")
        c0, c1, w = quadrature(order)
        xy = nodes_to_xy(c0, c1, frame)
        q_n = quadrature_mass_np(m, c, xy, np.ravel(w))
        c0, c1, w = quadrature(2 * order)
        q_2n = quadrature_mass_np(m, c, nodes_to_xy(c0, c1, frame), np.ravel(w))
        err = np.abs(q_2n - q_n)
        err[_unresolved(m, c, xy)] = np.inf
    return err.reshape(lead)
