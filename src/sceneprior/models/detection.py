"""Detection probability of known objects: a logit-linear model in range.

Data (``tracklog.detection_outcomes``): one row per known object and scan, y_i = 1 when
the scan has a detection inside the object's gate. Model:

    y_i ~ Bernoulli(P_D(r_i)),   logit P_D(r) = β₀ + β₁·(r − m)/s

with r the object's range from the sensor [m] and m, s the window-area-weighted mean and
sd of range over the field of view (geometry only, never the data), so that the priors
mean the same whatever the units:

    β₀ ~ Normal(0, intercept_sd = 1.5)   logit P_D at the window's mean range; Normal(0, 1.5)
                                         puts P_D roughly uniform on (0, 1) (common practice,
                                         no source);
    β₁ ~ Normal(0, coef_sd = 2.5)        per sd of range (as the loglinear clutter model);
    ``coef_sd = inf`` gives a flat (improper) prior on both, whose posterior centres on the
    logistic-regression MLE (tests compare with statsmodels' Logit).

Clutter in the gate: a clutter detection inside a gate also counts as "detected", so the
probability of y = 1 is 1 − (1 − P_D)·exp(−μ_i), μ_i the expected clutter detections in
gate i (clutter intensity × gate area). With ``clutter_in_gate`` given (μ_i ≥ 0) the model
uses that; without it (μ = 0) the fitted P_D is biased upward by about (1 − P_D)·μ.

The function is a plain numpyro model of arrays; it broadcasts over leading batch
dimensions (design (..., n, p), coefficients (..., p)), so tests can fit many simulated
logs at once under one ``numpyro.plate``.
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import numpyro
import numpyro.distributions as dist

DEFAULT_PRIOR = {"intercept_sd": 1.5, "coef_sd": 2.5}
COEFS = ("intercept", "range")


def detection_model(X, detected=None, intercept_sd=1.5, coef_sd=2.5, flat=False, clutter_in_gate=None):
    """X (..., n, 2): columns 1 and standardised range; detected (..., n) 0/1 or None
    (prior / predictive). Site ``beta`` (..., 2) = (β₀, β₁)."""
    p = X.shape[-1]
    if flat:
        beta = numpyro.sample("beta", dist.ImproperUniform(dist.constraints.real_vector, (), (p,)))
    else:
        scale = jnp.concatenate([jnp.array([intercept_sd]), jnp.full((p - 1,), coef_sd)])
        beta = numpyro.sample("beta", dist.Normal(jnp.zeros(p), scale).to_event(1))
    eta = jnp.einsum("...np,...p->...n", X, beta)
    if clutter_in_gate is not None:
        # log(1 − P(y=1)) = log(1 − P_D) − μ;  logits = log P(y=1) − log(1 − P(y=1))
        log_miss = jax.nn.log_sigmoid(-eta) - clutter_in_gate
        eta = jnp.log(-jnp.expm1(log_miss)) - log_miss
    numpyro.sample("detected", dist.Bernoulli(logits=eta).to_event(1), obs=detected)


def cell_ranges(grid) -> np.ndarray:
    """(n0, n1) range of each cell from the sensor (origin) [m]: on polar grids the cell's
    area-weighted mean range ∫r·r dr / ∫r dr = 2(r₂³ − r₁³)/(3(r₂² − r₁²)); on Cartesian grids
    the range of the cell centre."""
    if grid.frame == "polar":
        e = np.asarray(grid.edges0, float)
        rc = 2.0 * (e[1:] ** 3 - e[:-1] ** 3) / (3.0 * (e[1:] ** 2 - e[:-1] ** 2))
        return np.repeat(rc[:, None], grid.shape[1], axis=1)
    X, Y = np.meshgrid(grid.centres0, grid.centres1, indexing="ij")
    return np.hypot(X, Y)


def range_standardisation(region, grid) -> tuple[float, float]:
    """(m, s): window-area-weighted mean and sd of range [m] over the grid cells (the ranges of
    :func:`cell_ranges` weighted by |c ∩ W|). Geometry only."""
    w = np.asarray(region.cell_window_area(grid), float).reshape(-1)
    r = cell_ranges(grid).reshape(-1)
    m = float(np.sum(w * r) / np.sum(w))
    s = float(math.sqrt(np.sum(w * (r - m) ** 2) / np.sum(w)))
    return m, (s if s > 0 else 1.0)


def design(ranges, centre: float, scale: float) -> np.ndarray:
    r = np.asarray(ranges, float)
    return np.stack([np.ones_like(r), (r - centre) / scale], axis=-1)


def pd_draws(beta, ranges, centre: float, scale: float) -> np.ndarray:
    """P_D draws at ``ranges``: beta (S, 2) → (S, len(ranges)) probabilities."""
    b = np.asarray(beta, float).reshape(-1, 2)
    eta = b[:, :1] + b[:, 1:2] * ((np.asarray(ranges, float)[None, :] - centre) / scale)
    return 1.0 / (1.0 + np.exp(-eta))


def original_scale(beta, centre: float, scale: float) -> dict:
    """Coefficients on the original range scale: logit P_D = a + b·r, r in m:
    b = β₁ / s, a = β₀ − β₁ m / s (per posterior draw)."""
    b = np.asarray(beta, float).reshape(-1, 2)
    slope = b[:, 1] / scale
    return {"intercept_at_0_m": b[:, 0] - b[:, 1] * centre / scale, "slope_per_m": slope,
            "slope_per_km": slope * 1000.0}


def describe_prior(prior: dict, centre: float, scale: float) -> dict:
    flat = math.isinf(prior["coef_sd"])
    return {
        "link": "logit P_D(r) = β₀ + β₁·(r − m)/s",
        "standardisation": {"m_range_m": centre, "s_range_m": scale,
                            "note": "window-area-weighted mean and sd of range (geometry only)"},
        "beta[0]": "flat (improper)" if flat else f"Normal(0, {prior['intercept_sd']:g}): logit P_D at range m",
        "beta[1]": "flat (improper)" if flat else f"Normal(0, {prior['coef_sd']:g}) per sd of range",
        "parameters": dict(prior),
        "defaults": dict(DEFAULT_PRIOR),
    }
