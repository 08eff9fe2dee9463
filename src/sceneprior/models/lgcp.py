"""Log-Gaussian Cox process clutter maps: λ_c = ρ₀ · exp(f_c), f a stationary Gaussian field.

Field (DESIGN.md §3): f on the cell centres is the corner of a circulant-embedded field on
a padded torus (Wood & Chan 1994; Dietrich & Newsam 1997), kernel Matérn ν = 1/2, 3/2,
5/2 or squared exponential (Rasmussen & Williams 2006, §4.2). The torus is sized ONCE for
the largest length scale the prior allows and checked valid (eigenvalues ≥ −1e-10·max);
where the minimum-image row would need more than twice the grid, the periodised kernel's
spectrum is used instead (``Spectrum``), non-negative by construction. Every torus mode is
kept (no spectral truncation, so nothing is dropped from the prior).

Stationarity: on a Cartesian grid the field is isotropic in metres (one length scale).
On a polar grid it is stationary in (range, bearing) — one length scale in metres along
range and one in degrees along bearing — because the polar cells form a regular lattice
only in those coordinates (the circulant embedding needs a regular lattice), and because
sea and ground clutter statistics change along range and from sector to sector rather
than isotropically in x, y. The intensity is per m² (exact polar cell areas in the
exposure), and per m·rad = per m² × range is reported beside it.

Baseline: log λ_c = μ + f_c with ρ₀ = e^μ ~ Gamma(a, b), conjugate to the Poisson
likelihood given f, so ρ₀ is integrated out in the sampler —
    ∫ Π_c Pois(N_c | ρ₀ E_c e^{f_c}) Gamma(ρ₀ | a, b) dρ₀ ∝ e^{Σ N_c f_c} / (b + Z)^{a+S},
Z = Σ_c E_c e^{f_c}, S = Σ_c N_c (the Gamma–Poisson mixture, Gelman et al., BDA3 §2.6) —
and drawn exactly afterwards, ρ₀ | f ~ Gamma(a + S, b + Z), per draw. The field's level
and μ trade off along a ridge the data cannot resolve; integrating ρ₀ out removes it.
(Exception: a truncated field with the per-cell term integrated out, ``TruncatedFieldKernels``,
samples μ through the field's data-weighted level, which removes the same ridge.)

Sampler coordinates: white noise u on the torus mapped to f by the data-informed, exact
linear reparametrisation of ``sceneprior.fields.preconditioning`` (per-mode partial
centring, a padding correction at pilot hyperparameters, one soft direction), so that
NUTS needs a similar number of leapfrog steps with 0.3 or 60 detections per cell.

Precision: float64 throughout the sampler (the spectrum of smooth kernels spans many
decades; counts of long recordings are large); the per-cell field kept for the outputs is
float32.
Priors (units only — region and cell size — never the counts):
  ρ₀ ~ Gamma(a, b): median rate_median/|W| [m⁻² scan⁻¹], sd of log ρ₀ = rate_log_sd
      (a from trigamma(a) = rate_log_sd², b from the median)
  σ ~ HalfNormal(sigma_scale)                           field sd (log scale)
  ℓ_a = lo_a (hi_a / lo_a)^u_a, u_a ~ Beta(2, 2)        length scale per axis, bounded:
      default lo = 2 cell spacings (at most hi/2), hi = a quarter of the region's extent along the axis.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
import numpyro
import numpyro.distributions as dist

from ..errors import InputError
from ..fields.embedding import TorusGeometry, plan_torus, torus_shape_for
from ..fields.kernels import KERNEL_NAMES
from ..fields.spectral import WRAP_LIMIT, WRAP_NOTE, Spectrum, longest_within_wrap, periodised_report
from ..fields.preconditioning import build_preconditioner, field_and_prior, safe_sqrt
from ..fields.truncation import (MAP_MAX_COEFFICIENTS, ModeBasis, dense_preconditioner, dropped_mode_check,
                                 field_from_coefficients, mode_basis)
from .cell_term import (GH_NODES, LAPLACE, REFERENCE_NODES, marginal_loglik, nodes_for, nodes_for_cells, rule_error,
                        rule_name, variance_limit)

DEFAULT_PRIOR = {
    "rate_median": 10.0,
    "rate_log_sd": 3.0,
    "sigma_scale": 1.0,
}
_LS_KEYS = ("length_scale_min", "length_scale_max",  # cartesian, m
            "range_length_scale_min", "range_length_scale_max",  # polar, m
            "bearing_length_scale_min", "bearing_length_scale_max")  # polar, degrees
PADDINGS = (1.0, 2.0, 3.0, 4.0)  # minimum-image embedding tried on tori up to 2× the grid


def gamma_prior(rate_median: float, rate_log_sd: float, window_area: float) -> tuple[float, float]:
    """Gamma(a, b) on ρ₀ [m⁻² scan⁻¹] with sd(log ρ₀) = rate_log_sd (trigamma(a) = sd²) and
    median rate_median/|W| (b = F⁻¹_Gamma(a,1)(½)·|W|/rate_median)."""
    from scipy.optimize import brentq
    from scipy.special import gammaincinv, polygamma

    a = brentq(lambda x: float(polygamma(1, x)) - rate_log_sd**2, 1e-8, 1e8)
    b = float(gammaincinv(a, 0.5)) * window_area / rate_median
    return float(a), b


def lgcp_model(counts, exposure, window_area, obs, gamma_a, gamma_b, sigma_scale, ls_lo, ls_hi,
               precond, kernels, scan_terms=None):
    """numpyro model of the LGCP on binned data, baseline ρ₀ integrated out.

    counts, exposure: (n_obs,) N_c and E_c [m²·scan] of cells with exposure; window_area
    (n_cells,) |c ∩ W| [m²]; obs (n_obs,) their flat indices; gamma_a, gamma_b: the
    Gamma prior of ρ₀ (b in m²·scan); ls_lo, ls_hi (n_ls,) length scale bounds in axis
    units; ``precond``: arrays of the reparametrisation (``Preconditioner.arrays()``);
    ``kernels``: static torus geometry and jitted field maths (:class:`FieldKernels`);
    ``scan_terms``: per-scan terms (``models.scanterms``: over-dispersion, scan covariates,
    time bins) or None.
    Truncated field (:class:`TruncatedFieldKernels`): white coordinates ``u_modes`` of the
    kept modes; with the per-cell term and no per-scan terms the term is integrated out and
    ``level`` (the field's data-weighted level, μ's coordinate) is sampled, with deterministic
    sites ``mu`` and ``term_variance`` and ``field`` the kept field (``complete_posterior``
    adds the term's exact draws, the window integral and the rate); with per-scan terms the
    term is sampled as ``u_cells`` (one per grid cell).
    Full torus: white coordinates ``u_soft`` (along the soft direction g) and ``u_rest``, rotated onto
    the torus by the Householder reflection that maps the first axis to g (orthogonal, unit
    Jacobian), so that u_soft can share a dense mass-matrix block with σ and ℓ.
    Without per-scan terms ρ₀ is integrated out (module docstring) and drawn afterwards
    (:func:`complete_posterior`) — except with the integrated per-cell term (above); with
    them the per-scan likelihood is not conjugate in ρ₀, which is then sampled (site ``rho0``).
    Deterministic sites: ``field`` (n_cells,) float32 f_c = log λ_c − μ; ``log_z`` =
    log Σ_c E_c e^{f_c}; ``log_window_integral`` = log Σ_c |c ∩ W| e^{f_c} (the integrated
    per-cell term records ``field``, ``mu`` and ``term_variance`` instead).
    """
    sigma = numpyro.sample("sigma", dist.HalfNormal(sigma_scale))
    u01 = numpyro.sample("ls_unit", dist.Beta(2.0, 2.0).expand([ls_lo.shape[0]]).to_event(1))
    ls = numpyro.deterministic("length_scale", ls_lo * (ls_hi / ls_lo) ** u01)
    if isinstance(kernels, TruncatedFieldKernels) and kernels.cell_term and scan_terms is None:
        # the per-cell term integrated out cell by cell; μ sampled through the field's level
        u_modes = numpyro.sample("u_modes", dist.Normal(0.0, 1.0).expand([kernels.n_latent]).to_event(1))
        level = numpyro.sample("level", dist.Normal(0.0, 1.0))
        f, log_prior_u, mu, v, loglik = kernels.evaluate_marginal(u_modes, level, sigma, ls, precond)
        numpyro.factor("field_prior", log_prior_u + 0.5 * jnp.sum(u_modes * u_modes))
        # ρ₀ = e^μ ~ Gamma(a, b): log density of μ, a μ − b e^μ (+ const); μ = m̂ + τ·level − w̃ᵀf
        # has unit Jacobian in (u, level) up to the constant τ, so level's N(0, 1) is replaced
        numpyro.factor("baseline_prior", baseline_log_prior(mu, gamma_a, gamma_b) + 0.5 * level**2)
        numpyro.factor("loglik", loglik)
        numpyro.deterministic("field", f.astype(jnp.float32))  # the kept field; ε added by complete_posterior
        numpyro.deterministic("mu", mu)
        numpyro.deterministic("term_variance", v)
        return
    if isinstance(kernels, TruncatedFieldKernels):
        u_modes = numpyro.sample("u_modes", dist.Normal(0.0, 1.0).expand([kernels.n_latent]).to_event(1))
        u_cells = (numpyro.sample("u_cells", dist.Normal(0.0, 1.0).expand([window_area.shape[0]]).to_event(1))
                   if kernels.cell_term else None)
        f, log_prior_u, log_z, log_w = kernels.evaluate(u_modes, sigma, ls, precond, exposure, obs, window_area,
                                                        u_cells)
        white = jnp.sum(u_modes * u_modes) + (0.0 if u_cells is None else jnp.sum(u_cells * u_cells))
    else:
        u_soft = numpyro.sample("u_soft", dist.Normal(0.0, 1.0))
        u_rest = numpyro.sample("u_rest", dist.Normal(0.0, 1.0).expand([kernels.n_torus - 1]).to_event(1))
        u = kernels.rotate(u_soft, u_rest, precond["householder"])
        f, log_prior_u, log_z, log_w = kernels.evaluate(u, sigma, ls, precond, exposure, obs, window_area)
        white = u_soft**2 + jnp.sum(u_rest * u_rest)
    # the N(0, 1) site densities are replaced by the exact density of u under the field prior
    numpyro.factor("field_prior", log_prior_u + 0.5 * white)
    numpyro.deterministic("field", f.astype(jnp.float32))
    numpyro.deterministic("log_z", log_z)
    numpyro.deterministic("log_window_integral", log_w)
    total = jnp.sum(counts)
    if scan_terms is None:
        numpyro.factor("loglik", integrated_loglik(f, log_z, precond, obs, counts, gamma_a, gamma_b))
        return
    from .scanterms import ppp_factor

    rho0 = numpyro.sample("rho0", dist.Gamma(gamma_a, gamma_b))
    mu = numpyro.deterministic("mu", jnp.log(rho0))
    base = jnp.exp(mu + log_w)  # Λ = Σ_c λ_c |c ∩ W|
    mult = ppp_factor(total * mu + _count_dot(f, precond, obs, counts), base, scan_terms)
    numpyro.deterministic("rate", base * mult)


def baseline_log_prior(mu, gamma_a, gamma_b):
    """log density of μ = log ρ₀ for ρ₀ ~ Gamma(a, b), up to a constant: a μ − b e^μ (the
    Gamma density in ρ₀ times the Jacobian e^μ)."""
    return gamma_a * mu - gamma_b * jnp.exp(mu)


def grid_data(counts, exposure, obs, n_cells) -> dict:
    """N_c and log E_c on every grid cell (0 and −∞ where a cell has no exposure), so the
    likelihood reads the field without an index gather. They duplicate ``counts`` and
    ``exposure`` (which the model still takes for the baseline and the outputs): a caller
    that swaps the data must rebuild both. Why: under numpyro's "parallel" chains a gather
    of a grid-sized field inside the sampler's loop grew the process's memory by about
    8 KB per call (0.8 GB in 100 000 calls at 65 536 cells, flat under jit and vmap); it
    is one of several grid-sized operations that grow memory when XLA runs executions at
    once (``inference.chain_layout``), so this alone does not make parallel runs of large
    grids safe — the layout keeps them one after another."""
    c = np.zeros(n_cells)
    c[obs] = counts
    le = np.full(n_cells, -np.inf)
    le[obs] = np.log(exposure)
    return {"counts_grid": jnp.asarray(c), "log_exposure_grid": jnp.asarray(le)}


def integrated_loglik(f, log_z, pre, obs, counts, gamma_a, gamma_b):
    """log-likelihood of the counts given the field with ρ₀ ~ Gamma(a, b) integrated out, up
    to a constant: Σ_c N_c f_c − (a + N) log(b + Σ_c E_c e^{f_c})."""
    return _count_dot(f, pre, obs, counts) - (gamma_a + jnp.sum(counts)) * jnp.logaddexp(jnp.log(gamma_b), log_z)


def _count_dot(f, pre, obs, counts):
    """Σ_c N_c f_c."""
    return jnp.dot(pre["counts_grid"], f) if "counts_grid" in pre else jnp.dot(counts, f[obs])


def _log_exposed_integral(f, pre, obs, exposure):
    """log Σ_c E_c e^{f_c} over cells with exposure."""
    if "log_exposure_grid" in pre:
        return jax.scipy.special.logsumexp(f + pre["log_exposure_grid"])
    return jax.scipy.special.logsumexp(f[obs] + jnp.log(exposure))


def _integrals(f, pre, obs, exposure, window_area):
    """log Σ_c E_c e^{f_c} (exposed cells) and log Σ_c |c ∩ W| e^{f_c} (the window)."""
    inside = window_area > 0
    log_w = jax.scipy.special.logsumexp(jnp.where(inside, f + jnp.log(jnp.where(inside, window_area, 1.0)), -jnp.inf))
    return _log_exposed_integral(f, pre, obs, exposure), log_w


@dataclass(frozen=True, eq=False)
class FieldKernels:
    """Static torus geometry and the jitted field maths, so that tracing the model compiles
    one function instead of many small operations."""

    spectrum: Spectrum
    use_pad: bool

    @property
    def torus_shape(self):
        return self.spectrum.geom.torus_shape

    @property
    def grid_shape(self):
        return self.spectrum.geom.grid_shape

    @property
    def n_torus(self):
        return self.spectrum.geom.n_torus

    def __reduce__(self):  # pickled without the jitted closure, rebuilt on loading
        return (type(self), (self.spectrum, self.use_pad))

    def rotate(self, u_soft, u_rest, v):
        """u = H [u_soft, u_rest] on the torus, H = I − 2 v vᵀ (|v| = 1 or v = 0)."""
        w = jnp.concatenate([u_soft[None], u_rest])
        return (w - 2.0 * v * jnp.dot(v, w)).reshape(self.torus_shape)

    def __post_init__(self):
        spectrum, use_pad, grid_shape = self.spectrum, self.use_pad, self.spectrum.geom.grid_shape

        def evaluate(u, sigma, ls, pre, exposure, obs, window_area):
            lam = spectrum.eigenvalues(jnp.broadcast_to(ls, (2,)), sigma**2)
            f, logp = field_and_prior(u, lam, pre, grid_shape, use_pad)
            return (f, logp) + _integrals(f, pre, obs, exposure, window_area)

        object.__setattr__(self, "evaluate", jax.jit(evaluate))


@dataclass(frozen=True, eq=False)
class TruncatedFieldKernels:
    """The field from a fixed set of Fourier modes (``fields.truncation``): coefficients
    u_modes with per-mode partial centring d_k = 1 + w̄Λ_k (d = 1 for the zero mode, whose
    level the integrated-out baseline absorbs), f = Σ_k √(Λ_k/d_k) Y_k(u) on the grid, and
    the exact prior density of u: u_j ~ N(0, d_k(j)).

    ``cell_term`` (model option dropped_modes): the variance the dropped modes carry is put
    back as an independent term per grid cell, ε_c ~ N(0, v(σ, ℓ)) with v = c₀ − (1/N)
    Σ_kept Λ_k, c₀ the torus field's variance at a point (:meth:`ModeBasis.residual_variance`),
    so that each cell's prior variance is the torus field's again (σ² plus the kernel's
    wraps) — the correction of the modified predictive process (Finley, Sang, Banerjee &
    Gelfand 2009), where a low-rank field's lost variance is restored by an independent
    term of its own variance at each location. What it does not restore is the dropped
    part's correlation between neighbouring cells (short-ranged: the dropped modes are the
    fine scales). Two forms of the same model. Without per-scan terms the term is integrated
    out cell by cell (``evaluate_marginal``; ``models.cell_term``: adaptive Gauss–Hermite
    quadrature of the Poisson–lognormal marginal, or Laplace's method to second order where
    that is within budget on the fit's cells), which needs the baseline μ sampled — as
    μ = m̂ + τ·level − Σ_c w̃_c f_c (w̃ the data weights of the pilot map, normalised; m̂ and τ
    the data's weighted mean log intensity and its scale at set-up), so that the sampled
    ``level`` is the field's data-weighted level, nearly free of the field's shape — and the
    draws of ε are made afterwards, exactly (``complete_posterior``). With per-scan terms the
    likelihood is no product over cells, and the term is sampled (``evaluate`` with
    ``u_cells``): ε_c = √(v/e_c) y_c with y_c ~ N(0, e_c), e_c = 1 + w_c v (w_c the cell's
    detections, ``pre["cell_weights"]``): the same partial centring per cell."""

    basis: ModeBasis
    cell_term: bool = False
    nodes: int = GH_NODES  # the integrated term's rule: Gauss–Hermite nodes, or cell_term.LAPLACE (size_quadrature)
    laplace_up_to: float = math.inf  # with LAPLACE: GH_NODES nodes above this term variance (the sizing's largest)

    @property
    def n_latent(self):
        return self.basis.n_latent

    def __reduce__(self):  # pickled without the jitted closure, rebuilt on loading
        return (type(self), (self.basis, self.cell_term, self.nodes, self.laplace_up_to))

    def __post_init__(self):
        basis = self.basis
        zero = jnp.asarray(basis.nonzero)
        box, grid = basis.box_shape, basis.geom.grid_shape
        nodes, laplace_up_to = self.nodes, self.laplace_up_to

        def kept(u, sigma, ls, pre):
            """(Λ, the kept field on the grid, the log prior density of u)."""
            lam = jnp.maximum(basis.eigenvalues(jnp.broadcast_to(ls, (2,)), sigma**2), 0.0)
            d = 1.0 + zero * pre["w_scale"] * lam
            amp = safe_sqrt(lam / d)
            y = u
            if "dense" in pre or "low_rank_vectors" in pre:  # the map, in its stored precision
                rows = pre.get("map_rows")  # the coefficients it acts on (None: all)
                z = u if rows is None else u[rows]
                if "dense" in pre:
                    yz = (pre["dense"] @ z.astype(pre["dense"].dtype)).astype(u.dtype)
                else:
                    V = pre["low_rank_vectors"]
                    yz = z + (V @ (pre["low_rank_scale"] * (z.astype(V.dtype) @ V))).astype(u.dtype)
                y = yz if rows is None else u.at[rows].set(yz)
            f = field_from_coefficients(y, amp, pre["modes"], box, grid)
            dj = d[pre["modes"]["coef_rep"]]
            return lam, f, -0.5 * jnp.sum(y * y / dj) - 0.5 * jnp.sum(jnp.log(dj))

        def evaluate(u, sigma, ls, pre, exposure, obs, window_area, u_cells=None):
            lam, f, logp = kept(u, sigma, ls, pre)
            if u_cells is not None:  # the dropped modes' variance, back as a sampled term per cell
                v = basis.residual_variance(lam, sigma**2, jnp.broadcast_to(ls, (2,)))
                e = 1.0 + pre["cell_weights"] * v
                f = f + safe_sqrt(v / e) * u_cells
                logp = logp - 0.5 * jnp.sum(u_cells * u_cells / e) - 0.5 * jnp.sum(jnp.log(e))
            return (f, logp) + _integrals(f, pre, obs, exposure, window_area)

        def evaluate_marginal(u, level, sigma, ls, pre):
            lam, f, logp = kept(u, sigma, ls, pre)
            v = jnp.maximum(basis.residual_variance(lam, sigma**2, jnp.broadcast_to(ls, (2,))), TERM_VARIANCE_FLOOR)
            mu = pre["level_centre"] + pre["level_scale"] * level - jnp.dot(pre["level_weights"], f)
            le = pre["log_exposure_grid"]
            exposed = jnp.isfinite(le)
            eta = jnp.where(exposed, le + mu + f, 0.0)
            ll = jnp.sum(jnp.where(exposed, marginal_loglik(pre["counts_grid"], eta, v, nodes, laplace_up_to), 0.0))
            return f, logp, mu, v, ll

        object.__setattr__(self, "evaluate", jax.jit(evaluate))
        object.__setattr__(self, "evaluate_marginal", jax.jit(evaluate_marginal))


#: the per-cell term's variance is floored here inside the integrated form (v → 0 would divide
#: by zero in the integrand; at 1e-12 the term is nothing on the log scale)
TERM_VARIANCE_FLOOR = 1e-12
#: the summary notes the integrated term's quadrature when its error summed over the cells
#: (``dropped_modes``: quadrature_error_nats) exceeds this: a log density off by at most ε
#: everywhere changes posterior probabilities by at most a factor e^{±2ε} (the ratio of the
#: two normalised densities), so 0.01 nats keeps them within 2 %
QUADRATURE_NOTE_NATS = 0.01
#: the set-up sizes the per-cell quadrature for this many times the term's variance at the
#: chains' start or the pilot, the larger (σ and ℓ move in the posterior: at 128² Matérn 3/2 strong q 0.9 the posterior's
#: largest was 0.66× the pilot's on the bench's field and 2.1× on a second field; on an 8 × 8
#: grid, whose pilot is poor, up to 16×, which the summary's check then reports)
QUADRATURE_MARGIN = 4.0


def _bounds(stats, prior: dict, source="model.prior"):
    g = stats.grid
    h0 = float(np.diff(g.edges0).mean())
    h1 = float(np.diff(g.edges1).mean())
    L0 = float(g.edges0[-1] - g.edges0[0])
    L1 = float(g.edges1[-1] - g.edges1[0])
    if g.frame == "polar":
        lo = [prior.get("range_length_scale_min", 2 * h0), prior.get("bearing_length_scale_min", 2 * h1)]
        hi = [prior.get("range_length_scale_max", L0 / 4), prior.get("bearing_length_scale_max", L1 / 4)]
        for k in ("length_scale_min", "length_scale_max"):
            if k in prior:
                raise InputError(f"{source}.{k}: polar grids have one length scale per axis; use "
                                 f"range_{k} (m) and bearing_{k} (degrees)")
    else:
        if np.any(np.abs(np.diff(g.edges0) - h0) > 1e-9 * h0) or np.any(np.abs(np.diff(g.edges1) - h1) > 1e-9 * h1):
            raise InputError("lgcp needs a regular grid")
        lo = [prior.get("length_scale_min", 2 * max(h0, h1))]
        hi = [prior.get("length_scale_max", max(L0, L1) / 4)]
        for k in _LS_KEYS[2:]:
            if k in prior:
                raise InputError(f"{source}.{k}: Cartesian grids have one isotropic length scale; "
                                 "use length_scale_min / length_scale_max (m)")
    lo, hi = np.asarray(lo, float), np.asarray(hi, float)
    # default minimum on coarse grids: never above half the maximum
    given_lo = [k for k in prior if k.endswith("length_scale_min")]
    if not given_lo:
        lo = np.minimum(lo, hi / 2)
    if np.any(hi <= lo):
        raise InputError(f"{source}: the length scale bounds must satisfy min < max, got min {lo.tolist()} "
                         f"and max {hi.tolist()}")
    return (h0, h1), lo, hi


def plan(stats, kernel: str, prior: dict):
    """Torus geometry and a valid spectrum for this grid and prior (done once per fit)."""
    if kernel not in KERNEL_NAMES:
        import difflib

        close = difflib.get_close_matches(kernel, KERNEL_NAMES, n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        raise InputError(f"model.kernel: unknown kernel {kernel!r}{hint}; available: {', '.join(KERNEL_NAMES)}")
    spacing, lo, hi = _bounds(stats, prior)
    lo2 = np.resize(lo, 2) if lo.size == 1 else lo
    hi2 = np.resize(hi, 2) if hi.size == 1 else hi
    spectrum = None
    twice = tuple(2 * n for n in stats.grid.shape)
    for pad in PADDINGS:
        shape = torus_shape_for(stats.grid.shape, spacing, hi2, pad, 2.0)
        if any(m > scipy_fast(t) for m, t in zip(shape, twice)):
            break
        try:
            geom, rep = plan_torus(kernel, stats.grid.shape, spacing, hi2, lo2, padding=pad, min_factor=2.0)
        except InputError:
            continue
        spectrum, report = Spectrum(geom, "embedding"), {"method": "embedding", **rep.as_dict()}
        break
    if spectrum is None:
        geom = TorusGeometry(kernel, stats.grid.shape, spacing, torus_shape_for(stats.grid.shape, spacing, hi2, 0.0, 2.0))
        if geom.n_torus > 2**24:
            raise InputError(f"grid {stats.grid.shape} needs a torus of {geom.n_torus} cells, beyond what "
                             "this machine can sample; use a coarser grid")
        spectrum = Spectrum(geom, "periodised")
        report = periodised_report(spectrum, lo2, hi2)
        _refuse_wrapped(stats, spectrum, report, lo2, hi2)
    return spectrum, report, lo, hi


def wrap_advice(stats, spectrum, report, lo2, hi2, limit: float) -> str | None:
    """None when the periodised torus covariance is within ``limit`` · σ² of the kernel at the
    longest length scales the prior allows (``report["wrap_error"]``; the minimum-image
    embedding is exact); else what to say: the bounds asked for, the error, and the longest
    maxima within the limit (``fields.spectral.longest_within_wrap``)."""
    if report.get("wrap_error", 0.0) <= limit:
        return None
    polar = stats.grid.frame == "polar"
    keys = ("range_length_scale_max", "bearing_length_scale_max") if polar else ("length_scale_max",)
    units = (" m", "°") if polar else (" m",)
    asked = " and ".join(f"{k} {v:.4g}{u}" for k, v, u in zip(keys, hi2, units))
    fits = longest_within_wrap(spectrum, lo2, hi2, limit)
    if fits is not None and np.all(fits <= np.asarray(lo2) * 1.001):  # no room above the minimum
        fits = None
    what = ("even the minimum length scales reach it; lower the length_scale_min bounds as well, or fit a larger "
            "region" if fits is None else "use " + " and ".join(f"{k} ≤ {v:.4g}{u}" for k, v, u in zip(keys, fits, units)))
    return (f"{asked}: on the padded torus (twice the grid) the field's covariance between cells differs from "
            f"the {spectrum.geom.kernel} kernel's by up to {report['wrap_error']:.3g}·σ² at these length scales (a "
            f"field with periodic boundaries); to keep it within {limit:g}·σ², {what}")


def note_wrap(advice: list, stats, spectrum, report, lo, hi) -> None:
    """A note before sampling above ``fields.spectral.WRAP_NOTE`` (refused above WRAP_LIMIT)."""
    text = wrap_advice(stats, spectrum, report, np.resize(lo, 2), np.resize(hi, 2), WRAP_NOTE)
    if text is not None:
        advice.append(f"model.prior: {text}")


def _refuse_wrapped(stats, spectrum, report, lo2, hi2) -> None:
    """InputError beyond ``fields.spectral.WRAP_LIMIT``: the torus cannot embed length scales
    that long, and the fit would use a materially different prior from the one asked for."""
    text = wrap_advice(stats, spectrum, report, lo2, hi2, WRAP_LIMIT)
    if text is not None:
        raise InputError(f"model.prior: {text}")


def _check_variance_kept(variance_kept) -> None:
    if isinstance(variance_kept, bool) or not isinstance(variance_kept, (int, float)) or not 0.5 <= variance_kept <= 1.0:
        raise InputError(f"model.variance_kept: the fraction of the field's prior variance the kept Fourier modes "
                         f"carry, a number in [0.5, 1] (1: every mode), got {variance_kept!r}")


#: model.variance_kept when the spec leaves it out, per kernel (others: 1, every torus mode).
#: The squared exponential keeps the modes that carry 99.9 % of its prior variance at the
#: shortest length scale: at 32² cells, 4 × (1000 + 1000) (``bench/bench_lgcp.py --one 32
#: squared_exponential strong|weak --variance-kept 0.999``) strong data fit in 50.3 s, 63
#: leapfrog steps per draw, min cell ESS 3711, against 163.9–203.3 s, 127 steps, 1047–1189
#: with every mode; weak data 28.5 s against 58.6 s; at 128² and 256² every mode would take
#: 50 min to hours (README, Performance, part (d)). Calibration at 0.999:
#: tests/test_truncation.py's SBC. Matérn kernels keep every mode by default: their spectra
#: decay slowly, so a gain needs q ≈ 0.98, which drops 2 % of the variance — the user's
#: choice, not a silent default.
DEFAULT_VARIANCE_KEPT = {"squared_exponential": 0.999}


#: above this many torus cells on every mode a fit is told to expect a long run and what
#: shortens it: 64² cells (a 128² torus) fit 4 × (1000 + 1000) in 3–6.5 min; at 128² cells
#: even a perfectly preconditioned sampler would take about 50 min (README, Performance (d))
LONG_RUN_TORUS_CELLS = 128 * 128


def variance_kept_option(model_spec, kernel: str) -> tuple[float, str]:
    """(variance_kept, where it comes from): the spec's ``model.variance_kept``, else the
    kernel's default (DEFAULT_VARIANCE_KEPT, 1 for kernels not listed), checked."""
    given = model_spec.options.get("variance_kept")
    if given is None:
        return DEFAULT_VARIANCE_KEPT.get(kernel, 1.0), f"default for kernel {kernel}"
    _check_variance_kept(given)
    return given, "model.variance_kept"


#: model.dropped_modes: what a truncated field does with the variance of the modes it drops
DROPPED_MODES = {
    "auto": "a per-cell term when the set-up screen (fields/truncation.cell_term_screen, at the pilot "
            "hyperparameters and the data's detections per cell) predicts that leaving the modes out would "
            "narrow the 90 % intervals below 85 % coverage, else leave them out",
    "per_cell": "put the dropped variance back as an independent term per grid cell",
    "leave_out": "leave the dropped modes out (the field is the kept modes only)",
}


def dropped_modes_option(model_spec) -> tuple[str, str]:
    """(model.dropped_modes, where it comes from), checked; default "auto"."""
    given = model_spec.options.get("dropped_modes")
    if given is None:
        return "auto", "default"
    if not isinstance(given, str) or given not in DROPPED_MODES:
        raise InputError(f"model.dropped_modes: one of {', '.join(repr(k) for k in DROPPED_MODES)} (what a "
                         f"truncated field, model.variance_kept < 1, does with the variance of the modes it "
                         f"drops), got {given!r}")
    return given, "model.dropped_modes"


def truncated_plan(stats, kernel, prior, variance_kept):
    """Spectral truncation (``fields.truncation``), data-independent part: the periodised
    spectrum on the 2×-padded torus and the modes kept for ``variance_kept`` of the prior
    variance at the shortest length scales. Returns (spectrum, report, lo, hi, basis)."""
    if kernel not in KERNEL_NAMES:
        plan(stats, kernel, prior)  # raises the unknown-kernel error
    _check_variance_kept(variance_kept)
    spacing, lo, hi = _bounds(stats, prior)
    lo2 = np.resize(lo, 2) if lo.size == 1 else lo
    hi2 = np.resize(hi, 2) if hi.size == 1 else hi
    geom = TorusGeometry(kernel, stats.grid.shape, spacing, torus_shape_for(stats.grid.shape, spacing, hi2, 0.0, 2.0))
    spectrum = Spectrum(geom, "periodised")
    report = periodised_report(spectrum, lo2, hi2)
    _refuse_wrapped(stats, spectrum, report, lo2, hi2)
    basis = mode_basis(geom, lo2, hi2, float(variance_kept))
    report["truncation"] = dict(basis.report)
    return spectrum, report, lo, hi, basis


def truncated_preconditioner(basis, counts, exposure, lo, hi, sigma_scale, cell_term="leave_out"):
    """Data-dependent part: pilot σ, ℓ from the binned pair correlation, w̄ = detections per
    torus cell for the partial centring, and the fixed map y = L z of
    ``fields.truncation.dense_preconditioner`` (identity above MAP_MAX_COEFFICIENTS coefficients).
    counts, exposure: (n_cells,) with 0 where a cell has no exposure. ``cell_term``: a
    model.dropped_modes value ("auto" decides by ``cell_term_screen`` at the pilot). With the
    per-cell term the arrays carry ``cell_weights`` (each cell's detections), and the map and
    w̄ see the data through it: a cell's weight w becomes w/(1 + w v̂), v̂ the term's variance
    at the pilot (the Gaussian approximation with the term integrated out). Returns
    (Preconditioner for the report, model arrays, report of the map with ``cell_term``)."""
    from ..fields.preconditioning import Preconditioner, pair_correlation_pilot
    from ..fields.truncation import cell_term_screen

    geom = basis.geom
    counts = np.asarray(counts, float)
    exposure = np.asarray(exposure, float)
    pilot = pair_correlation_pilot(counts, exposure, geom.grid_shape, geom.spacing, geom.kernel, lo, hi, sigma_scale)
    ls_pilot = np.resize(np.asarray(pilot["length_scale"], float), 2)
    screen = cell_term_screen(basis, pilot["sigma"], pilot["length_scale"],
                              float(np.sum(counts) / max(np.sum(exposure > 0), 1)))
    on = screen["needed"] if cell_term == "auto" else cell_term == "per_cell"
    weights = np.where(exposure > 0, counts + 0.5, 0.0)
    v_hat = 0.0
    if on:
        v_hat = screen["dropped_variance_per_cell"]  # the term's variance at the pilot σ, ℓ
        weights = weights / (1.0 + weights * v_hat)
    w_bar = float(np.sum(counts / (1.0 + counts * v_hat)) / geom.n_torus)
    m0, m1 = geom.torus_shape
    n0, n1 = geom.grid_shape
    exposed = np.zeros((m0, m1))
    exposed[:n0, :n1] = (exposure > 0).reshape(n0, n1)
    pre = Preconditioner((m0, m1), exposed, np.ones(geom.half_shape), w_bar, np.zeros((m0, m1)), 1.0, False, pilot)
    arrays = {"w_scale": jnp.asarray(w_bar), "modes": basis.arrays()}
    if on:
        arrays["cell_weights"] = jnp.asarray(np.where(exposure > 0, counts, 0.0))
        arrays.update({k: jnp.asarray(x) for k, x in level_coordinate(counts, exposure, weights).items()})
    rep = {"form": "identity", "reason": f"more than {MAP_MAX_COEFFICIENTS} coefficients"}
    if basis.n_latent <= MAP_MAX_COEFFICIENTS:
        lam = np.maximum(np.asarray(basis.eigenvalues(ls_pilot, pilot["sigma"] ** 2)), 0.0)
        d = 1.0 + w_bar * lam * basis.nonzero
        maps, rep = dense_preconditioner(basis, np.sqrt(lam / d), d, weights)
        arrays.update({k: jnp.asarray(v) for k, v in maps.items()})
    rep = {**rep, "cell_term": {"on": bool(on), "option": cell_term, "rule": DROPPED_MODES[cell_term],
                                "variance_at_pilot": v_hat, "screen": screen}}
    return pre, arrays, rep


def level_coordinate(counts, exposure, weights) -> dict:
    """The integrated per-cell term's baseline coordinate (:class:`TruncatedFieldKernels`):
    μ = level_centre + level_scale · level − level_weightsᵀ f, with level_weights w̃/Σw̃ (the
    pilot map's cell weights w̃ = w/(1 + w v̂), w = N_c + ½ on exposed cells), level_centre
    their weighted mean of log((N_c + ½)/E_c) — the data's level, so the level's posterior sits
    near 0 — and level_scale (Σ w̃)^{−1/2}, about its posterior sd. counts, exposure, weights
    (n_cells,), 0 where a cell has no exposure."""
    exposed = exposure > 0
    w = np.where(exposed, weights, 0.0)
    total = max(float(np.sum(w)), 1e-300)
    log_rate = np.where(exposed, np.log((counts + 0.5) / np.where(exposed, exposure, 1.0)), 0.0)
    return {"level_weights": w / total, "level_centre": float(np.sum(w * log_rate) / total),
            "level_scale": 1.0 / math.sqrt(total)}


def scipy_fast(n: int) -> int:
    import scipy.fft

    return int(scipy.fft.next_fast_len(n, real=True))


#: deepest NUTS tree during warmup for a truncated field with the pilot map; None: not
#: capped (numpyro's depth 10 in warmup as in sampling). A cap is NOT the default because
#: it broke strong data. Measured: with the map, sampling took 31 leapfrog steps per draw
#: (depth 5) in the weak-data bench cases, but the first warmup window, before the mass
#: matrix is adapted (identity: σ and ℓ have posterior sd ≈ 0.05–0.3 and correlate, so the
#: step size is 0.005–0.06), ran 100–250 steps per iteration for its ~100 iterations
#: (warmup 200, 1 chain, seeds 1 and 2, 128² Matérn 3/2 weak, q 0.98; a scratch script
#: running numpyro's MCMC.warmup with collect_warmup and the num_steps field: steps per 25
#: warmup iterations 3 200–5 000 in the first window uncapped, 1 200–1 500 at depth 6,
#: 580–750 at depth 5). 4 × (1000 + 1000), ``bench/bench_lgcp.py --one 128 matern32 weak
#: --variance-kept 0.98 --warmup-depth D``, one session: uncapped 200.9 s, depth 6 187.4 s,
#: depth 5 179.2 s (min cell ESS 4219, 3987, 4043; R-hat ≤ 1.007); 256² squared exponential
#: weak q 0.999: 207.8 s uncapped, 175.5 s at depth 5. But 256² squared exponential strong,
#: 1 × (300 + 300), depth 5: 1021 steps per draw after warmup and min cell ESS 1.3
#: (uncapped, in an earlier session and again in a later one: 32.2 steps, ESS 13.0) —
#: capped warmup draws are autocorrelated, so the adapted mass matrix is wrong where the
#: data are strong. What the cap was after — the first window's long trees —
#: INITIAL_HYPER_VARIANCE removes without it.
WARMUP_TREE_DEPTH = None

#: variance per unconstrained coordinate (log σ, logit of each ℓ's unit position) of the
#: (σ, ℓ) block of the inverse mass matrix that warmup starts from, for every LGCP field —
#: truncated (with or without the pilot map) and full torus, where the block also holds the
#: soft direction's white coordinate, started at 1 (numpyro starts the whole block at the
#: identity; its first mass-matrix window ends after 100 warmup iterations). Warmup adapts
#: the block from this start by numpyro's usual windows; trees are not capped. With the identity σ and ℓ (posterior sd ≈ 0.05–0.3 in
#: these coordinates, correlated) forced step sizes of 0.005–0.06 and 100–250 leapfrog
#: steps per iteration in the first window. Measured (scratch script: numpyro MCMC.warmup,
#: 1 chain, warmup 300, collect_warmup and the num_steps field): 128² Matérn 3/2 weak q
#: 0.98, seed 1, warmup steps in all 21 590 with the identity, 14 714 of them in the first
#: 100 iterations; 9 862 (3 032) starting at 0.01, 10 860 at 0.03, 10 744 at 0.003. 256²
#: squared exponential strong q 0.999, seeds 1–3: 25 169, 26 796, 35 618 with the identity
#: against 24 620, 20 919, 19 878 at 0.01 (0.003 was worse there: 33 616, seed 1). Adapted
#: block at the end of the warmups printed: var(log σ) 0.008–0.013, var of ℓ's logit
#: 0.065–0.084 (weak) and 0.002–0.004 (strong). Bench, one session, one run at a time,
#: start 1 (numpyro's identity) against 0.01: ``bench/bench_lgcp.py --one 128 matern32 weak
#: --variance-kept 0.98 [--start-hyper-variance 1]``, 4 × (1000 + 1000): 208.2 s against
#: 178.4 and 180.6 s (two runs); ``--one 256 squared_exponential weak --variance-kept
#: 0.999``: 200.9 s against 179.7 and 184.0 s (31 steps per draw in all); ``--one 256
#: squared_exponential strong --chains 1 --warmup 300 --draws 300 --variance-kept 0.999``:
#: min cell ESS 13.0 in 65.6 s (32.2 steps per draw) against 45.9 in 78.0 s (63 steps per
#: draw; one chain, one seed). Not measured: with per-scan terms (where ρ₀ is sampled too),
#: anisotropic ℓ, or the dense form of the map.
#: Full torus (a later session; the same scratch script, 1 chain, warmup 1000, one core;
#: 32² Matérn 3/2, the bench's part (c) data): with the identity the first 100 warmup
#: iterations averaged 67–71 leapfrog steps at 1× the scans and 167–169 at 10×, warmup
#: 30 422–31 407 and 41 710–42 514 steps in all (seeds 1, 2); at 0.01: 26–27 and 28–35 per
#: iteration, 26 280–26 514 and 27 966–28 862 steps (seeds 1–3). Starting the field's white
#: coordinates at 0 instead of numpyro's uniform(−2, 2) changed nothing (first window
#: 74–79 and 152–180). Bench, one session, one run at a time, ``--start-hyper-variance 1``
#: (the identity) against the default: ``--parts c`` 47.4 / 68.6 s (ratio 1.45) against
#: 45.2 / 58.4 s (1.29), min cell ESS 1611 / 1545 against 1662 / 1539; ``--one 64 matern32
#: strong`` 454.6 s against 380.4 s, 63 steps per draw in both, min cell ESS 2037 against
#: 1953, max R-hat 1.008 in both (single runs; the 1× part (c) time alone varied 41.1–47.4 s
#: between runs of the same code that session). The demo's map (polar, full torus, one
#: length scale per axis) passed its convergence gate with this start in CI (``sceneprior
#: demo --quiet``: "demo finished in 44 s"). Not measured: a truncated field without the
#: map (form "identity"), per-scan terms, and lgcp_sites (which starts at the identity).
INITIAL_HYPER_VARIANCE = 0.01

#: Why a truncated field with the pilot map runs the chains of each chain process vectorised
#: (``inference.run_chains_in_processes``; set through ``extra["vectorize_chain_groups"]``):
#: its gradient is cheaper per chain when batched, and lockstep wastes nothing when every
#: chain's trees have the same depth. Measured with a scratch script (numpyro MCMC.run of
#: 100 draws after a warmup of 150, timed on its second call, ``taskset -c 0``): per chain
#: and leapfrog step, 2 chains vectorised against 1 chain (two runs each), 1.56–1.58 against
#: 1.72–1.75 ms at 128² Matérn 3/2 q 0.98 (4 797 coefficients) and 1.46–1.50 against
#: 1.59–1.71 ms at 256² squared exponential q 0.999 (1 765). Not for the full torus, where
#: vectorised NUTS bookkeeping cost more than it saved (``inference.chain_layout``), nor
#: without the map (trees of varying depth).


#: after warmup, each NUTS transition's step size is the adapted one × U(1 − j, 1 + j)
#: (``inference.jittered_step_size``); 0: numpyro's fixed step size. NOT on by default: it
#: dilutes a resonance but does not remove it. Measured on the 32² Matérn 3/2 bench fit
#: (``bench/bench_lgcp.py --one 32 matern32 weak``'s set-up and data, 4 × (1000 + 1000), seed
#: 1, chains one after another on one core; scratch scripts): at the adapted step sizes
#: (0.195, 0.198, 0.180, 0.176) the chains took 31, 295, 31, 31 leapfrog steps per draw.
#: Continued from the end of warmup at the adapted step size × 0.85 … 1.15 (40 draws per
#: factor), chains 1 and 2 both resonate in the same narrow band of step sizes, 0.196–0.205
#: (184–429 steps per draw; our reading: for unit-scale directions the leapfrog period there,
#: 2π/0.2 ≈ 32 steps, is a power of two, and the no-U-turn criterion misses the turn), take
#: 31 steps below it and 15 above it (acceptance
#: rates 0.79–0.87 below, 0.70–0.81 above). Dual averaging towards an acceptance of 0.8 ended
#: at or just below the band in both (our reading: inside the band the acceptance, 0.76–0.85,
#: no longer falls steadily with the step size). With j = 0.1 the same run took 68.8, 58.5,
#: 38.5, 31 steps per draw (min cell ESS 1798 against 2126 at j = 0): the resonating chain
#: 5× cheaper, the two near the band 1.2–2.2× dearer — a jittered step falls into the band
#: some of the time wherever the band is within reach. Bench flag ``--step-size-jitter``;
#: read through :func:`sampler_constants`.
STEP_SIZE_JITTER = 0.0

#: NUTS trees with the extra U-turn checks of ``sceneprior.nuts_tree`` (across the halves of
#: every merged subtree), which stop the resonating trajectories above: the same 32² run
#: (4 × (1000 + 1000), seed 1, chains one after another on one core, timed until the draws
#: were computed) took 31, 31, 31, 31 leapfrog steps per draw (adapted step sizes 0.194,
#: 0.179, 0.184, 0.160) in 79.0 s, min cell ESS 1798, ESS of σ 650, against 31, 295, 31, 31
#: steps in 154.5 s, 2126, 731 without them (min cell ESS per second 22.8 against 13.8; per
#: draw lower, one seed — not separated from chain-to-chain noise). Where nothing resonates
#: they cost no time: 128² Matérn 3/2 weak q 0.98, ``bench/bench_lgcp.py --one 128 matern32
#: weak --variance-kept 0.98``, 4 × (1000 + 1000): 201.3 s with, 201.0 s without (one
#: session, 31 steps per draw in both). Bench flag ``--extra-uturn-checks 0|1``; read
#: through :func:`sampler_constants`.
EXTRA_UTURN_CHECKS = True

#: mean acceptance probability warmup's step-size adaptation aims at (numpyro's default
#: 0.8). A lower target buys larger steps and shorter trees but not more ESS per second:
#: ``bench/bench_lgcp.py --one 128 matern32 weak --variance-kept 0.98 --target-accept T``,
#: one session: T = 0.8 192.2 s, 31 steps per draw, min cell ESS 3970 (20.7 per s); T =
#: 0.65 163.5 s, 22.4 steps, 2373 (14.5 per s). Bench flag ``--target-accept``; read
#: through :func:`sampler_constants`.
TARGET_ACCEPT = 0.8


def sampler_constants() -> dict:
    """The NUTS options above as ``setup.extra`` carries them (``fitting.nuts_options`` reads
    them), for ``setup`` here and in ``lgcp_sites``."""
    return {"step_size_jitter": STEP_SIZE_JITTER,  # 0: numpyro's fixed step size
            "extra_uturn_checks": EXTRA_UTURN_CHECKS, "target_accept": TARGET_ACCEPT}


#: the field's white coordinates start at their conditional posterior mode at the pilot σ,
#: ℓ, plus U(−START_RADIUS, START_RADIUS) per coordinate drawn per chain (numpyro's own start
#: is U(−2, 2) around 0). Why: with strong data the posterior of the white coordinates sits
#: far from 0 (the partially centred modes carry the data), so a start around 0 is a field
#: unrelated to the data, and warmup's first trajectories fall down a potential millions of
#: nats high. Measured (2026-12-03, sixth session; scratch scripts on
#: bench/bench_lgcp.py's 256² squared exponential strong data, q 0.999, the chains 3 and 4 of
#: a 4-chain fit, seed 1): run vectorised as in a chain process, chain 3 ended the first 25
#: warmup iterations 4.7 × 10⁵ nats above chain 4 at a short length scale, with a step size
#: of 10⁻⁸–10⁻⁷ and 1 023 leapfrog steps per iteration for the rest of the first 150 (the
#: full-length fit's chain group did not finish in 29 min); the same two chains one at a time
#: took 31 steps per draw and 2 min each. START_RADIUS keeps the chains' starts apart at
#: about the posterior's scale in these coordinates, so R-hat still compares dispersed starts.
START_RADIUS = 2.0
#: the chain_start report of a set-up without the start search (``setup(start_search=False)``)
NOT_SEARCHED = {"white_coordinates": "numpyro's start, U(−2, 2) around 0 (no mode search)"}
#: most L-BFGS iterations for that mode (set-up time; any point nearer the mode helps)
START_MAXITER = 200


def init_near(site=None, values=None, centred=(), radius=START_RADIUS):
    """numpyro init strategy: a site named in ``values`` starts at its value, and one also in
    ``centred`` (unconstrained Normal sites) at value + U(−radius, radius) per coordinate,
    drawn from the site's own key as numpyro's ``init_to_uniform`` draws around 0; other
    sites as ``init_to_uniform``."""
    from numpyro.infer import init_to_uniform

    if site is None:
        return partial(init_near, values=values, centred=centred, radius=radius)
    if site["type"] != "sample" or site["is_observed"]:
        return None
    name = site["name"]
    if name not in values:
        return init_to_uniform(site)
    if name not in centred:
        return values[name]
    v = jnp.asarray(values[name])
    shape = tuple(site["kwargs"].get("sample_shape", ())) + v.shape
    return v + jax.random.uniform(site["kwargs"]["rng_key"], shape, minval=-radius, maxval=radius, dtype=v.dtype)


def mode_search(negative, n: int, held: str) -> tuple[np.ndarray, dict]:
    """Minimise ``negative`` (a jax function of a length-n vector: minus a model's log
    density in its white coordinates, the rest held; ``held`` says what is held, for the
    report) by L-BFGS-B (scipy.optimize, Byrd, Lu, Nocedal & Zhu 1995) from 0 with at most
    START_MAXITER iterations, one compiled value and gradient. Returns (x, report); x = 0 if
    the search fails. Only a chains' starting point: the posterior does not depend on it."""
    import scipy.optimize

    value_grad = jax.jit(jax.value_and_grad(negative))

    def fun(x):
        v, g = value_grad(jnp.asarray(x))
        return float(v), np.asarray(g, float)

    x0 = np.zeros(n)
    f0 = fun(x0)[0]
    res = scipy.optimize.minimize(fun, x0, jac=True, method="L-BFGS-B", options={"maxiter": START_MAXITER})
    ok = bool(np.all(np.isfinite(res.x)) and np.isfinite(res.fun) and res.fun <= f0)
    report = {"white_coordinates": (f"conditional posterior mode given {held} (L-BFGS-B) + U(−{START_RADIUS:g}, "
                                    f"{START_RADIUS:g}) per coordinate and chain" if ok else
                                    f"U(−{START_RADIUS:g}, {START_RADIUS:g}) around 0 (the mode search failed)"),
              "mode_search_iterations": int(res.nit), "log_density_gain_nats": float(f0 - res.fun) if ok else 0.0,
              "mode_search_converged": bool(res.success)}
    return (res.x if ok else x0), report


def conditional_mode(inputs: dict, sigma: float, ls) -> tuple[dict, dict]:
    """The field's white coordinates at the mode of their conditional posterior given σ and
    ℓ (the model's density with ρ₀ integrated out; per-scan terms left out), by
    :func:`mode_search`; with the integrated per-cell term, the kept modes and the level
    (μ sampled, the term integrated out). Returns ({site: value} for ``lgcp_model``'s white
    sites, report)."""
    kernels, pre = inputs["kernels"], inputs["precond"]
    counts, exposure, obs, area = (jnp.asarray(inputs[k]) for k in ("counts", "exposure", "obs", "window_area"))
    a, b = inputs["gamma_a"], inputs["gamma_b"]
    sig, lsj = jnp.asarray(sigma, float), jnp.asarray(ls, float)
    truncated = isinstance(kernels, TruncatedFieldKernels)

    cells = truncated and kernels.cell_term  # the per-cell term, integrated out (no per-scan terms here)
    K = kernels.n_latent if truncated else kernels.n_torus

    def negative(x):
        if cells:  # the model's density with the term integrated out, μ through the level (lgcp_model)
            f, log_prior_u, mu, _, loglik = kernels.evaluate_marginal(x[:K], x[K], sig, lsj, pre)
            return -(log_prior_u + baseline_log_prior(mu, a, b) + loglik)
        u = x[:K] if truncated else kernels.rotate(x[0], x[1:], pre["householder"])
        f, log_prior_u, log_z, _ = kernels.evaluate(u, sig, lsj, pre, exposure, obs, area)
        return -(log_prior_u + integrated_loglik(f, log_z, pre, obs, counts, a, b))

    x, report = mode_search(negative, K + (1 if cells else 0), "σ, ℓ at the pilot")
    sites = ({"u_modes": x[:K]} | ({"level": np.asarray(x[K])} if cells else {}) if truncated
             else {"u_soft": np.asarray(x[0]), "u_rest": x[1:]})
    return sites, report


def exposed_cells(pre: dict, mu: float, field) -> tuple[np.ndarray, np.ndarray]:
    """(N_c, η_c = log E_c + μ + f_c) on the cells with exposure, from the model arrays
    (``grid_data``) and a field on every grid cell: the per-cell term's inputs, numpy."""
    log_e = np.asarray(pre["log_exposure_grid"], float)
    exposed = np.isfinite(log_e)
    return np.asarray(pre["counts_grid"], float)[exposed], log_e[exposed] + mu + np.asarray(field, float)[exposed]


def size_quadrature(inputs: dict, start_sites: dict, sigma: float, ls, v_pilot: float) -> tuple[int, dict]:
    """The rule of the integrated per-cell term (``models.cell_term``: Gauss–Hermite nodes, or
    ``cell_term.LAPLACE``). With the chains' start (``conditional_mode``: the kept field and
    level at the pilot σ, ℓ): the cheapest rule — the second-order Laplace expansion, then the
    fewest Gauss–Hermite nodes — whose error, summed over the exposed cells at the start's
    η = log E_c + μ + f_c, is
    within QUADRATURE_NOTE_NATS at the term variance there and at QUADRATURE_MARGIN times the
    larger of it and the pilot's (``cell_term.nodes_for_cells``; the most nodes, reported as
    beyond the budget, if none is within it) — the summary's check (``dropped_modes``) measures
    the same error again at the posterior's largest variance. Without a start: the table,
    ``cell_term.nodes_for``, at QUADRATURE_MARGIN times the pilot's variance (its worst cell
    of any data set within 1e-7 nats). Returns (nodes, report)."""
    kernels, pre = inputs["kernels"], inputs["precond"]
    table = nodes_for(QUADRATURE_MARGIN * v_pilot)
    if "u_modes" not in start_sites or "level" not in start_sites:
        return table, {"nodes": table, "quadrature": rule_name(table),
                       "rule": f"cell_term.nodes_for at {QUADRATURE_MARGIN:g}× the term's variance at the pilot (no "
                               "chains' start to size it on: no start search, or it failed)"}
    f, _, mu, v, _ = kernels.evaluate_marginal(jnp.asarray(start_sites["u_modes"]), jnp.asarray(start_sites["level"]),
                                               jnp.asarray(sigma, float), jnp.asarray(ls, float), pre)
    variances = sorted({float(v), QUADRATURE_MARGIN * max(float(v), v_pilot)})
    nodes, tried = nodes_for_cells(*exposed_cells(pre, float(mu), np.asarray(f, float)), variances,
                                   QUADRATURE_NOTE_NATS)
    within = tried.get(nodes) is not None and tried[nodes] <= QUADRATURE_NOTE_NATS
    # the Laplace expansion only up to the largest variance it was measured at
    bound = {"laplace_up_to_variance": max(variances), "above_it": rule_name(GH_NODES)} if nodes == LAPLACE else {}
    return nodes, {"nodes": nodes, "quadrature": rule_name(nodes), **bound, "table_nodes": table,
                   "term_variances": variances, "within_budget": within,
                   "summed_error_nats_by_nodes": {str(k): e for k, e in tried.items()},
                   "rule": (f"the cheapest rule — the second-order Laplace expansion (nodes {LAPLACE}), then the "
                            f"fewest Gauss–Hermite nodes — whose error against a {REFERENCE_NODES}-node rule, summed "
                            "over the exposed "
                            f"cells at the chains' start (conditional mode at the pilot σ, ℓ), is within "
                            f"{QUADRATURE_NOTE_NATS:g} nats at the term variance there and at {QUADRATURE_MARGIN:g}× "
                            f"the larger of it and the pilot's (used where the term is integrated out: without "
                            f"per-scan terms)")}


def setup(stats, prior: dict, model_spec, use_pad: bool | None = None, start_search: bool = True):
    """The model's inputs and sampler settings for binned ``stats``. ``use_pad``: force the
    padding correction on or off (None: by the data). ``start_search`` False skips the
    conditional-mode search for the chains' start (the white coordinates then start as
    numpyro's U(−2, 2) around 0): for callers that start their chains themselves, such as a
    run compiled once for many data sets."""
    from .registry import ModelSetup

    kernel = model_spec.options.get("kernel", "matern32")
    variance_kept, kept_source = variance_kept_option(model_spec, kernel)
    dropped, dropped_source = dropped_modes_option(model_spec)  # checked whether or not modes are dropped
    advice = []  # lines the fit prints before sampling
    with_map = False  # a truncated field with the pilot map: warmup depth and chain groups below
    cell_term_on = False  # a truncated field with the per-cell term (model.dropped_modes)
    obs = np.flatnonzero(stats.exposure > 0)
    a, b = gamma_prior(prior["rate_median"], prior["rate_log_sd"], stats.window_total)
    counts_all = np.zeros(stats.grid.n_cells)
    counts_all[obs] = stats.counts[obs]
    exposure_all = np.where(stats.exposure > 0, stats.exposure, 0.0)
    if variance_kept != 1.0:
        spectrum, report, lo, hi, basis = truncated_plan(stats, kernel, prior, variance_kept)
        report["truncation"]["variance_kept_source"] = kept_source
        note_wrap(advice, stats, spectrum, report, lo, hi)
        pre, precond, mode_map = truncated_preconditioner(basis, counts_all, exposure_all, lo, hi,
                                                          prior["sigma_scale"], cell_term=dropped)
        cell_term = mode_map.pop("cell_term")
        report["truncation"]["mode_preconditioner"] = mode_map
        report["truncation"]["cell_term"] = {**cell_term, "source": dropped_source}
        cell_term_on = bool(cell_term["on"])
        # the quadrature sized by the table for 4× the term's variance at the pilot (σ, ℓ move in
        # the posterior); on the fit's own cells once the chains' start is known (size_quadrature)
        kernels = TruncatedFieldKernels(basis, cell_term_on, nodes_for(QUADRATURE_MARGIN * cell_term["variance_at_pilot"]))
        n_latent = basis.n_latent + (1 if cell_term_on else 0)  # the term integrated out; the level sampled
        dense_mass, exclude = [("sigma", "ls_unit")], ["u_modes"]
        with_map = report["truncation"]["mode_preconditioner"]["form"] != "identity"
        if cell_term_on:
            without = 100 * cell_term["screen"]["predicted_coverage_without_term"]["90"]
            advice.append(f"the truncated field carries its dropped modes' variance in a term per cell "
                          f"(model.dropped_modes = {dropped!r}), integrated out cell by cell and drawn afterwards "
                          f"(with per-scan terms: {stats.grid.n_cells} more sampled values)" + (
                              "" if dropped != "auto" else
                              f"; without it the set-up's screen predicts that 90 % intervals would cover about "
                              f"{without:.0f} % of the true cells"))
    else:
        if dropped_source == "model.dropped_modes" and dropped != "leave_out":
            advice.append(f"model.dropped_modes = {dropped!r} has no effect here: every torus mode is kept "
                          "(model.variance_kept = 1)")
        spectrum, report, lo, hi = plan(stats, kernel, prior)
        note_wrap(advice, stats, spectrum, report, lo, hi)
        pre = build_preconditioner(spectrum, stats.grid.shape, counts_all, exposure_all,
                                   kernel, lo, hi, prior["sigma_scale"], use_pad=use_pad)
        kernels, precond, basis = FieldKernels(spectrum, pre.use_pad), pre.arrays(), None
        n_latent, dense_mass, exclude = spectrum.geom.n_torus, [("sigma", "ls_unit", "u_soft")], ["u_rest"]
        if n_latent > LONG_RUN_TORUS_CELLS:
            q = DEFAULT_VARIANCE_KEPT.get(kernel, 0.98)
            shorter = ("Matérn 1/2 keeps nearly every mode under truncation, so a coarser grid (64² cells or "
                       "fewer) is what shortens it" if kernel == "matern12" else
                       f"model.variance_kept = {q:g} keeps the modes with {100 * q:g} % of the prior variance "
                       f"(Matérn 3/2 at 128² cells and the squared exponential at 256² fit in about 2 min with "
                       f"weak data; Matérn 3/2 with strong data at 128² in about 3–4 min at variance_kept = 0.9, "
                       f"with the per-cell term that model.dropped_modes = \"auto\" adds there)")
            advice.append(f"every one of the {n_latent} torus modes is sampled: expect a long run at this size "
                          f"(128² cells: about 50 min or more for 4 × (1000 + 1000)); {shorter} — README, "
                          f"Performance")
    precond = {**precond, **grid_data(stats.counts[obs].astype(float), stats.exposure[obs], obs, stats.grid.n_cells)}
    inputs = dict(
        counts=stats.counts[obs].astype(float), exposure=stats.exposure[obs],
        window_area=stats.window_area, obs=obs, gamma_a=a, gamma_b=b,
        sigma_scale=prior["sigma_scale"], ls_lo=lo, ls_hi=hi,
        precond=precond, kernels=kernels,
    )
    u_pilot = np.clip((np.log(np.asarray(pre.pilot["length_scale"])) - np.log(lo)) / (np.log(hi) - np.log(lo)),
                      0.05, 0.95)
    ls_pilot = lo * (hi / lo) ** u_pilot[: lo.size]
    start_sites, start_report = (conditional_mode(inputs, max(pre.pilot["sigma"], 0.05), ls_pilot) if start_search
                                 else ({}, NOT_SEARCHED))
    if cell_term_on:  # the quadrature: on the fit's own cells at the chains' start where the search found one
        found = start_search and start_report.get("log_density_gain_nats", 0.0) > 0.0  # mode_search: 0 if it failed
        nodes, sizing = size_quadrature(inputs, start_sites if found else {}, max(pre.pilot["sigma"], 0.05),
                                        ls_pilot, cell_term["variance_at_pilot"])
        if nodes != kernels.nodes:
            kernels = inputs["kernels"] = TruncatedFieldKernels(basis, True, nodes,
                                                                sizing.get("laplace_up_to_variance", math.inf))
        report["truncation"]["cell_term"]["quadrature"] = sizing
        if not sizing.get("within_budget", True):
            worst = sizing["summed_error_nats_by_nodes"][str(nodes)]
            advice.append(f"the per-cell term's quadrature, at its most nodes ({nodes}), is off by "
                          f"{'a non-finite amount' if worst is None else f'{worst:.2g} nats'} summed over the cells at "
                          f"the chains' start, beyond the {QUADRATURE_NOTE_NATS:g} it is sized for (summary.json: "
                          f"lgcp.embedding.truncation.cell_term.quadrature)")

    extra = {
        "kernel": kernel, "geom": spectrum, "embedding": report, "preconditioner": pre,
        "variance_kept_source": kept_source, "advice": advice,
        "ls_bounds": {"min": lo.tolist(), "max": hi.tolist()},
        "gamma_prior": (a, b),
        "n_latent": n_latent, "modes": basis,
        "dense_mass": dense_mass,
        "exclude_sites": exclude,
        "warmup_tree_depth": WARMUP_TREE_DEPTH if with_map else None,
        # the (σ, ℓ per axis[, soft direction]) block of the mass matrix warmup starts from:
        # σ and ℓ at INITIAL_HYPER_VARIANCE, the soft direction's white coordinate at numpyro's 1
        "initial_inverse_mass": {dense_mass[0]: np.diag([INITIAL_HYPER_VARIANCE] * (1 + lo.size)
                                                        + [1.0] * ("u_soft" in dense_mass[0]))},
        # with the map every chain takes the same trees (31 steps per draw in the weak-data
        # bench cases), so chain processes may run theirs vectorised (see the comment after
        # WARMUP_TREE_DEPTH) — but not with the integrated per-cell term, whose per-cell work
        # does not gain from it: 128² Matérn 3/2 strong, q 0.95 (``--one 128 matern32 strong
        # --variance-kept 0.95``, one run each), two processes of two vectorised chains had not
        # finished after 11 min (killed); each running its two chains one after another (the
        # layout used) 638.5 s; the four chains at once (the parallel layout, which grid_latent
        # below rules out for its memory growth) 586.3 s
        "vectorize_chain_groups": with_map and not cell_term_on,
        # with per-scan terms (``models.variants``) the per-cell term is sampled: a grid-sized
        # latent site, so chain processes, not the parallel layout (inference.chain_layout), each
        # running its chains one after another — its 16 384 values at 128² make vectorised NUTS
        # bookkeeping dear: 767.7 s vectorised against 651.6 s (``--one 128 matern32 strong
        # --variance-kept 0.95`` before the term was integrated out, one run each)
        "with_scan_terms": ({"grid_latent": True, "vectorize_chain_groups": False,
                             "exclude_sites": exclude + ["u_cells"], "n_latent": n_latent - 1 + stats.grid.n_cells}
                            if cell_term_on else {}),
        # the integrated per-cell term: per-cell work in every gradient, so chain processes too
        # (measured in parallel at 128²: memory grew by about 4.6 MB/s)
        "grid_latent": cell_term_on,
        **sampler_constants(),
        # σ, ℓ at the pilot; the field's white coordinates around their conditional mode there
        # (chain_start); ρ₀ (sampled only with per-scan terms) at its conditional mean given a
        # flat field
        "init_strategy": partial(init_near, values={
            "sigma": max(pre.pilot["sigma"], 0.05), "ls_unit": u_pilot[: lo.size],
            "rho0": (a + float(stats.counts[obs].sum())) / (b + float(stats.exposure[obs].sum())),
            **start_sites}, centred=tuple(start_sites), radius=START_RADIUS),
        "chain_start": start_report,
        "complete": complete_posterior,
        "dims": {"length_scale": ["axis"], "ls_unit": ["axis"], "field": ["cell"]},
        "coords": {"axis": list(stats.grid.axes[: lo.size]) if lo.size == 2 else ["isotropic"]},
    }
    return ModelSetup(inputs=inputs, extra=extra)


def complete_posterior(idata, stats, setup, seed: int):
    """Add the exactly drawn baseline to the posterior: ρ₀ | f ~ Gamma(a + S, b + Z(f)) per
    draw, μ = log ρ₀, and the rate Σ_c λ_c |c ∩ W| = ρ₀ · exp(log_window_integral).
    Runs with per-scan terms sampled ρ₀ (and the rate) already: nothing to add. A truncated
    field with the per-cell term integrated out (site ``term_variance``) sampled μ; its term
    is drawn here (:func:`complete_cell_term`)."""
    post = idata.posterior
    if "term_variance" in post:
        if post["field"].attrs.get("includes_cell_term"):  # drawn already
            return idata
        return complete_cell_term(idata, stats, setup, seed)
    if "mu" in post:
        return idata
    a, b = setup.extra["gamma_prior"]
    total = float(np.sum(setup.inputs["counts"]))
    log_z = np.asarray(post["log_z"], float)
    rng = np.random.default_rng([seed, 20261202])
    g = rng.standard_gamma(a + total, size=log_z.shape)
    mu = np.log(g) - np.logaddexp(np.log(b), log_z)
    rate = np.exp(mu + np.asarray(post["log_window_integral"], float))
    post["mu"] = (("chain", "draw"), mu)
    post["rate"] = (("chain", "draw"), rate)
    post["mu"].attrs.update(units="log(m-2 scan-1)", long_name="baseline log intensity μ = log ρ₀, drawn from "
                            "its exact conditional Gamma(a + S, b + Z)")
    post["rate"].attrs.update(units="detections per scan", long_name="expected detections per scan in the window")
    return idata


def complete_cell_term(idata, stats, setup, seed: int, chunk_values: int = 1 << 21, workers: int | None = None):
    """Draw the integrated-out per-cell term ε exactly, per kept draw and cell, from p(ε | N_c,
    μ + f_c, v) (``cell_term.draw_terms``), and add it: ``field`` becomes f + ε (float32), the
    window integral and ``rate`` = e^μ Σ_c |c ∩ W| e^{f_c + ε_c} follow. Cells without exposure
    draw ε from its prior N(0, v). In chunks of draws of about ``chunk_values`` cell values,
    ``workers`` chunks at a time in threads — numpy's array operations release the GIL —
    (default: the usable cores, at most 2, so that the memory in flight stays about that of
    2 chunks, 0.5 GB), each chunk with its own random stream (seed, chunk), so the draws do
    not depend on the number of workers."""
    from concurrent.futures import ThreadPoolExecutor

    import scipy.special

    from ..inference import usable_cores
    from .cell_term import draw_terms

    post = idata.posterior
    field = post["field"].values  # (chain, draw, cell) float32
    mu = np.asarray(post["mu"], float)
    v = np.maximum(np.asarray(post["term_variance"], float), TERM_VARIANCE_FLOOR)
    n_cells = field.shape[-1]
    pre = setup.inputs["precond"]  # N_c and log E_c on every grid cell (grid_data)
    counts, log_e = np.asarray(pre["counts_grid"], float), np.asarray(pre["log_exposure_grid"], float)
    area = np.asarray(setup.inputs["window_area"], float)  # stats.window_area
    inside = area > 0
    log_area = np.log(area[inside])
    flat_f, flat_mu, flat_v = field.reshape(-1, n_cells), mu.reshape(-1), v.reshape(-1)
    out = np.empty_like(flat_f)
    log_w = np.empty(flat_mu.size)
    step = max(1, chunk_values // n_cells)

    def chunk(i):
        rng = np.random.default_rng([seed, 20261204, i])
        f = flat_f[i:i + step].astype(float)
        g = f + draw_terms(counts, log_e[None, :] + flat_mu[i:i + step, None] + f, flat_v[i:i + step], rng)
        out[i:i + step] = g
        log_w[i:i + step] = scipy.special.logsumexp(g[:, inside] + log_area, axis=1)

    pool = ThreadPoolExecutor(max_workers=workers or min(2, usable_cores()))
    try:
        for _ in pool.map(chunk, range(0, flat_mu.size, step)):  # a chunk's error is raised here
            pass
    finally:
        pool.shutdown(wait=True, cancel_futures=True)  # after an error, the chunks not started are dropped
    post["field"] = (post["field"].dims, out.reshape(field.shape), dict(post["field"].attrs))
    shape = mu.shape
    post["log_window_integral"] = (("chain", "draw"), log_w.reshape(shape))
    post["rate"] = (("chain", "draw"), np.exp(mu + log_w.reshape(shape)))
    post["field"].attrs["long_name"] = ("log λ − μ per cell: the kept modes' field plus the per-cell term, "
                                        "drawn exactly given the sampled draw")
    post["field"].attrs["includes_cell_term"] = 1
    post["mu"].attrs.update(units="log(m-2 scan-1)", long_name="baseline log intensity μ = log ρ₀ (sampled)")
    post["rate"].attrs.update(units="detections per scan", long_name="expected detections per scan in the window")
    return idata


def simulate_field(spectrum: Spectrum, length_scale, sigma: float, rng: np.random.Generator) -> np.ndarray:
    """One draw of the zero-mean field on the grid cells (n0·n1,) from the model's own torus
    covariance, every mode included: f = irfft2(√Λ · rfft2(w))[:n0, :n1], w ~ N(0, I)
    (Wood & Chan 1994, §2.2). For tests, benchmarks and simulated scenes."""
    from ..fields.embedding import sample_field

    lam = np.asarray(spectrum.eigenvalues(np.resize(np.asarray(length_scale, float), 2), sigma**2), float)
    w = rng.standard_normal(spectrum.geom.torus_shape)
    return np.asarray(sample_field(spectrum.geom, lam, w), float).reshape(-1)


def prior_draws(prior: dict, stats, setup, rng: np.random.Generator, n: int) -> dict:
    """Independent draws from the model's prior (for the prior predictive check): ρ₀ ~
    Gamma(a, b), σ, ℓ from their priors and the field by circulant embedding with every
    torus mode (``simulate_field``); returns (n,) arrays ``rate`` = ρ₀ Σ_c |c ∩ W| e^{f_c}
    [detections per scan], ``mu``, ``sigma`` — with spectral truncation, the field from the
    kept modes (plus the per-cell term when the fit has it), as the model has it. (numpyro's
    Predictive cannot sample this model's field: its white coordinates get their prior
    through a factor.)"""
    a, b = setup.extra["gamma_prior"]
    inp = setup.inputs
    lo, hi = np.asarray(inp["ls_lo"], float), np.asarray(inp["ls_hi"], float)
    spectrum = setup.extra["geom"]
    rho0 = rng.gamma(a, 1.0 / b, n)
    sigma = np.abs(rng.normal(0.0, inp["sigma_scale"], n))
    ls = lo[None, :] * (hi / lo)[None, :] ** rng.beta(2.0, 2.0, (n, lo.size))
    area = stats.window_area
    inside = area > 0
    log_w = np.empty(n)
    basis = setup.extra.get("modes")
    arr = basis.arrays() if basis is not None else None
    for i in range(n):
        if basis is None:
            f = simulate_field(spectrum, ls[i], sigma[i], rng)
        else:  # the truncated field the model samples: the kept modes (and the per-cell term)
            lam = np.maximum(np.asarray(basis.eigenvalues(np.resize(ls[i], 2), sigma[i] ** 2)), 0.0)
            f = np.asarray(field_from_coefficients(jnp.asarray(rng.standard_normal(basis.n_latent)), jnp.sqrt(lam),
                                                   arr, basis.box_shape, basis.geom.grid_shape))
            if setup.inputs["kernels"].cell_term:
                v = float(basis.residual_variance(lam, sigma[i] ** 2, np.resize(ls[i], 2)))
                f = f + math.sqrt(v) * rng.standard_normal(f.size)
        log_w[i] = np.logaddexp.reduce(f[inside] + np.log(area[inside]))
    with np.errstate(over="ignore"):
        rate = np.exp(np.log(rho0) + log_w)
    return {"rate": rate, "mu": np.log(rho0), "sigma": sigma}


def cell_log_intensity(posterior: dict, setup=None) -> np.ndarray:
    """(chain, draw, n_cells) float32 log λ draws: μ + f."""
    mu = np.asarray(posterior["mu"], np.float32)
    return np.asarray(posterior["field"], np.float32) + mu[..., None]


def cell_intensity(posterior: dict, stats, setup) -> np.ndarray:
    return np.exp(cell_log_intensity(posterior, setup))


#: how the length-scale bounds default (text for describe_prior)
LENGTH_SCALE_DEFAULTS = {"length_scale_min": "2 cell spacings",
                         "length_scale_max": "a quarter of the region's extent along the axis"}


def length_scale_lines(prior: dict, stats, note: str = "") -> list[str]:
    """The length-scale prior per axis as text (units of the grid's axes)."""
    _, lo, hi = _bounds(stats, prior)
    unit = ["m", "degree"] if stats.grid.frame == "polar" else ["m"]
    return [f"ℓ = {a_:g}·({b_:g}/{a_:g})^u {u_}, u ~ Beta(2, 2){note}" for a_, b_, u_ in zip(lo, hi, unit)]


def describe_prior(prior: dict, stats) -> dict:
    a, b = gamma_prior(prior["rate_median"], prior["rate_log_sd"], stats.window_total)
    return {
        "rho0": f"Gamma({a:.4g}, {b:.4g} m²·scan) on the baseline intensity ρ₀ = e^μ [m⁻² scan⁻¹]: median "
                f"{prior['rate_median']:g}/|W| (|W| = {stats.window_total:.6g} m²), sd of μ = log ρ₀ "
                f"{prior['rate_log_sd']:g}; without per-scan terms integrated out in the sampler and drawn "
                "exactly afterwards (sampled as μ through the field's level when a truncated field integrates "
                "out its per-cell term), with them (not conjugate) sampled as the site rho0",
        "sigma": f"HalfNormal({prior['sigma_scale']:g}) on the field sd (log scale)",
        "length_scale": length_scale_lines(prior, stats),
        "field": "zero-mean stationary Gaussian field, circulant embedding on a padded torus: every "
                 "torus mode, or with model.variance_kept < 1 (default "
                 f"{DEFAULT_VARIANCE_KEPT['squared_exponential']:g} for the squared exponential, "
                 "1 for the Matérn kernels) the Fourier modes that carry that fraction of the prior "
                 "variance at the shortest length scales (summary: field_parameters)",
        "parameters": dict(prior),
        "defaults": {**DEFAULT_PRIOR, **LENGTH_SCALE_DEFAULTS},
    }


def _hyper_summary(result) -> dict:
    from ..results import _interval

    post = result.idata.posterior
    axes_units = ["m", "degree"] if result.stats.grid.frame == "polar" else ["m"]
    ls = np.asarray(post["length_scale"], float)
    return {"sigma": _interval(post["sigma"]), "mu": {"units": "log(m-2 scan-1)", **_interval(post["mu"])},
            "length_scale": [_interval(ls[..., i]) for i in range(ls.shape[-1])],
            "length_scale_units": axes_units[: ls.shape[-1]]}


def _mass_start(start) -> dict | str:
    """What NUTS's warmup started its mass matrix from, for summary.json: per block of sites,
    the diagonal of its inverse (one value per unconstrained coordinate, in the block's site
    order; the off-diagonal entries start at 0)."""
    if start is None:
        return "identity (numpyro's default)"
    return {"+".join(k): {"variance_per_unconstrained_coordinate": [float(x) for x in np.diag(v)],
                          "size": int(len(v))} for k, v in start.items()} | {"elsewhere": "identity"}


def dropped_modes(result, chunk: int = 4096) -> dict:
    """``fields.truncation.dropped_mode_check`` for a truncated fit: the dropped modes' prior
    variance per cell at the posterior σ, ℓ against the posterior variance of the log
    intensity μ + f of the cells with exposure (in float64 over chunks of cells, no copy of
    every kept draw), and the coverage of the truth it predicts. With the per-cell term the
    dropped variance is part of the model: the variance the term carries at the posterior
    σ, ℓ instead (mean over up to 40 draws), no check and no warning."""
    post = result.idata.posterior
    sigma = np.asarray(post["sigma"]).reshape(-1)
    ls = np.asarray(post["length_scale"]).reshape(sigma.size, -1)
    basis = result.setup.extra["modes"]
    if result.setup.inputs["kernels"].cell_term:
        form = {"form": "sampled, one value per cell (per-scan terms)"}
        if "term_variance" in post:  # integrated out: the model recorded v per draw
            v = np.asarray(post["term_variance"], float).reshape(-1)
            kern = result.setup.inputs["kernels"]
            nodes = kern.nodes
            level = np.mean(np.asarray(post["field"]), axis=(0, 1), dtype=float)  # f + ε per cell, no draws' copy
            counts, eta = exposed_cells(result.setup.inputs["precond"], float(np.mean(post["mu"])), level)
            # the rule as the model used it at that variance (the Laplace expansion: GH_NODES above its bound)
            error = float(np.sum(rule_error(counts, eta, float(np.max(v)), nodes, kern.laplace_up_to)))
            form = {"form": "integrated out cell by cell (models/cell_term.py) and drawn exactly afterwards",
                    "quadrature": rule_name(nodes), "quadrature_nodes": nodes,
                    **({"laplace_up_to_variance": kern.laplace_up_to,
                        "above_it": rule_name(GH_NODES)} if nodes == LAPLACE else {}),
                    "nodes_sized_for_variance": quadrature_sized_for(result.setup, nodes),
                    "term_variance_max": float(np.max(v)),
                    "nodes_rule": result.setup.extra["embedding"]["truncation"]["cell_term"].get(
                        "quadrature", {}).get("rule", "cell_term.nodes_for"),
                    "quadrature_error_nats": error,
                    "quadrature_error_rule": (f"the rule's error against a {REFERENCE_NODES}-node rule, summed over "
                                              "the exposed cells, at the posterior's largest term variance and "
                                              "each cell's posterior mean log intensity; noted above "
                                              f"{QUADRATURE_NOTE_NATS:g} nats")}
        else:  # sampled (per-scan terms)
            pick = np.unique(np.linspace(0, sigma.size - 1, min(40, sigma.size)).round().astype(int))
            v = [float(basis.residual_variance(np.maximum(np.asarray(basis.eigenvalues(np.resize(ls[i], 2),
                                                                                       sigma[i] ** 2), float), 0.0),
                                               sigma[i] ** 2, np.resize(ls[i], 2))) for i in pick]
        return {"treatment": "per-cell term (model.dropped_modes)", "term_variance_per_cell": float(np.mean(v)),
                **form,
                "warning": False,
                "rule": "the dropped modes' variance c₀ − (1/N) Σ_kept Λ_k at the posterior σ, ℓ (mean over draws; c₀ "
                        "the torus field's variance at a point), carried by an independent term per cell: each "
                        "cell's prior variance is the torus field's again"}
    mu = np.asarray(post["mu"], float).reshape(-1, 1)
    field = np.asarray(post["field"]).reshape(sigma.size, -1)
    cells = np.flatnonzero(np.asarray(result.stats.exposure) > 0)
    s2 = np.concatenate([np.var(field[:, cells[i:i + chunk]].astype(float) + mu, axis=0)
                         for i in range(0, cells.size, chunk)])
    return {"treatment": "left out (model.dropped_modes)", **dropped_mode_check(basis, sigma, ls, s2)}


def quadrature_sized_for(setup, nodes: int) -> float:
    """The largest term variance the set-up sized the quadrature for (``size_quadrature``)."""
    sizing = setup.extra["embedding"]["truncation"]["cell_term"].get("quadrature", {})
    return max(sizing["term_variances"]) if "term_variances" in sizing else variance_limit(nodes)


def summary(result) -> dict:
    ex = result.setup.extra
    g = result.stats.grid
    pre = ex["preconditioner"]
    trunc = None if ex.get("modes") is None else ex["embedding"]["truncation"]
    dropped = None if trunc is None else dropped_modes(result)
    notes = []
    if dropped is not None and dropped.get("quadrature_error_nats", 0.0) > QUADRATURE_NOTE_NATS:
        notes.append(f"the per-cell term's variance reached {dropped['term_variance_max']:.3g} in the posterior "
                     f"(its quadrature, {dropped['quadrature']}, was sized at set-up for up to "
                     f"{dropped['nodes_sized_for_variance']:.3g}), where the quadrature's error summed over the cells "
                     f"is about {dropped['quadrature_error_nats']:.2g} nats (posterior probabilities within a factor "
                     f"of about e^(±{2 * dropped['quadrature_error_nats']:.2g})); a more accurate rule: "
                     "models/lgcp.py, QUADRATURE_MARGIN")
    if dropped is not None and dropped["warning"]:
        notes.append(f"the truncated field (model.variance_kept = {trunc['variance_kept_target']:g}) leaves out modes "
                     f"of prior variance {dropped['dropped_variance_per_cell']:.2g} per cell, "
                     f"{dropped['ratio_median']:.2g}× the cells' median posterior variance: if the true field is as "
                     "rough at small scales as the kernel implies, the 90 % intervals may cover its log intensity as "
                     f"little as {100 * dropped['predicted_coverage_of_true_log_intensity']['90']:.0f} % of the "
                     "time (an estimate that errs low); raise model.variance_kept (1 keeps every mode) or set "
                     "model.dropped_modes = \"per_cell\"")
    return {
        "kernel": ex["kernel"],
        "stationarity": ("isotropic in metres (Cartesian grid)" if g.frame == "cartesian" else
                         "stationary in (range [m], bearing [deg]) with one length scale each: polar "
                         "cells are a regular lattice only in those coordinates"),
        "length_scale_bounds": ex["ls_bounds"],
        "posterior": _hyper_summary(result),
        "embedding": ex["embedding"],
        "field_parameters": {"torus_cells": int(ex["geom"].geom.n_torus),
                             "truncation": "none (every torus mode kept)" if trunc is None else trunc,
                             "variance_kept": 1.0 if trunc is None else trunc["variance_kept_target"],
                             "variance_kept_source": ex["variance_kept_source"],
                             **({} if dropped is None else {"dropped_modes": dropped})},
        "parametrisation": {
            "description": ("white noise on the torus; per-mode partial centring d_k = 1 + w̄Λ_k, padding "
                            "correction at pilot hyperparameters, one soft direction (fields/preconditioning.py); "
                            if ex.get("modes") is None else
                            "coefficients of the kept Fourier modes; per-mode partial centring d_k = 1 + w̄Λ_k "
                            "(w̄ per torus cell), a fixed linear map from the data's Gaussian approximation at "
                            "pilot hyperparameters (fields/truncation.py); "
                            + (("the dropped modes' variance as an independent term per cell, partially centred "
                                "per cell (e_c = 1 + N_c v); " if "scan_terms" in result.setup.inputs else
                                "the dropped modes' variance as an independent term per cell, integrated out cell by "
                                "cell (the rule in field_parameters.dropped_modes.quadrature: Gauss–Hermite nodes or a "
                                "second-order Laplace expansion) and drawn exactly per draw afterwards "
                                "(models/cell_term.py); ")
                               if result.setup.inputs["kernels"].cell_term else ""))
                           + ("baseline ρ₀ sampled (per-scan terms make it non-conjugate)"
                              if "scan_terms" in result.setup.inputs else
                              "baseline μ = log ρ₀ sampled through the field's data-weighted level (the integrated "
                              "per-cell term is no longer conjugate to it)"
                              if getattr(result.setup.inputs["kernels"], "cell_term", False) else
                              "baseline ρ₀ integrated out (conjugate Gamma) and drawn exactly per draw"),
            **(pre.report() if ex.get("modes") is None else
               {"w_bar_detections_per_torus_cell": pre.w_scale, "pilot": pre.pilot,
                "pilot_source": "binned pair correlation (fields/preconditioning.pair_correlation_pilot)",
                "mode_map": ex["embedding"]["truncation"].get("mode_preconditioner")}),
            "warmup_mass_start": _mass_start(ex.get("initial_inverse_mass")),
            "chain_start": ex.get("chain_start"),
        },
        "extrapolation": "cells without exposure are predicted through the field from their "
                         "neighbours; exports mask permanently excluded cells",
        "notes": notes,
    }
