"""Log-linear clutter intensity: log λ_c = α + Σ_j β̃_j z_jc  (per m² per scan).

z_jc are the covariates of ``covariates.py`` at the cell centres, centred and scaled by
their window-area-weighted mean m_j and sd s_j (geometry only), so that the priors below
mean the same thing whatever the units. Coefficients on the original scale are
β_j = β̃_j / s_j and the intercept β₀ = α − Σ_j β̃_j m_j / s_j.

Likelihood: the binned PPP log-likelihood Σ_c [N_c log λ_c − E_c λ_c] (DESIGN.md §2).
Its maximum is the Poisson GLM with log link and offset log E_c, which is what the tests
compare against (statsmodels).

Priors (units only, never the counts):
  α ~ Normal(log(rate_median / |W|), rate_log_sd)  — the log intensity at mean covariates;
      default rate_median = 10 detections per scan over the window, rate_log_sd = 3;
  β̃_j ~ Normal(0, coef_sd), default 2.5 per sd of the covariate; coef_sd = inf gives a
      flat (improper) prior.

Polar note: the intensity per m of range per rad of bearing is λ_xy · r (cell average:
λ_c · r_mid), so with covariate log_range its coefficient is exactly 1 larger for the
per-m·rad intensity, the other coefficients unchanged; summary.json reports both.
"""

from __future__ import annotations

import math

import jax.numpy as jnp
import numpy as np
import numpyro
import numpyro.distributions as dist

from ..covariates import UNITS, design_matrix, load_raster, standardise
from ..errors import InputError
from .likelihood import binned_loglik

DEFAULT_PRIOR = {"rate_median": 10.0, "rate_log_sd": 3.0, "coef_sd": 2.5}


def loglinear_model(Z, counts, exposure, window_area, alpha_loc, alpha_scale, coef_sd,
                    means, scales, flat=False, scan_terms=None):
    """numpyro model; Z (n_obs, p) standardised covariates of the observed cells;
    scan_terms: per-scan terms (``models.scanterms``) or None."""
    p = Z.shape[1]
    alpha = numpyro.sample("alpha", dist.Normal(alpha_loc, alpha_scale))
    if flat:
        beta = numpyro.sample("beta_std", dist.ImproperUniform(dist.constraints.real_vector, (), (p,)))
    else:
        beta = numpyro.sample("beta_std", dist.Normal(0.0, coef_sd).expand([p]).to_event(1))
    log_lam = alpha + Z @ beta
    if scan_terms is not None:
        from .scanterms import ppp_factor

        base = jnp.sum(jnp.exp(log_lam) * window_area)
        numpyro.deterministic("rate", base * ppp_factor(jnp.sum(counts * log_lam), base, scan_terms))
    else:
        numpyro.factor("loglik", binned_loglik(log_lam, counts, exposure))
        numpyro.deterministic("rate", jnp.sum(jnp.exp(log_lam) * window_area))
    numpyro.deterministic("coef", beta / scales)
    numpyro.deterministic("intercept", alpha - jnp.sum(beta * means / scales))


def setup(stats, prior: dict, model_spec):
    from .registry import ModelSetup

    names = list(model_spec.options.get("covariates", []))
    if not names:
        raise InputError("model.covariates: a loglinear model needs at least one covariate, e.g. "
                         "[\"log_range\"] (use kind = \"uniform\" for none)")
    rasters = {r["name"]: load_raster(r["name"], r["file"], stats.grid)
               for r in model_spec.options.get("rasters", [])}
    X = design_matrix(names, stats.grid, rasters, source="model.covariates")
    Z, means, scales = standardise(X, stats.window_area, source="model.covariates", names=names)
    obs = stats.exposure > 0
    flat = math.isinf(prior["coef_sd"])
    inputs = dict(
        Z=Z[obs], counts=stats.counts[obs].astype(float), exposure=stats.exposure[obs],
        window_area=stats.window_area[obs],
        alpha_loc=math.log(prior["rate_median"] / stats.window_total),
        alpha_scale=prior["rate_log_sd"], coef_sd=1.0 if flat else prior["coef_sd"],
        means=means, scales=scales, flat=flat,
    )
    return ModelSetup(inputs=inputs, extra={
        "names": names, "Z": Z, "means": means, "scales": scales,
        "dims": {"beta_std": ["covariate"], "coef": ["covariate"]},
        "coords": {"covariate": names},
    })


def cell_intensity(posterior: dict, stats, setup) -> np.ndarray:
    alpha = np.asarray(posterior["alpha"])
    beta = np.asarray(posterior["beta_std"])
    return np.exp(alpha[..., None] + np.einsum("cdp,np->cdn", beta, setup.extra["Z"]))


def describe_prior(prior: dict, stats) -> dict:
    flat = math.isinf(prior["coef_sd"])
    return {
        "alpha": f"Normal(log({prior['rate_median']:g} / |W|), {prior['rate_log_sd']:g}) on the log "
                 "intensity [log(m⁻² scan⁻¹)] at mean covariates",
        "beta_std": "flat (improper) on the standardised coefficients" if flat else
                    f"Normal(0, {prior['coef_sd']:g}) per standardised coefficient (per sd of the covariate)",
        "parameters": {k: (str(v) if math.isinf(v) else v) for k, v in prior.items()},
        "defaults": dict(DEFAULT_PRIOR),
    }


def summary(result) -> dict:
    names = result.setup.extra["names"]
    post = result.idata.posterior
    coef = np.asarray(post["coef"]).reshape(-1, len(names))
    icpt = np.asarray(post["intercept"]).reshape(-1)

    def stat(v):
        q = np.quantile(v, [0.05, 0.5, 0.95])
        return {"mean": float(v.mean()), "sd": float(v.std(ddof=1)), "q05": float(q[0]),
                "q50": float(q[1]), "q95": float(q[2])}

    out = {
        "intensity_units": "m-2 scan-1",
        "intercept": {"units": "log(m-2 scan-1)", **stat(icpt)},
        "coefficients": {n: {"units": f"per {UNITS.get(n.split('^')[0], 'unit of ' + n)}"
                             if "*" not in n else "per unit of the product", **stat(coef[:, j])}
                         for j, n in enumerate(names)},
        "standardisation": {n: {"mean": float(result.setup.extra["means"][j]),
                                "sd": float(result.setup.extra["scales"][j])} for j, n in enumerate(names)},
    }
    if result.stats.grid.frame == "polar":
        if "log_range" in names:
            j = names.index("log_range")
            out["per_m_rad"] = {
                "note": "intensity per m of range per rad of bearing = per-m² intensity × range: "
                        "the log_range coefficient is exactly 1 larger, the others unchanged",
                "log_range": {"units": "per log(m)", **stat(coef[:, j] + 1.0)},
            }
        else:
            out["per_m_rad"] = {"note": "per-m·rad intensity = per-m² intensity × range; add "
                                        "log_range to express it in the same log-linear form"}
    return out
