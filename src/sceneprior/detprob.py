"""Detection-probability fits: detection spec → outcomes → NUTS → run directory.

``sceneprior detection SPEC.toml`` calls :func:`sceneprior.spec.load_detection_spec` (the
spec's validation lives with every other spec message in spec.py), :func:`fit_detection`
then :func:`write_detection_run`.

A detection spec names the recording's own fit specification (``recording = "…toml"``):
its ``[data]`` (detections, scans, ``data.objects`` and ``[data.gates]``) and ``[space]``
are read by :mod:`sceneprior.spec` / :mod:`sceneprior.tables` exactly as for a gated
clutter fit, so the clutter run and the detection run share data, frame and region by
construction. The detection spec adds only:

    name = "lowmarsh-detection"
    recording = "lowmarsh-gated.toml"
    [model]
    kind = "logit_range"          # logit P_D linear in range (models/detection.py)
    range_bins = 20               # P_D summaries per range bin
    clutter_run = "../runs/x"     # optional: clutter run whose mean intensity gives the
                                  # expected clutter detections in each gate (μ_i)
    [model.prior]                 # intercept_sd = 1.5, coef_sd = 2.5 (inf: flat)
    [sampler]                     # chains, warmup, draws, seed, progress (NUTS only)
    [output]                      # dir

Outcomes: every (object, scan) row of the objects table whose position lies in the
window (inside the region's bounds and outside its permanent masks; rows elsewhere are
counted and left out — the sensor is not expected to see them) is detected when its scan
has a detection inside its gate (``tracklog.detection_outcomes``; the detections inside
the region's bounds, masked ones dropped as for a fit).

Run directory ``runs/NAME/`` (written atomically by ``results.atomic_run_dir``, as fit runs):
``posterior.nc`` (arviz; ``beta`` = (β₀, β₁) on the standardised range), ``detection.nc``
(P_D per range bin, per grid cell, and on a fine range curve: posterior mean, sd, 5/50/95 %,
probabilities; observed object-scans and detections per bin) and ``summary.json``
(schema ``sceneprior.detection/1``: counts, priors, coefficients, diagnostics, the
convergence gate, the spec content, input hashes, caution).
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from .errors import InputError
from .results import DETECTION_SCHEMA
from .spec import DetectionSpec, load_detection_spec  # noqa: F401  (the detection spec is validated in spec.py)

CURVE_POINTS = 121
RUN_FILES = ("posterior.nc", "detection.nc", "summary.json")


# --------------------------------------------------------------------------- data
@dataclass
class DetectionData:
    """Outcomes of the known objects inside the window, with their geometry."""

    region: object
    grid: object
    ranges: np.ndarray  # (n,) range from the sensor [m]
    detected: np.ndarray  # (n,) bool
    scan_index: np.ndarray  # (n,)
    object_id: np.ndarray  # (n,)
    clutter_in_gate: np.ndarray | None  # (n,) expected clutter detections in each gate, or None
    counts: dict
    inputs: dict
    gate: dict


def prepare_detection(spec: DetectionSpec, log=print) -> DetectionData:
    """Read the recording and its objects, and decide detected / not for each object-scan."""
    from .fitting import region_from_spec
    from .geometry import cartesian_to_polar
    from .tables import read_objects, read_recording
    from .tracklog import detection_outcomes

    data = spec.recording.data
    region = region_from_spec(spec.recording.space)
    grid = region.grid(spec.recording.space.cells)
    rec = read_recording(data, region)
    obj = read_objects(data, region, rec)
    gates = obj.gates()
    hit = detection_outcomes(gates, rec.scan_index, rec.c0, rec.c1, frame=region.frame)
    inside = region.inside_bounds(obj.c0, obj.c1)
    if region.masks and inside.any():
        inside[inside] = ~region.in_mask(obj.c0[inside], obj.c1[inside])
    if region.frame == "polar":
        r = obj.c0
    else:
        r, _ = cartesian_to_polar(obj.c0, obj.c1)
    area = np.empty(obj.n_objects)
    area[gates.source_index] = gates.area
    mu = None
    if spec.clutter_run is not None:
        mu = _clutter_in_gates(spec.clutter_run, region, obj, area)[inside]
    if not inside.any():
        raise InputError(f"{data.objects}: no known object lies inside the region's window; P_D cannot be fitted")
    counts = {"object_scans_read": obj.n_objects, "object_scans_used": int(inside.sum()),
              "outside_window": int((~inside).sum()), "detected": int(hit[inside].sum()),
              "objects": int(np.unique(obj.object_id[inside]).size), "scans": rec.n_scans,
              "detections_read": rec.n_read}
    gate = ({"kind": "ellipse", "probability": obj.p_gate, "covariance": "objects table, Cartesian m²"}
            if obj.cov is not None else
            {"kind": "disc", "radius_m": {"min": float(obj.radius.min()), "max": float(obj.radius.max())}})
    gate["mean_area_m2"] = float(area[inside].mean())
    log(f"{counts['object_scans_used']} object-scans in the window ({counts['objects']} objects), "
        f"{counts['detected']} with a detection in the gate; {counts['outside_window']} outside the window left out")
    return DetectionData(region=region, grid=grid, ranges=np.asarray(r, float)[inside], detected=hit[inside],
                         scan_index=obj.scan_index[inside], object_id=obj.object_id[inside],
                         clutter_in_gate=mu, counts=counts, inputs=dict(rec.inputs), gate=gate)


def _clutter_in_gates(run_path, region, obj, area) -> np.ndarray:
    """μ_i = λ(position_i) × gate area: the clutter run's posterior-mean intensity in the
    cell of each object (constant over the gate; gate area not cut by the region's edge)."""
    from .export import run_geometry
    from .results import load_run

    run = load_run(run_path)
    reg, grid, _ = run_geometry(run)
    if reg != region:
        raise InputError(f"{run_path}: the clutter run's region differs from the recording's; use a clutter "
                         "run fitted on the same space")
    lam = np.nan_to_num(np.asarray(run.intensity["intensity_mean"].values, float)).reshape(-1)
    cell = grid.locate(obj.c0, obj.c1)
    return np.where(cell >= 0, lam[np.clip(cell, 0, None)], 0.0) * area


# --------------------------------------------------------------------------- fit
@dataclass
class DetectionResult:
    spec: DetectionSpec
    data: DetectionData
    centre: float
    scale: float
    idata: object
    diagnostics: dict
    timing: dict = field(default_factory=dict)

    def beta(self) -> np.ndarray:
        """(chain·draw, 2) posterior draws of (β₀, β₁)."""
        return np.asarray(self.idata.posterior["beta"]).reshape(-1, 2)


def fit_detection(spec: DetectionSpec, progress: bool = True, log=print) -> DetectionResult:
    from .inference import diagnostics, run_nuts
    from .models.detection import design, detection_model, range_standardisation

    t0 = time.perf_counter()
    data = prepare_detection(spec, log=log)
    centre, scale = range_standardisation(data.region, data.grid)
    flat = math.isinf(spec.prior["coef_sd"])
    inputs = {"X": design(data.ranges, centre, scale), "detected": data.detected.astype(np.float64),
              "intercept_sd": 1.0 if flat else spec.prior["intercept_sd"],
              "coef_sd": 1.0 if flat else spec.prior["coef_sd"], "flat": flat}
    if data.clutter_in_gate is not None:
        inputs["clutter_in_gate"] = data.clutter_in_gate
    smp = spec.recording.sampler
    t1 = time.perf_counter()
    log(f"sampling the detection model with NUTS: {smp.chains} chains × ({smp.warmup} warmup + {smp.draws} draws), "
        f"seed {smp.seed}")
    from numpyro.infer import init_to_value

    idata = run_nuts(detection_model, inputs, smp, progress=progress,
                     init_strategy=init_to_value(values={"beta": np.zeros(2)}),
                     dims={"beta": ["coef"]}, coords={"coef": ["intercept", "range_std"]})
    diag = diagnostics(idata, ("beta",))
    return DetectionResult(spec=spec, data=data, centre=centre, scale=scale, idata=idata, diagnostics=diag,
                           timing={"read_s": t1 - t0, "sampling_s": time.perf_counter() - t1})


def range_extent(region) -> tuple[float, float]:
    """(min, max) range from the sensor (origin) over the region's bounds [m]."""
    if region.frame == "polar":
        return float(region.bounds0[0]), float(region.bounds0[1])
    (x0, x1), (y0, y1) = region.bounds0, region.bounds1
    cx, cy = np.clip(0.0, x0, x1), np.clip(0.0, y0, y1)
    far = max(math.hypot(x, y) for x in (x0, x1) for y in (y0, y1))
    return float(math.hypot(cx, cy)), float(far)


def _stats(draws: np.ndarray) -> dict:
    q = np.quantile(draws, [0.05, 0.5, 0.95], axis=0)
    return {"mean": draws.mean(axis=0), "sd": draws.std(axis=0, ddof=1), "q05": q[0], "q50": q[1], "q95": q[2]}


def detection_dataset(res: DetectionResult):
    """detection.nc: P_D per range bin, per grid cell and on a fine range curve."""
    import xarray as xr

    from .models.detection import cell_ranges, pd_draws

    d, beta = res.data, res.beta()
    lo, hi = range_extent(d.region)
    edges = np.linspace(lo, hi, res.spec.range_bins + 1)
    mid = 0.5 * (edges[1:] + edges[:-1])
    b = np.clip(np.searchsorted(edges, d.ranges, side="right") - 1, 0, edges.size - 2)
    n_bin = np.bincount(b, minlength=mid.size)
    k_bin = np.bincount(b, weights=d.detected.astype(float), minlength=mid.size)
    per_bin = _stats(pd_draws(beta, mid, res.centre, res.scale))
    curve_r = np.linspace(lo, hi, CURVE_POINTS)
    per_curve = _stats(pd_draws(beta, curve_r, res.centre, res.scale))
    grid = d.grid
    w = np.asarray(d.region.cell_window_area(grid), float)
    per_cell = _stats(pd_draws(beta, cell_ranges(grid).reshape(-1), res.centre, res.scale))
    a0, a1 = grid.axes
    u1 = "degree" if grid.frame == "polar" else "m"
    prob = {"units": "1", "quantity": "detection probability per scan"}
    vars_ = {}
    for k, v in per_bin.items():
        vars_[f"pd_bin_{k}"] = (("range_bin",), v, {**prob, "long_name": f"P_D at the bin's mid-range, posterior {k}"})
    for k, v in per_curve.items():
        vars_[f"pd_curve_{k}"] = (("curve_range",), v, {**prob, "long_name": f"P_D(r), posterior {k}"})
    for k, v in per_cell.items():
        vars_[f"pd_cell_{k}"] = ((a0, a1), np.where(w > 0, v.reshape(grid.shape), np.nan),
                                 {**prob, "long_name": f"P_D at the cell's area-weighted mean range, posterior {k}; "
                                                       "NaN where the cell has no area in the window"})
    vars_["bin_object_scans"] = (("range_bin",), n_bin, {"units": "1", "long_name": "object-scans in the bin"})
    vars_["bin_detected"] = (("range_bin",), k_bin.astype(np.int64),
                             {"units": "1", "long_name": "object-scans with a detection in the gate"})
    vars_["window_area"] = ((a0, a1), w, {"units": "m2", "long_name": "cell area inside the window |c ∩ W|"})
    coords = {
        "range_bin": ("range_bin", mid, {"units": "m", "long_name": "mid-range of the bin"}),
        "range_bin_edges": ("range_bin_edge", edges, {"units": "m"}),
        "curve_range": ("curve_range", curve_r, {"units": "m", "long_name": "range from the sensor"}),
        a0: (a0, np.asarray(grid.centres0), {"units": "m"}),
        a1: (a1, np.asarray(grid.centres1), {"units": u1}),
        f"{a0}_edges": (f"{a0}_edge", np.asarray(grid.edges0), {"units": "m"}),
        f"{a1}_edges": (f"{a1}_edge", np.asarray(grid.edges1), {"units": u1}),
    }
    from .results import CAUTION

    return xr.Dataset(vars_, coords=coords, attrs={
        "title": f"sceneprior detection probability, run {res.spec.name}", "frame": grid.frame,
        "model": "logit_range: logit P_D(r) = beta0 + beta1 (r - m)/s",
        "range_standardisation_m": [res.centre, res.scale], "caution": CAUTION})


def gate_entry(diagnostics: dict, posterior) -> dict:
    """The convergence-gate verdict of a detection posterior (sceneprior.gate thresholds)."""
    from .gate import evaluate

    g = evaluate(diagnostics, posterior, None)
    out = g.to_dict()
    out["converged"] = out.pop("passed")
    return out


def detection_summary(res: DetectionResult) -> dict:
    from . import __version__
    from .export import region_dict
    from .models.detection import describe_prior, original_scale
    from .results import CAUTION, _interval

    beta = res.beta()
    orig = original_scale(beta, res.centre, res.scale)
    spec = res.spec
    smp = spec.recording.sampler
    return {
        "schema": DETECTION_SCHEMA,
        "run": spec.name,
        "caution": CAUTION,
        "quantity": "detection probability P_D: probability per scan that a known object in the window has a "
                    "detection inside its gate (dimensionless)",
        "model": {"kind": spec.kind, "prior": describe_prior(spec.prior, res.centre, res.scale),
                  "clutter_in_gate": ("μ_i from the clutter run " + str(spec.clutter_run)
                                      + ": P(detected) = 1 − (1 − P_D)·exp(−μ_i)") if spec.clutter_run else
                  "not modelled: clutter detections inside gates count as detections (P_D biased upward by "
                  "about (1 − P_D)·λ·|gate|)"},
        "coefficients": {
            "beta0_std": _interval(beta[:, 0]), "beta1_std": _interval(beta[:, 1]),
            "intercept_at_0_m": _interval(orig["intercept_at_0_m"]),
            "slope_per_km": _interval(orig["slope_per_km"]),
            "units": "logit scale; beta*_std on (r − m)/s, slope_per_km per 1000 m of range",
        },
        "region": region_dict(res.data.region),
        "grid": {"frame": res.data.grid.frame, "cells": list(res.data.grid.shape)},
        "data": {**res.data.counts, "gate": res.data.gate, "inputs_sha256": res.data.inputs,
                 "recording_spec": res.spec.recording.source, "spec": spec.source,
                 "spec_content": spec.raw, "recording_spec_content": spec.recording.raw},
        "sampler": {"method": "nuts", "chains": smp.chains, "warmup": smp.warmup, "draws": smp.draws,
                    "seed": smp.seed},
        "diagnostics": res.diagnostics,
        "gate": gate_entry(res.diagnostics, res.idata.posterior),
        "versions": {"sceneprior": __version__},
        "timing_s": {k: round(v, 3) for k, v in res.timing.items()},
        "written_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
    }


def write_detection_run(res: DetectionResult, runs_dir: Path | None = None) -> Path:
    """Write runs/NAME/ (posterior.nc, detection.nc, summary.json) atomically
    (:func:`sceneprior.results.atomic_run_dir`)."""
    from .results import atomic_run_dir

    def files(tmp: Path) -> None:
        res.idata.to_netcdf(str(tmp / "posterior.nc"), engine="h5netcdf")
        detection_dataset(res).to_netcdf(tmp / "detection.nc", engine="h5netcdf")
        (tmp / "summary.json").write_text(json.dumps(detection_summary(res), indent=2, ensure_ascii=False) + "\n",
                                          encoding="utf-8")

    return atomic_run_dir(runs_dir or res.spec.recording.output_dir, res.spec.name, files)


class DetectionRun:
    """A detection run read back: ``path``, ``summary``, ``dataset`` (detection.nc), ``posterior``."""

    def __init__(self, path):
        from .results import read_run_summary

        self.path, self.summary = read_run_summary(path, RUN_FILES, DETECTION_SCHEMA, "detection run",
                                                   "write one with `sceneprior detection SPEC.toml`")
        self._ds = None

    @property
    def dataset(self):
        if self._ds is None:
            import xarray as xr

            self._ds = xr.load_dataset(self.path / "detection.nc", engine="h5netcdf")
        return self._ds

    @property
    def posterior(self):
        import arviz as az

        return az.from_netcdf(self.path / "posterior.nc")

    @property
    def name(self) -> str:
        return self.summary["run"]


def describe(res: DetectionResult, path: Path) -> str:
    """Short human summary of a detection fit (the CLI prints it), read from its run ``path``."""
    from .results import CAUTION

    run = DetectionRun(path)
    s, ds = run.summary, run.dataset
    c, g = s["data"], s["gate"]
    r, m, lo, hi = (ds["curve_range"].values, ds["pd_curve_mean"].values, ds["pd_curve_q05"].values,
                    ds["pd_curve_q95"].values)
    pick = np.linspace(0, r.size - 1, 5).astype(int)
    lines = [f"detection run {s['run']} (logit_range) written to {path}",
             f"  object-scans used: {c['object_scans_used']} of {c['object_scans_read']} ({c['objects']} objects); "
             f"detected: {c['detected']}",
             "  P_D by range (posterior mean, 90 % interval): " + "; ".join(
                 f"{r[i]:.0f} m {m[i]:.3f} [{lo[i]:.3f}, {hi[i]:.3f}]" for i in pick),
             f"  slope: {s['coefficients']['slope_per_km']['mean']:+.3f} logit per km "
             f"(90 % [{s['coefficients']['slope_per_km']['q05']:+.3f}, {s['coefficients']['slope_per_km']['q95']:+.3f}])",
             "  convergence gate: " + ("passed" if g["converged"] else f"FAILED: {'; '.join(g['failures'])}"),
             f"  caution: {CAUTION}"]
    return "\n".join(lines)
