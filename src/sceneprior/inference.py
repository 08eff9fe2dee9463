"""Running the samplers and reading their diagnostics.

NUTS through numpyro (chains vectorised on the CPU for small models; for Gaussian-field
models at once, one jax CPU device per chain, or on large grids in separate processes,
one per core — ``chain_layout`` says why; a progress bar per chain for warmup and sampling), or
independent draws from an exact posterior where a model has one. Both end as one arviz
InferenceData with dimensions (chain, draw, ...); nothing downstream re-runs
a model.

Precision: jax runs in float64 (``jax_enable_x64``). Counts in long recordings reach
10⁶–10⁷ and exposures 10¹⁰ m²·scan; float32 would lose the log-likelihood's curvature.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

_CONFIGURED = False


def usable_cores() -> int:
    """Cores this process may run on (CPU affinity, e.g. taskset or a container's cpuset)."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


#: CPU devices jax is asked for (``configure_jax``) so that a Gaussian-field model's chains
#: can run at once, one per device (``chain_layout``); at least 4, the usual chain count
CPU_DEVICES = max(4, usable_cores())


def configure_jax() -> None:
    """float64, CPU with ``CPU_DEVICES`` devices (parallel chains), and a persistent
    compilation cache (compile time is the user's wait). Call it before any jax
    computation: the device count can only be set before jax starts its backend."""
    global _CONFIGURED
    if _CONFIGURED:
        return
    os.environ.setdefault("JAX_PLATFORMS", "cpu")
    import jax

    jax.config.update("jax_enable_x64", True)
    if "xla_force_host_platform_device_count" not in os.environ.get("XLA_FLAGS", ""):  # the user's own count wins
        try:
            jax.config.update("jax_num_cpu_devices", CPU_DEVICES)
        except (RuntimeError, AttributeError):  # backend already running: chains run one after another
            import warnings

            warnings.warn("sceneprior: jax started before configure_jax(); field chains will run one after "
                          "another", RuntimeWarning, stacklevel=2)
    setting = os.environ.get("SCENEPRIOR_JAX_CACHE", str(Path.home() / ".cache" / "sceneprior" / "jax"))
    if not setting:  # empty: no persistent cache (in-process caching still applies)
        _CONFIGURED = True
        return
    cache = Path(setting)
    try:
        cache.mkdir(parents=True, exist_ok=True)
        jax.config.update("jax_compilation_cache_dir", str(cache))
        # only compilations worth caching (the samplers), which keeps concurrent
        # processes from racing on thousands of tiny cache entries
        jax.config.update("jax_persistent_cache_min_compile_time_secs", 1.0)
    except (OSError, AttributeError):  # read-only home: run without the cache
        pass
    _CONFIGURED = True


#: latent dimension from which chains stop being vectorised (``chain_layout``)
SEQUENTIAL_FROM = 1000
#: latent dimension from which chains run one after another instead of in parallel
PARALLEL_BELOW = 20000


def chain_layout(n_latent: int, chains: int = 1, n_cells: int = 0, grid_latent: bool = False) -> str:
    """numpyro chain method for ``chains`` chains of a model with ``n_latent`` latent values
    on a grid of ``n_cells`` cells.

    Gaussian-field models (n_latent ≥ SEQUENTIAL_FROM) run their chains at once, one jax
    CPU device per chain (numpyro's "parallel"; ``configure_jax`` asks for the devices),
    when the process may use more than one core, jax has a device per chain and
    n_latent < PARALLEL_BELOW; otherwise in separate processes, one per core, each running
    its group of chains (see below), and one after another with one chain or one usable core. With more
    chains than cores the operating system shares the cores. Measured on 2 cores (Matérn 3/2, weak data,
    ``bench/bench_lgcp.py --one 64 matern32 weak --chains 4 --warmup 300 --draws 300``, the
    layout switched by hand, alternated in one session): 155.0 and 147.9 s one after
    another against 61.8 and 64.4 s in parallel, 31 leapfrog steps per draw in both; the
    demo (``sceneprior demo``) 101–109 s before, 51 s after. Why it pays: one chain's
    gradient keeps about one core busy (the 128² log-density gradient took 4.06 ms under
    ``taskset -c 0`` and 5.97 ms free on two cores, ``--one 128 matern32 weak
    --gradient``). The limit: at 128² (torus of 65 538 values, periodised spectrum) a
    parallel run's memory grew by 13–30 MB/s for minutes (8.9 GB at 4 × (100 + 100), against
    1.6 GB one after another), while 64² (16 386 values) with weak or strong data stayed
    flat at about 1 GB. Cause, found later: when several XLA executions run at once on the
    CPU (pmap over devices, or threads), a log-density gradient over a grid-sized array
    grows the process's memory call after call (a logsumexp over 65 536 cells inside a
    jax.lax.fori_loop: 8–20 MB/s with 4 concurrent executions — under pmap, with threads
    on four devices and with threads on one device — and flat with one execution at a
    time; glibc's malloc settings and XLA's threading flags did not stop it). So the
    parallel layout also needs the grid (``n_cells``, which the spectrally truncated field
    evaluates directly, with few latent values) below PARALLEL_BELOW: a 256² truncated fit
    (1 765 latent values) grew by about 9.6 MB/s in parallel (3.95 GB at 4 × (1000 + 1000))
    and stayed at 1.4–2.4 GB one chain after another. Larger fields, and more chains than
    jax has devices, run their chains in separate processes instead ("processes",
    :func:`run_chains_in_processes`), one per usable core, each with its group of chains
    (vectorised when the model declares its chains alike, ``vectorize_groups``): one XLA
    execution per process stays flat. Measured, 256² squared exponential, weak data,
    q = 0.999, 4 × (1000 + 1000), ``--one 256 squared_exponential weak --variance-kept
    0.999``: one chain per process
    (four processes, two at a time) 286.7 s and 3.32 GB for the process tree (RSS summed),
    the same min cell ESS (1239) and R-hat (1.0073) as one after another in 461–559 s; in a
    later session 239.6 s with the float32 map, and 207.8 s (3.54 GB) with two processes of
    two vectorised chains (179.7 and 184.0 s in the next session, with the LGCP's starting
    mass matrix, ``models.lgcp.INITIAL_HYPER_VARIANCE``). Below PARALLEL_BELOW the parallel
    layout stays: 128² Matérn 3/2 weak, q = 0.98, 4 × (1000 + 1000), with warmup trees
    capped at depth 5 (bench ``--warmup-depth 5``), took 179.2 s in parallel and 190.8 s in
    two processes of two vectorised chains (forced; each process starts jax and compiles).
    One core, or one chain: one after another. ``grid_latent``: a sampled site holds one value
    per grid cell, or the gradient does per-cell work beyond the field's (the LGCP's per-cell
    term, ``models.lgcp`` option dropped_modes, sampled or integrated out) — never parallel,
    whatever its size: 128² Matérn 3/2 strong, q 0.9, 1 397 + 16 384 latent values (below
    PARALLEL_BELOW), grew by about 25 MB/s in parallel (1.98 GB after 1 min of sampling, 5.73
    GB after 5; measured, RSS of a scratch coverage run driving ``run_nuts``); q 0.95 with the
    term integrated out (2 434 latent values) by about 4.6 MB/s (1.70 GB after 30 s, 4.49 GB at
    the end, 586 s; ``bench/bench_lgcp.py --one 128 matern32 strong --variance-kept 0.95``).

    Vectorised chains (one jax.vmap over chains) turn NUTS's tree-building branches into
    selects over every chain's whole state, so the sampler's bookkeeping per leapfrog step
    grows faster than the chains: on an iid N(0, I) target of 65 538 dimensions it took
    14.7 ms per step for 4 vectorised chains against 2.68 ms for one chain (measured,
    ``bench/bench_lgcp.py`` part (d) does the same), while the full-torus field gradient
    costs the same per chain either way (a truncated field's gradient is cheaper per chain
    when batched, hence the vectorised groups of :func:`run_chains_in_processes` where the
    model asks for them). Measured on the LGCP (Matérn 3/2, weak data, 4 × (150 + 150)): 64²
    cells 91.0 s sequential against 195.5 s vectorised; 32² (4 × (300 + 300)) 51.2 s
    against 60.2 s. Small models (a handful of parameters) keep the vectorised layout,
    where one pass serves every chain — but not a model whose gradient does per-cell work
    (``grid_latent``) on SEQUENTIAL_FROM cells or more, however few its latent values (the
    threshold borrowed from the latent dimension: at 32², q 0.9, strong data, 878 latent values,
    the two layouts were alike — chain processes 87.6 s, 27.5 steps per draw, min cell ESS
    3130, 2.97 GB; vectorised, forced, 95.1 s, 31 steps, 3397, 1.62 GB; scratch runs through
    the bench's ``_run``): 128²
    Matérn 3/2 strong, q 0.85 with the per-cell term integrated out (974 latent values, 16 384
    cells), had not finished 4 × (1000 + 1000) vectorised after 11 min (killed; ``bench/bench_lgcp.py
    --one 128 matern32 strong --variance-kept 0.85``), where q 0.9 (1 398 latent values, chain
    processes) took 166.4–179.3 s. Asks jax for its device count, which starts jax's
    backend: call ``configure_jax`` first."""
    if (max(n_latent, n_cells) if grid_latent else n_latent) < SEQUENTIAL_FROM:
        return "vectorized"
    if chains < 2 or usable_cores() < 2:
        return "sequential"
    import jax

    if max(n_latent, n_cells) < PARALLEL_BELOW and chains <= jax.local_device_count() and not grid_latent:
        return "parallel"
    return PROCESSES


#: layout name of :func:`run_chains_in_processes` (not a numpyro chain method)
PROCESSES = "processes"
#: memory a chain process needs besides its draws (jax, the compiled sampler), an allowance
#: for ``fitting``'s memory check (``fitting._check_memory`` says what it rests on)
CHAIN_PROCESS_BYTES = 1.0e9


def chains_at_once(n_latent: int, chains: int, n_cells: int = 0, vectorize_groups: bool = False,
                   grid_latent: bool = False) -> int:
    """How many chains hold their sampler state at the same time under ``chain_layout``
    (all when vectorised or parallel, and in separate processes when these vectorise their
    groups, ``vectorize_groups``; one per usable core when the processes run their chains
    one after another; one when all run one after another); the memory checks in
    ``fitting`` count this many."""
    layout = chain_layout(n_latent, chains, n_cells, grid_latent)
    if layout == "sequential":
        return 1
    if layout == PROCESSES and not vectorize_groups:
        return min(chains, usable_cores())
    return chains


#: numpyro's default target of warmup's step-size adaptation (mean acceptance probability)
TARGET_ACCEPT = 0.8


def run_nuts(fn, inputs: dict, sampler, progress: bool = True, dense_mass: bool = False,
             dims: dict | None = None, coords: dict | None = None, init_strategy=None,
             exclude_sites=(), thinning: int = 1, n_latent: int = 0, n_cells: int = 0,
             warmup_tree_depth: int | None = None, vectorize_groups: bool = False,
             inverse_mass_matrix: dict | None = None, step_size_jitter: float = 0.0,
             extra_uturn_checks: bool = False, target_accept: float = TARGET_ACCEPT, grid_latent: bool = False):
    """Sample ``fn(**inputs)`` with NUTS; returns InferenceData whose sample_stats hold the
    leapfrog steps and divergences per draw. ``exclude_sites``: latent sites not kept (a
    field's white noise; its deterministic images are kept instead); ``thinning``: keep
    every n-th draw (memory budget of per-cell draws); ``n_latent``: the model's latent
    dimension and ``n_cells`` its grid's cells, which pick the chain layout (:func:`chain_layout`,
    with ``grid_latent``: a latent site with one value per cell);
    ``warmup_tree_depth``: the deepest NUTS tree during warmup (None: depth 10, as in
    sampling, which always keeps it) — a cap saves the long trees of the first warmup
    window but can spoil the mass-matrix adaptation (``models.lgcp.WARMUP_TREE_DEPTH`` says
    what was measured);
    ``inverse_mass_matrix``: the mass matrix warmup starts from, as numpyro's NUTS takes it
    ({tuple of site names: matrix or diagonal}; sites not named start at the identity);
    warmup adapts it from there (``models.lgcp.INITIAL_HYPER_VARIANCE`` says why);
    ``step_size_jitter``: after warmup each transition's step size is the adapted one times
    U(1 − j, 1 + j) (:func:`jittered_step_size` says why; 0: numpyro's fixed step size);
    ``extra_uturn_checks``: NUTS trees that also check the U-turn criterion across the two
    halves of every merged subtree (:mod:`sceneprior.nuts_tree` says why);
    ``target_accept``: the mean acceptance probability warmup's step-size adaptation aims at
    (numpyro's ``target_accept_prob``; lower: larger steps, shorter trees);
    ``vectorize_groups``: the model's chains are alike in cost per iteration (the same tree
    depths), so the chain processes of the "processes" layout may run theirs vectorised
    (:func:`run_chains_in_processes`)."""
    configure_jax()  # before numpyro is imported (nuts_kernel_options)
    kernel = nuts_kernel_options(dense_mass=dense_mass, init_strategy=init_strategy,
                                 warmup_tree_depth=warmup_tree_depth, inverse_mass_matrix=inverse_mass_matrix,
                                 step_size_jitter=step_size_jitter, extra_uturn_checks=extra_uturn_checks,
                                 target_accept=target_accept)
    import arviz as az
    import jax

    layout = chain_layout(n_latent, sampler.chains, n_cells, grid_latent)
    if layout == PROCESSES:
        return run_chains_in_processes(fn, inputs, sampler, kernel, progress=progress, dims=dims, coords=coords,
                                       exclude_sites=exclude_sites, thinning=thinning,
                                       vectorize_groups=vectorize_groups)
    mcmc = _sample(fn, inputs, jax.random.PRNGKey(sampler.seed), kernel, sampler.warmup, sampler.draws, thinning,
                   exclude_sites, sampler.chains, layout, progress and sampler.progress)
    return az.from_numpyro(mcmc, log_likelihood=False, dims=dims, coords=coords)


#: numpyro's default deepest NUTS tree (2^10 − 1 leapfrog steps), kept for sampling
MAX_TREE_DEPTH = 10


def nuts_kernel_options(dense_mass=False, init_strategy=None, warmup_tree_depth: int | None = None,
                        inverse_mass_matrix: dict | None = None, step_size_jitter: float = 0.0,
                        extra_uturn_checks: bool = False, target_accept: float = TARGET_ACCEPT) -> dict:
    """The NUTS kernel's options (:func:`run_nuts` says what each does) as the one bundle every
    chain layout passes to :func:`nuts_kernel`, checked; ``init_strategy`` None: numpyro's
    ``init_to_median`` — an arbitrary start far out in log intensity makes warmup spend its
    first hundreds of iterations walking in."""
    if not 0.0 < target_accept < 1.0:
        raise ValueError(f"target_accept must be in (0, 1), got {target_accept}")
    from numpyro.infer import init_to_median

    return {"dense_mass": dense_mass, "init_strategy": init_strategy or init_to_median(num_samples=15),
            "warmup_tree_depth": warmup_tree_depth, "inverse_mass_matrix": inverse_mass_matrix,
            "step_size_jitter": step_size_jitter, "extra_uturn_checks": extra_uturn_checks,
            "target_accept": float(target_accept)}


def nuts_kernel(fn, kernel: dict, thinning: int = 1, draws: int = 0):
    """numpyro's NUTS for ``fn`` with the options bundle of :func:`nuts_kernel_options`
    (numpyro takes (warmup, sampling) tree depths, and it fills in the mass matrix dict it is
    given, so it gets a copy). ``thinning`` > 1: the MCMC keeps every n-th of its ``draws``,
    and each kept draw's ``diverging`` says whether any transition since the previous kept
    draw diverged (``_tuned_nuts``), so that no divergence goes uncounted."""
    import jax.numpy as jnp
    from numpyro.infer import NUTS

    wd, imm = kernel["warmup_tree_depth"], kernel["inverse_mass_matrix"]
    depth = MAX_TREE_DEPTH if wd is None else (int(wd), MAX_TREE_DEPTH)
    start = None if imm is None else {k: jnp.asarray(v) for k, v in imm.items()}
    tuned = {k: kernel[k] for k in ("step_size_jitter", "extra_uturn_checks") if kernel[k]}
    if thinning > 1:
        tuned.update(thinning=int(thinning), draws=int(draws))
    cls = _tuned_nuts(NUTS) if tuned else NUTS
    return cls(fn, dense_mass=kernel["dense_mass"], init_strategy=kernel["init_strategy"], max_tree_depth=depth,
               inverse_mass_matrix=start, target_accept_prob=kernel["target_accept"], **tuned)


def _sample(fn, inputs, key, kernel: dict, warmup, draws, thinning, exclude_sites, chains, method, progress):
    """numpyro's NUTS (:func:`nuts_kernel`) and MCMC as every layout runs them; returns the
    finished MCMC."""
    from numpyro.infer import MCMC

    mcmc = MCMC(nuts_kernel(fn, kernel, thinning, draws), num_warmup=warmup, num_samples=draws, num_chains=chains,
                chain_method=method,
                progress_bar=progress, thinning=thinning)
    drop = tuple(f"~z.{name}" for name in exclude_sites)
    mcmc.run(key, extra_fields=("diverging", "num_steps") + drop, **inputs)
    return mcmc


def jittered_step_size(key, i, step_size, warmup: int, jitter: float):
    """The step size of one NUTS transition: during warmup (iteration ``i`` < ``warmup``)
    numpyro's adapted ``step_size``; after it, ``step_size`` · U(1 − jitter, 1 + jitter), drawn
    afresh each transition from ``key``. Why: a fixed step size can resonate with the
    trajectories of a near-Gaussian posterior, so that the no-U-turn criterion misses the
    turn for a whole chain — measured on the 32² Matérn 3/2 LGCP (bench/bench_lgcp.py's weak
    data, 4 × (1000 + 1000), seed 1): one chain of four took 295 leapfrog steps per draw
    against 31 for the others at near-equal adapted step sizes (0.198 against 0.176–0.195)
    and mass matrices; continued at its own step size × 0.9, 0.97, 1.03, 1.1 it took 31, 31,
    17.5, 15 steps, at × 1.0 280 (``models.lgcp.STEP_SIZE_JITTER`` has the full scan and
    why the jitter is not on by default). A step size drawn independently of the state each
    transition keeps the posterior invariant (a mixture of kernels that each do); randomising
    it to break such periodicities is Neal's remedy (Handbook of MCMC, 2011, ch. 5 "MCMC using
    Hamiltonian dynamics", §5.4.2; from memory, subsection not checked)."""
    import jax
    import jax.numpy as jnp

    u = jax.random.uniform(jax.random.fold_in(key, 0x6A17), (), minval=1.0 - jitter, maxval=1.0 + jitter)
    return jnp.where(i >= warmup, step_size * u.astype(jnp.result_type(step_size)), step_size)


_TUNED = {}


def _tuned_nuts(base):
    """numpyro's NUTS (``base``, imported where it is used so tests may replace it) with three
    options: ``step_size_jitter`` — each post-warmup transition's step size from
    :func:`jittered_step_size` (warmup and its adaptation are numpyro's own, the same draws;
    the adapted step size stays in the state between transitions) —, ``extra_uturn_checks``
    — the trees of :mod:`sceneprior.nuts_tree` — and ``thinning``: the MCMC keeps every n-th
    draw, so the state's ``diverging`` flag is carried through each block of n sampling
    transitions (an OR, reset at the block's first) and the kept draw records whether any of
    them diverged. numpyro's ``fori_collect`` fills slot (k − h) // n with the block's last
    transition, k the sampling transition and h = draws mod n (its start_idx = warmup + h), so
    blocks start at k = h + j·n and the first also takes the h transitions before it, which
    no slot keeps (``draws``: the MCMC's sampling transitions). The flag is only read out,
    never by the sampler, so the draws are the same."""
    if base in _TUNED:
        return _TUNED[base]

    class TunedNUTS(base):
        def __init__(self, *args, step_size_jitter: float = 0.0, extra_uturn_checks: bool = False,
                     thinning: int = 1, draws: int = 0, **kwargs):
            if not 0.0 <= step_size_jitter < 1.0:
                raise ValueError(f"step_size_jitter must be in [0, 1), got {step_size_jitter}")
            self._jitter = float(step_size_jitter)
            self._extra_checks = bool(extra_uturn_checks)
            self._thinning = int(thinning)
            self._draws = int(draws)
            self._warmup = 0
            super().__init__(*args, **kwargs)

        def init(self, rng_key, num_warmup, *args, **kwargs):
            self._warmup = int(num_warmup)
            return super().init(rng_key, num_warmup, *args, **kwargs)

        def sample(self, state, model_args, model_kwargs):
            import contextlib
            from functools import partial

            import jax
            import jax.numpy as jnp
            from numpyro.util import is_prng_key

            from .nuts_tree import extra_checks

            adapted = state.adapt_state.step_size
            if self._jitter:
                draw = partial(jittered_step_size, warmup=self._warmup, jitter=self._jitter)
                if not is_prng_key(state.rng_key):  # vectorised chains: a batch of keys, numpyro's kernel vmapped
                    draw = jax.vmap(draw)
                eps = draw(state.rng_key, state.i, adapted)
                state = state._replace(adapt_state=state.adapt_state._replace(step_size=eps))
            with extra_checks() if self._extra_checks else contextlib.nullcontext():  # traced here
                new = super().sample(state, model_args, model_kwargs)
            if self._jitter:
                kept = jnp.where(state.i >= self._warmup, adapted, new.adapt_state.step_size)
                new = new._replace(adapt_state=new.adapt_state._replace(step_size=kept))
            if self._thinning > 1:  # new.i − 1: this transition's 0-based index, warmup included
                n, head = self._thinning, self._draws % self._thinning
                k = new.i - 1 - self._warmup  # sampling transition k (negative in warmup)
                # kept blocks start at k = head + j·n; the first also takes the head's k < head
                starts = (k >= head + n) & ((k - head) % n == 0)
                carry = (k > 0) & ~starts
                new = new._replace(diverging=new.diverging | (state.diverging & carry))
            return new

    _TUNED[base] = TunedNUTS
    return TunedNUTS


def _end_with_parent() -> None:
    """Linux: this process gets SIGTERM when its parent dies (prctl PR_SET_PDEATHSIG), so
    chain processes do not sample on for a parent that was killed."""
    try:
        import ctypes
        import signal

        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, int(signal.SIGTERM))  # PR_SET_PDEATHSIG = 1
    except (OSError, AttributeError):
        pass


def chain_cores() -> list:
    """The cores chain processes are pinned to, one process each (None: no pinning, where
    the affinity cannot be read)."""
    try:
        return sorted(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return [None] * usable_cores()


def chain_groups(chains: int, slots: int) -> list[list[int]]:
    """Chains 0..chains−1 split into at most ``slots`` consecutive groups of near-equal size
    (one group per chain process)."""
    return [list(map(int, g)) for g in np.array_split(np.arange(chains), max(1, min(chains, slots)))]


def _chain_group(job_bytes: bytes, group: list[int], core: int | None, keys, results) -> None:
    """Worker of :func:`run_chains_in_processes`: the chains ``group`` with their own keys
    (rows of ``keys``), pinned to one core; vectorised when the job says so, else one after
    another (numpyro's layouts, ``num_chains=len(group)``). Puts (group, "ok", pickled (draws,
    stats), seconds) or (group, "error", traceback, 0) on ``results``. The job arrives pickled
    and is loaded after ``configure_jax`` (its jax arrays would start jax, in float32); the
    result is pickled here, so that a failure to pickle it is reported like any other."""
    import pickle
    import time
    import traceback

    t0 = time.perf_counter()
    _end_with_parent()
    try:
        if core is not None:
            os.sched_setaffinity(0, {core})
        configure_jax()
        import jax
        import jax.numpy as jnp

        job = pickle.loads(job_bytes)
        n = len(group)
        key = jnp.asarray(keys if n > 1 else keys[0], dtype=jnp.uint32)  # 2-D: one key per chain
        method = "vectorized" if job["vectorize"] and n > 1 else "sequential"
        mcmc = _sample(job["fn"], job["inputs"], key, job["kernel"], job["warmup"], job["draws"], job["thinning"],
                       job["exclude_sites"], n, method, job["bar"] and group[0] == 0)
        draws = {k: np.asarray(v) for k, v in jax.device_get(mcmc.get_samples(group_by_chain=True)).items()}
        extra = jax.device_get(mcmc.get_extra_fields(group_by_chain=True))
        stats = {"diverging": np.asarray(extra["diverging"]), "n_steps": np.asarray(extra["num_steps"])}
        payload = pickle.dumps((draws, stats), protocol=pickle.HIGHEST_PROTOCOL)
        del draws, mcmc
        results.put((tuple(group), "ok", payload, time.perf_counter() - t0))
    except BaseException:  # reported to the parent, which raises
        results.put((tuple(group), "error", traceback.format_exc(), 0.0))


def _chain_names(group) -> str:
    return f"chain {group[0] + 1}" if len(group) == 1 else f"chains {group[0] + 1}–{group[-1] + 1}"


def run_chains_in_processes(fn, inputs: dict, sampler, kernel: dict, progress: bool = True, dims=None,
                            coords=None, exclude_sites=(), thinning: int = 1, vectorize_groups: bool = False):
    """NUTS with the chains in separate processes (``chain_layout``'s "processes"): one process
    per usable core, each pinned to its core and running a group of chains
    (:func:`chain_groups`) — vectorised when ``vectorize_groups``, else one after another —
    so each process starts jax and compiles the sampler once; ``kernel`` is the NUTS options
    bundle of :func:`run_nuts` (:func:`_sample`). Chain c uses the c-th of
    ``jax.random.split(PRNGKey(seed), chains)``, as numpyro's one-after-another chains do:
    one after another within a process, the draws are theirs; vectorised, they agree up to
    rounding at first (1.3 × 10⁻⁵ in tests/test_chains.py's toy model) and drift apart over
    long runs, like any two chains. Why processes: XLA grows memory when several executions
    run at once in one process on grid-sized arrays (``chain_layout``), while one execution
    per process stays flat. ``fn`` and
    ``inputs`` must pickle (module-level model functions; the field kernels rebuild their
    jitted maths on unpickling); processes are spawned, so a script of the user's that fits
    must guard its entry point (``if __name__ == "__main__":``)."""
    import multiprocessing as mp
    import pickle
    import queue
    import sys
    import time

    import arviz as az
    import jax

    chains = sampler.chains
    cores = chain_cores()
    groups = chain_groups(chains, len(cores))
    root = jax.random.PRNGKey(sampler.seed)
    keys = np.asarray(jax.random.split(root, chains) if chains > 1 else root[None])  # numpyro: one chain, no split
    show = progress and sampler.progress
    job = pickle.dumps({"fn": fn, "inputs": inputs, "kernel": kernel, "exclude_sites": tuple(exclude_sites),
                        "thinning": thinning, "warmup": sampler.warmup, "draws": sampler.draws, "bar": show,
                        "vectorize": bool(vectorize_groups)})
    ctx = mp.get_context("spawn")  # jax is not fork-safe
    results = ctx.Queue()
    running = {}
    posterior: dict = {}
    stats: dict = {}
    t0 = time.perf_counter()

    def say(msg):
        if show:
            print(msg, file=sys.stderr, flush=True)

    how = "vectorised" if vectorize_groups else "one after another"
    say(f"{chains} chains in {len(groups)} processes (one per core; {how} within a process); the "
        f"progress bar follows the process on the first core")
    try:
        for group, core in zip(groups, cores):
            proc = ctx.Process(target=_chain_group, args=(job, group, core, keys[group], results), daemon=True)
            proc.start()
            running[tuple(group)] = proc
        while running:
            try:
                group, status, payload, secs = results.get(timeout=2.0)
            except queue.Empty:
                ended = [(g, proc.exitcode) for g, proc in running.items() if proc.exitcode is not None]
                if not ended:
                    continue
                try:  # a result written just before its process ended
                    group, status, payload, secs = results.get(timeout=3.0)
                except queue.Empty:  # ended without a word (killed, out of memory)
                    raise RuntimeError(f"the process of {_chain_names(ended[0][0])} ended with exit code "
                                       f"{ended[0][1]} before returning its draws (out of memory?)") from None
            running.pop(group).join()
            if status != "ok":
                raise RuntimeError(f"{_chain_names(group)} failed in its process:\n{payload}")
            draws, st = pickle.loads(payload)
            del payload
            for part_all, part in ((posterior, draws), (stats, st)):
                for k, v in part.items():  # filled group by group: one group's copy in transit at most
                    if k not in part_all:
                        part_all[k] = np.empty((chains,) + v.shape[1:], v.dtype)
                    part_all[k][list(group)] = v
            del draws
            say(f"{_chain_names(group)} of {chains} done in {secs:.0f} s ({float(np.mean(st['n_steps'])):.1f} "
                f"leapfrog steps per draw; {time.perf_counter() - t0:.0f} s since the start)")
    finally:
        for proc in running.values():
            proc.terminate()
        for proc in running.values():
            proc.join(timeout=10.0)
            if proc.exitcode is None:
                proc.kill()
    return az.from_dict(posterior=posterior, sample_stats=stats, dims=dims, coords=coords)


def exact_idata(draws: dict):
    """InferenceData from independent posterior draws shaped (chain, draw, ...)."""
    import arviz as az

    idata = az.from_dict(posterior={k: np.asarray(v) for k, v in draws.items()})
    c, d = next(iter(draws.values())).shape[:2]
    idata.add_groups(
        sample_stats={"diverging": np.zeros((c, d), bool), "num_steps": np.zeros((c, d), np.int64)}
    )
    return idata


def diagnostics(idata, var_names) -> dict:
    """R-hat (rank-normalised split R-hat), bulk and tail ESS per variable, divergences and
    leapfrog steps (Vehtari et al. 2021, via arviz)."""
    import arviz as az

    post = idata.posterior
    out: dict = {"variables": {}}
    rhat = az.rhat(post, var_names=list(var_names))
    ess_b = az.ess(post, var_names=list(var_names), method="bulk")
    ess_t = az.ess(post, var_names=list(var_names), method="tail")
    for v in var_names:
        out["variables"][v] = {
            "r_hat": _scalar(rhat[v], np.nanmax),
            "ess_bulk": _scalar(ess_b[v], np.nanmin),
            "ess_tail": _scalar(ess_t[v], np.nanmin),
        }
    ss = idata.sample_stats
    out["divergences"] = int(np.asarray(ss["diverging"]).sum()) if "diverging" in ss else 0
    name = next((k for k in ("n_steps", "num_steps") if k in ss), None)  # arviz renames numpyro's field
    if name is not None and np.asarray(ss[name]).max() > 0:  # exact draws have no leapfrog steps
        steps = np.asarray(ss[name])
        out["leapfrog_steps_mean"] = float(steps.mean())
        out["leapfrog_steps_max"] = int(steps.max())
    out["chains"] = int(post.sizes["chain"])
    out["draws"] = int(post.sizes["draw"])
    return out


def _scalar(da, worst) -> float:
    """A diagnostic as one number; vector sites report their worst element."""
    vals = np.asarray(da, dtype=float)
    return float(vals.reshape(())) if vals.size == 1 else float(worst(vals))


def cell_diagnostics(log_lam: np.ndarray, chunk: int = 2048) -> dict:
    """R-hat and bulk ESS of the log intensity over cells, (chain, draw, cell) input.

    Reported as quantiles over cells: a maximum over 10⁴ cells would fail healthy runs by
    chance, so the gate reads the 99th percentile of R-hat and the median bulk ESS.
    Computed by arviz in chunks of cells (its rank normalisation makes several float64
    copies of its input), so large maps stay within memory. ``ess_bulk_argmin`` is the
    position of the least-ESS cell along the input's last axis (−1 if none)."""
    import arviz as az

    x = np.asarray(log_lam)
    n = x.shape[-1]
    rhat = np.zeros(n)
    ess = np.zeros(n)
    for i in range(0, n, chunk):
        part = np.asarray(x[..., i:i + chunk], dtype=np.float64)
        ds = az.convert_to_dataset({"log_intensity": part}, dims={"log_intensity": ["cell"]})
        rhat[i:i + chunk] = np.asarray(az.rhat(ds)["log_intensity"], dtype=float)
        ess[i:i + chunk] = np.asarray(az.ess(ds, method="bulk")["log_intensity"], dtype=float)
    if n == 0:
        rhat = ess = np.full(1, np.nan)
    return {
        "quantity": "log intensity per cell (cells with area in the window)",
        "n_cells": int(n),
        "r_hat_p99": float(np.nanpercentile(rhat, 99)),
        "r_hat_max": float(np.nanmax(rhat)),
        "ess_bulk_median": float(np.nanmedian(ess)),
        "ess_bulk_min": float(np.nanmin(ess)),
        "ess_bulk_argmin": int(np.nanargmin(ess)) if np.any(np.isfinite(ess)) else -1,
    }
