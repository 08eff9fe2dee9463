"""Per-scan gates around known objects, and the window area they remove from every cell.

A recording with real objects in it carries, per scan k, a set of gates G_g (a disc or an
ellipse around each known object).  Scan k's window is W_k = W minus the union of its
gates (DESIGN.md §1), so the area that leaves the exposure of cell c in scan k is

    removed[k, c] = |c ∩ W ∩ ∪_{g in scan k} G_g|      [m²]

with overlapping gates and already-masked area counted once and gates cut at the region's
edge.  Detections inside any gate of their scan are dropped (and counted) by the caller.
This module is geometry only (numpy, scipy.sparse, shapely); it reads no tables.

API (float64 throughout; positions and sizes in metres, areas in m²)
--------------------------------------------------------------------
``gate_threshold(p_gate) -> gamma``
    γ = chi2.ppf(P_G, 2) = −2 ln(1 − P_G): the ellipse {d : dᵀ P⁻¹ d ≤ γ} holds a
    Gaussian N(0, P) with probability P_G.

``disc_gates(scan_index, c0, c1, radius, *, n_scans, frame="cartesian") -> Gates``
``ellipse_gates(scan_index, c0, c1, cov, p_gate, *, n_scans, frame="cartesian") -> Gates``
    scan_index: (G,) int, position of each gate's scan in the recording's scan list
    (0 … n_scans−1, like ``tables.Recording.scan_index``).  c0, c1: (G,) object position in
    the measurement frame: x, y [m] (cartesian) or range [m], bearing [deg, clockwise from
    north] (polar).  radius: scalar or (G,) [m] > 0.  cov: (2, 2) or (G, 2, 2) Cartesian
    position covariance [m²] (x east, y north), symmetric positive definite; p_gate:
    scalar or (G,) in (0, 1).  In both frames a gate is a disc/ellipse in Cartesian metres
    around the object's Cartesian position (polar: x = r sin θ, y = r cos θ).  Bad values
    raise InputError with one line naming the first offending gate (0-based row); the
    caller adds file and row context.  Several gates of one object in one scan are allowed
    here (they are just a union); rejecting duplicate object ids is the table reader's job.

``Gates`` (frozen dataclass) holds the gates sorted by scan (stable): ``scan_index``
    (G,) int64, ``x``, ``y`` (G,) centres [m], the lower-triangular factor
    L = [[l11, 0], [l21, l22]] [m] with L Lᵀ = γP (a disc: L = r·I), so that
    G = {c + L u : |u| ≤ 1}; ``source_index`` (G,) int64, the input row of each gate;
    ``n_scans``; ``area`` (π det L), ``max_semi_axis``.  ``Gates.concat(a, b, …)`` joins
    sets of one recording (source_index then counts rows of a, then of b, …).

``removed_area(gates, region, grid, *, lines=32, polar_tol=2e-3, threads=1,
               block_pairs=16_384) -> GateExposure``
    region: geometry.Region (bounds and permanent masks); grid: geometry.Grid in the same
    frame.  ``GateExposure.removed``: scipy.sparse.csr_matrix (K, n_cells) float64 [m²],
    removed[k, c] as above (C-order flat cell index of ``grid``, canonical CSR);
    ``per_scan`` (K,) [m²] = Σ_c removed[k, c] = |W ∩ ∪ G| inside the grid;
    ``window_area`` (n_cells,) the permanent |c ∩ W| [m²] (Region.cell_window_area);
    ``exposure()`` (n_cells,) [m²·scan] = K·|c ∩ W| − Σ_k removed[k, c], the E_c of the
    binned likelihood; ``scan_window_area()`` (K,) [m²] = |W_k| = Σ_c |c ∩ W| − per_scan,
    for per-scan terms (over-dispersion); diagnostics ``n_pairs``, ``n_overlap_groups``,
    ``lines``, ``polar_sides``.  Per-scan cell exposures are
    ``window_area − removed[k]`` (dense) — keep them sparse as ``removed``.

``in_gates(gates, scan_index, c0, c1, *, frame="cartesian") -> (n,) bool``
    True where a detection (scan_index (n,) as above, native coordinates, polar bearings in
    degrees) lies in a gate of its own scan (closed gate, dᵀ(γP)⁻¹d ≤ 1).  Vectorised by
    np.searchsorted on the scan-sorted gates; no loop per scan.  Count the dropped ones
    with ``mask.sum()`` or ``np.bincount(scan_index[mask], minlength=K)``.

Method and accuracy
-------------------
Work is done on *pieces*: the grid cells clipped to the region's bounds (Cartesian), or the
elementary rectangles in (r, θ) of the grid edges merged with the region's bounds and its
SectorMasks (polar; geometry's window decomposition), so that each piece is either open
or cut only by PolygonMasks.  For each gate the pieces its bounding box touches are found
with np.searchsorted on the piece edges (sparse, vectorised; polar: the box of the
circumscribed disc, bearings modulo 360).  With A_g = |G_g ∩ piece ∩ W| for one gate and
U the union of one scan's gates,

    |U ∩ piece ∩ W| = Σ_g A_g − X,   X = ∫_{piece ∩ W} (n(z) − 1)₊ dz,

n(z) = number of the scan's gates containing z (X = 0 when one gate touches the piece).

* A_g, exact (Cartesian): the piece ∩ W is a polygon (a rectangle, or shapely's difference
  with the PolygonMasks).  Under u = L⁻¹(z − c) the gate becomes the unit disc D;
  |G ∩ P| = det L · |D ∩ L⁻¹(P − c)|, and by Green's theorem the area of a polygon inside D
  is the sum over its oriented edges a → b of the signed area of triangle(O, a, b) ∩ D: the
  sub-segment p1 → p2 inside D gives cross(p1, p2)/2 and the parts outside give circular
  sectors ∠/2.  Because Σ ∠(a, b) over a closed boundary is 2π × the winding number of O,
  the sum is evaluated as Σ [cross(p1, p2) − ∠(p1, p2)]/2 + π·winding, the winding number
  by the crossing rule (sign logic only), so only edges that meet D need an arctan2; edges
  are evaluated once per gate and lattice edge and shared by neighbouring pieces.  Pieces
  whose boundary passes within 1e-9 gate radii of the centre (∠ ill-defined) and partial
  pieces use the direct per-edge form.  Exact for discs, axis-aligned and rotated
  ellipses up to round-off (measured ≤ 1e-12 of a cell's area, tests/test_gates.py).
* A_g, polar pieces: each annular sector [r1, r2]×[θ1, θ2] is replaced by a polygon whose
  two arcs are polylines of N equal-angle chords with vertices at radius
  R·sqrt(α / sin α), α = Δθ/N, which keeps the piece's area exact.  The symmetric
  difference of piece and polygon lies in the annuli R'cos(α/2) ≤ r ≤ R' and is at most
  Δθ·sin²(α/2)·(R1'² + R2'²)/2; N (one for all pieces, ≤ 256) is the smallest making this
  ≤ polar_tol × the area of the piece's grid cell, so |error of A_g| ≤ polar_tol·|c|
  (default 0.2 %; the chords cross the arcs, so errors of both signs cancel and the
  measured error is far smaller: ≤ 3e-5 of the cell with N = 7, ≤ 3e-4 with N = 4).
* X (only where ≥ 2 gates of one scan touch one piece): a strip rule with exact chords.
  Along axis 1 (Cartesian y; polar θ) every point covered twice lies between the group's
  2nd-smallest lower and 2nd-largest upper bound of the gates' extents; that range (∩ the
  piece) is cut into ``lines`` equal strips, and on the mid-line of each the intervals of
  every gate (line ∩ ellipse, a quadratic) and of the PolygonMasks (shapely) are swept
  exactly (sorted events, coverage counts), so the integrand (n − 1)₊·[outside masks] is
  exact on each line and only the 1-D midpoint rule across the strips errs.  That
  integrand is piecewise smooth with kinks (error O(s²) each, s the strip width) and
  square-root tips where a gate's boundary is tangent to the lines inside another gate
  (error ≤ ~0.67·sqrt(ρ)·s^1.5 per tip, ρ the boundary's radius of curvature); s scales
  with the overlap, not the cell.  A randomly placed lattice rule is unbiased, so signed
  errors average out.  The union is finally clipped to [max_g A_g, min(Σ_g A_g,
  |piece ∩ W|)], true bounds that can only reduce the error.  Measured with 32 lines
  (tests/test_gates.py): two coincident discs ≤ 0.03 % of a cell, random clusters of 2–4
  overlapping discs/ellipses (with and without a mask) ≤ 0.5 %, signed mean ~ 4e-5.

Cost: O(number of (gate, piece) pairs × edges per piece), no Python loop per scan or per
gate (loops run over blocks of whole scans, the 3 bearing copies of a polar box, and
nothing else).  Blocks are small (``block_pairs``) so temporaries stay in cache; with
``threads`` > 1 blocks run on a thread pool (numpy releases the GIL inside its loops; the
gain depends on the machine's load).  bench/bench_gates.py measures it.

Limits: gates are convex (discs/ellipses) in Cartesian metres; a polar measurement
covariance (in r, θ) must first be converted to Cartesian (e.g. by the Jacobian of
x = r sin θ, y = r cos θ, a linearisation).  Area outside the grid is not reported.
The polar path calls geometry's private window decomposition (Region._polar_decomposition).
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import scipy.sparse as sp
import shapely

from .errors import InputError
from .geometry import Grid, PolygonMask, Region, polar_to_cartesian

__all__ = [
    "gate_threshold",
    "Gates",
    "disc_gates",
    "ellipse_gates",
    "GateExposure",
    "removed_area",
    "in_gates",
]

_FULL_TURN_DEG = 360.0
_MAX_SIDES = 256


# =========================================================================== gates
def gate_threshold(p_gate):
    """γ = chi2.ppf(P_G, 2) = −2 ln(1 − P_G) (closed form for 2 degrees of freedom)."""
    p = np.asarray(p_gate, dtype=np.float64)
    return -2.0 * np.log1p(-p)


@dataclass(frozen=True, eq=False)
class Gates:
    """Gates sorted by scan: G = {(x, y) + L u : |u| ≤ 1}, L = [[l11, 0], [l21, l22]] [m].

    Build with :func:`disc_gates` / :func:`ellipse_gates`; ``source_index`` maps each gate
    back to its row in the arrays given to the constructor.
    """

    scan_index: np.ndarray  # (G,) int64, sorted ascending
    x: np.ndarray  # (G,) Cartesian centre [m]
    y: np.ndarray
    l11: np.ndarray  # (G,) [m] > 0
    l21: np.ndarray  # (G,) [m]
    l22: np.ndarray  # (G,) [m] > 0
    n_scans: int
    source_index: np.ndarray = field(default=None)  # (G,) int64

    @property
    def n_gates(self) -> int:
        return int(self.scan_index.size)

    @property
    def area(self) -> np.ndarray:
        """Full gate areas π·det L [m²] (before any cut by cells, region or masks)."""
        return math.pi * self.l11 * self.l22

    @property
    def half_width(self) -> tuple[np.ndarray, np.ndarray]:
        """Half-widths of the axis-aligned bounding box: sqrt(M_xx), sqrt(M_yy), M = L Lᵀ."""
        return self.l11, np.hypot(self.l21, self.l22)

    @cached_property
    def max_semi_axis(self) -> np.ndarray:
        """Largest semi-axis sqrt(λ_max(L Lᵀ)) [m] (radius of the circumscribed disc)."""
        mxx = self.l11 * self.l11
        mxy = self.l11 * self.l21
        myy = self.l21 * self.l21 + self.l22 * self.l22
        half_tr = 0.5 * (mxx + myy)
        lam = half_tr + np.sqrt(np.maximum(0.25 * (mxx - myy) ** 2 + mxy * mxy, 0.0))
        return np.sqrt(lam)

    @staticmethod
    def concat(*parts: "Gates") -> "Gates":
        """Join gate sets of one recording (same n_scans).

        source_index of the result counts the input rows of the first part, then of the
        second, and so on (offset by the sizes of the parts before).
        """
        if not parts:
            raise InputError("Gates.concat needs at least one gate set")
        k = {p.n_scans for p in parts}
        if len(k) != 1:
            raise InputError(f"cannot join gates of recordings with different scan counts {sorted(k)}")
        offsets = np.cumsum([0] + [p.n_gates for p in parts[:-1]])
        cat = {f: np.concatenate([getattr(p, f) for p in parts])
               for f in ("scan_index", "x", "y", "l11", "l21", "l22")}
        cat["source_index"] = np.concatenate([p.source_index + o for p, o in zip(parts, offsets)])
        order = np.argsort(cat["scan_index"], kind="stable")
        return Gates(n_scans=parts[0].n_scans, **{f: v[order] for f, v in cat.items()})


def _check_gates(gates) -> None:
    if not isinstance(gates, Gates):
        raise InputError(f"expected Gates (from disc_gates/ellipse_gates), got {type(gates).__name__}")
    if gates.n_gates and np.any(np.diff(gates.scan_index) < 0):
        raise InputError("Gates must be sorted by scan; build them with disc_gates/ellipse_gates")


def _first_bad(bad: np.ndarray) -> int:
    return int(np.flatnonzero(bad)[0])


def _positions(scan_index, c0, c1, n_scans, frame, what):
    if frame not in ("cartesian", "polar"):
        raise InputError(f"{what}: frame must be 'cartesian' or 'polar', got {frame!r}")
    if isinstance(n_scans, bool) or not isinstance(n_scans, (int, np.integer)) or n_scans < 0:
        raise InputError(f"{what}: n_scans must be a non-negative integer, got {n_scans!r}")
    try:
        s = np.asarray(scan_index)
        c0 = np.asarray(c0, dtype=np.float64)
        c1 = np.asarray(c1, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"{what}: scan_index and positions must be numeric arrays") from None
    if s.ndim != 1 or c0.shape != s.shape or c1.shape != s.shape:
        raise InputError(f"{what}: scan_index, c0 and c1 must be 1-D arrays of one length, got "
                         f"{s.shape}, {c0.shape}, {c1.shape}")
    if s.size and (s.dtype.kind not in "iu"):
        if s.dtype.kind != "f" or np.any(s != np.round(s)):
            raise InputError(f"{what}: scan_index must hold whole numbers")
    s = s.astype(np.int64)
    bad = (s < 0) | (s >= n_scans)
    if bad.any():
        i = _first_bad(bad)
        raise InputError(f"{what}: gate {i} has scan index {s[i]} outside 0..{n_scans - 1}; "
                         "every gate's scan must be in the scan list")
    bad = ~(np.isfinite(c0) & np.isfinite(c1))
    if bad.any():
        raise InputError(f"{what}: gate {_first_bad(bad)} has a non-finite position")
    if frame == "polar":
        bad = c0 < 0
        if bad.any():
            raise InputError(f"{what}: gate {_first_bad(bad)} has a negative range")
        x, y = polar_to_cartesian(c0, c1)
    else:
        x, y = c0, c1
    return s, np.asarray(x, np.float64), np.asarray(y, np.float64)


def _make(s, x, y, l11, l21, l22, n_scans) -> Gates:
    order = np.argsort(s, kind="stable")
    return Gates(scan_index=s[order], x=x[order], y=y[order], l11=l11[order],
                 l21=l21[order], l22=l22[order], n_scans=int(n_scans),
                 source_index=order.astype(np.int64))


def disc_gates(scan_index, c0, c1, radius, *, n_scans: int, frame: str = "cartesian") -> Gates:
    """Disc gates of ``radius`` [m] (scalar or (G,)) around positions in the native frame."""
    what = "disc gates"
    s, x, y = _positions(scan_index, c0, c1, n_scans, frame, what)
    try:
        r = np.broadcast_to(np.asarray(radius, dtype=np.float64), s.shape).copy()
    except (TypeError, ValueError):
        raise InputError(f"{what}: radius must be a number or one number per gate") from None
    bad = ~(np.isfinite(r) & (r > 0))
    if bad.any():
        i = _first_bad(bad)
        raise InputError(f"{what}: gate {i} has radius {r[i]!r}; a gate radius must be a positive number of metres")
    return _make(s, x, y, r, np.zeros_like(r), r.copy(), n_scans)


def ellipse_gates(scan_index, c0, c1, cov, p_gate, *, n_scans: int,
                  frame: str = "cartesian") -> Gates:
    """Ellipse gates {d : dᵀ P⁻¹ d ≤ γ(P_G)}, P the Cartesian covariance [m²] per gate."""
    what = "ellipse gates"
    s, x, y = _positions(scan_index, c0, c1, n_scans, frame, what)
    try:
        P = np.asarray(cov, dtype=np.float64)
        pg = np.broadcast_to(np.asarray(p_gate, dtype=np.float64), s.shape)
    except (TypeError, ValueError):
        raise InputError(f"{what}: cov must be (2, 2) or (G, 2, 2) numbers and p_gate numbers") from None
    if P.shape == (2, 2):
        P = np.broadcast_to(P, (s.size, 2, 2))
    if P.shape != (s.size, 2, 2):
        raise InputError(f"{what}: cov must have shape (2, 2) or ({s.size}, 2, 2), got {P.shape}")
    bad = ~((pg > 0) & (pg < 1))
    if bad.any():
        i = _first_bad(bad)
        raise InputError(f"{what}: gate {i} has gate probability {pg[i]!r}; it must lie strictly between 0 and 1")
    pxx, pxy, pyx, pyy = P[:, 0, 0], P[:, 0, 1], P[:, 1, 0], P[:, 1, 1]
    finite = np.isfinite(pxx) & np.isfinite(pxy) & np.isfinite(pyx) & np.isfinite(pyy)
    scale = np.maximum(np.abs(pxx), np.abs(pyy))
    bad = ~finite | (np.abs(pxy - pyx) > 1e-9 * np.where(finite, scale, 0.0))
    if bad.any():
        raise InputError(f"{what}: gate {_first_bad(bad)} has a non-finite or non-symmetric covariance")
    det = pxx * pyy - pxy * pxy
    bad = ~((pxx > 0) & (det > 1e-12 * scale * scale))
    if bad.any():
        raise InputError(f"{what}: gate {_first_bad(bad)} has a covariance that is not positive "
                         "definite (zero or negative size); give variances > 0 and |correlation| < 1")
    g = gate_threshold(pg)
    # Cholesky of γP: l11 = sqrt(γ Pxx), l21 = γ Pxy / l11, l22 = sqrt(γ det / Pxx)
    l11 = np.sqrt(g * pxx)
    l21 = g * pxy / l11
    l22 = np.sqrt(g * det / pxx)
    return _make(s, x, y, l11, l21, l22, n_scans)


# =========================================================================== unit-disc kernels
def _to_unit(gx, gy, l11, l21, l22, vx, vy):
    """u = L⁻¹ (v − c) for lower-triangular L (broadcasting)."""
    ux = (vx - gx) / l11
    uy = ((vy - gy) - l21 * ux) / l22
    return ux, uy


def _edge_disc_area(ax, ay, bx, by):
    """Signed area of triangle(O, a, b) ∩ unit disc for edges a → b (elementwise).

    The edge is cut at |a + t(b − a)| = 1, t ∈ [0, 1] → p1, p2 (p1 = p2 = b when the line
    misses the disc or the edge lies outside it).  Inside part: cross(p1, p2)/2; outside
    parts: circular sectors (∠(a, p1) + ∠(p2, b))/2, angles signed (radians).  Summed over
    a closed oriented boundary this is Green's theorem for the area inside the disc.
    """
    dx = bx - ax
    dy = by - ay
    qa = dx * dx + dy * dy
    qb = ax * dx + ay * dy
    qc = ax * ax + ay * ay - 1.0
    disc = qb * qb - qa * qc
    hit = (disc > 0.0) & (qa > 0.0)
    sq = np.sqrt(np.where(hit, disc, 0.0))
    inv = 1.0 / np.where(hit, qa, 1.0)
    t1 = np.where(hit, np.clip((-qb - sq) * inv, 0.0, 1.0), 1.0)
    t2 = np.where(hit, np.clip((-qb + sq) * inv, 0.0, 1.0), 1.0)
    p1x = ax + t1 * dx
    p1y = ay + t1 * dy
    p2x = ax + t2 * dx
    p2y = ay + t2 * dy
    inside = p1x * p2y - p1y * p2x
    s1 = np.arctan2(ax * p1y - ay * p1x, ax * p1x + ay * p1y)
    s2 = np.arctan2(p2x * by - p2y * bx, p2x * bx + p2y * by)
    return 0.5 * (inside + s1 + s2)


def _line_chord(u0x, u0y, wx, wy):
    """Parameter interval {t : |u0 + t w| ≤ 1} → (t_lo, t_hi, hit) (elementwise)."""
    a = wx * wx + wy * wy
    b = u0x * wx + u0y * wy
    c = u0x * u0x + u0y * u0y - 1.0
    disc = b * b - a * c
    hit = disc > 0.0
    sq = np.sqrt(np.where(hit, disc, 0.0))
    return (-b - sq) / a, (-b + sq) / a, hit


# =========================================================================== pieces
@dataclass
class _Pieces:
    """The pieces (module docstring) on which areas are computed, flat over an (m0, m1) lattice."""

    frame: str
    e0: np.ndarray  # (m0+1,) lattice edges, axis 0 (x or range [m]) for the bounding-box search
    e1: np.ndarray  # (m1+1,) axis 1 (y [m] or bearing [deg])
    lo0: np.ndarray  # (n,) piece bounds (Cartesian: clipped to the region), flat C order
    hi0: np.ndarray
    lo1: np.ndarray
    hi1: np.ndarray
    active: np.ndarray  # (n,) bool: the piece has window area
    partial: np.ndarray  # (n,) bool: the piece is cut by a PolygonMask
    grid_cell: np.ndarray  # (n,) int64 flat grid cell holding the piece
    area_w: np.ndarray  # (n,) |piece ∩ W| of the polygon used [m²]
    lat: np.ndarray  # vertex lattice: (m0+1, m1+1, 2) Cartesian; (m0+1, m1, N+1, 2) polar
    verts: np.ndarray  # (n, V, 2) CCW polygon of each piece (Cartesian x, y) [m]
    edge_ptr: np.ndarray  # (n+1,) CSR pointer of the ragged edges of partial pieces
    edges: np.ndarray  # (E, 4) ax, ay, bx, by of piece ∩ W boundaries (exterior CCW, holes CW)
    mask_union: object  # shapely union of the PolygonMasks, or None
    sides: int  # chords per arc N (polar); 1 for Cartesian
    n_cells: int  # cells of the grid
    unit: np.ndarray | None = None  # polar: (m1, N+1, 2), lat[i, j, k] = e0[i]·unit[j, k]

    def __post_init__(self):
        if self.unit is not None:  # small tables (cache-resident) for the per-vertex gathers
            self.unit_x = np.ascontiguousarray(self.unit[..., 0]).ravel()
            self.unit_y = np.ascontiguousarray(self.unit[..., 1]).ravel()

    @property
    def m1(self) -> int:
        return self.e1.size - 1


def _mask_union(region: Region):
    polys = [m.polygon for m in region.masks if isinstance(m, PolygonMask)]
    if not polys:
        return None
    u = shapely.union_all(polys)
    shapely.prepare(u)
    return u


def _polar_sides(r1, r2, dth, cell_area, tol):
    """Smallest N with Δθ·sin²(α/2)·(R1'² + R2'²)/2 ≤ tol·|grid cell| for every piece."""
    n_min = max(1, int(math.ceil(float(np.max(dth, initial=0.0)) / 3.0)))  # α < π
    for n in range(n_min, _MAX_SIDES + 1):
        a = dth / n
        f2 = np.where(a > 0, a / np.sin(np.where(a > 0, a, 1.0)), 1.0)
        bound = 0.5 * dth * np.sin(0.5 * a) ** 2 * (r1 * r1 + r2 * r2) * f2
        if np.all(bound <= tol * cell_area):
            return n
    return _MAX_SIDES


def _polar_lattice(rb, tb, sides):
    """(m0+1, m1, N+1, 2) vertices rb[i]·U[j, k] and U (m1, N+1, 2): U[j, k] the point at
    radius sqrt(α_j / sin α_j) and the k-th of N+1 bearings of column j."""
    dth = np.deg2rad(np.diff(tb))
    alpha = dth / sides
    f = np.sqrt(np.where(alpha > 0, alpha / np.sin(np.where(alpha > 0, alpha, 1.0)), 1.0))
    frac = np.linspace(0.0, 1.0, sides + 1)
    bear = tb[:-1, None] + np.diff(tb)[:, None] * frac[None, :]  # (m1, N+1) [deg]
    bear[:, 0], bear[:, -1] = tb[:-1], tb[1:]
    unit = np.stack(polar_to_cartesian(f[:, None], bear), axis=-1)
    return rb[:, None, None, None] * unit[None], unit


def _build_pieces(region: Region, grid: Grid, lines: int, polar_tol: float) -> _Pieces:
    if not isinstance(grid, Grid):
        raise InputError(f"removed_area needs a Grid, got {type(grid).__name__}")
    if grid.frame != region.frame:
        raise InputError(f"grid frame {grid.frame!r} differs from region frame {region.frame!r}")
    mu = _mask_union(region)
    cell_area_grid = grid.cell_area().reshape(-1)
    if region.frame == "cartesian":
        e0, e1 = grid.edges0, grid.edges1
        X = np.clip(e0, *region.bounds0)
        Y = np.clip(e1, *region.bounds1)
        lo0, lo1 = (a.ravel() for a in np.meshgrid(X[:-1], Y[:-1], indexing="ij"))
        hi0, hi1 = (a.ravel() for a in np.meshgrid(X[1:], Y[1:], indexing="ij"))
        area_full = (hi0 - lo0) * (hi1 - lo1)
        active = area_full > 0
        grid_cell = np.arange(lo0.size, dtype=np.int64)
        gx, gy = np.meshgrid(X, Y, indexing="ij")
        lat = np.stack([gx, gy], axis=-1)  # (m0+1, m1+1, 2)
        verts = np.stack([lat[:-1, :-1], lat[1:, :-1], lat[1:, 1:], lat[:-1, 1:]], axis=2)
        verts = verts.reshape(-1, 4, 2)
        sides, unit = 1, None
    else:
        # elementary rectangles of grid edges, bounds and SectorMasks (geometry's decomposition)
        rb, tb, open_ = region._polar_decomposition(grid, split_wide=False)
        e0, e1 = rb, tb
        i0 = np.clip(np.searchsorted(grid.edges0, rb[:-1], side="right") - 1, 0, grid.shape[0] - 1)
        j0 = np.clip(np.searchsorted(grid.edges1, tb[:-1], side="right") - 1, 0, grid.shape[1] - 1)
        gi, gj = np.meshgrid(i0, j0, indexing="ij")
        grid_cell = (gi * grid.shape[1] + gj).ravel().astype(np.int64)
        lo0, lo1 = (a.ravel() for a in np.meshgrid(rb[:-1], tb[:-1], indexing="ij"))
        hi0, hi1 = (a.ravel() for a in np.meshgrid(rb[1:], tb[1:], indexing="ij"))
        active = open_.ravel().copy()
        dth = np.deg2rad(hi1 - lo1)
        area_full = 0.5 * (hi0 - lo0) * (hi0 + lo0) * dth  # = polygon area by construction
        sides = _polar_sides(lo0[active], hi0[active], dth[active],
                             cell_area_grid[grid_cell[active]], polar_tol)
        lat, unit = _polar_lattice(rb, tb, sides)
        # piece (i, j): outer arc with decreasing bearing (counter-clockwise, bearings run
        # clockwise), then the inner arc with increasing bearing
        outer = lat[1:, :, ::-1, :]
        inner = lat[:-1, :, :, :]
        verts = np.concatenate([outer, inner], axis=2).reshape(-1, 2 * sides + 2, 2)
    n = lo0.size
    partial = np.zeros(n, bool)
    area_w = np.where(active, area_full, 0.0)
    edge_ptr = np.zeros(n + 1, np.int64)
    edges = np.zeros((0, 4))
    if mu is not None and active.any():
        idx = np.flatnonzero(active)
        polys = shapely.polygons(verts[idx])
        touch = shapely.intersects(polys, mu)
        idx, polys = idx[touch], polys[touch]
        diff = shapely.difference(polys, mu)
        a_diff = shapely.area(diff)
        gone = a_diff <= 1e-12 * area_full[idx]
        full = a_diff >= area_full[idx] * (1.0 - 1e-12)
        active[idx[gone]] = False
        area_w[idx[gone]] = 0.0
        cut = ~gone & ~full
        idx, diff = idx[cut], diff[cut]
        partial[idx] = True
        area_w[idx] = a_diff[cut]
        edge_ptr, edges = _ragged_edges(diff, idx, n)
    pieces = _Pieces(region.frame, e0, e1, lo0, hi0, lo1, hi1, active, partial, grid_cell,
                     area_w, lat, verts, edge_ptr, edges, mu, sides, grid.n_cells, unit)
    return pieces


def _ragged_edges(geoms, piece_idx, n):
    """Oriented boundary edges (exterior CCW, holes CW) of polygons, CSR by piece."""
    parts, gi = shapely.get_parts(geoms, return_index=True)
    is_poly = shapely.get_type_id(parts) == 3
    parts, gi = shapely.orient_polygons(parts[is_poly]), gi[is_poly]
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    xy, ring_of = shapely.get_coordinates(rings, return_index=True)
    same = ring_of[:-1] == ring_of[1:]
    a, b = xy[:-1][same], xy[1:][same]
    owner = piece_idx[gi[ring_part[ring_of[:-1][same]]]]
    order = np.argsort(owner, kind="stable")
    owner = owner[order]
    edges = np.concatenate([a[order], b[order]], axis=1)
    ptr = np.zeros(n + 1, np.int64)
    np.add.at(ptr, owner + 1, 1)
    return np.cumsum(ptr), edges


# =========================================================================== pairs
def _axis_ranges(edges, lo, hi):
    """First lattice interval meeting (lo, hi) and the number of them (≥ 0)."""
    n = edges.size - 1
    first = np.maximum(np.searchsorted(edges, lo, side="right") - 1, 0)
    last = np.minimum(np.searchsorted(edges, hi, side="left") - 1, n - 1)
    return first, np.maximum(last - first + 1, 0)


def _grid_expand(c0, c1):
    """Ragged expansion of per-record c0 × c1 index boxes (axis 1 fastest).

    Returns (rec, d0, d1, start): record of each element, its box indices and the offset
    of each record's first element.
    """
    tot = c0 * c1
    start = np.cumsum(tot) - tot
    # rows (record, d0) first, then their elements: repeats only (no integer division)
    row_rec = np.repeat(np.arange(tot.size), c0)
    d0_row = np.arange(row_rec.size) - (np.cumsum(c0) - c0)[row_rec]
    n1_row = c1[row_rec]
    row_first = start[row_rec] + d0_row * n1_row  # position of element (record, d0, 0)
    d1 = np.arange(int(tot.sum()), dtype=np.int64) - np.repeat(row_first, n1_row)
    return np.repeat(row_rec, n1_row), np.repeat(d0_row, n1_row), d1, start


def _boxes(gates: Gates, sel: slice, p: _Pieces):
    """Bounding boxes on the piece lattice: records (gate, f0, n0, f1, n1), non-empty."""
    gx, gy = gates.x[sel], gates.y[sel]
    gid = np.arange(sel.start, sel.stop, dtype=np.int64)
    if p.frame == "cartesian":
        hx, hy = gates.l11[sel], np.hypot(gates.l21[sel], gates.l22[sel])
        f0, n0 = _axis_ranges(p.e0, gx - hx, gx + hx)
        f1, n1 = _axis_ranges(p.e1, gy - hy, gy + hy)
        recs = [(gid, f0, n0, f1, n1)]
    else:
        ext = gates.max_semi_axis[sel]
        rho = np.hypot(gx, gy)
        f0, n0 = _axis_ranges(p.e0, np.maximum(rho - ext, 0.0), rho + ext)
        phi = np.degrees(np.arctan2(gx, gy))
        around = ext >= rho  # the sensor inside the gate: every bearing
        delta = np.degrees(np.arcsin(np.clip(ext / np.where(rho > 0, rho, 1.0), 0.0, 1.0)))
        t0 = float(p.e1[0])
        recs = [(gid[around], f0[around], n0[around], np.zeros(int(around.sum()), np.int64),
                 np.full(int(around.sum()), p.m1, np.int64))]
        no = ~around
        k0 = np.floor((phi - t0) / _FULL_TURN_DEG)
        for d in (-1.0, 0.0, 1.0):  # fixed small loop over the bearing copies (mod 360)
            c = phi - _FULL_TURN_DEG * (k0 + d)
            f1, n1 = _axis_ranges(p.e1, c - delta, c + delta)
            recs.append((gid[no], f0[no], n0[no], f1[no], n1[no]))
    out = [np.concatenate([r[k] for r in recs]) for k in range(5)]
    keep = (out[2] > 0) & (out[4] > 0)
    return [a[keep].astype(np.int64) for a in out]


# =========================================================================== areas
_DEGENERATE = 1e-9  # gate centre this close (in gate radii) to a piece edge: robust path


def _edge_fast(ax, ay, bx, by):
    """Per oriented edge a → b (unit-disc frame): F, W, D (elementwise).

    With c_e the signed area of triangle(O, a, b) ∩ D (see :func:`_edge_disc_area`),
    c_e = F + ∠(a, b)/2, where F = [cross(p1, p2) − ∠(p1, p2)]/2 over the part p1 → p2 of
    the edge inside the disc (0 if none).  Summed over a closed boundary,
    Σ ∠(a, b) = 2π·winding(O), so the area is Σ F + π·Σ W with W the edge's signed crossing
    of the ray {(x, 0): x > 0} (winding-number rule, half-open in y; exact sign logic,
    no trigonometry).  Only edges meeting the disc need one arctan2.  D flags edges that
    pass within _DEGENERATE of O, where ∠(a, b) is ill-defined (conservatively: the edge's
    line passes that close): those pieces are redone by the direct formula.
    """
    cr = ax * by - ay * bx
    dx = bx - ax
    dy = by - ay
    # crossing of y = 0 (half-open) at x = cr/dy > 0: upward (+1) iff cr > 0, downward (−1)
    # iff cr < 0, i.e. the contribution is sign(cr) when cr and dy have the same sign
    cross = ((ay <= 0.0) != (by <= 0.0)) & ((cr > 0.0) == (dy > 0.0))
    W = (cross & (cr > 0.0)).view(np.int8) - (cross & (cr < 0.0)).view(np.int8)
    qa = dx * dx + dy * dy
    qb = ax * dx + ay * dy
    qc = ax * ax + ay * ay - 1.0
    disc = qb * qb - qa * qc
    pos = (disc > 0.0) & (qa > 0.0)
    sq = np.sqrt(np.maximum(disc, 0.0))
    hit = np.flatnonzero(pos & (-qb - sq < qa) & (sq > qb))  # t1 < 1 and t2 > 0
    F = np.zeros(ax.shape)
    D = np.zeros(ax.shape, bool)
    if hit.size:
        qa_, qb_, sq_ = qa[hit], qb[hit], sq[hit]
        ax_, ay_, dx_, dy_ = ax[hit], ay[hit], dx[hit], dy[hit]
        t1 = np.maximum((-qb_ - sq_) / qa_, 0.0)
        t2 = np.minimum((-qb_ + sq_) / qa_, 1.0)
        p1x, p1y = ax_ + t1 * dx_, ay_ + t1 * dy_
        p2x, p2y = ax_ + t2 * dx_, ay_ + t2 * dy_
        c12 = (t2 - t1) * cr[hit]  # cross(a + t1 d, a + t2 d) = (t2 − t1)·cross(a, b)
        F[hit] = 0.5 * (c12 - np.arctan2(c12, p1x * p2x + p1y * p2y))
        # the line through a, b passes within _DEGENERATE of O (distance |cross|/|d|)
        D[hit] = cr[hit] ** 2 <= (_DEGENERATE * _DEGENERATE) * qa_
    return F, W, D


def _eval_edges(gates: Gates, g, ax, ay, bx, by):
    """_edge_fast of Cartesian edges (ax, ay) → (bx, by) [m] in gate g's unit-disc frame."""
    gx, gy, l11, l21, l22 = gates.x[g], gates.y[g], gates.l11[g], gates.l21[g], gates.l22[g]
    ax, ay = _to_unit(gx, gy, l11, l21, l22, ax, ay)
    bx, by = _to_unit(gx, gy, l11, l21, l22, bx, by)
    return _edge_fast(ax, ay, bx, by)


def _polygon_areas(gates: Gates, g, verts):
    """|G_g ∩ polygon| by the direct edge formula; verts (P, V, 2) closed implicitly."""
    l11, l21, l22 = gates.l11[g, None], gates.l21[g, None], gates.l22[g, None]
    ux, uy = _to_unit(gates.x[g, None], gates.y[g, None], l11, l21, l22,
                      verts[..., 0], verts[..., 1])
    s = _edge_disc_area(ux, uy, np.roll(ux, -1, axis=1), np.roll(uy, -1, axis=1)).sum(axis=1)
    return gates.l11[g] * gates.l22[g] * s


def _ragged_areas(gates: Gates, g, piece, p: _Pieces):
    """|G_g ∩ piece ∩ W| for partial pieces (ragged polygon edges, direct formula)."""
    ne = p.edge_ptr[piece + 1] - p.edge_ptr[piece]
    owner = np.repeat(np.arange(g.size), ne)
    start = np.cumsum(ne) - ne
    e = p.edge_ptr[piece][owner] + (np.arange(int(ne.sum())) - start[owner])
    ed = p.edges[e]
    gg = g[owner]
    args = (gates.x[gg], gates.y[gg], gates.l11[gg], gates.l21[gg], gates.l22[gg])
    ax, ay = _to_unit(*args, ed[:, 0], ed[:, 1])
    bx, by = _to_unit(*args, ed[:, 2], ed[:, 3])
    s = np.bincount(owner, weights=_edge_disc_area(ax, ay, bx, by), minlength=g.size)
    return gates.l11[g] * gates.l22[g] * s


def _arc_sums(v, n, stride):
    """Σ_{k<n} v[a·stride + k] per arc a (chord k of every arc is the strided view v[k::stride];
    booleans are OR-ed); v holds arcs·stride − 1 values."""
    out = v[0::stride].copy()
    for k in range(1, n):  # fixed small loop over the chords of an arc (N ≤ 256)
        out += v[k::stride]
    return out


def _box_areas(gates: Gates, rec, p: _Pieces):
    """A = |G_g ∩ piece ∩ W| for every piece of every box record (exact Green's theorem).

    The boundary edges are evaluated once per gate and lattice edge (neighbouring pieces
    share them) and assembled per piece with signs; partial and degenerate pieces are
    recomputed by the direct formula.  Returns (gate, piece, A).
    """
    g_r, f0, n0, f1, n1 = rec
    m1 = p.m1
    if p.frame == "cartesian":
        X, Y = p.lat[:, 0, 0], p.lat[0, :, 1]  # clipped lattice coordinates (separable)
        # axis-0 edges (i, j) → (i+1, j): n0 × (n1+1) per record
        rh, dih, djh, sH = _grid_expand(n0, n1 + 1)
        i, y = f0[rh] + dih, Y[f1[rh] + djh]
        FH, WH, DH = _eval_edges(gates, g_r[rh], X[i], y, X[i + 1], y)
        # axis-1 edges (i, j) → (i, j+1): (n0+1) × n1 per record
        rv, div, djv, sV = _grid_expand(n0 + 1, n1)
        x, j = X[f0[rv] + div], f1[rv] + djv
        FV, WV, DV = _eval_edges(gates, g_r[rv], x, Y[j], x, Y[j + 1])
        rp, di, dj, _ = _grid_expand(n0, n1)
        n1p = n1[rp]
        hb = sH[rp] + di * (n1p + 1) + dj  # bottom, +x
        ht = hb + 1  # top, traversed −x
        vl = sV[rp] + di * n1p + dj  # left, traversed −y
        vr = vl + n1p  # right, +y
        s = FH[hb] - FH[ht] + FV[vr] - FV[vl]
        w = WH[hb].astype(np.int64) - WH[ht] + WV[vr] - WV[vl]
        deg = DH[hb] | DH[ht] | DV[vr] | DV[vl]
    else:
        N = p.sides
        s1 = N + 1  # vertices per column of the polar lattice
        # vertices (i, j, k) of each record's box, mapped once to the unit-disc frame
        rv, dv0, dv1, sV = _grid_expand(n0 + 1, n1 * s1)
        rad = p.e0[f0[rv] + dv0]  # vertex (i, j, k) = e0[i]·unit[j, k]
        k = f1[rv] * s1 + dv1
        cnt = (n0 + 1) * n1 * s1  # vertices per record: repeat the gate's parameters
        par = [np.repeat(a[g_r], cnt) for a in (gates.x, gates.y, gates.l11, gates.l21, gates.l22)]
        ux, uy = _to_unit(*par, rad * p.unit_x[k], rad * p.unit_y[k])
        # arc chords (i, j, k) → (i, j, k+1): consecutive vertices; the "chord" from k = N to
        # the next column's k = 0 is evaluated too (contiguous slices, no gather) and dropped
        FA, WA, DA = _edge_fast(ux[:-1], uy[:-1], ux[1:], uy[1:])
        # sum the N chords of each arc: strided views (chord k of every arc), no copies
        FA, WA, DA = _arc_sums(FA, N, s1), _arc_sums(WA.astype(np.int64), N, s1), _arc_sums(DA, N, s1)
        rp, di, dj, sP = _grid_expand(n0, n1)
        # piece (i, j) is the record's element di·n1 + dj: its inner arc (i, j) has that offset
        # from the record's first arc sV/s1, its outer arc (i+1, j) n1 more
        ain = np.arange(rp.size) + (sV // s1 - sP)[rp]
        aout = ain + n1[rp]
        v0 = ain * s1  # vertex (i, j, 0) in the record's vertices
        vo = aout * s1  # vertex (i+1, j, 0)
        # radial edges: at the column's first bearing inward, at its last bearing outward
        FL, WL, DL = _edge_fast(ux[vo], uy[vo], ux[v0], uy[v0])
        FR, WR, DR = _edge_fast(ux[v0 + N], uy[v0 + N], ux[vo + N], uy[vo + N])
        s = FA[ain] - FA[aout] + FL + FR
        w = WA[ain] - WA[aout] + WL.astype(np.int64) + WR
        deg = DA[ain] | DA[aout] | DL | DR
    g = g_r[rp]
    piece = (f0[rp] + di) * m1 + (f1[rp] + dj)
    A = gates.l11[g] * gates.l22[g] * (s + math.pi * w)
    redo = np.flatnonzero(deg & ~p.partial[piece])
    if redo.size:
        A[redo] = _polygon_areas(gates, g[redo], p.verts[piece[redo]])
    part = np.flatnonzero(p.partial[piece])
    if part.size:
        A[part] = _ragged_areas(gates, g[part], piece[part], p)
    return g, piece, A


# =========================================================================== overlap excess
def _axis1_extent(gates: Gates, g, piece, p: _Pieces):
    """Interval of axis 1 (y [m] or bearing [deg], near the piece) covering gate g."""
    if p.frame == "cartesian":
        hy = np.hypot(gates.l21[g], gates.l22[g])
        return gates.y[g] - hy, gates.y[g] + hy
    gx, gy = gates.x[g], gates.y[g]
    rho = np.hypot(gx, gy)
    ext = gates.max_semi_axis[g]
    phi = np.degrees(np.arctan2(gx, gy))
    mid = 0.5 * (p.lo1[piece] + p.hi1[piece])
    phi = phi + _FULL_TURN_DEG * np.round((mid - phi) / _FULL_TURN_DEG)
    delta = np.degrees(np.arcsin(np.clip(ext / np.where(rho > 0, rho, 1.0), 0.0, 1.0)))
    around = ext >= rho
    return np.where(around, -np.inf, phi - delta), np.where(around, np.inf, phi + delta)


def _mask_intervals(p: _Pieces, piece, pos):
    """PolygonMask intervals (line, t_a, t_b) on lines at pos (n, L) across pieces (shapely)."""
    if p.frame == "cartesian":
        xa = np.broadcast_to(p.lo0[piece, None], pos.shape)
        xb = np.broadcast_to(p.hi0[piece, None], pos.shape)
        ya = yb = pos
    else:
        xa, ya = polar_to_cartesian(p.lo0[piece, None], pos)
        xb, yb = polar_to_cartesian(p.hi0[piece, None], pos)
        xa, ya, xb, yb = np.broadcast_arrays(xa, ya, xb, yb)
    coords = np.stack([np.stack([xa, ya], -1), np.stack([xb, yb], -1)], axis=2)
    inter = shapely.intersection(shapely.linestrings(coords.reshape(-1, 2, 2)), p.mask_union)
    parts, line = shapely.get_parts(inter, return_index=True)
    keep = shapely.get_type_id(parts) == 1  # LineStrings only (points have no length)
    parts, line = parts[keep], line[keep]
    xy, part_of = shapely.get_coordinates(parts, return_index=True)
    t = xy[:, 0] if p.frame == "cartesian" else np.hypot(xy[:, 0], xy[:, 1])
    ta = np.full(parts.size, np.inf)
    tb = np.full(parts.size, -np.inf)
    np.minimum.at(ta, part_of, t)
    np.maximum.at(tb, part_of, t)
    ok = tb > ta
    return line[ok], ta[ok], tb[ok]


def _excess(gates: Gates, g, piece, group, n_groups, group_piece, p: _Pieces, lines: int):
    """X per group = ∫_{piece ∩ W} (n − 1)₊ by the strip rule with exact chords (docstring).

    g, piece, group: (P,) pairs of the groups with ≥ 2 gates, sorted by group; the strips
    span only [2nd smallest lower, 2nd largest upper] axis-1 bound of the group's gates
    (∩ the piece), which contains every point covered twice.
    """
    lo, hi = _axis1_extent(gates, g, piece, p)
    start = np.flatnonzero(np.concatenate([[True], group[1:] != group[:-1]]))
    o = np.lexsort((lo, group))
    lo2 = lo[o][start + 1]  # second smallest lower bound per group
    o = np.lexsort((-hi, group))
    hi2 = hi[o][start + 1]  # second largest upper bound per group
    L = np.maximum(lo2, p.lo1[group_piece])
    U = np.minimum(hi2, p.hi1[group_piece])
    width = np.maximum(U - L, 0.0)
    frac = (np.arange(lines) + 0.5) / lines
    gpos = L[:, None] + width[:, None] * frac[None, :]  # (n_groups, lines)
    pos = gpos[group]
    gx, gy = gates.x[g, None], gates.y[g, None]
    l11, l21, l22 = gates.l11[g, None], gates.l21[g, None], gates.l22[g, None]
    if p.frame == "cartesian":
        # line z = (t, y_j): u = L⁻¹((t, y_j) − c) = u0 + (t − cx) w
        u0x = np.zeros_like(pos)
        u0y = (pos - gy) / l22
        wx = np.broadcast_to(1.0 / l11, pos.shape)
        wy = np.broadcast_to(-l21 / (l11 * l22), pos.shape)
        a, b, hit = _line_chord(u0x, u0y, wx, wy)
        a, b = a + gx, b + gx
    else:
        # ray z = t·(sin θ, cos θ): u = −L⁻¹c + t L⁻¹e
        ex, ey = np.sin(np.deg2rad(pos)), np.cos(np.deg2rad(pos))
        u0x, u0y = _to_unit(gx, gy, l11, l21, l22, 0.0, 0.0)
        wx = ex / l11
        wy = (ey - l21 * wx) / l22
        u0x, u0y = np.broadcast_arrays(u0x, u0y)
        a, b, hit = _line_chord(u0x, u0y, wx, wy)
    a = np.maximum(a, p.lo0[piece, None])
    b = np.minimum(b, p.hi0[piece, None])
    ok = hit & (b > a) & (width[group] > 0)[:, None]
    line_key = group[:, None] * lines + np.arange(lines)[None, :]
    n_ok = int(ok.sum())
    keys = [line_key[ok], line_key[ok]]
    tpos = [a[ok], b[ok]]
    dg = [np.ones(n_ok, np.int8), -np.ones(n_ok, np.int8)]
    dm = [np.zeros(n_ok, np.int8)] * 2
    has = np.flatnonzero(p.partial[group_piece] & (width > 0))
    if has.size:  # PolygonMask intervals on the lines of partial pieces
        line, ta, tb = _mask_intervals(p, group_piece[has], gpos[has])
        k = has[line // lines] * lines + line % lines
        keys += [k, k]
        tpos += [ta, tb]
        z = np.zeros(k.size, np.int8)
        dg += [z, z]
        dm += [np.ones(k.size, np.int8), -np.ones(k.size, np.int8)]
    key = np.concatenate(keys)
    t = np.concatenate(tpos)
    order = np.lexsort((t, key))
    key, t = key[order], t[order]
    ng = np.cumsum(np.concatenate(dg)[order], dtype=np.int64)
    nm = np.cumsum(np.concatenate(dm)[order], dtype=np.int64)
    same = key[:-1] == key[1:]
    if p.frame == "cartesian":
        meas = t[1:] - t[:-1]
    else:
        meas = 0.5 * (t[1:] - t[:-1]) * (t[1:] + t[:-1])
    val = np.where(same & (nm[:-1] == 0), meas * np.maximum(ng[:-1] - 1, 0), 0.0)
    per_line = np.bincount(key[:-1], weights=val, minlength=n_groups * lines)
    if p.frame == "polar":
        width = np.deg2rad(width)
    return per_line.reshape(n_groups, lines).sum(axis=1) * width / lines


# =========================================================================== driver
@dataclass(frozen=True)
class GateExposure:
    """Window area removed by per-scan gates (see module docstring)."""

    removed: sp.csr_matrix  # (K, n_cells) float64 [m²]
    per_scan: np.ndarray  # (K,) [m²]
    window_area: np.ndarray  # (n_cells,) permanent |c ∩ W| [m²]
    n_pairs: int  # (gate, piece) pairs with positive area
    n_overlap_groups: int  # (scan, piece) groups with ≥ 2 gates (strip rule used)
    lines: int
    polar_sides: int  # chords per arc of the polar piece polygons (1: Cartesian)

    @property
    def n_scans(self) -> int:
        return int(self.removed.shape[0])

    def exposure(self) -> np.ndarray:
        """E_c = Σ_k |c ∩ W_k| = K·|c ∩ W| − Σ_k removed[k, c]  [m²·scan], (n_cells,)."""
        return self.n_scans * self.window_area - np.asarray(self.removed.sum(axis=0)).ravel()

    def scan_window_area(self) -> np.ndarray:
        """|W_k| = |W ∩ grid| − per_scan[k]  [m²], (K,)."""
        return float(self.window_area.sum()) - self.per_scan


def _block_bounds(gates: Gates, est, target):
    """Split gate indices into blocks at scan boundaries with ≈ target pairs each."""
    G = gates.n_gates
    if G == 0:
        return []
    cum = np.cumsum(est)
    cuts = np.searchsorted(cum, np.arange(target, cum[-1], target))
    cuts = np.unique(np.concatenate([[0], cuts, [G]]))
    # move cuts to scan boundaries
    s = gates.scan_index
    cuts = np.searchsorted(s, s[np.minimum(cuts, G - 1)], side="left")
    cuts = np.unique(np.concatenate([[0], cuts, [G]]))
    return [slice(int(a), int(b)) for a, b in zip(cuts[:-1], cuts[1:]) if b > a]


def _may_repeat(gates: Gates, sel: slice, p: _Pieces) -> bool:
    """Whether two bearing copies of one polar box can meet the same piece."""
    ext, rho = gates.max_semi_axis[sel], np.hypot(gates.x[sel], gates.y[sel])
    far = ext < rho
    delta = np.degrees(np.arcsin(ext[far] / rho[far])) if far.any() else np.zeros(1)
    return float(p.e1[-1] - p.e1[0]) + 2.0 * float(delta.max()) >= _FULL_TURN_DEG - 1e-9


def _process_block(gates: Gates, sel: slice, p: _Pieces, lines: int):
    """Removed area of the (scan, grid cell) entries of the gates in sel (whole scans)."""
    rec = _boxes(gates, sel, p)
    if rec[0].size == 0:
        return np.zeros(0, np.int32), np.zeros(0, np.int32), np.zeros(0), 0, 0
    g, piece, A = _box_areas(gates, rec, p)
    aw = p.area_w[piece]
    keep = np.flatnonzero(p.active[piece] & (A > 1e-13 * aw))
    g, piece, A = g[keep], piece[keep], np.minimum(A[keep], aw[keep])
    n_piece = p.lo0.size
    if p.frame == "polar" and g.size and _may_repeat(gates, sel, p):
        # a bearing span + gate width ≥ 360° can reach one piece through two bearing copies
        pk = g * n_piece + piece
        _, first = np.unique(pk, return_index=True)
        if first.size < pk.size:
            g, piece, A = g[first], piece[first], A[first]
    key = gates.scan_index[g] * n_piece + piece
    order = np.argsort(key, kind="stable")
    key, g, piece, A = key[order], g[order], piece[order], A[order]
    if key.size == 0:
        return np.zeros(0, np.int32), np.zeros(0, np.int32), np.zeros(0), 0, 0
    start = np.flatnonzero(np.concatenate([[True], key[1:] != key[:-1]]))
    size = np.diff(np.concatenate([start, [key.size]]))
    gkey = key[start]
    total = np.add.reduceat(A, start)
    value = total.copy()
    multi = np.flatnonzero(size >= 2)
    if multi.size:
        grp_of_pair = np.repeat(np.arange(start.size), size)
        in_multi = size[grp_of_pair] >= 2
        rank = np.full(start.size, -1, np.int64)
        rank[multi] = np.arange(multi.size)
        X = _excess(gates, g[in_multi], piece[in_multi], rank[grp_of_pair[in_multi]],
                    multi.size, piece[start[multi]], p, lines)
        amax = np.maximum.reduceat(A, start)[multi]
        hi = np.minimum(total[multi], p.area_w[piece[start[multi]]])
        value[multi] = np.clip(total[multi] - X, amax, hi)
    scan = gkey // n_piece
    cell = p.grid_cell[gkey % n_piece]
    if p.frame == "polar":  # several pieces per grid cell: sum them, keep (scan, cell) order
        ck = scan * p.n_cells + cell
        o = np.argsort(ck, kind="stable")
        ck, value = ck[o], value[o]
        first = np.flatnonzero(np.concatenate([[True], ck[1:] != ck[:-1]]))
        value = np.add.reduceat(value, first)
        scan, cell = ck[first] // p.n_cells, ck[first] % p.n_cells
    return scan.astype(np.int32), cell.astype(np.int32), value, int(g.size), int(multi.size)


def removed_area(gates: Gates, region: Region, grid: Grid, *, lines: int = 32,
                 polar_tol: float = 2e-3, threads: int = 1,
                 block_pairs: int = 16_384) -> GateExposure:
    """Area [m²] removed from each grid cell by each scan's gates (module docstring)."""
    _check_gates(gates)
    if not isinstance(region, Region):
        raise InputError(f"removed_area needs a Region, got {type(region).__name__}")
    if isinstance(lines, bool) or not isinstance(lines, (int, np.integer)) or lines < 1:
        raise InputError(f"lines must be a positive integer, got {lines!r}")
    if not (0.0 < float(polar_tol) < 0.1):
        raise InputError(f"polar_tol must lie in (0, 0.1), got {polar_tol!r}")
    p = _build_pieces(region, grid, int(lines), float(polar_tol))
    window = np.asarray(region.cell_window_area(grid), np.float64).reshape(-1)
    K, n_cells = gates.n_scans, grid.n_cells

    # rough pair estimate per gate for block sizes
    if p.frame == "cartesian":
        hx, hy = gates.half_width
        dx, dy = np.median(np.diff(p.e0)), np.median(np.diff(p.e1))
        est = (2 * hx / dx + 2) * (2 * hy / dy + 2)
    else:
        ext = gates.max_semi_axis
        rho = np.hypot(gates.x, gates.y)
        dr, dth = np.median(np.diff(p.e0)), np.median(np.diff(p.e1))
        half_b = np.degrees(np.arcsin(np.clip(ext / np.maximum(rho, 1e-300), 0.0, 1.0)))
        est = (2 * ext / dr + 2) * np.where(ext >= rho, p.m1, 2 * half_b / dth + 2) * (p.sides + 2) / 4
    blocks = _block_bounds(gates, est, max(int(block_pairs), 1))
    if isinstance(threads, bool) or not isinstance(threads, (int, np.integer)) or threads < 1:
        raise InputError(f"threads must be a positive integer, got {threads!r}")
    n_threads = int(threads)
    if n_threads > 1 and len(blocks) > 1:
        with ThreadPoolExecutor(max_workers=n_threads) as pool:
            res = list(pool.map(lambda b: _process_block(gates, b, p, int(lines)), blocks))
    else:
        res = [_process_block(gates, b, p, int(lines)) for b in blocks]
    # blocks hold whole scans in increasing order, each sorted by (scan, cell) without
    # duplicates, so the CSR arrays are assembled directly (canonical format)
    scan = np.concatenate([r[0] for r in res]) if res else np.zeros(0, np.int32)
    cell = np.concatenate([r[1] for r in res]) if res else np.zeros(0, np.int32)
    val = np.concatenate([r[2] for r in res]) if res else np.zeros(0)
    n_pairs, n_groups = sum(r[3] for r in res), sum(r[4] for r in res)
    del res
    # final guard against round-off and polygonisation: 0 ≤ removed ≤ |c ∩ W|
    np.clip(val, 0.0, window[cell], out=val)
    indptr = np.zeros(K + 1, np.int64)
    indptr[1:] = np.cumsum(np.bincount(scan, minlength=K))
    del scan
    m = sp.csr_matrix((val, cell, indptr), shape=(K, n_cells))
    m.has_canonical_format = True
    m.eliminate_zeros()
    per_scan = np.asarray(m.sum(axis=1)).ravel()
    return GateExposure(
        removed=m, per_scan=per_scan, window_area=window,
        n_pairs=int(n_pairs), n_overlap_groups=int(n_groups),
        lines=int(lines), polar_sides=int(p.sides),
    )


# =========================================================================== detections
def in_gates(gates: Gates, scan_index, c0, c1, *, frame: str = "cartesian",
             chunk: int = 65_536) -> np.ndarray:
    """(n,) bool: detection inside a (closed) gate of its own scan (module docstring)."""
    _check_gates(gates)
    s = np.asarray(scan_index, dtype=np.int64)
    c0 = np.asarray(c0, dtype=np.float64)
    c1 = np.asarray(c1, dtype=np.float64)
    if s.ndim != 1 or c0.shape != s.shape or c1.shape != s.shape:
        raise InputError(f"in_gates: scan_index, c0 and c1 must be 1-D arrays of one length, got "
                         f"{s.shape}, {c0.shape}, {c1.shape}")
    if frame == "polar":
        x, y = polar_to_cartesian(c0, c1)
    elif frame == "cartesian":
        x, y = c0, c1
    else:
        raise InputError(f"frame must be 'cartesian' or 'polar', got {frame!r}")
    out = np.zeros(s.size, bool)
    if s.size == 0 or gates.n_gates == 0:
        return out
    lo = np.searchsorted(gates.scan_index, s, side="left")
    hi = np.searchsorted(gates.scan_index, s, side="right")
    cnt = hi - lo
    cum = np.cumsum(cnt)
    # chunks of detections with ≈ chunk (detection, gate) pairs each
    cuts = np.unique(np.concatenate([[0], np.searchsorted(cum, np.arange(chunk, cum[-1], chunk)), [s.size]]))
    for a, b in zip(cuts[:-1], cuts[1:]):
        c = cnt[a:b]
        det = np.repeat(np.arange(a, b), c)
        start = np.cumsum(c) - c
        gi = lo[det] + (np.arange(int(c.sum())) - start[det - a])
        ux, uy = _to_unit(gates.x[gi], gates.y[gi], gates.l11[gi], gates.l21[gi], gates.l22[gi],
                          x[det], y[det])
        hit = ux * ux + uy * uy <= 1.0
        out[a:b] = np.bincount(det[hit] - a, minlength=b - a) > 0
    return out
