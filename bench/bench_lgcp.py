"""LGCP benchmark (not a test): prints, in one run, side-by-side figures for

  (a) the Fourier-domain LGCP against a dense-covariance formulation of the same model
      (same kernel, priors, float64, NUTS with the production sampler settings: start,
      mass-matrix block, target acceptance — ``dense_sampler_options``) at 16² and 32²
      cells: wall time, minimum bulk ESS over cells, ESS per second, and the ratio; and,
      since the dense form cannot run the full length in hours, bounds on its wall time and
      ESS per second at that length from its measured gradient cost (``dense_bound``);
  (b) scaling at 32², 64², 128², 256² cells for a squared-exponential and a Matérn 3/2
      field, with weak (≈ 0.3 detections per cell in total) and strong (≥ 50 per cell)
      data: wall time including compilation, leapfrog steps per draw, minimum bulk ESS,
      maximum R-hat, divergences, peak memory;
  (c) fit time at 1× and 10× the number of scans on the same grid;
  (d) where the time goes: cost of one gradient of the log density (1 chain, and the
      chains vectorised), the share of the torus spectrum
      in it, the leapfrog steps per draw and the bookkeeping time per step of NUTS on an
      iid N(0, I) target of the same dimension — the floor for a perfectly preconditioned
      field — and the time chains × (warmup + draws) would take at that floor in the
      production chain layout (``inference.chain_layout``): iterations × floor steps ×
      (gradient + bookkeeping) per chain, divided by the chains running at once
      (at most the usable cores) when they run in parallel.

Usage:
    python bench/bench_lgcp.py                 # the full issue set-up (hours on 2 cores)
    python bench/bench_lgcp.py --quick         # 1 chain × (200 + 200), small grids only
    python bench/bench_lgcp.py --sizes 32 64 --kernels matern32 --chains 4 --warmup 1000 --draws 1000
    python bench/bench_lgcp.py --one 32 matern32 weak10 --scans 1000 --warmup-steps --seeds 1 2
                                               # warmup's leapfrog steps per 100 iterations
    python bench/bench_lgcp.py --parts bc --variance-kept recommended --row-limit-s 900
                                               # the README's (b) and (c) tables in one run (each
                                               # size and kernel at the setting recommended for it)

Every configuration takes ``--variance-kept Q`` (spectral truncation, model option
variance_kept: the Fourier modes carrying the fraction Q of the prior variance at the
shortest length scale; 1 = every torus mode; ``recommended``: per configuration, as
``recommended_variance_kept``); the rows print the latent dimension and the kept fraction.
Wall times are production layouts (``inference.chain_layout``), and the kept per-cell
draws are thinned to the default budget as ``sceneprior fit`` does.

Data are simulated from the model's own prior-shaped field (our own numbers) on a
Cartesian box of side 1000 m (``--field-seed``, with --one; 0 otherwise). Every fit row
also says how its posterior meets that true field (``truth``: coverage of the 90 % and 50 %
intervals of the cell log intensity, RMSE, mean posterior sd — ``truth_coverage``).
Peak memory is the largest resident set size of the process
and its chain processes summed (sampled from /proc every 0.5 s, or ru_maxrss if larger)
until the end of sampling — an upper bound where chain processes run, since pages they
share (libraries) count once per process — so run one configuration per process for
clean memory figures (--one SIZE KERNEL REGIME does that); the per-cell diagnostics
afterwards are computed in chunks (``inference.cell_diagnostics``).
"""

from __future__ import annotations

import argparse
import json
import math
import resource
import subprocess
import sys
import time
from functools import partial

import numpy as np

#: detections per cell in total, per data regime of parts (b)–(d)
REGIMES = {"weak": 0.3, "weak10": 3.0, "strong": 60.0}


def recommended_variance_kept(n, kernel, regime) -> float:
    """The spectral truncation the README (Performance, "LGCP: what to expect") recommends for
    an n² grid: the squared exponential 0.999 (the model's default for it); Matérn 3/2 on
    128² cells and more 0.98 with weak data and 0.9 with strong data (the per-cell term then
    on by model.dropped_modes = "auto"); every torus mode otherwise (Matérn up to 64², and
    Matérn 1/2 and 5/2 at any size: the README advises 64² at most for Matérn 1/2)."""
    if kernel == "squared_exponential":
        return 0.999
    if kernel == "matern32" and n >= 128:
        return 0.9 if regime == "strong" else 0.98
    return 1.0


def _variance_kept_arg(text):
    return text if text == "recommended" else float(text)


def _kept(args, n, kernel, regime) -> float:
    """--variance-kept for one configuration."""
    if args.variance_kept == "recommended":
        return recommended_variance_kept(int(n), kernel, regime)
    return float(args.variance_kept)


def _setup(n, kernel, per_cell, K, seed=0, variance_kept=1.0, dropped_modes="auto"):
    import scipy.sparse as sp

    from sceneprior.binning import BinnedStats
    from sceneprior.geometry import Region
    from sceneprior.models import lgcp
    from sceneprior.models.registry import get_model, resolve_prior
    from sceneprior.spec import ModelSpec

    reg = Region("cartesian", (0.0, 1000.0), (0.0, 1000.0))
    g = reg.grid((n, n))
    area = g.cell_area().ravel()
    kind = get_model("lgcp")
    h = 1000.0 / n
    prior = resolve_prior(kind, {"rate_median": per_cell * n * n / K, "rate_log_sd": 1.0,
                                 "length_scale_min": max(2 * h, 50.0), "length_scale_max": 250.0}, "bench")

    def stats_for(counts):
        return BinnedStats(reg, g, np.asarray(counts, np.int64), K * area, area, area, K, np.arange(K),
                           np.zeros(K, np.int64), sp.csr_matrix((K, g.n_cells)))

    spectrum = lgcp.plan(stats_for(np.zeros(n * n)), kernel, prior)[0]
    rng = np.random.default_rng(seed)
    f = lgcp.simulate_field(spectrum, 150.0, 1.0, rng)
    truth = np.log(per_cell / (K * area[0])) + f  # the true log intensity per cell [log(m⁻² scan⁻¹)]
    counts = rng.poisson(np.exp(truth) * K * area)
    t = time.perf_counter()
    setup = kind.setup(stats_for(counts), prior, ModelSpec("lgcp", {}, {"kernel": kernel, "variance_kept": variance_kept,
                                                                        "dropped_modes": dropped_modes}))
    setup.extra["bench_setup_s"] = time.perf_counter() - t  # plan, pilot, preconditioner
    setup.extra["bench_truth"] = truth
    return kind, setup, counts


class TreeMemory:
    """Peak resident memory of this process and its descendants (the chain processes of
    ``inference.run_chains_in_processes``), sampled every ``every`` s from /proc (Linux);
    ru_maxrss alone sees one process."""

    def __init__(self, every=0.5):
        import os
        import threading

        self.peak_kb, self._stop = 0, threading.Event()
        self._root = os.getpid()
        self._thread = threading.Thread(target=self._loop, args=(every,), daemon=True)
        self._thread.start()

    def _tree_kb(self):
        import os

        parent, rss = {}, {}
        for d in os.listdir("/proc"):
            if not d.isdigit():
                continue
            try:
                with open(f"/proc/{d}/stat") as fh:
                    parent[int(d)] = int(fh.read().rsplit(")", 1)[1].split()[1])
                with open(f"/proc/{d}/status") as fh:
                    rss[int(d)] = next((int(x.split()[1]) for x in fh if x.startswith("VmRSS:")), 0)
            except (OSError, ValueError, IndexError):
                continue
        tree, grew = {self._root}, True
        while grew:
            new = {p for p, pp in parent.items() if pp in tree} - tree
            tree |= new
            grew = bool(new)
        return sum(rss.get(p, 0) for p in tree)

    def _loop(self, every):
        while not self._stop.wait(every):
            self.peak_kb = max(self.peak_kb, self._tree_kb())

    def stop_mb(self):
        self._stop.set()
        self._thread.join()
        own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        return max(self.peak_kb, own) / 1024


def _run(kind, setup, chains, warmup, draws, dense_baseline=False, setup_s=0.0, progress=False, matched=True):
    """One fit through the production sampler (``inference.run_nuts``: same chain layout,
    kept sites and diagnostics as ``sceneprior fit``); wall time = set-up (pilot,
    preconditioner) + compilation + warmup + sampling. ``matched``: the dense baseline
    takes the production sampler settings (:func:`dense_sampler_options`); otherwise
    numpyro's defaults (start at prior medians, diagonal identity mass)."""
    from numpyro.infer import init_to_median

    from sceneprior.fitting import nuts_options
    from sceneprior.inference import cell_diagnostics, run_nuts
    from sceneprior.results import thin_for_budget
    from sceneprior.spec import DRAWS_BUDGET_MB

    class Sampler:  # the fields of spec.SamplerSpec that run_nuts reads
        pass

    smp = Sampler()
    smp.chains, smp.warmup, smp.draws, smp.seed, smp.progress = chains, warmup, draws, 1, progress
    if dense_baseline:
        fn, inputs = dense_model_inputs(setup)
        kw = dense_sampler_options(setup) if matched else dict(
            init_strategy=init_to_median(num_samples=15), n_latent=len(setup.inputs["window_area"]),
            n_cells=len(setup.inputs["window_area"]))
    else:
        fn, inputs = kind.fn, setup.inputs
        kw = nuts_options(setup, len(setup.inputs["window_area"]))
    # the production thinning: kept per-cell draws within the default budget (fitting.fit)
    thinning = thin_for_budget(draws, len(setup.inputs["window_area"]) * chains, DRAWS_BUDGET_MB)
    t = time.perf_counter()
    memory = TreeMemory()
    idata = run_nuts(fn, inputs, smp, progress=progress, thinning=thinning, **kw)
    complete_s = 0.0
    if not dense_baseline:  # as the fit completes the draws: the baseline (and the per-cell term's exact draws)
        t_c = time.perf_counter()
        idata = setup.extra["complete"](idata, None, setup, 1)
        complete_s = time.perf_counter() - t_c
    wall = time.perf_counter() - t + setup_s
    peak_sampling = memory.stop_mb()
    # cell log intensity μ + f: μ sampled with the integrated per-cell term (f then includes
    # the term's draws), else μ = log ρ₀ drawn exactly from its conjugate Gamma given f —
    # by complete_posterior, or here for the dense baseline, whose model records no log Z
    # (both formulations integrate ρ₀ out in the sampler); diagnostics in chunks of cells
    f = np.array(idata.posterior["field"], np.float32)
    if "mu" in idata.posterior:
        level = np.asarray(idata.posterior["mu"], float)
    else:
        a, b = setup.extra["gamma_prior"]
        obs, expo = setup.inputs["obs"], setup.inputs["exposure"]
        log_z = np.logaddexp.reduce(f[..., obs].astype(float) + np.log(expo), axis=-1)
        g = np.random.default_rng(0).standard_gamma(a + float(np.sum(setup.inputs["counts"])), size=log_z.shape)
        level = np.log(g) - np.logaddexp(np.log(b), log_z)
    f += level.astype(np.float32)[..., None]
    cd = cell_diagnostics(f)
    truth = setup.extra.get("bench_truth")
    coverage = None if truth is None else truth_coverage(f, truth)
    term = None
    if "term_variance" in idata.posterior:  # the per-cell term's variance: pilot, posterior, what the rule was sized for
        from sceneprior.models.cell_term import rule_name
        from sceneprior.models.lgcp import quadrature_sized_for

        tv = np.asarray(idata.posterior["term_variance"], float)
        nodes = setup.inputs["kernels"].nodes
        cell_term = setup.extra["embedding"]["truncation"]["cell_term"]
        term = {"at_pilot": cell_term["variance_at_pilot"],
                "posterior_median": float(np.median(tv)), "posterior_max": float(np.max(tv)),
                "quadrature": rule_name(nodes), "nodes_sized_for_variance": quadrature_sized_for(setup, nodes),
                "summed_error_nats_at_start": cell_term.get("quadrature", {}).get("summed_error_nats_by_nodes")}
    ss = idata.sample_stats
    # where the ESS is least: that cell's log-intensity sd, and the ESS of its two parts
    # (field value, level) on their own, beside the hyperparameters' ESS
    import arviz as az

    def ess(x):
        return float(np.nanmin(np.asarray(az.ess(az.convert_to_dataset(np.asarray(x, float)), method="bulk")["x"])))

    i = cd["ess_bulk_argmin"]
    post = idata.posterior
    worst = None if i < 0 else {"cell": i, "log_intensity_sd": float(np.std(f[..., i])), "ess_field_alone": ess(f[..., i] - level),
             "ess_level": ess(level), "ess_sigma": ess(post["sigma"]) if "sigma" in post else None,
             "ess_length_scale": ess(post["length_scale"]) if "length_scale" in post else None,
             "median_cell_ess": cd["ess_bulk_median"]}
    return {"wall_s": wall, "setup_s": setup_s, "steps_per_draw": float(np.mean(ss["n_steps"])),
            "min_ess_bulk": cd["ess_bulk_min"], "max_rhat": cd["r_hat_max"] if chains > 1 else None,
            "divergences": int(np.sum(ss["diverging"])), "ess_per_s": cd["ess_bulk_min"] / wall,
            "peak_rss_mb": peak_sampling, "thinning": thinning,
            "term_draws_s": complete_s if "term_variance" in idata.posterior else 0.0, "term_variance": term,
            "truth": coverage,
            "chains": chains, "warmup": warmup, "draws": draws, "least_ess": worst}


def truth_coverage(draws, truth, chunk=4096):
    """How the posterior of the cell log intensity (draws: chain, draw, cell) meets the field
    the data were simulated from (``truth``, per cell; the full torus field, every mode, so a
    truncation's missing variance shows): the fractions of cells whose central 90 % and 50 %
    intervals cover the truth (0.90 and 0.50 for a calibrated posterior, up to the spread of
    one field's spatially correlated cells), the RMSE of the posterior mean and the mean
    posterior sd, in log intensity. Quantiles by numpy, in chunks of cells."""
    flat = draws.reshape(-1, draws.shape[-1])
    hits90 = hits50 = 0
    sq = sd = 0.0
    for i in range(0, flat.shape[1], chunk):
        x = flat[:, i:i + chunk].astype(float)
        t = truth[i:i + chunk]
        q05, q25, q75, q95 = np.quantile(x, [0.05, 0.25, 0.75, 0.95], axis=0)
        hits90 += int(np.sum((t >= q05) & (t <= q95)))
        hits50 += int(np.sum((t >= q25) & (t <= q75)))
        sq += float(np.sum((x.mean(0) - t) ** 2))
        sd += float(np.sum(x.std(0)))
    n = flat.shape[1]
    return {"cover90": hits90 / n, "cover50": hits50 / n, "rmse": math.sqrt(sq / n), "mean_post_sd": sd / n}


def _cell_distances(setup):
    """Per-axis distances between the grid's cell centres [m] (n_cells × n_cells each)."""
    geom = setup.extra["geom"].geom
    n0, n1 = geom.grid_shape
    h0, h1 = geom.spacing
    i0, i1 = np.meshgrid(np.arange(n0), np.arange(n1), indexing="ij")
    return (np.abs(i0.ravel()[:, None] - i0.ravel()[None, :]) * h0,
            np.abs(i1.ravel()[:, None] - i1.ravel()[None, :]) * h1)


def dense_model_inputs(setup):
    """The same model with the field's covariance as a dense matrix (Cholesky per
    gradient), the baseline of part (a): same kernel (planar, on cell centres), priors."""
    import jax
    import jax.numpy as jnp
    import numpyro
    import numpyro.distributions as dist

    from sceneprior.fields.kernels import anisotropic_kernel

    inp = setup.inputs
    kernel = setup.extra["geom"].geom.kernel
    d0, d1 = _cell_distances(setup)

    def model(counts, exposure, window_area, obs, gamma_a, gamma_b, sigma_scale, ls_lo, ls_hi):
        sigma = numpyro.sample("sigma", dist.HalfNormal(sigma_scale))
        u = numpyro.sample("ls_unit", dist.Beta(2.0, 2.0).expand([ls_lo.shape[0]]).to_event(1))
        ls = ls_lo * (ls_hi / ls_lo) ** u
        ls2 = jnp.resize(ls, 2)
        C = anisotropic_kernel(kernel, (jnp.asarray(d0), jnp.asarray(d1)), sigma**2, ls2)
        L = jnp.linalg.cholesky(C + 1e-8 * jnp.eye(C.shape[0]))
        z = numpyro.sample("z", dist.Normal(0.0, 1.0).expand([C.shape[0]]).to_event(1))
        f = numpyro.deterministic("field", L @ z)
        log_z = jax.scipy.special.logsumexp(f[obs] + jnp.log(exposure))
        total = jnp.sum(counts)
        numpyro.factor("loglik", jnp.dot(counts, f[obs]) - (gamma_a + total) * jnp.logaddexp(jnp.log(gamma_b), log_z))

    keys = ("counts", "exposure", "window_area", "obs", "gamma_a", "gamma_b", "sigma_scale", "ls_lo", "ls_hi")
    return model, {k: inp[k] for k in keys}


def dense_sampler_options(setup):
    """The production sampler settings carried over to the dense baseline, so that part (a)
    compares formulations rather than sampler settings: σ and ℓ start at the pilot, the
    white coordinates z at L⁻¹ f₀ + U(−2, 2) per coordinate and chain, where f₀ is the field
    of the production start (its conditional posterior mode, ``lgcp.conditional_mode``) and L
    the Cholesky factor at the pilot σ, ℓ; a dense mass block over (σ, ℓ) starting at
    ``lgcp.INITIAL_HYPER_VARIANCE``; the same target acceptance. Set-up work, not timed (as
    the production set-up is not timed for the dense rows)."""
    import jax.numpy as jnp
    import jax.scipy.linalg as jsl

    from sceneprior.fields.kernels import anisotropic_kernel
    from sceneprior.fitting import nuts_options
    from sceneprior.models import lgcp

    n = len(setup.inputs["window_area"])
    opts = nuts_options(setup, n)
    values = setup.extra["init_strategy"].keywords["values"]
    inp = setup.inputs
    ls_lo, ls_hi = np.asarray(inp["ls_lo"]), np.asarray(inp["ls_hi"])
    ls = ls_lo * (ls_hi / ls_lo) ** np.asarray(values["ls_unit"])
    kern, pre = inp["kernels"], inp["precond"]
    u = (values["u_modes"] if "u_modes" in values
         else kern.rotate(jnp.asarray(values["u_soft"]), jnp.asarray(values["u_rest"]), pre["householder"]))
    # the sampled per-cell term (per-scan terms only; the bench has none, so its integrated form:
    # the dense baseline then starts from the kept field)
    cells = (jnp.asarray(values["u_cells"]),) if "u_cells" in values else ()
    f0 = kern.evaluate(jnp.asarray(u), jnp.asarray(values["sigma"]), jnp.asarray(ls), pre, jnp.asarray(inp["exposure"]),
                       jnp.asarray(inp["obs"]), jnp.asarray(inp["window_area"]), *cells)[0]
    d0, d1 = _cell_distances(setup)
    C = anisotropic_kernel(setup.extra["geom"].geom.kernel, (jnp.asarray(d0), jnp.asarray(d1)),
                           values["sigma"] ** 2, jnp.resize(jnp.asarray(ls), 2))
    L = jnp.linalg.cholesky(C + 1e-8 * jnp.eye(n))
    z0 = np.asarray(jsl.solve_triangular(L, f0, lower=True))
    start = {"sigma": values["sigma"], "ls_unit": np.asarray(values["ls_unit"]), "z": z0}
    block = ("sigma", "ls_unit")
    return dict(init_strategy=partial(lgcp.init_near, values=start, centred=("z",), radius=lgcp.START_RADIUS),
                dense_mass=[block], inverse_mass_matrix={block: np.diag([lgcp.INITIAL_HYPER_VARIANCE] * (1 + ls_lo.size))},
                n_latent=n, n_cells=n, target_accept=opts["target_accept"])


def _timed(f, *a, reps=20, batches=5):
    """Median wall time of one call of the compiled f over ``batches`` × ``reps`` calls."""
    import jax

    jax.block_until_ready(f(*a))
    out = []
    for _ in range(batches):
        t = time.perf_counter()
        for _ in range(reps):
            r = f(*a)
        jax.block_until_ready(r)
        out.append((time.perf_counter() - t) / reps)
    return float(np.median(out))


def nuts_floor(dim, chains, warmup=150, draws=50, transitions=10):
    """NUTS's own cost on an iid N(0, I) target of dimension ``dim`` (numpyro, diagonal
    mass): the leapfrog steps per draw (mean over the draws of one adapted chain) — the
    floor for a perfectly conditioned posterior of that size, the step size shrinking like
    dim^(-1/4) (Beskos, Pillai, Roberts, Sanz-Serna & Stuart 2013, Bernoulli 19; from
    memory) — and the wall time per leapfrog step of one chain and of ``chains`` chains
    vectorised at that step size, which is the sampler's bookkeeping alone (this target's
    gradient is one vector operation); timed over ``transitions`` compiled transitions."""
    import jax
    import jax.numpy as jnp
    import numpyro
    import numpyro.distributions as dist
    from numpyro.infer import MCMC, NUTS
    from numpyro.infer.hmc import hmc

    def model():
        numpyro.sample("x", dist.Normal(0.0, 1.0).expand([dim]).to_event(1))

    mc = MCMC(NUTS(model), num_warmup=warmup, num_samples=draws, progress_bar=False)
    mc.run(jax.random.PRNGKey(0), extra_fields=("num_steps",))
    steps = float(np.mean(mc.get_extra_fields()["num_steps"]))
    step_size = float(mc.last_state.adapt_state.step_size)

    init_kernel, sample_kernel = hmc(potential_fn=lambda x: 0.5 * jnp.sum(x * x), algo="NUTS")

    def per_step(n):
        keys = jax.random.split(jax.random.PRNGKey(1), n)
        x0 = jax.random.normal(jax.random.PRNGKey(2), (n, dim))
        states = jax.vmap(lambda x, k: init_kernel(x, 0, step_size=step_size, adapt_step_size=False,
                                                   adapt_mass_matrix=False, rng_key=k))(x0, keys)
        step = jax.jit(jax.vmap(sample_kernel)) if n > 1 else jax.jit(lambda st: jax.tree.map(
            lambda x: x[None], sample_kernel(jax.tree.map(lambda x: x[0], st))))
        states = jax.block_until_ready(step(states))
        t, total = time.perf_counter(), 0
        for _ in range(transitions):
            states = step(states)
            total += int(np.max(np.asarray(states.num_steps)))  # vectorised: the longest chain sets the pace
        return (time.perf_counter() - t) / total

    return steps, per_step(1), per_step(chains)


def gradient_cost(args):
    """Part (d) for one configuration (one process)."""
    import jax
    import jax.numpy as jnp
    from numpyro.infer.util import initialize_model

    from sceneprior.inference import chain_layout, configure_jax, usable_cores

    configure_jax()
    size, kernel, regime = args.one
    per_cell = REGIMES[regime]
    kind, setup, _ = _setup(int(size), kernel, per_cell, int(args.scans), variance_kept=_kept(args, size, kernel, regime),
                            dropped_modes=args.dropped_modes)
    info = initialize_model(jax.random.PRNGKey(0), kind.fn, model_kwargs=setup.inputs,
                            init_strategy=setup.extra["init_strategy"])
    pe, z = info.potential_fn, info.param_info.z
    one_chain = _timed(jax.jit(jax.value_and_grad(pe)), z)
    zs = jax.tree.map(lambda x: jnp.stack([x] * args.chains), z)
    vectorised = _timed(jax.jit(jax.vmap(jax.value_and_grad(pe))), zs)
    kern = setup.inputs["kernels"]
    spectrum = kern.basis if hasattr(kern, "basis") else kern.spectrum  # truncated: the kept modes only
    ls = jnp.asarray([150.0, 150.0])
    spec_grad = jax.jit(jax.grad(lambda ls, s: jnp.sum(jnp.sqrt(spectrum.eigenvalues(ls, s**2) + 1.0)), argnums=(0, 1)))
    spec = _timed(spec_grad, ls, jnp.asarray(1.0))
    dim = int(sum(np.size(v) for v in jax.tree.leaves(z)))
    floor, book1, book_vec = nuts_floor(dim, args.chains)
    its = args.warmup + args.draws
    layout = chain_layout(dim, args.chains, len(setup.inputs["window_area"]), bool(setup.extra.get("grid_latent")))
    if layout == "vectorized" and args.chains > 1:
        per_step = vectorised + book_vec
    else:  # parallel: one chain per core at a time (one chain keeps about one core busy)
        at_once = min(args.chains, usable_cores()) if layout == "parallel" else 1
        per_step = args.chains * (one_chain + book1) / at_once
    print(json.dumps({"cells": f"{size}²", "kernel": kernel, "regime": regime, "dimension": dim,
                      "pad": setup.extra["preconditioner"].use_pad, "spectrum": setup.extra["embedding"]["method"],
                      "grad_ms_1chain": 1e3 * one_chain, "spectrum_grad_ms": 1e3 * spec,
                      f"grad_ms_{args.chains}chains": 1e3 * vectorised, "iid_floor_steps": floor,
                      "nuts_ms_per_step_1chain": 1e3 * book1, f"nuts_ms_per_step_{args.chains}chains": 1e3 * book_vec,
                      "layout": layout, "floor_time_s": its * floor * per_step, "chains": args.chains, "warmup": args.warmup,
                      "draws": args.draws}))


#: part (a) runs the dense baseline itself only when its bounded wall time is below this
DENSE_RUN_LIMIT_S = 7200.0


def dense_bound(args):
    """Part (a) at the issue's length without running the dense form that long (one
    process): the dense baseline's gradient cost (its Cholesky factor and derivative), NUTS's
    floor for an iid target of the same dimension (:func:`nuts_floor`), and from them a
    lower bound on the dense form's wall time for chains × (warmup + draws) — every
    iteration at least the floor's leapfrog steps, each step of the chains at least the
    cheaper of one chain per core and all chains vectorised (both measured), no set-up or
    compilation counted — and an
    upper bound on its ESS per second: the minimum bulk ESS over cells taken as at most the
    number of draws kept. Both assume the dense posterior needs at least the floor's steps
    (it took 47 per draw at 32² in part (a)'s short run; the floor there is printed) and that
    warmup's iterations take no fewer (a divergent or early-stopped tree could), and it
    covers the two layouts timed, not groups of vectorised chains per process."""
    import jax
    import jax.numpy as jnp
    from numpyro.infer.util import initialize_model

    from sceneprior.inference import configure_jax, usable_cores

    configure_jax()
    size, kernel, regime = args.one
    kind, setup, _ = _setup(int(size), kernel, REGIMES[regime], int(args.scans), variance_kept=_kept(args, size, kernel, regime),
                            dropped_modes=args.dropped_modes)
    fn, inputs = dense_model_inputs(setup)
    opts = dense_sampler_options(setup)
    info = initialize_model(jax.random.PRNGKey(0), fn, model_kwargs=inputs, init_strategy=opts["init_strategy"])
    z = info.param_info.z
    grad = _timed(jax.jit(jax.value_and_grad(info.potential_fn)), z, reps=3, batches=3)
    zs = jax.tree.map(lambda x: jnp.stack([x] * args.chains), z)
    grad_vec = _timed(jax.jit(jax.vmap(jax.value_and_grad(info.potential_fn))), zs, reps=3, batches=3)
    dim = int(sum(np.size(v) for v in jax.tree.leaves(z)))
    floor, book1, book_vec = nuts_floor(dim, args.chains)
    its = args.warmup + args.draws
    # per leapfrog step of all chains: one chain per core at best, or the chains vectorised —
    # whichever is cheaper, whatever the production layout, so the bound holds for both
    cores = min(args.chains, usable_cores())
    per_step = min(args.chains * (grad + book1) / cores, grad_vec + book_vec)
    wall = its * floor * per_step
    print(json.dumps({"cells": f"{size}²", "kernel": kernel, "regime": regime, "formulation": "dense",
                      "dimension": dim, "grad_ms_1chain": 1e3 * grad, f"grad_ms_{args.chains}chains": 1e3 * grad_vec,
                      "iid_floor_steps": floor, "nuts_ms_per_step_1chain": 1e3 * book1,
                      "cores": cores, "chains": args.chains,
                      "warmup": args.warmup, "draws": args.draws, "wall_lower_bound_s": wall,
                      "ess_per_s_upper_bound": args.chains * args.draws / wall}))


def warmup_steps(args):
    """Where warmup's leapfrog steps go, for one configuration (one process): for each seed,
    one chain through the production NUTS kernel (``inference.nuts_kernel`` with the model's
    options, ``fitting.nuts_options``), numpyro's ``MCMC.warmup`` with ``collect_warmup`` and
    the ``num_steps`` field, then the draws; prints the mean steps per iteration in each
    window of 100 warmup iterations (numpyro's first mass-matrix window ends after 100 on a
    1000-iteration warmup) and the totals and times of warmup and sampling (compilation
    included in the first seed's times)."""
    import inspect

    import jax
    from numpyro.infer import MCMC

    from sceneprior.fitting import nuts_options
    from sceneprior.inference import configure_jax, nuts_kernel, nuts_kernel_options
    from sceneprior.models.lgcp import _mass_start

    configure_jax()
    size, kernel, regime = args.one
    kind, setup, _ = _setup(int(size), kernel, REGIMES[regime], int(args.scans), variance_kept=_kept(args, size, kernel, regime),
                            dropped_modes=args.dropped_modes)
    opts = nuts_options(setup, len(setup.inputs["window_area"]))
    bundle = nuts_kernel_options(**{k: opts[k] for k in inspect.signature(nuts_kernel_options).parameters})
    for seed in args.seeds:
        mcmc = MCMC(nuts_kernel(kind.fn, bundle), num_warmup=args.warmup, num_samples=args.draws, progress_bar=False)
        t = time.perf_counter()
        mcmc.warmup(jax.random.PRNGKey(seed), collect_warmup=True, extra_fields=("num_steps",), **setup.inputs)
        w = np.asarray(mcmc.get_extra_fields()["num_steps"])
        t_warm = time.perf_counter() - t
        t = time.perf_counter()
        mcmc.run(mcmc.post_warmup_state.rng_key, extra_fields=("num_steps",), **setup.inputs)
        s = np.asarray(mcmc.get_extra_fields()["num_steps"])
        t_draws = time.perf_counter() - t
        print(json.dumps({"cells": f"{size}²", "kernel": kernel, "regime": regime, "scans": int(args.scans),
                          "pad": setup.extra["preconditioner"].use_pad, "seed": seed,
                          "warmup_steps_per_iteration_by_100": [round(float(w[i:i + 100].mean()), 1)
                                                                for i in range(0, len(w), 100)],
                          "warmup_steps": int(w.sum()), "warmup_s": t_warm, "sampling_steps": int(s.sum()),
                          "sampling_steps_per_draw": float(s.mean()), "sampling_s": t_draws,
                          "warmup_mass_start": _mass_start(bundle["inverse_mass_matrix"])}),
              flush=True)


def one(args):
    from sceneprior.inference import configure_jax

    configure_jax()
    size, kernel, regime = args.one
    size = int(size)
    per_cell = REGIMES[regime]
    K = int(args.scans)
    kind, setup, counts = _setup(size, kernel, per_cell, K, seed=args.field_seed, variance_kept=_kept(args, size, kernel, regime),
                                 dropped_modes=args.dropped_modes)
    res = _run(kind, setup, args.chains, args.warmup, args.draws, dense_baseline=args.dense,
               setup_s=0.0 if args.dense else setup.extra["bench_setup_s"], progress=args.progress,
               matched=not args.dense_numpyro_defaults)
    res.update({"cells": f"{size}²", "kernel": kernel, "regime": regime, "scans": K, "field_seed": args.field_seed,
                "detections": int(counts.sum()), "pad": setup.extra["preconditioner"].use_pad,
                "torus": setup.extra["embedding"]["torus_shape"],
                "formulation": "dense" if args.dense else "fourier", "latent": setup.extra["n_latent"],
                "variance_kept": (setup.extra["modes"].report["variance_fraction_kept_at_shortest_length_scale"]
                                  if setup.extra.get("modes") is not None else 1.0),
                "cell_term": (setup.extra["embedding"]["truncation"]["cell_term"]["on"]
                              if setup.extra.get("modes") is not None else False)})
    print(json.dumps(res))


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--sizes", type=int, nargs="+")
    ap.add_argument("--kernels", nargs="+", default=["squared_exponential", "matern32"])
    ap.add_argument("--chains", type=int, default=4)
    ap.add_argument("--warmup", type=int, default=1000)
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--scans", type=int, default=100)
    ap.add_argument("--one", nargs=3, metavar=("SIZE", "KERNEL", "REGIME"))
    ap.add_argument("--dense", action="store_true")
    ap.add_argument("--dense-numpyro-defaults", action="store_true",
                    help="with --dense: numpyro's default start (prior medians) and diagonal identity mass "
                         "instead of the production sampler settings (the part (a) runs before 2026-12-03's "
                         "seventh session)")
    ap.add_argument("--progress", action="store_true",
                    help="with --one: the sampler's progress bar on stderr (step size, leapfrog steps per "
                         "iteration) — for long runs such as the dense baseline at 32²")
    ap.add_argument("--variance-kept", type=_variance_kept_arg, default=1.0,
                    help="spectral truncation: fraction of the field's prior variance kept (1: every torus mode; "
                         "1 for every kernel here, whereas a spec without model.variance_kept gives the squared "
                         "exponential 0.999), or 'recommended': per configuration, the setting the README's "
                         "Performance section recommends (recommended_variance_kept)")
    ap.add_argument("--dropped-modes", default="auto", choices=("auto", "per_cell", "leave_out"),
                    help="with --variance-kept below 1: model option dropped_modes (auto: the per-cell term where "
                         "the set-up's screen says the dropped modes would narrow the intervals)")
    ap.add_argument("--gradient", action="store_true",
                    help="with --one: part (d) for that configuration; with --dense as well: the dense baseline's "
                         "gradient cost and the bounds on its wall time and ESS/s at this length (part (a))")
    ap.add_argument("--warmup-steps", action="store_true",
                    help="with --one: leapfrog steps per 100 warmup iterations, one chain per --seeds seed, "
                         "chains one after another (where warmup's time goes)")
    ap.add_argument("--seeds", type=int, nargs="+", default=[1], help="with --warmup-steps: the chains' seeds")
    ap.add_argument("--warmup-depth", type=int, default=None,
                    help="cap NUTS trees at this depth during warmup where the LGCP has its pilot map "
                         "(models.lgcp.WARMUP_TREE_DEPTH; default: that constant, uncapped)")
    ap.add_argument("--start-hyper-variance", type=float, default=None,
                    help="variance per coordinate of the LGCP's (σ, ℓ) mass block warmup starts from "
                         "(models.lgcp.INITIAL_HYPER_VARIANCE; 1 is numpyro's identity; not part (a)'s dense "
                         "baseline, which keeps numpyro's defaults)")
    ap.add_argument("--step-size-jitter", type=float, default=None,
                    help="after warmup, each transition's step size × U(1 − j, 1 + j) for the LGCP "
                         "(models.lgcp.STEP_SIZE_JITTER; 0: numpyro's fixed step size)")
    ap.add_argument("--extra-uturn-checks", type=int, choices=(0, 1), default=None,
                    help="NUTS trees with the extra U-turn checks of sceneprior.nuts_tree for the LGCP "
                         "(models.lgcp.EXTRA_UTURN_CHECKS; default: that constant, on)")
    ap.add_argument("--target-accept", type=float, default=None,
                    help="mean acceptance probability warmup's step-size adaptation aims at for the LGCP "
                         "(models.lgcp.TARGET_ACCEPT; default: that constant; not part (a)'s dense baseline)")
    ap.add_argument("--field-seed", type=int, default=0,
                    help="with --one: seed of the simulated true field and counts (every part uses 0)")
    ap.add_argument("--parts", default="abcd")
    ap.add_argument("--row-limit-s", type=float, default=None,
                    help="stop any one configuration's process after this many seconds; its row then says so "
                         "(default: no limit)")
    args = ap.parse_args()
    # sampler constants of models.lgcp set from the command line (and passed on to the parts' runs)
    knobs = [(flag, name, value) for flag, name, value in
             (("--warmup-depth", "WARMUP_TREE_DEPTH", args.warmup_depth),
              ("--start-hyper-variance", "INITIAL_HYPER_VARIANCE", args.start_hyper_variance),
              ("--step-size-jitter", "STEP_SIZE_JITTER", args.step_size_jitter),
              ("--extra-uturn-checks", "EXTRA_UTURN_CHECKS", args.extra_uturn_checks),
              ("--target-accept", "TARGET_ACCEPT", args.target_accept)) if value is not None]
    if knobs:
        from sceneprior.models import lgcp

        for _, name, value in knobs:
            setattr(lgcp, name, value)
    if args.one:
        if args.gradient:
            return dense_bound(args) if args.dense else gradient_cost(args)
        return warmup_steps(args) if args.warmup_steps else one(args)
    if args.quick:
        args.chains, args.warmup, args.draws = 1, 200, 200
        sizes = args.sizes or [16, 32]
    else:
        sizes = args.sizes or [32, 64, 128, 256]
    base = [sys.executable, __file__, "--chains", str(args.chains), "--warmup", str(args.warmup),
            "--draws", str(args.draws), "--variance-kept", str(args.variance_kept),
            "--dropped-modes", args.dropped_modes]
    for flag, _, value in knobs:
        base += [flag, str(value)]

    def call(*extra, scans=None):
        cmd = base + ["--scans", str(scans or args.scans)] + list(extra)
        try:
            out = subprocess.run(cmd, capture_output=True, text=True, timeout=args.row_limit_s)
        except subprocess.TimeoutExpired:
            out = None
        which = ({"cells": f"{extra[1]}²", "kernel": extra[2], "regime": extra[3]} if extra[:1] == ("--one",)
                 else {})
        if out is None:
            return {**which, "error": f"stopped after {args.row_limit_s:g} s (--row-limit-s)"}
        line = [ln for ln in out.stdout.splitlines() if ln.startswith("{")]
        if not line:
            return {**which, "error": (out.stderr.strip().splitlines() or ["failed"])[-1]}
        return json.loads(line[-1])

    cols = ("cells", "kernel", "regime", "formulation", "latent", "variance_kept", "cell_term", "chains", "warmup", "draws", "pad",
            "wall_s", "steps_per_draw", "min_ess_bulk",
            "max_rhat", "divergences", "ess_per_s", "peak_rss_mb")

    def show_row(r):
        if "error" in r:
            print(" | ".join(str(r.get(c, "")) for c in cols[:3]) + " | " + r["error"], flush=True)
            return
        print(" | ".join(f"{r.get(c):.4g}" if isinstance(r.get(c), float) else str(r.get(c, "")) for c in cols),
              flush=True)

    def show(rows):
        print(" | ".join(cols))
        for r in rows:
            show_row(r)

    print(f"chains {args.chains} × ({args.warmup} warmup + {args.draws} draws), 2 cores, float64")
    if "a" in args.parts:
        print("\n(a) Fourier-domain vs dense covariance, Matérn 3/2, weak data")
        rows = []
        for n in (16, 32):
            f = call("--one", str(n), "matern32", "weak")
            rows.append(f)
            b = call("--one", str(n), "matern32", "weak", "--dense", "--gradient")
            if b.get("wall_lower_bound_s", 0.0) > DENSE_RUN_LIMIT_S:  # the bound alone says enough
                print(f"  {n}²: dense run skipped (bound below: at least {b['wall_lower_bound_s']:.4g} s, more than "
                      f"{DENSE_RUN_LIMIT_S:.0f} s); run it with --one {n} matern32 weak --dense and a shorter length")
            else:
                d = call("--one", str(n), "matern32", "weak", "--dense")
                rows.append(d)
                if "ess_per_s" in f and "ess_per_s" in d:
                    print(f"  {n}²: ESS/s ratio fourier/dense = {f['ess_per_s'] / d['ess_per_s']:.3g}")
            if "ess_per_s_upper_bound" in b:
                print(f"  {n}² dense at this length, bound from its gradient ({b['grad_ms_1chain']:.4g} ms) and the "
                      f"iid floor ({b['iid_floor_steps']:.3g} steps): wall ≥ {b['wall_lower_bound_s']:.4g} s, "
                      f"ESS/s ≤ {b['ess_per_s_upper_bound']:.3g}"
                      + (f"; ratio fourier/dense ≥ {f['ess_per_s'] / b['ess_per_s_upper_bound']:.3g}"
                         if "ess_per_s" in f else ""))
        show(rows)
    if "b" in args.parts:
        print("\n(b) scaling")
        print(" | ".join(cols), flush=True)
        for n in sizes:  # each row as its run ends (the whole part takes most of an hour)
            for k in args.kernels:
                for reg in ("weak", "strong"):
                    show_row(call("--one", str(n), k, reg))
    if "c" in args.parts:
        print("\n(c) 1× vs 10× scans (32², Matérn 3/2, the same detections per scan: "
              f"{REGIMES['weak']} and {REGIMES['weak10']} per cell in total)")
        r1 = call("--one", "32", "matern32", "weak", scans=args.scans)
        r10 = call("--one", "32", "matern32", "weak10", scans=10 * args.scans)  # same rate per scan
        show([r1, r10])
        if "wall_s" in r1 and "wall_s" in r10:
            print(f"  time ratio 10×/1× = {r10['wall_s'] / r1['wall_s']:.3g}")
    if "d" in args.parts:
        print(f"\n(d) cost per gradient and the NUTS floor (time at the floor for {args.chains} chains × "
              f"({args.warmup} + {args.draws}))")
        dcols = ("cells", "kernel", "regime", "dimension", "pad", "spectrum", "grad_ms_1chain", "spectrum_grad_ms",
                 f"grad_ms_{args.chains}chains", "iid_floor_steps", "nuts_ms_per_step_1chain",
                 f"nuts_ms_per_step_{args.chains}chains", "layout", "floor_time_s")
        rows = [call("--one", str(n), k, reg, "--gradient") for n in sizes for k in args.kernels
                for reg in ("weak", "strong")]
        print(" | ".join(dcols))
        for r in rows:
            print(" | ".join(f"{r.get(c):.4g}" if isinstance(r.get(c), float) else str(r.get(c, r.get("error", "")))
                             for c in dcols))


if __name__ == "__main__":
    main()
