"""Named zones: sub-areas of the window with their own rate posterior and residuals.

The area of zone Z inside cell c and inside the window W is

    |c ∩ W ∩ Z| = |c ∩ W| − |c ∩ (W \\ Z)|,

where |c ∩ (W \\ Z)| is the window area of the same region with Z added as one more mask
(exact, by geometry.Region.cell_window_area). A zone's rate per scan is then
Σ_c λ_c |c ∩ W ∩ Z| (DESIGN.md §4).
"""

from __future__ import annotations

import numpy as np

from .errors import InputError
from .geometry import PolygonMask, Region, SectorMask


def _as_mask(z):
    if z.polygon is not None:
        return PolygonMask(vertices=np.asarray(z.polygon, float), name=z.name)
    return SectorMask(range=z.range, bearing=z.bearing, name=z.name)


def zone_cell_areas(region: Region, grid, zones, source: str = "spec") -> np.ndarray:
    """(n_zones, n_cells) areas |c ∩ W ∩ Z| in m²; refuses zones with no area in the window."""
    if not zones:
        return np.zeros((0, grid.n_cells))
    window = np.asarray(region.cell_window_area(grid), float).reshape(-1)
    out = []
    for z in zones:
        rest = Region(frame=region.frame, bounds0=region.bounds0, bounds1=region.bounds1,
                      masks=tuple(region.masks) + (_as_mask(z),))
        area = np.clip(window - np.asarray(rest.cell_window_area(grid), float).reshape(-1), 0.0, None)
        if area.sum() <= 1e-9 * max(window.sum(), 1.0):
            raise InputError(f"{source}: zone '{z.name}' has no area inside the window (region minus "
                             "masks); check its coordinates (x, y in m; range m, bearing deg)")
        out.append(area)
    return np.stack(out)
