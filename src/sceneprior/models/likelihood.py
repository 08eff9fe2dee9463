"""Poisson point-process log-likelihoods (set-density measure, DESIGN.md §2 and §7).

For a PPP with intensity λ on the window W, the set density of Z = {z_1..z_n} is

    f(Z) = exp(−∫_W λ) ∏ λ(z_i)        (no 1/n!: the ordered density carries it)

For λ piecewise constant on cells c, summed over scans:

    log L = Σ_c [ N_c log λ_c − E_c λ_c ],  E_c = Σ_k |c ∩ W_k|.

These functions are the single definition used by every binned model and by the per-scan
pointwise log-likelihood (scans are the exchangeable units for LOO).
"""

from __future__ import annotations

import numpy as np


def binned_loglik(log_lam, counts, exposure):
    """Σ_c [N_c log λ_c − E_c λ_c] (jax or numpy arrays; cells with N_c = 0 contribute
    −E_c λ_c only, so log λ may be anything finite there)."""
    import jax.numpy as jnp

    xp = jnp if not isinstance(log_lam, np.ndarray) else np
    return xp.sum(counts * log_lam - exposure * xp.exp(log_lam), axis=-1)


def per_scan_loglik(log_lam: np.ndarray, scan_cell, window_area: np.ndarray) -> np.ndarray:
    """Per-scan set log-density for piecewise-constant draws with a common window.

    log_lam: (S, n_cells) draws; scan_cell: (K, n_cells) sparse counts; returns (S, K):
    Σ_c n_kc log λ_c − Σ_c λ_c |c ∩ W|.
    """
    log_lam = np.asarray(log_lam, float)
    safe = np.where(np.isfinite(log_lam), log_lam, 0.0)
    first = np.asarray(scan_cell @ safe.T).T  # (S, K)
    second = (np.exp(log_lam) * window_area).sum(axis=-1)  # (S,)
    return first - second[:, None]
