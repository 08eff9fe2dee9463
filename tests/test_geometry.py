"""Tests for sceneprior.geometry: exact areas, point location and quadrature.

Every numerical check names its reference next to it.  References used:
* closed-form areas derived by hand in the comments (rectangle, annular sector
  ∫∫ r dr dθ = (r2² − r1²)/2·Δθ, circular segment R²(α − sin α)/2, right triangle L²/2);
* inclusion–exclusion over interval rectangles (analytic);
* shapely's own Polygon.intersection/difference, one cell at a time (reference library);
* scipy.integrate.quad / dblquad (reference library);
* Gauss–Legendre exactness to degree 2n − 1 (Abramowitz & Stegun 25.4.29) and its
  remainder bound (A&S 25.4.30);
* the Dirichlet integral ∫_T x^a y^b = a! b! L^(a+b+2)/(a+b+2)! over the right
  triangle x, y >= 0, x + y <= L (standard; e.g. any calculus text, from memory).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate
from shapely.geometry import Point, Polygon, box
from shapely.ops import unary_union

from sceneprior.errors import InputError
from sceneprior.geometry import (
    Grid,
    PolygonMask,
    Region,
    SectorMask,
    cartesian_to_polar,
    polar_to_cartesian,
)

REL = 1e-9


def sector_area(r1, r2, t1_deg, t2_deg):
    """Analytic area of an annular sector: ∫_{θ1}^{θ2}∫_{r1}^{r2} r dr dθ, θ in radians."""
    return (r2 * r2 - r1 * r1) / 2.0 * math.radians(t2_deg - t1_deg)


def overlap(a, b):
    """(lo, hi) of the intersection of two intervals, or None."""
    lo, hi = max(a[0], b[0]), min(a[1], b[1])
    return (lo, hi) if hi > lo else None


# ----------------------------------------------------------------------------- frames
def test_polar_to_cartesian_cardinal_bearings():
    # Reference: the agreed convention (DESIGN.md §4): bearing clockwise from north,
    # x = r sin θ, y = r cos θ.  North (0°) -> +y, east (90°) -> +x, south -> −y, west -> −x.
    x, y = polar_to_cartesian(np.full(4, 100.0), np.array([0.0, 90.0, 180.0, -90.0]))
    np.testing.assert_allclose(x, [0.0, 100.0, 0.0, -100.0], atol=1e-12)
    np.testing.assert_allclose(y, [100.0, 0.0, -100.0, 0.0], atol=1e-12)


def test_cartesian_to_polar_range_and_half_open_bearing_interval():
    # Reference: same convention; bearing interval (−180, 180] (interfaces.md).
    r, b = cartesian_to_polar(np.array([0.0, -0.0, 3.0, -3.0, 0.0]), np.array([-2.0, -2.0, 4.0, 4.0, 0.0]))
    np.testing.assert_allclose(r, [2.0, 2.0, 5.0, 5.0, 0.0])  # 3-4-5 triangle
    np.testing.assert_allclose(b[:2], [180.0, 180.0])  # due south, also for x = −0.0
    np.testing.assert_allclose(b[2:4], [math.degrees(math.atan2(3, 4)), -math.degrees(math.atan2(3, 4))])
    assert b[4] == 0.0


@settings(max_examples=60, deadline=None)
@given(
    r=st.floats(1e-3, 1e5),
    bearing=st.floats(-179.999, 180.0),
)
def test_polar_round_trip(r, bearing):
    # Reference: inverse functions (atan2/hypot), exact up to round-off.
    x, y = polar_to_cartesian(r, bearing)
    r2, b2 = cartesian_to_polar(x, y)
    assert abs(r2 - r) <= 1e-12 * r
    assert -180.0 < b2 <= 180.0
    assert abs(b2 - bearing) <= 1e-9


# ----------------------------------------------------------------------------- validation
BAD_INPUTS = [
    lambda: Region("cartesian", (1.0, 0.0), (0.0, 1.0)),
    lambda: Region("cartesian", (0.0, 0.0), (0.0, 1.0)),
    lambda: Region("cartesian", (0.0, float("nan")), (0.0, 1.0)),
    lambda: Region("cartesian", (0.0, 1.0, 2.0), (0.0, 1.0)),
    lambda: Region("spherical", (0.0, 1.0), (0.0, 1.0)),
    lambda: Region("polar", (-1.0, 10.0), (0.0, 90.0)),
    lambda: Region("polar", (0.0, 10.0), (0.0, 361.0)),
    lambda: Region("polar", (0.0, 10.0), (20.0, 10.0)),
    lambda: Region("cartesian", (0, 1), (0, 1), (SectorMask((0, 1), (0, 10)),)),
    lambda: Region("cartesian", (0, 1), (0, 1), ("land",)),
    lambda: PolygonMask([(0, 0), (1, 1)]),
    lambda: PolygonMask([(0, 0), (1, 1), (2, 2)]),  # collinear: zero area
    lambda: PolygonMask([(0, 0), (1, 1), (1, 0), (0, 1)]),  # bow-tie: self-intersecting
    lambda: PolygonMask([(0, 0), (1, 0), (0, 0), (0, 0)]),  # 2 distinct vertices
    lambda: PolygonMask(np.zeros((4, 3))),
    lambda: PolygonMask([(0, 0), (1, float("nan")), (0, 1)]),
    lambda: PolygonMask([(0, 0), (1, 0), (0, 1)], name=3),
    lambda: SectorMask((10.0, 5.0), (0.0, 10.0)),
    lambda: SectorMask((-5.0, 5.0), (0.0, 10.0)),
    lambda: SectorMask((0.0, 5.0), (0.0, 400.0)),
    lambda: SectorMask((0.0, 5.0), (10.0, 10.0)),
    lambda: SectorMask((0.0, float("inf")), (0.0, 10.0)),
    lambda: Region("cartesian", (0, 1), (0, 1)).grid((0, 5)),
    lambda: Region("cartesian", (0, 1), (0, 1)).grid((2.5, 3)),
    lambda: Region("cartesian", (0, 1), (0, 1)).grid((True, 3)),
    lambda: Region("cartesian", (0, 1), (0, 1)).grid(5),
    lambda: Region("cartesian", (0, 1), (0, 1)).quadrature(0),
    lambda: Grid("polar", [-1.0, 2.0], [0.0, 1.0]),
    lambda: Grid("polar", [0.0, 2.0], [0.0, 400.0]),
    lambda: Grid("cartesian", [0.0, 0.0, 1.0], [0.0, 1.0]),
    lambda: Grid("cartesian", [0.0], [0.0, 1.0]),
    lambda: Grid("cartesian", [[0.0, 1.0]], [0.0, 1.0]),
    lambda: Region("polar", (0, 1), (0, 1)).cell_window_area(Region("cartesian", (0, 1), (0, 1)).grid((1, 1))),
    lambda: Region("polar", (1, 2), (0, 90), (PolygonMask([(0, 0), (1, 0), (0, 1)]),)).quadrature(2),
]


@pytest.mark.parametrize("make", BAD_INPUTS)
def test_invalid_geometry_raises_one_line_input_error(make):
    # Reference: the error contract (errors.py / DESIGN.md §5): InputError, one line.
    with pytest.raises(InputError) as info:
        make()
    msg = str(info.value)
    assert msg and "\n" not in msg


def test_valid_edge_cases_are_accepted():
    Region("polar", (0.0, 10.0), (0.0, 360.0))  # full turn, range from 0
    PolygonMask([(0, 0), (1, 0), (0, 1), (0, 0)])  # closed ring accepted
    SectorMask((0.0, 5.0), (350.0, 370.0))  # wraps past north
    r = Region("polar", (0, 10), (0, 90), [SectorMask((0, 1), (0, 1))])
    assert isinstance(r.masks, tuple)
    # hashable / comparable with array-valued masks
    p = PolygonMask([(0, 0), (1, 0), (0, 1)])
    a = Region("cartesian", (0, 2), (0, 2), (p,))
    b = Region("cartesian", (0, 2), (0, 2), (PolygonMask([(0, 0), (1, 0), (0, 1)]),))
    assert a == b and hash(a) == hash(b)
    assert a.grid((2, 3)) == b.grid((2, 3))


# ----------------------------------------------------------------------------- cell areas
def test_grid_basic_properties():
    g = Region("polar", (200.0, 6000.0), (-70.0, 70.0)).grid((29, 14))
    assert g.axes == ("range", "bearing") and g.shape == (29, 14) and g.n_cells == 406
    # the grid covers the bounds exactly (endpoints from np.linspace are exact)
    assert g.edges0[0] == 200.0 and g.edges0[-1] == 6000.0
    assert g.edges1[0] == -70.0 and g.edges1[-1] == 70.0
    x, y = g.cell_centres_xy()
    # Reference: x = r sin θ, y = r cos θ at (r_mid, θ_mid), by definition in interfaces.md.
    rm, tm = g.centres0[3], g.centres1[5]
    assert x[3, 5] == pytest.approx(rm * math.sin(math.radians(tm)), rel=1e-14)
    assert y[3, 5] == pytest.approx(rm * math.cos(math.radians(tm)), rel=1e-14)
    gc = Region("cartesian", (0.0, 10.0), (5.0, 8.0)).grid((5, 3))
    assert gc.axes == ("x", "y")


def test_polar_cell_area_against_scipy_dblquad():
    # Reference: scipy.integrate.dblquad of the Jacobian r over each cell (θ in radians).
    g = Grid("polar", np.array([0.0, 150.0, 1000.0, 4321.5]), np.array([-70.0, -3.0, 45.0, 290.0]))
    a = g.cell_area()
    for i, j in itertools.product(range(3), range(3)):
        ref, _ = integrate.dblquad(
            lambda r, t: r,
            math.radians(g.edges1[j]), math.radians(g.edges1[j + 1]),
            g.edges0[i], g.edges0[i + 1],
            epsabs=0.0, epsrel=1e-13,
        )
        assert a[i, j] == pytest.approx(ref, rel=REL)


def test_cartesian_cell_area_and_region_area():
    # Reference: shapely box areas, one cell at a time; region area Δx·Δy by hand.
    g = Grid("cartesian", np.array([-3.0, 0.5, 2.0, 10.0]), np.array([1.0, 1.25, 7.0]))
    a = g.cell_area()
    for i, j in itertools.product(range(3), range(2)):
        ref = box(g.edges0[i], g.edges1[j], g.edges0[i + 1], g.edges1[j + 1]).area
        assert a[i, j] == pytest.approx(ref, rel=1e-14)
    assert Region("cartesian", (-3.0, 10.0), (1.0, 7.0)).area() == pytest.approx(13.0 * 6.0, rel=1e-15)
    # Reference: annular sector formula by hand, 200–6000 m, 140°.
    assert Region("polar", (200.0, 6000.0), (-70.0, 70.0)).area() == pytest.approx(
        (6000.0**2 - 200.0**2) / 2 * math.radians(140.0), rel=1e-14
    )


# ----------------------------------------------------------------------------- polar windows
LOW = (200.0, 6000.0)
FOV = (-70.0, 70.0)


def test_sector_minus_bearing_interval():
    # By hand: (r2² − r1²)/2 · (Δθ − Δθ_mask), θ in radians; mask covers all ranges.
    reg = Region("polar", LOW, FOV, (SectorMask((0.0, 9000.0), (-20.0, 10.0), "land"),))
    ref = (6000.0**2 - 200.0**2) / 2 * math.radians(140.0 - 30.0)
    assert reg.window_area() == pytest.approx(ref, rel=REL)
    g = reg.grid((29, 28))  # 5° bearing cells: the mask edges fall on cell edges
    assert reg.cell_window_area(g).sum() == pytest.approx(ref, rel=REL)


def test_sector_minus_annulus():
    # By hand: region area minus the annulus 1000–2500 m over the field of view.
    reg = Region("polar", LOW, FOV, (SectorMask((1000.0, 2500.0), (-180.0, 180.0)),))
    ref = ((6000.0**2 - 200.0**2) - (2500.0**2 - 1000.0**2)) / 2 * math.radians(140.0)
    assert reg.window_area() == pytest.approx(ref, rel=REL)
    assert reg.cell_window_area(reg.grid((13, 7))).sum() == pytest.approx(ref, rel=REL)


def test_overlapping_sector_masks_counted_once():
    # By hand (inclusion–exclusion): |A ∪ B| = |A| + |B| − |A ∩ B|,
    # A = 1000–3000 m × (−30°, 20°), B = 2000–4000 m × (0°, 40°), A ∩ B = 2000–3000 m × (0°, 20°).
    a = SectorMask((1000.0, 3000.0), (-30.0, 20.0))
    b = SectorMask((2000.0, 4000.0), (0.0, 40.0))
    union = sector_area(1000, 3000, -30, 20) + sector_area(2000, 4000, 0, 40) - sector_area(2000, 3000, 0, 20)
    ref = sector_area(*LOW, *FOV) - union
    reg = Region("polar", LOW, FOV, (a, b))
    assert reg.window_area() == pytest.approx(ref, rel=REL)
    # the same mask twice changes nothing
    reg2 = Region("polar", LOW, FOV, (a, b, a))
    np.testing.assert_allclose(reg2.cell_window_area(reg2.grid((11, 9))), reg.cell_window_area(reg.grid((11, 9))), rtol=1e-12)


def test_sector_mask_outside_region_is_clipped():
    # By hand: only 5000–6000 m × (60°, 70°) of the mask 5000–9000 m × (60°, 100°) lies inside.
    reg = Region("polar", LOW, FOV, (SectorMask((5000.0, 9000.0), (60.0, 100.0)),))
    ref = sector_area(*LOW, *FOV) - sector_area(5000, 6000, 60, 70)
    assert reg.window_area() == pytest.approx(ref, rel=REL)
    # a mask entirely outside the region removes nothing
    far = Region("polar", LOW, FOV, (SectorMask((7000.0, 9000.0), (0.0, 10.0)), SectorMask((0.0, 100.0), (0.0, 10.0))))
    assert far.window_area() == pytest.approx(sector_area(*LOW, *FOV), rel=1e-14)


def test_sector_mask_bearings_wrap_modulo_360():
    # By hand: (350°, 370°) is the same direction set as (−10°, 10°); (340°, 345°) as (−20°, −15°).
    reg = Region("polar", (100.0, 500.0), (-20.0, 20.0),
                 (SectorMask((0.0, 1000.0), (350.0, 370.0)), SectorMask((0.0, 1000.0), (340.0, 345.0))))
    ref = sector_area(100, 500, -20, 20) - sector_area(100, 500, -10, 10) - sector_area(100, 500, -20, -15)
    assert reg.window_area() == pytest.approx(ref, rel=REL)
    # full-turn region 0..360 with a mask across north: pieces [0, 10] and [350, 360]
    full = Region("polar", (0.0, 50.0), (0.0, 360.0), (SectorMask((10.0, 20.0), (-10.0, 10.0)),))
    ref_full = math.pi * 50.0**2 - sector_area(10, 20, 0, 20)
    assert full.window_area() == pytest.approx(ref_full, rel=REL)
    cells = full.cell_window_area(full.grid((5, 36)))
    assert cells[1, 0] == pytest.approx(0.0, abs=1e-9)
    assert cells[1, 1] == pytest.approx(sector_area(10, 20, 10, 20), rel=REL)
    assert cells[1, 35] == pytest.approx(0.0, abs=1e-9)


def test_polar_cell_cut_exactly_in_half():
    g_reg = Region("polar", (100.0, 200.0), (0.0, 90.0))
    # Bearing cut: a mask over (0°, 22.5°) halves the first 45° cell (area ∝ Δθ).
    reg = Region("polar", (100.0, 200.0), (0.0, 90.0), (SectorMask((0.0, 300.0), (0.0, 22.5)),))
    g = g_reg.grid((1, 2))
    full = sector_area(100, 200, 0, 45)
    np.testing.assert_allclose(reg.cell_window_area(g), [[full / 2, full]], rtol=REL)
    # Range cut: r_m² = (r1² + r2²)/2 splits ∫ r dr into two equal halves, since
    # (r_m² − r1²)/2 = (r2² − r_m²)/2 = (r2² − r1²)/4.
    r_m = math.sqrt((100.0**2 + 200.0**2) / 2)
    reg = Region("polar", (100.0, 200.0), (0.0, 90.0), (SectorMask((0.0, r_m), (-5.0, 95.0)),))
    np.testing.assert_allclose(reg.cell_window_area(g), [[full / 2, full / 2]], rtol=REL)


def incl_excl_cell_window(cell, bounds, masks):
    """Reference |c ∩ B minus ∪ M_k| by inclusion–exclusion over interval rectangles.

    cell, bounds, masks: ((r_lo, r_hi), (t_lo, t_hi)) with bearings not wrapping.
    """
    base_r, base_t = overlap(cell[0], bounds[0]), overlap(cell[1], bounds[1])
    if base_r is None or base_t is None:
        return 0.0
    total = sector_area(*base_r, *base_t)
    for k in range(1, len(masks) + 1):
        for subset in itertools.combinations(masks, k):
            r_iv, t_iv = base_r, base_t
            for m in subset:
                r_iv = r_iv and overlap(r_iv, m[0])
                t_iv = t_iv and overlap(t_iv, m[1])
            if r_iv and t_iv:
                total += (-1) ** k * sector_area(*r_iv, *t_iv)
    return total


interval_r = st.tuples(st.floats(0.0, 7000.0), st.floats(1.0, 4000.0)).map(lambda p: (p[0], p[0] + p[1]))
interval_t = st.tuples(st.floats(-120.0, 100.0), st.floats(0.5, 150.0)).map(lambda p: (p[0], p[0] + p[1]))


@settings(max_examples=40, deadline=None)
@given(masks=st.lists(st.tuples(interval_r, interval_t), min_size=0, max_size=3),
       n0=st.integers(1, 6), n1=st.integers(1, 6))
def test_polar_cells_against_inclusion_exclusion(masks, n0, n1):
    # Reference: inclusion–exclusion over the interval rectangles, analytic areas.
    reg = Region("polar", LOW, FOV, tuple(SectorMask(r, t) for r, t in masks))
    g = reg.grid((n0, n1))
    got = reg.cell_window_area(g)
    for i, j in itertools.product(range(n0), range(n1)):
        cell = ((g.edges0[i], g.edges0[i + 1]), (g.edges1[j], g.edges1[j + 1]))
        ref = incl_excl_cell_window(cell, (LOW, FOV), masks)
        # absolute floor: round-off of |c| when the reference cancels to ~0
        assert got[i, j] == pytest.approx(ref, rel=REL, abs=1e-12 * g.cell_area()[i, j])
    assert got.sum() == pytest.approx(reg.window_area(), rel=REL, abs=1e-12 * reg.area())
    assert np.all(got >= 0.0) and np.all(got <= g.cell_area() * (1 + 1e-12))


def test_polar_foreign_grid_extending_beyond_region():
    # Reference: inclusion–exclusion (analytic); the grid reaches past the bounds.
    masks = [((1000.0, 3000.0), (-30.0, 20.0))]
    reg = Region("polar", LOW, FOV, tuple(SectorMask(r, t) for r, t in masks))
    g = Grid("polar", np.linspace(0.0, 8000.0, 9), np.linspace(-90.0, 90.0, 7))
    got = reg.cell_window_area(g)
    for i, j in itertools.product(range(8), range(6)):
        cell = ((g.edges0[i], g.edges0[i + 1]), (g.edges1[j], g.edges1[j + 1]))
        ref = incl_excl_cell_window(cell, (LOW, FOV), masks)
        assert got[i, j] == pytest.approx(ref, rel=REL, abs=1e-12 * g.cell_area()[i, j])


# ----------------------------------------------------------------------------- cartesian
def test_right_triangle_mask_analytic():
    # By hand: region 10 m × 10 m, 1 m cells, mask = right triangle x, y >= 0, x + y <= 4
    # (legs 4 m, area 8 m²).  Cell (i, j) = [i, i+1]×[j, j+1]:
    #   i + j <= 2: fully inside the triangle (its far corner has x + y = i + j + 2 <= 4) -> 0;
    #   i + j == 3: the hypotenuse is the cell's anti-diagonal -> half the cell, 0.5 m²;
    #   otherwise 1 m².  Total 100 − 8 = 92 m².
    i, j = np.meshgrid(np.arange(10), np.arange(10), indexing="ij")
    ref = np.where(i + j <= 2, 0.0, np.where(i + j == 3, 0.5, 1.0))
    for verts in ([(0, 0), (4, 0), (0, 4)],
                  [(-2, -2), (6, -2), (-2, 6)]):  # larger triangle, clipped to the same shape
        reg = Region("cartesian", (0.0, 10.0), (0.0, 10.0), (PolygonMask(verts),))
        got = reg.cell_window_area(reg.grid((10, 10)))
        np.testing.assert_allclose(got, ref, rtol=REL, atol=1e-15)
        assert reg.window_area() == pytest.approx(92.0, rel=REL)
    # Hypotenuse x + y = 4.5: with u = x − i, v = y − j the masked part of a cell is
    # u + v <= 4.5 − (i + j).  i + j == 3: the unmasked corner is the triangle u + v > 1.5,
    # area (0.5)²/2 = 0.125; i + j == 4: masked u + v <= 0.5, area 0.125, so unmasked 0.875;
    # i + j <= 2: fully masked.  Total 100 − 4.5²/2 = 89.875.
    reg = Region("cartesian", (0.0, 10.0), (0.0, 10.0), (PolygonMask([(0, 0), (4.5, 0), (0, 4.5)]),))
    ref = np.where(i + j <= 2, 0.0, np.where(i + j == 3, 0.125, np.where(i + j == 4, 0.875, 1.0)))
    np.testing.assert_allclose(reg.cell_window_area(reg.grid((10, 10))), ref, rtol=REL, atol=1e-15)
    assert reg.window_area() == pytest.approx(100.0 - 4.5**2 / 2, rel=REL)


def test_cartesian_cell_cut_in_half_and_overlapping_masks():
    # By hand: squares A = [0, 2]², B = [1, 3]² overlap in [1, 2]²: |A ∪ B| = 4 + 4 − 1 = 7.
    a = PolygonMask([(0, 0), (2, 0), (2, 2), (0, 2)])
    b = PolygonMask([(1, 1), (3, 1), (3, 3), (1, 3)])
    reg = Region("cartesian", (0.0, 4.0), (0.0, 4.0), (a, b, a))
    assert reg.window_area() == pytest.approx(16.0 - 7.0, rel=REL)
    # By hand: a mask edge at x = 0.5 through the 1 m cell [0, 1]×[0, 1] leaves half of it.
    half = Region("cartesian", (0.0, 2.0), (0.0, 1.0), (PolygonMask([(-1, -1), (0.5, -1), (0.5, 2), (-1, 2)]),))
    np.testing.assert_allclose(half.cell_window_area(half.grid((2, 1))), [[0.5], [1.0]], rtol=REL)


CART_REGION = ((-500.0, 1500.0), (0.0, 1200.0))
CART_MASKS = (
    PolygonMask([(100, 100), (700, 150), (650, 600), (300, 800), (50, 400)], "shoal"),
    # concave, overlapping the first one
    PolygonMask([(400, 300), (1000, 250), (1100, 900), (800, 500), (450, 950)], "pier"),
    # extends beyond the region (clipped)
    PolygonMask([(1300, -200), (1800, 300), (1400, 1500), (1200, 700)], "quay"),
)


def shapely_reference_cells(region_bounds, masks, grid):
    """One cell at a time: (cell ∩ region box) minus union(masks), plain shapely."""
    (x0, x1), (y0, y1) = region_bounds
    rbox = box(x0, y0, x1, y1)
    union = unary_union([Polygon(m.vertices) for m in masks])
    n0, n1 = grid.shape
    ref = np.zeros((n0, n1))
    for i in range(n0):
        for j in range(n1):
            c = Polygon([(grid.edges0[i], grid.edges1[j]), (grid.edges0[i + 1], grid.edges1[j]),
                         (grid.edges0[i + 1], grid.edges1[j + 1]), (grid.edges0[i], grid.edges1[j + 1])])
            ref[i, j] = c.intersection(rbox).difference(union).area
    return ref


def test_cartesian_polygons_against_shapely_per_cell():
    # Reference: shapely Polygon.intersection/difference per cell (different code path
    # from the vectorised strip-clipped overlay in geometry.py).
    reg = Region("cartesian", *CART_REGION, CART_MASKS)
    g = reg.grid((23, 17))
    got = reg.cell_window_area(g)
    ref = shapely_reference_cells(CART_REGION, CART_MASKS, g)
    np.testing.assert_allclose(got, ref, rtol=REL, atol=1e-9 * g.cell_area().max() * 1e-3)
    # Reference: shapely area of box minus union.
    (x0, x1), (y0, y1) = CART_REGION
    w_ref = box(x0, y0, x1, y1).difference(unary_union([Polygon(m.vertices) for m in CART_MASKS])).area
    assert reg.window_area() == pytest.approx(w_ref, rel=REL)
    assert got.sum() == pytest.approx(w_ref, rel=REL)


def test_cartesian_foreign_grid_partly_outside():
    # Reference: shapely per cell, as above; the grid extends past the region on all sides.
    reg = Region("cartesian", *CART_REGION, CART_MASKS)
    g = Grid("cartesian", np.linspace(-800.0, 1900.0, 12), np.array([-300.0, 0.0, 10.0, 600.0, 1250.0, 2000.0]))
    np.testing.assert_allclose(reg.cell_window_area(g), shapely_reference_cells(CART_REGION, CART_MASKS, g),
                               rtol=REL, atol=1e-9)


def test_cartesian_no_masks_is_cell_area():
    # By hand: without masks every cell of the region's own grid is fully inside.
    reg = Region("cartesian", (0.0, 3.0), (-1.0, 1.0))
    g = reg.grid((3, 4))
    np.testing.assert_allclose(reg.cell_window_area(g), np.full((3, 4), 0.5), rtol=1e-14)
    assert reg.window_area() == pytest.approx(6.0, rel=1e-15)


# ----------------------------------------------------------------------------- polar polygons
def half_plane_polygon(normal_bearing_deg, d, size=1e5):
    """Large rectangle approximating the half-plane {p · n >= d}, n unit at bearing φ."""
    nx, ny = polar_to_cartesian(1.0, normal_bearing_deg)
    tx, ty = ny, -nx  # tangent
    c = np.array([nx * d, ny * d])
    n, t = np.array([nx, ny]), np.array([tx, ty])
    return PolygonMask([c - size * t, c + size * t, c + size * t + size * n, c - size * t + size * n])


def test_polygon_on_polar_half_plane_equals_bearing_interval():
    # A polygon whose edge is the ray θ = 0 (the y-axis) masks bearings (−180°, 0°) exactly,
    # so the cells equal the analytic annular-sector areas (by hand): bearing cells wholly
    # west of north are 0, the cell (−10°, 10°) keeps its eastern half.
    west = PolygonMask([(-1e5, -1e5), (0.0, -1e5), (0.0, 1e5), (-1e5, 1e5)])
    reg = Region("polar", LOW, FOV, (west,))
    g = reg.grid((6, 7))  # bearing edges −70, −50, −30, −10, 10, 30, 50, 70
    got = reg.cell_window_area(g)
    r = g.edges0
    for i, j in itertools.product(range(6), range(7)):
        t_iv = overlap((g.edges1[j], g.edges1[j + 1]), (0.0, 70.0))
        ref = sector_area(r[i], r[i + 1], *t_iv) if t_iv else 0.0
        assert got[i, j] == pytest.approx(ref, rel=REL, abs=1e-12 * g.cell_area()[i, j])
    assert reg.window_area() == pytest.approx(sector_area(*LOW, 0.0, 70.0), rel=REL)


def test_polygon_on_polar_circular_segment():
    # Full disc of radius R minus the half-plane y >= d: the removed circular segment has
    # area R²(α − sin α)/2 with α = 2 acos(d/R) (chord–arc segment formula).
    big_r, d = 1000.0, 300.0
    reg = Region("polar", (0.0, big_r), (-180.0, 180.0), (half_plane_polygon(0.0, d),))
    alpha = 2 * math.acos(d / big_r)
    ref = math.pi * big_r**2 - big_r**2 * (alpha - math.sin(alpha)) / 2
    assert reg.window_area() == pytest.approx(ref, rel=REL)
    assert reg.cell_window_area(reg.grid((7, 12))).sum() == pytest.approx(ref, rel=REL)


@pytest.mark.parametrize("phi, d", [(0.0, 2500.0), (35.0, 1800.0), (-62.0, 3000.0)])
def test_polygon_on_polar_cells_against_quad(phi, d):
    # Reference: scipy.integrate.quad of the ray integral.  Along the ray at bearing θ the
    # half-plane {p·n >= d} (normal at bearing φ) starts at ρ(θ) = d / cos(θ − φ) when
    # cos(θ − φ) > 0, so |c ∩ H| = ∫_{θ1}^{θ2} (r2² − clip(ρ, r1, r2)²)/2 dθ (0 where the ray
    # never enters H).  Kinks at θ = φ ± acos(d / r_k) are passed to quad as break points.
    reg = Region("polar", LOW, FOV, (half_plane_polygon(phi, d),))
    g = reg.grid((12, 7))
    got = reg.cell_window_area(g)
    for i, j in itertools.product(range(12), range(7)):
        r1, r2 = g.edges0[i], g.edges0[i + 1]
        t1, t2 = math.radians(g.edges1[j]), math.radians(g.edges1[j + 1])

        def inside(t):
            c = math.cos(t - math.radians(phi))
            if c <= 0.0:
                return 0.0
            rho = min(max(d / c, r1), r2)
            return (r2 * r2 - rho * rho) / 2

        kinks = [math.radians(phi) + s * math.acos(min(1.0, d / rk)) for rk in (r1, r2) for s in (-1, 1)]
        kinks = [k for k in kinks if t1 < k < t2]
        masked, _ = integrate.quad(inside, t1, t2, points=kinks or None, epsabs=0.0, epsrel=1e-13, limit=200)
        ref = g.cell_area()[i, j] - masked
        assert got[i, j] == pytest.approx(ref, rel=REL, abs=1e-11 * g.cell_area()[i, j])


def test_polygon_on_polar_concave_against_densified_shapely():
    # Reference: shapely with each annular-sector cell drawn as a polygon whose arcs are
    # densified into N chords.  The reference's own error is bounded by the chord–arc
    # deficit: a chord of angle α on radius r cuts off r²(α − sin α)/2, so
    # |ref − exact| <= N·(r1² + r2²)(α − sin α)/2 per cell.  Concave polygon with
    # overlapping second polygon and a SectorMask overlapping both.
    polys = (
        PolygonMask([(-2000, 1000), (500, 1500), (-200, 3000), (1500, 4500), (-1500, 5200), (-2500, 2500)]),
        PolygonMask([(-800, 2500), (2500, 2000), (3000, 3500)]),
    )
    sector = SectorMask((2000.0, 3500.0), (-10.0, 25.0))
    reg = Region("polar", LOW, FOV, polys + (sector,))
    g = reg.grid((9, 8))
    got = reg.cell_window_area(g)
    union = unary_union([Polygon(p.vertices) for p in polys])
    n = 256
    for i, j in itertools.product(range(9), range(8)):
        r1, r2 = g.edges0[i], g.edges0[i + 1]
        b1, b2 = g.edges1[j], g.edges1[j + 1]
        t = np.linspace(b1, b2, n + 1)
        ox, oy = polar_to_cartesian(r2, t)
        ix, iy = polar_to_cartesian(r1, t[::-1])
        cell = Polygon(np.column_stack([np.r_[ox, ix], np.r_[oy, iy]]))
        # the SectorMask part of the cell, drawn the same way (r and bearing intervals)
        s_r, s_t = overlap((r1, r2), sector.range), overlap((b1, b2), sector.bearing)
        if s_r and s_t:
            ts = np.linspace(*s_t, n + 1)
            sx, sy = polar_to_cartesian(s_r[1], ts)
            jx, jy = polar_to_cartesian(s_r[0], ts[::-1])
            cell = cell.difference(Polygon(np.column_stack([np.r_[sx, jx], np.r_[sy, jy]])))
        ref = cell.difference(union).area
        alpha = math.radians(b2 - b1) / n
        bound = 2 * n * (r1 * r1 + r2 * r2) * (alpha - math.sin(alpha)) / 2  # cell + sector arcs
        assert abs(got[i, j] - ref) <= bound + REL * g.cell_area()[i, j]
    assert got.sum() == pytest.approx(reg.window_area(), rel=REL)


# ----------------------------------------------------------------------------- point location
def brute_locate(edges0, edges1, c0, c1):
    """Reference: loop over cells, half-open [lo, hi), last cell closed at the outer edge."""
    out = np.full(len(c0), -1, dtype=np.int64)
    n0, n1 = len(edges0) - 1, len(edges1) - 1
    for k, (u, v) in enumerate(zip(c0, c1)):
        for i in range(n0):
            in0 = edges0[i] <= u < edges0[i + 1] or (i == n0 - 1 and u == edges0[-1])
            if not in0:
                continue
            for j in range(n1):
                if edges1[j] <= v < edges1[j + 1] or (j == n1 - 1 and v == edges1[-1]):
                    out[k] = i * n1 + j
    return out


def test_locate_cartesian_against_brute_force():
    rng = np.random.default_rng(7)
    g = Grid("cartesian", np.array([-10.0, -2.0, 0.0, 3.5, 9.0]), np.array([0.0, 1.0, 4.0, 4.5]))
    c0 = np.concatenate([rng.uniform(-12, 11, 400), np.repeat(g.edges0, 4), [np.nan, 0.0]])
    c1 = np.concatenate([rng.uniform(-1, 5, 400), np.tile(g.edges1, 5), [1.0, np.nan]])
    np.testing.assert_array_equal(g.locate(c0, c1), brute_locate(g.edges0, g.edges1, c0, c1))
    assert g.locate(c0, c1).dtype == np.int64
    assert g.locate(9.0, 4.5) == g.n_cells - 1  # outer corner closed


def test_locate_polar_wraps_bearings():
    rng = np.random.default_rng(8)
    reg = Region("polar", LOW, FOV)
    g = reg.grid((7, 10))
    r = np.concatenate([rng.uniform(0, 7000, 500), np.repeat(g.edges0, 11)])
    b = np.concatenate([rng.uniform(-100, 100, 500), np.tile(g.edges1, 8)])
    ref = brute_locate(g.edges0, g.edges1, r, b)
    np.testing.assert_array_equal(g.locate(r, b), ref)
    # the same directions given as bearing ± 360 land in the same cells (random points only,
    # so that no shifted value sits on an edge after round-off)
    shift = 360.0 * rng.choice([-1.0, 1.0], 500)
    np.testing.assert_array_equal(g.locate(r[:500], b[:500] + shift), ref[:500])
    # inside_bounds: closed bounds (brute force by hand)
    ib = reg.inside_bounds(r, b)
    np.testing.assert_array_equal(ib, (r >= 200) & (r <= 6000) & (b >= -70) & (b <= 70))


def test_in_mask_against_shapely_points_and_intervals():
    rng = np.random.default_rng(9)
    reg = Region("cartesian", *CART_REGION, CART_MASKS)
    x, y = rng.uniform(-600, 1600, 2000), rng.uniform(-100, 1300, 2000)
    union = unary_union([Polygon(m.vertices) for m in CART_MASKS])
    # Reference: shapely Polygon.contains(Point), one point at a time.
    ref = np.array([union.contains(Point(u, v)) for u, v in zip(x, y)])
    np.testing.assert_array_equal(reg.in_mask(x, y), ref)
    # Polar: sector interval test written out by hand, and a polygon via x = r sin θ, y = r cos θ.
    tri = PolygonMask([(0, 1000), (2000, 1000), (0, 3000)])
    preg = Region("polar", LOW, FOV, (SectorMask((1000.0, 2000.0), (340.0, 370.0)), tri))
    r, b = rng.uniform(0, 7000, 2000), rng.uniform(-70, 70, 2000)
    sx, sy = polar_to_cartesian(r, b)
    ref = ((r > 1000) & (r < 2000) & (b > -20) & (b < 10)) | np.array(
        [Polygon(tri.vertices).contains(Point(u, v)) for u, v in zip(sx, sy)])
    np.testing.assert_array_equal(preg.in_mask(r, b), ref)
    assert preg.in_mask(np.nan, 0.0).shape == ()


# ----------------------------------------------------------------------------- quadrature
@pytest.mark.parametrize("n", [1, 2, 4])
def test_quadrature_box_exact_to_degree_2n_minus_1(n):
    # Reference: Gauss–Legendre with n nodes integrates polynomials of degree <= 2n − 1
    # exactly (Abramowitz & Stegun 25.4.29); analytic ∫ x^a dx ∫ y^b dy.
    (x0, x1), (y0, y1) = (-3.0, 5.0), (2.0, 4.5)
    reg = Region("cartesian", (x0, x1), (y0, y1))
    x, y, w = reg.quadrature(n)
    assert w.sum() == pytest.approx(reg.window_area(), rel=1e-13)
    k = 2 * n - 1
    for a, b in [(k, 0), (0, k), (k, k), (1, k - 1 if k > 1 else 0)]:
        exact = (x1 ** (a + 1) - x0 ** (a + 1)) / (a + 1) * (y1 ** (b + 1) - y0 ** (b + 1)) / (b + 1)
        assert np.sum(w * x**a * y**b) == pytest.approx(exact, rel=1e-11)
    # degree 2n is not integrated exactly (the rule's order is what it claims, not more)
    a = 2 * n
    exact = (x1 ** (a + 1) - x0 ** (a + 1)) / (a + 1) * (y1 - y0)
    assert abs(np.sum(w * x**a) - exact) > 1e-8 * abs(exact)


@pytest.mark.parametrize("n", [1, 2, 3])
def test_quadrature_cartesian_with_triangle_mask(n):
    # Reference: ∫_W = ∫_box − ∫_T, T the right triangle x, y >= 0, x + y <= L, with the
    # Dirichlet integral ∫_T x^a y^b = a! b! L^(a+b+2)/(a+b+2)!  The Duffy rule is exact to
    # total degree 2n − 2 (documented in Region.quadrature).
    big_l = 4.0
    reg = Region("cartesian", (0.0, 10.0), (0.0, 8.0), (PolygonMask([(0, 0), (big_l, 0), (0, big_l)]),))
    x, y, w = reg.quadrature(n)
    assert w.sum() == pytest.approx(80.0 - big_l**2 / 2, rel=1e-12)
    for a, b in [(p, q) for p in range(2 * n - 1) for q in range(2 * n - 1) if p + q <= 2 * n - 2]:
        box_int = 10.0 ** (a + 1) / (a + 1) * 8.0 ** (b + 1) / (b + 1)
        tri_int = math.factorial(a) * math.factorial(b) * big_l ** (a + b + 2) / math.factorial(a + b + 2)
        assert np.sum(w * x**a * y**b) == pytest.approx(box_int - tri_int, rel=1e-11)
    assert np.all(~reg.in_mask(x, y)) and np.all(reg.inside_bounds(x, y))


@pytest.mark.parametrize("n", [1, 2, 3])
def test_quadrature_polar_r_weighted_exact(n):
    # Reference: analytic ∫∫_W r^a θ^b · r dr dθ (θ in radians) over the region minus a
    # SectorMask lying inside it; with the Jacobian r the radial integrand has degree
    # a + 1 <= 2n − 1, the angular one degree b <= 2n − 1, both exact (A&S 25.4.29).
    mask = SectorMask((1000.0, 2500.0), (-20.0, 35.0))
    reg = Region("polar", LOW, FOV, (mask,))
    r, bdeg, w = reg.quadrature(n)
    th = np.radians(bdeg)
    assert w.sum() == pytest.approx(reg.window_area(), rel=1e-12)
    assert w.sum() == pytest.approx(sector_area(*LOW, *FOV) - sector_area(1000, 2500, -20, 35), rel=1e-12)

    def rect_int(a, b, r_iv, t_iv):
        t1, t2 = math.radians(t_iv[0]), math.radians(t_iv[1])
        return (r_iv[1] ** (a + 2) - r_iv[0] ** (a + 2)) / (a + 2) * (t2 ** (b + 1) - t1 ** (b + 1)) / (b + 1)

    for a in range(2 * n - 1):
        for b in range(2 * n):
            exact = rect_int(a, b, LOW, FOV) - rect_int(a, b, mask.range, mask.bearing)
            got = np.sum(w * r**a * th**b)
            scale = rect_int(a, 2 * (b // 2), LOW, FOV)  # even power: no sign cancellation
            assert abs(got - exact) <= 1e-11 * abs(scale)
    assert np.all(~reg.in_mask(r, bdeg)) and np.all(reg.inside_bounds(r, bdeg))


def test_quadrature_polar_smooth_function_within_legendre_bound():
    # g = x = r sin θ on the Lowmarsh sector: exact ∫∫ r sin θ · r dr dθ
    # = (r2³ − r1³)/3 · (cos θ1 − cos θ2) (by hand).  Radial part r² is integrated exactly for
    # n >= 2; the angular error of n-point Gauss–Legendre is bounded by
    # (b − a)^(2n+1) (n!)^4 / ((2n + 1) ((2n)!)^3) · max|f^(2n)| (A&S 25.4.30), |sin^(2n)| <= 1.
    reg = Region("polar", LOW, FOV)
    n = 6
    r, bdeg, w = reg.quadrature(n)
    got = np.sum(w * r * np.sin(np.radians(bdeg)))
    t1, t2 = math.radians(FOV[0]), math.radians(FOV[1])
    radial = (LOW[1] ** 3 - LOW[0] ** 3) / 3
    exact = radial * (math.cos(t1) - math.cos(t2))  # = 0 here by symmetry; use the bound
    bound = radial * (t2 - t1) ** (2 * n + 1) * math.factorial(n) ** 4 / (
        (2 * n + 1) * math.factorial(2 * n) ** 3)
    assert abs(got - exact) <= bound + 1e-12 * radial
    # cos θ is not symmetric-zero: same bound
    got_c = np.sum(w * r * np.cos(np.radians(bdeg)))
    exact_c = radial * (math.sin(t2) - math.sin(t1))
    assert abs(got_c - exact_c) <= bound + 1e-12 * radial


# ----------------------------------------------------------------------------- properties
@settings(max_examples=25, deadline=None)
@given(
    xs=st.lists(st.floats(-200.0, 1200.0), min_size=3, max_size=3),
    ys=st.lists(st.floats(-200.0, 1200.0), min_size=3, max_size=3),
    n0=st.integers(1, 8),
    n1=st.integers(1, 8),
)
def test_random_triangle_masks_against_shapely(xs, ys, n0, n1):
    # Reference: shapely per cell (as above) for random triangles (degenerate ones skipped).
    try:
        mask = PolygonMask(np.column_stack([xs, ys]))
    except InputError:
        return
    bounds = ((0.0, 1000.0), (0.0, 800.0))
    reg = Region("cartesian", *bounds, (mask,))
    g = reg.grid((n0, n1))
    got = reg.cell_window_area(g)
    ref = shapely_reference_cells(bounds, (mask,), g)
    np.testing.assert_allclose(got, ref, rtol=REL, atol=1e-9)
    assert got.sum() == pytest.approx(reg.window_area(), rel=REL, abs=1e-9)
