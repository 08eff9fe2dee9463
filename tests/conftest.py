"""Shared fixtures. Compiled models and the demo run are shared across tests (session
scope) to keep the suite within its time budget."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest

os.environ.setdefault("JAX_PLATFORMS", "cpu")
# each test process (pytest-xdist worker) re-uses compiled kernels in memory; the persistent
# cache stays off unless the caller sets SCENEPRIOR_JAX_CACHE (.ci/run does: then both
# workers and their chain processes share it — jax recompiles an entry it cannot read)
os.environ.setdefault("SCENEPRIOR_JAX_CACHE", "")

from sceneprior.inference import configure_jax  # noqa: E402

configure_jax()

REPO = Path(__file__).resolve().parents[1]


#: test files that share an expensive session fixture, scheduled together (the fixture's name)
SHARED_FIXTURE_FILES = {"test_demo": "demo_run", "test_export": "demo_run", "test_report": "demo_run",
                        "test_checks": "rain_runs", "test_overdispersion": "rain_runs"}


#: seconds each scheduling unit (a test file, or a SHARED_FIXTURE_FILES group) took on one
#: worker: one local run of `pytest -v --durations=0` (setup + call + teardown summed per
#: file), 2026-12-04, warm compile cache. Only the order matters: the longest units start
#: first, so the two workers end close together. Files not listed run last. test_cell_term:
#: 22.6 s summed over its four tests in a later `pytest -n0 tests/test_cell_term.py
#: --durations=5` (fifteenth session; 30.5 s for its first test alone in that session's CI);
#: 23.4 s for its five tests in the sixteenth session's `pytest -n0 tests/test_cell_term.py`.
#: Seventeenth session: test_lgcp + 15 s (the extrapolated-cell fit, 14.7 s alone), test_chains
#: + 12.6 s (the thinned-divergence tests, 8.8 + 3.8 s alone).
SCOPE_SECONDS = {"test_lgcp_sites": 142, "test_lgcp": 153, "test_truncation": 300, "rain_runs": 84,
                 "test_chains": 83, "demo_run": 70, "test_mixture": 52, "test_detection": 34,
                 "test_birth": 28, "test_compare": 19, "test_gates": 14, "test_nuts_tree": 14,
                 "test_objects": 10, "test_fields": 10, "test_cell_term": 23, "test_uniform": 10, "test_loglinear": 7}


@pytest.hookimpl(optionalhook=True)  # a pytest-xdist hook: run without xdist, it is not called
def pytest_xdist_make_scheduler(config, log):
    """pytest-xdist (pyproject's addopts: two workers) runs each test file whole on one
    worker, so its module fixtures are built once, and the files of SHARED_FIXTURE_FILES
    together, so their session fixture is built once. (xdist's own ``--dist loadgroup``
    marks do not group under pytest 9.2, which no longer reads the node ids xdist edits.)
    Whenever xdist hands a worker its next unit (at the start, and when the worker has two
    tests or fewer left), it is the longest unit left (SCOPE_SECONDS): longest first is the
    classic list-scheduling rule (LPT; Graham 1969, cited from memory), which keeps one long
    file from starting last. Another ``--dist`` on the command line keeps xdist's own
    scheduler."""
    if config.getvalue("dist") != "loadfile":
        return None
    from xdist.scheduler import LoadScopeScheduling

    class ByFile(LoadScopeScheduling):
        def _split_scope(self, nodeid: str) -> str:
            stem = nodeid.split("::", 1)[0].rsplit("/", 1)[-1].removesuffix(".py")
            return SHARED_FIXTURE_FILES.get(stem, stem)

        def _assign_work_unit(self, node) -> None:
            longest = max(self.workqueue, key=lambda scope: SCOPE_SECONDS.get(scope, 0.0))
            self.workqueue.move_to_end(longest, last=False)  # the base class takes the first
            super()._assign_work_unit(node)

    return ByFile(config, log)


def write_csv(path: Path, header: list[str], rows) -> Path:
    lines = [",".join(header)] + [",".join(str(v) for v in r) for r in rows]
    path.write_text("\n".join(lines) + "\n")
    return path


def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    return repr(v)


def write_spec(path: Path, spec: dict) -> Path:
    """Write a (nested) dict as TOML; lists of dicts become arrays of tables."""
    out: list[str] = []

    def emit(table: dict, prefix: str):
        scalars = {k: v for k, v in table.items() if not isinstance(v, dict)
                   and not (isinstance(v, list) and v and isinstance(v[0], dict))}
        if prefix and scalars:
            out.append(f"[{prefix}]")
        for k, v in scalars.items():
            out.append(f"{k} = {toml_value(v)}")
        for k, v in table.items():
            name = f"{prefix}.{k}" if prefix else k
            if isinstance(v, dict):
                emit(v, name)
            elif isinstance(v, list) and v and isinstance(v[0], dict):
                for item in v:
                    out.append(f"[[{name}]]")
                    for kk, vv in item.items():
                        out.append(f"{kk} = {toml_value(vv)}")

    emit(spec, "")
    path.write_text("\n".join(out) + "\n")
    return path


def box_case(tmp: Path, scan_ids, xs, ys, n_scans_table=None, name="case", **over) -> Path:
    """A Cartesian 1000 m × 500 m box recording with its spec; returns the spec path."""
    write_csv(tmp / "det.csv", ["scan", "x", "y"], zip(scan_ids, xs, ys))
    spec = {
        "name": name,
        "data": {"detections": "det.csv"},
        "space": {"frame": "cartesian", "x": [0.0, 1000.0], "y": [0.0, 500.0], "cells": [10, 5]},
        "model": {"kind": "uniform"},
        "sampler": {"chains": 2, "warmup": 300, "draws": 500, "seed": 3, "progress": False},
        "output": {"dir": "runs"},
    }
    if n_scans_table is not None:
        write_csv(tmp / "scans.csv", ["scan"], [[s] for s in range(n_scans_table)])
        spec["data"]["scans"] = "scans.csv"
    for k, v in over.items():
        if isinstance(v, dict) and isinstance(spec.get(k), dict):
            spec[k] = {**spec[k], **v}
        else:
            spec[k] = v
    for k in list(spec["data"]):
        if spec["data"][k] is None:
            del spec["data"][k]
    return write_spec(tmp / "spec.toml", spec)


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """The real `sceneprior demo`, run once for the session."""
    from sceneprior.cli import main

    runs = tmp_path_factory.mktemp("demo")
    code = main(["demo", "--runs", str(runs), "--quiet"])
    assert code == 0
    return runs


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


# --------------------------------------------------------------------------- export / report
# A test-only model kind with a spatially varying posterior and no MCMC: independent
# conjugate Gamma–Poisson cells, λ_c ~ Gamma(a, b·|c|) a priori, Gamma(a + N_c, b·|c| + E_c)
# a posteriori (Gelman et al., BDA3 §2.6, cell by cell). It gives export, the evaluator, the
# gate's per-cell checks and the report non-uniform maps in seconds.
def cellwise_kind():
    from sceneprior.models.registry import ModelKind, ModelSetup

    def setup(stats, prior, model_spec):
        return ModelSetup(inputs={})

    def exact(stats, prior, rng, chains, draws):
        a = prior["shape"] + stats.counts
        b = prior["rate"] * stats.cell_area + stats.exposure
        lam = rng.gamma(a, 1.0 / b, size=(chains, draws, stats.grid.n_cells))
        return {"intensity": lam, "rate": lam @ stats.window_area}

    def cell_intensity(posterior, stats, setup):
        return np.asarray(posterior["intensity"])

    def describe(prior, stats):
        return {"intensity": f"independent Gamma(shape={prior['shape']:g}, rate={prior['rate']:g}·|c| m²·scan) "
                             "per cell (test model)", "parameters": dict(prior)}

    return ModelKind(name="cellwise", fn=None, default_prior={"shape": 1.0, "rate": 0.1}, setup=setup,
                     cell_intensity=cell_intensity, describe_prior=describe, hyper=(), exact=exact)


def fit_cellwise(spec):
    """FitResult of the cellwise test model for a spec (exact draws, sampler chains × draws)."""
    from sceneprior.fitting import FitResult, prepare
    from sceneprior.inference import diagnostics, exact_idata

    kind = cellwise_kind()
    prior = dict(kind.default_prior)
    _, rec, stats = prepare(spec)
    draws = kind.exact(stats, prior, np.random.default_rng(spec.sampler.seed), spec.sampler.chains,
                       spec.sampler.draws)
    idata = exact_idata(draws)
    return FitResult(spec=spec, recording=rec, stats=stats, model=kind, prior=prior,
                     setup=kind.setup(stats, prior, spec.model), idata=idata,
                     diagnostics=diagnostics(idata, ("rate",) + kind.hyper))


@pytest.fixture(scope="session")
def cellwise_polar_run(demo_run, tmp_path_factory):
    """(run path, FitResult): the cellwise model on the demo's Lowmarsh recording (polar,
    land sector masked, cells cut by the mask)."""
    from sceneprior.results import write_run
    from sceneprior.spec import load_spec

    out = tmp_path_factory.mktemp("cellwise")
    data = demo_run / "demo-data"
    spec = load_spec(REPO / "src" / "sceneprior" / "specs" / "lowmarsh-uniform.toml", overrides={
        "name": "cellwise-polar",
        "data": {"detections": str(data / "detections.csv"), "scans": str(data / "scans.csv")},
        "sampler": {"method": "exact", "chains": 4, "draws": 500, "seed": 5, "progress": False},
        "output": {"dir": str(out)},
    })
    res = fit_cellwise(spec)
    return write_run(res), res


@pytest.fixture(scope="session")
def cellwise_cartesian_run(tmp_path_factory):
    """Run path: the cellwise model on a Cartesian 1000 m × 500 m box (100 m cells) with a
    triangular polygon mask, 40 scans of uniform points (rate 25 per scan over the box)."""
    from sceneprior.results import write_run
    from sceneprior.spec import load_spec

    tmp = tmp_path_factory.mktemp("cartesian")
    rng = np.random.default_rng(2024)
    K = 40
    n = rng.poisson(25.0, K)
    scans = np.repeat(np.arange(K), n)
    xs, ys = rng.uniform(0, 1000, n.sum()), rng.uniform(0, 500, n.sum())
    spec_path = box_case(tmp, scans, xs, ys, n_scans_table=K, name="cellwise-box",
                         space={"masks": [{"name": "pier", "polygon": TRIANGLE_MASK}]},
                         sampler={"method": "exact", "chains": 4, "draws": 1000, "seed": 8, "progress": False},
                         output={"dir": str(tmp / "runs")})
    return write_run(fit_cellwise(load_spec(spec_path)))


TRIANGLE_MASK = [[250.0, 120.0], [720.0, 180.0], [430.0, 420.0]]  # m, sloped edges across cells


@pytest.fixture(scope="session")
def weak_uniform_run(tmp_path_factory):
    """(run path, N, K, |W|): the uniform model, exact conjugate draws, on only K = 4 scans
    of a 1000 m × 500 m box (rate 3 per scan), so the rate posterior is wide."""
    from sceneprior.results import write_run
    from sceneprior.spec import load_spec

    tmp = tmp_path_factory.mktemp("weak")
    rng = np.random.default_rng(77)
    K = 4
    n = rng.poisson(3.0, K)
    scans = np.repeat(np.arange(K), n)
    xs, ys = rng.uniform(0, 1000, n.sum()), rng.uniform(0, 500, n.sum())
    spec_path = box_case(tmp, scans, xs, ys, n_scans_table=K, name="weak-uniform",
                         sampler={"method": "exact", "chains": 4, "draws": 2500, "seed": 21, "progress": False},
                         output={"dir": str(tmp / "runs")})
    from sceneprior.fitting import fit

    path = write_run(fit(load_spec(spec_path), progress=False, log=lambda m: None))
    return path, int(n.sum()), K, 1000.0 * 500.0


# --------------------------------------------------------------------------- criticism / comparison
def box_recording(tmp: Path, n, name="case", scans_columns: dict | None = None, rng=None, **over) -> Path:
    """A Cartesian 1000 m × 500 m box recording with per-scan counts ``n`` (positions
    uniform), a scans table with the extra ``scans_columns`` (name → per-scan values), and
    its spec (conftest.box_case); returns the spec path."""
    rng = rng or np.random.default_rng(0)
    n = np.asarray(n, int)
    K = n.size
    scans = np.repeat(np.arange(K), n)
    path = box_case(tmp, scans, np.round(rng.uniform(0, 1000, n.sum()), 3),
                    np.round(rng.uniform(0, 500, n.sum()), 3), n_scans_table=K, name=name, **over)
    cols = {"scan": np.arange(K), **(scans_columns or {})}
    write_csv(tmp / "scans.csv", list(cols), zip(*cols.values()))
    return path


def lane_gate_recording(tmp: Path, rng, rate, slot_prob, radius: float = 100.0, name="case",
                        scans_columns: dict | None = None, **over):
    """A box recording (conftest.box_case) with known objects: clutter Poisson(rate_k) per scan,
    uniform over the 1000 m × 500 m box, and disc gates of ``radius`` (≤ 125 m) in four lane
    slots (y = 125, 375 m; x in [r, 500 − r] or [500 + r, 1000 − r]), each occupied with
    probability ``slot_prob`` (per scan). The discs lie wholly inside the box and apart, so each
    removes exactly πr² (elementary geometry). Returns (spec path, per-scan counts outside the
    gates — distance to the disc centres by numpy hypot —, |W_k|/|W| per scan)."""
    K = np.size(slot_prob)
    present = rng.uniform(size=(K, 4)) < np.asarray(slot_prob, float).reshape(K, 1)
    ox = np.where(np.arange(4) % 2 == 0, rng.uniform(radius, 500.0 - radius, (K, 4)),
                  rng.uniform(500.0 + radius, 1000.0 - radius, (K, 4)))
    oy = np.where(np.arange(4) < 2, 125.0, 375.0) * np.ones((K, 1))
    n_all = rng.poisson(np.broadcast_to(rate, (K,)))
    scans = np.repeat(np.arange(K), n_all)
    x, y = np.round(rng.uniform(0, 1000, scans.size), 3), np.round(rng.uniform(0, 500, scans.size), 3)
    inside = np.zeros(scans.size, bool)
    for j in range(4):
        inside |= present[scans, j] & (np.hypot(x - ox[scans, j], y - oy[scans, j]) <= radius)
    obj_scan = np.repeat(np.arange(K)[:, None], 4, axis=1)[present]
    write_csv(tmp / "obj.csv", ["scan", "object", "x", "y"],
              zip(obj_scan, np.tile(np.arange(4), (K, 1))[present], ox[present], oy[present]))
    data = {"objects": "obj.csv", "gates": {"radius": radius}, **over.pop("data", {})}
    spec = box_case(tmp, scans, x, y, n_scans_table=K, name=name, data=data, **over)
    cols = {"scan": np.arange(K), **(scans_columns or {})}
    write_csv(tmp / "scans.csv", list(cols), zip(*cols.values()))
    window_scans = 1.0 - present.sum(axis=1) * np.pi * radius**2 / (1000.0 * 500.0)
    return spec, np.bincount(scans[~inside], minlength=K), window_scans


def quick_fit(spec_path, **over):
    """fit() of a spec file with optional overrides, quietly."""
    from sceneprior.fitting import fit
    from sceneprior.spec import load_spec

    return fit(load_spec(spec_path, overrides=over or None), progress=False, log=lambda m: None)


@pytest.fixture(scope="session")
def rain_runs(tmp_path_factory):
    """The Lowmarsh recording with rain episodes (`simulate --rain`, 600 scans) fitted with
    models/lowmarsh-rain.toml (uniform + over-dispersion + rain and sea state; NUTS, 2 chains
    × (300 + 600)) and models/lowmarsh-rain-poisson.toml (plain, exact). Returns
    {"data": folder, "od": run path, "plain": run path, "od_result": FitResult}."""
    from sceneprior.fitting import fit
    from sceneprior.results import write_run
    from sceneprior.simulate import simulate_scene
    from sceneprior.spec import load_spec

    tmp = tmp_path_factory.mktemp("rain")
    data = tmp / "rain-data"
    simulate_scene(data, rain=True, second_mast=False, log=lambda m: None)
    over = {"data": {"detections": str(data / "detections.csv"), "scans": str(data / "scans.csv")},
            "output": {"dir": str(tmp / "runs")}}
    od = fit(load_spec(REPO / "models" / "lowmarsh-rain.toml", overrides={
        **over, "sampler": {"chains": 2, "warmup": 300, "draws": 600, "seed": 4, "progress": False}}),
        progress=False, log=lambda m: None)
    plain = fit(load_spec(REPO / "models" / "lowmarsh-rain-poisson.toml", overrides=over),
                progress=False, log=lambda m: None)
    return {"data": data, "od": write_run(od), "plain": write_run(plain), "od_result": od}


def batched_nuts(model, inputs: dict, dense_mass, keep, warmup: int, draws: int, init_strategy=None,
                 extra_uturn_checks: bool = False, inverse_mass_matrix: dict | None = None,
                 target_accept: float | None = None):
    """One compiled NUTS run over many data sets, for replicated checks (coverage, SBC):
    numpyro's functional NUTS (``numpyro.infer.hmc.hmc``, the kernel ``MCMC`` uses) jitted
    once and mapped over data sets with ``jax.lax.map``, so each data set gets its own
    chain, step size and mass matrix (block-dense as in production), with the model's data
    and preconditioner arrays as mapped arguments. Replications then cost one compiled call
    instead of one sampler run each. ``lax.map`` rather than ``jax.vmap``: under vmap every
    chain steps until the longest tree of the batch ends and NUTS's branches become selects
    over all chains' states (``inference.chain_layout``); 30 data sets of the LGCP checks
    took 30.1 s mapped against 38.5 s vmapped, compilation included (measured).

    ``inputs``: one data set's model arguments (fixes shapes and the starting point);
    ``extra_uturn_checks``: the trees of ``sceneprior.nuts_tree``, as production builds them
    where the model's set-up asks (``setup.extra["extra_uturn_checks"]``);
    ``inverse_mass_matrix``: the mass-matrix blocks warmup starts from, as production passes
    them (``setup.extra["initial_inverse_mass"]``; None: numpyro's identity);
    ``target_accept``: the acceptance warmup's step size aims at (``setup.extra["target_accept"]``;
    None: ``inference.TARGET_ACCEPT``, run_nuts's default).
    Returns ``fit(batch, seed)``: ``batch`` a list of argument dicts of that form; result
    {site: numpy array (data set, draw, ...)} for the sites in ``keep`` plus
    ``num_steps``, warmup draws dropped."""
    import jax
    import jax.numpy as jnp
    from numpyro.infer.hmc import hmc
    from numpyro.infer.util import initialize_model

    from sceneprior.inference import TARGET_ACCEPT

    target_accept = TARGET_ACCEPT if target_accept is None else target_accept
    extra = {} if init_strategy is None else {"init_strategy": init_strategy}
    info = initialize_model(jax.random.PRNGKey(0), model, model_kwargs=inputs, dynamic_args=True, **extra)
    init_kernel, sample_kernel = hmc(potential_fn_gen=info.potential_fn, algo="NUTS")
    post_gen = info.postprocess_fn
    z0 = info.param_info.z

    def one_chain(key, kw):
        start = None if inverse_mass_matrix is None else {k: jnp.asarray(v) for k, v in inverse_mass_matrix.items()}
        state = init_kernel(z0, warmup, dense_mass=dense_mass, inverse_mass_matrix=start, model_kwargs=kw,
                            rng_key=key, target_accept_prob=target_accept)

        def step(st, _):
            st = sample_kernel(st, model_kwargs=kw)
            out = post_gen(**kw)(st.z)
            return st, {k: out[k] for k in keep} | {"num_steps": st.num_steps}

        _, kept = jax.lax.scan(step, state, None, length=warmup + draws)
        return jax.tree.map(lambda x: x[warmup:], kept)

    run = jax.jit(lambda keys, kws: jax.lax.map(lambda a: one_chain(*a), (keys, kws)))

    def fit(batch, seed: int) -> dict:
        import contextlib

        from sceneprior.nuts_tree import extra_checks

        stacked = jax.tree.map(lambda *xs: jnp.stack([jnp.asarray(x) for x in xs]), *batch)
        keys = jax.random.split(jax.random.PRNGKey(seed), len(batch))
        with extra_checks() if extra_uturn_checks else contextlib.nullcontext():  # traced on the first call
            out = run(keys, stacked)
        return jax.tree.map(np.asarray, out)

    return fit


def check_sbc(draws, truths, names, thin_to: int = 19, bins: int = 5, alpha: float = 0.01, shift: float = 1.0):
    """Simulation-based calibration (Talts et al. 2018): per replication r, the rank of the
    true value among ``thin_to`` evenly spaced posterior draws of ``draws[r]`` (n_draws,
    n_quantities; one chain) must be uniform on {0, …, thin_to}, with thin_to at most half the
    draws' median bulk ESS (arviz) per quantity (and 4/3 of it in 90 % of the replications);
    tested per quantity with
    scipy.stats.chisquare over ``bins`` equal groups of ranks at a Bonferroni level
    alpha / n_quantities. Negative control: the same test on truths moved by ``shift``
    posterior sd (per replication) must reject for every quantity, or the check has no
    power at this number of replications (with calibrated normal posteriors, 100
    replications and the defaults, a 1 sd shift was rejected in 2 000 of 2 000 simulations,
    ½ sd in 68 % — so the shift is 1 sd)."""
    import scipy.stats as st

    n_ranks = thin_to + 1
    assert n_ranks % bins == 0, "equal groups of ranks"

    def ranks(offset):
        out = np.zeros((len(truths), len(names)), int)
        for r, (d, t) in enumerate(zip(draws, truths)):
            d = np.asarray(d, float)
            idx = np.linspace(0, d.shape[0] - 1, thin_to).astype(int)
            out[r] = (d[idx] < (np.asarray(t, float) + offset * d.std(axis=0))[None, :]).sum(axis=0)
        return out

    # thinned to about the effective sample size: per quantity, the thin_to kept draws are at
    # most half the median bulk ESS (arviz) over the replications, and at most 4/3 of it in
    # 90 % of them. Measured, 100 replications each, 19 kept of 200: tests/test_lgcp.py's SBC
    # medians 58 (σ) to 288, 10th percentiles 20.7 (σ) to 164; the truncated-field SBCs of
    # tests/test_truncation.py medians 106–336, 10th percentiles 59–200
    import arviz as az

    ess = np.array([[float(az.ess(np.asarray(d, float)[None, :, j])) for j in range(len(names))] for d in draws])
    for j, name in enumerate(names):
        med, low = np.median(ess[:, j]), np.quantile(ess[:, j], 0.1)
        assert med >= 2 * thin_to and low >= 0.75 * thin_to, (name, "thinned beyond the ESS", med, low)
    level = alpha / len(names)
    calibrated, moved = ranks(0.0), ranks(shift)
    for j, name in enumerate(names):
        counts = np.bincount(calibrated[:, j] // (n_ranks // bins), minlength=bins)
        p = st.chisquare(counts).pvalue
        assert p > level, (name, counts, p)
        counts = np.bincount(moved[:, j] // (n_ranks // bins), minlength=bins)
        p = st.chisquare(counts).pvalue
        assert p < level, ("negative control not rejected", name, counts, p)


def check_chain_start(model, inputs: dict, init_strategy, report: dict, held: dict, radius: float,
                      still: str):
    """The LGCP kinds' chain start (``init_near`` around a conditional mode): the model's
    ``potential_energy`` (numpyro's, the other sites at their unconstrained values ``held``)
    must fall between 0 and the mode by the gain the search reports; its gradient in the white
    coordinates at the mode must be ~0 against that at 0 (a stationary point, calculus); each
    chain must start within ``radius`` of the mode per coordinate, at different points for
    different keys, with the held site ``still`` at its start value."""
    import math

    import jax
    import jax.numpy as jnp
    from numpyro.infer.util import initialize_model, potential_energy

    values, white = init_strategy.keywords["values"], init_strategy.keywords["centred"]
    assert report["log_density_gain_nats"] > 0 and "conditional posterior mode" in report["white_coordinates"]

    def pe(w):
        return potential_energy(model, (), inputs, {**held, **w})

    zero = {k: jnp.zeros_like(jnp.asarray(values[k], float)) for k in white}
    mode = {k: jnp.asarray(values[k], float) for k in white}
    assert float(pe(zero) - pe(mode)) == pytest.approx(report["log_density_gain_nats"], rel=1e-6)
    grad = jax.grad(pe)

    def norm(at):
        g = grad(at)
        return math.sqrt(sum(float(jnp.vdot(g[k], g[k])) for k in white))

    assert norm(mode) < 2e-2 * norm(zero)  # L-BFGS-B stops on relative change in the density
    starts = []
    for seed in (0, 1):
        z = initialize_model(jax.random.PRNGKey(seed), model, model_kwargs=inputs,
                             init_strategy=init_strategy).param_info.z
        for k in white:
            off = np.asarray(z[k]) - np.asarray(values[k])
            assert np.all(np.abs(off) <= radius) and (off.size <= 2 or np.std(off) > 0.5)  # U(−2, 2): sd 1.15
        assert float(z[still]) == pytest.approx(float(held[still]))
        starts.append(np.concatenate([np.ravel(z[k]) for k in white]))
    assert not np.allclose(starts[0], starts[1])
