"""Tracker configuration export: a run directory → one schema-versioned JSON file.

``export_run(run)`` (what ``sceneprior export RUN`` calls) reads a run with
:func:`sceneprior.results.load_run`, applies the convergence gate
(:mod:`sceneprior.gate`), and writes ``tracker.json`` into the run (and optionally a copy
elsewhere). The file validates against ``schemas/tracker-1.schema.json`` and is read by
:mod:`sceneprior.evaluator`, which needs neither jax nor numpyro.

The exported triple (DESIGN.md §4), in this order:

1. intensity map λ_c [m⁻² scan⁻¹] on the run's grid: the per-cell posterior mean
   (``intensity.nc``, all draws, float64) or a per-cell posterior quantile q computed
   from the kept cell draws (``cell_draws.nc``, float32 draws, quantile in float64);
2. rate [detections per scan] = its integral over the window, Σ_c λ_c·|c ∩ W|, with the
   area of each cell inside the window (region minus permanent masks);
3. spatial density f_c = λ_c / rate [m⁻²], which integrates to 1 over the window.

Posterior summaries do not commute: the integral of a per-cell quantile map is not a
quantile of the rate, so the rate's own posterior (mean, sd, 5/50/95 %) is written beside
the map's integral. Cells without area in the window are masked (null values and
``masked = true``); a cell cut by a mask keeps its value, which applies to its part inside
the window only (the evaluator returns 0 in the masked part).

Optional sections slot in when the run's summary.json has them (other model kinds):
``cardinality`` is Poisson(rate) unless the summary (top level or the model kind's own
section) has ``overdispersion.phi`` (per-scan
factor u_k ~ Gamma(1/φ, 1/φ), DESIGN.md §3), then negative binomial with mean = rate and
variance = rate + φ·rate², given as scipy.stats.nbinom(n = 1/φ, p = 1/(1 + φ·rate));
``birth`` copies ``summary["birth"]`` (a Gaussian mixture with untruncated weights;
DEVELOPERS.md "Tracker export" states the contract).

Combining runs (``sceneprior export CLUTTER_RUN --detection PD_RUN --birth BIRTH_RUN``):
``detection_probability`` holds P_D(range) of a detection run (:mod:`sceneprior.detprob`)
whose region must be the clutter run's; ``birth`` may come from a separate birth-mixture
run fitted in Cartesian state space with the same ``[sensor]`` placement. Each added run
passes its own convergence gate or the override is recorded in its section.
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timezone
from importlib import resources
from pathlib import Path

import numpy as np

from . import __version__
from .errors import InputError
from .results import CAUTION, DETECTION_SCHEMA, SUMMARY_SCHEMA, extrapolation_note, load_run, model_notes

TRACKER_SCHEMA = "sceneprior.tracker/1"
SCHEMA_FILE = "tracker-1.schema.json"
TRACKER_FILE = "tracker.json"

QUANTITIES = {
    "rate": "expected clutter detections per scan over the window (region minus permanent masks); "
            "dimensionless count per scan",
    "intensity": "expected detections per scan per m² at a point: λ(z) = rate · f(z) [m-2 scan-1]; "
                 "polar trackers need it per m of range per rad of bearing: λ(z)·r [m-1 rad-1 scan-1]",
    "density": "where a clutter detection falls: f(z) = λ(z) / rate, integrates to 1 over the window [m-2]",
}
INTERPOLATION = {
    "nearest": "piecewise constant: the value of the cell containing the point; preserves every "
               "cell's integral, so the evaluator integrates exactly to the exported rate",
    "bilinear": "bilinear between cell centres in the grid's native coordinates (range, bearing "
                "for polar grids), constant beyond the outermost centres, masked neighbours left "
                "out; smoother, but does NOT preserve cell integrals (its integral differs from the rate)",
}
CONVENTIONS = ("x east, y north, metres; range in metres and bearing in degrees clockwise from "
               "north, x = r·sin θ, y = r·cos θ, the polar origin (sensor) at x = y = 0; "
               "'rad' in units means radians of bearing")


def schema() -> dict:
    """The JSON Schema of the tracker configuration (packaged file)."""
    with resources.as_file(resources.files("sceneprior") / "schemas" / SCHEMA_FILE) as p:
        return json.loads(Path(p).read_text(encoding="utf-8"))


# ----------------------------------------------------------------------- run geometry
def run_region(run):
    """The run's :class:`~sceneprior.geometry.Region` (bounds and permanent masks), rebuilt
    from the specification content that summary.json keeps (spec.spec_from_dict, then
    fitting.region_from_spec: the same code path as the fit)."""
    from .geometry import PolygonMask, Region, SectorMask
    from .spec import spec_from_dict

    d = run.summary.get("data", {})
    raw = d.get("spec_content")
    if not isinstance(raw, dict):
        raise InputError(f"{run.path / 'summary.json'}: no 'data.spec_content'; re-run `sceneprior fit`")
    space = spec_from_dict(raw, base_dir=Path(str(d.get("spec", "."))).parent,
                           source=f"{run.path / 'summary.json'} (spec content)").space
    # The mapping of fitting.region_from_spec, repeated here because importing fitting loads
    # the model stack (jax, numpyro) that export, report and simulate --from do not need;
    # tests/test_export.py checks that both give the same Region.
    masks = tuple(PolygonMask(vertices=np.asarray(m.polygon, dtype=float), name=m.name) if m.polygon is not None
                  else SectorMask(range=m.range, bearing=m.bearing, name=m.name) for m in space.masks)
    return Region(frame=space.frame, bounds0=space.bounds0, bounds1=space.bounds1, masks=masks)


def run_grid(run):
    """The run's :class:`~sceneprior.geometry.Grid` from intensity.nc's cell edges."""
    from .geometry import Grid

    ds = run.intensity
    frame = run.summary["space"]["frame"]
    a0, a1 = ("x", "y") if frame == "cartesian" else ("range", "bearing")
    return Grid(frame, np.asarray(ds[f"{a0}_edges"].values, float), np.asarray(ds[f"{a1}_edges"].values, float))


def run_geometry(run):
    """(region, grid, window_area (n0, n1) [m²]) of a run; checks that they agree."""
    region = run_region(run)
    grid = run_grid(run)
    ref = region.grid(grid.shape)
    if not (np.allclose(ref.edges0, grid.edges0, rtol=1e-12, atol=0)
            and np.allclose(ref.edges1, grid.edges1, rtol=1e-12, atol=0)):
        raise InputError(f"{run.path}: intensity.nc's grid does not match the run's space specification; "
                         "re-run `sceneprior fit`")
    w = np.asarray(run.intensity["window_area"].values, dtype=float)
    return region, grid, w


def region_dict(region) -> dict:
    """The region section of the file (bounds, masks with their geometry)."""
    from .geometry import PolygonMask

    frame = region.frame
    masks = []
    for m in region.masks:
        if isinstance(m, PolygonMask):
            masks.append({"name": m.name, "kind": "polygon", "vertices": np.asarray(m.vertices).tolist()})
        else:
            masks.append({"name": m.name, "kind": "sector", "range": list(m.range), "bearing": list(m.bearing)})
    return {
        "frame": frame,
        "axes": ["x", "y"] if frame == "cartesian" else ["range", "bearing"],
        "axis_units": ["m", "m"] if frame == "cartesian" else ["m", "degree"],
        "bounds": [list(region.bounds0), list(region.bounds1)],
        "masks": masks,
        "region_area_m2": float(region.area()),
        "window_area_m2": float(region.window_area()),
        "conventions": CONVENTIONS,
    }


# ----------------------------------------------------------------------- helpers
def check_quantile(quantile) -> float | None:
    """None, or a float strictly inside (0, 1); InputError (a ValueError) otherwise."""
    if quantile is None:
        return None
    try:
        q = float(quantile)
    except (TypeError, ValueError):
        raise InputError(f"--quantile must be a number strictly between 0 and 1, got {quantile!r}") from None
    if not (math.isfinite(q) and 0.0 < q < 1.0):
        raise InputError(f"--quantile must lie strictly between 0 and 1 (e.g. 0.95 for a conservative "
                         f"clutter map), got {quantile!r}")
    return q


def _grid_list(a: np.ndarray, masked: np.ndarray) -> list:
    out = np.where(masked, np.nan, a).astype(float)
    return [[None if not math.isfinite(v) else float(v) for v in row] for row in out]


def _versions() -> dict:
    import platform

    return {"sceneprior": __version__, "python": platform.python_version(), "numpy": np.__version__}


def _model_entry(summary: dict, key: str):
    """``summary[key]``, or the model kind's own summary section's ``key``."""
    if isinstance(summary.get(key), dict):
        return summary[key]
    own = summary.get(summary.get("model", {}).get("kind", ""))
    return own.get(key) if isinstance(own, dict) else None


def _cardinality(summary: dict, rate: float) -> dict:
    od = _model_entry(summary, "overdispersion")
    if isinstance(od, dict) and isinstance(od.get("phi"), dict) and od["phi"].get("mean", 0) > 0:
        phi = float(od["phi"]["mean"])
        return {
            "distribution": "negative_binomial",
            "mean": rate,
            "phi": phi,
            "phi_posterior": od["phi"],
            "variance": rate + phi * rate * rate,
            "scipy_nbinom": {"n": 1.0 / phi, "p": 1.0 / (1.0 + phi * rate)},
            "note": "per-scan count of clutter detections: a per-scan factor u ~ Gamma(1/φ, 1/φ) "
                    "multiplies the intensity; integrated out, the count is negative binomial with "
                    "mean = rate, variance = rate + φ·rate² (point value: posterior mean of φ)",
        }
    return {"distribution": "poisson", "mean": rate,
            "note": "per-scan count of clutter detections given the exported map: Poisson(rate) "
                    "(the model has no over-dispersion term)"}


def _birth(summary: dict, region_sec: dict):
    b = _model_entry(summary, "birth")
    if not isinstance(b, dict) or not b.get("components"):
        return None
    comps = []
    for c in b["components"]:
        comps.append({k: c[k] for k in ("weight", "weight_sd", "weight_in_region", "mass_in_region",
                                        "mean", "cov") if k in c})
    out = {
        "model": "gaussian_mixture",
        "units": b.get("units", "expected new objects per step"),
        "state_axes": list(b.get("state_axes", ["x", "y"])),
        "state_units": list(b.get("state_units", ["m", "m"])),
        "weights": "untruncated",
        "weights_note": "'weight' is the untruncated w_j (expected count per step over the whole "
                        "plane); 'weight_in_region' = w_j·P_j(R) is what falls inside the region",
        "components": comps,
        "region": b.get("region") or _birth_region(region_sec),
    }
    for k in ("rate_per_step", "labelling", "step_duration_s"):
        if k in b:
            out[k] = b[k]
    return out


def _birth_region(region_sec: dict) -> dict:
    if region_sec["frame"] != "cartesian":
        raise InputError("summary.json 'birth' has no state-space 'region' and the clutter region is polar; "
                         "the birth model must record the region its positions live in")
    return region_sec


# ----------------------------------------------------------------------- main
def site_choice(run, site: str | None) -> tuple[int, str] | None:
    """(index, name) of the site whose map a run with a map per site (kind ``lgcp_sites``:
    intensity.nc has a ``site`` dimension) exports, or None for other runs. Such a run needs
    ``site``; other runs refuse it (InputError, one line)."""
    ds = run.intensity
    if "site_intensity_mean" not in ds:
        if site is not None:
            raise InputError(f"{run.path}: --site applies to runs with a map per site (kind \"lgcp_sites\"); run "
                             f"{run.name} is '{run.summary['model']['kind']}' with one map")
        return None
    sites = [str(x) for x in ds["site"].values]
    if site is None:
        raise InputError(f"{run.path}: run {run.name} has a map per site ({', '.join(sites)}); choose one with "
                         "--site NAME")
    if str(site) not in sites:
        raise InputError(f"{run.path}: no site {site!r} in run {run.name}; its sites: {', '.join(sites)}")
    return sites.index(str(site)), str(site)


def _site_gate(run, g, j_name, override_gate: bool) -> None:
    """Add the per-cell checks over every site's cells (results.site_cell_checks, from
    cell_draws.nc) to the gate verdict ``g`` of a run with a map per site; raise
    ConvergenceGateError (exit 3) when they fail and the gate is not overridden."""
    from .errors import ConvergenceGateError
    from .results import site_cell_checks

    cd = run.cell_draws
    window = np.asarray(run.intensity["window_area"].values).reshape(-1) > 0
    checks, notes = site_cell_checks(np.asarray(cd["site_intensity"].values), window,
                                     int(run.summary["diagnostics"]["chains"]),
                                     int(cd.attrs.get("draws_total", cd.sizes["sample"])),
                                     int(cd.attrs.get("thinning", 1)))
    g.checks.extend(checks)
    g.notes.extend(notes)
    if not g.passed and not override_gate:
        raise ConvergenceGateError(f"run {run.name}: {g.message()}; nothing exported "
                                   "(--override-gate exports anyway and records it in the file)")


def build_config(run, quantile: float | None = None, override_gate: bool = False,
                 detection=None, birth=None, site: str | None = None) -> dict:
    """The tracker configuration (a dict) of a loaded run. Raises ConvergenceGateError when
    the gate fails and ``override_gate`` is false; InputError on a bad quantile.

    ``site``: for a run with a map per site (kind ``lgcp_sites``), the site whose map, rate
    posterior and cardinality are exported (required there, refused elsewhere); the gate
    then also judges every site's cells.

    ``detection``: a detection run (path or :class:`~sceneprior.detprob.DetectionRun`)
    whose P_D(range) goes into ``detection_probability``; ``birth``: a birth-mixture run
    (path or Run) whose mixture goes into ``birth``. Both must pass their own convergence
    gate (or ``override_gate``); see :func:`_combine`."""
    from .gate import require

    q = check_quantile(quantile)
    chosen = site_choice(run, site)
    g = require(run, quantile=q is not None, override=override_gate)
    if chosen is not None:
        _site_gate(run, g, chosen, override_gate)
    s = run.summary
    region, grid, w = run_geometry(run)
    ds = run.intensity
    n0, n1 = grid.shape
    masked = ~(w > 0)
    var = "intensity" if chosen is None else "site_intensity"

    def pick(a):  # the chosen site's slice of a per-site array (site axis first after draws)
        return a if chosen is None else a[chosen[0]]

    if q is None:
        lam = pick(np.asarray(ds[f"{var}_mean"].values, dtype=float))
        estimate = {"kind": "posterior_mean", "quantile": None,
                    "source": f"intensity.nc '{var}_mean' (all posterior draws, float64)",
                    "draws_used": int(s["diagnostics"]["chains"] * s["diagnostics"]["draws"]),
                    "note": "per-cell posterior mean of the intensity; its integral is the posterior "
                            "mean of the rate"}
    else:
        cd = run.cell_draws
        draws = np.asarray(cd[var].values, dtype=np.float64)
        draws = draws if chosen is None else draws[:, chosen[0]]
        if draws.shape[1] != n0 * n1:
            raise InputError(f"{run.path / 'cell_draws.nc'}: {draws.shape[1]} cells, the grid has {n0 * n1}")
        lam = np.quantile(draws, q, axis=0).reshape(n0, n1)
        estimate = {"kind": "quantile", "quantile": q,
                    "source": f"cell_draws.nc '{var}': per-cell {q:g} quantile over "
                              f"{draws.shape[0]} kept draws (thinning {int(cd.attrs.get('thinning', 1))}, "
                              "float32 draws, quantile in float64)",
                    "draws_used": int(draws.shape[0]),
                    "note": "per-cell quantile map (conservative clutter map for q > 0.5); its integral is "
                            "NOT a quantile of the rate — the rate's own posterior is given beside it"}
    lam = np.where(masked, np.nan, lam)
    rate_value = float(np.sum(np.where(masked, 0.0, lam) * w))
    if not rate_value > 0:
        raise InputError(f"{run.path}: the exported map integrates to {rate_value}; nothing to export")
    density = lam / rate_value
    rate_post = s["rate"] if chosen is None else s[s["model"]["kind"]]["sites"][chosen[1]]["rate"]
    post = {k: rate_post[k] for k in ("mean", "sd", "q05", "q50", "q95")}
    vals = lam[~masked]
    uniform = None
    if vals.size and np.ptp(vals) == 0:
        uniform = {"intensity": float(vals[0]), "intensity_units": "m-2 scan-1",
                   "density": float(1.0 / float(np.sum(w))), "density_units": "m-2"}
    reg = region_dict(region)
    clutter = {
        "spatial_model": "uniform" if uniform is not None else "grid",
        "model_kind": s["model"]["kind"],
        "rate": {
            "value": rate_value,
            "units": "detections per scan",
            "definition": "integral of the exported intensity map over the window: Σ_c λ_c·|c ∩ W|",
            "posterior": post,
            "interval_90": [post["q05"], post["q95"]],
            "interval_note": "5–95 % posterior interval of the rate itself (summary.json), not the "
                             "integral of per-cell interval maps",
        },
        "uniform": uniform,
        "grid": {
            "frame": grid.frame,
            "axes": list(grid.axes),
            "edge_units": ["m", "m"] if grid.frame == "cartesian" else ["m", "degree"],
            "shape": [n0, n1],
            "edges": [np.asarray(grid.edges0).tolist(), np.asarray(grid.edges1).tolist()],
            "cell_order": "values[i0][i1]: i0 along axes[0] (x or range), i1 along axes[1] (y or "
                          "bearing); cells half-open [lo, hi), the last one closed",
            "window_area_m2": np.asarray(w, float).tolist(),
            "cell_area_m2": np.asarray(ds["cell_area"].values, float).tolist(),
            "masked": masked.tolist(),
            "masked_note": "true: no area inside the window (permanent mask); values are null there. "
                           "A cell cut by a mask applies its value to its part inside the window only",
            "extrapolated": ((np.asarray(ds["extrapolated"].values, bool) if "extrapolated" in ds
                              else np.zeros((n0, n1), bool)) & ~masked).tolist(),
            "extrapolated_note": ("true: inside the window but without exposure (gated out in every scan), so no "
                                  "detection could be seen there: " + extrapolation_note(s["model"]["kind"])
                                  + "; the value is kept in the map"),
        },
        "intensity": {"units": "m-2 scan-1", "values": _grid_list(lam, masked)},
        "density": {"units": "m-2", "values": _grid_list(density, masked)},
        "intensity_sd": {"units": "m-2 scan-1", "values": _grid_list(pick(np.asarray(ds[f"{var}_sd"].values, float)),
                                                                       masked),
                         "note": "per-cell posterior sd of the intensity (all draws)"},
        "interpolation": dict(INTERPOLATION),
    }
    if chosen is not None:
        column = (s.get(s["model"]["kind"]) or {}).get("site_column", "site")
        clutter["site"] = {"name": chosen[1], "column": column,
                           "note": f"the map, rate and cardinality of site {chosen[1]!r} of a run fitted to several "
                                   "sites (a shared field plus site deviations); export each site separately"}
        estimate["site"] = chosen[1]
    if grid.frame == "polar":
        r_mid = 0.5 * (grid.edges0[:-1] + grid.edges0[1:])
        clutter["intensity_polar"] = {
            "units": "m-1 rad-1 scan-1", "values": _grid_list(lam * r_mid[:, None], masked),
            "note": "cell average per m of range per rad of bearing, λ_c·(r1 + r2)/2; pointwise the "
                    "intensity per m·rad is λ_c·r (what the evaluator returns for polar points)"}
    doc = {
        "schema": TRACKER_SCHEMA,
        "generator": {"name": "sceneprior", "version": __version__},
        "caution": CAUTION,
        "quantities": dict(QUANTITIES),
        "estimate": estimate,
        "region": reg,
        "clutter": clutter,
        "cardinality": _cardinality(s, rate_value),
        "birth": _birth(s, reg),
        "gate": {**g.to_dict(), "overridden": bool(override_gate and not g.passed)},
        "provenance": {
            "run": s["run"],
            "run_dir": str(Path(run.path).resolve()),
            "model": s["model"],
            "spec": s["data"].get("spec"),
            "spec_sha256": s["data"].get("spec_sha256"),
            "inputs_sha256": s["data"].get("inputs_sha256", {}),
            "seed": s["sampler"]["seed"],
            "sampler": s["sampler"],
            "data": {k: s["data"][k] for k in ("scans", "empty_scans", "detections_used", "dropped_in_masks",
                                               "dropped_outside_bounds") if k in s["data"]},
            "fit_versions": s.get("versions", {}),
            "export_versions": _versions(),
            "summary_written_utc": s.get("written_utc"),
            "exported_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            # the fit's own warnings (e.g. a truncated LGCP field whose intervals may be too narrow)
            "model_notes": model_notes(s),
        },
    }
    if doc["gate"]["overridden"]:
        doc["gate"]["override_note"] = ("exported with --override-gate although the convergence gate "
                                        "failed; do not use operationally before the fit converges")
    _combine(doc, run, reg, detection, birth, override_gate)
    return doc


def _write_json(doc: dict, path: Path) -> None:
    from .jsonio import write_json_atomic

    write_json_atomic(path, doc, indent=1, allow_nan=False)


def export_run(run, quantile: float | None = None, override_gate: bool = False,
               out: str | Path | None = None, detection=None, birth=None,
               site: str | None = None) -> tuple[dict, list[Path]]:
    """Export a run (a path or a loaded Run): writes RUN/tracker.json (RUN/tracker-SITE.json
    for one site of a run with a map per site) and, with ``out``, a copy there; ``detection``
    / ``birth`` add the P_D and birth sections of other runs, ``site`` picks a site's map
    (:func:`build_config`). Returns (document, paths written)."""
    if not hasattr(run, "summary"):
        run = open_run_as(run, "RUN")
    check_quantile(quantile)
    doc = build_config(run, quantile=quantile, override_gate=override_gate, detection=detection, birth=birth,
                       site=site)
    chosen = doc["clutter"].get("site")
    safe = None if chosen is None else "".join(ch if ch.isalnum() or ch in "._-" else "_" for ch in chosen["name"])
    name = TRACKER_FILE if chosen is None else f"{Path(TRACKER_FILE).stem}-{safe}.json"
    paths = [Path(run.path) / name]
    if out is not None:
        paths.append(Path(out))
    for p in paths:
        _write_json(doc, p)
    return doc, paths


def describe(doc: dict, paths) -> str:
    """Short human summary of an export (the CLI prints it)."""
    c = doc["clutter"]
    r = c["rate"]
    est = doc["estimate"]
    what = "posterior mean" if est["kind"] == "posterior_mean" else f"per-cell {est['quantile']:g} quantile"
    at = f" (site {c['site']['name']})" if c.get("site") else ""
    lines = [f"tracker configuration of run {doc['provenance']['run']}{at} written to "
             + ", ".join(str(p) for p in paths),
             f"  map: {what} ({c['spatial_model']}, {doc['region']['frame']} frame); "
             f"rate = its integral {r['value']:.4g} detections/scan; rate posterior 90 % interval "
             f"[{r['interval_90'][0]:.4g}, {r['interval_90'][1]:.4g}]",
             f"  cardinality: {doc['cardinality']['distribution']}; birth: "
             + ("yes" if doc.get("birth") else "none in this run")
             + (f" (from run {doc['birth']['source_run']})" if (doc.get("birth") or {}).get("source_run") else "")]
    pd = doc.get("detection_probability")
    if pd:
        c = pd["curve"]
        lines.append(f"  detection probability (run {pd['provenance']['run']}): P_D {c['mean'][0]:.3f} at "
                     f"{c['range_m'][0]:.0f} m … {c['mean'][-1]:.3f} at {c['range_m'][-1]:.0f} m (posterior mean)")
    g = doc["gate"]
    lines.append("  convergence gate: " + ("passed" if g["passed"] else
                 "FAILED, overridden (recorded in the file): " + "; ".join(g["failures"])))
    lines += [f"  note from the fit: {n}" for n in doc["provenance"].get("model_notes", [])]
    lines.append(f"  caution: {doc['caution']}")
    return "\n".join(lines)


# ----------------------------------------------------------------------- combining runs
# the summary schema each export argument takes, and where each kind of run goes
_TAKES = {"RUN": SUMMARY_SCHEMA, "--birth": SUMMARY_SCHEMA, "--detection": DETECTION_SCHEMA}
_GOES = {SUMMARY_SCHEMA: "as RUN (a clutter run) or with --birth (a birth-mixture run)",
         DETECTION_SCHEMA: "with --detection"}


def open_run_as(path, argument: str):
    """The run given to ``sceneprior export`` as ``argument`` ("RUN", "--birth" or
    "--detection"), its summary schema checked first: a run of another kind is refused in one
    line that names its kind and the argument that takes it (InputError, exit 2)."""
    from .detprob import DetectionRun
    from .results import RUN_KINDS

    want = _TAKES[argument]
    try:
        got = json.loads((Path(path) / "summary.json").read_text(encoding="utf-8")).get("schema")
    except (OSError, ValueError, AttributeError):
        got = None  # no readable summary: the run's own reader says what is wrong
    if got != want and got in _GOES:
        raise InputError(f"{path}: a {RUN_KINDS[got]} (summary schema {got!r}), given as {argument}; "
                         f"`sceneprior export` takes it {_GOES[got]}")
    return DetectionRun(path) if want == DETECTION_SCHEMA else load_run(path)


def _spec_sensor(summary: dict):
    raw = (summary.get("data") or {}).get("spec_content") or {}
    return raw.get("sensor")


def _combine(doc: dict, run, region_sec: dict, detection, birth, override_gate: bool) -> None:
    """Add the detection-probability and birth sections of other runs to ``doc``.

    Checks (InputError, exit 2, one line): the detection run's region (frame, bounds, masks)
    is the clutter run's — P_D is a function on the same measurement space; the birth run
    fits Cartesian state space, and both runs place the sensor alike (``[sensor]`` of both
    specs equal, or absent in both), so that birth positions and the clutter map share one
    frame; the clutter run has no birth mixture of its own. Each run passes its own
    convergence gate, or ``override_gate`` is set (and recorded)."""
    if detection is not None:
        doc["detection_probability"] = detection_section(detection, region_sec, override_gate)
    if birth is not None:
        if doc.get("birth"):
            raise InputError(f"{run.path}: the clutter run has a birth mixture of its own; export it without "
                             "--birth, or export a clutter-only run with --birth")
        from .gate import require

        brun = birth if hasattr(birth, "summary") else open_run_as(birth, "--birth")
        g = require(brun, override=override_gate)
        if _spec_sensor(brun.summary) != _spec_sensor(run.summary):
            raise InputError(f"{brun.path}: the birth run's [sensor] placement {_spec_sensor(brun.summary)!r} differs "
                             f"from the clutter run's {_spec_sensor(run.summary)!r}; fit both in one frame")
        bregion = region_dict(run_region(brun))
        if bregion["frame"] != "cartesian":
            raise InputError(f"{brun.path}: a birth run must be fitted in Cartesian state space (x, y in m); "
                             f"its space is {bregion['frame']}")
        section = _birth(brun.summary, bregion)
        if section is None:
            raise InputError(f"{brun.path}: run {brun.name} has no birth mixture (fit a 'mixture' model to the "
                             "birth events, e.g. models/lowmarsh-birth.toml)")
        section["source_run"] = brun.name
        section["convergence"] = {"passed": g.passed, "overridden": bool(override_gate and not g.passed),
                                  "failures": [c.describe() for c in g.failures]}
        section["provenance"] = _run_provenance(brun.summary, brun.path)
        doc["birth"] = section


def _run_provenance(summary: dict, path) -> dict:
    d = summary.get("data", {})
    return {"run": summary.get("run"), "run_dir": str(Path(path).resolve()), "spec": d.get("spec"),
            "inputs_sha256": d.get("inputs_sha256", {}), "seed": summary.get("sampler", {}).get("seed")}


def _same_region(a: dict, b: dict) -> bool:
    keys = ("frame", "bounds", "masks")
    return all(json.dumps(a[k], sort_keys=True) == json.dumps(b[k], sort_keys=True) for k in keys)


def detection_section(detection, region_sec: dict | None, override_gate: bool = False) -> dict:
    """The ``detection_probability`` section from a detection run (models/detection.py):
    the posterior of P_D(r) on a fine range curve (mean, 5/50/95 %) and per range bin, the
    coefficients, the association gate, and provenance. ``region_sec`` (the clutter
    export's region) must equal the detection run's region (frame, bounds, masks)."""
    from .detprob import gate_entry

    drun = detection if hasattr(detection, "dataset") else open_run_as(detection, "--detection")
    s = drun.summary
    if region_sec is not None and not _same_region(s["region"], region_sec):
        raise InputError(f"{drun.path}: the detection run's region (frame {s['region']['frame']}, bounds "
                         f"{s['region']['bounds']}) differs from the clutter run's (frame {region_sec['frame']}, "
                         f"bounds {region_sec['bounds']}); fit P_D on the clutter run's recording spec")
    g = gate_entry(s["diagnostics"], drun.posterior.posterior)
    if not g["converged"] and not override_gate:
        from .errors import ConvergenceGateError

        raise ConvergenceGateError(f"detection run {drun.name}: {'; '.join(g['failures'])}; nothing exported "
                                   "(--override-gate exports anyway and records it in the file)")
    ds = drun.dataset
    pick = ("mean", "q05", "q50", "q95")
    curve = {"range_m": ds["curve_range"].values.tolist(),
             **{k: ds[f"pd_curve_{k}"].values.tolist() for k in pick}}
    bins = {"edges_m": ds["range_bin_edges"].values.tolist(),
            **{k: ds[f"pd_bin_{k}"].values.tolist() for k in pick},
            "object_scans": ds["bin_object_scans"].values.astype(int).tolist(),
            "detected": ds["bin_detected"].values.astype(int).tolist()}
    return {
        "model": "logit_linear_range",
        "quantity": "P_D: probability per scan that an object present in the window yields a detection inside "
                    "its gate",
        "units": "probability (dimensionless), per scan",
        "link": "logit P_D(r) = a + b·r, r = range from the sensor (origin) in m",
        "coefficients": {k: s["coefficients"][k] for k in ("intercept_at_0_m", "slope_per_km")},
        "curve": curve,
        "curve_note": "per range, the posterior mean and 5/50/95 % quantiles of P_D(r) (the mean is not the "
                      "logistic of the mean coefficients); the evaluator interpolates linearly in range",
        "range_bins": bins,
        "association_gate": s["data"].get("gate"),
        "clutter_in_gate": s["model"].get("clutter_in_gate"),
        "region": s["region"],
        "convergence": {"passed": g["converged"], "overridden": bool(override_gate and not g["converged"]),
                        "failures": g["failures"]},
        "provenance": {**_run_provenance(s, drun.path), "spec": s["data"].get("spec"),
                       "recording_spec": s["data"].get("recording_spec")},
    }
