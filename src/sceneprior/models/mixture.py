"""Gaussian-mixture intensity: λ(x) = Σ_j w_j N(x; m_j, P_j), fitted to the points.

Used mainly for birth intensities (expected new objects per step), in Cartesian metres.
w_j are *untruncated* weights: the expected count per step of component j over the whole
plane. Inside the observed window R only w_j·P_j(R) of it is seen, P_j(R) =
∫_R N(x; m_j, P_j) dx (``mixture_mass``); the in-region total is the rate
λ̄ = Σ_j w_j P_j(R) (DESIGN.md §3, §4).

Likelihood (Poisson point process set density, no 1/n!; DESIGN.md §2), for points x_i
pooled over ``n_steps`` steps that share the window R:

    log L = Σ_i log λ(x_i) − n_steps · Σ_j w_j P_j(R).

The points themselves are used, not binned counts (binning inflates the fitted
covariances by about h²/12 per axis).

Priors (weakly informative, scaled to units and the region's size only — never to the
counts or the number of steps; keys of ``DEFAULT_PRIOR``):
- untruncated weights w_j i.i.d. ~ Gamma(weight_shape, weight_rate), weight_rate in steps.
  Equivalently Λ = Σ_j w_j ~ Gamma(K·weight_shape, weight_rate) and, independent of Λ,
  proportions w/Λ ~ Dirichlet(weight_shape, …) (the Gamma–Dirichlet representation).
  Default Gamma(1, 0.1): each component exponential with mean 10 expected objects per
  step, worth a tenth of a step of data — the uniform model's convention. Independent
  log-weights also give NUTS a near-diagonal geometry (the (Λ, simplex) form does not).
- means: i.i.d. Uniform over ``mean_box`` (default the window's Cartesian bounding box
  ``bbox``), x and y independent.
- standard deviations s_jd ~ Gamma(scale_shape, scale θ_d), θ_d = scale_fraction ×
  extent_d of ``bbox``. Default shape 2, fraction 1/8: mode extent/8, mean extent/4,
  P(s < extent/100) ≈ 0.3 %, P(s > extent) ≈ 0.3 %. Shape 2 makes the density vanish at
  0: the mixture likelihood grows like 1/s as a component collapses onto one point, and a
  prior with positive density at 0 (e.g. half-normal) would leave the posterior improper.
- correlations: Cholesky factor ~ LKJ(lkj_concentration), default 2 (density ∝ 1 − ρ² in
  2-D), which keeps the posterior proper against a component collapsing onto the line
  through two points (likelihood ∝ 1/(1 − ρ²)). With ``diagonal=True`` ρ = 0 (no LKJ site).

Label switching: handled by ORDERING (see ``LABELLING``). The sampler works in the
exchangeable parametrisation (sites ``*_raw``, K! symmetric modes); every reported
component quantity (deterministic sites) is sorted by the x-coordinate of the mean, all
parameters of a component moved together. Because the prior is exchangeable, the sorted
draws follow the posterior restricted to x-ordered labels, whichever mode a chain visits.
When two components have similar x the ordering identifies them poorly (labels can swap
between draws); ``relabel_to_reference`` then relabels draws post hoc.

Sample sites: ``weight_raw`` (K,), ``mean_x_raw``, ``mean_y_raw`` (K,) [m], ``scale_raw``
(K, 2) [m], ``corr_chol_raw`` (K, 2, 2, not with diagonal); factor ``loglik``.
Deterministic sites (sorted by mean x): ``weight`` (K,) untruncated w_j [expected count
per step over the whole plane], ``total`` Σ_j w_j, ``mean`` (K, 2) [m], ``scale`` (K, 2)
[m], ``cov`` (K, 2, 2) [m²], ``mass`` (K,) P_j(R), ``weight_in`` (K,) in-region w_j P_j(R)
[expected count per step in the window], ``rate`` = Σ_j w_j P_j(R) [per step, window].
"""

from __future__ import annotations

from typing import Callable

import jax

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402
import numpyro  # noqa: E402
import numpyro.distributions as dist  # noqa: E402
from jax.scipy.special import logsumexp  # noqa: E402
from scipy.optimize import linear_sum_assignment  # noqa: E402

from ..mixture_mass import box_mass_corr, box_mass_diag, chol2, log_normal_pdf_chol  # noqa: E402

DEFAULT_PRIOR = {
    "weight_shape": 1.0,
    "weight_rate": 0.1,
    "scale_shape": 2.0,
    "scale_fraction": 0.125,
    "lkj_concentration": 2.0,
}

LABELLING = (
    "ordering: components sorted by increasing x-coordinate of the mean in every draw "
    "(exchangeable prior, so this is the posterior restricted to x-ordered labels); "
    "post-hoc relabelling available (relabel_to_reference)"
)


def _as_box(b, name):
    a = np.asarray(b, dtype=np.float64)
    if a.shape != (2, 2) or not np.all(a[:, 1] > a[:, 0]):
        raise ValueError(f"{name} must be ((x0, x1), (y0, y1)) with x0 < x1, y0 < y1")
    return a


def mixture_model(
    points,
    n_steps,
    point_mask=None,
    *,
    n_components: int,
    bbox=None,
    box=None,
    quadrature=None,
    mean_box=None,
    diagonal: bool = False,
    prior: dict | None = None,
    box_order: int = 64,
    scan_terms=None,
):
    """numpyro model of a PPP with Gaussian-mixture intensity (module docstring).

    points: (n, 2) Cartesian [m], pooled over all steps; n_steps: number of steps
    (empty steps included); point_mask: optional (n,) 0/1 — rows with 0 are padding and
    ignored (lets one compiled model serve data sets of different sizes).
    Window, exactly one of:
      box=((x0, x1), (y0, y1)): the window is this axis-aligned box; P_j(R) exact CDF
        product when ``diagonal``, else the conditional 1-D Gauss–Legendre rule of order
        ``box_order`` (``mixture_mass.box_mass_corr``);
      quadrature=(nodes_xy (M, 2) [m], weights (M,) [m²]): any window (masks, polar), a
        precomputed rule (``Region.quadrature`` + ``mixture_mass.nodes_to_xy``); check its
        error with ``mixture_mass.window_mass`` at the posterior draws.
    bbox: the window's Cartesian bounding box (scales the priors; defaults to ``box``);
    mean_box: support of the means (defaults to ``bbox``); prior: overrides of
    ``DEFAULT_PRIOR``; scan_terms: per-step terms (``models.scanterms``: over-dispersion,
    step covariates, time bins) or None — the per-step likelihood is then the
    negative-binomial (or Poisson) count of each step times its points' density λ/Λ.
    """
    K = int(n_components)
    if K < 1:
        raise ValueError("n_components must be ≥ 1")
    if (box is None) == (quadrature is None):
        raise ValueError("give exactly one of box= or quadrature=")
    if bbox is None:
        if box is None:
            raise ValueError("bbox is required with quadrature=")
        bbox = box
    bb = _as_box(bbox, "bbox")
    mb = bb if mean_box is None else _as_box(mean_box, "mean_box")
    p = {**DEFAULT_PRIOR, **(prior or {})}
    points = jnp.asarray(points)
    extent = bb[:, 1] - bb[:, 0]

    theta = p["scale_fraction"] * extent
    with numpyro.plate("component", K):
        # w_j i.i.d. Gamma(α, b)  <=>  Λ = Σ w_j ~ Gamma(Kα, b), w/Λ ~ Dirichlet(α) independent
        w_raw = numpyro.sample("weight_raw", dist.Gamma(p["weight_shape"], p["weight_rate"]))
        mx_raw = numpyro.sample("mean_x_raw", dist.Uniform(mb[0, 0], mb[0, 1]))
        my_raw = numpyro.sample("mean_y_raw", dist.Uniform(mb[1, 0], mb[1, 1]))
        s_raw = numpyro.sample("scale_raw", dist.Gamma(p["scale_shape"], 1.0 / theta).to_event(1))
        if not diagonal:
            c_raw = numpyro.sample("corr_chol_raw", dist.LKJCholesky(2, p["lkj_concentration"]))
    # Labels: sort every component parameter by the x-coordinate of the mean (the prior is
    # exchangeable, so the sorted draws follow the posterior restricted to that ordering).
    order = jnp.argsort(mx_raw)
    weight = numpyro.deterministic("weight", w_raw[order])
    numpyro.deterministic("total", jnp.sum(w_raw))
    mean_x, mean_y = mx_raw[order], my_raw[order]
    scale = numpyro.deterministic("scale", s_raw[order])
    if not diagonal:
        corr = c_raw[order]
    mean = numpyro.deterministic("mean", jnp.stack([mean_x, mean_y], -1))
    if diagonal:
        chol = jnp.zeros((K, 2, 2)).at[:, 0, 0].set(scale[:, 0]).at[:, 1, 1].set(scale[:, 1])
    else:
        chol = scale[:, :, None] * corr  # diag(s) · L_corr
    cov = numpyro.deterministic("cov", chol @ jnp.swapaxes(chol, -1, -2))

    if box is not None:
        bx = _as_box(box, "box")
        mass = box_mass_diag(mean, scale, bx) if diagonal else box_mass_corr(mean, cov, bx, box_order)
    else:
        nodes, w = quadrature
        mass = jnp.asarray(w) @ jnp.exp(log_normal_pdf_chol(jnp.asarray(nodes), mean, chol))
    mass = numpyro.deterministic("mass", mass)
    weight_in = numpyro.deterministic("weight_in", weight * mass)
    rate = jnp.sum(weight_in)

    log_lam = logsumexp(jnp.log(weight) + log_normal_pdf_chol(points, mean, chol), axis=-1)
    if point_mask is not None:
        log_lam = jnp.where(jnp.asarray(point_mask) > 0, log_lam, 0.0)
    if scan_terms is None:
        numpyro.deterministic("rate", rate)
        numpyro.factor("loglik", jnp.sum(log_lam) - n_steps * rate)
    else:
        from .scanterms import ppp_factor

        numpyro.deterministic("rate", rate * ppp_factor(jnp.sum(log_lam), rate, scan_terms))


def log_intensity(points, weight, mean, cov):
    """log λ(x_i) = log Σ_j w_j N(x_i; m_j, P_j) (jax) for points (n, 2), one parameter
    set (K,), (K, 2), (K, 2, 2) -> (n,) [log per m² per step]. For per-step
    log-likelihoods: Σ_{i in step k} log λ(x_i) − rate."""
    return logsumexp(jnp.log(weight) + log_normal_pdf_chol(points, jnp.asarray(mean), chol2(cov)), axis=-1)


def pad_points(points, size: int, fill=None):
    """Pad points (n, 2) to (size, 2) with a 0/1 mask, for ``point_mask`` (fill: a valid
    location for the padding rows, default the first point or the origin)."""
    pts = np.asarray(points, dtype=np.float64).reshape(-1, 2)
    n = len(pts)
    if n > size:
        raise ValueError(f"{n} points do not fit in size {size}")
    if fill is None:
        fill = pts[0] if n else np.zeros(2)
    out = np.tile(np.asarray(fill, dtype=np.float64), (size, 1))
    out[:n] = pts
    mask = np.zeros(size)
    mask[:n] = 1.0
    return out, mask


def relabel_to_reference(means, reference=None, n_iter: int = 20):
    """Post-hoc relabelling of mixture draws (label switching), pivot-and-assign.

    means (S, K, 2) draws [m]. Each draw is permuted to match a reference set of means by
    minimum-cost assignment (scipy linear_sum_assignment), cost Σ_d (m_sjd − r_kd)² / v_kd
    with v the across-draw variance per label and axis (1 in the first pass); the
    reference is then replaced by the mean of the relabelled draws and the step repeated
    until no label changes (at most n_iter times). reference: (K, 2) starting means,
    default the first draw (a pivot). Returns perm (S, K) int: relabelled[s, k] =
    original[s, perm[s, k]]; apply the same perm to every per-component array with
    :func:`apply_labels`.
    """
    means = np.asarray(means, dtype=np.float64)
    S, K, _ = means.shape
    ref = means[0] if reference is None else np.asarray(reference, dtype=np.float64)
    var = np.ones((K, 2))
    perm = np.tile(np.arange(K), (S, 1))
    for _ in range(n_iter):
        cost = (((means[:, None, :, :] - ref[None, :, None, :]) ** 2) / var[None, :, None, :]).sum(-1)
        new = np.empty_like(perm)
        for s in range(S):  # K is small; one assignment per draw
            _, cols = linear_sum_assignment(cost[s])
            new[s] = cols
        rel = np.take_along_axis(means, new[:, :, None], axis=1)
        ref = rel.mean(0)
        var = np.maximum(rel.var(0), 1e-12 * np.maximum(np.abs(ref), 1.0) ** 2)
        if np.array_equal(new, perm):
            break
        perm = new
    return perm


def apply_labels(x, perm):
    """Permute the component axis (axis 1) of draws x (S, K, ...) by ``perm`` (S, K)."""
    x = np.asarray(x)
    idx = perm.reshape(perm.shape + (1,) * (x.ndim - 2))
    return np.take_along_axis(x, idx, axis=1)


def sample_mixture_intensity(
    rng: np.random.Generator,
    weights,
    means,
    covs,
    inside: Callable,
    *,
    n_steps: int = 1,
    masses=None,
    max_draws: int = 50_000_000,
):
    """Draw point sets of a PPP with intensity Σ_j w_j N(x; m_j, P_j) restricted to a window.

    weights (K,) untruncated w_j [per step]; means (K, 2), covs (K, 2, 2) [m, m²];
    inside(x, y) -> bool array: the window test (Cartesian metres).
    With ``masses`` = P_j(R) (K,) (from ``mixture_mass``): per step n_k ~ Poisson(Σ_j w_j
    P_j(R)), then n_k i.i.d. points from the normalised truncated mixture
    λ·1_R / Σ_j w_j P_j(R), by rejection of mixture draws outside the window (DESIGN.md §2).
    Without ``masses``: restriction — N_k ~ Poisson(Σ_j w_j) points from the whole mixture,
    keeping those inside; the restriction of a PPP to R is a PPP with intensity λ·1_R
    (restriction theorem; Kingman, Poisson Processes, 1993, §2.2, cited from memory), so
    this is the same law without needing the masses.
    Returns (points (N, 2), step (N,) int64 in 0..n_steps−1), sorted by step.
    """
    w = np.asarray(weights, dtype=np.float64)
    m = np.asarray(means, dtype=np.float64).reshape(-1, 2)
    L = np.linalg.cholesky(np.asarray(covs, dtype=np.float64).reshape(-1, 2, 2))
    total = w.sum()
    if total <= 0:
        return np.zeros((0, 2)), np.zeros(0, np.int64)
    pk = w / total

    def draw(n):
        j = rng.choice(len(w), size=n, p=pk)
        z = rng.standard_normal((n, 2))
        xy = m[j] + np.einsum("nij,nj->ni", L[j], z)
        return xy[np.asarray(inside(xy[:, 0], xy[:, 1]), bool)]

    if masses is None:
        counts = rng.poisson(total, size=n_steps)
        n = int(counts.sum())
        if n > max_draws:
            raise ValueError(f"{n} draws exceed max_draws={max_draws}")
        j = rng.choice(len(w), size=n, p=pk)
        z = rng.standard_normal((n, 2))
        xy = m[j] + np.einsum("nij,nj->ni", L[j], z)
        step = np.repeat(np.arange(n_steps), counts)
        keep = np.asarray(inside(xy[:, 0], xy[:, 1]), bool)
        return xy[keep], step[keep]

    rate = float(np.dot(w, np.asarray(masses, dtype=np.float64)))
    counts = rng.poisson(rate, size=n_steps)
    n = int(counts.sum())
    accept = max(rate / total, 1e-6)
    out, have, used = [], 0, 0
    while have < n:
        batch = int(min(max_draws, np.ceil(1.2 * (n - have) / accept) + 16))
        used += batch
        if used > max_draws:
            raise ValueError(f"rejection sampling exceeded max_draws={max_draws} (window mass too small?)")
        got = draw(batch)
        out.append(got)
        have += len(got)
    xy = np.concatenate(out)[:n] if out else np.zeros((0, 2))
    return xy, np.repeat(np.arange(n_steps), counts)


def describe_prior(prior: dict | None, bbox, mean_box=None) -> dict:
    """The stated priors with their values in units (for summaries)."""
    p = {**DEFAULT_PRIOR, **(prior or {})}
    bb = _as_box(bbox, "bbox")
    mb = bb if mean_box is None else _as_box(mean_box, "mean_box")
    theta = p["scale_fraction"] * (bb[:, 1] - bb[:, 0])
    return {
        "weight": f"w_j ~ Gamma(shape={p['weight_shape']}, rate={p['weight_rate']} steps) i.i.d., "
        "untruncated expected count per step of each component",
        "mean": f"x ~ Uniform({mb[0, 0]}, {mb[0, 1]}) m, y ~ Uniform({mb[1, 0]}, {mb[1, 1]}) m, i.i.d.",
        "scale": f"s ~ Gamma(shape={p['scale_shape']}, scale=({theta[0]:.6g}, {theta[1]:.6g}) m) per axis",
        "correlation": f"LKJ({p['lkj_concentration']})",
        "labelling": LABELLING,
        "weights_reported": "weight = untruncated w_j; weight_in = in-region w_j·P_j(R) (expected count per step)",
    }


def default_init(bbox, n_components: int, prior: dict | None = None):
    """numpyro init strategy: standard deviations at their prior median (Gamma(2) median
    ≈ 1.678 θ), other sites by numpyro's init_to_uniform. The numpyro default would start
    the standard deviations at e^U(−2, 2) metres — components far narrower than any cluster
    in a region hundreds of metres wide, and a slow warmup."""
    from numpyro.infer import init_to_value
    from scipy.special import gammaincinv

    p = {**DEFAULT_PRIOR, **(prior or {})}
    bb = _as_box(bbox, "bbox")
    theta = p["scale_fraction"] * (bb[:, 1] - bb[:, 0])
    med = gammaincinv(p["scale_shape"], 0.5) * theta
    return init_to_value(values={"scale_raw": jnp.tile(jnp.asarray(med), (int(n_components), 1))})
