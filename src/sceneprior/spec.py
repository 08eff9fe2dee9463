"""Fit specifications: TOML files (models/*.toml) turned into validated dataclasses.

This module owns every user-facing message about a specification. Paths inside a
specification are resolved relative to the specification file's own folder, so a spec
can be copied together with its data. ``models/template.toml`` documents every key.
"""

from __future__ import annotations

import difflib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import InputError

# Allowed keys, table by table. A value of dict means a sub-table with its own keys;
# "list-of-tables" entries (TOML [[...]]) are listed in _ARRAY_TABLES.
_SCHEMA: dict[str, Any] = {
    "name": None,
    "description": None,
    "data": {
        "detections": None,
        "scans": None,
        "n_scans": None,
        "outside": None,
        "columns": {"scan": None, "x": None, "y": None, "range": None, "bearing": None},
    },
    "space": {
        "frame": None,
        "x": None,
        "y": None,
        "range": None,
        "bearing": None,
        "cells": None,
        "masks": None,
    },
    "model": {
        "kind": None,
        "prior": None,  # free table: each model kind checks its own prior keys
        "covariates": None,  # loglinear
        "rasters": None,  # loglinear: [[model.rasters]] name, file
        "kernel": None,  # lgcp
        "variance_kept": None,  # lgcp: spectral truncation
        "dropped_modes": None,  # lgcp: what a truncated field does with the dropped variance
        "components": None,  # mixture
        "diagonal": None,  # mixture
    },
    "sampler": {
        "method": None,
        "chains": None,
        "warmup": None,
        "draws": None,
        "seed": None,
        "progress": None,
    },
    "output": {"dir": None, "draws_budget_mb": None, "thresholds": None},
    "zones": None,  # [[zones]]: name + polygon (x, y m) or range/bearing intervals
}
_MASK_KEYS = {"name": None, "polygon": None, "range": None, "bearing": None}

MODEL_KINDS = ("uniform", "loglinear", "lgcp", "mixture")
# model-table keys each kind accepts besides kind and prior
MODEL_OPTIONS = {"uniform": (), "loglinear": ("covariates", "rasters"),
                 "lgcp": ("kernel", "variance_kept", "dropped_modes"), "mixture": ("components", "diagonal")}
#: default memory budget of the kept per-cell draws [MB] (output.draws_budget_mb)
DRAWS_BUDGET_MB = 1024
FRAMES = ("cartesian", "polar")

# Per-scan terms (any binned kind), the sites model and the sensor's placement (issue 6).
SCAN_OPTIONS = ("overdispersion", "scan_covariates", "time")
_SCHEMA["model"].update({"overdispersion": None, "scan_covariates": None, "site_column": None,
                         "time": {"bins": None, "width_s": None, "column": None}})
_SCHEMA["sensor"] = {"x": None, "y": None, "heading": None, "frame": None}
MODEL_KINDS = MODEL_KINDS + ("sites",)
MODEL_OPTIONS = {k: tuple(v) + SCAN_OPTIONS for k, v in MODEL_OPTIONS.items()}
MODEL_OPTIONS["sites"] = ("site_column",)
SITE_KINDS = ("sites", "lgcp_sites")  # kinds that read a site column of the scans table
MODEL_KINDS = MODEL_KINDS + ("lgcp_sites",)
MODEL_OPTIONS["lgcp_sites"] = ("kernel", "site_column")

# Known objects and their gates (issue 7): an objects table named in [data], gate options in
# [data.gates], its column names in [data.columns] beside the detections' ones.
OBJECT_COLUMNS = ("object", "gate_radius", "cov_xx", "cov_xy", "cov_yy")
_SCHEMA["data"]["objects"] = None
_SCHEMA["data"]["gates"] = {"radius": None, "probability": None}
_SCHEMA["data"]["columns"].update({k: None for k in OBJECT_COLUMNS})


def _suggest(key: str, allowed) -> str:
    close = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.5)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _check_keys(table: dict, schema: dict, where: str, source: str) -> None:
    for key, value in table.items():
        if key not in schema:
            allowed = ", ".join(sorted(schema))
            raise InputError(
                f"{source}: unknown key '{key}' in [{where or 'top level'}]"
                f"{_suggest(key, schema)}; allowed keys: {allowed}"
            )
        sub = schema[key]
        if isinstance(sub, dict):
            if not isinstance(value, dict):
                raise InputError(f"{source}: '{_join(where, key)}' must be a table ([{_join(where, key)}])")
            _check_keys(value, sub, _join(where, key), source)
    if where == "" and "zones" in table:
        zones = table["zones"]
        if not isinstance(zones, list) or not all(isinstance(z, dict) for z in zones):
            raise InputError(f"{source}: 'zones' must be a list of tables ([[zones]])")
        for i, z in enumerate(zones):
            _check_keys(z, _MASK_KEYS, f"zones #{i + 1}", source)
    if where == "space" and "masks" in table:
        masks = table["masks"]
        if not isinstance(masks, list) or not all(isinstance(m, dict) for m in masks):
            raise InputError(f"{source}: 'space.masks' must be a list of tables ([[space.masks]])")
        for i, m in enumerate(masks):
            _check_keys(m, _MASK_KEYS, f"space.masks #{i + 1}", source)


def _join(where: str, key: str) -> str:
    return f"{where}.{key}" if where else key


@dataclass(frozen=True)
class DataSpec:
    detections: Path
    scans: Path | None
    n_scans: int | None
    outside: str  # "error" | "drop"
    columns: dict[str, str]
    objects: Path | None = None  # known objects per scan (issue 7): their gates leave the window
    gate_radius: float | None = None  # m: disc gates of this radius (unless a gate_radius column)
    gate_probability: float | None = None  # P_G: ellipse gates from covariance columns


@dataclass(frozen=True)
class MaskSpec:
    name: str
    polygon: tuple[tuple[float, float], ...] | None = None
    range: tuple[float, float] | None = None
    bearing: tuple[float, float] | None = None


@dataclass(frozen=True)
class SpaceSpec:
    frame: str
    bounds0: tuple[float, float]  # x [m] or range [m]
    bounds1: tuple[float, float]  # y [m] or bearing [deg]
    cells: tuple[int, int]
    masks: tuple[MaskSpec, ...] = ()


@dataclass(frozen=True)
class SamplerSpec:
    method: str = "nuts"  # "nuts" | "exact" (conjugate models only)
    chains: int = 4
    warmup: int = 500
    draws: int = 1000
    seed: int = 0
    progress: bool = True


@dataclass(frozen=True)
class ModelSpec:
    kind: str
    prior: dict[str, float] = field(default_factory=dict)
    options: dict = field(default_factory=dict)  # kind-specific keys (covariates, rasters, ...)


@dataclass(frozen=True)
class FitSpec:
    name: str
    data: DataSpec
    space: SpaceSpec
    model: ModelSpec
    sampler: SamplerSpec
    output_dir: Path
    draws_budget_mb: float
    source: str  # the file it came from (for messages and provenance)
    zones: tuple[MaskSpec, ...] = ()  # named sub-areas with their own rate posterior
    thresholds: tuple[float, ...] = ()  # intensities [m⁻² scan⁻¹] for exceedance maps
    raw: dict = field(default_factory=dict, compare=False, repr=False)
    sensor: SensorSpec | None = None  # placement in a shared Cartesian frame (compare)


def _pair(value, key: str, source: str) -> tuple[float, float]:
    if (
        not isinstance(value, (list, tuple))
        or len(value) != 2
        or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)
    ):
        raise InputError(f"{source}: '{key}' must be two numbers [low, high], got {value!r}")
    lo, hi = float(value[0]), float(value[1])
    if not hi > lo:
        raise InputError(f"{source}: '{key}' must be increasing [low, high], got {value!r}")
    return lo, hi


def _int(value, key: str, source: str, minimum: int = 1) -> int:
    if not isinstance(value, int) or isinstance(value, bool) or value < minimum:
        raise InputError(f"{source}: '{key}' must be a whole number ≥ {minimum}, got {value!r}")
    return value


def _area_spec(m: dict, i: int, what: str, frame: str, b0, b1, source: str) -> MaskSpec:
    """A mask or zone: a polygon (x, y in m) or range/bearing intervals (polar frames)."""
    mname = str(m.get("name", f"{what} {i + 1}"))
    if "polygon" in m:
        if "range" in m or "bearing" in m:
            raise InputError(f"{source}: {what} '{mname}' has both 'polygon' and range/bearing; give one")
        poly = m["polygon"]
        try:
            verts = tuple((float(p[0]), float(p[1])) for p in poly if len(p) == 2)
        except (TypeError, ValueError):
            verts = ()
        if not isinstance(poly, list) or len(verts) != len(poly) or len(verts) < 3:
            raise InputError(f"{source}: {what} '{mname}': 'polygon' must be ≥ 3 [x, y] pairs in metres")
        return MaskSpec(name=mname, polygon=verts)
    if "range" in m or "bearing" in m:
        if frame != "polar":
            raise InputError(f"{source}: {what} '{mname}': range/bearing intervals need a polar space; "
                             "use 'polygon' on a cartesian space")
        r = _pair(m.get("range", list(b0)), f"{what} '{mname}' range", source)
        b = _pair(m.get("bearing", list(b1)), f"{what} '{mname}' bearing", source)
        return MaskSpec(name=mname, range=r, bearing=b)
    raise InputError(f"{source}: {what} '{mname}' needs 'polygon' (x, y in m) or 'range'/'bearing' (polar)")


def load_spec(path: str | Path, overrides: dict | None = None) -> FitSpec:
    """Read and validate a TOML fit specification. ``overrides`` is merged on top (used by
    the demo and by tests); its paths are taken as given (absolute or relative to cwd)."""
    path = Path(path)
    source = str(path)
    if not path.is_file():
        raise InputError(f"{source}: specification file not found")
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"{source}: not a UTF-8 text file ({exc.reason})") from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{source}: cannot parse TOML: {exc}") from None
    return spec_from_dict(raw, base_dir=path.parent, source=source, overrides=overrides)


def _merge(base: dict, over: dict) -> dict:
    out = dict(base)
    for k, v in over.items():
        if isinstance(v, dict) and isinstance(out.get(k), dict):
            out[k] = _merge(out[k], v)
        else:
            out[k] = v
    return out


def spec_from_dict(
    raw: dict, base_dir: Path, source: str = "<spec>", overrides: dict | None = None
) -> FitSpec:
    """Validate a specification given as a dict (parsed TOML)."""
    _check_keys(raw, _SCHEMA, "", source)
    if overrides:
        _check_keys(overrides, _SCHEMA, "", "overrides")
        raw = _merge(raw, overrides)
    over_paths = _flat_paths(overrides or {})

    def resolve(key: str, value) -> Path:
        if not isinstance(value, str) or not value:
            raise InputError(f"{source}: '{key}' must be a file path (a string)")
        p = Path(value)
        if key in over_paths or p.is_absolute():
            return p
        return (base_dir / p).resolve()

    name = raw.get("name")
    if not isinstance(name, str) or not name or "/" in name or name.startswith("."):
        raise InputError(f"{source}: 'name' (the run's name under the output folder) is required, "
                         "a plain name such as \"lowmarsh-uniform\"")

    # --- data ---
    d = raw.get("data")
    if not isinstance(d, dict) or "detections" not in d:
        raise InputError(f"{source}: [data] needs 'detections' (path to a CSV or Parquet table)")
    outside = d.get("outside", "error")
    if outside not in ("error", "drop"):
        raise InputError(f"{source}: 'data.outside' must be \"error\" or \"drop\", got {outside!r}")
    n_scans = d.get("n_scans")
    if n_scans is not None:
        n_scans = _int(n_scans, "data.n_scans", source)
    scans = resolve("data.scans", d["scans"]) if "scans" in d else None
    if scans is not None and n_scans is not None:
        raise InputError(f"{source}: give either 'data.scans' (a scans table) or 'data.n_scans', not both")
    if scans is None and n_scans is None:
        raise InputError(
            f"{source}: no scan list: set 'data.scans' (a table with one row per scan, empty "
            "scans included) or 'data.n_scans' (scan ids 0..n-1); without it empty scans are "
            "invisible and the rate would be biased upward"
        )
    columns = {k: k for k in ("scan", "x", "y", "range", "bearing") + OBJECT_COLUMNS}
    for k, v in (d.get("columns") or {}).items():
        if not isinstance(v, str) or not v:
            raise InputError(f"{source}: 'data.columns.{k}' must be a column name (a string)")
        columns[k] = v
    objects = resolve("data.objects", d["objects"]) if "objects" in d else None
    gate_radius, gate_probability = _gate_options(d.get("gates"), objects, source)
    data = DataSpec(
        detections=resolve("data.detections", d["detections"]),
        scans=scans,
        n_scans=n_scans,
        outside=outside,
        columns=columns,
        objects=objects,
        gate_radius=gate_radius,
        gate_probability=gate_probability,
    )

    # --- space ---
    s = raw.get("space")
    if not isinstance(s, dict):
        raise InputError(f"{source}: [space] is required (frame, bounds, cells)")
    frame = s.get("frame")
    if frame not in FRAMES:
        raise InputError(f"{source}: 'space.frame' must be \"cartesian\" or \"polar\", got {frame!r}")
    k0, k1 = ("x", "y") if frame == "cartesian" else ("range", "bearing")
    other = ("range", "bearing") if frame == "cartesian" else ("x", "y")
    for k in other:
        if k in s:
            raise InputError(f"{source}: 'space.{k}' does not belong to a {frame} space; use "
                             f"'space.{k0}' and 'space.{k1}'")
    for k in (k0, k1, "cells"):
        if k not in s:
            raise InputError(f"{source}: [space] of a {frame} frame needs '{k}'")
    b0 = _pair(s[k0], f"space.{k0}", source)
    b1 = _pair(s[k1], f"space.{k1}", source)
    cells = s["cells"]
    if not isinstance(cells, list) or len(cells) != 2:
        raise InputError(f"{source}: 'space.cells' must be two whole numbers [{k0} cells, {k1} cells]")
    cells = (_int(cells[0], "space.cells", source), _int(cells[1], "space.cells", source))
    masks = [_area_spec(m, i, "mask", frame, b0, b1, source) for i, m in enumerate(s.get("masks", []))]
    space = SpaceSpec(frame=frame, bounds0=b0, bounds1=b1, cells=cells, masks=tuple(masks))

    # --- model ---
    mdl = raw.get("model")
    if not isinstance(mdl, dict) or "kind" not in mdl:
        raise InputError(f"{source}: [model] needs 'kind' (one of: {', '.join(MODEL_KINDS)})")
    kind = mdl["kind"]
    if kind not in MODEL_KINDS:
        raise InputError(f"{source}: unknown model kind {kind!r}{_suggest(str(kind), MODEL_KINDS)}; "
                         f"available: {', '.join(MODEL_KINDS)}")
    prior = {}
    if not isinstance(mdl.get("prior", {}), dict):
        raise InputError(f"{source}: 'model.prior' must be a table ([model.prior])")
    for k, v in (mdl.get("prior") or {}).items():
        if not isinstance(v, (int, float)) or isinstance(v, bool) or not v > 0:
            raise InputError(f"{source}: 'model.prior.{k}' must be a positive number, got {v!r}")
        prior[k] = float(v)
    options = {}
    for k in _SCHEMA["model"]:
        if k in ("kind", "prior") or k not in mdl:
            continue
        if k not in MODEL_OPTIONS[kind]:
            raise InputError(f"{source}: 'model.{k}' does not apply to model kind '{kind}'")
        options[k] = mdl[k]
    if "rasters" in options:
        rasters = options["rasters"]
        if not isinstance(rasters, list) or not all(isinstance(r, dict) for r in rasters):
            raise InputError(f"{source}: 'model.rasters' must be a list of tables ([[model.rasters]])")
        resolved = []
        for i, r in enumerate(rasters):
            if set(r) - {"name", "file"} or "name" not in r or "file" not in r:
                raise InputError(f"{source}: model.rasters #{i + 1} needs exactly 'name' and 'file'")
            resolved.append({"name": str(r["name"]), "file": resolve(f"model.rasters.{r['name']}", r["file"])})
        options["rasters"] = resolved
    if "covariates" in options:
        cov = options["covariates"]
        if not isinstance(cov, list) or not all(isinstance(c, str) for c in cov):
            raise InputError(f"{source}: 'model.covariates' must be a list of names, e.g. [\"log_range\", \"bearing\"]")
    kind, options = _per_scan_options(kind, options, data, source)
    model = ModelSpec(kind=kind, prior=prior, options=options)

    # --- sampler ---
    smp = raw.get("sampler") or {}
    method = smp.get("method", "nuts")
    if method not in ("nuts", "exact"):
        raise InputError(f"{source}: 'sampler.method' must be \"nuts\" or \"exact\", got {method!r}")
    progress = smp.get("progress", True)
    if not isinstance(progress, bool):
        raise InputError(f"{source}: 'sampler.progress' must be true or false")
    sampler = SamplerSpec(
        method=method,
        chains=_int(smp.get("chains", 4), "sampler.chains", source),
        warmup=_int(smp.get("warmup", 500), "sampler.warmup", source, minimum=0),
        draws=_int(smp.get("draws", 1000), "sampler.draws", source),
        seed=_int(smp.get("seed", 0), "sampler.seed", source, minimum=0),
        progress=progress,
    )

    zones = tuple(_area_spec(z, i, "zone", frame, b0, b1, source) for i, z in enumerate(raw.get("zones", [])))
    names = [z.name for z in zones]
    if len(set(names)) != len(names):
        raise InputError(f"{source}: zone names must be unique, got {names}")

    out = raw.get("output") or {}
    thresholds = out.get("thresholds", [])
    if not isinstance(thresholds, list) or not all(
            isinstance(t, (int, float)) and not isinstance(t, bool) and 0 < t < float("inf") for t in thresholds):
        raise InputError(f"{source}: 'output.thresholds' must be a list of positive intensities in "
                         f"m⁻² scan⁻¹ (exceedance maps P(λ > t)), got {thresholds!r}")
    out_dir = resolve("output.dir", out["dir"]) if "dir" in out else Path("runs").resolve()
    budget = out.get("draws_budget_mb", DRAWS_BUDGET_MB)
    if not isinstance(budget, (int, float)) or isinstance(budget, bool) or budget <= 0:
        raise InputError(f"{source}: 'output.draws_budget_mb' must be a positive number of MB")

    return FitSpec(
        name=name,
        data=data,
        space=space,
        model=model,
        sampler=sampler,
        output_dir=out_dir,
        draws_budget_mb=float(budget),
        zones=zones,
        thresholds=tuple(float(t) for t in thresholds),
        source=source,
        raw=raw,
        sensor=_sensor(raw.get("sensor"), source),
    )


def _gate_options(g, objects, source: str) -> tuple[float | None, float | None]:
    """[data.gates]: ``radius`` (m, disc gates) or ``probability`` (P_G, ellipse gates from the
    objects table's covariance columns), not both; only with ``data.objects``."""
    g = g or {}
    if g and objects is None:
        raise InputError(f"{source}: [data.gates] needs 'data.objects' (a table of known objects per scan)")
    radius, prob = g.get("radius"), g.get("probability")
    if radius is not None and prob is not None:
        raise InputError(f"{source}: give either 'data.gates.radius' (disc gates, m) or "
                         "'data.gates.probability' (ellipse gates from covariance columns), not both")
    num = lambda v: isinstance(v, (int, float)) and not isinstance(v, bool)  # noqa: E731
    if radius is not None and not (num(radius) and 0 < radius < float("inf")):
        raise InputError(f"{source}: 'data.gates.radius' must be a positive number of metres, got {radius!r}")
    if prob is not None and not (num(prob) and 0 < prob < 1):
        raise InputError(f"{source}: 'data.gates.probability' must lie strictly between 0 and 1 "
                         f"(the gate probability P_G), got {prob!r}")
    return (None if radius is None else float(radius)), (None if prob is None else float(prob))


def _flat_paths(over: dict, prefix: str = "") -> set[str]:
    keys = set()
    for k, v in over.items():
        key = _join(prefix, k)
        if isinstance(v, dict):
            keys |= _flat_paths(v, key)
        else:
            keys.add(key)
    return keys


# ----------------------------------------------------------------------------- issue 6
@dataclass(frozen=True)
class SensorSpec:
    """Where the sensor stands in a shared Cartesian frame (x east, y north, metres) and
    where its local north (bearing 0, the local y axis) points: ``heading`` in degrees
    clockwise from the shared frame's north. Runs with the same ``frame`` name can be
    compared on a common grid."""

    x: float = 0.0
    y: float = 0.0
    heading: float = 0.0
    frame: str = "shared"


def _sensor(raw, source: str) -> SensorSpec | None:
    if raw is None:
        return None
    vals = {}
    for k in ("x", "y", "heading"):
        v = raw.get(k, 0.0)
        if not isinstance(v, (int, float)) or isinstance(v, bool) or v != v or abs(v) == float("inf"):
            raise InputError(f"{source}: 'sensor.{k}' must be a finite number "
                             f"({'degrees clockwise from north' if k == 'heading' else 'metres'}), got {v!r}")
        vals[k] = float(v)
    frame = raw.get("frame", "shared")
    if not isinstance(frame, str) or not frame:
        raise InputError(f"{source}: 'sensor.frame' must be the name of the shared frame (a string)")
    return SensorSpec(frame=frame, **vals)


def composite_kind(kind: str, options: dict) -> str:
    """Model kind with its per-scan terms, e.g. "uniform+overdispersion+time"."""
    tokens = [t for t in SCAN_OPTIONS if options.get(t) not in (None, False, [])]
    return "+".join([kind] + tokens)


def _per_scan_options(kind: str, options: dict, data: DataSpec, source: str):
    """Validate the per-scan options, stash the scans table for the model's setup and
    return (composite kind, options)."""
    od = options.get("overdispersion", False)
    if not isinstance(od, bool):
        raise InputError(f"{source}: 'model.overdispersion' must be true or false")
    cov = options.get("scan_covariates")
    if cov is not None and (not isinstance(cov, list) or not all(isinstance(c, str) and c for c in cov)):
        raise InputError(f"{source}: 'model.scan_covariates' must be a list of scans-table column "
                         "names, e.g. [\"rain\", \"sea_state\"]")
    if cov is not None and len(set(cov)) != len(cov):
        raise InputError(f"{source}: 'model.scan_covariates' lists a column twice")
    t = options.get("time")
    if t is not None:
        bins = t.get("bins", "calendar")
        if bins not in ("calendar", "hour_of_day"):
            raise InputError(f"{source}: 'model.time.bins' must be \"calendar\" or \"hour_of_day\", got {bins!r}")
        w = t.get("width_s", 3600.0)
        if not isinstance(w, (int, float)) or isinstance(w, bool) or not w > 0:
            raise InputError(f"{source}: 'model.time.width_s' must be a positive number of seconds")
        if bins == "hour_of_day" and "width_s" in t:
            raise InputError(f"{source}: 'model.time.width_s' applies to calendar bins; hour-of-day bins are 1 h")
        col = t.get("column", "time")
        if not isinstance(col, str) or not col:
            raise InputError(f"{source}: 'model.time.column' must be a column name (a string)")
    if kind in SITE_KINDS:
        sc = options.get("site_column", "site")
        if not isinstance(sc, str) or not sc:
            raise InputError(f"{source}: 'model.site_column' must be a column name (a string)")
    needs_table = bool(cov) or t is not None or kind in SITE_KINDS
    if needs_table:
        if data.scans is None:
            what = f"model kind '{kind}'" if kind in SITE_KINDS else "model.scan_covariates / [model.time]"
            raise InputError(f"{source}: {what} reads columns of the scans table; set data.scans "
                             "(data.n_scans has no columns)")
        options = {**options, "_scans": {"path": str(data.scans), "scan": data.columns["scan"]}}
    if t is not None and not t:
        options = {**options, "time": {"bins": "calendar"}}  # an empty [model.time]: defaults
    if not od:
        options.pop("overdispersion", None)
    if not cov:
        options.pop("scan_covariates", None)
    return composite_kind(kind, options), options


# ----------------------------------------------------------------------------- detection specs
DETECTION_KINDS = ("logit_range",)  # models/detection.py
_DETECTION_SCHEMA: dict[str, Any] = {
    "name": None,
    "description": None,
    "recording": None,
    "model": {"kind": None, "range_bins": None, "clutter_run": None, "prior": None},
    "sampler": {"chains": None, "warmup": None, "draws": None, "seed": None, "progress": None, "method": None},
    "output": {"dir": None},
}


@dataclass
class DetectionSpec:
    """A detection-probability spec (``sceneprior detection``; :mod:`sceneprior.detprob`):
    ``recording`` is the recording's own :class:`FitSpec` (its data, gates and space), with
    the detection spec's name, sampler and output folder in place of its own."""

    name: str
    source: str
    recording: FitSpec
    kind: str
    prior: dict
    range_bins: int
    clutter_run: Path | None
    raw: dict = field(default_factory=dict, repr=False)


def load_detection_spec(path) -> DetectionSpec:
    """Read and validate a detection spec: ``name``, ``recording`` (the recording's fit spec,
    which must have ``data.objects``), ``[model]`` (kind, range_bins 1..1000, clutter_run,
    ``[model.prior]`` intercept_sd and coef_sd > 0, both ``inf`` for a flat prior),
    ``[sampler]`` (NUTS only) and ``[output] dir``; paths relative to the spec's folder.
    One-line InputError otherwise."""
    import math

    from .models.detection import DEFAULT_PRIOR

    path = Path(path)
    source = str(path)
    if not path.is_file():
        raise InputError(f"{source}: detection specification file not found")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{source}: cannot parse TOML: {exc}") from None
    _check_keys(raw, _DETECTION_SCHEMA, "", source)
    name = raw.get("name")
    if not isinstance(name, str) or not name or "/" in name or name.startswith("."):
        raise InputError(f"{source}: 'name' (the run's name under the output folder) is required, "
                         "a plain name such as \"lowmarsh-detection\"")
    rec = raw.get("recording")
    if not isinstance(rec, str) or not rec:
        raise InputError(f"{source}: 'recording' must name the recording's fit specification (a TOML path) "
                         "whose [data] has objects and gates")
    base = path.parent

    def resolve(p: str) -> Path:
        return Path(p) if Path(p).is_absolute() else (base / p).resolve()

    model = raw.get("model") or {}
    kind = model.get("kind", "logit_range")
    if kind not in DETECTION_KINDS:
        raise InputError(f"{source}: unknown detection model kind {kind!r}; available: {', '.join(DETECTION_KINDS)}")
    bins = model.get("range_bins", 20)
    if isinstance(bins, bool) or not isinstance(bins, int) or not 1 <= bins <= 1000:
        raise InputError(f"{source}: 'model.range_bins' must be a whole number 1..1000, got {bins!r}")
    prior = dict(DEFAULT_PRIOR)
    given = model.get("prior") or {}
    if not isinstance(given, dict):
        raise InputError(f"{source}: 'model.prior' must be a table ([model.prior])")
    for k, v in given.items():
        if k not in DEFAULT_PRIOR:
            raise InputError(f"{source}: unknown prior parameter 'model.prior.{k}' for the detection model; "
                             f"allowed: {', '.join(DEFAULT_PRIOR)}")
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not v > 0:
            raise InputError(f"{source}: 'model.prior.{k}' must be a positive number (inf for flat), got {v!r}")
        prior[k] = float(v)
    if math.isinf(prior["coef_sd"]) != math.isinf(prior["intercept_sd"]):
        raise InputError(f"{source}: a flat prior applies to both coefficients: set intercept_sd and coef_sd "
                         "both to inf, or both finite")
    clutter = model.get("clutter_run")
    if clutter is not None:
        if not isinstance(clutter, str) or not clutter:
            raise InputError(f"{source}: 'model.clutter_run' must be a run directory path (a string)")
        clutter = resolve(clutter)
    smp = {"method": "nuts", "chains": 4, "warmup": 500, "draws": 1000, "seed": 0, "progress": True,
           **(raw.get("sampler") or {})}  # the detection spec's own sampler, not the recording's
    if smp.get("method") != "nuts":
        raise InputError(f"{source}: the detection model is sampled with NUTS; 'sampler.method' must be \"nuts\"")
    out_dir = (raw.get("output") or {}).get("dir", "runs")
    if not isinstance(out_dir, str) or not out_dir:
        raise InputError(f"{source}: 'output.dir' must be a folder path (a string)")
    rec_path = resolve(rec)
    recording = load_spec(rec_path, overrides={"name": name, "sampler": smp, "output": {"dir": str(resolve(out_dir))}})
    if recording.data.objects is None:
        raise InputError(f"{rec_path}: the recording has no objects table; set data.objects (and [data.gates]) "
                         "to fit the detection probability of known objects")
    return DetectionSpec(name=name, source=source, recording=recording, kind=kind, prior=prior,
                         range_bins=bins, clutter_run=clutter, raw=raw)
