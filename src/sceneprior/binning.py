"""Binning: one object, :class:`BinnedStats`, carries the binned statistics into every model.

For a piecewise-constant intensity λ_c on grid cells and K independent scans, the
Poisson point-process log-likelihood is (DESIGN.md §2)

    log L = Σ_c [ N_c log λ_c − E_c λ_c ],   E_c = Σ_k |c ∩ W_k|  (exposure, m²·scan)

so (N_c, E_c) are sufficient and MCMC cost does not grow with scans or detections.
Limits of that claim: per-scan terms (over-dispersion, per-scan covariates, per-scan gates)
need the per-scan totals n_k and window integrals (kept here as ``scan_counts`` and, with
a common window, ``window_area``); leave-one-scan-out needs the per-scan cell counts
(``scan_cell``, sparse); Gaussian-mixture fits use the points, not these bins.
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


def bin_recording(rec: Recording, region: Region, grid: Grid) -> BinnedStats:
    """Bin a validated recording on ``grid`` (vectorised; no loop per detection or scan).

    Every scan shares the permanent window W, so E_c = K · |c ∩ W|.
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
    return BinnedStats(
        region=region,
        grid=grid,
        counts=counts,
        exposure=K * window_area,
        window_area=window_area,
        cell_area=np.asarray(grid.cell_area(), dtype=np.float64).reshape(-1),
        n_scans=K,
        scan_ids=rec.scan_ids,
        scan_counts=scan_counts,
        scan_cell=scan_cell,
        points0=rec.c0,
        points1=rec.c1,
        point_scan=rec.scan_index,
    )
