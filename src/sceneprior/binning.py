"""Binning: one object, :class:`BinnedStats`, carries the binned statistics into every model.

For a piecewise-constant intensity λ_c on grid cells and K independent scans, the
Poisson point-process log-likelihood is (DESIGN.md §2)

    log L = Σ_c [ N_c log λ_c − E_c λ_c ],   E_c = Σ_k |c ∩ W_k|  (exposure, m²·scan)

so (N_c, E_c) are sufficient and MCMC cost does not grow with scans or detections.
Limits of that claim: per-scan terms (over-dispersion, per-scan covariates, per-scan gates)
need the per-scan totals n_k and window integrals (kept here as ``scan_counts`` and
``window_area``, and with gates the sparse ``removed`` area per (scan, cell));
leave-one-scan-out needs the per-scan cell counts (``scan_cell``, sparse); Gaussian-mixture
fits use the points, not these bins.

Gates around known objects (issue 7, ``gates.py``): scan k's window is W_k = W minus the
union of its gates, so E_c = K·|c ∩ W| − Σ_k removed[k, c] and |W_k| = |W| − Σ_c removed[k, c].
``removed`` stays sparse (K × n_cells CSR): a dense per-scan window would cost K·n_cells.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from .geometry import Grid, Region
from .tables import Recording


@dataclass(frozen=True)
class BinnedStats:
    region: Region
    grid: Grid
    counts: np.ndarray  # (n_cells,) int64: N_c, detections summed over scans
    exposure: np.ndarray  # (n_cells,) float64: E_c = Σ_k |c ∩ W_k|  [m²·scan]
    window_area: np.ndarray  # (n_cells,) float64: |c ∩ W| of the permanent window [m²]
    cell_area: np.ndarray  # (n_cells,) float64: full cell areas [m²]
    n_scans: int
    scan_ids: np.ndarray  # (K,)
    scan_counts: np.ndarray  # (K,) int64: n_k
    scan_cell: sp.csr_matrix  # (K, n_cells) per-scan cell counts
    # the kept detections themselves, for point-level models (Gaussian mixtures use the
    # points, not the bins: binning inflates covariances by about h²/12 per axis)
    points0: np.ndarray | None = None  # (n,) x [m] or range [m]
    points1: np.ndarray | None = None  # (n,) y [m] or bearing [deg]
    point_scan: np.ndarray | None = None  # (n,) scan index
    # per-scan gates (issue 7): removed[k, c] = |c ∩ W ∩ gates of scan k| [m²], None without gates
    removed: sp.csr_matrix | None = None  # (K, n_cells)
    gate_info: dict | None = None  # what summary.json reports about the gates

    @property
    def has_gates(self) -> bool:
        return self.removed is not None

    @property
    def gated_area(self) -> np.ndarray:
        """(K,) area [m²] each scan's gates remove from the window (zeros without gates)."""
        if self.removed is None:
            return np.zeros(self.n_scans)
        return np.asarray(self.removed.sum(axis=1), dtype=np.float64).reshape(-1)

    @property
    def scan_window_area(self) -> np.ndarray:
        """(K,) |W_k| [m²]: the window of each scan (the permanent window minus its gates)."""
        return self.window_total - self.gated_area

    @property
    def n_detections(self) -> int:
        return int(self.counts.sum())

    @property
    def total_exposure(self) -> float:
        """Σ_c E_c in m²·scan."""
        return float(self.exposure.sum())

    @property
    def window_total(self) -> float:
        """|W| in m² (region minus permanent masks)."""
        return float(self.window_area.sum())

    @property
    def observed(self) -> np.ndarray:
        """Cells with exposure (E_c > 0); the others carry no data."""
        return self.exposure > 0


def bin_recording(rec: Recording, region: Region, grid: Grid, gates=None) -> BinnedStats:
    """Bin a validated recording on ``grid`` (vectorised; no loop per detection or scan).

    Without ``gates`` every scan shares the permanent window W, so E_c = K · |c ∩ W|. With
    ``gates`` (:class:`sceneprior.gates.Gates` of the recording, its detections inside them
    already dropped: ``Recording.drop_gated``) the gated area leaves each scan's window:
    E_c = K·|c ∩ W| − Σ_k removed[k, c] (``gates.removed_area``).
    """
    n_cells = grid.n_cells
    cell = grid.locate(rec.c0, rec.c1)
    if (cell < 0).any():  # cannot happen for validated data on a grid covering the region
        raise AssertionError("detections outside the grid after validation")
    counts = np.bincount(cell, minlength=n_cells).astype(np.int64)
    K = rec.n_scans
    scan_counts = np.bincount(rec.scan_index, minlength=K).astype(np.int64)
    scan_cell = sp.csr_matrix(
        (np.ones(cell.size, np.int64), (rec.scan_index, cell)), shape=(K, n_cells)
    )
    scan_cell.sum_duplicates()
    window_area = np.asarray(region.cell_window_area(grid), dtype=np.float64).reshape(-1)
    exposure, removed, info = K * window_area, None, None
    if gates is not None:
        from .gates import removed_area

        if gates.n_scans != K:
            raise AssertionError("gates of another recording (scan counts differ)")
        ex = removed_area(gates, region, grid)
        exposure, removed = np.maximum(ex.exposure(), 0.0), ex.removed  # round-off: E_c ≥ 0
        w_total = float(window_area.sum())
        frac = ex.per_scan / w_total if w_total > 0 else np.zeros(K)
        info = {"gates": int(gates.n_gates), "scans_with_gates": int(np.unique(gates.scan_index).size),
                "removed_m2_scan": float(ex.per_scan.sum()),
                "mean_fraction_of_window": float(frac.mean()) if K else 0.0,
                "max_fraction_of_window": float(frac.max()) if K else 0.0,
                "overlap_groups": ex.n_overlap_groups, "strip_lines": ex.lines,
                "polar_sides": ex.polar_sides}
    return BinnedStats(
        region=region,
        grid=grid,
        counts=counts,
        exposure=exposure,
        window_area=window_area,
        cell_area=np.asarray(grid.cell_area(), dtype=np.float64).reshape(-1),
        n_scans=K,
        scan_ids=rec.scan_ids,
        scan_counts=scan_counts,
        scan_cell=scan_cell,
        points0=rec.c0,
        points1=rec.c1,
        point_scan=rec.scan_index,
        removed=removed,
        gate_info=info,
    )
