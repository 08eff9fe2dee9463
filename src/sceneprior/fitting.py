"""The fit pipeline: specification → recording → binned statistics → posterior → result.

``fit(spec)`` is what ``sceneprior fit`` calls; a Python user can call it directly.
It returns one :class:`FitResult`, the object that export, report and compare read.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from .binning import BinnedStats, bin_recording
from .errors import InputError
from .geometry import PolygonMask, Region, SectorMask
from .models.registry import ModelKind, get_model, resolve_prior
from .spec import FitSpec, SpaceSpec
from .tables import Recording, read_objects, read_recording


def region_from_spec(space: SpaceSpec) -> Region:
    masks = []
    for m in space.masks:
        if m.polygon is not None:
            masks.append(PolygonMask(vertices=np.asarray(m.polygon, dtype=float), name=m.name))
        else:
            masks.append(SectorMask(range=m.range, bearing=m.bearing, name=m.name))
    return Region(frame=space.frame, bounds0=space.bounds0, bounds1=space.bounds1, masks=tuple(masks))


@dataclass
class FitResult:
    """Everything a fit produced; export, report and compare read this, never re-fit."""

    spec: FitSpec
    recording: Recording
    stats: BinnedStats
    model: ModelKind
    prior: dict
    setup: object  # models.registry.ModelSetup
    idata: object  # arviz.InferenceData
    diagnostics: dict
    timing: dict = field(default_factory=dict)
    thinning: int = 1  # sampler draws kept: every n-th (per-cell memory budget)

    def posterior_arrays(self, names=None) -> dict:
        post = self.idata.posterior
        names = names or list(post.data_vars)
        return {n: np.asarray(post[n]) for n in names}

    def _cached(self, attr: str, compute) -> np.ndarray:
        """``compute(posterior arrays, stats, setup)`` once, kept read-only under ``attr``."""
        cached = getattr(self, attr, None)
        if cached is None:
            cached = np.asarray(compute(self.posterior_arrays(), self.stats, self.setup))
            cached.setflags(write=False)
            setattr(self, attr, cached)
        return cached

    def cell_intensity(self) -> np.ndarray:
        """(chain, draw, n_cells) intensity draws [m⁻² scan⁻¹], computed once and kept (the
        run's outputs, zone rates and diagnostics all read it; read-only)."""
        return self._cached("_cell_intensity", self.model.cell_intensity)

    def site_cell_intensity(self) -> np.ndarray:
        """(chain, draw, site, n_cells) intensity per site of a kind with a map per site
        (``ModelKind.site_cell_intensity``), computed once and shared like cell_intensity."""
        return self._cached("_site_cell_intensity", self.model.site_cell_intensity)

    def rate_draws(self) -> np.ndarray:
        """(chain, draw) expected detections per scan in the window."""
        return np.asarray(self.idata.posterior["rate"])


def nuts_options(setup, n_cells: int) -> dict:
    """The ``inference.run_nuts`` options a model's set-up chooses (mass matrix blocks and
    their start, initial point, sites not kept, latent size and whether a site is grid-sized,
    warmup depth, vectorised chain groups, step-size jitter, extra U-turn checks, target
    acceptance) for a grid of ``n_cells`` cells: the one place ``fit`` and
    bench/bench_lgcp.py read them from ``setup.extra``."""
    from .inference import TARGET_ACCEPT

    ex = setup.extra
    return dict(dense_mass=ex.get("dense_mass", False), init_strategy=ex.get("init_strategy"),
                exclude_sites=ex.get("exclude_sites", ()), n_latent=int(ex.get("n_latent", 0)), n_cells=n_cells,
                warmup_tree_depth=ex.get("warmup_tree_depth"), inverse_mass_matrix=ex.get("initial_inverse_mass"),
                vectorize_groups=bool(ex.get("vectorize_chain_groups")),
                step_size_jitter=float(ex.get("step_size_jitter") or 0.0),
                extra_uturn_checks=bool(ex.get("extra_uturn_checks")),
                target_accept=float(ex.get("target_accept", TARGET_ACCEPT)),
                grid_latent=bool(ex.get("grid_latent")))


def _check_memory(setup, stats, smp, source: str, thinning: int = 1) -> None:
    """Refuse fits whose sampler state and kept draws would not fit in memory (say what would).

    Each running chain holds a few copies of the torus field (position, momentum, gradient
    and the tree's end points, float64) — ``inference.chains_at_once`` of them at a time;
    the kept cell field (float32) of every chain is held three times at the peak: by the
    sampler's output, by the posterior and by the cell intensity draws the outputs are
    computed from."""
    import os

    from .inference import CHAIN_PROCESS_BYTES, PROCESSES, chain_layout, chains_at_once, usable_cores

    opts = nuts_options(setup, stats.grid.n_cells)
    n_latent = opts["n_latent"]
    if not n_latent:
        return
    kept = -(-smp.draws // thinning)
    running = chains_at_once(n_latent, smp.chains, stats.grid.n_cells, opts["vectorize_groups"], opts["grid_latent"])
    need = smp.chains * 3 * kept * stats.grid.n_cells * 4.0 + running * 12 * n_latent * 8.0
    if chain_layout(n_latent, smp.chains, stats.grid.n_cells, opts["grid_latent"]) == PROCESSES:
        # each chain process (one per usable core): its own jax and compiled sampler, and
        # its chains' kept draws twice more (numpyro stacks a group's chains; the pickle on
        # the way back). One 256² chain process alone peaked at 1.38 GB, set-up included,
        # in bench/bench_lgcp.py --one 256 squared_exponential strong --chains 1 --warmup 300
        # --draws 300 --variance-kept 0.999
        need += (min(smp.chains, usable_cores()) * CHAIN_PROCESS_BYTES
                 + 2 * smp.chains * kept * stats.grid.n_cells * 4.0)
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return
    if need > 0.6 * total:
        raise InputError(
            f"{source}: {smp.chains} chains on a torus of {n_latent} cells with {kept} kept draws of "
            f"{stats.grid.n_cells} cells need about {need / 1e9:.1f} GB, more than this machine can hold "
            f"({total / 1e9:.0f} GB); lower output.draws_budget_mb, use fewer chains or a coarser grid")


def _check_grid(stats, smp, source: str) -> None:
    """Refuse grids whose padded torus cannot be sampled here, before any set-up work."""
    import os

    n_torus = 4 * stats.grid.n_cells  # the field lives on a torus about twice the grid per axis
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return
    from .inference import chains_at_once

    running = chains_at_once(n_torus, smp.chains)
    need = running * 12 * n_torus * 8.0 + 40 * n_torus * 8.0
    if need > 0.6 * total or n_torus > 2**24:
        side = int(math.sqrt(0.6 * total / (8.0 * 4 * (12 * running + 40))))
        raise InputError(
            f"{source}: a {stats.grid.shape[0]}×{stats.grid.shape[1]} grid needs a torus of about {n_torus} cells "
            f"({need / 1e9:.1f} GB for {running} chain(s) sampled at once), beyond what this machine can sample; use a coarser "
            f"grid (at most about {min(side, 2048)}×{min(side, 2048)} cells here)")


def prepare(spec: FitSpec) -> tuple[Region, Recording, BinnedStats]:
    """Read, validate and bin the data named by a spec (no sampling).

    With an objects table (``data.objects``) the detections inside a gate of their scan are
    dropped (``Recording.n_gated``) and the gated area leaves each scan's window
    (``BinnedStats.removed``; exposure E_c = K·|c ∩ W| − Σ_k removed[k, c])."""
    region = region_from_spec(spec.space)
    grid = region.grid(spec.space.cells)
    rec = read_recording(spec.data, region)
    objects = read_objects(spec.data, region, rec)
    gates = None
    if objects is not None:
        from .gates import in_gates

        gates = objects.gates()
        rec = rec.drop_gated(in_gates(gates, rec.scan_index, rec.c0, rec.c1, frame=region.frame))
    stats = bin_recording(rec, region, grid, gates=gates)
    if objects is not None:
        stats.gate_info.update(_gate_description(objects))
    return region, rec, stats


def _gate_description(objects) -> dict:
    out = {"objects_table": str(objects.path), "object_rows": objects.n_objects,
           "objects": int(np.unique(objects.object_id.astype(str)).size)}
    if objects.cov is not None:
        out["shape"] = (f"ellipse {{d : dᵀP⁻¹d ≤ γ}}, P the objects' Cartesian position covariance, "
                        f"γ = chi2.ppf({objects.p_gate:g}, 2) = {-2 * np.log1p(-objects.p_gate):.4g}")
        out["gate_probability"] = objects.p_gate
    else:
        r = objects.radius
        out["shape"] = "disc"
        out["radius_m"] = ({"min": float(r.min()), "max": float(r.max()), "mean": float(r.mean())}
                           if r.size else None)
    return out


# Kinds and options that cannot use per-scan windows yet (refused with one line when gated).
def _refuse_gates(spec: FitSpec) -> None:
    base, *tokens = spec.model.kind.split("+")
    why = None
    if base == "mixture":
        why = ("the mixture kind fits points against the permanent window and does not take per-scan "
               "windows (gates) yet; drop data.objects or fit kind = \"uniform\", \"loglinear\" or \"lgcp\"")
    elif tokens and base != "uniform":
        why = (f"per-scan terms ({', '.join(tokens)}) with gates are available for kind \"uniform\" only "
               f"(the gated per-scan integral of a '{base}' map is not implemented yet); drop the per-scan "
               "terms, drop data.objects, or use kind = \"uniform\"")
    if why:
        raise InputError(f"{spec.source}: data.objects (gates around known objects): {why}")


def fit(spec: FitSpec, progress: bool = True, log=print) -> FitResult:
    """Fit the model named in ``spec``; ``log`` receives one-line progress messages."""
    from .inference import configure_jax

    configure_jax()  # before the set-up's first jax computation (device count, float64)
    t0 = time.perf_counter()
    kind = get_model(spec.model.kind)
    prior = resolve_prior(kind, spec.model.prior, spec.source)
    if spec.data.objects is not None:
        _refuse_gates(spec)
    region, rec, stats = prepare(spec)
    t_bin = time.perf_counter()
    gated = f", {rec.n_gated} inside gates" if stats.has_gates else ""
    log(
        f"read {rec.n_read} detections over {rec.n_scans} scans "
        f"({int((stats.scan_counts == 0).sum())} empty); kept {rec.n_detections}, "
        f"dropped {rec.n_masked} in masks{gated} and {rec.n_outside} outside the bounds; "
        f"binned on {stats.grid.shape[0]}×{stats.grid.shape[1]} {region.frame} cells"
    )
    if stats.has_gates:
        g = stats.gate_info
        log(f"gates: {g['gates']} around {g['objects']} known objects in {g['scans_with_gates']} scans "
            f"remove {100 * g['mean_fraction_of_window']:.3g} % of the window per scan on average "
            f"(exposure reduced accordingly)")
    if spec.zones:  # refuse zones outside the window before any sampling
        from .zones import zone_cell_areas

        zone_cell_areas(region, stats.grid, spec.zones, spec.source)
    smp = spec.sampler
    if kind.per_cell and smp.method != "exact":  # refuse impossible grids before the set-up's work
        _check_grid(stats, smp, spec.source)
    setup = kind.setup(stats, prior, spec.model)
    thinning = 1
    if setup.extra.get("exclude_sites"):  # the kept cell field obeys the draws budget
        from .results import thin_for_budget

        thinning = thin_for_budget(smp.draws, stats.grid.n_cells * smp.chains, spec.draws_budget_mb)
    _check_memory(setup, stats, smp, spec.source, thinning)
    if smp.method == "exact":
        if kind.exact is None:
            raise InputError(f"{spec.source}: sampler.method = \"exact\" needs a conjugate model; "
                             f"'{kind.name}' has none, use \"nuts\"")
        from .inference import exact_idata

        log(f"drawing {smp.chains}×{smp.draws} exact posterior draws ({kind.name})")
        draws = kind.exact(stats, prior, np.random.default_rng(smp.seed), smp.chains, smp.draws)
        idata = exact_idata(draws)
    else:
        from .inference import run_nuts

        for line in setup.extra.get("advice", ()):
            log(f"note: {line}")
        log(f"sampling {kind.name} with NUTS: {smp.chains} chains × ({smp.warmup} warmup + "
            f"{smp.draws} draws), seed {smp.seed}")
        idata = run_nuts(kind.fn, setup.inputs, smp, progress=progress, dims=setup.extra.get("dims"),
                         coords=setup.extra.get("coords"), thinning=thinning,
                         **nuts_options(setup, stats.grid.n_cells))
        if setup.extra.get("complete"):  # exact conditional draws of integrated-out parameters
            idata = setup.extra["complete"](idata, stats, setup, smp.seed)
    t_mcmc = time.perf_counter()
    from .inference import diagnostics

    diag = diagnostics(idata, ("rate",) + kind.hyper)
    if thinning > 1:  # sample statistics at the kept iterations; divergences carried to them (inference.nuts_kernel)
        diag["divergences_counted_over"] = (f"every sampler transition: the per-cell draws budget kept every "
                                            f"{thinning}th, and each kept draw counts once if any of the {thinning} "
                                            "transitions since the previous kept draw diverged")
    result = FitResult(
        spec=spec,
        recording=rec,
        stats=stats,
        model=kind,
        prior=prior,
        setup=setup,
        idata=idata,
        diagnostics=diag,
        timing={"read_and_bin_s": t_bin - t0, "sampling_s": t_mcmc - t_bin},
        thinning=thinning,
    )
    if kind.per_cell:
        from .inference import cell_diagnostics

        lam = result.cell_intensity()
        inside = stats.window_area > 0
        diag["cells"] = cell_diagnostics(np.log(lam[..., inside]))
    return result
