"""Several sites in one recording (a ``site`` column in the scans table): uniform clutter
per site, site intensities partially pooled.

Site s has K_s scans, N_s detections over the common window W (the same field of view in
each site's own local frame), and λ_s(z) = ρ_s. Its exposure is E_s = Σ_{k∈s} |W_k| [m²·scan]:
K_s|W| without gates; with gates around known objects (issue 7) each scan's window W_k is W
minus its gates (``BinnedStats.scan_window_area``), and N_s counts the detections outside
them. Hierarchy (Gelman et al., BDA3 §5.3, the
Gamma–Poisson analogue of the rat-tumour beta-binomial example):

    ρ_s | μ, τ ~ Gamma(α, α/μ),  α = 1/τ²    (mean μ, coefficient of variation τ)
    log μ ~ Normal(log(rate_median / |W|), rate_log_sd)    [log(m⁻² scan⁻¹)]
    τ ~ HalfNormal(cv_scale)                                 (dimensionless)

τ → 0 pools the sites completely, τ large leaves them apart. Defaults (units only): the
same rate_median = 10 detections per scan and rate_log_sd = 3 as the log-linear model,
cv_scale = 1 (between-site spread of the rate about ±100 % is a priori plausible).

Integrating ρ_s out gives the marginal likelihood of the hyperparameters, a negative
binomial in N_s: N_s ~ NB(α, p = (α/μ) / (α/μ + E_s)) (the set density
differs from the count pmf by a factor free of (μ, τ)); given (μ, τ) the site intensity
is Gamma(α + N_s, α/μ + E_s). NUTS samples (log μ, τ, ε_s) with the exact
reparametrisation log ρ_s = log(a_s/b_s) + ε_s/√a_s, a_s = α + N_s, b_s = α/μ + E_s, around
each site's conditional posterior (the Jacobian ρ_s/√a_s is added), so the geometry stays
near unit scale whether the data pool the sites or not.

Sites: ``log_mu``, ``cv``, ``site_eps``; deterministic ``intensity`` μ (a new site's mean
intensity), ``rate`` μ|W|, ``site_intensity`` ρ_s, ``site_rate`` ρ_s|W| (dimension ``site``);
the rates refer to the whole window W also when the scans were gated.
The intensity map of the run is the group mean μ; per-site maps are ρ_s (uniform).
Follow-up (not in this model): a shared LGCP field plus site deviations.
"""

from __future__ import annotations

import math

import jax.numpy as jnp
import numpy as np
import numpyro
import numpyro.distributions as dist

from ..errors import InputError
from .likelihood import stirling_remainder

DEFAULT_PRIOR = {"rate_median": 10.0, "rate_log_sd": 3.0, "cv_scale": 1.0}
_HALF_LOG_2PI = 0.5 * math.log(2 * math.pi)


def gamma_mean_cv_logpdf(rho, mu, alpha):
    """log Gamma(ρ; shape α, rate α/μ), written stably for large α (τ → 0):
    α(log x − x + 1) + ½ log α − ½ log 2π − log ρ − R(α), x = ρ/μ, R the Stirling remainder."""
    x = rho / mu
    d = x - 1.0
    return (alpha * (jnp.log1p(d) - d) + 0.5 * jnp.log(alpha) - _HALF_LOG_2PI - jnp.log(rho)
            - stirling_remainder(alpha))


def sites_model(site_counts, site_exposure, window_total, mu_loc, mu_scale, cv_scale):
    """numpyro model; site_counts N_s, site_exposure E_s = Σ_{k∈s} |W_k| [m²·scan]
    (K_s|W| without gates)."""
    S = site_counts.shape[0]
    log_mu = numpyro.sample("log_mu", dist.Normal(mu_loc, mu_scale))
    cv = numpyro.sample("cv", dist.HalfNormal(cv_scale))
    mu = jnp.exp(log_mu)
    alpha = 1.0 / cv**2
    a = alpha + site_counts
    b = alpha / mu + site_exposure
    eps = numpyro.sample("site_eps", dist.ImproperUniform(dist.constraints.real_vector, (), (S,)))
    log_rho = jnp.log(a / b) + eps / jnp.sqrt(a)
    rho = jnp.exp(log_rho)
    numpyro.factor("site_prior", jnp.sum(gamma_mean_cv_logpdf(rho, mu, alpha)))
    # log L = Σ_s [N_s log ρ_s − E_s ρ_s] (DESIGN.md §2, one level per site)
    numpyro.factor("loglik", jnp.sum(site_counts * log_rho - site_exposure * rho))
    numpyro.factor("jacobian", jnp.sum(log_rho - 0.5 * jnp.log(a)))
    numpyro.deterministic("intensity", mu)
    numpyro.deterministic("rate", mu * window_total)
    numpyro.deterministic("site_intensity", rho)
    numpyro.deterministic("site_rate", rho * window_total)


def site_labels(meta: dict, column: str) -> np.ndarray:
    if column not in meta:
        have = ", ".join(sorted(meta)) or "none"
        raise InputError(f"the sites model needs a '{column}' column in the scans table (columns: {have}); "
                         "add it or set model.site_column")
    v = np.asarray(meta[column])
    lab = v.astype(str)
    if (lab == "") .any() or (lab == "nan").any() or (lab == "None").any():
        raise InputError(f"scans-table column '{column}' has empty site names; fill them")
    return lab


def setup(stats, prior: dict, model_spec):
    from .registry import ModelSetup
    from .variants import read_scan_meta

    column = model_spec.options.get("site_column", "site")
    meta = read_scan_meta(stats, model_spec)
    lab = site_labels(meta, column)
    sites, idx = np.unique(lab, return_inverse=True)
    if sites.size < 2:
        raise InputError(f"the sites model needs at least two sites in column '{column}'; found {sites.size}")
    N = np.bincount(idx, weights=stats.scan_counts, minlength=sites.size)
    Ks = np.bincount(idx, minlength=sites.size).astype(float)
    # E_s = Σ_{k∈s} |W_k|: each scan's own window (|W| each without gates)
    Es = np.bincount(idx, weights=stats.scan_window_area, minlength=sites.size)
    inputs = dict(site_counts=N, site_exposure=Es, window_total=stats.window_total,
                  mu_loc=math.log(prior["rate_median"] / stats.window_total),
                  mu_scale=prior["rate_log_sd"], cv_scale=prior["cv_scale"])
    return ModelSetup(inputs=inputs, extra={
        "sites": list(sites), "site_index": idx, "site_scans": Ks, "site_column": column,
        "dims": {"site_eps": ["site"], "site_intensity": ["site"], "site_rate": ["site"]},
        "coords": {"site": list(sites)},
    })


def cell_intensity(posterior: dict, stats, setup=None) -> np.ndarray:
    mu = np.asarray(posterior["intensity"])
    return np.broadcast_to(mu[..., None], mu.shape + (stats.grid.n_cells,))


def describe_prior(prior: dict, stats) -> dict:
    return {
        "site_intensity": "ρ_s ~ Gamma(1/τ², 1/(τ²μ)) per site: mean μ, coefficient of variation τ",
        "log_mu": f"Normal(log({prior['rate_median']:g} / |W|), {prior['rate_log_sd']:g}) on the log group-mean "
                  "intensity [log(m⁻² scan⁻¹)]",
        "cv": f"HalfNormal({prior['cv_scale']:g}) on τ, the between-site coefficient of variation",
        "parameters": dict(prior),
        "defaults": dict(DEFAULT_PRIOR),
    }


def summary(result) -> dict:
    post = result.idata.posterior
    sites = result.setup.extra["sites"]
    K = result.setup.extra["site_scans"]
    N = result.setup.inputs["site_counts"]
    W = result.stats.window_total
    scans_eq = np.asarray(result.setup.inputs["site_exposure"]) / W  # E_s/|W|: K_s without gates
    rates = np.asarray(post["site_rate"]).reshape(-1, len(sites))

    def stat(v):
        v = np.asarray(v, float).reshape(-1)
        q = np.quantile(v, [0.05, 0.5, 0.95])
        return {"mean": float(v.mean()), "sd": float(v.std(ddof=1)), "q05": float(q[0]),
                "q50": float(q[1]), "q95": float(q[2])}

    gated = result.stats.has_gates
    note = ("partial pooling: each site's rate is shrunk toward the group rate, the more so the fewer scans "
            "it has; raw_rate = N_s/K_s is the unpooled estimate")
    if gated:
        note += ("; with gates a site's exposure is Σ_k |W_k|, window_scans = Σ_k |W_k|/|W| (scans' worth "
                 "of the whole window) replaces K_s, and N_s counts the detections outside the gates")
    return {
        "units": "detections per scan over the window (each site's own field of view)",
        "group_rate": stat(post["rate"]),
        "between_site_cv": stat(post["cv"]),
        "sites": {s: {"scans": int(K[j]), "detections": int(N[j]), "raw_rate": float(N[j] / scans_eq[j]),
                      "rate": stat(rates[:, j]),
                      **({"window_scans": float(scans_eq[j])} if gated else {})} for j, s in enumerate(sites)},
        "note": note,
        "window_area_m2": W,
    }


def prior_draws(prior: dict, stats, setup, rng: np.random.Generator, n: int) -> dict:
    """Independent prior draws (for the prior predictive check): (n,) and (n, S) arrays."""
    log_mu = rng.normal(setup.inputs["mu_loc"], prior["rate_log_sd"], n)
    cv = np.abs(rng.normal(0.0, prior["cv_scale"], n))
    alpha = 1.0 / cv**2
    mu = np.exp(log_mu)
    S = len(setup.extra["sites"])
    rho = rng.gamma(alpha[:, None], (mu / alpha)[:, None], size=(n, S))
    W = stats.window_total
    return {"rate": mu * W, "site_rate": rho * W, "intensity": mu, "site_intensity": rho}
