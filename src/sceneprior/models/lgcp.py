"""Log-Gaussian Cox process clutter maps: log λ_c = μ + f_c, f a stationary Gaussian field.

Field (DESIGN.md §3): f on the cell centres is the corner of a circulant-embedded field on
a padded torus (Wood & Chan 1994; Dietrich & Newsam 1997), kernel Matérn ν = 1/2, 3/2,
5/2 or squared exponential (Rasmussen & Williams 2006, §4.2), written in the real Fourier
basis of the torus (``fields.spectral``). The torus is sized ONCE for the largest length
scale the prior allows and checked valid (eigenvalues ≥ −1e-10·max); the retained set of
Fourier modes is fixed for the whole run, chosen at the SHORTEST length scale the prior
allows so that it holds ≥ 1 − δ of the prior variance there (δ = 1e-3 by default; a
longer length scale only concentrates the spectrum further inside the kept set).

Stationarity: on a Cartesian grid the field is isotropic in metres (one length scale).
On a polar grid it is stationary in (range, bearing) — one length scale in metres along
range and one in degrees along bearing — because the polar cells form a regular lattice
only in those coordinates (the circulant embedding needs a regular lattice), and because
sea and ground clutter statistics change along range and from sector to sector rather
than isotropically in x, y. The intensity is per m² (exact polar cell areas in the
exposure), and per m·rad = per m² × range is reported beside it.

Parametrisation (issue item 5: fast in weak and strong data). With white noise z_p of the
retained real Fourier coefficients and prior sd a_p = √Λ_p, the non-centred field is
f = M(a ⊙ z). The likelihood's curvature in log λ_c is λ_c E_c ≈ N_c, and in the Fourier
basis each coefficient sees on average S/N of it (S = Σ_c N_c, N = torus cells; Parseval),
so the posterior sd of z_p is close to 1/√(1 + a_p² S/N). We sample v_p = z_p·s_p with
s_p = √(1 + a_p² S/N), i.e. v_p ~ Normal(0, s_p) a priori — an exact reparametrisation
(the prior of (μ, σ, ℓ, f) is unchanged; only the coordinates NUTS moves in depend on
the data), which is non-centred for modes the data barely inform (s_p ≈ 1) and close to
centred for modes they pin down (s_p ≫ 1): a per-mode partial non-centring
(Papaspiliopoulos, Roberts & Sköld 2007) with posterior scale ≈ 1 in every regime.

Precision: float64 throughout (the spectrum of smooth kernels spans many decades).
Priors (units only — region and cell size — never the counts):
  μ ~ Normal(log(rate_median / |W|), rate_log_sd)      log intensity [log(m⁻² scan⁻¹)]
  σ ~ HalfNormal(sigma_scale)                           field sd (log scale)
  ℓ_a = lo_a (hi_a / lo_a)^u_a, u_a ~ Beta(2, 2)        length scale per axis, bounded:
      default lo = 2 cell spacings (at most hi/2), hi = a quarter of the region's extent along the axis.
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import numpyro
import numpyro.distributions as dist

from ..errors import InputError
from dataclasses import dataclass

from ..fields.embedding import TorusGeometry, implied_first_row, plan_torus, torus_shape_for
from ..fields.kernels import KERNEL_NAMES, anisotropic_kernel
from ..fields.spectral import aliased_eigenvalues, select_modes
from .likelihood import binned_loglik

DEFAULT_PRIOR = {
    "rate_median": 10.0,
    "rate_log_sd": 3.0,
    "sigma_scale": 1.0,
    "delta": 1e-3,
}
_LS_KEYS = ("length_scale_min", "length_scale_max",  # cartesian, m
            "range_length_scale_min", "range_length_scale_max",  # polar, m
            "bearing_length_scale_min", "bearing_length_scale_max")  # polar, degrees
PADDINGS = (1.0, 2.0, 3.0, 4.0)  # minimum-image embedding tried on tori up to 2× the grid
N_LEAD = 16  # leading Fourier modes in the dense mass-matrix block
N_ALIAS = 1  # alias terms per side for the periodised-kernel spectrum (3×3 terms)


_NU = {"matern12": 0.5, "matern32": 1.5, "matern52": 2.5}


def _density_unit(kernel: str, u2, xp):
    """Spectral density of the unit-length-scale, unit-variance 2-D kernel at |u|² = u2
    (Rasmussen & Williams 2006, eq. 4.15 Matérn and 4.20 squared exponential, D = 2).
    Powers t^-(ν+1) are written with rsqrt (ν + 1 = 3/2, 5/2, 7/2): pow is slow on CPU."""
    if kernel == "squared_exponential":
        return 2.0 * math.pi * xp.exp(-2.0 * math.pi**2 * u2)
    nu = _NU[kernel]
    t = 2.0 * nu + 4.0 * math.pi**2 * u2
    r = 1.0 / xp.sqrt(t)
    tail = {"matern12": r / t, "matern32": r / (t * t), "matern52": r / (t * t * t)}[kernel]
    return 4.0 * math.pi * nu * (2.0 * nu) ** nu * tail


@dataclass(frozen=True, eq=False)
class Spectrum:
    """Torus eigenvalues, by one of two valid constructions (chosen once per fit):

    "embedding": FFT of the minimum-image first row (Wood & Chan 1994), used when it is
        valid (no eigenvalue below −1e-10·max) on a torus at most twice the grid per axis;
    "periodised": the spectral density summed over aliases (Poisson summation),
        Λ_k = (h₀h₁)⁻¹ Σ_q S((k + q∘m)/T), i.e. the circulant embedding of the periodised
        kernel Σ_j k(d + jT), non-negative on any torus. Used on the 2×-padded torus when
        the minimum-image row would need more padding (Matérn 3/2 and 1/2 at long length
        scales need 10–12 length scales). Its covariance differs from the planar kernel by
        the wrap error in the report; the alias sum is truncated at |q| ≤ N_ALIAS, which
        lowers the variance by the reported deficit. In the model only the retained modes'
        eigenvalues are evaluated (``at_modes``).
    """

    geom: TorusGeometry
    method: str

    def _freqs(self, rep):
        (m0, m1), (h0, h1) = self.geom.torus_shape, self.geom.spacing
        half = m1 // 2 + 1
        k0 = np.fft.fftfreq(m0, d=1.0 / m0)[np.asarray(rep) // half]
        k1 = (np.asarray(rep) % half).astype(float)
        q = np.arange(-N_ALIAS, N_ALIAS + 1, dtype=float)
        s0 = (k0[:, None] + q[None, :] * m0) / (m0 * h0)
        s1 = (k1[:, None] + q[None, :] * m1) / (m1 * h1)
        return s0, s1

    def _periodised(self, rep, length_scales, variance, xp):
        ls = length_scales if np.ndim(length_scales) and np.shape(length_scales)[0] == 2 else \
            xp.stack([xp.reshape(length_scales, ()), xp.reshape(length_scales, ())])
        s0, s1 = self._freqs(rep)
        u2 = (s0 * ls[0])[:, :, None] ** 2 + (s1 * ls[1])[:, None, :] ** 2
        dens = _density_unit(self.geom.kernel, u2, xp).sum(axis=(1, 2))
        h0, h1 = self.geom.spacing
        return variance * ls[0] * ls[1] * dens / (h0 * h1)

    def eigenvalues(self, length_scales, variance):
        """Half spectrum (m0, m1//2+1)."""
        if self.method == "embedding":
            return self.geom.eigenvalues(length_scales, variance)
        xp = jnp if isinstance(length_scales, jax.Array) or isinstance(variance, jax.Array) else np
        m0, m1 = self.geom.torus_shape
        rep = np.arange(m0 * (m1 // 2 + 1))
        return self._periodised(rep, length_scales, variance, xp).reshape(m0, m1 // 2 + 1)

    def amplitudes(self, modes, length_scales, variance):
        """Prior sd √Λ of each retained real coefficient (evaluating only kept modes)."""
        xp = jnp if isinstance(length_scales, jax.Array) or isinstance(variance, jax.Array) else np
        if self.method == "embedding":
            return modes.amplitudes(self.geom.eigenvalues(length_scales, variance))
        uniq, inverse = _unique_reps(modes)
        lam = self._periodised(uniq, length_scales, variance, xp)
        return xp.sqrt(xp.maximum(lam, 0.0))[inverse]


def _unique_reps(modes):
    cache = getattr(modes, "_unique_cache", None)
    if cache is None:
        cache = np.unique(np.asarray(modes.param_rep), return_inverse=True)
        object.__setattr__(modes, "_unique_cache", cache)
    return cache


def _periodised_report(geom: TorusGeometry, spec: "Spectrum", lo2, hi2) -> dict:
    """Wrap error of the periodised covariance against the planar kernel on grid lags (at
    the largest length scales), and the variance lost by truncating the alias sum (at the
    shortest), both as fractions of σ²."""
    n0, n1 = geom.grid_shape
    h0, h1 = geom.spacing
    row = np.asarray(implied_first_row(np.asarray(spec.eigenvalues(hi2, 1.0)), geom.torus_shape))
    lags = ((h0 * np.arange(n0))[:, None], (h1 * np.arange(n1))[None, :])
    planar = anisotropic_kernel(geom.kernel, lags, 1.0, hi2)
    wrap = float(np.max(np.abs(row[:n0, :n1] - planar)))
    var_lo = float(np.asarray(implied_first_row(np.asarray(spec.eigenvalues(lo2, 1.0)), geom.torus_shape))[0, 0])
    return {"method": "periodised", "torus_shape": list(geom.torus_shape), "grid_shape": [n0, n1],
            "wrap_error": wrap, "alias_terms_per_side": N_ALIAS,
            "alias_variance_deficit_at_shortest_length_scale": max(0.0, 1.0 - var_lo),
            "valid": "eigenvalues are non-negative by construction"}


def lgcp_model(counts, exposure, window_area, obs, mu_loc, mu_scale, sigma_scale, ls_lo, ls_hi,
               strength, kernels):
    """numpyro model of the LGCP on binned data.

    counts, exposure: (n_obs,) N_c and E_c [m²·scan] of cells with exposure; window_area
    (n_cells,) |c ∩ W| [m²]; obs (n_obs,) their flat indices; ls_lo, ls_hi (n_ls,) length
    scale bounds in axis units; ``kernels`` holds the jitted field maths (static torus
    geometry, retained modes, preconditioner strength), see :func:`make_kernels`.
    """
    mu = numpyro.sample("mu", dist.Normal(mu_loc, mu_scale))
    sigma = numpyro.sample("sigma", dist.HalfNormal(sigma_scale))
    u = numpyro.sample("ls_unit", dist.Beta(2.0, 2.0).expand([ls_lo.shape[0]]).to_event(1))
    ls = numpyro.deterministic("length_scale", ls_lo * (ls_hi / ls_lo) ** u)
    amp, scale = kernels.scales(ls, sigma, strength)
    # the leading (largest-variance) modes trade off against μ and σ along ridges in strong
    # data; they get their own site so NUTS can adapt a dense mass matrix over them and the
    # hyperparameters (``DENSE_BLOCK``), the rest keep a diagonal one
    m = kernels.n_lead
    v_lead = numpyro.sample("v_lead", dist.Normal(0.0, scale[:m]).to_event(1))
    v_rest = numpyro.sample("v_rest", dist.Normal(0.0, scale[m:]).to_event(1))
    v = jnp.concatenate([v_lead, v_rest])
    loglik, rate = kernels.likelihood(mu, amp, scale, v, counts, exposure, window_area, obs)
    numpyro.factor("loglik", loglik)
    numpyro.deterministic("rate", rate)


@dataclass(frozen=True, eq=False)
class FieldKernels:
    """Jitted pieces of the model, so that tracing the model eagerly compiles two
    functions instead of a hundred small operations."""

    spectrum: Spectrum
    modes: object
    n_lead: int = 16

    def __post_init__(self):
        spectrum, modes = self.spectrum, self.modes

        def scales(ls, sigma, strength):
            amp = spectrum.amplitudes(modes, ls, sigma**2)
            return amp, jnp.sqrt(1.0 + amp**2 * strength)

        def field(mu, amp, scale, v):
            return mu + modes.coefficients_to_field(amp * v / scale).reshape(-1)

        def likelihood(mu, amp, scale, v, counts, exposure, window_area, obs):
            log_lam = field(mu, amp, scale, v)
            return (binned_loglik(log_lam[obs], counts, exposure),
                    jnp.sum(jnp.exp(log_lam) * window_area))

        def log_intensity(mu, sigma, ls, v, strength):
            amp, scale = scales(ls, sigma, strength)
            return field(mu, amp, scale, v)

        object.__setattr__(self, "scales", jax.jit(scales))
        object.__setattr__(self, "likelihood", jax.jit(likelihood))
        object.__setattr__(self, "log_intensity", jax.jit(jax.vmap(log_intensity, (0, 0, 0, 0, None))))


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
    """Torus geometry and retained modes for this grid and prior (done once per fit)."""
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
        report = _periodised_report(geom, spectrum, lo2, hi2)
    modes = select_modes(geom, lo2, delta=prior["delta"], eigenvalues=spectrum.eigenvalues)
    return spectrum, report, modes, lo, hi


def scipy_fast(n: int) -> int:
    import scipy.fft

    return int(scipy.fft.next_fast_len(n, real=True))


def setup(stats, prior: dict, model_spec):
    from .registry import ModelSetup

    kernel = model_spec.options.get("kernel", "matern32")
    spectrum, report, modes, lo, hi = plan(stats, kernel, prior)
    geom = spectrum.geom
    obs = np.flatnonzero(stats.exposure > 0)
    strength = float(stats.counts.sum()) / geom.n_torus
    inputs = dict(
        counts=stats.counts[obs].astype(float), exposure=stats.exposure[obs],
        window_area=stats.window_area, obs=obs,
        mu_loc=math.log(prior["rate_median"] / stats.window_total), mu_scale=prior["rate_log_sd"],
        sigma_scale=prior["sigma_scale"], ls_lo=lo, ls_hi=hi,
        strength=strength, kernels=FieldKernels(spectrum, modes, min(N_LEAD, modes.n_params - 1)),
    )
    extra = {
        "kernel": kernel, "geom": spectrum, "modes": modes, "strength": strength,
        "embedding": report, "modes_report": modes.report(),
        "ls_bounds": {"min": lo.tolist(), "max": hi.tolist()},
        "drop_from_posterior": ["v_lead", "v_rest"],
        "n_latent": modes.n_params,
        "dense_mass": [("mu", "sigma", "ls_unit", "v_lead")],
        "dims": {"length_scale": ["axis"], "ls_unit": ["axis"]},
        "coords": {"axis": list(stats.grid.axes[: lo.size]) if lo.size == 2 else ["isotropic"]},
    }
    return ModelSetup(inputs=inputs, extra=extra)


def cell_log_intensity(posterior: dict, setup, chunk: int = 256, strength=None) -> np.ndarray:
    """(chain, draw, n_cells) float32 log λ draws, computed in chunks of draws.
    ``strength`` must be the preconditioner strength the draws were sampled with
    (default: the setup's)."""
    strength = setup.inputs["strength"] if strength is None else strength
    fn = setup.inputs["kernels"].log_intensity
    mu, sigma, ls = (np.asarray(posterior[k]) for k in ("mu", "sigma", "length_scale"))
    v = np.concatenate([np.asarray(posterior["v_lead"]), np.asarray(posterior["v_rest"])], axis=-1)
    c, d = mu.shape
    n0, n1 = setup.inputs["kernels"].spectrum.geom.grid_shape
    n_cells = n0 * n1
    out = np.empty((c * d, n_cells), np.float32)
    flat = [x.reshape((c * d,) + x.shape[2:]) for x in (mu, sigma, ls, v)]
    for i in range(0, c * d, chunk):
        out[i:i + chunk] = np.asarray(fn(*(x[i:i + chunk] for x in flat), strength), np.float32)
    return out.reshape(c, d, n_cells)


def cell_intensity(posterior: dict, stats, setup) -> np.ndarray:
    if "_log_lam" not in setup.extra:
        setup.extra["_log_lam"] = cell_log_intensity(posterior, setup)
    return np.exp(setup.extra["_log_lam"])


def describe_prior(prior: dict, stats) -> dict:
    _, lo, hi = _bounds(stats, prior)
    unit = ["m", "degree"] if stats.grid.frame == "polar" else ["m"]
    return {
        "mu": f"Normal(log({prior['rate_median']:g} / |W|), {prior['rate_log_sd']:g}) on the mean log "
              "intensity [log(m⁻² scan⁻¹)]",
        "sigma": f"HalfNormal({prior['sigma_scale']:g}) on the field sd (log scale)",
        "length_scale": [f"ℓ = {a:g}·({b:g}/{a:g})^u {u_}, u ~ Beta(2, 2)" for a, b, u_ in zip(lo, hi, unit)],
        "field": "zero-mean stationary Gaussian field, circulant embedding on a padded torus; "
                 f"Fourier modes holding ≥ {1 - prior['delta']:.4g} of the prior variance at the "
                 "shortest length scale kept",
        "parameters": dict(prior),
        "defaults": {**DEFAULT_PRIOR, "length_scale_min": "2 cell spacings",
                     "length_scale_max": "a quarter of the region's extent along the axis"},
    }


def summary(result) -> dict:
    ex = result.setup.extra
    g = result.stats.grid
    return {
        "kernel": ex["kernel"],
        "stationarity": ("isotropic in metres (Cartesian grid)" if g.frame == "cartesian" else
                         "stationary in (range [m], bearing [deg]) with one length scale each: polar "
                         "cells are a regular lattice only in those coordinates"),
        "length_scale_bounds": ex["ls_bounds"],
        "embedding": ex["embedding"],
        "modes": ex["modes_report"],
        "parametrisation": "per-mode partial non-centring in the Fourier domain, v_p ~ N(0, 1 + a_p² S/N); "
                           f"S/N = {ex['strength']:.4g}",
        "extrapolation": "cells without exposure are predicted through the field from their "
                         "neighbours; exports mask permanently excluded cells",
    }
