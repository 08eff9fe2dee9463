"""Covariates on the grid for log-linear intensity models.

Names (evaluated at cell centres; polar grids use the mid-range and mid-bearing of the
cell, Cartesian grids measure range and bearing from the frame origin, where the sensor is
assumed to stand):

    x, y          metres
    range         metres
    log_range     natural log of range in metres
    bearing       degrees, clockwise from north
    <raster>      a user raster named in [[model.rasters]] (one value per cell)

and products/powers of those: ``range^2``, ``x*y``, ``log_range*bearing``, ``bearing^3``.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from .errors import InputError
from .geometry import Grid, cartesian_to_polar, polar_to_cartesian

BASE = ("x", "y", "range", "log_range", "bearing")
UNITS = {"x": "m", "y": "m", "range": "m", "log_range": "log(m)", "bearing": "degree"}
_TERM = re.compile(r"^([A-Za-z_][A-Za-z0-9_]*)(?:\^([1-9]))?$")


def _base_values(grid: Grid) -> dict[str, np.ndarray]:
    c0, c1 = np.meshgrid(grid.centres0, grid.centres1, indexing="ij")
    if grid.frame == "polar":
        r, b = c0, c1
        x, y = polar_to_cartesian(r, b)
    else:
        x, y = c0, c1
        r, b = cartesian_to_polar(x, y)
    with np.errstate(divide="ignore"):
        logr = np.log(r)
    return {"x": x.ravel(), "y": y.ravel(), "range": r.ravel(), "log_range": logr.ravel(),
            "bearing": b.ravel()}


def load_raster(name: str, path: Path, grid: Grid) -> np.ndarray:
    """A raster file (.npy array or .csv of n0 rows × n1 columns) matching the grid."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: raster '{name}' file not found")
    try:
        if path.suffix.lower() == ".npy":
            arr = np.load(path, allow_pickle=False)
        elif path.suffix.lower() == ".csv":
            arr = np.loadtxt(path, delimiter=",", ndmin=2)
        else:
            raise InputError(f"{path}: raster '{name}' must be .npy or .csv")
    except InputError:
        raise
    except ValueError as exc:
        raise InputError(f"{path}: raster '{name}' is not a numeric array ({exc})") from None
    if arr.shape != grid.shape:
        raise InputError(f"{path}: raster '{name}' has shape {arr.shape} but the grid has "
                         f"{grid.shape} cells ({grid.axes[0]} × {grid.axes[1]}); resample it to the grid")
    if not np.isfinite(arr).all():
        raise InputError(f"{path}: raster '{name}' has NaN or infinite values; fill them")
    return np.asarray(arr, float).ravel()


def design_matrix(names: list[str], grid: Grid, rasters: dict[str, np.ndarray] | None = None,
                  source: str = "spec") -> np.ndarray:
    """(n_cells, len(names)) matrix of covariate values at the cell centres."""
    rasters = rasters or {}
    base = _base_values(grid)
    known = {**base, **rasters}
    cols = []
    seen = set()
    for name in names:
        if name in seen:
            raise InputError(f"{source}: covariate '{name}' is listed twice")
        seen.add(name)
        col = np.ones(grid.n_cells)
        for factor in name.split("*"):
            m = _TERM.match(factor.strip())
            if not m or m.group(1) not in known:
                import difflib

                bad = m.group(1) if m else factor
                close = difflib.get_close_matches(bad, list(known), n=1)
                hint = f" (did you mean '{close[0]}'?)" if close else ""
                raise InputError(f"{source}: unknown covariate '{bad}' in '{name}'{hint}; known: "
                                 f"{', '.join(known)}, products with '*' and powers with '^k'")
            col = col * known[m.group(1)] ** int(m.group(2) or 1)
        cols.append(col)
    X = np.stack(cols, axis=1) if cols else np.zeros((grid.n_cells, 0))
    return X


def standardise(X: np.ndarray, weights: np.ndarray, source: str = "spec", names=()):
    """Centre and scale columns by their window-area-weighted mean and sd over cells with
    area in the window (geometry only, never the counts). Returns (Z, mean, scale)."""
    inside = weights > 0
    Xi = X[inside]
    w = weights[inside] / weights[inside].sum()
    mean = (w[:, None] * Xi).sum(axis=0)
    sd = np.sqrt((w[:, None] * (Xi - mean) ** 2).sum(axis=0))
    for j, s in enumerate(sd):
        if not np.isfinite(s) or s <= 1e-12 * max(1.0, abs(mean[j])):
            nm = names[j] if j < len(names) else j
            raise InputError(f"{source}: covariate '{nm}' is constant (or not finite) over the window; "
                             "drop it (the intercept already carries a constant)")
    Z = np.zeros_like(X)
    Z[inside] = (Xi - mean) / sd  # cells outside the window carry no data; left at 0
    return Z, mean, sd
