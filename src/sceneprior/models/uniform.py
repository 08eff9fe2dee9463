"""Homogeneous clutter: λ(z) = ρ, per m² per scan, over the window.

Prior ρ ~ Gamma(a, b·|W|), where the user states the prior on the rate per scan
λ̄ = ρ|W| as Gamma(a, b) with b in scans (a prior "worth" b scans of exposure and a
detections). With N detections over exposure E = Σ_k |W_k| (m²·scan) the posterior is
Gamma(a + N, b|W| + E) — conjugate Gamma–Poisson (Gelman et al., Bayesian Data Analysis,
3rd ed., §2.6). The NUTS path below must reproduce it; ``exact_posterior`` gives it.

Default prior (units only, never the counts): a = 1, b = 0.1 scans, i.e. an exponential
prior on the rate per scan with mean 10 detections per scan, worth a tenth of a scan.

With gates around known objects (issue 7) E = Σ_k |W_k| < K|W| is the gated exposure and N
counts the detections outside the gates; the rate stays ρ|W|, the clutter rate over the
permanent window (what a tracker's clutter model needs).
"""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import numpyro
import numpyro.distributions as dist

DEFAULT_PRIOR = {"shape": 1.0, "rate": 0.1}


def uniform_model(total_count, total_exposure, window_total, shape, rate, scan_terms=None):
    """numpyro model of a homogeneous PPP from its sufficient statistics.

    total_count: N = Σ_c N_c; total_exposure: E = Σ_c E_c [m²·scan];
    window_total: |W| [m²]; shape, rate: Gamma prior on the rate per scan (rate in scans).
    scan_terms: per-scan terms (over-dispersion, scan covariates, time bins;
    ``models.scanterms``) or None.
    Sites: ``intensity`` ρ [m⁻² scan⁻¹], deterministic ``rate`` ρ|W| [detections/scan].
    """
    rho = numpyro.sample("intensity", dist.Gamma(shape, rate * window_total))
    if scan_terms is not None:
        from .scanterms import ppp_factor

        mean_mult = ppp_factor(total_count * jnp.log(rho), rho * window_total, scan_terms, intensity=rho)
        numpyro.deterministic("rate", rho * window_total * mean_mult)
        return
    # log L = N log ρ − E ρ (DESIGN.md §2, piecewise constant with one level)
    numpyro.factor("loglik", total_count * jnp.log(rho) - total_exposure * rho)
    numpyro.deterministic("rate", rho * window_total)


def setup(stats, prior: dict, model_spec=None):
    from .registry import ModelSetup

    return ModelSetup(inputs=dict(
        total_count=float(stats.counts.sum()),
        total_exposure=stats.total_exposure,
        window_total=stats.window_total,
        shape=prior["shape"],
        rate=prior["rate"],
    ))


def exact_posterior(stats, prior: dict) -> tuple[float, float]:
    """(shape, rate) of the Gamma posterior of ρ; rate in m²·scan."""
    a, b = prior["shape"], prior["rate"] * stats.window_total
    return a + float(stats.counts.sum()), b + stats.total_exposure


def exact_draws(stats, prior: dict, rng: np.random.Generator, chains: int, draws: int) -> dict:
    """Independent draws from the conjugate posterior, shaped (chain, draw)."""
    a_post, b_post = exact_posterior(stats, prior)
    rho = rng.gamma(a_post, 1.0 / b_post, size=(chains, draws))
    return {"intensity": rho, "rate": rho * stats.window_total}


def cell_intensity(posterior: dict, stats, setup=None) -> np.ndarray:
    """Per-cell intensity draws [m⁻² scan⁻¹], shaped (chain, draw, n_cells) by broadcasting."""
    rho = np.asarray(posterior["intensity"])
    return np.broadcast_to(rho[..., None], rho.shape + (stats.grid.n_cells,))


def describe_prior(prior: dict, stats) -> dict:
    return {
        "intensity": f"Gamma(shape={prior['shape']:g}, rate={prior['rate'] * stats.window_total:.6g} m²·scan)"
                     " on ρ [m⁻² scan⁻¹]",
        "rate": f"Gamma(shape={prior['shape']:g}, rate={prior['rate']:g} scans) on the rate per scan "
                f"(prior mean {prior['shape'] / prior['rate']:g} detections/scan)",
        "parameters": dict(prior),
        "defaults": dict(DEFAULT_PRIOR),
    }
