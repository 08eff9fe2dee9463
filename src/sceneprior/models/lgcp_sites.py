"""Several sites on one grid: a shared log-Gaussian field plus one deviation field per site.

One recording whose scans table has a site column (``model.site_column``, default
``site``); every site observes the same region on the same grid (its own local frame, as
in the ``sites`` kind). Site s has K_s scans and binned statistics N_{s,c}, E_{s,c} from
the scans' site labels (per-scan sparse counts and, with gates, each scan's window):

    log λ_{s,c} = log ρ_s + f_c + d̃_{s,c}                               [log(m⁻² scan⁻¹)]

f   shared zero-mean stationary Gaussian field, sd σ, length scale ℓ (kernel as ``lgcp``:
    Matérn ν = 1/2, 3/2, 5/2 or squared exponential; Rasmussen & Williams 2006, §4.2);
d_s independent zero-mean stationary fields, sd σ_d, the SAME length scale ℓ, and
    d̃_s = d_s − ⟨d_s⟩_W their window-mean-free part (⟨x⟩_W = Σ_c |c∩W| x_c / |W|): a site's
    deviation is a change of shape; its level is the site baseline's business;
ρ_s site baselines, partially pooled as in the ``sites`` kind (Gelman et al., BDA3 §5.3):
    ρ_s | m, τ ~ Gamma(1/τ², 1/(τ²m)) (mean m, coefficient of variation τ),
    log m ~ Normal(log(rate_median/|W|), rate_log_sd), τ ~ HalfNormal(cv_scale).

Why one length scale: site s's total field f + d_s is then a stationary field with the
``lgcp`` kernel, variance σ² + σ_d² and the same correlation function — each site on its
own is exactly an ``lgcp`` — and σ²/(σ² + σ_d²) is the shared share of its variance. A
separate deviation length scale would be informed only by the S − 1 contrasts between
sites (one or two for the usual two or three masts) and would cost a second spectrum per
gradient. Why σ_d ~ HalfNormal(0.5) (``sigma_dev_scale``), half the shared field's scale:
sites that see the same region share most of their structure a priori — median σ_d 0.34
(a factor 1.4 in intensity), 95 % below 0.98 (a factor 2.7) — yet a site may still differ
by a factor of 2–3; the smaller scale is what lets a site with few scans borrow the
shared map (it is shrunk toward it) instead of being fitted on its own.

Baselines integrated out. Given the fields, m and τ, ρ_s is conjugate:
ρ_s | · ~ Gamma(α + S_s, α/m + Z_s), α = 1/τ², S_s = Σ_c N_{s,c}, Z_s = Σ_c E_{s,c} e^{g_{s,c}},
g_s = f + d̃_s, and integrating it out leaves per site (the Gamma–Poisson mixture, BDA3 §2.6)

    Σ_c N_{s,c} g_{s,c} + log NB-term(S_s; mean m Z_s, φ = τ²) + S_s log m,

with ``likelihood.nb_cardinality_logterm`` (stable for τ → 0, where it tends to the Poisson
term −m Z_s). ρ_s is drawn exactly afterwards, per draw (:func:`complete_posterior`).

The shared field's window mean and log m trade off (the data see only their sum), so the
sampler moves in η = log m + ⟨f⟩_W (``level``) instead of log m: a shear with unit Jacobian,
the prior of log m kept exactly as the factor Normal(η − ⟨f⟩_W; ·). Writing ρ'_s = ρ_s e^{⟨f⟩_W},
log λ_{s,c} = log ρ'_s + (f_c − ⟨f⟩_W) + d̃_{s,c} with ρ'_s | η, τ ~ Gamma(α, α e^{−η}).

Fields (``fields/preconditioning.py``, one white-noise torus per field): the shared field's
coordinates see all sites' data, each deviation field its own site's. Per Fourier mode k,
with prior variances A_k (f), B_k (d) and site data information w_s, the Gaussian
posterior factorises exactly in (f, e_s = d_s + β_{s,k} f), β_{s,k} = B_k w_s/(1 + B_k w_s):
e_s's conditional does not involve f. So d_s is sheared by −β_s·f (``shift`` of
``field_and_prior``, unit Jacobian) and f's partial centring uses its marginal data
information A_k Σ_s w_s/(1 + B_k w_s) (``info``) instead of A_k Σ_s w_s. Exact
reparametrisations: the posterior is that of the model above; only NUTS's geometry changes
(without the shear, the direction "f up, every d_s down" is a ridge √(w B_k) times longer
than wide in strongly informed modes).

Sample sites: ``sigma``, ``sigma_dev``, ``ls_unit``, ``cv``, ``level``, ``u_soft``/``u_rest``
(shared field), ``dev_soft``/``dev_rest`` (S deviation fields; the ``*_rest`` white noise
is not stored). Deterministic: ``field`` (cell) float32 f − ⟨f⟩_W; ``deviation`` (site, cell)
float32 d̃_s; ``log_z`` (site) log Z_s; ``log_window_integral`` (site) log Σ_c |c∩W| e^{g_{s,c}};
``rate`` = e^η Σ_c |c∩W| e^{f_c − ⟨f⟩_W}, the group map's rate. Added after sampling:
``site_mu`` (site) log ρ'_s and ``site_rate`` (site) ρ'_s Σ_c |c∩W| e^{g_{s,c}} [detections per
scan over the window].

Maps: the run's map (intensity.nc ``intensity_*``, cell_draws.nc ``intensity``) is the
group map e^{η + f_c − ⟨f⟩_W}: a site at the group-mean baseline with no deviation; the site
maps λ_{s,c} are ``site_intensity_*`` (dimension ``site``), with the shared field's map and
the deviations' mean and sd maps beside them.
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
import scipy.sparse as sp

from ..errors import InputError
from ..fields.preconditioning import build_preconditioner, field_and_prior, safe_sqrt
from . import lgcp
from .likelihood import nb_cardinality_logterm

KIND = "lgcp_sites"
DEFAULT_PRIOR = {
    "rate_median": 10.0,
    "rate_log_sd": 3.0,
    "cv_scale": 1.0,
    "sigma_scale": 1.0,
    "sigma_dev_scale": 0.5,
}


# ----------------------------------------------------------------------------- data
def site_binned(stats, site_index: np.ndarray, n_sites: int) -> tuple[np.ndarray, np.ndarray]:
    """Per-site binned statistics from the scans' site labels (no loop over scans):
    N_{s,c} = Σ_{k∈s} n_{k,c} and E_{s,c} = Σ_{k∈s} |c ∩ W_k| = K_s·|c ∩ W| − Σ_{k∈s} removed[k, c],
    both (S, n_cells); the site × scan indicator times the sparse scan × cell matrices."""
    K = stats.n_scans
    ind = sp.csr_matrix((np.ones(K), (np.asarray(site_index), np.arange(K))), shape=(n_sites, K))
    counts = np.asarray((ind @ stats.scan_cell).toarray(), dtype=float)
    scans = np.bincount(site_index, minlength=n_sites).astype(float)
    exposure = scans[:, None] * np.asarray(stats.window_area, float)[None, :]
    if stats.removed is not None:
        exposure = np.maximum(exposure - (ind @ stats.removed).toarray(), 0.0)  # round-off: E ≥ 0
    return counts, exposure


def _window_mean(x, window_area):
    return jnp.tensordot(x, window_area, axes=([-1], [0])) / jnp.sum(window_area)


def _masked_logsumexp(x, weight):
    """log Σ_c weight_c e^{x_c} over cells with weight > 0 (last axis)."""
    pos = weight > 0
    return jax.scipy.special.logsumexp(jnp.where(pos, x + jnp.log(jnp.where(pos, weight, 1.0)), -jnp.inf), axis=-1)


# ----------------------------------------------------------------------------- fields
@dataclass(frozen=True, eq=False)
class SiteFieldKernels:
    """Static torus geometry and the jitted maths of the S + 1 fields (one compiled call per
    model evaluation; the per-site fields are vmapped)."""

    spectrum: lgcp.Spectrum
    use_pad: bool  # padding correction of the shared field
    use_pad_dev: bool  # ... of the deviation fields (one static choice for all sites)

    @property
    def n_torus(self) -> int:
        return self.spectrum.geom.n_torus

    def __reduce__(self):  # pickled without the jitted closure (chain processes), rebuilt on loading
        return (type(self), (self.spectrum, self.use_pad, self.use_pad_dev))

    def __post_init__(self):
        spectrum, use_pad, use_pad_dev = self.spectrum, self.use_pad, self.use_pad_dev
        torus, grid = spectrum.geom.torus_shape, spectrum.geom.grid_shape
        rotate = lgcp.FieldKernels(spectrum, use_pad).rotate

        def evaluate(u_soft, u_rest, dev_soft, dev_rest, sigma, sigma_dev, ls, pre, pre_dev, site_share,
                     counts, exposure, window_area):
            u = rotate(u_soft, u_rest, pre["householder"])
            ud = jax.vmap(rotate)(dev_soft, dev_rest, pre_dev["householder"])
            unit = jnp.maximum(spectrum.eigenvalues(jnp.broadcast_to(ls, (2,)), 1.0), 0.0)
            lam_f, lam_d = sigma**2 * unit, sigma_dev**2 * unit
            zero = jnp.ones_like(unit).at[0, 0].set(0.0)
            # shared field: marginal data information A_k Σ_s w_s/(1 + B_k w_s), w_s its share of w̄
            w_f = (pre["w_scale"] * site_share)[:, None, None]
            info_f = lam_f * jnp.sum(w_f / (1.0 + lam_d[None] * w_f), axis=0)
            f_torus, logp = field_and_prior(u, lam_f, pre, torus, use_pad, info=info_f)
            F = jnp.fft.rfft2(f_torus.reshape(torus))
            # deviation s: shear by −β_s f, β_s = B w_s/(1 + B w_s), in its white coordinates
            # (f = L y: subtracting w_s √(B/d_s)·F from Y_s subtracts β_s·f from d_s)
            w_d = pre_dev["w_scale"][:, None, None]
            shift = w_d * zero * safe_sqrt(lam_d / (1.0 + w_d * zero * lam_d)) * F[None]
            dev, logp_dev = jax.vmap(lambda us, ps, sh: field_and_prior(us, lam_d, ps, grid, use_pad_dev, shift=sh))(
                ud, pre_dev, shift)
            f = f_torus.reshape(torus)[: grid[0], : grid[1]].reshape(-1)
            fc = f - _window_mean(f, window_area)
            dc = dev - _window_mean(dev, window_area)[:, None]
            g = fc[None, :] + dc
            return dict(field=fc, deviation=dc, field_mean=_window_mean(f, window_area),
                        log_prior=logp + jnp.sum(logp_dev),
                        log_z=_masked_logsumexp(g, exposure), sum_ng=jnp.sum(counts * g, axis=-1),
                        log_window_integral=_masked_logsumexp(g, window_area),
                        log_group_integral=_masked_logsumexp(fc, window_area))

        object.__setattr__(self, "evaluate", jax.jit(evaluate))


# ----------------------------------------------------------------------------- model
def lgcp_sites_model(counts, exposure, window_area, site_total, site_share, mu_loc, mu_scale, cv_scale,
                     sigma_scale, dev_scale, ls_lo, ls_hi, precond, dev_precond, kernels):
    """numpyro model (module docstring), baselines integrated out.

    counts, exposure: (S, n_cells) N_{s,c} and E_{s,c} [m²·scan]; window_area (n_cells,) |c ∩ W|
    [m²]; site_total (S,) S_s; site_share (S,) S_s/Σ S (splits the shared field's w̄ among
    sites); mu_loc, mu_scale: Normal prior of log m [log(m⁻² scan⁻¹)]; cv_scale, sigma_scale,
    dev_scale: HalfNormal scales of τ, σ, σ_d; ls_lo, ls_hi (n_ls,) length-scale bounds;
    precond: the shared field's ``Preconditioner.arrays()``, dev_precond the same stacked
    over sites; kernels: :class:`SiteFieldKernels`."""
    S = counts.shape[0]
    n = kernels.n_torus
    sigma = numpyro.sample("sigma", dist.HalfNormal(sigma_scale))
    sigma_dev = numpyro.sample("sigma_dev", dist.HalfNormal(dev_scale))
    u01 = numpyro.sample("ls_unit", dist.Beta(2.0, 2.0).expand([ls_lo.shape[0]]).to_event(1))
    ls = numpyro.deterministic("length_scale", ls_lo * (ls_hi / ls_lo) ** u01)
    cv = numpyro.sample("cv", dist.HalfNormal(cv_scale))
    level = numpyro.sample("level", dist.ImproperUniform(dist.constraints.real, (), ()))
    u_soft = numpyro.sample("u_soft", dist.Normal(0.0, 1.0))
    u_rest = numpyro.sample("u_rest", dist.Normal(0.0, 1.0).expand([n - 1]).to_event(1))
    dev_soft = numpyro.sample("dev_soft", dist.Normal(0.0, 1.0).expand([S]).to_event(1))
    dev_rest = numpyro.sample("dev_rest", dist.Normal(0.0, 1.0).expand([S, n - 1]).to_event(2))
    ev = kernels.evaluate(u_soft, u_rest, dev_soft, dev_rest, sigma, sigma_dev, ls, precond, dev_precond,
                          site_share, counts, exposure, window_area)
    # the N(0, 1) site densities are replaced by the exact density of the white coordinates
    white = u_soft**2 + jnp.sum(u_rest * u_rest) + jnp.sum(dev_soft * dev_soft) + jnp.sum(dev_rest * dev_rest)
    numpyro.factor("field_prior", ev["log_prior"] + 0.5 * white)
    # log m = η − ⟨f⟩_W keeps its Normal prior (the shear η ↔ log m has unit Jacobian)
    numpyro.factor("level_prior", dist.Normal(mu_loc, mu_scale).log_prob(level - ev["field_mean"]))
    mean_count = jnp.exp(level + ev["log_z"])  # m' Z_s
    numpyro.factor("loglik", jnp.sum(ev["sum_ng"] + site_total * level
                                     + nb_cardinality_logterm(site_total, mean_count, cv**2)))
    numpyro.deterministic("field", ev["field"].astype(jnp.float32))
    numpyro.deterministic("deviation", ev["deviation"].astype(jnp.float32))
    numpyro.deterministic("log_z", ev["log_z"])
    numpyro.deterministic("log_window_integral", ev["log_window_integral"])
    numpyro.deterministic("rate", jnp.exp(level + ev["log_group_integral"]))


def complete_posterior(idata, stats, setup, seed: int):
    """Add the exactly drawn site baselines: ρ'_s | · ~ Gamma(α + S_s, α e^{−η} + Z_s) per draw
    (α = 1/τ²), ``site_mu`` = log ρ'_s and ``site_rate`` = ρ'_s Σ_c |c ∩ W| e^{g_{s,c}}."""
    post = idata.posterior
    total = np.asarray(setup.inputs["site_total"], float)
    level = np.asarray(post["level"], float)[..., None]
    log_alpha = -2.0 * np.log(np.asarray(post["cv"], float))[..., None]
    log_z = np.asarray(post["log_z"], float)
    rng = np.random.default_rng([seed, 20261203])
    g = rng.standard_gamma(np.exp(log_alpha) + total, size=log_z.shape)
    site_mu = np.log(g) - np.logaddexp(log_alpha - level, log_z)
    rate = np.exp(site_mu + np.asarray(post["log_window_integral"], float))
    dims = ("chain", "draw", "site")
    post["site_mu"] = (dims, site_mu)
    post["site_rate"] = (dims, rate)
    post["site_mu"].attrs.update(units="log(m-2 scan-1)", long_name="site baseline log ρ'_s, drawn from its exact "
                                 "conditional Gamma(α + S_s, α e^{-η} + Z_s)")
    post["site_rate"].attrs.update(units="detections per scan",
                                   long_name="expected detections per scan in the window at each site")
    return idata


# ----------------------------------------------------------------------------- set-up
def _site_labels(stats, model_spec):
    from .hierarchical import site_labels
    from .variants import read_scan_meta

    column = model_spec.options.get("site_column", "site")
    lab = site_labels(read_scan_meta(stats, model_spec), column)
    sites, idx = np.unique(lab, return_inverse=True)
    if sites.size < 2:
        raise InputError(f"model kind '{KIND}' needs at least two sites in scans-table column '{column}'; found "
                         f"only {sites[0]!r}: fit one site with kind = \"lgcp\"")
    return column, [str(s) for s in sites], idx


def _preconditioners(spectrum, stats, counts, exposure, kernel, lo, hi, prior, use_pad):
    """One preconditioner per deviation field (its site's data; pilot σ_d from the site's
    empirical log intensity minus the other sites' pooled one) with one padding-correction
    choice for all (a static of the compiled model), then the shared field's (all sites'
    data), whose partial centring and padding correction use its marginal information
    Λ̂_k Σ_s w_s/(1 + Λ̂ᵈ_k w_s) at the pilots (w_s = w̄ · the site's share of detections)."""
    shape = stats.grid.shape
    tot_n, tot_e = counts.sum(axis=0), exposure.sum(axis=0)

    def build(s, pad):
        on, oe = tot_n - counts[s], tot_e - exposure[s]
        others = np.log(np.divide(on + 0.5, oe, out=np.ones_like(on), where=oe > 0))
        return build_preconditioner(spectrum, shape, counts[s], exposure[s], kernel, lo, hi,
                                    prior["sigma_dev_scale"], use_pad=use_pad if pad is None else pad, offset=others)

    devs = [build(s, None) for s in range(counts.shape[0])]
    if len({d.use_pad for d in devs}) > 1:
        devs = [d if d.use_pad else build(s, True) for s, d in enumerate(devs)]
    sigma_d = float(np.median([d.pilot["sigma"] for d in devs]))
    ls_d = np.resize(np.median([np.resize(d.pilot["length_scale"], 2) for d in devs], axis=0), 2)
    lam_d = np.maximum(np.asarray(spectrum.eigenvalues(ls_d, sigma_d**2), float), 0.0)
    share = counts.sum(axis=1) / max(counts.sum(), 1.0)

    def information(lam_f, w_bar):
        w = (w_bar * share)[:, None, None]
        return lam_f * np.sum(w / (1.0 + lam_d[None] * w), axis=0)

    pre = build_preconditioner(spectrum, shape, tot_n, tot_e, kernel, lo, hi, prior["sigma_scale"], use_pad=use_pad,
                               information=information)
    return pre, devs


def conditional_mode(inputs: dict, held: dict) -> tuple[dict, dict]:
    """The white coordinates of the shared and deviation fields (u_soft, u_rest, dev_soft,
    dev_rest) at the mode of their conditional posterior, the other sites held at ``held``
    (the start values): the model's own log density (numpyro's ``log_density``) maximised by
    :func:`lgcp.mode_search`. Returns ({site: value}, report)."""
    from numpyro.infer.util import log_density

    S, n = inputs["counts"].shape[0], inputs["kernels"].n_torus
    fixed = {k: jnp.asarray(v, float) for k, v in held.items()}

    def split(x):
        return {"u_soft": x[0], "u_rest": x[1:n], "dev_soft": x[n:n + S], "dev_rest": x[n + S:].reshape(S, n - 1)}

    def negative(x):
        return -log_density(lgcp_sites_model, (), inputs, {**fixed, **split(x)})[0]

    x, report = lgcp.mode_search(negative, (S + 1) * n, "σ, σ_d, ℓ, the level and τ at their start values")
    return {k: np.asarray(v) for k, v in split(x).items()}, report


def setup(stats, prior: dict, model_spec, use_pad: bool | None = None, start_search: bool = True):
    """The model's inputs and sampler settings; ``use_pad`` and ``start_search`` as in
    :func:`lgcp.setup`."""
    from .registry import ModelSetup

    column, sites, idx = _site_labels(stats, model_spec)
    S = len(sites)
    counts, exposure = site_binned(stats, idx, S)
    kernel = model_spec.options.get("kernel", "matern32")
    spectrum, report, lo, hi = lgcp.plan(stats, kernel, prior)
    advice = []  # lines the fit prints before sampling (lgcp.setup's)
    lgcp.note_wrap(advice, stats, spectrum, report, lo, hi)
    pre, devs = _preconditioners(spectrum, stats, counts, exposure, kernel, lo, hi, prior, use_pad)
    dev_arrays = jax.tree.map(lambda *xs: jnp.stack(xs), *[d.arrays() for d in devs])
    kernels = SiteFieldKernels(spectrum, pre.use_pad, devs[0].use_pad)
    total = counts.sum(axis=1)
    share = total / total.sum() if total.sum() > 0 else np.full(S, 1.0 / S)
    window_total = stats.window_total
    mu_loc = math.log(prior["rate_median"] / window_total)
    inputs = dict(counts=counts, exposure=exposure, window_area=np.asarray(stats.window_area, float),
                  site_total=total, site_share=share, mu_loc=mu_loc, mu_scale=prior["rate_log_sd"],
                  cv_scale=prior["cv_scale"], sigma_scale=prior["sigma_scale"], dev_scale=prior["sigma_dev_scale"],
                  ls_lo=lo, ls_hi=hi, precond=pre.arrays(), dev_precond=dev_arrays, kernels=kernels)
    # start values: pilot moments (preconditioner) and the pooled and per-site raw intensities
    e_site = exposure.sum(axis=1)
    raw = np.log((total + 0.5) / np.where(e_site > 0, e_site, 1.0))
    level0 = float(np.log((total.sum() + 0.5) / exposure.sum())) if exposure.sum() > 0 else mu_loc
    u_pilot = np.clip((np.log(np.asarray(pre.pilot["length_scale"])) - np.log(lo)) / (np.log(hi) - np.log(lo)),
                      0.05, 0.95)
    start = {"sigma": max(pre.pilot["sigma"], 0.05),
             "sigma_dev": max(float(np.median([d.pilot["sigma"] for d in devs])), 0.05),
             "ls_unit": u_pilot[: lo.size], "level": level0,
             "cv": float(np.clip(np.std(raw), 0.05, 1.0))}
    start_sites, start_report = conditional_mode(inputs, start) if start_search else ({}, lgcp.NOT_SEARCHED)
    scans = np.bincount(idx, minlength=S).astype(float)
    extra = {
        "kernel": kernel, "geom": spectrum, "embedding": report, "preconditioner": pre,
        "dev_preconditioners": devs, "ls_bounds": {"min": lo.tolist(), "max": hi.tolist()},
        "sites": sites, "site_index": idx, "site_scans": scans, "site_column": column, "advice": advice,
        "site_window_scans": exposure.sum(axis=1) / window_total if window_total > 0 else scans,
        "n_latent": (S + 1) * spectrum.geom.n_torus,
        "dense_mass": [("sigma", "sigma_dev", "ls_unit", "cv", "level", "u_soft", "dev_soft")],
        "exclude_sites": ["u_rest", "dev_rest"],
        **lgcp.sampler_constants(),
        # hyperparameters at the pilots; the fields' white coordinates around their
        # conditional mode there (chain_start), per chain, as lgcp does
        "init_strategy": partial(lgcp.init_near, values={**start, **start_sites}, centred=tuple(start_sites),
                                 radius=lgcp.START_RADIUS),
        "chain_start": start_report,
        "complete": complete_posterior,
        "dims": {"length_scale": ["axis"], "ls_unit": ["axis"], "field": ["cell"], "deviation": ["site", "cell"],
                 "dev_soft": ["site"], "log_z": ["site"], "log_window_integral": ["site"]},
        "coords": {"axis": list(stats.grid.axes[: lo.size]) if lo.size == 2 else ["isotropic"], "site": sites},
    }
    return ModelSetup(inputs=inputs, extra=extra)


# ----------------------------------------------------------------------------- maps
def cell_log_intensity(posterior: dict) -> np.ndarray:
    """(chain, draw, n_cells) float32 log λ of the group map: η + f − ⟨f⟩_W."""
    return np.asarray(posterior["field"], np.float32) + np.asarray(posterior["level"], np.float32)[..., None]


def cell_intensity(posterior: dict, stats, setup) -> np.ndarray:
    return np.exp(cell_log_intensity(posterior))


def site_cell_intensity(posterior: dict, stats, setup) -> np.ndarray:
    """(chain, draw, site, n_cells) float32 λ_{s,c} = ρ'_s e^{f_c − ⟨f⟩_W + d̃_{s,c}} [m⁻² scan⁻¹]."""
    log_lam = (np.asarray(posterior["site_mu"], np.float32)[..., None]
               + np.asarray(posterior["field"], np.float32)[..., None, :]
               + np.asarray(posterior["deviation"], np.float32))
    return np.exp(log_lam)


def extra_maps(result) -> dict:
    """Per-cell maps written into intensity.nc beside the intensities: the shared field and the
    deviations (posterior mean and sd, log scale). Values (cell,) or (site, cell)."""
    post = result.idata.posterior
    f = np.asarray(post["field"], float).reshape(-1, result.stats.grid.n_cells)
    d = np.asarray(post["deviation"], float)
    d = d.reshape((-1,) + d.shape[-2:])
    what = {"units": "1", "scale": "natural log of the intensity"}
    return {
        "shared_field_mean": (("cell",), f.mean(axis=0), {**what, "long_name": "shared field f_c − <f>_W, posterior "
                                                          "mean (window-mean removed; the level is in 'level')"}),
        "shared_field_sd": (("cell",), f.std(axis=0, ddof=1), {**what, "long_name": "shared field, posterior sd"}),
        "deviation_mean": (("site", "cell"), d.mean(axis=0), {**what, "long_name": "site deviation d_s − <d_s>_W, "
                                                              "posterior mean"}),
        "deviation_sd": (("site", "cell"), d.std(axis=0, ddof=1), {**what, "long_name": "site deviation d_s − "
                                                                   "<d_s>_W, posterior sd"}),
    }


# ----------------------------------------------------------------------------- reports
def describe_prior(prior: dict, stats) -> dict:
    return {
        "site_baseline": "ρ_s ~ Gamma(1/τ², 1/(τ²m)) per site: mean m, coefficient of variation τ; integrated "
                         "out in the sampler, drawn exactly afterwards",
        "log_m": f"Normal(log({prior['rate_median']:g} / |W|), {prior['rate_log_sd']:g}) on the log group-mean "
                 f"baseline [log(m⁻² scan⁻¹)], |W| = {stats.window_total:.6g} m²",
        "cv": f"HalfNormal({prior['cv_scale']:g}) on τ, the between-site coefficient of variation of ρ_s",
        "sigma": f"HalfNormal({prior['sigma_scale']:g}) on the shared field's sd σ (log scale)",
        "sigma_dev": f"HalfNormal({prior['sigma_dev_scale']:g}) on the site deviations' sd σ_d (log scale)",
        "length_scale": lgcp.length_scale_lines(prior, stats, "; shared by f and every d_s"),
        "fields": "f and d_s zero-mean stationary Gaussian fields (circulant embedding on a padded torus, every "
                  "torus mode kept); each d_s enters with its window mean removed",
        "parameters": dict(prior),
        "defaults": {**DEFAULT_PRIOR, **lgcp.LENGTH_SCALE_DEFAULTS},
    }


def summary(result) -> dict:
    from ..inference import cell_diagnostics
    from ..results import _interval

    ex, stats = result.setup.extra, result.stats
    post = result.idata.posterior
    sites = ex["sites"]
    N = np.asarray(result.setup.inputs["site_total"])
    rates = np.asarray(post["site_rate"], float)
    mus = np.asarray(post["site_mu"], float)
    gated = stats.has_gates
    ws = ex["site_window_scans"]
    axes_units = ["m", "degree"] if stats.grid.frame == "polar" else ["m"]
    ls = np.asarray(post["length_scale"], float)
    lam = result.site_cell_intensity()
    inside = stats.window_area > 0
    cells = cell_diagnostics(np.log(lam[..., inside]).reshape(lam.shape[:2] + (-1,)))
    cells["quantity"] = "log intensity per cell of every site (cells with area in the window)"
    note = ("partial pooling: each site's baseline is shrunk toward the group mean and its map toward the shared "
            "field, the more so the fewer detections it has; raw_rate = N_s/K_s is the unpooled estimate")
    if gated:
        note += "; with gates window_scans = Σ_{k∈s} |W_k|/|W| replaces K_s"
    pre = ex["preconditioner"]
    return {
        "units": "rates in detections per scan over the window (each site's own field of view); maps per m² per scan",
        "site_column": ex["site_column"],
        "sites": {s: {"scans": int(ex["site_scans"][j]), "detections": int(N[j]),
                      "raw_rate": float(N[j] / ws[j]) if ws[j] > 0 else None,
                      "rate": _interval(rates[..., j]),
                      "log_baseline": {"units": "log(m-2 scan-1)", **_interval(mus[..., j])},
                      **({"window_scans": float(ws[j])} if gated else {})} for j, s in enumerate(sites)},
        "group_rate": {"units": "detections per scan over the window of the group map (group-mean baseline, no "
                                "site deviation)", **_interval(post["rate"])},
        "posterior": {"level": {"units": "log(m-2 scan-1)", **_interval(post["level"])},
                      "between_site_cv": _interval(post["cv"]), "sigma": _interval(post["sigma"]),
                      "sigma_dev": _interval(post["sigma_dev"]),
                      "length_scale": [_interval(ls[..., i]) for i in range(ls.shape[-1])],
                      "length_scale_units": axes_units[: ls.shape[-1]]},
        "site_cells": cells,
        "kernel": ex["kernel"],
        "length_scale_bounds": ex["ls_bounds"],
        "embedding": ex["embedding"],
        "parametrisation": {
            "description": "white noise per field on one torus (fields/preconditioning.py); the shared field's "
                           "partial centring uses its marginal data information, each deviation field is sheared "
                           "by −β_s·f per mode; site baselines integrated out (conjugate Gamma) and drawn exactly; "
                           "η = log m + <f>_W sampled instead of log m",
            "shared_field": pre.report(),
            "deviation_fields": {s: d.report() for s, d in zip(sites, ex["dev_preconditioners"])},
            "chain_start": ex.get("chain_start"),
        },
        "note": note,
        "window_area_m2": stats.window_total,
    }
