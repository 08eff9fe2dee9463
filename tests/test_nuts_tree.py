"""NUTS trees with the extra U-turn checks (``sceneprior.nuts_tree``): they stop trajectories
that circle at a step size where the leapfrog period is near a power of two, keep the
target distribution; the checkpoint bookkeeping inside a subtree is checked directly."""

from __future__ import annotations

import arviz as az
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from numpyro.infer import MCMC, NUTS
from scipy import special, stats

from sceneprior import inference

#: found by scanning fixed step sizes on these targets (numpyro 0.22, seed 0): at 0.204 plain
#: NUTS on 1 000 iid standard normals took 281 leapfrog steps per draw, on the Gamma target
#: below 72; with the checks 27 and 23; on the Gamma target at 0.2 and 0.208 both took the same
#: trees (29 and 15 steps per draw)
CIRCLING_STEP = 0.204
DIM = 1000


def _run(cls, potential, steps, burn_in, draws, **kw):
    mc = MCMC(cls(potential_fn=potential, step_size=steps, adapt_step_size=False, adapt_mass_matrix=False, **kw),
              num_warmup=burn_in, num_samples=draws, progress_bar=False)
    mc.run(jax.random.PRNGKey(0), init_params=jnp.zeros(DIM), extra_fields=("num_steps",))
    return np.asarray(mc.get_samples()), np.asarray(mc.get_extra_fields()["num_steps"])


def _normal(y):
    return 0.5 * jnp.sum(y * y)


def test_extra_checks_stop_a_circling_trajectory():
    """1 000 iid N(0, 1) coordinates, unit mass, step size 0.204 (a leapfrog period near 32
    steps): plain numpyro NUTS runs round the orbit, the checked trees stop near half a
    period; the draws keep the target's variance (1, the standard normal's)."""
    inference.configure_jax()
    tuned = inference._tuned_nuts(NUTS)
    _, plain_steps = _run(NUTS, _normal, CIRCLING_STEP, 0, 30)
    if plain_steps.mean() < 100:
        pytest.skip(f"numpyro's NUTS no longer circles here ({plain_steps.mean():.0f} steps per draw)")
    y, steps = _run(tuned, _normal, CIRCLING_STEP, 30, 200, extra_uturn_checks=True)
    assert steps.mean() < 40
    per_draw = (y * y).mean(axis=1)  # each draw's mean square over the coordinates
    ess = float(az.ess(per_draw[None, :]))
    assert abs(per_draw.mean() - 1.0) < 4 * per_draw.std() / np.sqrt(ess)


def test_extra_checks_keep_a_skewed_target():
    """Reversibility check where the extra checks fire: 1 000 iid coordinates y = (log x −
    ψ(k)) / √ψ'(k), x ~ Gamma(k = 10, 1), sampled by NUTS at the circling step size. The
    mean, variance and third central moment of x (k, k and 2k, scipy.stats.gamma) per draw,
    averaged over draws, within 4 Monte Carlo standard errors (arviz ESS), and the fraction
    of x below scipy's 5 % quantile. A tree builder that broke reversibility would bias
    these; plain NUTS at this step size took 72 steps per draw."""
    inference.configure_jax()
    k = 10.0
    s, c = float(np.sqrt(special.polygamma(1, k))), float(special.digamma(k))

    def potential(y):
        lx = c + s * y
        return -jnp.sum(k * lx - jnp.exp(lx))

    y, steps = _run(inference._tuned_nuts(NUTS), potential, CIRCLING_STEP, 100, 400, extra_uturn_checks=True)
    _, plain_steps = _run(NUTS, potential, CIRCLING_STEP, 0, 30)
    assert steps.mean() < plain_steps.mean()  # the checks stopped some trees early
    x = np.exp(c + s * y)
    ref = stats.gamma(k)
    checks = {"mean": (x.mean(axis=1), ref.mean()),
              "variance": (((x - k) ** 2).mean(axis=1), ref.var()),
              "third central moment": (((x - k) ** 3).mean(axis=1), ref.stats(moments="s") * ref.std() ** 3),
              "below the 5 % quantile": ((x < ref.ppf(0.05)).mean(axis=1), 0.05)}
    for name, (per_draw, expected) in checks.items():
        ess = float(az.ess(per_draw[None, :]))
        mcse = per_draw.std() / np.sqrt(ess)
        assert abs(per_draw.mean() - float(expected)) < 4 * mcse, (name, per_draw.mean(), expected, mcse)


def test_subtree_checks_cover_every_subtree_ending_at_a_leaf():
    """The checkpoint bookkeeping inside a new subtree: for 32 leaves with random momenta, at
    every odd leaf n, :func:`nuts_tree._subtrees_turning` equals a direct evaluation of
    numpyro's criterion on every aligned subtree of two or more leaves that ends at n and,
    for four or more, on both extended halves (momentum sums written out); without the
    halves it equals numpyro's own ``_is_iterative_turning``."""
    from numpyro.infer import hmc_util

    from sceneprior import nuts_tree

    inference.configure_jax()
    rng = np.random.default_rng(3)
    n_leaves, dim, depth = 32, 3, 10
    r = rng.normal(0.3, 1.0, (n_leaves, dim))  # a drift, so that some checks turn and some do not
    S = np.cumsum(r, axis=0)
    eye = jnp.ones(dim)
    r_ck, s_ck, p_ck = (np.zeros((depth, dim)) for _ in range(3))
    outcomes = {True: 0, False: 0}
    for n in range(n_leaves):
        lo, hi = (int(v) for v in hmc_util._leaf_idx_to_ckpt_idxs(n))
        if n % 2 == 0:  # what _build_subtree stores
            r_ck[hi], s_ck[hi], p_ck[hi] = r[n], S[n], (r[n - 1] if n else 0.0)
            continue
        args = (jnp.asarray(r[n]), jnp.asarray(S[n]), jnp.asarray(r_ck), jnp.asarray(s_ck), jnp.asarray(p_ck), lo, hi,
                lambda v: v)
        got = bool(nuts_tree._subtrees_turning(eye, *args))
        ends_only = bool(nuts_tree._subtrees_turning(eye, *args, halves=False))
        numpyro_own = bool(hmc_util._is_iterative_turning(eye, jnp.asarray(r[n]), jnp.asarray(S[n]), jnp.asarray(r_ck),
                                                          jnp.asarray(s_ck), lo, hi))
        want_ends, want = False, False
        size = 2
        while (n + 1) % size == 0:
            a = n - size + 1
            whole = bool(hmc_util._is_turning(eye, r[a], r[n], r[a:n + 1].sum(axis=0)))
            want_ends = want_ends or whole
            want = want or whole
            if size >= 4:
                m = a + size // 2 - 1
                want = (want or bool(hmc_util._is_turning(eye, r[a], r[m + 1], r[a:m + 2].sum(axis=0)))
                        or bool(hmc_util._is_turning(eye, r[m], r[n], r[m:n + 1].sum(axis=0))))
            size *= 2
        assert ends_only == numpyro_own == want_ends, n
        assert got == want, n
        outcomes[want] += 1
        outcomes["halves"] = outcomes.get("halves", 0) + (want and not want_ends)
    assert outcomes[True] and outcomes[False] and outcomes["halves"]  # each case occurs



def test_subtree_without_the_halves_is_numpyros():
    """With the checks of the halves switched off, :func:`nuts_tree._build_subtree` builds
    numpyro's own subtree (the reference: numpyro 0.22's ``_iterative_build_subtree``, called
    on the same arguments): every field of the result equal, for subtrees of 2, 8 and 32
    leaves, both directions and three start points on an anisotropic Gaussian, where some
    subtrees turn and some do not. (That the halves' checks fire where they should is the
    checkpoint test above.)"""
    from numpyro.infer import hmc_util as hu

    from sceneprior import nuts_tree

    inference.configure_jax()
    dim = 4
    scales = jnp.arange(1.0, dim + 1.0) ** 2

    def potential(z):
        return 0.5 * jnp.sum(scales * z * z)

    kinetic = hu.euclidean_kinetic_energy
    vv_init, vv_update = hu.velocity_verlet(potential, kinetic)
    imm = jnp.ones(dim)

    def builder(build, depth):  # the subtree's size is static, as in numpyro's tree doubling
        return jax.jit(lambda tree, right, key, energy: build(
            tree._replace(depth=depth), vv_update, kinetic, imm, 0.3, right, key, energy, 1000.0,
            jnp.zeros((10, dim)), jnp.zeros((10, dim))))

    rng = np.random.default_rng(5)
    turned = {True: 0, False: 0}
    for depth in (1, 3, 5):
        ref_fn = builder(hu._iterative_build_subtree, depth)
        ends_fn = builder(lambda *a: nuts_tree._build_subtree(*a, halves=False), depth)
        for start in range(3):
            z, r, pe, grad = vv_init(jnp.asarray(rng.normal(size=dim)), jnp.asarray(rng.normal(size=dim)))
            energy = pe + kinetic(imm, r)
            zero = jnp.zeros(())
            tree = hu.TreeInfo(z, r, grad, z, r, grad, z, pe, grad, energy, depth=0, weight=zero, r_sum=r,
                               turning=jnp.array(False), diverging=jnp.array(False), sum_accept_probs=zero,
                               num_proposals=0)
            for right in (True, False):
                args = (tree, jnp.array(right), jax.random.PRNGKey(start), energy)
                ref, ends = ref_fn(*args), ends_fn(*args)
                for name, a, b in zip(ref._fields, ref, ends):
                    np.testing.assert_array_equal(np.asarray(a), np.asarray(b), err_msg=name)
                turned[bool(ref.turning)] += 1
    assert turned[True] and turned[False], turned
