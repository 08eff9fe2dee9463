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


# --------------------------------------------------------------------------------------
# Per-scan terms: over-dispersion and per-scan rate multipliers (DESIGN.md §3)
#
# Scan k has intensity λ_k(z) = u_k m_k λ(z): m_k = exp(x_kᵀγ + δ_t(k)) a known function of
# the scan's covariates and time bin, u_k a per-scan factor. Given u_k the set density is
# u_k^{n_k} m_k^{n_k} exp(−u_k m_k Λ) ∏ λ(z_i), Λ = Σ_c λ_c |c ∩ W| (a common window).
# With u_k ~ Gamma(a, a), a = 1/φ (mean 1, variance φ), integrating u_k out:
#
#   ∫ u^{n+a−1} e^{−u(a+mΛ)} du · a^a/Γ(a) = Γ(a+n) a^a / (Γ(a) (a+mΛ)^{a+n}),
#
#   log f(Z_k) = a log a − lgamma(a) + lgamma(a+n_k) − (a+n_k) log(a + m_kΛ)
#                + n_k log m_k + Σ_i log λ(z_i),
#
# a negative-binomial cardinality with mean m_kΛ and variance m_kΛ + φ(m_kΛ)² (Lawless
# 1987; scipy.stats.nbinom(n = a, p = a/(a + m_kΛ))) times n_k i.i.d. positions from λ/Λ.
# As φ → 0 it tends to the Poisson form −m_kΛ + n_k log m_k + Σ_i log λ(z_i).
# The numerically stable form used below: a log a − (a+n) log(a+μ) = −a·log1p(μ/a) − n·log(a+μ).
# --------------------------------------------------------------------------------------


def _xp(*arrays):
    """numpy (and scipy.special.gammaln) for numpy inputs, else jax."""
    if all(isinstance(a, (np.ndarray, np.generic, float, int)) for a in arrays):
        from scipy.special import gammaln

        return np, gammaln
    import jax.numpy as jnp
    from jax.scipy.special import gammaln

    return jnp, gammaln


_HALF_LOG_2PI = 0.5 * np.log(2 * np.pi)


def stirling_remainder(x):
    """R(x) = lgamma(x) − [(x − ½) log x − x + ½ log 2π]: by its asymptotic series for
    x ≥ 10 (truncation error < 1e-13; Abramowitz & Stegun 6.1.41), directly below."""
    xp, gammaln = _xp(x)
    big = x >= 10.0
    xb = xp.where(big, x, 10.0)
    series = 1.0 / (12 * xb) - 1.0 / (360 * xb**3) + 1.0 / (1260 * xb**5)
    xs = xp.where(big, 1.0, x)
    direct = gammaln(xs) - ((xs - 0.5) * xp.log(xs) - xs + _HALF_LOG_2PI)
    return xp.where(big, series, direct)


def nb_cardinality_logterm(n, mu, phi):
    """a log a − lgamma(a) + lgamma(a+n) − (a+n) log(a+μ), a = 1/φ: the per-scan
    over-dispersed replacement of the Poisson term −μ (jax or numpy; broadcasts).

    Equals scipy.stats.nbinom(a, a/(a+μ)).logpmf(n) + lgamma(n+1) − n·log μ. Evaluated
    without cancellation for any a (φ → 0 included) through Stirling's form,
    lgamma(a+n) − lgamma(a) = (a − ½) log1p(n/a) + n log(a+n) − n + R(a+n) − R(a):

        a·[log1p(n/a) − log1p(μ/a)] − ½ log1p(n/a) + n·log1p((n−μ)/(a+μ)) − n + R(a+n) − R(a).
    """
    xp, _ = _xp(n, mu, phi)
    a = 1.0 / phi
    return (a * (xp.log1p(n / a) - xp.log1p(mu / a)) - 0.5 * xp.log1p(n / a)
            + n * xp.log1p((n - mu) / (a + mu)) - n + stirling_remainder(a + n) - stirling_remainder(a))


def scan_loglik(sum_n_loglam, Lam, log_mult_rows, rows_count, rows_scans,
                nb_n=None, nb_row=None, nb_weight=None, phi=None, rows_removed=None, nb_removed=None):
    """Total PPP log-likelihood over K scans with per-scan multipliers and optional
    over-dispersion — the one definition used by every binned model with per-scan terms.

    sum_n_loglam: Σ_c N_c log λ_c (the base intensity, cells summed over scans);
    Lam: Λ = Σ_c λ_c |c ∩ W| (base rate per scan over the permanent window);
    log_mult_rows: (D,) log m_d for the D distinct per-scan designs (0 when none);
    rows_count: (D,) detections summed over the scans with design d; rows_scans: (D,)
    number of scans with design d.
    Per-scan windows W_k ⊆ W (gates): scan k's base integral is Λ_k = Λ − R_k,
    R_k = Σ_c λ_c removed[k, c]; rows_removed: (D,) Σ_{k∈d} R_k; nb_removed: (U,) R_k of
    each over-dispersed group's scans (None: no gates, Λ_k = Λ).
    Poisson (phi None): Σ_c N_c log λ_c + Σ_d [N_d log m_d − m_d (K_d Λ − Σ_{k∈d} R_k)].
    Over-dispersed: the Poisson cardinality term is replaced by
    Σ_u w_u · nb_cardinality_logterm(n_u, m_{row_u} (Λ − R_u), φ) over the distinct
    (n_k, design, R_k) groups u (nb_n, nb_row, nb_weight = how many scans share the group).
    """
    import jax.numpy as jnp

    ll = sum_n_loglam + jnp.sum(rows_count * log_mult_rows)
    if phi is None:
        exposure = Lam * rows_scans if rows_removed is None else Lam * rows_scans - rows_removed
        return ll - jnp.sum(exposure * jnp.exp(log_mult_rows))
    base = Lam if nb_removed is None else Lam - nb_removed
    mu = base * jnp.exp(log_mult_rows[nb_row])
    return ll + jnp.sum(nb_weight * nb_cardinality_logterm(nb_n, mu, phi))


def gated_integral(log_lam: np.ndarray, removed) -> np.ndarray:
    """R_sk = Σ_c λ_sc removed[k, c] (S, K): the base intensity's expected count inside scan
    k's gates; log_lam (S, n_cells) [log(m⁻² scan⁻¹)], removed (K, n_cells) sparse [m²].
    Cells with non-finite log λ (masked) carry no removed area."""
    lam = np.exp(np.asarray(log_lam, float))
    lam = np.where(np.isfinite(lam), lam, 0.0)
    return np.asarray(removed @ lam.T).T


def per_scan_loglik_general(log_lam: np.ndarray, scan_cell, window_area: np.ndarray,
                            log_mult: np.ndarray | None = None, phi: np.ndarray | None = None,
                            Lam: np.ndarray | None = None, removed=None) -> np.ndarray:
    """Pointwise per-scan set log-density (point-process measure) for LOO, shape (S, K).

    log_lam: (S, n_cells) base log-intensity draws [log(m⁻² scan⁻¹)]; scan_cell: (K, n_cells)
    sparse counts n_kc; log_mult: (S, K) log m_k or None; phi: (S,) or None; Lam: (S,) base
    rate Σ_c λ_c|c ∩ W| (computed from log_lam when None); removed: (K, n_cells) sparse area
    [m²] of each scan's gates (None: every scan has the window W).
    Poisson: Σ_c n_kc log λ_c + n_k log m_k − m_k Λ_k, Λ_k = Λ − Σ_c λ_c removed[k, c] the
    integral over scan k's window W_k; over-dispersed: −m_kΛ_k replaced by
    ``nb_cardinality_logterm(n_k, m_kΛ_k, φ)``. With log_mult, phi and removed None this
    equals :func:`per_scan_loglik`.
    """
    log_lam = np.asarray(log_lam, float)
    safe = np.where(np.isfinite(log_lam), log_lam, 0.0)
    first = np.asarray(scan_cell @ safe.T).T  # (S, K)
    n = np.asarray(scan_cell.sum(axis=1)).reshape(-1).astype(float)  # (K,)
    if Lam is None:
        Lam = (np.exp(log_lam) * window_area).sum(axis=-1)
    Lam = np.asarray(Lam, float).reshape(-1, 1)
    if removed is not None:
        Lam = Lam - gated_integral(log_lam, removed)
    lm = np.zeros((1, n.size)) if log_mult is None else np.asarray(log_mult, float)
    mu = Lam * np.exp(lm)
    if phi is None:
        card = -mu
    else:
        card = nb_cardinality_logterm(n[None, :], mu, np.asarray(phi, float).reshape(-1, 1))
    return first + n[None, :] * lm + card
