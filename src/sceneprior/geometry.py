"""Regions, permanent masks, grids, exact areas, point location and quadrature.

Conventions (DESIGN.md §4, interfaces.md):

* Cartesian frame: x east, y north, metres.
* Polar frame: range r in metres, bearing θ in DEGREES measured clockwise from north
  (the sensor's boresight), so x = r·sin θ, y = r·cos θ.  Every user-facing bearing is in
  degrees; inside the area formulas bearings are converted to radians (said at each place).
* Areas are m².  Cells are indexed flat in C order, flat = i0·n1 + i1, axis 0 being x or
  range and axis 1 being y or bearing.
* float64 throughout; no jax in this module.

Exact areas
-----------
* Cartesian cell [x1, x2]×[y1, y2]: (x2 − x1)(y2 − y1).
* Polar cell [r1, r2]×[θ1, θ2]: ∫∫ r dr dθ = (r2² − r1²)/2 · (θ2 − θ1), θ in radians.
* Window W = region minus the union of its permanent masks.  |c ∩ W| is exact up to
  floating-point round-off:

  - SectorMask on a polar region: the region and the masks are rectangles in (r, θ).
    Their edges and the grid edges are merged into one sorted list per axis (coordinate
    compression); every elementary rectangle of that list is either fully inside or fully
    outside each rectangle, so its coverage is decided exactly (2-D difference array) and
    its area is the polar formula above.  Elementary areas are summed back into grid cells.
  - PolygonMask on a Cartesian region: shapely 2 vectorised overlay (shapely.box arrays,
    shapely.intersection, shapely.area) of the cells with W = box minus union of polygons.
  - PolygonMask on a polar region: |P ∩ cell| for the annular-sector cell
    [r1, r2]×[θ1, θ2] is F(r2) − F(r1), where F(R) = |P ∩ wedge(θ1, θ2) ∩ disc(R)|.
    P ∩ wedge is a plain polygon (shapely clip with a polygonal wedge that contains the
    whole disc of the largest radius, so the wedge's outer polyline never meets a disc).
    F(R) is computed EXACTLY by Green's theorem: the area of a polygon inside a disc
    centred at the origin is the sum, over its oriented boundary edges (a → b), of the
    signed area of triangle(O, a, b) ∩ disc(R); each edge is split at its intersections
    with the circle, a sub-edge inside the disc contributes cross(p, q)/2 and a sub-edge
    outside contributes the circular-sector area R²·∠(p, q)/2.  No arc is densified, so
    there is no discretisation error; only round-off (relative ~1e-13 for cells that are
    not nearly empty after the subtraction |c| − |c ∩ P|).
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import shapely

from sceneprior.errors import InputError

__all__ = [
    "polar_to_cartesian",
    "cartesian_to_polar",
    "PolygonMask",
    "SectorMask",
    "Grid",
    "Region",
]

_FRAMES = ("cartesian", "polar")
_AXES = {"cartesian": ("x", "y"), "polar": ("range", "bearing")}
_FULL_TURN_DEG = 360.0


# --------------------------------------------------------------------------- conversions
def polar_to_cartesian(r, bearing_deg):
    """Polar (range [m], bearing [deg], clockwise from north) -> Cartesian (x, y) [m].

    x = r·sin θ, y = r·cos θ with θ = bearing in radians.
    """
    r = np.asarray(r, dtype=np.float64)
    theta = np.deg2rad(np.asarray(bearing_deg, dtype=np.float64))
    return r * np.sin(theta), r * np.cos(theta)


def cartesian_to_polar(x, y):
    """Cartesian (x east, y north) [m] -> (range [m], bearing [deg] in (−180, 180]).

    r = hypot(x, y), θ = atan2(x, y) (clockwise from north).  The origin maps to bearing 0.
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    r = np.hypot(x, y)
    bearing = np.degrees(np.arctan2(x, y))
    # atan2 returns −π for x = −0.0, y < 0; the agreed range is (−180, 180].
    bearing = np.where(bearing <= -180.0, bearing + _FULL_TURN_DEG, bearing)
    return r, bearing


def _wrap_bearing(bearing, lo):
    """Map bearings [deg] into [lo, lo + 360); values already there are left untouched."""
    b = np.asarray(bearing, dtype=np.float64)
    inside = (b >= lo) & (b < lo + _FULL_TURN_DEG)
    return np.where(inside, b, lo + np.mod(b - lo, _FULL_TURN_DEG))


# --------------------------------------------------------------------------- validation
def _label(kind: str, name: str) -> str:
    return f"{kind} {name!r}" if name else kind


def _interval(value, what: str) -> tuple[float, float]:
    """Validate a (lo, hi) pair of finite numbers with lo < hi; return floats."""
    try:
        lo, hi = value
        lo, hi = float(lo), float(hi)
    except (TypeError, ValueError):
        raise InputError(f"{what} must be a pair (lo, hi) of numbers, got {value!r}") from None
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise InputError(f"{what} must be finite numbers, got ({lo}, {hi})")
    if not lo < hi:
        raise InputError(f"{what} must be increasing (lo < hi), got ({lo}, {hi})")
    return lo, hi


def _check_range_bearing(r_lo: float, b_lo: float, b_hi: float, what: str) -> None:
    if r_lo < 0.0:
        raise InputError(f"{what}: range must be >= 0 m, got lower bound {r_lo}")
    if b_hi - b_lo > _FULL_TURN_DEG:
        raise InputError(
            f"{what}: bearing span {b_hi - b_lo} deg exceeds 360 deg; give at most one full turn"
        )


def _check_name(name, what: str) -> None:
    if not isinstance(name, str):
        raise InputError(f"{what}: name must be a string, got {type(name).__name__}")


# --------------------------------------------------------------------------- masks
@dataclass(frozen=True, eq=False)
class PolygonMask:
    """A permanent exclusion polygon with Cartesian vertices (m, 2) in metres.

    The ring may be given closed (last vertex = first) or open; it is stored open.
    It must be a simple polygon (not self-intersecting) with at least 3 distinct vertices
    and positive area.  Points on its boundary are not inside the mask (measure zero).
    """

    vertices: np.ndarray
    name: str = ""

    def __post_init__(self):
        _check_name(self.name, "polygon mask")
        what = _label("polygon mask", self.name)
        try:
            v = np.array(self.vertices, dtype=np.float64)
        except (TypeError, ValueError):
            raise InputError(f"{what}: vertices must be an (m, 2) array of numbers") from None
        if v.ndim != 2 or v.shape[1] != 2:
            raise InputError(f"{what}: vertices must have shape (m, 2), got {v.shape}")
        if not np.all(np.isfinite(v)):
            raise InputError(f"{what}: vertices must be finite numbers")
        if len(v) > 1 and np.array_equal(v[0], v[-1]):
            v = v[:-1]
        if len(v) < 3 or len(np.unique(v, axis=0)) < 3:
            raise InputError(f"{what}: needs at least 3 distinct vertices, got {len(v)}")
        poly = shapely.Polygon(v)
        extent = float(np.max(np.ptp(v, axis=0)))
        if not poly.area > 1e-12 * extent * extent:
            raise InputError(f"{what}: polygon has zero area (collinear vertices?)")
        if not poly.is_valid:
            reason = shapely.is_valid_reason(poly)
            raise InputError(f"{what}: polygon is not simple ({reason}); fix its vertex order")
        v.setflags(write=False)
        object.__setattr__(self, "vertices", v)

    @cached_property
    def polygon(self) -> shapely.Polygon:
        """The mask as a shapely Polygon (Cartesian metres)."""
        return shapely.Polygon(self.vertices)

    def __eq__(self, other):
        if not isinstance(other, PolygonMask):
            return NotImplemented
        return self.name == other.name and np.array_equal(self.vertices, other.vertices)

    def __hash__(self):
        return hash((self.name, self.vertices.shape, self.vertices.tobytes()))


@dataclass(frozen=True)
class SectorMask:
    """A permanent exclusion interval in polar coordinates (polar regions only).

    range: (lo, hi) metres, 0 <= lo < hi.  bearing: (lo, hi) degrees clockwise from north,
    lo < hi, span at most 360; bearings are taken modulo 360 (e.g. (350, 370) = (−10, 10)).
    The mask is the annular sector {lo_r <= r <= hi_r, lo_θ <= θ <= hi_θ}; it may extend
    beyond the region and is clipped to it.  Points on its boundary are not inside.
    """

    range: tuple[float, float]
    bearing: tuple[float, float]
    name: str = ""

    def __post_init__(self):
        _check_name(self.name, "sector mask")
        what = _label("sector mask", self.name)
        r = _interval(self.range, f"{what}: range")
        b = _interval(self.bearing, f"{what}: bearing")
        _check_range_bearing(r[0], b[0], b[1], what)
        object.__setattr__(self, "range", r)
        object.__setattr__(self, "bearing", b)

    def contains_polar(self, r, bearing_deg) -> np.ndarray:
        """Open-interior membership of points given as range [m], bearing [deg]."""
        r = np.asarray(r, dtype=np.float64)
        b_lo, b_hi = self.bearing
        span = b_hi - b_lo
        in_r = (r > self.range[0]) & (r < self.range[1])
        if span >= _FULL_TURN_DEG:
            in_b = np.isfinite(np.asarray(bearing_deg, dtype=np.float64))
        else:
            d = _wrap_bearing(bearing_deg, b_lo) - b_lo
            in_b = (d > 0.0) & (d < span)
        return in_r & in_b


# --------------------------------------------------------------------------- grid
def _edges(values, what: str) -> np.ndarray:
    try:
        e = np.array(values, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"{what} must be a 1-D array of numbers") from None
    if e.ndim != 1 or len(e) < 2:
        raise InputError(f"{what} must be a 1-D array with at least 2 edges")
    if not np.all(np.isfinite(e)):
        raise InputError(f"{what} must be finite numbers")
    if not np.all(np.diff(e) > 0):
        raise InputError(f"{what} must be strictly increasing")
    e.setflags(write=False)
    return e


def _locate_axis(edges: np.ndarray, v: np.ndarray):
    """Half-open cells [lo, hi), the last one closed at the outer edge."""
    n = len(edges) - 1
    i = np.searchsorted(edges, v, side="right") - 1
    i = np.where(v == edges[-1], n - 1, i)
    ok = (i >= 0) & (i < n)  # NaN sorts past the end -> i = n -> outside
    return i, ok


@dataclass(frozen=True, eq=False)
class Grid:
    """A rectilinear grid in the native coordinates of a frame.

    edges0: x edges [m] (cartesian) or range edges [m] (polar), strictly increasing.
    edges1: y edges [m] (cartesian) or bearing edges [deg] (polar), strictly increasing,
    bearing span at most 360.
    """

    frame: str
    edges0: np.ndarray
    edges1: np.ndarray

    def __post_init__(self):
        if self.frame not in _FRAMES:
            raise InputError(f"grid frame must be 'cartesian' or 'polar', got {self.frame!r}")
        a0, a1 = _AXES[self.frame]
        e0 = _edges(self.edges0, f"grid {a0} edges")
        e1 = _edges(self.edges1, f"grid {a1} edges")
        if self.frame == "polar":
            _check_range_bearing(float(e0[0]), float(e1[0]), float(e1[-1]), "polar grid")
        object.__setattr__(self, "edges0", e0)
        object.__setattr__(self, "edges1", e1)

    def __eq__(self, other):
        if not isinstance(other, Grid):
            return NotImplemented
        return (
            self.frame == other.frame
            and np.array_equal(self.edges0, other.edges0)
            and np.array_equal(self.edges1, other.edges1)
        )

    def __hash__(self):
        return hash((self.frame, self.edges0.tobytes(), self.edges1.tobytes()))

    @property
    def axes(self) -> tuple[str, str]:
        """("x", "y") or ("range", "bearing")."""
        return _AXES[self.frame]

    @property
    def shape(self) -> tuple[int, int]:
        return (len(self.edges0) - 1, len(self.edges1) - 1)

    @property
    def n_cells(self) -> int:
        n0, n1 = self.shape
        return n0 * n1

    @property
    def centres0(self) -> np.ndarray:
        """Mid-points of axis 0 [m]."""
        return 0.5 * (self.edges0[:-1] + self.edges0[1:])

    @property
    def centres1(self) -> np.ndarray:
        """Mid-points of axis 1 ([m] or [deg])."""
        return 0.5 * (self.edges1[:-1] + self.edges1[1:])

    def cell_area(self) -> np.ndarray:
        """Exact cell areas (n0, n1) in m².

        Cartesian: Δx·Δy.  Polar: (r2² − r1²)/2 · Δθ with Δθ in radians, evaluated as
        (r2 − r1)(r2 + r1)/2 · Δθ.
        """
        e0, e1 = self.edges0, self.edges1
        if self.frame == "cartesian":
            return np.outer(np.diff(e0), np.diff(e1))
        radial = 0.5 * (e0[1:] - e0[:-1]) * (e0[1:] + e0[:-1])
        return np.outer(radial, np.deg2rad(np.diff(e1)))

    def locate(self, c0, c1) -> np.ndarray:
        """Flat C-order cell index (int64) of points in native coordinates; −1 outside.

        Cells are half-open [lo, hi) on each axis, the last cell closed at the outer edge.
        Polar bearings [deg] are first taken modulo 360 into [edges1[0], edges1[0] + 360).
        """
        c0 = np.asarray(c0, dtype=np.float64)
        c1 = np.asarray(c1, dtype=np.float64)
        c0, c1 = np.broadcast_arrays(c0, c1)
        if self.frame == "polar":
            c1 = _wrap_bearing(c1, self.edges1[0])
        i0, ok0 = _locate_axis(self.edges0, c0)
        i1, ok1 = _locate_axis(self.edges1, c1)
        n1 = self.shape[1]
        return np.where(ok0 & ok1, i0 * n1 + i1, -1).astype(np.int64)

    def cell_centres_xy(self) -> tuple[np.ndarray, np.ndarray]:
        """Cartesian centres (x, y) [m], each (n0, n1); polar: the point (r_mid, θ_mid)."""
        g0, g1 = np.meshgrid(self.centres0, self.centres1, indexing="ij")
        if self.frame == "cartesian":
            return g0, g1
        return polar_to_cartesian(g0, g1)


# --------------------------------------------------------------------------- polar helpers
def _shifted_bearing_intervals(a: float, b: float, lo: float, hi: float):
    """Copies [a + 360k, b + 360k] of a bearing interval, clipped to [lo, hi] (non-empty)."""
    out = []
    k_min = math.ceil((lo - b) / _FULL_TURN_DEG)
    k_max = math.floor((hi - a) / _FULL_TURN_DEG)
    for k in range(k_min, k_max + 1):
        s = _FULL_TURN_DEG * k
        ta, tb = max(a + s, lo), min(b + s, hi)
        if tb > ta:
            out.append((ta, tb))
    return out


def _polar_rects(r_iv, b_iv, extent):
    """Rectangles (r_a, r_b, θ_a, θ_b) of one (range, bearing) interval clipped to extent."""
    (r_lo, r_hi), (t_lo, t_hi) = extent
    ra, rb = max(r_iv[0], r_lo), min(r_iv[1], r_hi)
    if not rb > ra:
        return []
    return [(ra, rb, ta, tb) for ta, tb in _shifted_bearing_intervals(b_iv[0], b_iv[1], t_lo, t_hi)]


def _cover(rects, rb: np.ndarray, tb: np.ndarray) -> np.ndarray:
    """Boolean (len(rb)−1, len(tb)−1): elementary rectangle covered by any of rects.

    All rectangle edges must be members of rb / tb (coordinate compression), so coverage
    of each elementary rectangle is exact.  2-D difference array + cumulative sums.
    """
    nr, nt = len(rb) - 1, len(tb) - 1
    if not rects:
        return np.zeros((nr, nt), dtype=bool)
    q = np.asarray(rects, dtype=np.float64)
    ia = np.searchsorted(rb, q[:, 0])
    ib = np.searchsorted(rb, q[:, 1])
    ja = np.searchsorted(tb, q[:, 2])
    jb = np.searchsorted(tb, q[:, 3])
    d = np.zeros((nr + 1, nt + 1), dtype=np.int64)
    np.add.at(d, (ia, ja), 1)
    np.add.at(d, (ib, ja), -1)
    np.add.at(d, (ia, jb), -1)
    np.add.at(d, (ib, jb), 1)
    return np.cumsum(np.cumsum(d, axis=0), axis=1)[:nr, :nt] > 0


def _cross(p, q):
    return p[..., 0] * q[..., 1] - p[..., 1] * q[..., 0]


def _signed_disc_area(a: np.ndarray, b: np.ndarray, radii: np.ndarray) -> np.ndarray:
    """Signed area of triangle(O, a, b) ∩ disc(O, R), shape (n_edges, n_radii), m².

    The edge a→b (a, b: (E, 2), Cartesian) is split at its intersections with the circle
    |a + t(b − a)| = R, t ∈ [0, 1].  The piece inside the disc contributes cross(p, q)/2,
    the pieces outside contribute R²·∠(p, q)/2 (circular sector; ∠ signed, radians).
    Summed over an oriented closed boundary this is Green's theorem for the area inside
    the disc.  Exact up to round-off.
    """
    d = b - a
    qa = np.sum(d * d, axis=1)[:, None]
    qb = np.sum(a * d, axis=1)[:, None]
    r2 = (radii * radii)[None, :]
    qc = np.sum(a * a, axis=1)[:, None] - r2
    disc = qb * qb - qa * qc
    crosses = disc > 0.0
    sq = np.sqrt(np.where(crosses, disc, 0.0))
    t1 = np.where(crosses, (-qb - sq) / qa, 1.0)
    t2 = np.where(crosses, (-qb + sq) / qa, 1.0)
    t1 = np.clip(t1, 0.0, 1.0)
    t2 = np.clip(t2, 0.0, 1.0)
    a3, d3 = a[:, None, :], d[:, None, :]
    p1 = a3 + t1[..., None] * d3
    p2 = a3 + t2[..., None] * d3
    bb = np.broadcast_to(b[:, None, :], p2.shape)
    aa = np.broadcast_to(a3, p1.shape)

    def angle(p, q):
        return np.arctan2(_cross(p, q), np.sum(p * q, axis=-1))

    inside = 0.5 * _cross(p1, p2)
    outside = 0.5 * r2 * (angle(aa, p1) + angle(p2, bb))
    out = inside + outside
    out[:, radii <= 0.0] = 0.0
    return out


def _polygon_cell_areas_polar(union, rb: np.ndarray, tb: np.ndarray) -> np.ndarray:
    """|P ∩ [r_i, r_{i+1}]×[θ_j, θ_{j+1}]| for elementary cells, (len(rb)−1, len(tb)−1), m².

    P: shapely (Multi)Polygon, Cartesian.  Bearing intervals must be at most 90° wide.
    Method: module docstring (wedge clip + Green's theorem against discs; exact).
    """
    nt = len(tb) - 1
    n_arc = 4  # arc vertices per wedge: spacing <= 30 deg for widths <= 90 deg
    r_out = (float(rb[-1]) + 1.0) / math.cos(math.radians(15.0)) * 1.5
    frac = np.linspace(0.0, 1.0, n_arc)
    ang = tb[:-1, None] + (tb[1:] - tb[:-1])[:, None] * frac[None, :]
    ang[:, 0], ang[:, -1] = tb[:-1], tb[1:]
    coords = np.zeros((nt, n_arc + 2, 2))
    coords[:, 1 : n_arc + 1, 0], coords[:, 1 : n_arc + 1, 1] = polar_to_cartesian(r_out, ang)
    wedges = shapely.polygons(coords)
    pieces = shapely.intersection(wedges, union)
    parts, col = shapely.get_parts(pieces, return_index=True)
    parts, sub = shapely.get_parts(parts, return_index=True)
    col = col[sub]
    is_poly = shapely.get_type_id(parts) == 3
    parts, col = shapely.orient_polygons(parts[is_poly]), col[is_poly]
    f = np.zeros((nt, len(rb)))
    if len(parts):
        rings, ring_part = shapely.get_rings(parts, return_index=True)
        xy, ring_of = shapely.get_coordinates(rings, return_index=True)
        same = ring_of[:-1] == ring_of[1:]
        a, b = xy[:-1][same], xy[1:][same]
        edge_col = col[ring_part[ring_of[:-1][same]]]
        nonzero = np.any(a != b, axis=1)
        a, b, edge_col = a[nonzero], b[nonzero], edge_col[nonzero]
        # chunk over edges to bound memory (edges × radii × 2 float64 temporaries)
        step = max(1, 2_000_000 // max(len(rb), 1))
        for s in range(0, len(a), step):
            np.add.at(f, edge_col[s : s + step], _signed_disc_area(a[s : s + step], b[s : s + step], rb))
    return (f[:, 1:] - f[:, :-1]).T


# --------------------------------------------------------------------------- region
def _positive_int(v, what: str) -> int:
    if isinstance(v, bool) or not isinstance(v, numbers.Integral) or int(v) <= 0:
        raise InputError(f"{what} must be a positive integer, got {v!r}")
    return int(v)


@dataclass(frozen=True)
class Region:
    """Region of interest with permanent masks.

    frame: "cartesian" | "polar".
    bounds0: (lo, hi) x [m] or range [m] (range lo >= 0).
    bounds1: (lo, hi) y [m] or bearing [deg, clockwise from north], span <= 360.
    masks: PolygonMask (Cartesian vertices; on either frame) and, on polar regions only,
    SectorMask.  Masks may overlap each other and extend outside the bounds (clipped).
    Window W = bounds minus the union of the masks.
    """

    frame: str
    bounds0: tuple[float, float]
    bounds1: tuple[float, float]
    masks: tuple = field(default=())

    def __post_init__(self):
        if self.frame not in _FRAMES:
            raise InputError(f"region frame must be 'cartesian' or 'polar', got {self.frame!r}")
        a0, a1 = _AXES[self.frame]
        b0 = _interval(self.bounds0, f"region {a0} bounds")
        b1 = _interval(self.bounds1, f"region {a1} bounds")
        if self.frame == "polar":
            _check_range_bearing(b0[0], b1[0], b1[1], "polar region")
        masks = self.masks
        if isinstance(masks, (PolygonMask, SectorMask)):
            masks = (masks,)
        try:
            masks = tuple(masks)
        except TypeError:
            raise InputError("region masks must be a sequence of PolygonMask/SectorMask") from None
        for m in masks:
            if isinstance(m, SectorMask):
                if self.frame != "polar":
                    raise InputError(
                        f"{_label('sector mask', m.name)} needs a polar region; "
                        "use a PolygonMask on a Cartesian region"
                    )
            elif not isinstance(m, PolygonMask):
                raise InputError(
                    f"region masks must be PolygonMask or SectorMask, got {type(m).__name__}"
                )
        object.__setattr__(self, "bounds0", b0)
        object.__setattr__(self, "bounds1", b1)
        object.__setattr__(self, "masks", masks)

    # ----------------------------------------------------------------- cached pieces
    @cached_property
    def _sector_masks(self) -> tuple[SectorMask, ...]:
        return tuple(m for m in self.masks if isinstance(m, SectorMask))

    @cached_property
    def _polygon_union(self):
        """Union of the PolygonMasks (shapely, Cartesian, prepared) or None."""
        polys = [m.polygon for m in self.masks if isinstance(m, PolygonMask)]
        if not polys:
            return None
        u = shapely.union_all(polys)
        shapely.prepare(u)
        return u

    @cached_property
    def _box(self):
        (x0, x1), (y0, y1) = self.bounds0, self.bounds1
        return shapely.box(x0, y0, x1, y1)

    @cached_property
    def _cartesian_window(self):
        """W = box minus union of polygons (shapely, Cartesian)."""
        u = self._polygon_union
        return self._box if u is None else shapely.difference(self._box, u)

    # ----------------------------------------------------------------- grid & points
    def grid(self, cells) -> Grid:
        """Regular grid of cells = (n0, n1) exactly covering the bounds (np.linspace edges)."""
        try:
            n0, n1 = cells
        except (TypeError, ValueError):
            raise InputError(f"cells must be a pair (n0, n1) of positive integers, got {cells!r}") from None
        a0, a1 = _AXES[self.frame]
        n0 = _positive_int(n0, f"number of {a0} cells")
        n1 = _positive_int(n1, f"number of {a1} cells")
        e0 = np.linspace(self.bounds0[0], self.bounds0[1], n0 + 1)
        e1 = np.linspace(self.bounds1[0], self.bounds1[1], n1 + 1)
        return Grid(self.frame, e0, e1)

    def _native(self, c0, c1):
        c0 = np.asarray(c0, dtype=np.float64)
        c1 = np.asarray(c1, dtype=np.float64)
        return np.broadcast_arrays(c0, c1)

    def inside_bounds(self, c0, c1) -> np.ndarray:
        """Boolean array: point (native coordinates) inside the closed bounds.

        Polar bearings [deg] are taken modulo 360 into [lo, lo + 360) first.
        """
        c0, c1 = self._native(c0, c1)
        if self.frame == "polar":
            c1 = _wrap_bearing(c1, self.bounds1[0])
        (l0, h0), (l1, h1) = self.bounds0, self.bounds1
        return (c0 >= l0) & (c0 <= h0) & (c1 >= l1) & (c1 <= h1)

    def in_mask(self, c0, c1) -> np.ndarray:
        """Boolean array: point (native coordinates) in the interior of any permanent mask.

        Polygons: shapely.contains_xy on the union of polygons (Cartesian; polar points are
        converted with x = r sin θ, y = r cos θ).  SectorMask: open interval test in
        (r, θ mod 360).
        """
        c0, c1 = self._native(c0, c1)
        out = np.zeros(c0.shape, dtype=bool)
        for m in self._sector_masks:
            out |= m.contains_polar(c0, c1)
        u = self._polygon_union
        if u is not None:
            x, y = (c0, c1) if self.frame == "cartesian" else polar_to_cartesian(c0, c1)
            ok = np.isfinite(x) & np.isfinite(y)
            hit = np.zeros(c0.shape, dtype=bool)
            hit[ok] = shapely.contains_xy(u, x[ok], y[ok])
            out |= hit
        return out

    # ----------------------------------------------------------------- areas
    def area(self) -> float:
        """Area of the bounds, m²: Δx·Δy, or (r2² − r1²)/2 · Δθ (θ in radians)."""
        (l0, h0), (l1, h1) = self.bounds0, self.bounds1
        if self.frame == "cartesian":
            return (h0 - l0) * (h1 - l1)
        return 0.5 * (h0 - l0) * (h0 + l0) * math.radians(h1 - l1)

    def window_area(self) -> float:
        """|W| = |bounds minus union of masks|, m², exact (see module docstring)."""
        if self.frame == "cartesian":
            if self._polygon_union is None:
                return self.area()
            return float(shapely.area(self._cartesian_window))
        return float(self._polar_window_area(self.grid((1, 1))).sum())

    def cell_window_area(self, grid: Grid) -> np.ndarray:
        """|c ∩ W| for every cell of grid, shape (n0, n1), m², exact and vectorised.

        Overlapping masks are counted once; cells (partly) outside the bounds get only their
        part inside.  The grid must be in the region's frame; polar grid bearings are
        compared with the region's modulo 360.
        """
        if not isinstance(grid, Grid):
            raise InputError(f"cell_window_area needs a Grid, got {type(grid).__name__}")
        if grid.frame != self.frame:
            raise InputError(f"grid frame {grid.frame!r} differs from region frame {self.frame!r}")
        if self.frame == "cartesian":
            return self._cartesian_cell_window_area(grid)
        return self._polar_window_area(grid)

    def _cartesian_cell_window_area(self, grid: Grid) -> np.ndarray:
        e0, e1 = grid.edges0, grid.edges1
        (x0, x1), (y0, y1) = self.bounds0, self.bounds1
        ox = np.clip(np.minimum(e0[1:], x1) - np.maximum(e0[:-1], x0), 0.0, None)
        oy = np.clip(np.minimum(e1[1:], y1) - np.maximum(e1[:-1], y0), 0.0, None)
        out = np.outer(ox, oy)  # |c ∩ box|, exact
        u = self._polygon_union
        if u is None:
            return out
        w = self._cartesian_window
        # Two-level clip: column strips of the grid first, then the cells within each strip.
        strips = shapely.box(e0[:-1], e1[0], e0[1:], e1[-1])
        u_strips = shapely.intersection(strips, u)
        w_strips = shapely.intersection(strips, w)
        boxes = shapely.box(e0[:-1, None], e1[None, :-1], e0[1:, None], e1[None, 1:])
        touched = shapely.intersects(boxes, u_strips[:, None]) & (out > 0.0)
        if np.any(touched):
            w_cells = np.broadcast_to(w_strips[:, None], boxes.shape)
            out[touched] = shapely.area(shapely.intersection(boxes[touched], w_cells[touched]))
        return out

    def _polar_decomposition(self, grid: Grid, split_wide: bool):
        """Compressed edges rb [m], tb [deg] and the open (in bounds, not sector-masked) flags."""
        e0, e1 = grid.edges0, grid.edges1
        extent = ((float(e0[0]), float(e0[-1])), (float(e1[0]), float(e1[-1])))
        bounds_rects = _polar_rects(self.bounds0, self.bounds1, extent)
        mask_rects = [r for m in self._sector_masks for r in _polar_rects(m.range, m.bearing, extent)]
        rr = [e0] + [np.asarray(q)[:, 0:2].ravel() for q in (bounds_rects, mask_rects) if q]
        tt = [e1] + [np.asarray(q)[:, 2:4].ravel() for q in (bounds_rects, mask_rects) if q]
        if split_wide:  # lattice every 90 deg so that no elementary interval is wider
            lattice = e1[0] + 90.0 * np.arange(1, 4)
            tt.append(lattice[lattice < e1[-1]])
        rb = np.unique(np.concatenate(rr))
        tb = np.unique(np.concatenate(tt))
        open_ = _cover(bounds_rects, rb, tb) & ~_cover(mask_rects, rb, tb)
        return rb, tb, open_

    def _polar_window_area(self, grid: Grid) -> np.ndarray:
        poly = self._polygon_union
        rb, tb, open_ = self._polar_decomposition(grid, split_wide=poly is not None)
        radial = 0.5 * (rb[1:] - rb[:-1]) * (rb[1:] + rb[:-1])
        elem = np.outer(radial, np.deg2rad(np.diff(tb)))  # (r2² − r1²)/2 · Δθ[rad]
        if poly is not None:
            elem = np.clip(elem - _polygon_cell_areas_polar(poly, rb, tb), 0.0, None)
        elem = np.where(open_, elem, 0.0)
        i_start = np.searchsorted(rb, grid.edges0[:-1])
        j_start = np.searchsorted(tb, grid.edges1[:-1])
        return np.add.reduceat(np.add.reduceat(elem, i_start, axis=0), j_start, axis=1)

    # ----------------------------------------------------------------- quadrature
    def quadrature(self, order: int):
        """Nodes (native coordinates) and weights [m²] with Σ w·g(node) ≈ ∫_W g dA.

        Gauss–Legendre nodes/weights from numpy.polynomial.legendre.leggauss(order); an
        n-point rule is exact for polynomials of degree <= 2n − 1 on an interval
        (Abramowitz & Stegun 25.4.29).

        * Cartesian, no masks: order×order tensor rule on the box; exact for x^a·y^b with
          a, b <= 2·order − 1.
        * Cartesian with PolygonMasks: W is triangulated (shapely.constrained_delaunay_triangles)
          and each triangle gets the collapsed-coordinate (Duffy) conical-product rule:
          point = A + u(B − A) + u·v(C − B), u, v ∈ [0, 1] Gauss–Legendre, Jacobian 2|T|·u.
          Exact for polynomials of total degree <= 2·order − 2; Σ w = |W| for any order.
        * Polar: order×order tensor rule in (r, θ) on each rectangle of the window
          decomposition (bounds minus SectorMasks), Jacobian r folded into the weights
          (θ converted to radians); exact for g = r^a·θ^b with a <= 2·order − 2,
          b <= 2·order − 1, in particular Σ w = |W|.  Bearings of nodes in degrees.
        * Polar with PolygonMasks: not available (InputError).
        """
        n = _positive_int(order, "quadrature order")
        x, w = np.polynomial.legendre.leggauss(n)
        if self.frame == "cartesian":
            if self._polygon_union is None:
                (x0, x1), (y0, y1) = self.bounds0, self.bounds1
                return _tensor_rule(x, w, np.array([[x0, x1, y0, y1]]), jacobian_r=False)
            return _triangle_rule(x, w, self._cartesian_window)
        if self._polygon_union is not None:
            raise InputError(
                "quadrature on a polar region with polygon masks is not available; "
                "use SectorMasks or a Cartesian region"
            )
        rb, tb, open_ = self._polar_decomposition(self.grid((1, 1)), split_wide=False)
        i, j = np.nonzero(open_)
        rects = np.column_stack([rb[i], rb[i + 1], tb[j], tb[j + 1]])
        return _tensor_rule(x, w, rects, jacobian_r=True)


def _tensor_rule(x, w, rects, jacobian_r: bool):
    """Tensor Gauss–Legendre on rectangles (a0, b0, a1, b1); polar: θ [deg], weight × r."""
    h0 = 0.5 * (rects[:, 1] - rects[:, 0])
    m0 = 0.5 * (rects[:, 1] + rects[:, 0])
    h1 = 0.5 * (rects[:, 3] - rects[:, 2])
    m1 = 0.5 * (rects[:, 3] + rects[:, 2])
    n0 = m0[:, None, None] + h0[:, None, None] * x[None, :, None]
    n1 = m1[:, None, None] + h1[:, None, None] * x[None, None, :]
    n0, n1 = np.broadcast_arrays(n0, n1)
    scale1 = np.deg2rad(h1) if jacobian_r else h1
    wt = (h0 * scale1)[:, None, None] * (w[:, None] * w[None, :])[None]
    if jacobian_r:
        wt = wt * n0
    return n0.ravel().copy(), n1.ravel().copy(), wt.ravel()


def _triangle_rule(x, w, window):
    """Duffy collapsed-coordinate Gauss–Legendre rule on a triangulation of window."""
    tris = shapely.get_parts(shapely.constrained_delaunay_triangles(window))
    tris = tris[shapely.area(tris) > 0.0]
    if len(tris) == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    xy = shapely.get_coordinates(shapely.get_exterior_ring(tris)).reshape(len(tris), 4, 2)
    a, b, c = xy[:, 0], xy[:, 1], xy[:, 2]
    area2 = np.abs(_cross(b - a, c - a))  # 2|T|
    u = 0.5 * (x + 1.0)  # nodes on [0, 1]
    wu = 0.5 * w
    uu, vv = np.meshgrid(u, u, indexing="ij")
    ww = np.outer(wu, wu) * uu  # Jacobian factor u
    pts = (
        a[:, None, None, :]
        + uu[None, :, :, None] * (b - a)[:, None, None, :]
        + (uu * vv)[None, :, :, None] * (c - b)[:, None, None, :]
    )
    wt = area2[:, None, None] * ww[None]
    return pts[..., 0].ravel(), pts[..., 1].ravel(), wt.ravel()
