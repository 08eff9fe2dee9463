"""Simulation of Poisson point-process scans, and the invented Lowmarsh harbour demo.

Two samplers (DESIGN.md §2):
- homogeneous: per scan n ~ Poisson(ρ|R|), then n i.i.d. uniform points in R;
- inhomogeneous, by thinning (Lewis & Shedler 1979): a homogeneous PPP of rate λ_max over
  the region's bounds, each point kept with probability λ(z)/λ_max. The K scans are drawn
  in one batch: a Poisson(λ_max|R|K) total split uniformly over scans gives independent
  Poisson scans (Poisson splitting), so no Python loop runs per scan.

Lowmarsh (ours, invented; DESIGN.md §6): a coastal radar on a breakwater, polar field of
view range 200–6000 m, bearing −70°…+70° (clockwise from north). Sea clutter falls off with
range, a rocky shoal makes a hot patch, land from bearing 42° to 70° is masked (it returns
land clutter, which a fit drops as masked detections). All numbers below are our own.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from .errors import InputError
from .geometry import Region, SectorMask, cartesian_to_polar, polar_to_cartesian


def uniform_in_bounds(rng: np.random.Generator, region: Region, n: int) -> tuple[np.ndarray, np.ndarray]:
    """n points uniform by AREA over the region's bounds, in native coordinates."""
    lo0, hi0 = region.bounds0
    lo1, hi1 = region.bounds1
    if region.frame == "polar":
        # area element r dr dθ: r² uniform on [r₀², r₁²]
        c0 = np.sqrt(rng.uniform(lo0 * lo0, hi0 * hi0, n))
    else:
        c0 = rng.uniform(lo0, hi0, n)
    c1 = rng.uniform(lo1, hi1, n)
    return c0, c1


def sample_homogeneous(rng, region: Region, density: float, n_scans: int):
    """Homogeneous PPP of ``density`` [m⁻² scan⁻¹] over the region's bounds, per scan:
    n_k ~ Poisson(density·|R|), then n_k i.i.d. uniform points. Returns (scan, c0, c1)."""
    n = rng.poisson(density * region.area(), size=n_scans)
    scan = np.repeat(np.arange(n_scans), n)
    c0, c1 = uniform_in_bounds(rng, region, int(n.sum()))
    return scan, c0, c1


def sample_thinning(rng, region: Region, intensity, lam_max: float, n_scans: int):
    """Inhomogeneous PPP by thinning (Lewis & Shedler 1979).

    ``intensity(c0, c1)`` gives λ [m⁻² scan⁻¹] in native coordinates and must not exceed
    ``lam_max`` on the region's bounds (checked). Returns (scan, c0, c1) sorted by scan.
    """
    total = rng.poisson(lam_max * region.area() * n_scans)
    c0, c1 = uniform_in_bounds(rng, region, total)
    scan = rng.integers(0, n_scans, size=total)
    lam = intensity(c0, c1)
    if lam.size and (lam.max() > lam_max * (1 + 1e-12) or lam.min() < 0):
        raise ValueError("thinning bound violated: intensity exceeds lam_max or is negative")
    keep = rng.uniform(0.0, lam_max, size=total) < lam
    order = np.argsort(scan[keep], kind="stable")
    return scan[keep][order], c0[keep][order], c1[keep][order]


@dataclass(frozen=True)
class Lowmarsh:
    """Ground truth of the Lowmarsh breakwater radar (invented numbers)."""

    range_m: tuple[float, float] = (200.0, 6000.0)
    bearing_deg: tuple[float, float] = (-70.0, 70.0)
    land_bearing_deg: tuple[float, float] = (42.0, 70.0)
    sea_peak: float = 7.5e-7  # m⁻² scan⁻¹ at the inner range
    sea_falloff_m: float = 1200.0  # e-folding range of sea clutter
    shoal_peak: float = 1.8e-6  # m⁻² scan⁻¹ at the shoal centre
    shoal_range_m: float = 3200.0
    shoal_bearing_deg: float = -25.0
    shoal_radius_m: float = 300.0  # Gaussian sd of the patch
    floor: float = 2.8e-8  # receiver-noise floor, m⁻² scan⁻¹
    land: float = 2.0e-7  # land clutter inside the masked sector (dropped by a fit)
    scan_period_s: float = 2.4

    def region(self) -> Region:
        return Region(
            frame="polar",
            bounds0=self.range_m,
            bounds1=self.bearing_deg,
            masks=(SectorMask(range=self.range_m, bearing=self.land_bearing_deg, name="land"),),
        )

    def sea_intensity(self, r, b):
        """Clutter intensity over the sea [m⁻² scan⁻¹] at range r [m], bearing b [deg]."""
        r = np.asarray(r, float)
        b = np.asarray(b, float)
        x, y = polar_to_cartesian(r, b)
        sx, sy = polar_to_cartesian(self.shoal_range_m, self.shoal_bearing_deg)
        d2 = (x - sx) ** 2 + (y - sy) ** 2
        return (
            self.sea_peak * np.exp(-(r - self.range_m[0]) / self.sea_falloff_m)
            + self.shoal_peak * np.exp(-0.5 * d2 / self.shoal_radius_m**2)
            + self.floor
        )

    def intensity(self, r, b):
        """Everything the radar reports, land included [m⁻² scan⁻¹]."""
        b = np.asarray(b, float)
        on_land = (b >= self.land_bearing_deg[0]) & (b <= self.land_bearing_deg[1])
        return np.where(on_land, self.land + self.floor, self.sea_intensity(r, b))

    def lam_max(self) -> float:
        return self.sea_peak + self.shoal_peak + self.floor + self.land

    def window_rate(self, order: int = 64) -> tuple[float, float]:
        """True expected detections per scan over the window (region minus the land mask),
        by Gauss–Legendre quadrature; returns (rate, |rate(order) − rate(2·order)|)."""
        reg = self.region()

        def integral(n):
            c0, c1, w = reg.quadrature(n)
            return float(np.sum(w * self.sea_intensity(c0, c1)))

        lo, hi = integral(order), integral(2 * order)
        return hi, abs(hi - lo)


def simulate_lowmarsh(out_dir: Path, n_scans: int = 600, seed: int = 20261201,
                      fmt: str = "csv", scenario: Lowmarsh | None = None, log=print) -> dict:
    """Write the Lowmarsh demo recording: detections, scans, and the ground truth.

    Files: detections.{csv,parquet} (scan, range [m], bearing [deg], x [m], y [m]),
    scans.{csv,parquet} (scan, time [s], site), truth.json (true rate per scan over the
    window and the scenario's parameters), truth.nc (true intensity at the cell centres of
    a fine 58×56 polar grid, m⁻² scan⁻¹).
    """
    if n_scans < 1:
        raise InputError(f"--scans must be ≥ 1, got {n_scans}")
    if fmt not in ("csv", "parquet"):
        raise InputError(f"--format must be csv or parquet, got {fmt!r}")
    sc = scenario or Lowmarsh()
    rng = np.random.default_rng(seed)
    region = sc.region()
    scan, r, b = sample_thinning(rng, region, sc.intensity, sc.lam_max(), n_scans)
    x, y = polar_to_cartesian(r, b)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    det = pa.table({"scan": scan.astype(np.int64), "range": np.round(r, 3), "bearing": np.round(b, 5),
                    "x": np.round(x, 3), "y": np.round(y, 3)})
    scans = pa.table({"scan": np.arange(n_scans, dtype=np.int64),
                      "time": np.round(np.arange(n_scans) * sc.scan_period_s, 3),
                      "site": np.full(n_scans, "breakwater")})
    ext = "csv" if fmt == "csv" else "parquet"
    write = (lambda t, p: pacsv.write_csv(t, p)) if fmt == "csv" else (lambda t, p: pq.write_table(t, p))
    write(det, out_dir / f"detections.{ext}")
    write(scans, out_dir / f"scans.{ext}")
    rate, err = sc.window_rate()
    # truth on a fine grid, for maps and checks
    grid = region.grid((58, 56))
    rr, bb = np.meshgrid(grid.centres0, grid.centres1, indexing="ij")
    import xarray as xr

    truth = xr.Dataset(
        {"intensity": (("range", "bearing"), sc.intensity(rr, bb),
                       {"units": "m-2 scan-1", "long_name": "true clutter intensity at cell centres"})},
        coords={"range": ("range", grid.centres0, {"units": "m"}),
                "bearing": ("bearing", grid.centres1, {"units": "degree"})},
        attrs={"scenario": "Lowmarsh (invented)", "seed": seed},
    )
    truth.to_netcdf(out_dir / "truth.nc", engine="h5netcdf")
    in_window = ~region.in_mask(r, b)
    info = {
        "scenario": "Lowmarsh breakwater radar (invented)",
        "seed": seed,
        "scans": n_scans,
        "detections": int(scan.size),
        "detections_in_window": int(in_window.sum()),
        "true_rate_per_scan": rate,
        "true_rate_quadrature_error": err,
        "true_rate_note": "expected clutter detections per scan over the window (region minus "
                          "the land mask): ∫_W λ dA by Gauss–Legendre quadrature",
        "window_area_m2": float(region.window_area()),
        "parameters": asdict(sc),
        "files": {"detections": f"detections.{ext}", "scans": f"scans.{ext}", "truth": "truth.nc"},
    }
    (out_dir / "truth.json").write_text(json.dumps(info, indent=2) + "\n")
    log(f"simulated {n_scans} scans, {scan.size} detections ({int(in_window.sum())} over sea, "
        f"{int((~in_window).sum())} on the masked land) into {out_dir}; true rate "
        f"{rate:.4f} detections/scan over the window")
    return info


__all__ = ["Lowmarsh", "sample_homogeneous", "sample_thinning", "simulate_lowmarsh",
           "uniform_in_bounds", "cartesian_to_polar"]


# --------------------------------------------------------------------------- posterior predictive
def sample_thinning_by_scan(rng, region: Region, intensity, lam_max: float, n_scans: int):
    """Inhomogeneous PPP by thinning (Lewis & Shedler 1979) whose intensity may differ per
    scan: ``intensity(scan, c0, c1)`` gives λ [m⁻² scan⁻¹] of each candidate point's scan,
    bounded by ``lam_max`` (checked). The candidates are drawn in one batch as in
    :func:`sample_thinning` (Poisson total split uniformly over scans). Returns
    (scan, c0, c1) sorted by scan."""
    total = rng.poisson(lam_max * region.area() * n_scans)
    c0, c1 = uniform_in_bounds(rng, region, total)
    scan = rng.integers(0, n_scans, size=total)
    lam = intensity(scan, c0, c1)
    if lam.size and (lam.max() > lam_max * (1 + 1e-12) or lam.min() < 0):
        raise ValueError("thinning bound violated: intensity exceeds lam_max or is negative")
    keep = rng.uniform(0.0, lam_max, size=total) < lam
    order = np.argsort(scan[keep], kind="stable")
    return scan[keep][order], c0[keep][order], c1[keep][order]


def simulate_from_run(run, out_dir: Path, recordings: int = 1, per_scan_draw: bool = False,
                      n_scans: int | None = None, seed: int = 20261201, fmt: str = "csv",
                      log=print) -> dict:
    """Posterior-predictive recordings of a fitted run, in the input table contract.

    For each recording: by default ONE posterior draw of the cell intensities (from the
    run's ``cell_draws.nc``) and ``n_scans`` scans i.i.d. given it — the realistic case, in
    which a whole recording shares one clutter level; with ``per_scan_draw`` a fresh draw
    for every scan. Given the draw, each scan is a Poisson point process with the
    piecewise-constant intensity λ_c on the cells' window parts (zero in permanent masks),
    sampled by thinning (:func:`sample_thinning` / :func:`sample_thinning_by_scan`).

    Writes OUT/recording-NNNN/{detections,scans}.{csv,parquet} (detections: scan and the
    run frame's coordinates — range [m], bearing [deg], x, y [m] for polar runs; scans:
    scan and the posterior draw used) and OUT/predictive.json (run, mode, draws, seed).
    Births are not simulated: runs do not carry a fitted birth intensity yet.
    """
    from .export import run_geometry
    from .results import CAUTION, load_run

    if not hasattr(run, "summary"):
        run = load_run(run)
    if isinstance(recordings, bool) or int(recordings) != recordings or recordings < 1:
        raise InputError(f"--recordings must be a whole number ≥ 1, got {recordings!r}")
    K = int(run.summary["data"]["scans"]) if n_scans is None else n_scans
    if isinstance(K, bool) or int(K) != K or K < 1:
        raise InputError(f"--scans must be a whole number ≥ 1, got {n_scans!r}")
    if fmt not in ("csv", "parquet"):
        raise InputError(f"--format must be csv or parquet, got {fmt!r}")
    region, grid, w = run_geometry(run)
    cd = run.cell_draws
    lam = np.asarray(cd["intensity"].values, dtype=np.float64)  # (S, n_cells), m⁻² scan⁻¹
    if lam.shape[1] != grid.n_cells:
        raise InputError(f"{run.path / 'cell_draws.nc'}: {lam.shape[1]} cells, the grid has {grid.n_cells}")
    w_flat = w.reshape(-1)
    lam = np.where(w_flat > 0, lam, 0.0)  # no intensity where the window has no area
    draw_rates = lam @ w_flat  # Σ_c λ_c |c ∩ W| per draw
    S = lam.shape[0]
    rng = np.random.default_rng(seed)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    ext = "csv" if fmt == "csv" else "parquet"
    write = (lambda t, p: pacsv.write_csv(t, p)) if fmt == "csv" else (lambda t, p: pq.write_table(t, p))

    def cell_value(draw_idx, c0, c1):
        idx = grid.locate(c0, c1)
        val = np.where(idx >= 0, lam[draw_idx, np.clip(idx, 0, None)], 0.0)
        if region.masks:
            val = np.where(region.in_mask(c0, c1), 0.0, val)
        return val

    recs = []
    for r in range(int(recordings)):
        if per_scan_draw:
            draws = rng.integers(0, S, size=K)
            lam_max = float(lam[np.unique(draws)].max())
            scan, c0, c1 = sample_thinning_by_scan(rng, region, lambda k, a, b: cell_value(draws[k], a, b),
                                                   lam_max, K)
        else:
            d = int(rng.integers(0, S))
            draws = np.full(K, d)
            lam_max = float(lam[d].max())
            scan, c0, c1 = sample_thinning(rng, region, lambda a, b: cell_value(d, a, b), lam_max, K)
        if region.frame == "polar":
            x, y = polar_to_cartesian(c0, c1)
            det = pa.table({"scan": scan.astype(np.int64), "range": c0, "bearing": c1, "x": x, "y": y})
        else:
            det = pa.table({"scan": scan.astype(np.int64), "x": c0, "y": c1})
        scans = pa.table({"scan": np.arange(K, dtype=np.int64), "posterior_draw": draws.astype(np.int64)})
        folder = out_dir / f"recording-{r + 1:04d}"
        folder.mkdir(parents=True, exist_ok=True)
        write(det, folder / f"detections.{ext}")
        write(scans, folder / f"scans.{ext}")
        entry = {"folder": folder.name, "scans": K, "detections": int(scan.size)}
        if per_scan_draw:
            entry["posterior_draws"] = "one per scan: see the scans table's posterior_draw column"
        else:
            entry["posterior_draw"] = d
            entry["rate_of_draw"] = float(draw_rates[d])
        recs.append(entry)
    info = {
        "run": run.summary["run"],
        "run_dir": str(Path(run.path).resolve()),
        "mode": ("a fresh posterior draw per scan" if per_scan_draw else
                 "one posterior draw per recording, its scans i.i.d. given it"),
        "seed": seed,
        "scans_per_recording": K,
        "frame": region.frame,
        "columns": list(det.column_names),
        "cell_draws": {"samples": S, "thinning": int(cd.attrs.get("thinning", 1)),
                       "source": "cell_draws.nc 'intensity' (per-cell posterior draws, m-2 scan-1)"},
        "rate_units": "detections per scan over the window",
        "births": "not simulated: the run has no fitted birth intensity",
        "recordings": recs,
        "caution": CAUTION,
    }
    (out_dir / "predictive.json").write_text(json.dumps(info, indent=2) + "\n", encoding="utf-8")
    log(f"simulated {recordings} posterior-predictive recording(s) of run {info['run']} "
        f"({K} scans each, {info['mode']}) into {out_dir}")
    return info


__all__ += ["sample_thinning_by_scan", "simulate_from_run"]
