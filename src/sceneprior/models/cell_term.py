"""The per-cell term of a truncated field, integrated out of the sampler cell by cell.

With ``model.dropped_modes = "per_cell"`` (``lgcp``), log λ_c = μ + f_c + ε_c with ε_c ~ N(0, v)
independent per cell, v the variance the truncation dropped. Given μ and the kept field f,
each cell's counts have a one-dimensional marginal (the Poisson–lognormal distribution;
Aitchison & Ho 1989, from memory):

    p(N_c | η_c) = ∫ Pois(N_c | e^{η_c + ε}) N(ε; 0, v) dε,   η_c = log E_c + μ + f_c,

so the sampler needs no coordinate per cell. Up to the constant −log N_c!,

    log p = log ∫ e^{h(ε)} dε − ½ log(2πv),   h(ε) = N(η + ε) − e^{η+ε} − ε²/(2v),

h strictly concave (h'' = −e^{η+ε} − 1/v). The integral is taken by adaptive Gauss–Hermite
quadrature (Liu & Pierce 1994, from memory; ``nodes_for_cells`` sizes the rule on a fit's own
cells, ``nodes_for`` for any data set): with the mode m
of h and s = (−h''(m))^{−1/2},

    ∫ e^{h} dε = √2 s ∫ e^{−x²} e^{h(m + √2 s x) + x²} dx ≈ √2 s Σ_k w_k e^{h(m + √2 s x_k) + x_k²},

x_k, w_k the Gauss–Hermite rule (numpy.polynomial.hermite.hermgauss). The rule holds for
any centre and scale; m and s only place the nodes where the integrand is, so they are held
fixed under differentiation (the rule computes its gradient itself, ``_gauss_hermite``):
the gradient is the rule's derivative at fixed nodes, which estimates the integral's
derivative, E[N − e^{η+ε}] in η, as accurately as the rule estimates the integral (tests/test_cell_term.py checks both against
scipy.integrate.quad). The mode in closed form: h'(m) = 0 gives m = vN − W(v e^{η+vN}), W
the Lambert W function (Corless et al. 1996, from memory), the root w of
w + log w = L = log v + η + vN (in the sampler ``lambert_w``, Halley steps on log w; for
the draws ``posterior_mode``, Newton steps on w), and then e^{η+m} = W/v and s² = v/(1 + W).

Where the data are strong the integrand is nearly Gaussian and the rule may be Laplace's
method with its corrections instead (LAPLACE, ``laplace``; the sizing picks it where its
error on the fit's cells is within budget). With t = 1/(−h''(m)) = v/(1 + W), q = e^{η+m} t
= W/(1 + W), and every derivative of h from the third on equal to −e^{η+m}, the scaled
derivatives λ_k = h^{(k)}(m) t^{k/2} are −q t^{k/2−1}; writing ε = m + √t u and expanding
E[exp(Σ_{k≥3} λ_k u^k/k!)] under u ~ N(0, 1) (Gaussian moments E[u^{2j}] = (2j − 1)!!) and
its logarithm to order t² gives

    log ∫ e^{h} dε = h(m) + ½ log(2πt) + λ₄/8 + 5λ₃²/24
                     + λ₆/48 + 7λ₃λ₅/48 + λ₄²/12 + 25λ₃²λ₄/48 + 5λ₃⁴/16 + O(t³)

(the first correction is the textbook one, e.g. Tierney & Kadane 1986, from memory; the
second was derived here the same way), so that

    log p = h(m) − ½ log(1 + W) + t q (−1/8 + 5q/24) + t² q (−1/48 + 11q/48 − 25q²/48 + 5q³/16).

Its error falls as t³ (tests/test_cell_term.py: against scipy.integrate.quad). At 50 counts
per cell t ≈ 1/(50 + 1/v): summed over the 16 384 cells of the bench's 128² strong-data fit
at the chains' start, 1.6e-5 nats at v = 0.0296 against 0.0053 for 5 Gauss–Hermite nodes
(scratch run against the 40-node rule).

The draws of ε are made after sampling, per kept draw and cell, exactly from
p(ε | N, η) ∝ e^{h(ε)} by rejection from a split normal centred at the mode: scale √v to the
left (h'' ≤ −1/v everywhere) and s_R = (e^{η+m} + 1/v)^{−1/2} to the right (h'' ≤ −1/s_R² for
ε ≥ m), so h(ε) − h(m) ≤ −(ε − m)²/(2 scale²) on each side and the envelope dominates
(rejection sampling, Devroye 1986, ch. II.3, from memory). Acceptance is about 2s/(s + √v):
0.67 at N v = 3, 0.18 at N v = 100.
"""

from __future__ import annotations

import math
from functools import lru_cache

import jax
import jax.numpy as jnp
import numpy as np

__all__ = ["GH_NODES", "LAPLACE", "HALLEY_STEPS", "REFERENCE_NODES", "nodes_for", "variance_limit", "laplace",
           "lambert_w", "rule_name", "marginal_loglik", "rule_error", "nodes_for_cells", "CANDIDATE_NODES",
           "posterior_mode", "draw_terms"]

#: Gauss–Hermite nodes of the per-cell integral, by the largest term variance v expected
#: (``nodes_for``), and the variance up to which each rule is trusted (``variance_limit``):
#: the fewest nodes whose worst error per cell stays within 1e-7 nats. Worst error against
#: scipy.integrate.quad (scratch run with the sampler's node placement of the time, three
#: Newton steps — ``lambert_w``'s exact mode since moved the rules' values by at most 5e-11
#: relative for v ≤ 0.6, a review's probe — over N 0–3 000 and η
#: from 2 below to 3 above log N), in nats: 5 nodes 8e-8 at v = 0.012, 5e-7 at 0.03; 7 nodes
#: 4e-8 at 0.06, 2e-7 at 0.1; 8 nodes 4e-8 at 0.1, 1e-6 at 0.3; 11 nodes 4e-8 at 0.3, 8e-7 at
#: 0.6; 15 nodes 2e-8 at 0.6 (6 nodes are no better than 5, nor 12 than 11: an odd rule has a
#: node at the mode) — the largest with few counts and a large v, where the integrand is
#: skewed (tests/test_cell_term.py checks value and gradient at each limit). Each pair of
#: nodes costs three exponentials per cell and gradient, the centre node of an odd rule none.
NODES_BY_VARIANCE = ((0.012, 5), (0.06, 7), (0.1, 8), (0.3, 11), (0.6, 15))
GH_NODES = 16  # beyond the table's variances (its error grows with v: 2e-7 at v = 1)
#: the rule code (in place of a node count) of the second-order Laplace expansion (``laplace``)
LAPLACE = 0


def variance_limit(nodes: int) -> float:
    """The largest term variance the rule with ``nodes`` nodes is trusted for by the table (∞
    past it; 0 for LAPLACE, which is trusted only where it was measured on a fit's cells)."""
    if int(nodes) == LAPLACE:
        return 0.0
    return next((v for v, k in NODES_BY_VARIANCE if k == nodes), math.inf)


def nodes_for(variance: float) -> int:
    """Gauss–Hermite nodes for a term variance up to ``variance`` (NODES_BY_VARIANCE)."""
    return next((k for v, k in NODES_BY_VARIANCE if variance <= v), GH_NODES)


@lru_cache(maxsize=None)
def _rule(nodes: int):
    x, w = np.polynomial.hermite.hermgauss(nodes)
    return x, np.log(w) + x**2


def _newton_start(L):
    """The start of ``posterior_mode``'s Newton iteration for w = W(e^L), numpy: w is the root
    of w + log w = L, which Newton approaches from the left — w + log w is increasing and
    concave, so the iterates rise monotonically onto the root — from w₀ = L − log L for L > 1
    and e^L/(1 + e^L) otherwise (both below it). One formula for every regime — no overflow,
    and a start as good far above the data as near it. L = −∞ (no exposure) gives w = 0."""
    z = np.exp(np.minimum(L, 1.0))
    return np.where(L > 1.0, L - np.log(np.maximum(L, 1.0)), z / (1.0 + z))


def _newton_step(w, L):
    """One Newton step on w + log w = L, numpy (w = 0 stays 0)."""
    pos = w > 0.0
    safe = np.where(pos, w, 1.0)
    return np.where(pos, safe * (1.0 + L - np.log(safe)) / (1.0 + safe), 0.0)


def marginal_loglik(counts, eta, v, nodes: int = GH_NODES, laplace_up_to: float = math.inf):
    """log p(N_c | η_c) + log N_c! per cell (module docstring), jax; counts, eta (n,) with
    finite η (callers mask cells without exposure), v > 0 a scalar; ``nodes`` of the
    Gauss–Hermite rule (``nodes_for``), or LAPLACE for the second-order Laplace expansion
    (``laplace``) where v ≤ ``laplace_up_to`` and GH_NODES nodes above it (jax.lax.cond:
    one branch runs) — the expansion's error grows as t³ without bound (at N = 0, v = 30 a
    review's probe found log p above 0), so a model uses it only up to the variance it was measured at.
    jit/grad-friendly in η and v (reverse mode: the Gauss–Hermite rule returns its value
    and, at the same nodes, its gradient in one pass — ``_gauss_hermite``)."""
    if jnp.ndim(v) != 0:
        raise ValueError(f"marginal_loglik: the term variance v must be a scalar, got shape {jnp.shape(v)}")
    if int(nodes) != LAPLACE:
        return _gauss_hermite(int(nodes))(counts, eta, v)
    if math.isinf(laplace_up_to):
        return laplace(counts, eta, v)
    return jax.lax.cond(v <= laplace_up_to, laplace, _gauss_hermite(GH_NODES), counts, eta, v)


def rule_name(nodes: int) -> str:
    """What the rule code ``nodes`` computes, for reports."""
    return "second-order Laplace expansion" if int(nodes) == LAPLACE else f"{int(nodes)}-node adaptive Gauss–Hermite"


@jax.custom_jvp
def lambert_w(L):
    """w = W(e^L), the root of w + log w = L (Lambert W of e^L, Corless et al. 1996, from
    memory), jax, elementwise, for finite L (w = 0 where e^L underflows), to float64
    round-off. Solved for y = log w, the root of e^y + y = L (increasing and convex), by
    HALLEY_STEPS steps of Halley's method — exponentials only, since XLA's float64 logarithm
    on this machine's CPU costs 2.5× its exponential (16 384 values: 67 against 26–28 µs,
    scratch micro-benchmark under taskset -c 0). Start: y = L − e^L/(1 + e^L) for L ≤ 1 (w ≈
    x/(1 + x), x = e^L) and log L · (1 − 1/L) above (w ≈ L − log L), the logarithm in float32
    (a start needs no more): within 31 % in w for every L, measured (worst at L = 1).
    tests/test_cell_term.py checks it against scipy.special.lambertw. Its derivative is dW/dL
    = W/(1 + W) (implicit differentiation of w + log w = L), so gradients do not pass
    through the iterations."""
    z = jnp.exp(jnp.minimum(L, 1.0))
    above = jnp.maximum(L, 1.0)
    ell = jnp.log(above.astype(jnp.float32)).astype(jnp.result_type(L))
    y = jnp.where(L > 1.0, ell * (1.0 - 1.0 / above), L - z / (1.0 + z))
    for _ in range(HALLEY_STEPS):
        e = jnp.exp(y)
        f, slope = e + y - L, e + 1.0
        d = 2.0 * f * slope / (2.0 * slope * slope - f * e)
        y = y - d
    return e * (1.0 - d)  # e^{y − d} to round-off: the last step's d is below 1e-12


#: Halley steps of ``lambert_w``: from its start, 2 leave a relative error in w of 6e-13 at
#: worst (at L = 1), 3 reach float64 round-off (4e-15) for L from −50 to 10⁴ (scratch run
#: against 40 Newton steps in long double)
HALLEY_STEPS = 3


@lambert_w.defjvp
def _lambert_w_jvp(primals, tangents):
    w = lambert_w(primals[0])
    return w, w / (1.0 + w) * tangents[0]


def laplace(counts, eta, v):
    """log p(N | η) + log N! per cell by Laplace's method with its corrections to second order
    (module docstring: ``LAPLACE``), jax; gradients by automatic differentiation, through
    ``lambert_w``'s exact derivative. No nodes: one Lambert W, one exponential and one
    logarithm per cell."""
    w = lambert_w(jnp.log(v) + eta + v * counts)
    m = v * counts - w  # the mode; e^{η+m} = w/v
    t, q = v / (1.0 + w), w / (1.0 + w)  # 1/(−h''(m)), e^{η+m}/(−h''(m))
    # h at the mode in its stationary form (h'(m) = 0), with e^{η+m} itself rather than w/v:
    # then the mode's round-off moves h to second order only (with w/v, by N·δm: 5e-4 nats at
    # N = 1e7, v = 0.03), and h is differentiated at a fixed mode (through m, d/dv cancels
    # terms of order N²: off by 1.6e-2 at N = 1e7 in a review's probe)
    fixed = jax.lax.stop_gradient(m)
    h = counts * (eta + fixed) - jnp.exp(eta + fixed) - fixed * fixed / (2.0 * v)
    first = q * (-1.0 / 8.0 + q * 5.0 / 24.0)
    second = q * (-1.0 / 48.0 + q * (11.0 / 48.0 + q * (-25.0 / 48.0 + q * 5.0 / 16.0)))
    # log(1 + w), not log1p: 66 against 81 µs (as in lambert_w), the same absolute error
    return h - 0.5 * jnp.log(1.0 + w) + t * (first + t * second)


@lru_cache(maxsize=None)
def _gauss_hermite(nodes: int):
    """The rule with ``nodes`` nodes as a jax function whose gradient is computed with its
    value (jax.custom_vjp): at fixed nodes (module docstring) the derivatives are the
    integrand's log derivatives averaged over the nodes with the rule's normalised weights
    p_k ∝ w_k e^{x_k²} e^{h(ε_k)}, ε_k = m + √2 s x_k —

        d/dη = Σ_k p_k (N − e^{η+ε_k}),   d/dv = Σ_k p_k ε_k²/(2v²) − 1/(2v)

    (the second from the N(ε; 0, v) factor and the −½ log(2πv) in front) — so the backward
    pass is one product per cell. What automatic differentiation of the same sum would give,
    at about two thirds of the cost (16 384 cells, 8 nodes, value and gradient on one core:
    1.12 ms against 1.68 ms; scratch micro-benchmark under taskset -c 0). The mode and scale
    place the nodes; they come from ``lambert_w`` (to round-off, with exponentials only: 5
    nodes, 16 384 cells, value and gradient 0.54 ms against 0.71 ms with Newton steps on
    w + log w, scratch micro-benchmark under taskset -c 0, which also counts the one
    logarithm per cell below in place of two), and the logsumexp is shifted by h at the
    centre (the nodes nearest the centre — an odd rule has one on it — keep terms of order
    one: no underflow; h at a node does not exceed h at the mode: no overflow)."""
    x_k, log_w = _rule(nodes)
    root2 = math.sqrt(2.0)
    half = nodes // 2  # the rule's nodes are symmetric: ±x_k, and 0 when ``nodes`` is odd
    pair_rows = np.stack([root2 * x_k[nodes - half:], log_w[nodes - half:]], axis=1)  # (half, 2): √2 x_k > 0, log w_k + x_k²
    centre_log_w = float(log_w[half]) if nodes % 2 else None

    def parts(counts, eta, v):
        w = lambert_w(jnp.log(v) + eta + v * counts)
        m = v * counts - w
        s = jnp.sqrt(v / (1.0 + w))  # (e^{η+m} + 1/v)^{−1/2} at the mode, where e^{η+m} = w/v
        top = w / v  # e^{η+m}, w to round-off
        shift = counts * (eta + m) - top - m * m / (2.0 * v)  # h at the placed centre

        def add(sums, e, rate, log_w_k):
            total, d_eta, d_sq = sums
            p = jnp.exp(counts * (eta + e) - rate - e * e / (2.0 * v) + (log_w_k - shift))
            return total + p, d_eta + p * (counts - rate), d_sq + p * (e * e)

        def pair(sums, row):
            # the nodes ±x_k: e^{η+m±a} = e^{η+m} e^{±a}, one exponential for both rates
            a = row[0] * s
            grow = jnp.exp(a)
            sums = add(sums, m + a, top * grow, row[1])
            return add(sums, m - a, top / grow, row[1]), None

        # a scan over the pairs of nodes: one fused loop per pair, where the same sum written
        # out node by node left XLA about 30 separate grid-sized passes (full 128² q 0.9
        # gradient on one core: 2.05 ms against 2.39 ms in one scratch run under taskset -c 0,
        # within this machine's noise in another); pairs rather than nodes: 0.86–0.88 against
        # 0.97–1.04 ms for 7 nodes, 0.70 (and 1.00 once) against 0.80–0.92 ms for 5 (16 384
        # cells, value and gradient, scratch micro-benchmark, two runs, taskset -c 0)
        shape = jnp.broadcast_shapes(jnp.shape(counts), jnp.shape(eta))
        dtype = jnp.result_type(counts, eta, v)
        if centre_log_w is None:
            zero = jnp.zeros(shape, dtype)
            sums = (zero, zero, zero)
        else:  # the node at the centre: h there is the shift, so its term is the weight itself
            p0 = jnp.full(shape, math.exp(centre_log_w), dtype)
            sums = (p0, p0 * (counts - top), p0 * (m * m))
        (total, d_eta, d_sq), _ = jax.lax.scan(pair, sums, jnp.asarray(pair_rows, dtype))
        value = jnp.log(root2 * s * total) - 0.5 * jnp.log(2.0 * math.pi * v) + shift  # one logarithm per cell
        return value, (d_eta / total, d_sq / (total * 2.0 * v * v) - 0.5 / v)

    @jax.custom_vjp
    def rule(counts, eta, v):
        return parts(counts, eta, v)[0]

    def backward(grads, g):
        g_eta, g_v = grads
        return None, g * g_eta, jnp.sum(g * g_v)  # v a scalar: its gradient summed over the cells

    rule.defvjp(parts, backward)
    return rule


#: nodes of the reference rule a fit's rule is measured against (``rule_error``): within 1e-11
#: nats per cell of scipy.integrate.quad up to v = 1 and 5e-9 at v = 2 (scratch run as for
#: NODES_BY_VARIANCE; tests/test_cell_term.py checks it at the test cases)
REFERENCE_NODES = 40


#: cells per call of the compiled rule in ``rule_error`` and ``nodes_for_cells`` (numpy in and out)
CHUNK_CELLS = 1 << 16


def rule_error(counts, eta, v: float, nodes: int, laplace_up_to: float = math.inf,
               chunk: int = CHUNK_CELLS) -> np.ndarray:
    """|log p by the rule ``nodes`` (with ``laplace_up_to`` as in ``marginal_loglik``) − log p
    by the REFERENCE_NODES rule| per cell (nats), at term variance ``v``; counts, eta (n,)
    with finite η. For the fit's summary and the set-up's sizing (``nodes_for_cells``): the
    rule's error on the fit's own cells."""
    return np.abs(_loglik_np(counts, eta, v, nodes, chunk, laplace_up_to)
                  - _loglik_np(counts, eta, v, REFERENCE_NODES, chunk))


def _loglik_np(counts, eta, v: float, nodes: int, chunk: int, laplace_up_to: float = math.inf) -> np.ndarray:
    """``marginal_loglik`` in float64 over chunks of cells, numpy in and out (one compiled
    program per rule, bound and chunk length)."""
    counts, eta = np.asarray(counts, float), np.asarray(eta, float)
    rule = _jitted_rule(int(nodes), float(laplace_up_to))
    return np.concatenate([np.asarray(rule(counts[i:i + chunk], eta[i:i + chunk], float(v)))
                           for i in range(0, counts.size, chunk)] or [np.zeros(0)])


@lru_cache(maxsize=None)
def _jitted_rule(nodes: int, laplace_up_to: float = math.inf):
    return jax.jit(lambda c, e, v: marginal_loglik(c, e, v, nodes, laplace_up_to))


#: the rules ``nodes_for_cells`` tries, cheapest first: the Laplace expansion (LAPLACE), then
#: Gauss–Hermite with 3 nodes, the table's, GH_NODES
CANDIDATE_NODES = (LAPLACE,) + tuple(sorted({3, *(k for _, k in NODES_BY_VARIANCE), GH_NODES}))


def nodes_for_cells(counts, eta, variances, budget_nats: float) -> tuple[int, dict]:
    """The cheapest rule (CANDIDATE_NODES: the Laplace expansion, then the fewest Gauss–Hermite
    nodes) whose error against the REFERENCE_NODES
    rule, summed over the given cells (``rule_error``), stays within ``budget_nats`` at every
    term variance in ``variances``: the rule sized on a fit's own cells (counts, eta (n,) with
    finite η, e.g. at the chains' start), where the table (``nodes_for``) bounds the worst
    cell of any data set. Why a sum: a log density off by at most ε everywhere moves
    posterior probabilities by at most a factor e^{±2ε}. A non-finite error counts as beyond
    the budget. Returns (nodes, {nodes tried: largest summed error over ``variances``, nats,
    None if not finite}); when no candidate is within the budget, the most nodes
    (GH_NODES), which the caller reports."""
    counts, eta = np.asarray(counts, float), np.asarray(eta, float)
    variances = sorted({float(v) for v in variances})
    if not variances:
        raise ValueError("nodes_for_cells: no term variance to size the rule at")
    reference = {v: _loglik_np(counts, eta, v, REFERENCE_NODES, CHUNK_CELLS) for v in variances}
    tried = {}
    for k in CANDIDATE_NODES:
        # rule_error's difference, with each variance's reference computed once for every candidate
        error = max(float(np.sum(np.abs(_loglik_np(counts, eta, v, k, CHUNK_CELLS) - ref)))
                    for v, ref in reference.items())
        tried[k] = error if math.isfinite(error) else None
        if tried[k] is not None and error <= budget_nats:
            return k, tried
    return CANDIDATE_NODES[-1], tried


def posterior_mode(counts, eta, v, tol: float = 1e-13, max_steps: int = 60):
    """(m, w): the mode m = vN − w of p(ε | N, η) and w = v e^{η+m} = W(v e^{η+vN}) (module
    docstring), numpy, broadcasting; η may be −∞ for cells without exposure (then w = 0 and m = vN = 0: such
    cells have no counts). Newton to
    a relative step below ``tol``; raises if it has not converged in ``max_steps``."""
    counts, eta, v = np.asarray(counts, float), np.asarray(eta, float), np.asarray(v, float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        L = np.log(v) + eta + v * counts
        w = _newton_start(L)
        for _ in range(max_steps):
            new = _newton_step(w, L)
            done = np.all(np.abs(new - w) <= tol * np.maximum(new, 1e-300))
            w = new
            if done:
                return v * counts - w, w
    raise RuntimeError("per-cell term: the mode search did not converge")


def draw_terms(counts, eta, v, rng: np.random.Generator, max_rounds: int = 100_000):
    """Exact draws of ε ~ p(ε | N, η) ∝ exp(Nε − e^{η+ε} − ε²/(2v)) (module docstring), numpy:
    counts (cells,), eta (draws, cells) with −∞ where a cell has no exposure (the draw is then
    the prior N(0, v) — such cells have no counts), v (draws,). Returns (draws, cells) float64."""
    counts = np.asarray(counts, float)[None, :]
    eta = np.asarray(eta, float)
    v = np.broadcast_to(np.asarray(v, float).reshape(-1, 1), eta.shape)
    counts = np.broadcast_to(counts, eta.shape)
    m, w = posterior_mode(counts, eta, v)
    top = w / v  # e^{η+m}, 0 without exposure
    s_left, s_right = np.sqrt(v), np.sqrt(v / (1.0 + w))
    out = np.empty(eta.size)
    todo = np.arange(eta.size)
    m, top, s_left, s_right, counts, v = (a.reshape(-1) for a in (m, top, s_left, s_right, counts, v))
    for _ in range(max_rounds):
        if todo.size == 0:
            return out.reshape(eta.shape)
        sl, sr = s_left[todo], s_right[todo]
        right = rng.random(todo.size) * (sl + sr) < sr
        z = np.abs(rng.standard_normal(todo.size))
        d = np.where(right, sr, -sl) * z  # ε − m
        mt = m[todo]
        with np.errstate(over="ignore", invalid="ignore"):
            gain = counts[todo] * d - top[todo] * np.expm1(d) - d * (2.0 * mt + d) / (2.0 * v[todo])
        ratio = gain + 0.5 * z * z  # log(target / envelope) ≤ 0 (module docstring), up to round-off
        if np.any(ratio > 1e-6):
            raise RuntimeError(f"per-cell term draws: the envelope fails to dominate (log ratio {np.max(ratio):.3g})")
        ok = np.log(rng.random(todo.size)) < np.minimum(ratio, 0.0)
        out[todo[ok]] = mt[ok] + d[ok]
        todo = todo[~ok]
    raise RuntimeError(f"per-cell term draws: {todo.size} still rejected after {max_rounds} rounds")
