"""Run directories: posterior.nc, intensity.nc and summary.json, written atomically.

A run is written into a temporary sibling folder and renamed into place at the end, so a
crash or Ctrl-C never leaves a half-written run (DESIGN.md §5). See runs/README.md.
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import shutil
import tempfile
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from . import __version__

CAUTION = (
    "Fitted clutter and birth priors and detection probabilities are statistical estimates from recorded data. "
    "Validate them in closed loop with the tracker before operational use; local codes, "
    "regulations and the system's own safety process take precedence over these numbers."
)

QUANTILES = {"q05": 0.05, "q50": 0.50, "q95": 0.95}
SUMMARY_SCHEMA = "sceneprior.summary/1"


def _interval(draws: np.ndarray) -> dict:
    d = np.asarray(draws, dtype=float).reshape(-1)
    q = np.quantile(d, [0.05, 0.5, 0.95])
    return {"mean": float(d.mean()), "sd": float(d.std(ddof=1)), "q05": float(q[0]),
            "q50": float(q[1]), "q95": float(q[2])}


def extrapolation_note(kind: str) -> str:
    """What a cell without exposure (no data of its own) gets from model ``kind``."""
    if kind.startswith("lgcp"):
        return "its intensity is the field's prediction from neighbouring cells (an extrapolation)"
    return f"its intensity comes from the {kind} model's fitted form alone (an extrapolation)"


def intensity_dataset(result):
    """xarray Dataset of per-cell posterior summaries of the intensity (CF-style attributes).

    Cells with no area inside the window (permanent masks) are NaN: the model says nothing
    there that an export should use.
    """
    import xarray as xr

    stats = result.stats
    grid = stats.grid
    n0, n1 = grid.shape
    lam = result.cell_intensity()  # (chain, draw, cell)
    flat = lam.reshape(-1, grid.n_cells)
    summaries = _cell_summaries(flat)
    outside = stats.window_area <= 0
    a0, a1 = grid.axes
    u1 = "degree" if grid.frame == "polar" else "m"
    coords = {
        a0: (a0, np.asarray(grid.centres0), {"units": "m", "long_name": f"{a0} of cell centre"}),
        a1: (a1, np.asarray(grid.centres1), {"units": u1, "long_name": f"{a1} of cell centre"}),
        f"{a0}_edges": (f"{a0}_edge", np.asarray(grid.edges0), {"units": "m"}),
        f"{a1}_edges": (f"{a1}_edge", np.asarray(grid.edges1), {"units": u1}),
    }
    data_vars = {}
    for name, vals in summaries.items():
        v = np.where(outside, np.nan, vals).reshape(n0, n1)
        data_vars[f"intensity_{name}"] = (
            (a0, a1), v,
            {"units": "m-2 scan-1", "quantity": "intensity",
             "long_name": f"clutter intensity, posterior {name}, per m² per scan"},
        )
    if grid.frame == "polar":
        # Cell average of the intensity per metre of range per radian of bearing:
        # ∫_c λ dA / (Δr Δθ) = λ_c (r₁ + r₂)/2 for λ constant per m² on the cell (DESIGN.md §4).
        r_mid = 0.5 * (grid.edges0[:-1] + grid.edges0[1:])
        for name, vals in summaries.items():
            v = np.where(outside, np.nan, vals).reshape(n0, n1) * r_mid[:, None]
            data_vars[f"intensity_polar_{name}"] = (
                (a0, a1), v,
                {"units": "m-1 rad-1 scan-1", "quantity": "intensity",
                 "long_name": f"clutter intensity, posterior {name}, per m of range per rad of "
                              "bearing (cell average; = per-m² value × mid-cell range)"},
            )
    for i, t in enumerate(result.spec.thresholds):
        prob = (flat > t).mean(axis=0)
        data_vars[f"exceedance_{i}"] = (
            (a0, a1), np.where(outside, np.nan, prob).reshape(n0, n1),
            {"units": "1", "threshold": t, "threshold_units": "m-2 scan-1",
             "long_name": f"posterior probability that the intensity exceeds {t:g} per m² per scan"},
        )
    if result.stats.exposure.size and (unobserved := (stats.exposure <= 0) & ~outside).any():
        data_vars["extrapolated"] = ((a0, a1), unobserved.reshape(n0, n1).astype(np.int8),
                                     {"units": "1", "long_name": "1 where the cell has window area but "
                                      "no exposure: " + extrapolation_note(result.model.name)})
    if result.model.site_cell_intensity is not None:
        _add_site_maps(result, data_vars, coords, outside)
    data_vars["counts"] = ((a0, a1), stats.counts.reshape(n0, n1),
                           {"units": "1", "long_name": "detections summed over scans (N_c)"})
    data_vars["exposure"] = ((a0, a1), stats.exposure.reshape(n0, n1),
                             {"units": "m2 scan", "long_name": "exposure E_c = Σ_k |c ∩ W_k|"})
    data_vars["window_area"] = ((a0, a1), stats.window_area.reshape(n0, n1),
                                {"units": "m2", "long_name": "cell area inside the window |c ∩ W|"})
    data_vars["cell_area"] = ((a0, a1), stats.cell_area.reshape(n0, n1),
                              {"units": "m2", "long_name": "full cell area"})
    ds = xr.Dataset(data_vars=data_vars, coords=coords)
    ds.attrs.update({
        "title": f"sceneprior clutter intensity, run {result.spec.name}",
        "frame": grid.frame,
        "model": result.model.name,
        "quantiles_note": "per-cell quantiles; their integral is not a quantile of the rate "
                          "(see summary.json 'rate' for the rate's own interval)",
        "masked_cells": "NaN where the cell has no area inside the window (permanent masks)",
        "caution": CAUTION,
        "sceneprior_version": __version__,
    })
    return ds


def _cell_summaries(flat: np.ndarray) -> dict:
    """Posterior mean, sd and the QUANTILES over the draws (axis 0) of per-cell draws."""
    out = {"mean": flat.mean(axis=0), "sd": flat.std(axis=0, ddof=1)}
    for name, q in zip(QUANTILES, np.quantile(flat, list(QUANTILES.values()), axis=0)):
        out[name] = q
    return out


def _add_site_maps(result, data_vars: dict, coords: dict, outside: np.ndarray) -> None:
    """Per-site intensity summaries (dims site, axis0, axis1) and the kind's extra maps
    (``ModelKind.extra_maps``: values per cell, or per site and cell) into intensity.nc."""
    grid = result.stats.grid
    n0, n1 = grid.shape
    a0, a1 = grid.axes
    sites = [str(x) for x in result.setup.extra["sites"]]
    S = len(sites)
    column = result.setup.extra.get("site_column", "site")
    coords["site"] = ("site", np.asarray(sites), {"long_name": f"site (scans-table column '{column}')"})
    lam = result.site_cell_intensity()
    for name, vals in _cell_summaries(lam.reshape((-1,) + lam.shape[2:])).items():
        v = np.where(outside, np.nan, vals).reshape(S, n0, n1)
        data_vars[f"site_intensity_{name}"] = (
            ("site", a0, a1), v, {"units": "m-2 scan-1", "quantity": "intensity",
                                  "long_name": f"clutter intensity at each site, posterior {name}, per m² per scan"})
        if grid.frame == "polar":
            r_mid = 0.5 * (grid.edges0[:-1] + grid.edges0[1:])
            data_vars[f"site_intensity_polar_{name}"] = (
                ("site", a0, a1), v * r_mid[None, :, None],
                {"units": "m-1 rad-1 scan-1", "quantity": "intensity",
                 "long_name": f"clutter intensity at each site, posterior {name}, per m of range per rad of bearing "
                              "(cell average; = per-m² value × mid-cell range)"})
    extra = result.model.extra_maps(result) if result.model.extra_maps is not None else {}
    for name, (dims, vals, attrs) in extra.items():
        shape = tuple(S if d == "site" else n0 * n1 for d in dims)
        v = np.where(outside, np.nan, np.asarray(vals, float).reshape(shape)).reshape(shape[:-1] + (n0, n1))
        data_vars[name] = (tuple(d for d in dims if d != "cell") + (a0, a1), v, attrs)


def site_cell_checks(kept: np.ndarray, window: np.ndarray, chains: int, draws_total: int, step: int):
    """The gate's per-cell checks (99th percentile of R-hat, median bulk ESS) over every
    site's cells inside the window, from kept per-site draws (sample, site, n_cells) laid out
    as cell_draws.nc keeps them; returns (checks, notes) of :func:`sceneprior.gate.evaluate`."""
    from dataclasses import replace

    from .gate import chains_from_kept, evaluate

    x = np.asarray(kept)[:, :, np.asarray(window, bool)]
    g = evaluate({}, None, chains_from_kept(x.reshape(x.shape[0], -1), chains, draws_total, step))
    checks = [replace(c, variable=f"site {c.variable} of {x.shape[1]} sites")
              for c in g.checks if c.diagnostic.startswith("cell_")]
    return checks, [f"sites: {n}" for n in g.notes]


def thin_for_budget(n_draws: int, n_cells: int, budget_mb: float) -> int:
    """Thinning step so that kept per-cell draws fit ``budget_mb`` in float32."""
    per_draw = 4.0 * n_cells / 1e6  # MB
    keep = max(1, int(budget_mb // per_draw)) if per_draw > 0 else n_draws
    return max(1, -(-n_draws // keep))  # ceil(n_draws / keep)


def cell_draws_dataset(result):
    """Thinned per-cell intensity draws (float32) within the spec's memory budget
    (DESIGN.md §5), so quantile export, per-cell comparison and predictive checks can read
    them without re-running the model. Dimensions (sample, cell); cell = flat C-order index."""
    import xarray as xr

    lam = result.cell_intensity()
    c, d, n = lam.shape
    flat = lam.reshape(c * d, n)
    step = thin_for_budget(c * d, n, result.spec.draws_budget_mb)
    kept = np.ascontiguousarray(flat[::step], dtype=np.float32)
    rate = result.rate_draws().reshape(-1)[::step]
    site_vars = {}
    if result.model.site_cell_intensity is not None:  # a map per site: thinned alike, S× the size
        sl = result.site_cell_intensity()
        site_rate = np.asarray(result.idata.posterior["site_rate"], np.float64)
        site_vars = {
            "site_intensity": (("sample", "site", "cell"),
                               np.ascontiguousarray(sl.reshape((c * d,) + sl.shape[2:])[::step], dtype=np.float32),
                               {"units": "m-2 scan-1", "long_name": "posterior draws of the cell intensity at each site "
                                "(thinned like 'intensity'; not counted in the budget)"}),
            "site_rate": (("sample", "site"), site_rate.reshape(c * d, -1)[::step],
                          {"units": "detections per scan", "long_name": "posterior draws of each site's rate"}),
        }
    ds = xr.Dataset(
        {"intensity": (("sample", "cell"), kept,
                       {"units": "m-2 scan-1", "long_name": "posterior draws of the cell intensity"}),
         "rate": (("sample",), rate.astype(np.float64),
                  {"units": "detections per scan", "long_name": "posterior draws of the rate over the window"})},
        attrs={"thinning": step, "draws_total": c * d, "budget_mb": result.spec.draws_budget_mb,
               "precision": "float32 (intensity); the summaries in intensity.nc use all draws in float64",
               "order": "sample = chain-major flattening of (chain, draw), then thinned"},
    )
    if site_vars:
        ds = ds.assign(site_vars).assign_coords(site=[str(x) for x in result.setup.extra["sites"]])
    return ds


def scans_dataset(result):
    """Per-scan data kept in the run (scans.nc): scan ids, per-scan totals n_k, scans-table
    metadata, and the sparse scan × cell counts as COO triplets — what leave-one-scan-out,
    predictive checks and drift/persistence checks need without re-reading the tables."""
    import xarray as xr

    stats, rec = result.stats, result.recording
    coo = stats.scan_cell.tocoo()
    ids = np.asarray(stats.scan_ids)
    data = {
        "scan_id": (("scan",), ids.astype(str) if ids.dtype.kind not in "iu" else ids.astype(np.int64),
                    {"long_name": "scan id as in the scans table"}),
        "n": (("scan",), stats.scan_counts, {"units": "1", "long_name": "detections in the scan (n_k), window only"}),
        "entry_scan": (("entry",), coo.row.astype(np.int64), {"long_name": "scan index of a non-zero (scan, cell) count"}),
        "entry_cell": (("entry",), coo.col.astype(np.int64), {"long_name": "flat cell index (C order)"}),
        "entry_count": (("entry",), coo.data.astype(np.int64), {"units": "1"}),
    }
    if stats.has_gates:  # per-scan windows (issue 7): |W_k| and the sparse area removed per (scan, cell)
        rm = stats.removed.tocoo()
        data["window_area"] = (("scan",), stats.scan_window_area,
                               {"units": "m2", "long_name": "window of the scan |W_k| (window minus its gates)"})
        data["gate_scan"] = (("gate_entry",), rm.row.astype(np.int64),
                             {"long_name": "scan index of a non-zero gated (scan, cell) area"})
        data["gate_cell"] = (("gate_entry",), rm.col.astype(np.int64), {"long_name": "flat cell index (C order)"})
        data["gate_area"] = (("gate_entry",), rm.data.astype(np.float64),
                             {"units": "m2", "long_name": "area of the cell inside the window removed by the "
                                                         "scan's gates, |c ∩ W ∩ ∪ gates|"})
    for name, values in rec.scans_meta.items():
        v = np.asarray(values)
        if v.dtype.kind in "biuf":
            data[f"meta_{name}"] = (("scan",), v, {"long_name": f"scans-table column '{name}'"})
        else:
            data[f"meta_{name}"] = (("scan",), v.astype(str), {"long_name": f"scans-table column '{name}'"})
    return xr.Dataset(data, attrs={"n_cells": stats.grid.n_cells, "n_scans": stats.n_scans})


def _versions() -> dict:
    import arviz
    import jax
    import numpyro
    import xarray

    return {"sceneprior": __version__, "python": platform.python_version(), "numpy": np.__version__,
            "jax": jax.__version__, "numpyro": numpyro.__version__, "arviz": arviz.__version__,
            "xarray": xarray.__version__}


def spec_hash(spec) -> str:
    return hashlib.sha256(json.dumps(spec.raw, sort_keys=True, default=str).encode()).hexdigest()


def _gate_entry(result) -> dict:
    """Convergence-gate verdict of the fit (sceneprior.gate); "converged": false marks the
    run unconverged (``sceneprior fit`` then exits 3 and export refuses it)."""
    from .gate import summary_entry

    entry = summary_entry(result)
    if result.model.site_cell_intensity is None:
        return entry
    # a map per site: the per-cell checks over every site's cells too, on the draws kept
    lam = result.site_cell_intensity()
    c, d, S, n = lam.shape
    step = thin_for_budget(c * d, n, result.spec.draws_budget_mb)
    kept = np.asarray(lam.reshape(c * d, S, n)[::step], dtype=np.float32)
    checks, notes = site_cell_checks(kept, result.stats.window_area > 0, c, c * d, step)
    ok = all(ch.passed for ch in checks)
    entry["checks"] += [ch.to_dict() for ch in checks]
    entry["failures"] += [ch.describe() for ch in checks if not ch.passed]
    entry["notes"] += notes
    entry["converged"] = entry["converged"] and ok
    entry["quantile_export_ok"] = entry["quantile_export_ok"] and ok
    return entry


def _nuts_notes(extra: dict) -> dict:
    """How NUTS chose its step size after warmup and built its trees (``inference.run_nuts``'s
    target_accept, step_size_jitter and extra_uturn_checks, as the model's set-up asked)."""
    from .inference import TARGET_ACCEPT

    jitter = extra.get("step_size_jitter")
    return {
        "step_size_adaptation_target": {"mean_acceptance_probability": float(extra.get("target_accept", TARGET_ACCEPT))},
        "step_size_after_warmup": ("the adapted step size, fixed" if not jitter else
                                   f"the adapted step size × U({1 - jitter:g}, {1 + jitter:g}), drawn afresh each "
                                   "transition (the posterior is unchanged)"),
        "nuts_trees": ("numpyro's, with the U-turn criterion also checked across the two halves of every merged "
                       "subtree (sceneprior/nuts_tree.py: stops trajectories that circle at step sizes where the "
                       "leapfrog period is near a power of two)" if extra.get("extra_uturn_checks") else "numpyro's"),
    }


def _zone_rates(result) -> dict:
    """Rate posterior per named zone: Σ_c λ_c |c ∩ W ∩ Z| per draw (DESIGN.md §4)."""
    if not result.spec.zones:
        return {}
    from .zones import zone_cell_areas

    za = zone_cell_areas(result.stats.region, result.stats.grid, result.spec.zones, result.spec.source)
    lam = result.cell_intensity()
    c, d, n = lam.shape
    out = {}
    for z, area in zip(result.spec.zones, za):
        # float64 sums over chunks of draws (no float64 copy of all draws at once)
        flat = lam.reshape(c * d, n)
        draws = np.concatenate([np.asarray(flat[i:i + 256], np.float64) @ area
                                for i in range(0, c * d, 256)]).reshape(c, d)
        import arviz as az

        out[z.name] = {"units": "detections per scan in the zone (inside the window)",
                       "area_m2": float(area.sum()), **_interval(draws),
                       "r_hat": float(az.rhat(draws)) if draws.shape[0] > 1 else None,
                       "ess_bulk": float(az.ess(draws, method="bulk")),
                       "ess_tail": float(az.ess(draws, method="tail"))}
    return out


def summary_dict(result) -> dict:
    spec, stats, rec = result.spec, result.stats, result.recording
    grid = stats.grid
    rate = result.rate_draws()
    out = {
        "schema": SUMMARY_SCHEMA,
        "run": spec.name,
        "caution": CAUTION,
        "model": {"kind": result.model.name, "prior": result.model.describe_prior(result.prior, stats)},
        "space": {
            "frame": grid.frame,
            "axes": list(grid.axes),
            "bounds": [list(stats.region.bounds0), list(stats.region.bounds1)],
            "bounds_units": ["m", "degree" if grid.frame == "polar" else "m"],
            "cells": list(grid.shape),
            "masks": [m.name for m in stats.region.masks],
            "region_area_m2": float(stats.region.area()),
            "window_area_m2": stats.window_total,
        },
        "data": {
            "scans": stats.n_scans,
            "empty_scans": int((stats.scan_counts == 0).sum()),
            "detections_read": rec.n_read,
            "detections_used": rec.n_detections,
            "dropped_in_masks": rec.n_masked,
            "dropped_outside_bounds": rec.n_outside,
            "exposure_m2_scan": stats.total_exposure,
            "exposure_note": ("E = Σ_k |W_k|: every scan's window minus the gates around its known objects"
                              if stats.has_gates else "E = K·|W|: every scan observed the whole window"),
            "inputs_sha256": rec.inputs,
            "spec": spec.source,
            "spec_sha256": spec_hash(spec),
            "spec_content": spec.raw,
        },
        "rate": {"units": "detections per scan in the window (region minus permanent masks)",
                 **_interval(rate)},
        "mean_intensity": {"units": "m-2 scan-1 (rate / window area)",
                           **_interval(rate / stats.window_total)},
        "zones": _zone_rates(result),
        "sampler": {"method": spec.sampler.method, "chains": spec.sampler.chains,
                    "warmup": spec.sampler.warmup, "draws": spec.sampler.draws,
                    "seed": spec.sampler.seed,
                    **(_nuts_notes(getattr(result.setup, "extra", {})) if spec.sampler.method == "nuts" else {})},
        "diagnostics": result.diagnostics,
        "gate": _gate_entry(result),
        "draws_kept": {
            "posterior.nc": ("all kept draws of the model's parameters" if result.thinning == 1 else
                             f"every {result.thinning}th draw of the sampler (the per-cell field obeys the "
                             "draws budget)"),
            "cell_draws.nc": "per-cell intensity draws, float32, thinned to fit the budget",
            "budget_mb": spec.draws_budget_mb,
            "sampler_thinning": result.thinning,
            "thinning": thin_for_budget(rate.size, grid.n_cells, spec.draws_budget_mb),
        },
        "versions": _versions(),
        "timing_s": {k: round(v, 3) for k, v in result.timing.items()},
        "written_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
    }
    if stats.has_gates:
        out["data"]["dropped_in_gates"] = rec.n_gated
        out["gates"] = {
            **stats.gate_info,
            "units": "areas in m², per scan of the window (region minus permanent masks)",
            "note": "each scan's gates (their union, cut at the region's edge and outside the masks) leave "
                    "that scan's window: detections inside are dropped (dropped_in_gates) and the area leaves "
                    "the exposure; the rate is still per scan over the whole window",
            "residual_biases": "object detections outside their gate leak in as clutter (about P_D·(1 − P_G) "
                               "per object per scan); gates placed from a tracker's own output depend on the "
                               "data (clutter near tracks comes out low)",
        }
    if result.model.summary is not None:
        out[result.model.name] = result.model.summary(result)
        for key in ("cardinality", "overdispersion"):  # read by the tracker export
            if key in out[result.model.name]:
                out[key] = out[result.model.name][key]
    if result.model.name == "uniform":
        from .models.uniform import exact_posterior

        a, b = exact_posterior(stats, result.prior)
        out["exact_posterior"] = {
            "note": "conjugate Gamma posterior of the intensity ρ (Gelman et al., BDA3 §2.6)",
            "shape": a, "rate_m2_scan": b, "intensity_mean": a / b, "intensity_sd": float(np.sqrt(a) / b),
            "rate_mean": a / b * stats.window_total,
            "rate_sd": float(np.sqrt(a) / b * stats.window_total),
        }
    return out


def model_notes(s: dict) -> list[str]:
    """The model kind's own warnings in a run's summary ``s`` (its section's ``notes``; a
    composite kind lifts its base kind's there): what the printed lines, report.html and the
    tracker export repeat."""
    return list((s.get(s["model"]["kind"]) or {}).get("notes", []))


def human_summary(s: dict, path: Path) -> str:
    """The lines ``sceneprior fit`` and the demo print for the run written to ``path``: data,
    window, rate, mean intensity, gates, diagnostics, the gate and the caution, from its
    summary ``s`` (summary.json as :func:`write_run` wrote it, so nothing is computed twice)."""
    d, r, mi, dg = s["data"], s["rate"], s["mean_intensity"], s["diagnostics"]
    lines = [
        f"run {s['run']} ({s['model']['kind']}, {s['space']['frame']} frame) written to {path}",
        f"  scans: {d['scans']} ({d['empty_scans']} empty); detections used: {d['detections_used']} "
        f"(dropped: {d['dropped_in_masks']} in masks, "
        + (f"{d['dropped_in_gates']} in gates, " if "dropped_in_gates" in d else "")
        + f"{d['dropped_outside_bounds']} outside bounds)",
        f"  window: {s['space']['window_area_m2'] / 1e6:.3f} km² (region minus masks)",
        f"  clutter rate: {r['mean']:.3f} detections/scan, 90 % interval [{r['q05']:.3f}, {r['q95']:.3f}]",
        f"  mean intensity: {mi['mean']:.4g} per m² per scan ({mi['mean'] * 1e6:.4g} per km² per scan)",
    ]
    if "gates" in s:
        g = s["gates"]
        lines.append(f"  gates: {g['gates']} around {g['objects']} known objects; on average "
                     f"{100 * g['mean_fraction_of_window']:.3g} % of the window per scan left the exposure")
    worst_rhat = max(v["r_hat"] for v in dg["variables"].values())
    min_ess = min(v["ess_bulk"] for v in dg["variables"].values())
    lines.append(f"  diagnostics: max R-hat {worst_rhat:.4f}, min bulk ESS {min_ess:.0f}, "
                 f"divergences {dg['divergences']} ({dg['chains']} chains × {dg['draws']} draws)")
    lines += [f"  note: {n}" for n in model_notes(s)]
    g = s["gate"]
    lines.append("  convergence gate: " + ("passed" if g["converged"] else
                 f"FAILED ({len(g['failures'])} check(s)); run marked unconverged"))
    lines.append(f"  caution: {CAUTION}")
    return "\n".join(lines)


def atomic_run_dir(runs_dir, name: str, write_files) -> Path:
    """Write the run directory ``runs_dir/name`` atomically (DESIGN.md §5) and return its path.

    ``write_files(tmp)`` fills a private temporary sibling folder; then an existing run of
    that name is moved aside (never deleted before the new one is in place), the new folder is
    renamed into place and the old one removed. A crash or Ctrl-C leaves either the old run or
    the new one under ``name``: before the rename the old run is put back; between the two
    renames it survives in ``.NAME.old-*/run``."""
    runs_dir = Path(runs_dir)
    runs_dir.mkdir(parents=True, exist_ok=True)
    target = runs_dir / name
    tmp = Path(tempfile.mkdtemp(prefix=f".{name}.partial-", dir=runs_dir))
    old = None
    try:
        write_files(tmp)
        if target.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{name}.old-", dir=runs_dir))
            os.replace(target, old / "run")
        os.chmod(tmp, 0o755)  # mkdtemp makes it private
        os.replace(tmp, target)
    except BaseException:
        if old is not None and (old / "run").exists() and not target.exists():
            os.replace(old / "run", target)  # the new run did not land: the old one goes back
        shutil.rmtree(tmp, ignore_errors=True)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
    return target


def write_run(result, runs_dir: Path | None = None) -> Path:
    """Write runs/NAME/ atomically (:func:`atomic_run_dir`) and return its path."""

    def files(tmp: Path) -> None:
        idata = result.idata
        drop = [v for v in getattr(result.setup, "extra", {}).get("drop_from_posterior", [])
                if v in idata.posterior]
        if drop:  # large latent vectors (LGCP Fourier coefficients): cells are in cell_draws.nc
            idata = idata.copy()
            idata.posterior = idata.posterior.drop_vars(drop)
        idata.to_netcdf(str(tmp / "posterior.nc"), engine="h5netcdf")
        intensity_dataset(result).to_netcdf(tmp / "intensity.nc", engine="h5netcdf")
        cd = cell_draws_dataset(result)
        cd.to_netcdf(tmp / "cell_draws.nc", engine="h5netcdf")
        scans_dataset(result).to_netcdf(tmp / "scans.nc", engine="h5netcdf")
        summary = summary_dict(result)
        (tmp / "summary.json").write_text(json.dumps(summary, indent=2, ensure_ascii=False) + "\n",
                                          encoding="utf-8")

    return atomic_run_dir(runs_dir or result.spec.output_dir, result.spec.name, files)


RUN_FILES = ("posterior.nc", "intensity.nc", "cell_draws.nc", "scans.nc", "summary.json")
DETECTION_SCHEMA = "sceneprior.detection/1"
# what each summary schema's run is and which command writes it (messages about runs of the wrong kind)
RUN_KINDS = {SUMMARY_SCHEMA: "fit run written by `sceneprior fit` (a clutter map or a birth mixture)",
             DETECTION_SCHEMA: "detection run written by `sceneprior detection`"}


def read_run_summary(path, files, schema: str, kind: str, remedy: str) -> tuple[Path, dict]:
    """Validate a run directory of one kind and return (path, summary): a folder, its
    summary.json read and its schema checked first (a run of another known kind is named as
    such), then the files the kind needs. One-line InputError otherwise; ``kind`` names the run
    in messages ("run", "detection run"), ``remedy`` says what to do."""
    from .errors import InputError

    path = Path(path)
    if not path.is_dir():
        raise InputError(f"{path}: not a {kind} directory (expected runs/NAME/)")
    sp = path / "summary.json"
    summary = None
    if sp.is_file():
        try:
            summary = json.loads(sp.read_text(encoding="utf-8"))
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise InputError(f"{sp}: unreadable ({exc})") from None
        got = summary.get("schema") if isinstance(summary, dict) else None
        if got != schema:
            if got in RUN_KINDS:
                raise InputError(f"{path}: a {RUN_KINDS[got]} (summary schema {got!r}), not a {kind}; {remedy}")
            raise InputError(f"{path}: {kind} written by another sceneprior version (summary schema {got!r}, "
                             f"this version reads {schema!r}); {remedy}")
    missing = [f for f in files if not (path / f).is_file()]
    if missing:
        raise InputError(f"{path}: incomplete {kind}, missing {', '.join(missing)}; {remedy}")
    return path, summary


class Run:
    """A run directory read back from disk (export, report, check and compare use this).

    Attributes: ``path``, ``summary`` (dict), and lazily opened ``intensity`` (xarray),
    ``cell_draws`` (xarray) and ``posterior`` (arviz InferenceData).
    """

    def __init__(self, path: Path):
        self.path, self.summary = read_run_summary(path, RUN_FILES, SUMMARY_SCHEMA, "run",
                                                   "re-run `sceneprior fit`")
        self._cache: dict = {}

    def _open(self, name):
        if name not in self._cache:
            import xarray as xr

            self._cache[name] = xr.load_dataset(self.path / name, engine="h5netcdf")
        return self._cache[name]

    @property
    def intensity(self):
        return self._open("intensity.nc")

    @property
    def cell_draws(self):
        return self._open("cell_draws.nc")

    @property
    def scans(self):
        return self._open("scans.nc")

    def removed(self):
        """(K, n_cells) scipy.sparse CSR of the window area [m²] each scan's gates remove from
        each cell, or None when the run had no gates (every scan observed the whole window)."""
        import scipy.sparse as sp

        ds = self.scans
        if "gate_area" not in ds:
            return None
        return sp.csr_matrix((ds["gate_area"].values, (ds["gate_scan"].values, ds["gate_cell"].values)),
                             shape=(ds.sizes["scan"], int(ds.attrs["n_cells"])))

    def scan_cell(self):
        """(K, n_cells) scipy.sparse CSR matrix of per-scan cell counts."""
        import scipy.sparse as sp

        ds = self.scans
        return sp.csr_matrix((ds["entry_count"].values, (ds["entry_scan"].values, ds["entry_cell"].values)),
                             shape=(ds.sizes["scan"], int(ds.attrs["n_cells"])))

    @property
    def posterior(self):
        if "posterior" not in self._cache:
            import arviz as az

            self._cache["posterior"] = az.from_netcdf(self.path / "posterior.nc")
        return self._cache["posterior"]

    @property
    def name(self) -> str:
        return self.summary["run"]


def load_run(path) -> Run:
    return Run(Path(path))
