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

    def zone_rate(self, range_m, bearing_deg, order: int = 64) -> tuple[float, float]:
        """True expected clutter detections per scan in a polar zone [r₁, r₂] × [θ₁, θ₂]
        (inside the window: the land mask applies), by Gauss–Legendre quadrature; returns
        (rate, |rate(order) − rate(2·order)|)."""
        zone = Region(frame="polar", bounds0=tuple(range_m), bounds1=tuple(bearing_deg),
                      masks=(SectorMask(range=self.range_m, bearing=self.land_bearing_deg, name="land"),))

        def integral(n):
            c0, c1, w = zone.quadrature(n)
            return float(np.sum(w * self.sea_intensity(c0, c1)))

        lo, hi = integral(order), integral(2 * order)
        return hi, abs(hi - lo)

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
                      fmt: str = "csv", scenario: Lowmarsh | None = None, vessels: bool = True,
                      log=print) -> dict:
    """Write the Lowmarsh demo recording: detections, scans, and the ground truth.

    Files: detections.{csv,parquet} (scan, range [m], bearing [deg], x [m], y [m]; clutter
    and, with ``vessels``, the vessels' detections, mixed and unlabeled), scans.{csv,parquet}
    (scan, time [s], site), objects.{csv,parquet} (with ``vessels``: the vessels' true
    positions per scan and their measurement covariance, :func:`simulate_vessels`),
    truth.json (true clutter rate per scan over the window, the vessels' figures and the
    scenario's parameters), truth.nc (true clutter intensity at the cell centres of a fine
    58×56 polar grid, m⁻² scan⁻¹). The clutter is drawn from the seed's own stream, the
    vessels from a stream of their own, so the clutter does not depend on ``vessels``.
    """
    if n_scans < 1:
        raise InputError(f"--scans must be ≥ 1, got {n_scans}")
    if fmt not in ("csv", "parquet"):
        raise InputError(f"--format must be csv or parquet, got {fmt!r}")
    sc = scenario or Lowmarsh()
    rng = np.random.default_rng(seed)
    region = sc.region()
    scan, r, b = sample_thinning(rng, region, sc.intensity, sc.lam_max(), n_scans)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    clutter_in_window = int((~region.in_mask(r, b)).sum())
    ext = "csv" if fmt == "csv" else "parquet"
    vessel_info = None
    if vessels:
        scan, r, b, vessel_info = add_vessels(out_dir, scan, r, b, n_scans, seed, fmt, region, log=log)
    x, y = polar_to_cartesian(r, b)
    det = pa.table({"scan": scan.astype(np.int64), "range": np.round(r, 3), "bearing": np.round(b, 5),
                    "x": np.round(x, 3), "y": np.round(y, 3)})
    scans = pa.table({"scan": np.arange(n_scans, dtype=np.int64),
                      "time": np.round(np.arange(n_scans) * sc.scan_period_s, 3),
                      "site": np.full(n_scans, "breakwater")})
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
        "clutter_detections_in_window": clutter_in_window,
        "true_rate_per_scan": rate,
        "true_rate_quadrature_error": err,
        "true_rate_note": "expected clutter detections per scan over the window (region minus "
                          "the land mask): ∫_W λ dA by Gauss–Legendre quadrature",
        "window_area_m2": float(region.window_area()),
        "parameters": asdict(sc),
        "files": {"detections": f"detections.{ext}", "scans": f"scans.{ext}", "truth": "truth.nc"},
    }
    if vessel_info is not None:
        info["vessels"] = vessel_info
        info["files"]["objects"] = vessel_info["file"]
    (out_dir / "truth.json").write_text(json.dumps(info, indent=2) + "\n")
    log(f"simulated {n_scans} scans, {scan.size} detections ({int(in_window.sum())} over sea"
        + (f", of them {vessel_info['detections_in_window']} of vessels" if vessel_info else "")
        + f", {int((~in_window).sum())} on the masked land) into {out_dir}; true clutter rate "
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


# --------------------------------------------------------------------------- weather, second mast
# Rain episodes and a second mast on the quay (issue 6). Everything here is new: the
# default `simulate_lowmarsh` output is unchanged (its random stream is not touched; the
# quay and the weather use their own streams derived from the seed).
@dataclass(frozen=True)
class RainEpisodes:
    """Weather of the invented Lowmarsh recording (our numbers). Rain starts with
    probability ``start_prob`` per dry scan and lasts a geometric number of scans of mean
    ``mean_length_scans``; while it rains the sea clutter intensity is × ``factor``.
    Sea state (Douglas scale) steps by ±1 with probability ``sea_state_step_prob`` per
    scan within [2, 5], × exp(``sea_state_effect``·(state − 3)). Every scan also gets an
    independent gust factor u_k ~ Gamma(1/``gust_phi``, 1/``gust_phi``) (mean 1, variance φ)."""

    start_prob: float = 1.0 / 120.0
    mean_length_scans: float = 45.0
    factor: float = 2.5
    sea_state_step_prob: float = 1.0 / 150.0
    sea_state_start: int = 3
    sea_state_effect: float = 0.15
    gust_phi: float = 0.12

    def draw(self, rng: np.random.Generator, n_scans: int) -> dict:
        rain = np.zeros(n_scans, np.int64)
        sea = np.zeros(n_scans, np.int64)
        r, s = 0, self.sea_state_start
        u_start = rng.uniform(size=n_scans)
        u_stop = rng.uniform(size=n_scans)
        u_sea = rng.uniform(size=n_scans)
        for k in range(n_scans):  # a two-state Markov chain: one cheap pass over the scans
            r = (u_start[k] < self.start_prob) if r == 0 else (u_stop[k] >= 1.0 / self.mean_length_scans)
            if u_sea[k] < self.sea_state_step_prob:
                s = int(np.clip(s + (1 if u_sea[k] < self.sea_state_step_prob / 2 else -1), 2, 5))
            rain[k], sea[k] = int(r), s
        gust = rng.gamma(1.0 / self.gust_phi, self.gust_phi, size=n_scans)
        episode = np.concatenate([[0], np.cumsum(rain[1:] != rain[:-1])])
        mult = gust * self.factor ** rain * np.exp(self.sea_state_effect * (sea - 3))
        return {"rain": rain, "sea_state": sea, "episode": episode, "gust": gust, "multiplier": mult}


@dataclass(frozen=True)
class QuayMast:
    """The second Lowmarsh mast (invented): on the quay, 1.5 km east of the breakwater
    radar, looking north-north-west; it sees the same sea and the same shoal (a fixed place
    in the shared frame) from elsewhere, with its own range fall-off and land sector.
    Shared frame: the breakwater radar at (0, 0), heading 0 (its bearings are compass
    bearings)."""

    x_m: float = 1500.0
    y_m: float = -200.0
    heading_deg: float = -20.0
    range_m: tuple[float, float] = (200.0, 5000.0)
    bearing_deg: tuple[float, float] = (-60.0, 60.0)  # local, clockwise from the mast's heading
    land_bearing_deg: tuple[float, float] = (48.0, 60.0)  # local
    sea_peak: float = 5.0e-7
    sea_falloff_m: float = 900.0
    floor: float = 2.0e-8
    land: float = 2.0e-7
    scan_period_s: float = 2.4

    def region(self) -> Region:
        return Region(frame="polar", bounds0=self.range_m, bounds1=self.bearing_deg,
                      masks=(SectorMask(range=self.range_m, bearing=self.land_bearing_deg, name="land"),))

    def to_shared(self, r, b):
        x, y = polar_to_cartesian(r, np.asarray(b, float) + self.heading_deg)
        return x + self.x_m, y + self.y_m

    def sea_intensity(self, r, b, scene: Lowmarsh | None = None):
        sc = scene or Lowmarsh()
        r = np.asarray(r, float)
        X, Y = self.to_shared(r, b)
        sx, sy = polar_to_cartesian(sc.shoal_range_m, sc.shoal_bearing_deg)
        d2 = (X - sx) ** 2 + (Y - sy) ** 2
        return (self.sea_peak * np.exp(-(r - self.range_m[0]) / self.sea_falloff_m)
                + sc.shoal_peak * np.exp(-0.5 * d2 / sc.shoal_radius_m**2) + self.floor)

    def intensity(self, r, b, scene: Lowmarsh | None = None):
        b = np.asarray(b, float)
        on_land = (b >= self.land_bearing_deg[0]) & (b <= self.land_bearing_deg[1])
        return np.where(on_land, self.land + self.floor, self.sea_intensity(r, b, scene))

    def lam_max(self, scene: Lowmarsh | None = None) -> float:
        sc = scene or Lowmarsh()
        return self.sea_peak + sc.shoal_peak + self.floor + self.land

    def window_rate(self, scene: Lowmarsh | None = None, order: int = 64) -> tuple[float, float]:
        reg = self.region()

        def integral(n):
            c0, c1, w = reg.quadrature(n)
            return float(np.sum(w * self.sea_intensity(c0, c1, scene)))

        lo, hi = integral(order), integral(2 * order)
        return hi, abs(hi - lo)


def sample_thinning_scaled(rng, region: Region, intensity, lam_max: float, multipliers):
    """Thinning (Lewis & Shedler 1979) with a per-scan factor: scan k has intensity
    m_k·λ(z). Candidates: a homogeneous PPP of rate max(m)·λ_max per scan (Poisson total
    split uniformly over scans), kept with probability m_k λ(z) / (max(m) λ_max)."""
    m = np.asarray(multipliers, float)
    top = float(m.max()) * lam_max
    K = m.size
    total = rng.poisson(top * region.area() * K)
    c0, c1 = uniform_in_bounds(rng, region, total)
    scan = rng.integers(0, K, size=total)
    lam = intensity(c0, c1) * m[scan]
    if lam.size and (lam.max() > top * (1 + 1e-12) or lam.min() < 0):
        raise ValueError("thinning bound violated")
    keep = rng.uniform(0.0, top, size=total) < lam
    order = np.argsort(scan[keep], kind="stable")
    return scan[keep][order], c0[keep][order], c1[keep][order]


def _write_mast(out_dir: Path, scan, r, b, n_scans, period, site, weather, fmt, extra_truth, region,
                rate, err, seed, params, log, masked_land: str) -> dict:
    x, y = polar_to_cartesian(r, b)
    out_dir.mkdir(parents=True, exist_ok=True)
    det = pa.table({"scan": scan.astype(np.int64), "range": np.round(r, 3), "bearing": np.round(b, 5),
                    "x": np.round(x, 3), "y": np.round(y, 3)})
    cols = {"scan": np.arange(n_scans, dtype=np.int64), "time": np.round(np.arange(n_scans) * period, 3),
            "site": np.full(n_scans, site)}
    if weather is not None:
        cols.update({"rain": weather["rain"], "sea_state": weather["sea_state"],
                     "weather_episode": weather["episode"]})
    ext = "csv" if fmt == "csv" else "parquet"
    write = (lambda t, p: pacsv.write_csv(t, p)) if fmt == "csv" else (lambda t, p: pq.write_table(t, p))
    write(det, out_dir / f"detections.{ext}")
    write(pa.table(cols), out_dir / f"scans.{ext}")
    in_window = ~region.in_mask(r, b)
    info = {"site": site, "seed": seed, "scans": n_scans, "detections": int(scan.size),
            "detections_in_window": int(in_window.sum()), "true_rate_per_scan": rate,
            "true_rate_quadrature_error": err,
            "true_rate_note": "expected clutter detections per scan over the window without weather "
                              "(∫_W λ dA, Gauss–Legendre quadrature)" + (
                                  "; with weather each scan's rate is this × its multiplier" if weather else ""),
            "window_area_m2": float(region.window_area()), "parameters": params,
            "files": {"detections": f"detections.{ext}", "scans": f"scans.{ext}"}, **extra_truth}
    (out_dir / "truth.json").write_text(json.dumps(info, indent=2) + "\n")
    log(f"simulated {n_scans} scans at the {site} mast, {scan.size} detections "
        f"({int(in_window.sum())} over sea, {int((~in_window).sum())} on the masked {masked_land}) into "
        f"{out_dir}; true rate {rate:.4f} detections/scan over the window"
        + (" before weather" if weather else ""))
    return info


def simulate_quay(out_dir: Path, n_scans: int = 600, seed: int = 20261201, fmt: str = "csv",
                  weather: dict | None = None, mast: QuayMast | None = None, log=print) -> dict:
    """The quay mast's recording (same scans and times as the breakwater's, its own random
    stream), into ``out_dir``; ``weather`` (from :meth:`RainEpisodes.draw`) shared with the
    breakwater when given."""
    q = mast or QuayMast()
    sc = Lowmarsh()
    rng = np.random.default_rng([seed, 2])
    region = q.region()
    mult = np.ones(n_scans) if weather is None else weather["multiplier"]

    def lam(r, b):
        return q.intensity(r, b, sc)

    # weather acts on the sea; land returns stay (they are dropped as masked anyway)
    if weather is None:
        scan, r, b = sample_thinning(rng, region, lam, q.lam_max(sc), n_scans)
    else:
        scan, r, b = sample_thinning_scaled(rng, region, lam, q.lam_max(sc), mult)
    rate, err = q.window_rate(sc)
    sensor = {"x": q.x_m, "y": q.y_m, "heading": q.heading_deg, "frame": "lowmarsh"}
    return _write_mast(Path(out_dir), scan, r, b, n_scans, q.scan_period_s, "quay", weather, fmt,
                       {"sensor": sensor, "scenario": "Lowmarsh quay mast (invented)"}, region, rate, err,
                       seed, asdict(q), log, "quay land sector")


def simulate_scene(out_dir: Path, n_scans: int = 600, seed: int = 20261201, fmt: str = "csv",
                   rain: bool = False, second_mast: bool = True, vessels: bool | None = None,
                   log=print) -> dict:
    """The Lowmarsh demo data: the breakwater recording in ``out_dir`` and, with
    ``second_mast``, the quay mast's in ``out_dir/quay``.

    Without ``rain`` the breakwater files are exactly those of :func:`simulate_lowmarsh`
    (same seed, same numbers). With ``rain`` the weather (:class:`RainEpisodes`, its own
    random stream) multiplies the sea clutter of every scan at both masts, and the scans
    tables gain ``rain`` (0/1), ``sea_state`` and ``weather_episode`` columns; truth.json
    records the weather's parameters and the per-scan multipliers' mean.

    ``vessels`` (default: on without ``rain``, off with it, so the weather recording stays
    clutter only for the over-dispersion workflow) adds the vessels of
    :class:`LowmarshVessels` to the breakwater recording: their detections mixed into
    detections.csv and their positions per scan in objects.csv. The quay mast's recording
    has no vessels (a simplification of the demo)."""
    out_dir = Path(out_dir)
    weather = None
    vessels = (not rain) if vessels is None else bool(vessels)
    if not rain:
        info = simulate_lowmarsh(out_dir, n_scans=n_scans, seed=seed, fmt=fmt, vessels=vessels, log=log)
    else:
        if n_scans < 1:
            raise InputError(f"--scans must be ≥ 1, got {n_scans}")
        if fmt not in ("csv", "parquet"):
            raise InputError(f"--format must be csv or parquet, got {fmt!r}")
        rp = RainEpisodes()
        weather = rp.draw(np.random.default_rng([seed, 1]), n_scans)
        sc = Lowmarsh()
        rng = np.random.default_rng(seed)
        region = sc.region()
        is_land = lambda b: (np.asarray(b) >= sc.land_bearing_deg[0]) & (np.asarray(b) <= sc.land_bearing_deg[1])  # noqa: E731
        scan, r, b = sample_thinning_scaled(rng, region, sc.sea_intensity, sc.lam_max(), weather["multiplier"])
        keep = ~is_land(b)  # sea clutter (× weather) outside the land sector ...
        ls, lr, lb = sample_thinning(rng, region, lambda r_, b_: np.where(is_land(b_), sc.land + sc.floor, 0.0),
                                     sc.land + sc.floor, n_scans)  # ... land returns unchanged
        scan, r, b = (np.concatenate([scan[keep], ls]), np.concatenate([r[keep], lr]),
                      np.concatenate([b[keep], lb]))
        o = np.argsort(scan, kind="stable")
        scan, r, b = scan[o], r[o], b[o]
        clutter_in_window = int((~region.in_mask(r, b)).sum())
        vessel_info = None
        if vessels:
            out_dir.mkdir(parents=True, exist_ok=True)
            scan, r, b, vessel_info = add_vessels(out_dir, scan, r, b, n_scans, seed, fmt, region, log=log)
        rate, err = sc.window_rate()
        extra = {"scenario": "Lowmarsh breakwater radar with rain episodes (invented)",
                 "sensor": {"x": 0.0, "y": 0.0, "heading": 0.0, "frame": "lowmarsh"},
                 "weather": {"parameters": asdict(rp), "rain_scans": int(weather["rain"].sum()),
                             "episodes": int(weather["episode"].max()) + 1,
                             "mean_multiplier": float(weather["multiplier"].mean()),
                             "expected_rate_this_recording": rate * float(weather["multiplier"].mean())},
                 "clutter_detections_in_window": clutter_in_window}
        if vessel_info is not None:
            extra["vessels"] = vessel_info
        info = _write_mast(out_dir, scan, r, b, n_scans, sc.scan_period_s, "breakwater", weather, fmt, extra,
                           region, rate, err, seed, asdict(sc), log, "land")
        import xarray as xr

        grid = region.grid((58, 56))
        rr, bb = np.meshgrid(grid.centres0, grid.centres1, indexing="ij")
        xr.Dataset({"intensity": (("range", "bearing"), sc.intensity(rr, bb),
                                  {"units": "m-2 scan-1", "long_name": "true clutter intensity at cell centres "
                                                                       "before weather"})},
                   coords={"range": ("range", grid.centres0, {"units": "m"}),
                           "bearing": ("bearing", grid.centres1, {"units": "degree"})},
                   attrs={"scenario": "Lowmarsh (invented)", "seed": seed}).to_netcdf(out_dir / "truth.nc",
                                                                                      engine="h5netcdf")
    info["births"] = simulate_births(out_dir / "births", n_steps=n_scans, seed=seed, log=log)
    if second_mast:
        info["quay"] = simulate_quay(out_dir / "quay", n_scans=n_scans, seed=seed, fmt=fmt, weather=weather, log=log)
    return info


__all__ += ["RainEpisodes", "QuayMast", "sample_thinning_scaled", "simulate_quay", "simulate_scene"]


@dataclass(frozen=True)
class LowmarshBirths:
    """Where new vessels appear at Lowmarsh (invented numbers), Cartesian metres from the
    breakwater radar (x east, y north): the harbour mouth and the ferry slip."""

    box_x: tuple[float, float] = (-2000.0, 2000.0)
    box_y: tuple[float, float] = (0.0, 3000.0)
    weights: tuple[float, ...] = (0.12, 0.08)  # untruncated expected births per step
    means: tuple[tuple[float, float], ...] = ((-350.0, 1500.0), (600.0, 800.0))
    sds: tuple[tuple[float, float], ...] = ((180.0, 90.0), (70.0, 70.0))
    corr: tuple[float, ...] = (0.4, 0.0)
    step_s: float = 2.4

    def covs(self) -> np.ndarray:
        out = []
        for (sx, sy), r in zip(self.sds, self.corr):
            out.append([[sx * sx, r * sx * sy], [r * sx * sy, sy * sy]])
        return np.asarray(out)


def simulate_births(out_dir: Path, n_steps: int = 600, seed: int = 20261201, log=print) -> dict:
    """Birth events of the Lowmarsh demo: births.csv (step, x [m], y [m]), steps.csv
    (step, duration [s]) and truth.json (the mixture, its in-box masses and rate).

    A PPP with Gaussian-mixture intensity restricted to the box, sampled by restriction
    (Kingman 1993, §2.2: keep the mixture's points that fall inside), in one batch over
    steps; its own random stream, so the clutter tables do not change."""
    from scipy.stats import multivariate_normal

    from .mixture_mass import box_mass

    b = LowmarshBirths()
    rng = np.random.default_rng([seed, 7])
    w, m, c = np.asarray(b.weights), np.asarray(b.means), b.covs()
    steps, xs, ys = [], [], []
    for j in range(len(w)):
        n = rng.poisson(w[j] * n_steps)
        pts = multivariate_normal(m[j], c[j]).rvs(size=n, random_state=rng).reshape(-1, 2)
        steps.append(rng.integers(0, n_steps, size=n))
        xs.append(pts[:, 0])
        ys.append(pts[:, 1])
    step, x, y = (np.concatenate(v) for v in (steps, xs, ys))
    inside = (x >= b.box_x[0]) & (x <= b.box_x[1]) & (y >= b.box_y[0]) & (y <= b.box_y[1])
    step, x, y = step[inside], x[inside], y[inside]
    o = np.argsort(step, kind="stable")
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    pacsv.write_csv(pa.table({"step": step[o].astype(np.int64), "x": np.round(x[o], 3), "y": np.round(y[o], 3)}),
                    out_dir / "births.csv")
    pacsv.write_csv(pa.table({"step": np.arange(n_steps, dtype=np.int64),
                              "duration": np.full(n_steps, b.step_s)}), out_dir / "steps.csv")
    mass = box_mass(m, c, (b.box_x, b.box_y)).mass
    info = {"scenario": "Lowmarsh births (invented)", "seed": seed, "steps": n_steps,
            "births": int(step.size), "weights_untruncated": list(b.weights),
            "in_box_mass": [float(v) for v in np.asarray(mass)],
            "true_rate_per_step": float(np.sum(w * np.asarray(mass))),
            "means_m": [list(v) for v in b.means], "covs_m2": c.tolist(), "step_s": b.step_s}
    (out_dir / "truth.json").write_text(json.dumps(info, indent=2) + "\n")
    log(f"simulated {step.size} births over {n_steps} steps into {out_dir}")
    return info


# --------------------------------------------------------------------------- vessels (issue 7)
@dataclass(frozen=True)
class LowmarshVessels:
    """Vessels leaving Lowmarsh (invented numbers): they appear where the birth scenario
    puts new objects (:class:`LowmarshBirths`: the harbour mouth and the ferry slip, with
    its means, covariances and relative weights) and head out to sea on a course of their
    origin, ``speed_mps`` uniform, with a white-noise acceleration of sd ``accel_sd``
    [m/s²] per axis (a nearly-constant-velocity motion). Arrivals form a Poisson process of
    ``arrival_per_scan`` vessels per scan, started ``lead_in_scans`` before the recording
    so that vessels are already under way at its first scan. The breakwater radar
    detects a vessel in view with probability ``p_detection`` per scan, at its position
    plus Cartesian noise N(0, ``noise_sd_m``² I). Fewer vessels per step than the birth
    scenario's 0.2: a realistic number of ships in view at once (about three)."""

    arrival_per_scan: float = 0.008
    course_deg: tuple[float, float] = (340.0, 318.0)  # clockwise from north: mouth, ferry slip
    course_sd_deg: tuple[float, float] = (12.0, 6.0)
    speed_mps: tuple[tuple[float, float], tuple[float, float]] = ((4.0, 8.0), (6.0, 9.0))
    accel_sd: float = 0.03
    p_detection: float = 0.9
    noise_sd_m: float = 15.0
    lead_in_scans: int = 1500
    max_scans: int = 2500
    scan_period_s: float = 2.4


def simulate_vessels(rng: np.random.Generator, n_scans: int, region: Region,
                     vessels: LowmarshVessels | None = None, births: LowmarshBirths | None = None) -> dict:
    """Vessel tracks, their detections and their positions per scan (vectorised over
    vessels and steps). A vessel is in view while its true position is inside the region's
    bounds (from its appearance to its first exit). Returns arrays: ``obj_scan``,
    ``obj_id``, ``obj_x``, ``obj_y`` (true positions [m] of the vessels in view per scan),
    ``det_scan``, ``det_x``, ``det_y`` (their detections inside the bounds), and the
    scenario."""
    v = vessels or LowmarshVessels()
    bs = births or LowmarshBirths()
    w = np.asarray(bs.weights, float)
    w = w / w.sum()
    n_v = int(rng.poisson(v.arrival_per_scan * (v.lead_in_scans + n_scans)))
    start = rng.integers(-v.lead_in_scans, n_scans, n_v)
    comp = rng.choice(w.size, size=n_v, p=w)
    chol = np.linalg.cholesky(bs.covs())
    p0 = np.asarray(bs.means)[comp] + np.einsum("vij,vj->vi", chol[comp], rng.standard_normal((n_v, 2)))
    course = np.deg2rad(np.asarray(v.course_deg)[comp] + rng.normal(0.0, 1.0, n_v) * np.asarray(v.course_sd_deg)[comp])
    lo, hi = np.asarray(v.speed_mps)[comp].T
    speed = rng.uniform(lo, hi)
    vel0 = speed[:, None] * np.stack([np.sin(course), np.cos(course)], axis=1)
    dt, T = v.scan_period_s, v.max_scans
    acc = rng.normal(0.0, v.accel_sd, (n_v, T, 2))
    vel = vel0[:, None, :] + dt * (np.cumsum(acc, axis=1) - acc)  # velocity at the start of each step
    step = vel * dt + 0.5 * acc * dt * dt
    pos = p0[:, None, :] + np.cumsum(step, axis=1) - step  # position at each step
    rr, bb = cartesian_to_polar(pos[..., 0], pos[..., 1])
    alive = np.cumprod(region.inside_bounds(rr.ravel(), bb.ravel()).reshape(n_v, T), axis=1).astype(bool)
    scan = start[:, None] + np.arange(T)[None, :]
    keep = alive & (scan >= 0) & (scan < n_scans)
    vid, i = np.nonzero(keep)
    obj_scan, obj_x, obj_y = scan[vid, i], pos[vid, i, 0], pos[vid, i, 1]
    seen = rng.uniform(size=obj_scan.size) < v.p_detection
    dx = obj_x[seen] + rng.normal(0.0, v.noise_sd_m, int(seen.sum()))
    dy = obj_y[seen] + rng.normal(0.0, v.noise_sd_m, int(seen.sum()))
    dr, db = cartesian_to_polar(dx, dy)
    inb = region.inside_bounds(dr, db)
    o = np.lexsort((vid, obj_scan))
    return {"obj_scan": obj_scan[o], "obj_id": vid[o] + 1, "obj_x": obj_x[o], "obj_y": obj_y[o],
            "det_scan": obj_scan[seen][inb], "det_x": dx[inb], "det_y": dy[inb],
            "n_vessels": int(np.unique(vid).size), "present_at_start": int(np.unique(vid[obj_scan == 0]).size),
            "scenario": v}


def expected_in_window(region: Region, x, y, noise_sd: float, rng: np.random.Generator, draws: int = 200):
    """(mean, Monte Carlo s.e.) over positions (x, y) [m] of P(position + N(0, σ²I) ∈ W),
    W the region minus its masks, with ``draws`` noise draws per position."""
    x = np.asarray(x, float)
    if x.size == 0:
        return np.zeros(0), np.zeros(0)
    zx = x[:, None] + rng.normal(0.0, noise_sd, (x.size, draws))
    zy = np.asarray(y, float)[:, None] + rng.normal(0.0, noise_sd, (x.size, draws))
    c0, c1 = (zx, zy) if region.frame == "cartesian" else cartesian_to_polar(zx, zy)
    c0, c1 = c0.ravel(), c1.ravel()
    inside = region.inside_bounds(c0, c1)
    if region.masks:
        inside[inside] = ~region.in_mask(c0[inside], c1[inside])
    p = inside.reshape(x.size, draws).mean(axis=1)
    return p, np.sqrt(p * (1 - p) / draws)


def add_vessels(out_dir: Path, scan, r, b, n_scans: int, seed: int, fmt: str, region: Region,
                vessels: LowmarshVessels | None = None, log=print):
    """Vessels into a polar Lowmarsh recording: returns (scan, range, bearing) of clutter and
    vessel detections mixed (sorted by scan, unlabeled) and the vessels' truth, and writes
    OUT/objects.{csv,parquet}: scan, object, range [m], bearing [deg], x, y [m] (true
    positions), cov_xx, cov_xy, cov_yy [m²] (the Cartesian measurement covariance, for
    ellipse gates). Own random stream (seed, 3)."""
    v = vessels or LowmarshVessels()
    rng = np.random.default_rng([seed, 3])
    sim = simulate_vessels(rng, n_scans, region, v)
    vr, vb = cartesian_to_polar(sim["det_x"], sim["det_y"])
    all_scan = np.concatenate([scan, sim["det_scan"]])
    o = np.argsort(all_scan, kind="stable")
    r_all, b_all = np.concatenate([r, vr])[o], np.concatenate([b, vb])[o]
    orng, obrg = cartesian_to_polar(sim["obj_x"], sim["obj_y"])
    var = v.noise_sd_m**2
    m = sim["obj_scan"].size
    table = pa.table({"scan": sim["obj_scan"].astype(np.int64), "object": sim["obj_id"].astype(np.int64),
                      "range": np.round(orng, 3), "bearing": np.round(obrg, 5),
                      "x": np.round(sim["obj_x"], 3), "y": np.round(sim["obj_y"], 3),
                      "cov_xx": np.full(m, var), "cov_xy": np.zeros(m), "cov_yy": np.full(m, var)})
    ext = "csv" if fmt == "csv" else "parquet"
    (pacsv.write_csv if fmt == "csv" else pq.write_table)(table, out_dir / f"objects.{ext}")
    in_window_true = ~region.in_mask(orng, obrg) if region.masks else np.ones(m, bool)
    p, se = expected_in_window(region, sim["obj_x"], sim["obj_y"], v.noise_sd_m, np.random.default_rng([seed, 4]))
    det_in_window = int((~region.in_mask(vr, vb)).sum()) if region.masks else int(vr.size)
    info = {
        "file": f"objects.{ext}",
        "note": "vessels appear at the birth scenario's harbour mouth and ferry slip and head out to sea; "
                "their detections are mixed, unlabeled, into the detections table; the objects table holds "
                "their true positions in every scan they are in view",
        "vessels_in_recording": sim["n_vessels"],
        "present_at_first_scan": sim["present_at_start"],
        "object_rows": int(m),
        "p_detection": v.p_detection,
        "noise_sd_m": v.noise_sd_m,
        "mean_objects_in_view_per_scan": m / n_scans,
        "mean_objects_in_window_per_scan": float(in_window_true.sum() / n_scans),
        "expected_object_detections_in_window_per_scan": float(v.p_detection * p.sum() / n_scans),
        "expected_object_detections_mc_se": float(v.p_detection * np.sqrt((se**2).sum()) / n_scans),
        "expected_note": "P_D × Σ over the vessels in view of P(its detection falls in the window), per scan "
                         "(Monte Carlo over the measurement noise): what a fit of all detections adds to the "
                         "clutter rate; a gate of probability P_G lets about P_D·(1 − P_G) per vessel leak in",
        "object_detections": int(sim["det_scan"].size),
        "detections_in_window": det_in_window,
        "parameters": {**asdict(v)},
    }
    log(f"simulated {sim['n_vessels']} vessels ({sim['present_at_start']} under way at the first scan, "
        f"{m / n_scans:.2f} in view per scan on average), {sim['det_scan'].size} vessel detections")
    return all_scan[o], r_all, b_all, info


__all__ += ["LowmarshBirths", "simulate_births", "LowmarshVessels", "simulate_vessels", "add_vessels",
            "expected_in_window"]
