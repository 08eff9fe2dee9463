"""Chain layouts of ``inference.run_nuts``: Gaussian-field models run their chains at once,
one jax CPU device per chain, on machines with more than one core; the draws must be those
of numpyro's own one-after-another layout with the same keys, and of the right posterior."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import numpyro
import numpyro.distributions as dist
import pytest
from numpyro.infer import MCMC, NUTS

from sceneprior import inference


def _model(y):
    mu = numpyro.sample("mu", dist.Normal(0.0, 10.0))
    numpyro.sample("y", dist.Normal(mu, 1.0), obs=y)


def _model_with_noise(y):
    mu = numpyro.sample("mu", dist.Normal(0.0, 10.0))
    numpyro.sample("noise", dist.Normal(0.0, 1.0).expand([2]).to_event(1))
    numpyro.deterministic("twice", 2.0 * mu)
    numpyro.sample("y", dist.Normal(mu, 1.0), obs=y)


def _iid50():
    numpyro.sample("x", dist.Normal(0.0, 1.0).expand([50]).to_event(1))


def _model_that_dies(y):
    import os

    os._exit(3)


class _Sampler:
    chains, warmup, draws, seed, progress = 4, 200, 300, 7, False


def test_layouts_by_size_cores_and_devices(monkeypatch):
    big = inference.SEQUENTIAL_FROM
    monkeypatch.setattr(inference, "usable_cores", lambda: 2)
    monkeypatch.setattr(jax, "local_device_count", lambda: 4)
    assert inference.chain_layout(10, 4) == "vectorized"
    assert inference.chain_layout(big, 4) == "parallel"
    assert inference.chain_layout(big, 1) == "sequential"
    assert inference.chain_layout(big, 5) == "processes"  # more chains than devices
    assert inference.chain_layout(inference.PARALLEL_BELOW, 4) == "processes"
    # few latent values on a large grid (spectral truncation): the grid decides
    assert inference.chain_layout(big, 4, n_cells=inference.PARALLEL_BELOW) == "processes"
    assert inference.chain_layout(big, 4, n_cells=64 * 64) == "parallel"
    # a latent site with a value per grid cell (the LGCP's per-cell term): never parallel
    assert inference.chain_layout(big, 4, n_cells=64 * 64, grid_latent=True) == "processes"
    assert inference.chains_at_once(big, 4, n_cells=64 * 64, grid_latent=True) == 2
    # ... and not vectorised either, however few its latent values, once the grid is large
    assert inference.chain_layout(10, 4, n_cells=64 * 64, grid_latent=True) == "processes"
    assert inference.chain_layout(10, 4, n_cells=16 * 16, grid_latent=True) == "vectorized"
    assert inference.chain_layout(10, 1, n_cells=64 * 64, grid_latent=True) == "sequential"
    # chain processes: one chain per core holds state at a time, or all when the processes
    # vectorise their groups (the model says its chains are alike)
    assert inference.chains_at_once(big, 4, n_cells=inference.PARALLEL_BELOW) == 2
    assert inference.chains_at_once(big, 4, n_cells=inference.PARALLEL_BELOW, vectorize_groups=True) == 4
    assert inference.chain_groups(4, 2) == [[0, 1], [2, 3]]
    assert inference.chain_groups(3, 2) == [[0, 1], [2]]
    assert inference.chain_groups(1, 2) == [[0]]
    monkeypatch.setattr(inference, "usable_cores", lambda: 1)
    assert inference.chain_layout(big, 4) == "sequential"
    assert inference.chain_layout(big, 4, n_cells=inference.PARALLEL_BELOW) == "sequential"


@pytest.mark.skipif(jax.local_device_count() < 4, reason="jax has fewer than 4 CPU devices")
def test_parallel_draws_equal_sequential_and_posterior(monkeypatch):
    monkeypatch.setattr(inference, "usable_cores", lambda: 2)  # parallel even on a 1-core machine
    assert inference.chain_layout(inference.SEQUENTIAL_FROM, 4) == "parallel"
    y = jnp.asarray(np.random.default_rng(3).normal(1.5, 1.0, 40))
    smp = _Sampler()
    # a mass block and the matrix warmup starts from reach numpyro as given (the same draws),
    # and the caller's dict is not filled in by numpyro
    start = {("mu",): np.array([[0.025]])}
    idata = inference.run_nuts(_model, {"y": y}, smp, progress=False, n_latent=inference.SEQUENTIAL_FROM,
                               dense_mass=[("mu",)], inverse_mass_matrix=start)
    assert list(start) == [("mu",)] and start[("mu",)].shape == (1, 1)
    par = np.asarray(idata.posterior["mu"])
    ref = MCMC(NUTS(_model, init_strategy=numpyro.infer.init_to_median(num_samples=15), dense_mass=[("mu",)],
                    inverse_mass_matrix={("mu",): jnp.array([[0.025]])}), num_warmup=smp.warmup,
               num_samples=smp.draws, num_chains=smp.chains, chain_method="sequential", progress_bar=False)
    ref.run(jax.random.PRNGKey(smp.seed), y=y)
    seq = np.asarray(ref.get_samples(group_by_chain=True)["mu"])
    assert par.shape == seq.shape == (4, 300)
    # same keys, same trajectories up to rounding (the chains are compiled differently)
    np.testing.assert_allclose(par, seq, rtol=0, atol=1e-5)
    # conjugate normal posterior (Gelman et al., BDA3 §2.5): precision 1/100 + n, mean n·ȳ/(1/100 + n)
    n = y.size
    post_var = 1.0 / (1.0 / 100.0 + n)
    post_mean = post_var * float(jnp.sum(y))
    import arviz as az

    ess = float(az.ess(par))  # Monte Carlo standard error from the bulk ESS (arviz)
    assert ess > 400
    assert abs(par.mean() - post_mean) < 4 * np.sqrt(post_var / ess)
    assert abs(par.var() / post_var - 1) < 0.25


@pytest.mark.parametrize("vectorise", [True, False])
def test_chains_in_processes_equal_sequential(monkeypatch, vectorise):
    """Chains in separate processes (large grids), three chains in two processes: chains 1–2
    in one, vectorised or one after another, chain 3 in the other; same keys (and warmup
    tree depth, mass-matrix blocks and the mass matrix warmup starts from) as numpyro's
    one-after-another chains, so the same draws; the excluded site is dropped and the
    sample statistics kept."""
    monkeypatch.setattr(inference, "chain_layout", lambda n, c=1, n_cells=0, grid_latent=False: inference.PROCESSES)
    monkeypatch.setattr(inference, "chain_cores", lambda: [None, None])  # two processes, unpinned
    y = jnp.asarray(np.random.default_rng(5).normal(-0.5, 1.0, 30))
    smp = _Sampler()
    smp.chains, smp.warmup, smp.draws = 3, 150, 200
    start = {("mu",): np.array([[0.04]])}
    idata = inference.run_nuts(_model_with_noise, {"y": y}, smp, progress=False, n_latent=inference.SEQUENTIAL_FROM,
                               exclude_sites=("noise",), thinning=2, warmup_tree_depth=2, vectorize_groups=vectorise,
                               dense_mass=[("mu",)], inverse_mass_matrix=start)
    ref = MCMC(NUTS(_model_with_noise, init_strategy=numpyro.infer.init_to_median(num_samples=15),
                    max_tree_depth=(2, 10), dense_mass=[("mu",)], inverse_mass_matrix={("mu",): jnp.array([[0.04]])}),
               num_warmup=smp.warmup, num_samples=smp.draws, num_chains=smp.chains, chain_method="sequential",
               progress_bar=False, thinning=2)
    ref.run(jax.random.PRNGKey(smp.seed), y=y, extra_fields=("num_steps",))
    seq = ref.get_samples(group_by_chain=True)
    assert idata.posterior["mu"].shape == (3, 100)
    assert "noise" not in idata.posterior and "twice" in idata.posterior
    # vectorised groups (chains 1–2 in one jax.vmap): the same trajectories up to rounding
    # (1.3e-5 at most, seen once in 300 draws); one after another: numpyro's own layout
    tol = 1e-4 if vectorise else 1e-5
    np.testing.assert_allclose(np.asarray(idata.posterior["mu"]), np.asarray(seq["mu"]), rtol=0, atol=tol)
    np.testing.assert_allclose(np.asarray(idata.posterior["twice"]), np.asarray(seq["twice"]), rtol=0, atol=2 * tol)
    np.testing.assert_array_equal(np.asarray(idata.sample_stats["n_steps"]),
                                  np.asarray(ref.get_extra_fields(group_by_chain=True)["num_steps"]))
    d = inference.diagnostics(idata, ("mu",))
    assert d["chains"] == 3 and d["draws"] == 100 and d["leapfrog_steps_mean"] > 0


def _recording_nuts(monkeypatch, record):
    """numpyro's NUTS replaced by a subclass named Recording that appends ``record(kernel,
    keyword arguments)`` for each kernel built; returns that list and a 1 × (20 + 20) sampler."""
    seen = []

    class Recording(NUTS):
        def __init__(self, *a, **k):
            seen.append(record(self, k))
            super().__init__(*a, **k)

    monkeypatch.setattr(numpyro.infer, "NUTS", Recording)
    smp = _Sampler()
    smp.chains, smp.warmup, smp.draws = 1, 20, 20
    return seen, smp


def test_warmup_tree_depth_reaches_the_sampler(monkeypatch):
    """A warmup depth caps NUTS's trees during warmup only (numpyro takes (warmup, sampling)
    depths); without one both phases keep numpyro's default depth 10. A tree of depth d
    has at most 2^d − 1 leapfrog steps (Hoffman & Gelman 2014, §3): capped warmup
    iterations stay within it, sampling iterations on a 50-dimensional normal go beyond."""
    d = 2
    mc = MCMC(NUTS(_iid50, max_tree_depth=(d, 10)), num_warmup=150, num_samples=150, progress_bar=False)
    mc.warmup(jax.random.PRNGKey(0), collect_warmup=True, extra_fields=("num_steps",))
    assert int(np.max(mc.get_extra_fields()["num_steps"])) <= 2**d - 1
    mc.run(mc.post_warmup_state.rng_key, extra_fields=("num_steps",))
    assert int(np.max(mc.get_extra_fields()["num_steps"])) > 2**d - 1
    seen, smp = _recording_nuts(monkeypatch, lambda kernel, kwargs: kwargs.get("max_tree_depth"))
    y = jnp.zeros(5)
    inference.run_nuts(_model, {"y": y}, smp, progress=False, n_latent=inference.SEQUENTIAL_FROM, warmup_tree_depth=3)
    inference.run_nuts(_model, {"y": y}, smp, progress=False, n_latent=inference.SEQUENTIAL_FROM)
    assert seen == [(3, 10), 10]


def test_chain_process_failure_is_reported(monkeypatch):
    monkeypatch.setattr(inference, "chain_layout", lambda n, c=1, n_cells=0, grid_latent=False: inference.PROCESSES)
    monkeypatch.setattr(inference, "chain_cores", lambda: [None, None])  # two processes, unpinned
    smp = _Sampler()
    smp.chains, smp.warmup, smp.draws = 3, 5, 5  # groups: chains 1–2, chain 3
    with pytest.raises(RuntimeError, match=r"(?s)(chains 1–2|chain 3) failed in its process:\n.*TypeError"):
        inference.run_nuts(_model, {"y": "not an array"}, smp, progress=False, n_latent=inference.SEQUENTIAL_FROM)
    # a process that dies without a word (killed, out of memory) is reported, not waited for
    with pytest.raises(RuntimeError, match=r"the process of (chains 1–2|chain 3) ended with exit code 3"):
        inference.run_nuts(_model_that_dies, {"y": jnp.zeros(3)}, smp, progress=False,
                           n_latent=inference.SEQUENTIAL_FROM)


def test_memory_check_counts_only_running_chains(monkeypatch):
    """One-after-another chains hold one chain's sampler state at a time: a torus whose state
    fits once but not four times is accepted for them and refused when all four run at once."""
    import os
    from types import SimpleNamespace

    from sceneprior import fitting
    from sceneprior.errors import InputError

    total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    n_latent = int(0.6 * total / (12 * 8.0) / 2)  # one chain's state: half the allowance
    setup = SimpleNamespace(extra={"n_latent": n_latent})
    stats = SimpleNamespace(grid=SimpleNamespace(n_cells=1))
    smp = SimpleNamespace(chains=4, draws=10)
    monkeypatch.setattr(inference, "chain_layout", lambda n, c=1, n_cells=0, grid_latent=False: "sequential")
    fitting._check_memory(setup, stats, smp, "spec")
    for layout in ("parallel", "vectorized"):
        monkeypatch.setattr(inference, "chain_layout", lambda n, c=1, n_cells=0, grid_latent=False, layout=layout: layout)
        with pytest.raises(InputError, match="more than this machine can hold"):
            fitting._check_memory(setup, stats, smp, "spec")
    # chain processes also hold their chains' kept draws twice more: draws that fit three
    # times (sequential) do not fit five times plus the processes' allowance
    monkeypatch.setattr(inference, "usable_cores", lambda: 2)
    small = SimpleNamespace(extra={"n_latent": 1000})
    # 4 chains × 10 kept draws × 4 B: 480 B per cell held three times (0.8 of the allowance),
    # 800 B per cell in processes (4/3 of it, besides 2 GB for the two processes)
    cells = SimpleNamespace(grid=SimpleNamespace(n_cells=int(0.6 * total / 600)))
    monkeypatch.setattr(inference, "chain_layout", lambda n, c=1, n_cells=0, grid_latent=False: "sequential")
    fitting._check_memory(small, cells, smp, "spec")
    monkeypatch.setattr(inference, "chain_layout", lambda n, c=1, n_cells=0, grid_latent=False: inference.PROCESSES)
    with pytest.raises(InputError, match="more than this machine can hold"):
        fitting._check_memory(small, cells, smp, "spec")


def test_step_size_jitter_draws_around_the_adapted_step():
    """During warmup the adapted step size itself; after it ε · U(1 − j, 1 + j), one draw per
    transition: inside the interval, different per key, with the uniform's mean 1 and
    variance j²/3 (analytic moments of the uniform distribution)."""
    keys = jax.random.split(jax.random.PRNGKey(0), 4000)
    draw = jax.vmap(lambda k, i: inference.jittered_step_size(k, i, 0.25, 100, 0.2), in_axes=(0, None))
    assert np.all(np.asarray(draw(keys, 99)) == 0.25)
    eps = np.asarray(draw(keys, 100)) / 0.25
    assert eps.min() >= 0.8 and eps.max() <= 1.2 and np.unique(eps).size > 3900
    sd = 0.2 / np.sqrt(3.0)
    assert abs(eps.mean() - 1.0) < 4 * sd / np.sqrt(eps.size)
    assert abs(eps.std() / sd - 1.0) < 0.05


def test_jittered_nuts_keeps_numpyros_warmup_and_the_posterior():
    """The jittered kernel, chains vectorised (a batch of keys; one after another is the same
    code without the vmap): warmup (draws and adapted step size) is numpyro's own; after it
    the step size changes each transition, the adapted one stays in the state, and the draws
    follow the conjugate normal posterior (Gelman et al., BDA3 §2.5: precision 1/100 + n,
    mean n·ȳ/(1/100 + n))."""
    method = "vectorized"
    y = jnp.asarray(np.random.default_rng(11).normal(0.7, 1.0, 25))
    fields = ("num_steps", "adapt_state.step_size")

    def warm(cls, **kw):
        mc = MCMC(cls(_model, **kw), num_warmup=150, num_samples=600, num_chains=2, chain_method=method,
                  progress_bar=False)
        mc.warmup(jax.random.PRNGKey(4), y=y, collect_warmup=True, extra_fields=fields)
        return mc

    plain = warm(NUTS)
    jit = warm(inference._tuned_nuts(NUTS), step_size_jitter=0.3)
    np.testing.assert_array_equal(np.asarray(jit.get_samples()["mu"]), np.asarray(plain.get_samples()["mu"]))
    adapted = np.asarray(jit.post_warmup_state.adapt_state.step_size)
    np.testing.assert_array_equal(adapted, np.asarray(plain.post_warmup_state.adapt_state.step_size))
    for mc in (plain, jit):
        mc.run(mc.post_warmup_state.rng_key, y=y, extra_fields=fields)
    kept = np.asarray(jit.get_extra_fields(group_by_chain=True)["adapt_state.step_size"])
    np.testing.assert_array_equal(kept, np.broadcast_to(adapted[:, None], kept.shape))
    draws = np.asarray(jit.get_samples(group_by_chain=True)["mu"])
    assert not np.allclose(draws, np.asarray(plain.get_samples(group_by_chain=True)["mu"]))
    n = y.size
    post_var = 1.0 / (1.0 / 100.0 + n)
    post_mean = post_var * float(jnp.sum(y))
    import arviz as az

    ess = float(az.ess(draws))
    assert ess > 450
    assert abs(draws.mean() - post_mean) < 4 * np.sqrt(post_var / ess)
    assert abs(draws.var() / post_var - 1) < 0.2  # ≈ 3 standard errors of a variance at ESS 450 (√(2/450) = 0.067)


def test_kernel_options_reach_the_sampler(monkeypatch):
    """run_nuts hands the jitter and the extra U-turn checks to the kernel (a subclass of
    numpyro's NUTS); without them numpyro's NUTS itself; the target acceptance to either
    (numpyro's ``target_accept_prob``, default 0.8). A chain process's job carries the same
    options to ``_sample`` (its worker run in this process, the job pickled as for a
    spawned one)."""
    import pickle
    import queue

    seen, smp = _recording_nuts(monkeypatch, lambda kernel, kwargs: (
        type(kernel).__name__, getattr(kernel, "_jitter", None), getattr(kernel, "_extra_checks", None),
        kwargs.get("target_accept_prob")))
    y = jnp.zeros(5)
    inference.run_nuts(_model, {"y": y}, smp, progress=False, n_latent=inference.SEQUENTIAL_FROM, step_size_jitter=0.1)
    inference.run_nuts(_model, {"y": y}, smp, progress=False, n_latent=inference.SEQUENTIAL_FROM,
                       extra_uturn_checks=True)
    inference.run_nuts(_model, {"y": y}, smp, progress=False, n_latent=inference.SEQUENTIAL_FROM, target_accept=0.7)
    assert seen == [("TunedNUTS", 0.1, False, 0.8), ("TunedNUTS", 0.0, True, 0.8), ("Recording", None, None, 0.7)]
    kernel = {"dense_mass": False, "init_strategy": numpyro.infer.init_to_median(num_samples=15),
              "warmup_tree_depth": None, "inverse_mass_matrix": None, "step_size_jitter": 0.0,
              "extra_uturn_checks": True, "target_accept": 0.9}
    job = pickle.dumps({"fn": _model, "inputs": {"y": y}, "kernel": kernel, "exclude_sites": (), "thinning": 1,
                        "warmup": 20, "draws": 20, "bar": False, "vectorize": False})
    results = queue.Queue()
    monkeypatch.setattr(inference, "_end_with_parent", lambda: None)
    inference._chain_group(job, [0], None, np.asarray(jax.random.PRNGKey(7))[None], results)
    assert results.get_nowait()[1] == "ok" and seen[-1] == ("TunedNUTS", 0.0, True, 0.9)
    with pytest.raises(ValueError, match="target_accept"):
        inference.run_nuts(_model, {"y": y}, smp, progress=False, target_accept=1.0)
    with pytest.raises(ValueError, match="step_size_jitter"):
        inference._tuned_nuts(NUTS)(_model, step_size_jitter=1.0)


def _funnel():
    # Neal's funnel (Neal 2003, "Slice sampling", Ann. Statist. 31, §8; from memory): NUTS
    # diverges in its neck, so divergences occur at some transitions and not at others
    v = numpyro.sample("v", dist.Normal(0.0, 3.0))
    numpyro.sample("x", dist.Normal(0.0, jnp.exp(v / 2.0)).expand([6]).to_event(1))


@pytest.mark.parametrize("draws", [400, 402])
def test_thinned_draws_count_every_divergence(draws):
    """With thinning n, each kept draw is the last of a block of n transitions (numpyro's
    fori_collect, whose blocks start after the first draws mod n transitions), and its
    ``diverging`` is the OR of the block's — the first block also takes the transitions before
    it: checked against the same chains unthinned (same keys, so the same transitions)."""
    smp = _Sampler()
    smp.chains, smp.warmup, smp.draws = 2, 150, draws
    n, head = 4, draws % 4
    full = inference.run_nuts(_funnel, {}, smp, progress=False)
    thin = inference.run_nuts(_funnel, {}, smp, progress=False, thinning=n)
    v_full, v_thin = np.asarray(full.posterior["v"]), np.asarray(thin.posterior["v"])
    assert v_thin.shape == (2, 100)
    np.testing.assert_allclose(v_thin, v_full[:, head + n - 1::n], rtol=0, atol=1e-6)  # each block's last
    div = np.asarray(full.sample_stats["diverging"])
    blocks = div[:, head:].reshape(2, 100, n)
    want = blocks.any(-1)
    want[:, 0] |= div[:, :head].any(-1)  # the transitions no slot keeps go to the first block
    assert div.sum() > 0
    assert (want & ~blocks[..., -1]).any()  # blocks whose kept transition alone would miss it
    np.testing.assert_array_equal(np.asarray(thin.sample_stats["diverging"]), want)
