"""Site comparison: ``sceneprior compare RUN_A RUN_B``.

Placement. ``[sensor] x, y, heading, frame`` in a spec put the run in a shared Cartesian
frame (x east, y north, metres): a local point with bearing θ (degrees clockwise from the
sensor's north) and range r sits at X = x + r·sin(θ + h), Y = y + r·cos(θ + h); a local
Cartesian point (x_l, y_l) at X = x + x_l cos h + y_l sin h, Y = y − x_l sin h + y_l cos h.
Two runs can be compared when they name the same frame; two runs without [sensor] are
taken to share the sensor's local frame (same position: said in the output); one with and
one without, or different frame names, share no frame and are refused.

Common units. Intensities are compared per m² per scan. A run whose cell draws are per m
of range per rad (or degree) of bearing is converted cell by cell: the cell average per m²
is the per-m·rad cell average divided by the mid-cell range, exactly, since the polar cell
area is r_mid·Δr·Δθ (the Jacobian of polar coordinates; DESIGN.md §4).

Quantities, from each run's kept posterior draws (independent posteriors, paired by draw):

* the rate of each run over its own window, and their ratio (only like-for-like when the
  windows coincide);
* the overlap O = W_A ∩ W_B in the shared frame, found with a midpoint rule on the common
  grid (``n_sub``² points per common cell; its error is confined to the cells the window
  edges cross), and Λ_A(O), Λ_B(O) = ∫_O λ: the rate ratio R = Λ_A(O)/Λ_B(O) and
  P(rate_A > rate_B) = P(R > 1) — the headline comparison;
* a common Cartesian grid over O (cell size ``cell_m``, default the coarser of the two
  runs' median cell sizes); per common cell g the intensity of each run is the average over
  the sub-points of g inside both windows; cells at least ``coverage`` inside both windows
  are compared. Per cell the log-ratio LR_g = log λ_A(g) − log λ_B(g); the posterior
  probability of a credible difference v_g = max(P(LR_g > log δ), P(LR_g < −log δ)) (δ =
  ``min_ratio``, 1 by default: the sign), and the cells marked are the largest set whose
  posterior expected false-discovery rate mean(1 − v_g) is at most ``fdr`` (Müller,
  Parmigiani, Robert & Rousseau 2004, the Bayesian FDR rule).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import InputError


@dataclass
class Side:
    """One run as the comparison needs it."""

    name: str
    region: object  # geometry.Region (local coordinates)
    grid: object  # geometry.Grid
    sensor: dict | None  # {"x", "y", "heading", "frame"} or None
    lam: np.ndarray  # (S, C) per-m² intensity draws
    rate: np.ndarray  # (S,) rate over the own window
    window_area: np.ndarray  # (C,)

    @property
    def frame(self) -> str | None:
        return None if self.sensor is None else self.sensor.get("frame", "shared")


def _region_from_space(space: dict, source: str):
    from .fitting import region_from_spec
    from .spec import spec_from_dict

    stub = {"name": "compare", "data": {"detections": "unused.csv", "n_scans": 1}, "space": space,
            "model": {"kind": "uniform"}}
    spec = spec_from_dict(stub, base_dir=Path("."), source=source)
    region = region_from_spec(spec.space)
    return region, region.grid(spec.space.cells)


def _per_m2(lam: np.ndarray, units: str, grid, source: str) -> np.ndarray:
    if units == "m-2 scan-1":
        return lam
    r_mid = np.repeat(0.5 * (grid.edges0[:-1] + grid.edges0[1:]), grid.shape[1])
    if units in ("m-1 rad-1 scan-1", "m-1 radian-1 scan-1") and grid.frame == "polar":
        return lam / r_mid
    if units in ("m-1 degree-1 scan-1", "m-1 deg-1 scan-1") and grid.frame == "polar":
        return lam * (180.0 / math.pi) / r_mid
    raise InputError(f"{source}: intensities in '{units}' cannot be put in common units (per m² per scan)")


def side_from_run(run) -> Side:
    sc = (run.summary.get("data") or {}).get("spec_content") or {}
    region, grid = _region_from_space(sc.get("space") or {}, str(run.path))
    cd = run.cell_draws
    if "site_intensity" in cd:
        raise InputError(f"{run.path}: run {run.name} has a map per site (kind \"lgcp_sites\"), and compare takes "
                         "runs with one map; its summary.json lists each site's rate posterior (lgcp_sites.sites), "
                         "or fit the sites separately to compare them")
    lam = np.asarray(cd["intensity"].values, dtype=np.float64)
    lam = _per_m2(lam, str(cd["intensity"].attrs.get("units", "")), grid, str(run.path / "cell_draws.nc"))
    wa = np.asarray(run.intensity["window_area"].values, dtype=np.float64).reshape(-1)
    sensor = sc.get("sensor")
    if sensor is not None:
        sensor = {"x": float(sensor.get("x", 0.0)), "y": float(sensor.get("y", 0.0)),
                  "heading": float(sensor.get("heading", 0.0)), "frame": str(sensor.get("frame", "shared"))}
    return Side(name=run.name, region=region, grid=grid, sensor=sensor, lam=lam,
                rate=np.asarray(cd["rate"].values, dtype=np.float64), window_area=wa)


def side_from_fit(result) -> Side:
    """The same from a FitResult in memory (all draws)."""
    s = result.spec.sensor
    sensor = None if s is None else {"x": s.x, "y": s.y, "heading": s.heading, "frame": s.frame}
    lam = result.cell_intensity()
    return Side(name=result.spec.name, region=result.stats.region, grid=result.stats.grid, sensor=sensor,
                lam=np.asarray(lam, float).reshape(-1, lam.shape[-1]),
                rate=np.asarray(result.rate_draws(), float).reshape(-1), window_area=result.stats.window_area)


# ----------------------------------------------------------------------------- frames
def to_shared(side: Side, c0, c1):
    """Local native coordinates → shared frame (X, Y) [m]."""
    from .geometry import polar_to_cartesian

    x, y = (polar_to_cartesian(c0, c1) if side.grid.frame == "polar" else (np.asarray(c0), np.asarray(c1)))
    if side.sensor is None:
        return x, y
    h = math.radians(side.sensor["heading"])
    return (side.sensor["x"] + x * math.cos(h) + y * math.sin(h),
            side.sensor["y"] - x * math.sin(h) + y * math.cos(h))


def to_local(side: Side, X, Y):
    """Shared frame (X, Y) [m] → local native coordinates (range/bearing or x/y)."""
    from .geometry import cartesian_to_polar

    X, Y = np.asarray(X, float), np.asarray(Y, float)
    if side.sensor is None:
        x, y = X, Y
    else:
        h = math.radians(side.sensor["heading"])
        dx, dy = X - side.sensor["x"], Y - side.sensor["y"]
        x, y = dx * math.cos(h) - dy * math.sin(h), dx * math.sin(h) + dy * math.cos(h)
    return cartesian_to_polar(x, y) if side.grid.frame == "polar" else (x, y)


def common_frame(a: Side, b: Side) -> str:
    if a.sensor is None and b.sensor is None:
        return ("neither run has [sensor]: both are taken to be in the same sensor's local frame "
                "(same position and heading)")
    if a.sensor is None or b.sensor is None:
        missing = a.name if a.sensor is None else b.name
        raise InputError(f"runs {a.name} and {b.name} share no frame: {missing} has no [sensor] placement; "
                         "add [sensor] x, y, heading (and frame) to its spec and refit")
    if a.frame != b.frame:
        raise InputError(f"runs {a.name} and {b.name} share no frame: their sensors are placed in frames "
                         f"'{a.frame}' and '{b.frame}'; place both in one shared frame")
    return f"shared frame '{a.frame}'"


def _inside(side: Side, X, Y):
    c0, c1 = to_local(side, X, Y)
    ok = side.region.inside_bounds(c0, c1)
    if side.region.masks:
        ok &= ~side.region.in_mask(c0, c1)
    cell = side.grid.locate(c0, c1)
    return ok & (cell >= 0), cell


def _extent(side: Side, n: int = 200):
    """Bounding box of a run's window in the shared frame (from its boundary points)."""
    (l0, h0), (l1, h1) = side.region.bounds0, side.region.bounds1
    t = np.linspace(0, 1, n)
    c0 = np.concatenate([l0 + (h0 - l0) * t, np.full(n, h0), l0 + (h0 - l0) * t, np.full(n, l0)])
    c1 = np.concatenate([np.full(n, l1), l1 + (h1 - l1) * t, np.full(n, h1), l1 + (h1 - l1) * t])
    X, Y = to_shared(side, c0, c1)
    return X.min(), X.max(), Y.min(), Y.max()


def _cell_size(side: Side) -> float:
    a = side.grid.cell_area().reshape(-1)
    a = a[side.window_area > 0]
    return float(math.sqrt(np.median(a))) if a.size else 1.0


# ----------------------------------------------------------------------------- statistics
def fdr_select(v: np.ndarray, alpha: float) -> tuple[np.ndarray, float]:
    """Müller et al. (2004): mark the cells with the largest v_g while the posterior
    expected FDR mean(1 − v) over the marked set stays ≤ alpha. Returns (mask, FDR)."""
    v = np.asarray(v, float)
    order = np.argsort(-v, kind="stable")
    fdr = np.cumsum(1.0 - v[order]) / np.arange(1, v.size + 1)
    ok = np.flatnonzero(fdr <= alpha)
    k = int(ok.max()) + 1 if ok.size else 0
    mask = np.zeros(v.size, bool)
    mask[order[:k]] = True
    return mask, float(fdr[k - 1]) if k else 0.0


def _stat(v) -> dict:
    v = np.asarray(v, float).reshape(-1)
    q = np.quantile(v, [0.05, 0.5, 0.95])
    return {"mean": float(v.mean()), "sd": float(v.std(ddof=1)), "q05": float(q[0]),
            "q50": float(q[1]), "q95": float(q[2])}


def compare_sides(a: Side, b: Side, cell_m: float | None = None, fdr: float = 0.05,
                  min_ratio: float = 1.0, coverage: float = 0.75, n_sub: int = 4,
                  max_draws: int = 4000, seed: int = 0) -> dict:
    if not 0 < fdr < 1:
        raise InputError(f"--fdr must be in (0, 1), got {fdr}")
    if not min_ratio >= 1:
        raise InputError(f"--min-ratio must be ≥ 1, got {min_ratio}")
    frame_note = common_frame(a, b)
    ea, eb = _extent(a), _extent(b)
    x0, x1 = max(ea[0], eb[0]), min(ea[1], eb[1])
    y0, y1 = max(ea[2], eb[2]), min(ea[3], eb[3])
    if not (x1 > x0 and y1 > y0):
        raise InputError(f"runs {a.name} and {b.name}: their windows do not overlap in the {frame_note}")
    h = float(cell_m) if cell_m else max(_cell_size(a), _cell_size(b))
    if not h > 0:
        raise InputError(f"--cell must be a positive size in metres, got {cell_m}")
    nx, ny = max(1, int(math.ceil((x1 - x0) / h))), max(1, int(math.ceil((y1 - y0) / h)))
    if nx * ny > 250_000:
        raise InputError(f"a common grid of {nx}×{ny} cells of {h:g} m is too fine; use a larger --cell")
    ex, ey = x0 + h * np.arange(nx + 1), y0 + h * np.arange(ny + 1)
    off = (np.arange(n_sub) + 0.5) / n_sub * h
    sx = (ex[:-1, None] + off[None, :]).reshape(-1)  # sub-point x, cell-major
    sy = (ey[:-1, None] + off[None, :]).reshape(-1)
    PX, PY = np.meshgrid(sx, sy, indexing="ij")
    gx, gy = np.meshgrid(np.arange(sx.size) // n_sub, np.arange(sy.size) // n_sub, indexing="ij")
    PX, PY = PX.reshape(-1), PY.reshape(-1)
    g_of = (gx * ny + gy).reshape(-1)
    in_a, cell_a = _inside(a, PX, PY)
    in_b, cell_b = _inside(b, PX, PY)
    both = in_a & in_b
    if not both.any():
        raise InputError(f"runs {a.name} and {b.name}: their windows do not overlap in the {frame_note}")
    w_pt = h * h / (n_sub * n_sub)
    area_overlap = float(both.sum() * w_pt)
    # paired draws (independent posteriors)
    S = min(a.lam.shape[0], b.lam.shape[0], max_draws)
    ia = np.unique(np.linspace(0, a.lam.shape[0] - 1, S).round().astype(int))
    ib = np.unique(np.linspace(0, b.lam.shape[0] - 1, S).round().astype(int))
    S = min(ia.size, ib.size)
    ia, ib = ia[:S], ib[:S]
    rng = np.random.default_rng(seed)
    ib = rng.permutation(ib)
    import scipy.sparse as sp

    pts = np.flatnonzero(both)
    Pa = sp.csr_matrix((np.full(pts.size, w_pt), (np.zeros(pts.size, int), cell_a[pts])),
                       shape=(1, a.lam.shape[1]))
    Pb = sp.csr_matrix((np.full(pts.size, w_pt), (np.zeros(pts.size, int), cell_b[pts])),
                       shape=(1, b.lam.shape[1]))
    La = np.asarray(Pa @ a.lam[ia].T).reshape(-1)
    Lb = np.asarray(Pb @ b.lam[ib].T).reshape(-1)
    R = La / Lb
    # common cells
    n_in = np.bincount(g_of[pts], minlength=nx * ny)
    frac = n_in / (n_sub * n_sub)
    keep = np.flatnonzero(frac >= coverage)
    sel = np.isin(g_of[pts], keep)
    p2 = pts[sel]
    gi = np.searchsorted(keep, g_of[p2])
    wts = 1.0 / n_in[g_of[p2]]
    Ma = sp.csr_matrix((wts, (gi, cell_a[p2])), shape=(keep.size, a.lam.shape[1]))
    Mb = sp.csr_matrix((wts, (gi, cell_b[p2])), shape=(keep.size, b.lam.shape[1]))
    lam_a = np.asarray(Ma @ a.lam[ia].T).T  # (S, G)
    lam_b = np.asarray(Mb @ b.lam[ib].T).T
    with np.errstate(divide="ignore", invalid="ignore"):
        LR = np.log(lam_a) - np.log(lam_b)
    t = math.log(min_ratio)
    p_hi, p_lo = np.mean(LR > t, axis=0), np.mean(LR < -t, axis=0)
    v = np.maximum(p_hi, p_lo)
    marked, efdr = fdr_select(v, fdr)
    higher_a = p_hi >= p_lo
    cx = 0.5 * (ex[:-1] + ex[1:])
    cy = 0.5 * (ey[:-1] + ey[1:])
    ix, iy = keep // ny, keep % ny
    q = np.quantile(LR, [0.05, 0.5, 0.95], axis=0) if keep.size else np.zeros((3, 0))
    return {
        "runs": [a.name, b.name],
        "frame": frame_note,
        "draws_paired": int(S),
        "rate_own_window": {
            "units": "detections per scan over each run's own window",
            a.name: _stat(a.rate[ia]), b.name: _stat(b.rate[ib]),
            "ratio": _stat(a.rate[ia] / b.rate[ib]),
            "note": "like-for-like only when the two windows coincide; see 'overlap'",
        },
        "overlap": {
            "area_m2": area_overlap,
            "units": "detections per scan over the overlap W_A ∩ W_B",
            a.name: _stat(La), b.name: _stat(Lb),
            "rate_ratio": _stat(R),
            "p_a_greater": float(np.mean(R > 1.0)),
            "quadrature": f"midpoint rule, {n_sub}×{n_sub} points per common cell",
        },
        "grid": {"cell_m": h, "shape": [nx, ny], "x_edges": ex.tolist(), "y_edges": ey.tolist(),
                 "compared_cells": int(keep.size), "coverage_min": coverage,
                 "units": "intensities per m² per scan in the shared frame"},
        "cells": {"index": np.stack([ix, iy], axis=1).tolist(), "x": cx[ix].tolist(), "y": cy[iy].tolist(),
                  "log_ratio_mean": LR.mean(axis=0).tolist() if keep.size else [],
                  "log_ratio_q05": q[0].tolist(), "log_ratio_q50": q[1].tolist(), "log_ratio_q95": q[2].tolist(),
                  "v": v.tolist(), "marked": marked.tolist(),
                  "direction": np.where(higher_a, f"{a.name} > {b.name}", f"{b.name} > {a.name}").tolist()},
        "fdr": {"target": fdr, "min_ratio": min_ratio, "marked": int(marked.sum()),
                "marked_higher_a": int((marked & higher_a).sum()), "marked_higher_b": int((marked & ~higher_a).sum()),
                "expected_fdr": efdr,
                "rule": "Müller et al. (2004): largest set of cells with posterior expected FDR "
                        "mean(1 − v_g) ≤ target, v_g = max(P(LR_g > log δ), P(LR_g < −log δ))"},
        "_draws": {"rate_ratio": R, "log_ratio": LR},  # for callers in Python; not written
    }


def compare_runs(path_a, path_b, out: Path | None = None, **kw) -> dict:
    from .results import load_run

    ra, rb = load_run(path_a), load_run(path_b)
    res = compare_sides(side_from_run(ra), side_from_run(rb), **kw)
    if out is not None:
        write_comparison(res, Path(out))
    return res


def write_comparison(res: dict, out: Path) -> None:
    """out/comparison.json and out/log_ratio.nc (the per-cell map on the common grid)."""
    import xarray as xr

    out.mkdir(parents=True, exist_ok=True)
    g = res["grid"]
    nx, ny = g["shape"]
    maps = {k: np.full((nx, ny), np.nan) for k in ("log_ratio_mean", "log_ratio_q05", "log_ratio_q95", "v")}
    marked = np.zeros((nx, ny), np.int8)
    c = res["cells"]
    for j, (ix, iy) in enumerate(c["index"]):
        for k in maps:
            maps[k][ix, iy] = c[k][j]
        marked[ix, iy] = (1 if c["direction"][j].startswith(res["runs"][0]) else -1) if c["marked"][j] else 0
    ex, ey = np.asarray(g["x_edges"]), np.asarray(g["y_edges"])
    a, b = res["runs"]
    ds = xr.Dataset(
        {k: (("x", "y"), v, {"units": "1", "long_name": f"posterior {k} of log(λ_{a}/λ_{b}) per common cell"
                             if k != "v" else "posterior probability of a credible difference"})
         for k, v in maps.items()}
        | {"marked": (("x", "y"), marked, {"long_name": f"+1: {a} higher, −1: {b} higher, 0: not marked "
                                                        f"(Bayesian FDR {res['fdr']['target']:g})"})},
        coords={"x": ("x", 0.5 * (ex[:-1] + ex[1:]), {"units": "m", "long_name": "shared-frame x (east)"}),
                "y": ("y", 0.5 * (ey[:-1] + ey[1:]), {"units": "m", "long_name": "shared-frame y (north)"})},
        attrs={"frame": res["frame"], "runs": f"{a} vs {b}"})
    ds.to_netcdf(out / "log_ratio.nc", engine="h5netcdf")
    light = {k: v for k, v in res.items() if k != "cells" and not k.startswith("_")}
    (out / "comparison.json").write_text(json.dumps(light, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")


def format_compare(res: dict) -> str:
    a, b = res["runs"]
    ov, rw, f = res["overlap"], res["rate_own_window"], res["fdr"]
    r = ov["rate_ratio"]
    L = [f"compare {a} vs {b} ({res['frame']})",
         f"  own windows: {a} {rw[a]['mean']:.3f}, {b} {rw[b]['mean']:.3f} detections/scan",
         f"  overlap {ov['area_m2'] / 1e6:.3f} km²: {a} {ov[a]['mean']:.3f}, {b} {ov[b]['mean']:.3f} detections/scan",
         f"  rate ratio {a}/{b} over the overlap: {r['q50']:.3f} (90 % [{r['q05']:.3f}, {r['q95']:.3f}]); "
         f"P(rate_{a} > rate_{b}) = {ov['p_a_greater']:.3f}",
         f"  common grid {res['grid']['shape'][0]}×{res['grid']['shape'][1]} cells of {res['grid']['cell_m']:.0f} m, "
         f"{res['grid']['compared_cells']} compared; credibly different at Bayesian FDR {f['target']:g}"
         + (f" (|ratio| > {f['min_ratio']:g})" if f["min_ratio"] > 1 else "")
         + f": {f['marked']} ({f['marked_higher_a']} higher at {a}, {f['marked_higher_b']} higher at {b}; "
           f"expected FDR {f['expected_fdr']:.3f})"]
    c = res["cells"]
    idx = [j for j in np.argsort(-np.abs(np.asarray(c["log_ratio_mean"]))) if c["marked"][j]][:5]
    for j in idx:
        L.append(f"    cell at x {c['x'][j]:.0f} m, y {c['y'][j]:.0f} m: ratio {math.exp(c['log_ratio_q50'][j]):.2f} "
                 f"(90 % [{math.exp(c['log_ratio_q05'][j]):.2f}, {math.exp(c['log_ratio_q95'][j]):.2f}]), "
                 f"{c['direction'][j]}")
    return "\n".join(L)
