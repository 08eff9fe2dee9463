"""The per-cell term integrated out (``models.cell_term``): the Poisson–lognormal marginal and
the exact draws of the term, against numerical integration by scipy.integrate.quad."""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.integrate
import scipy.optimize
import scipy.stats

from sceneprior.models import cell_term


# counts, η − log max(N, 0.3), v, Gauss–Hermite nodes: few and many counts, intensities below
# and above the data's, term variances from negligible to large (v = σ² (1 − kept) at σ up to
# 1.4 and q 0.75), each at the largest variance its rule is chosen for (cell_term.nodes_for)
CASES = [(n, dt, v, cell_term.nodes_for(v)) for n in (0, 1, 4, 60, 2000) for dt in (-2.0, 0.0, 1.5)
         for v in (1e-4, 0.05, 0.5) + tuple(limit for limit, _ in cell_term.NODES_BY_VARIANCE)]
# far above the data (early warmup, empty cells in a busy region): where Newton on ε itself
# crawls, about one unit per step
CASES += [(n, dt, v, cell_term.nodes_for(v)) for n in (0, 300) for dt in (3.0, 6.0) for v in (0.1, 0.3)]
# beyond the table (GH_NODES), and tiny variances with many counts or far above the data,
# where the nodes' placement error is largest in units of the rule's scale
CASES += [(60, 0.0, 0.7, cell_term.nodes_for(0.7)), (10_000_000, 0.0, 1e-7, cell_term.nodes_for(1e-7)),
          (0, 1.0 - math.log(1e-12) - math.log(0.3), 1e-12, cell_term.nodes_for(1e-12))]


def _integrals(n, eta, v, moments=True):
    """(log ∫ e^{h}, E[ε], E[e^{η+ε}]) under p(ε) ∝ e^{h(ε)}, h(ε) = n(η + ε) − e^{η+ε} −
    ε²/(2v), by scipy.integrate.quad around the mode over ±60 of its curvature scales
    (``moments`` False: log ∫ e^{h} alone, the moments None)."""
    m = float(cell_term.posterior_mode(n, eta, v)[0])
    s = 1.0 / math.sqrt(math.exp(eta + m) + 1.0 / v)
    hm = n * (eta + m) - math.exp(eta + m) - m * m / (2.0 * v)

    def w(e):
        return math.exp(n * (eta + e) - math.exp(min(eta + e, 700.0)) - e * e / (2.0 * v) - hm)

    kw = dict(points=[m], limit=400, epsabs=0.0, epsrel=1e-12)
    lo, hi = m - 60.0 * s, m + 60.0 * s
    z = scipy.integrate.quad(w, lo, hi, **kw)[0]
    if not moments:
        return math.log(z) + hm, None, None
    mean = scipy.integrate.quad(lambda e: e * w(e), lo, hi, **(kw | {"epsabs": 1e-12 * z}))[0] / z  # E[ε] may be 0
    rate = scipy.integrate.quad(lambda e: math.exp(eta + e) * w(e), lo, hi, **kw)[0] / z
    return math.log(z) + hm, mean, rate


# quad reports round-off in the 10⁷-count case (an exponent of about 1.6e8 cancelling to order one);
# the agreement asserted below is what counts
@pytest.mark.filterwarnings("ignore::scipy.integrate.IntegrationWarning")
def test_marginal_and_its_gradient_match_numerical_integration():
    """log p(N | η) + log N! = log ∫ Pois(N | e^{η+ε}) N(ε; 0, v) dε + log N! by the module's
    adaptive Gauss–Hermite rule (each rule at the largest variance it is chosen for), against
    scipy.integrate.quad; and its gradient
    (jax, the nodes held) against the exact derivatives d/dη = N − E[e^{η+ε}] and d/dv =
    E[ε²]/(2v²) − 1/(2v) under the conditional of ε (the
    derivative of a log integral: the integrand's log derivative averaged under the
    normalised integrand; E[ε²] by quad as well)."""
    grad = jax.jit(jax.grad(lambda eta, v, n, k: cell_term.marginal_loglik(n[None], eta[None], v, k)[0],
                            argnums=(0, 1)), static_argnums=3)
    assert {k for *_, k in CASES} == {k for _, k in cell_term.NODES_BY_VARIANCE} | {cell_term.GH_NODES}
    assert all(v <= cell_term.variance_limit(k) for _, _, v, k in CASES)
    for n, dt, v, k in CASES:
        eta = math.log(max(n, 0.3)) + dt
        log_z, mean, rate = _integrals(n, eta, v)
        ref = log_z - 0.5 * math.log(2.0 * math.pi * v)
        got = float(cell_term.marginal_loglik(jnp.array([float(n)]), jnp.array([eta]), v, k)[0])
        # to round-off where log p is huge (−1.5e12 far above the data: float64's spacing there is 2.4e-4)
        assert abs(got - ref) < max(1e-7, 1e-15 * abs(ref)), (n, dt, v, k, got - ref)
        reference = float(cell_term.marginal_loglik(jnp.array([float(n)]), jnp.array([eta]), v,
                                                    cell_term.REFERENCE_NODES)[0])
        # the summary's yardstick (rule_error), to round-off as above
        assert abs(reference - ref) < max(1e-9, 1e-15 * abs(ref)), (n, dt, v, reference - ref)
        g_eta, g_v = (float(x) for x in grad(jnp.asarray(eta), jnp.asarray(v), jnp.asarray(float(n)), k))
        assert g_eta == pytest.approx(n - rate, rel=1e-6, abs=1e-6 * max(n, 1.0)), (n, dt, v)
        assert g_v == pytest.approx(_d_v(n, eta, v, log_z), rel=1e-5, abs=1e-6 / v), (n, dt, v)


def _d_v(n, eta, v, log_z):
    """d/dv log p = E[ε²]/(2v²) − 1/(2v) under p(ε) ∝ e^{h(ε)} (the derivative of a log
    integral), E[ε²] by scipy.integrate.quad; ``log_z`` = log ∫ e^{h} from ``_integrals``."""
    m = float(cell_term.posterior_mode(n, eta, v)[0])
    s = 1.0 / math.sqrt(math.exp(eta + m) + 1.0 / v)
    hm = n * (eta + m) - math.exp(eta + m) - m * m / (2.0 * v)
    second = scipy.integrate.quad(lambda e: e * e * math.exp(n * (eta + e) - math.exp(eta + e) - e * e / (2 * v)
                                                               - hm), m - 60 * s, m + 60 * s, points=[m],
                                  limit=400, epsabs=0.0, epsrel=1e-12)[0] / math.exp(log_z - hm)
    return second / (2.0 * v * v) - 1.0 / (2.0 * v)


def test_term_draws_follow_their_exact_conditional():
    """draw_terms's rejection sampler against p(ε | N, η) ∝ e^{h(ε)} tabulated by
    scipy.integrate.quad: 20 000 draws per case binned at the conditional's deciles (found by
    quad and scipy.optimize.brentq), scipy.stats.chisquare, Bonferroni over the cases at
    α = 0.001; and cells without exposure (η = −∞) against N(0, v) by scipy.stats.kstest."""
    import scipy.optimize

    rng = np.random.default_rng(7)
    cases = [(0, 0.5, 0.5), (3, -1.0, 0.2), (60, 0.0, 0.05), (60, 1.0, 0.05), (2000, 0.3, 0.5)]
    draws = 20_000
    for n, dt, v in cases:
        eta = math.log(max(n, 0.3)) + dt
        eps = cell_term.draw_terms(np.array([float(n)]), np.full((draws, 1), eta), np.full(draws, v), rng)[:, 0]
        log_z, mean, _ = _integrals(n, eta, v)
        m = float(cell_term.posterior_mode(n, eta, v)[0])
        s = 1.0 / math.sqrt(math.exp(eta + m) + 1.0 / v)
        hm = n * (eta + m) - math.exp(eta + m) - m * m / (2.0 * v)
        z = math.exp(log_z - hm)

        def cdf(x):
            return scipy.integrate.quad(lambda e: math.exp(n * (eta + e) - math.exp(eta + e) - e * e / (2 * v) - hm),
                                        m - 60 * s, x, limit=400, epsabs=0.0, epsrel=1e-10)[0] / z

        cuts = [scipy.optimize.brentq(lambda x: cdf(x) - q, m - 60 * s, m + 60 * s, xtol=1e-12)
                for q in np.arange(1, 10) / 10]
        observed = np.bincount(np.searchsorted(cuts, eps), minlength=10)
        p = scipy.stats.chisquare(observed, np.full(10, draws / 10)).pvalue
        assert p > 0.001 / len(cases), (n, dt, v, observed)
        assert abs(np.mean(eps) - mean) < 4.0 * np.std(eps) / math.sqrt(draws), (n, dt, v)
    v = np.full(draws, 0.3)
    prior = cell_term.draw_terms(np.array([0.0]), np.full((draws, 1), -np.inf), v, rng)[:, 0]
    assert scipy.stats.kstest(prior, scipy.stats.norm(0.0, math.sqrt(0.3)).cdf).pvalue > 0.001


def test_mode_is_the_lambert_w_solution():
    """The integrand's mode: ``lambert_w`` (the sampler's, Halley steps on log w) against
    scipy.special.lambertw, W(e^L) for L from −50 to 10⁴, to float64 round-off; its derivative
    W/(1 + W) (implicit differentiation) against central differences of scipy's; and the
    numpy mode of the draws (``posterior_mode``) solves h'(m) = N − e^{η+m} − m/v = 0."""
    import scipy.special

    L = np.concatenate([np.linspace(-50.0, 5.0, 2201), np.geomspace(5.0, 1e4, 600)])
    w = np.asarray(jax.jit(cell_term.lambert_w)(jnp.asarray(L)))
    ref = np.array([scipy.special.lambertw(np.exp(x)).real if x < 700 else np.nan for x in L])
    big = ~np.isfinite(ref)  # e^L overflows: W from its defining equation instead
    ref[big] = [scipy.optimize.brentq(lambda y, x=x: y + math.log(y) - x, 1.0, x, xtol=1e-14, rtol=1e-15)
                for x in L[big]]
    np.testing.assert_allclose(w, ref, rtol=1e-13, atol=0.0)
    grad = np.asarray(jax.jit(jax.vmap(jax.grad(cell_term.lambert_w)))(jnp.asarray(L)))
    small = L < 600
    h = 1e-5
    lw = scipy.special.lambertw
    central = np.array([(lw(np.exp(x + h)).real - lw(np.exp(x - h)).real) / (2 * h) for x in L[small]])
    np.testing.assert_allclose(grad[small], central, rtol=1e-7, atol=1e-300)
    for n, eta, v in [(0, 8.0, 0.3), (300, math.log(300) + 6, 1.0), (5, -3.0, 0.05), (3000, 7.0, 2.0)]:
        m, w = cell_term.posterior_mode(n, eta, v)
        assert abs(n - math.exp(eta + m) - m / v) < 1e-9 * max(n, math.exp(eta + m), 1.0)


@pytest.mark.filterwarnings("ignore::scipy.integrate.IntegrationWarning")
def test_laplace_expansion_matches_numerical_integration():
    """The second-order Laplace expansion (``cell_term.laplace``, the rule LAPLACE) against
    scipy.integrate.quad: where the data are strong (t = v/(1 + W) small) its value is within
    1e-8 nats and its gradient matches d/dη = N − E[e^{η+ε}] and d/dv = E[ε²]/(2v²) − 1/(2v)
    (quad, as in the Gauss–Hermite test), up to 10⁷ counts; above its variance bound the
    rule hands over to GH_NODES nodes; and its error falls as t³ when v halves
    at a fixed W (ratios 6–10 per halving), which a wrong second-order coefficient would
    turn into t² (ratio 4) — Laplace's method and its expansion: module docstring."""
    grad = jax.jit(jax.grad(lambda eta, v, n: cell_term.marginal_loglik(n[None], eta[None], v, cell_term.LAPLACE)[0],
                            argnums=(0, 1)))
    # strong data, and 10⁷ counts where d/dv through the mode would cancel terms of order N²
    cases = [(n, dt, v) for n in (60, 2000) for dt in (-0.5, 0.0, 0.5) for v in (0.003, 0.03)]
    cases += [(10_000_000, -1.0, 0.03), (10_000_000, 0.0, 1e-7)]
    for n, dt, v in cases:
        eta = math.log(n) + dt
        log_z, mean, rate = _integrals(n, eta, v)
        ref = log_z - 0.5 * math.log(2.0 * math.pi * v)
        got = float(cell_term.laplace(jnp.array([float(n)]), jnp.array([eta]), v)[0])
        assert abs(got - ref) < max(1e-8, 1e-15 * abs(ref)), (n, dt, v, got - ref)
        g_eta, g_v = (float(x) for x in grad(jnp.asarray(eta), jnp.asarray(v), jnp.asarray(float(n))))
        assert g_eta == pytest.approx(n - rate, rel=1e-6, abs=1e-6 * n), (n, dt, v)
        assert g_v == pytest.approx(_d_v(n, eta, v, log_z), rel=1e-5, abs=1e-6 / v), (n, dt, v)
    # above its bound the rule is GH_NODES nodes (where the expansion is off: few counts, large v)
    n, eta = jnp.array([0.0, 3.0]), jnp.array([0.0, 1.0])
    for v in (0.05, 30.0):
        bounded = np.asarray(cell_term.marginal_loglik(n, eta, v, cell_term.LAPLACE, laplace_up_to=0.1))
        expected = cell_term.laplace(n, eta, v) if v <= 0.1 else cell_term.marginal_loglik(n, eta, v, cell_term.GH_NODES)
        np.testing.assert_allclose(bounded, np.asarray(expected), rtol=1e-13, atol=1e-13)  # compiled apart
    exact = _integrals(0, 0.0, 30.0, moments=False)[0] - 0.5 * math.log(2.0 * math.pi * 30.0)
    assert abs(float(cell_term.laplace(n, eta, 30.0)[0]) - exact) > 0.1  # why the bound: the expansion there
    for w in (0.5, 2.0):  # the mode at ε = 0: N = e^η = w/v
        errors = []
        for v in (0.008, 0.016, 0.032, 0.064):
            n = w / v
            eta = math.log(n)
            ref = _integrals(n, eta, v, moments=False)[0] - 0.5 * math.log(2.0 * math.pi * v)
            errors.append(abs(float(cell_term.laplace(jnp.array([n]), jnp.array([eta]), v)[0]) - ref))
        ratios = np.array(errors[1:]) / np.array(errors[:-1])
        assert np.all((ratios > 6.0) & (ratios < 10.0)), (w, errors)


@pytest.mark.filterwarnings("ignore::scipy.integrate.IntegrationWarning")
def test_rule_sized_on_the_cells_is_the_fewest_within_budget():
    """nodes_for_cells (the set-up's sizing on a fit's own cells) picks the cheapest candidate
    rule (the Laplace expansion, then the fewest nodes) whose summed error over the cells is
    within the budget at every variance given — the errors measured here against
    scipy.integrate.quad instead of its own 40-node yardstick: the chosen rule is within the
    budget, and every cheaper candidate is not."""
    rng = np.random.default_rng(11)
    counts = np.concatenate([rng.poisson(60.0, 60), rng.poisson(0.5, 30)]).astype(float)
    eta = np.log(np.maximum(counts, 0.3)) + 0.1 * rng.standard_normal(counts.size)
    # few counts at large term variances, where the Laplace expansion and 3 and 5 nodes miss the
    # budget (the choice: 7 nodes)
    variances, budget = (0.1, 0.3), 3e-5
    nodes, tried = cell_term.nodes_for_cells(counts, eta, variances, budget)
    exact = {v: np.array([_integrals(n, e, v, moments=False)[0] - 0.5 * math.log(2.0 * math.pi * v)
                          for n, e in zip(counts, eta)])
             for v in variances}

    def summed_error(k):
        return max(float(np.sum(np.abs(np.asarray(cell_term.marginal_loglik(jnp.asarray(counts), jnp.asarray(eta), v, k))
                                       - exact[v]))) for v in variances)

    assert summed_error(nodes) <= budget, (nodes, tried)
    fewer = [k for k in cell_term.CANDIDATE_NODES if k < nodes]
    assert fewer, (nodes, tried)  # the case is chosen so that the fewest candidate does not suffice
    assert all(summed_error(k) > budget for k in fewer), (nodes, tried)
    # the yardstick (the 40-node rule) measures the candidates' errors as quad does
    for k in tried:
        assert tried[k] == pytest.approx(summed_error(k), rel=1e-3, abs=1e-9), k
    # strong data at small variances: the Laplace expansion, within the budget by quad too
    strong = counts[:60]
    nodes, tried = cell_term.nodes_for_cells(strong, eta[:60], (0.0074, 0.03), budget)
    assert nodes == cell_term.LAPLACE and list(tried) == [cell_term.LAPLACE], tried
    exact_strong = np.array([_integrals(n, e, 0.03, moments=False)[0] - 0.5 * math.log(2.0 * math.pi * 0.03)
                             for n, e in zip(strong, eta[:60])])
    assert np.sum(np.abs(np.asarray(cell_term.laplace(jnp.asarray(strong), jnp.asarray(eta[:60]), 0.03))
                         - exact_strong)) <= budget
    # a budget no rule meets: every candidate tried, the most nodes returned, its error reported
    nodes, tried = cell_term.nodes_for_cells(counts, eta, variances, 1e-15)
    assert nodes == cell_term.GH_NODES and sorted(tried) == list(cell_term.CANDIDATE_NODES) and tried[nodes] > 1e-15
    with pytest.raises(ValueError, match="no term variance"):
        cell_term.nodes_for_cells(counts, eta, (), budget)
