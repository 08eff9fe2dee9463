"""Tracker export, the jax-free evaluator, the convergence gate and posterior-predictive
simulation (issue 5).

Outside references, named at each check:
* the exported triple is DESIGN.md §4's definition (rate = Σ_c λ_c |c ∩ W|, density =
  map / rate); its integrals are checked by Gauss–Legendre quadrature (numpy.polynomial.
  legendre.leggauss; an n-point rule is exact for polynomials of degree ≤ 2n − 1,
  Abramowitz & Stegun 25.4.29) and, across sloped mask edges, by a midpoint rule whose
  error is bounded with shapely (which squares the mask boundary crosses);
* per-cell quantiles and the predictive laws come from scipy.stats: Gamma posteriors
  and the Gamma–Poisson (negative-binomial) predictive, Gelman et al., Bayesian Data
  Analysis 3rd ed., §2.6 (counts of a Poisson with a Gamma(α, β) rate are NB(α, β/(β + 1)));
* the JSON Schema is checked with the jsonschema library.
"""

from __future__ import annotations

import json
import math
import shutil
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import scipy.stats as st
import shapely

from conftest import REPO, TRIANGLE_MASK, box_case
from sceneprior.cli import main

SCHEMA = json.loads((REPO / "src" / "sceneprior" / "schemas" / "tracker-1.schema.json").read_text())


def export(run, *args) -> dict:
    assert main(["export", str(run), *args]) == 0
    return json.loads((run / "tracker.json").read_text())


def validate(doc):
    import jsonschema

    jsonschema.Draft202012Validator(SCHEMA).validate(doc)


def grid_arrays(doc):
    c = doc["clutter"]
    lam = np.array(c["intensity"]["values"], dtype=float)  # None -> nan
    dens = np.array(c["density"]["values"], dtype=float)
    w = np.array(c["grid"]["window_area_m2"], dtype=float)
    masked = np.array(c["grid"]["masked"], dtype=bool)
    return lam, dens, w, masked


def gauss_rects(edges0, edges1, order=3):
    """Tensor Gauss–Legendre nodes/weights on every rectangle between consecutive edges."""
    x, wx = np.polynomial.legendre.leggauss(order)
    a0, b0 = edges0[:-1], edges0[1:]
    a1, b1 = edges1[:-1], edges1[1:]
    n0 = (0.5 * (a0 + b0))[:, None] + (0.5 * (b0 - a0))[:, None] * x[None, :]
    w0 = (0.5 * (b0 - a0))[:, None] * wx[None, :]
    n1 = (0.5 * (a1 + b1))[:, None] + (0.5 * (b1 - a1))[:, None] * x[None, :]
    w1 = (0.5 * (b1 - a1))[:, None] * wx[None, :]
    u, v = np.meshgrid(n0.ravel(), n1.ravel(), indexing="ij")
    wu, wv = np.meshgrid(w0.ravel(), w1.ravel(), indexing="ij")
    return u.ravel(), v.ravel(), wu.ravel(), wv.ravel()


# ----------------------------------------------------------------------- the triple
@pytest.mark.parametrize("which", ["demo", "cellwise_polar", "cellwise_cartesian"])
def test_exported_triple_schema_and_integrals(which, demo_run, cellwise_polar_run, cellwise_cartesian_run):
    run = {"demo": demo_run / "demo", "cellwise_polar": cellwise_polar_run[0],
           "cellwise_cartesian": cellwise_cartesian_run}[which]
    doc = export(run)
    validate(doc)
    lam, dens, w, masked = grid_arrays(doc)
    # DESIGN.md §4: the rate is the map's integral over the window, Σ_c λ_c |c ∩ W|
    assert np.nansum(lam * w) == pytest.approx(doc["clutter"]["rate"]["value"], rel=1e-9)
    assert np.nansum(dens * w) == pytest.approx(1.0, rel=1e-9)  # the density integrates to 1
    # mean map: by linearity E[Σ λ_c w_c] = Σ E[λ_c] w_c, so its integral is the posterior mean of
    # the rate that summary.json computed from the rate draws themselves
    summary = json.loads((run / "summary.json").read_text())
    assert doc["clutter"]["rate"]["value"] == pytest.approx(summary["rate"]["mean"], rel=1e-9)
    assert doc["clutter"]["rate"]["interval_90"] == [summary["rate"]["q05"], summary["rate"]["q95"]]
    # masked cells: exactly those without window area, null in the file
    np.testing.assert_array_equal(masked, ~(w > 0))
    assert np.isnan(lam[masked]).all() and np.isfinite(lam[~masked]).all()
    assert doc["estimate"]["kind"] == "posterior_mean" and doc["caution"] == summary["caution"]
    prov = doc["provenance"]
    assert prov["spec_sha256"] == summary["data"]["spec_sha256"]
    assert prov["inputs_sha256"] == summary["data"]["inputs_sha256"] and prov["seed"] == summary["sampler"]["seed"]
    assert doc["gate"]["passed"] and not doc["gate"]["overridden"]
    assert doc["clutter"]["spatial_model"] == ("uniform" if which == "demo" else "grid")


def test_demo_land_cells_masked_and_cut_cells_kept(demo_run):
    doc = export(demo_run / "demo")
    lam, _, w, masked = grid_arrays(doc)
    centres = 0.5 * (np.array(doc["clutter"]["grid"]["edges"][1][:-1]) + np.array(doc["clutter"]["grid"]["edges"][1][1:]))
    assert masked[:, centres > 45].all()  # land sector 42°..70°: cells 45..70 are fully masked
    assert not masked[:, (centres > 40) & (centres < 45)].any()  # 40..45 is cut at 42°, kept
    # the cut cells' window part is 2° of 5°: (r2² − r1²)/2 · Δθ with Δθ = 2° in radians
    e = np.array(doc["clutter"]["grid"]["edges"][0])
    cut = w[:, (centres > 40) & (centres < 45)][:, 0]
    np.testing.assert_allclose(cut, (e[1:] ** 2 - e[:-1] ** 2) / 2 * math.radians(2.0), rtol=1e-12)
    assert doc["region"]["masks"] == [{"name": "land", "kind": "sector", "range": [200.0, 6000.0],
                                       "bearing": [42.0, 70.0]}]


def test_quantile_export_against_scipy_gamma(cellwise_polar_run):
    """Per-cell 0.95 quantile of the cellwise run vs the exact Gamma(a + N_c, b|c| + E_c) quantile
    (scipy.stats.gamma.ppf), within the Monte Carlo error of a sample quantile from n draws:
    sd ≈ sqrt(q(1 − q)/n) / f(x_q) (asymptotic normality of sample quantiles); 812 cells at
    once, so |z| < 4.5."""
    path, res = cellwise_polar_run
    doc = export(path, "--quantile", "0.95")
    validate(doc)
    assert doc["estimate"] == {**doc["estimate"], "kind": "quantile", "quantile": 0.95}
    lam, dens, w, masked = grid_arrays(doc)
    stats = res.stats
    a = 1.0 + stats.counts
    b = 0.1 * stats.cell_area + stats.exposure
    exact = st.gamma(a, scale=1.0 / b)
    n = doc["estimate"]["draws_used"]
    x = exact.ppf(0.95)
    se = math.sqrt(0.95 * 0.05 / n) / exact.pdf(x)
    z = (lam.reshape(-1)[~masked.reshape(-1)] - x[~masked.reshape(-1)]) / se[~masked.reshape(-1)]
    assert np.abs(z).max() < 4.5
    # the triple again, and non-commutativity: the integral of per-cell upper quantiles of
    # independent cells exceeds the rate's own upper quantile (DESIGN.md §4)
    assert np.nansum(lam * w) == pytest.approx(doc["clutter"]["rate"]["value"], rel=1e-9)
    assert np.nansum(dens * w) == pytest.approx(1.0, rel=1e-9)
    assert doc["clutter"]["rate"]["value"] > doc["clutter"]["rate"]["interval_90"][1]


def test_uniform_quantile_map_integrates_to_rate_quantile(demo_run):
    """For the uniform model rate = ρ|W| is monotone in ρ, so there the quantile commutes: the
    q95 map's integral is the rate's q95 (float32 draws: 1e-6 relative)."""
    doc = export(demo_run / "demo", "--quantile", "0.95")
    assert doc["clutter"]["rate"]["value"] == pytest.approx(doc["clutter"]["rate"]["posterior"]["q95"], rel=1e-6)
    assert doc["clutter"]["uniform"]["density"] == pytest.approx(1.0 / doc["region"]["window_area_m2"], rel=1e-12)


def test_run_region_matches_fit_region(cellwise_polar_run, cellwise_cartesian_run):
    """export.run_region repeats fitting.region_from_spec's mapping (to stay jax-free): same Region."""
    from sceneprior.export import run_region
    from sceneprior.fitting import region_from_spec
    from sceneprior.results import load_run
    from sceneprior.spec import load_spec

    path, res = cellwise_polar_run
    assert run_region(load_run(path)) == res.stats.region
    run = load_run(cellwise_cartesian_run)
    region = run_region(run)
    assert region == region_from_spec(load_spec(run.summary["data"]["spec"]).space)
    assert len(region.masks) == 1 and region.frame == "cartesian"


# ----------------------------------------------------------------------- evaluator
def test_evaluator_integrates_to_rate_polar(cellwise_polar_run):
    """∫∫ λ(r, θ) per m·rad dr dθ over the polar window, by Gauss–Legendre on the rectangles
    between the cell edges and the mask's bearing edge (the integrand is λ_c·r, linear in r,
    so the rule is exact up to round-off), equals the exported rate; so does ∫ λ dA with the
    Cartesian input path (nodes mapped to x, y, weight r dr dθ)."""
    from sceneprior.evaluator import load_config

    path, _ = cellwise_polar_run
    export(path)
    cfg = load_config(path / "tracker.json")
    g = cfg.doc["clutter"]["grid"]
    e0 = np.array(g["edges"][0])
    e1 = np.unique(np.concatenate([g["edges"][1], [42.0]]))  # mask edge at 42°
    r, b, wr, wb = gauss_rects(e0, e1)
    wb_rad = np.deg2rad(wb)
    pts = np.column_stack([r, b])
    lam_mrad = cfg.clutter_intensity(pts, frame="polar", per="m_rad")
    assert np.sum(lam_mrad * wr * wb_rad) == pytest.approx(cfg.rate, rel=1e-9)
    lam_m2 = cfg.clutter_intensity(pts, frame="polar", per="m2")
    np.testing.assert_allclose(lam_mrad, lam_m2 * r, rtol=1e-14)  # per m·rad = per m² × r
    xy = np.column_stack([r * np.sin(np.deg2rad(b)), r * np.cos(np.deg2rad(b))])
    lam_xy = cfg.clutter_intensity(xy)
    assert np.sum(lam_xy * r * wr * wb_rad) == pytest.approx(cfg.rate, rel=1e-9)
    # the density integrates to 1 the same way
    assert np.sum(cfg.clutter_density(pts, frame="polar", per="m_rad") * wr * wb_rad) == pytest.approx(1.0, rel=1e-9)
    # bilinear is smoother but, as documented, does not preserve the cell integrals
    lam_bil = cfg.clutter_intensity(pts, frame="polar", per="m_rad", interpolation="bilinear")
    assert abs(np.sum(lam_bil * wr * wb_rad) / cfg.rate - 1) > 1e-4


def test_evaluator_integrates_to_rate_cartesian(cellwise_cartesian_run):
    """∫ λ dx dy over the Cartesian window by the midpoint rule on 1 m squares aligned with
    the 100 m cells. Squares not crossed by the triangle's boundary are exact (λ constant on
    them); each crossed square (found with shapely) errs by at most λ_cell·h². The bound is
    checked to be tight (< 1 % of the rate)."""
    from sceneprior.evaluator import load_config

    export(cellwise_cartesian_run)
    cfg = load_config(cellwise_cartesian_run / "tracker.json")
    h = 1.0
    xc = np.arange(0, 1000, h) + h / 2
    yc = np.arange(0, 500, h) + h / 2
    X, Y = np.meshgrid(xc, yc, indexing="ij")
    lam = cfg.clutter_intensity(np.stack([X, Y], axis=-1))
    assert lam.shape == X.shape
    integral = lam.sum() * h * h
    boundary = shapely.Polygon(TRIANGLE_MASK).boundary
    near = (X > 240) & (X < 730) & (Y > 110) & (Y < 430)
    boxes = shapely.box(X[near] - h / 2, Y[near] - h / 2, X[near] + h / 2, Y[near] + h / 2)
    crossed = shapely.intersects(boxes, boundary)
    lam_cells = np.array(cfg.doc["clutter"]["intensity"]["values"], dtype=float)
    cell_of = lam_cells[(X[near][crossed] // 100).astype(int), (Y[near][crossed] // 100).astype(int)]
    bound = np.sum(cell_of) * h * h
    assert bound < 0.01 * cfg.rate
    assert abs(integral - cfg.rate) <= bound + 1e-9 * cfg.rate
    # polar input on a Cartesian configuration: the polar origin is x = y = 0
    p = np.array([[math.hypot(812.5, 57.3), math.degrees(math.atan2(812.5, 57.3))]])
    assert cfg.clutter_intensity(p, frame="polar", per="m2")[0] == pytest.approx(
        cfg.clutter_intensity([[812.5, 57.3]])[0], rel=1e-12)


def test_evaluator_round_trip_and_zero_outside(cellwise_polar_run, demo_run):
    """At cell centres the evaluator gives the exported cell values; per m·rad at the centre
    (r = r_mid) it is the cell average λ_c(r1 + r2)/2 that intensity.nc holds."""
    import xarray as xr

    from sceneprior.evaluator import load_config

    path, _ = cellwise_polar_run
    export(path)
    cfg = load_config(path / "tracker.json")
    g = cfg.doc["clutter"]["grid"]
    e0, e1 = np.array(g["edges"][0]), np.array(g["edges"][1])
    rc, bc = np.meshgrid(0.5 * (e0[1:] + e0[:-1]), 0.5 * (e1[1:] + e1[:-1]), indexing="ij")
    pts = np.stack([rc, bc], axis=-1)
    lam = np.array(cfg.doc["clutter"]["intensity"]["values"], dtype=float)
    inside_window = bc < 42.0
    got = cfg.clutter_intensity(pts, frame="polar", per="m2")
    np.testing.assert_array_equal(got[inside_window], lam[inside_window])
    assert (got[~inside_window] == 0).all()  # land sector, including the cut cells' masked part
    ds = xr.open_dataset(path / "intensity.nc", engine="h5netcdf")
    polar = cfg.clutter_intensity(pts, frame="polar", per="m_rad")
    np.testing.assert_allclose(polar[inside_window], ds["intensity_polar_mean"].values[inside_window], rtol=1e-12)
    ds.close()
    # zero outside the bounds, in the mask, and in the masked part of a cut cell
    probe = np.array([[100.0, 0.0], [6500.0, 0.0], [3000.0, 75.0], [3000.0, -71.0], [3000.0, 50.0],
                      [3000.0, 43.0], [3000.0, 41.0]])
    v = cfg.clutter_intensity(probe, frame="polar", per="m2")
    assert (v[:6] == 0).all() and v[6] > 0
    # a single point gives a 0-d result
    export(demo_run / "demo")
    demo = load_config(demo_run / "demo" / "tracker.json")
    assert demo.clutter_intensity([0.0, 3000.0]).shape == ()
    assert demo.clutter_intensity([0.0, 3000.0]) == pytest.approx(demo.doc["clutter"]["uniform"]["intensity"])


def test_evaluator_masks_polygon(cellwise_cartesian_run):
    from sceneprior.evaluator import load_config

    export(cellwise_cartesian_run)
    cfg = load_config(cellwise_cartesian_run / "tracker.json")
    rng = np.random.default_rng(4)
    pts = np.column_stack([rng.uniform(-100, 1100, 5000), rng.uniform(-100, 600, 5000)])
    v = cfg.clutter_intensity(pts, interpolation="bilinear")
    in_tri = shapely.contains_xy(shapely.Polygon(TRIANGLE_MASK), pts[:, 0], pts[:, 1])
    in_box = (pts[:, 0] >= 0) & (pts[:, 0] <= 1000) & (pts[:, 1] >= 0) & (pts[:, 1] <= 500)
    assert (v[in_tri | ~in_box] == 0).all()
    assert (v[~in_tri & in_box] > 0).all()


def test_evaluator_bad_input(demo_run):
    from sceneprior.evaluator import TrackerConfig, load_config

    export(demo_run / "demo")
    cfg = load_config(demo_run / "demo" / "tracker.json")
    with pytest.raises(ValueError, match=r"shape \(\.\.\., 2\).*got shape \(5, 3\)"):
        cfg.clutter_intensity(np.zeros((5, 3)))
    with pytest.raises(ValueError, match="got shape"):
        cfg.clutter_intensity(3.0)
    with pytest.raises(ValueError, match="NaN or infinite"):
        cfg.clutter_intensity([[np.nan, 1.0]])
    with pytest.raises(ValueError, match="per='m2'.*per='m_rad'"):
        cfg.clutter_intensity([[1000.0, 0.0]], frame="polar")
    with pytest.raises(ValueError, match="frame must be"):
        cfg.clutter_intensity([[1000.0, 0.0]], frame="spherical")
    with pytest.raises(ValueError, match="interpolation must be"):
        cfg.clutter_intensity([[1000.0, 0.0]], interpolation="cubic")
    with pytest.raises(ValueError, match="no birth intensity"):
        cfg.birth_intensity([[0.0, 1000.0]])
    with pytest.raises(ValueError, match="schema"):
        TrackerConfig({**cfg.doc, "schema": "sceneprior.tracker/0"})


def test_evaluator_never_imports_jax_or_numpyro(demo_run):
    export(demo_run / "demo")
    code = textwrap.dedent(f"""
        import sys
        class Block:
            def find_spec(self, name, path=None, target=None):
                if name.split(".")[0] in ("jax", "jaxlib", "numpyro"):
                    raise ImportError("blocked for this test: " + name)
                return None
        sys.meta_path.insert(0, Block())
        from sceneprior.evaluator import load_config
        cfg = load_config({str(demo_run / "demo" / "tracker.json")!r})
        v = cfg.clutter_intensity([[0.0, 3000.0], [3000.0, 0.0]])
        p = cfg.clutter_intensity([[3000.0, 0.0]], frame="polar", per="m_rad")
        assert v[0] > 0 and p[0] > 0
        assert not any(m.split(".")[0] in ("jax", "jaxlib", "numpyro") for m in sys.modules)
        print("ok", cfg.rate)
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.startswith("ok")


def test_optional_sections_birth_and_overdispersion(demo_run, tmp_path):
    """The schema's optional sections, fed through summary.json entries of the form other
    model kinds write (DEVELOPERS.md, "Tracker export"): the negative-binomial cardinality
    against scipy.stats.nbinom, the birth mixture against scipy.stats.multivariate_normal."""
    from sceneprior.evaluator import load_config
    from sceneprior.export import export_run

    run = tmp_path / "demo"
    shutil.copytree(demo_run / "demo", run)
    s = json.loads((run / "summary.json").read_text())
    s["overdispersion"] = {"phi": {"mean": 0.3, "sd": 0.05, "q05": 0.22, "q50": 0.3, "q95": 0.38}}
    comps = [{"weight": 0.02, "weight_sd": 0.004, "mean": [-500.0, 1200.0], "cov": [[4e4, 1e4], [1e4, 9e4]]},
             {"weight": 0.01, "mean": [800.0, 300.0], "cov": [[2.5e4, 0.0], [0.0, 2.5e4]]}]
    s["birth"] = {"components": comps, "state_axes": ["x", "y"], "state_units": ["m", "m"],
                  "region": {"frame": "cartesian", "axes": ["x", "y"], "axis_units": ["m", "m"],
                             "bounds": [[-2000.0, 2000.0], [0.0, 3000.0]],
                             "masks": [{"name": "quay", "kind": "polygon",
                                        "vertices": [[-2000.0, 0.0], [-1000.0, 0.0], [-1000.0, 500.0]]}],
                             "window_area_m2": 4000.0 * 3000.0 - 0.5 * 1000 * 500}}
    (run / "summary.json").write_text(json.dumps(s))
    doc, _ = export_run(run)
    validate(doc)
    card = doc["cardinality"]
    nb = st.nbinom(card["scipy_nbinom"]["n"], card["scipy_nbinom"]["p"])
    rate = doc["clutter"]["rate"]["value"]
    assert nb.mean() == pytest.approx(rate, rel=1e-12)  # mean = rate
    assert nb.var() == pytest.approx(rate + 0.3 * rate**2, rel=1e-12)  # var = rate + φ rate²
    cfg = load_config(run / "tracker.json")
    k = np.arange(30)
    np.testing.assert_allclose(cfg.cardinality_pmf(k), nb.pmf(k), rtol=1e-10)
    pts = np.array([[-500.0, 1200.0], [800.0, 300.0], [0.0, 0.0], [-1100.0, 100.0], [2500.0, 100.0]])
    ref = sum(c["weight"] * st.multivariate_normal(c["mean"], c["cov"]).pdf(pts) for c in comps)
    ref[3:] = 0.0  # (-1100, 100) is in the quay polygon, (2500, 100) outside the bounds
    np.testing.assert_allclose(cfg.birth_intensity(pts), ref, rtol=1e-12)
    with pytest.raises(ValueError, match=r"shape \(\.\.\., 2\)"):
        cfg.birth_intensity(np.zeros((3, 4)))


# ----------------------------------------------------------------------- gate
def test_gate_short_chain_fit_exit_3_export_refuses_override_records(tmp_path, capsys):
    """4 chains × 50 independent draws: bulk ESS ≈ 200 < 400, so the fit is kept but marked
    unconverged (exit 3), export refuses (exit 3) and exports only with the override."""
    rng = np.random.default_rng(31)
    n = rng.poisson(2.0, 30)
    scans = np.repeat(np.arange(30), n)
    spec = box_case(tmp_path, scans, rng.uniform(0, 1000, n.sum()), rng.uniform(0, 500, n.sum()),
                    n_scans_table=30, name="short",
                    sampler={"method": "exact", "chains": 4, "draws": 50, "seed": 2, "progress": False},
                    output={"dir": str(tmp_path / "runs")})
    assert main(["fit", str(spec), "--quiet"]) == 3
    err = capsys.readouterr().err
    run = tmp_path / "runs" / "short"
    s = json.loads((run / "summary.json").read_text())
    assert s["gate"]["converged"] is False and "marked unconverged" in err
    assert any("ess_bulk" in f for f in s["gate"]["failures"])
    assert main(["export", str(run)]) == 3
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "convergence gate failed" in err[0] and "ess_bulk" in err[0] and "below the limit" in err[0]
    assert not (run / "tracker.json").exists()
    assert main(["export", str(run), "--override-gate"]) == 0
    doc = json.loads((run / "tracker.json").read_text())
    validate(doc)
    assert doc["gate"]["passed"] is False and doc["gate"]["overridden"] is True and doc["gate"]["failures"]
    assert "override" in doc["gate"]["override_note"]


def test_gate_same_verdict_from_fit_result_and_run(cellwise_polar_run):
    from sceneprior.gate import check_fit, check_run
    from sceneprior.results import load_run

    path, res = cellwise_polar_run
    a = check_fit(res, quantile=True)
    b = check_run(load_run(path), quantile=True)
    assert [c.to_dict() for c in a.checks] == [c.to_dict() for c in b.checks]
    kinds = {c.diagnostic for c in a.checks}
    assert {"cell_r_hat_q99", "cell_ess_bulk_median", "ess_tail", "divergences"} <= kinds
    assert a.passed  # independent exact draws: R-hat ≈ 1, ESS ≈ number of draws


def test_cell_diagnostics_match_arviz():
    """The gate's vectorised per-cell R-hat and bulk ESS equal arviz's (the reference
    implementation of Vehtari et al. 2021) on AR(1) chains of increasing autocorrelation, one
    stuck chain, ties (rounded draws) and an odd number of draws."""
    import arviz as az

    from sceneprior.gate import cell_diagnostics

    rng = np.random.default_rng(11)
    c, d, n = 4, 601, 24
    phi = np.linspace(0.0, 0.97, n)
    e = rng.normal(size=(c, d, n))
    x = np.zeros((c, d, n))
    x[:, 0] = e[:, 0]
    for t in range(1, d):
        x[:, t] = phi * x[:, t - 1] + e[:, t]
    x[0, :, 5] += 2.0
    x[:, :, 7] = np.round(x[:, :, 7])
    r, ess = cell_diagnostics(x, chunk=10)
    post = az.from_dict(posterior={"f": x}).posterior
    np.testing.assert_allclose(r, np.asarray(az.rhat(post)["f"]), rtol=1e-10)
    np.testing.assert_allclose(ess, np.asarray(az.ess(post, method="bulk")["f"]), rtol=1e-10)


def test_gate_cells_use_99th_percentile_not_max():
    """Over 1000 cells, 0.5 % badly mixed cells pass the cell check (99th percentile of R-hat),
    2 % fail it; a bad rate fails on its own; a uniform map gets no cell checks."""
    from sceneprior.gate import evaluate

    rng = np.random.default_rng(0)

    def cells(n_bad):
        x = rng.gamma(50.0, 1.0, size=(4, 500, 1000))
        x[0, :, :n_bad] *= 1.5  # chain 0 stuck elsewhere in n_bad cells
        return x

    diag = {"variables": {"rate": {"r_hat": 1.001, "ess_bulk": 1900.0, "ess_tail": 1800.0}}, "divergences": 0}
    ok = evaluate(diag, cell_draws=cells(5))
    assert ok.passed and {"cell_r_hat_q99", "cell_ess_bulk_median"} <= {c.diagnostic for c in ok.checks}, ok.message()
    bad = evaluate(diag, cell_draws=cells(20))
    assert not bad.passed and [c.diagnostic for c in bad.failures] == ["cell_r_hat_q99"]
    flat = np.broadcast_to(rng.gamma(50.0, 1.0, size=(4, 500, 1)), (4, 500, 30))
    assert "cell_r_hat_q99" not in {c.diagnostic for c in evaluate(diag, cell_draws=flat).checks}
    worse = evaluate({**diag, "divergences": 2, "variables": {"rate": {"r_hat": 1.03, "ess_bulk": 90.0,
                                                                       "ess_tail": 50.0}}}, quantile=True)
    assert {c.diagnostic for c in worse.failures} == {"r_hat", "ess_bulk", "ess_tail", "divergences"}
    assert "rate: r_hat 1.03 > 1.01" in worse.message()


# ----------------------------------------------------------------------- bad input
def test_export_bad_input_one_line_exit_2(demo_run, tmp_path, capsys):
    from sceneprior.export import export_run

    run = demo_run / "demo"
    for q in ("1.5", "0", "-0.2", "nan"):
        assert main(["export", str(run), "--quantile", q]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "strictly between 0 and 1" in err[0]
    with pytest.raises(ValueError, match="strictly between 0 and 1"):
        export_run(run, quantile=1.0)
    broken = tmp_path / "broken"
    shutil.copytree(run, broken)
    (broken / "cell_draws.nc").unlink()
    assert main(["export", str(broken)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "incomplete run" in err[0] and "cell_draws.nc" in err[0]
    other = tmp_path / "other"
    shutil.copytree(run, other)
    s = json.loads((other / "summary.json").read_text())
    s["schema"] = "sceneprior.summary/0"
    (other / "summary.json").write_text(json.dumps(s))
    for cmd in (["export", str(other)], ["report", str(other)], ["simulate", "--from", str(other), "--out",
                                                                 str(tmp_path / "x")]):
        assert main(cmd) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "another sceneprior version" in err[0]
    assert main(["simulate", "--recordings", "3", "--out", str(tmp_path / "y")]) == 2
    assert "need --from" in capsys.readouterr().err


# ----------------------------------------------------------------------- predictive simulation
def _chisquare(counts, ref):
    """Pearson χ² of integer counts against a scipy.stats discrete law ``ref``; neighbouring
    values merged until every bin expects ≥ 5 (the usual rule for the χ² approximation), the
    last bin holding the upper tail."""
    N = counts.size
    hi = int(max(counts.max(), ref.ppf(1 - 1e-12))) + 1
    pk = ref.pmf(np.arange(hi + 1))
    pk[-1] += ref.sf(hi)
    obs = np.bincount(np.minimum(counts, hi), minlength=hi + 1)
    o_bins, e_bins, o, e = [], [], 0, 0.0
    for ok, ek in zip(obs, pk * N):
        o, e = o + ok, e + ek
        if e >= 5:
            o_bins.append(o)
            e_bins.append(e)
            o, e = 0, 0.0
    o_bins[-1] += o
    e_bins[-1] += e
    e_bins = np.array(e_bins)
    return st.chisquare(o_bins, e_bins * sum(o_bins) / e_bins.sum())


def test_predictive_fresh_draw_per_scan_is_negative_binomial(weak_uniform_run, tmp_path):
    """Counts of scans each with its own posterior draw follow the Gamma–Poisson predictive
    NB(α, β/(β + 1)), α = a + N, β = b + K (rate prior Gamma(a = 1, b = 0.1 scans); BDA3 §2.6),
    and are clearly not Poisson. χ² goodness of fit, level 0.001, fixed seed."""
    path, N, K, _ = weak_uniform_run
    out = tmp_path / "pp"
    assert main(["simulate", "--from", str(path), "--per-scan-draw", "--scans", "20000", "--seed", "3",
                 "--out", str(out)]) == 0
    det = np.loadtxt(out / "recording-0001" / "detections.csv", delimiter=",", skiprows=1, usecols=0)
    counts = np.bincount(det.astype(int), minlength=20000)
    alpha, beta = 1.0 + N, 0.1 + K
    res = _chisquare(counts, st.nbinom(alpha, beta / (beta + 1.0)))
    assert res.pvalue > 1e-3, res
    pois = _chisquare(counts, st.poisson(counts.mean()))
    assert pois.pvalue < 1e-6  # the per-scan rate spread is visible: not a single Poisson law
    scans = np.loadtxt(out / "recording-0001" / "scans.csv", delimiter=",", skiprows=1)
    assert np.unique(scans[:, 1]).size > 1000  # a fresh draw per scan


def test_predictive_one_draw_per_recording_follows_rate_posterior(weak_uniform_run, tmp_path):
    """One draw per recording: each recording's rate is a draw of the rate posterior
    Gamma(α, β) (KS test, scipy.stats.gamma), and its total over K' scans is
    NB(α, β/(β + K')) (sum of K' i.i.d. Poisson(λ̄) is Poisson(K'λ̄); BDA3 §2.6), χ² at 0.001."""
    path, N, K, _ = weak_uniform_run
    out = tmp_path / "pp"
    R, Kp = 300, 25
    assert main(["simulate", "--from", str(path), "--recordings", str(R), "--scans", str(Kp), "--seed", "4",
                 "--out", str(out)]) == 0
    info = json.loads((out / "predictive.json").read_text())
    alpha, beta = 1.0 + N, 0.1 + K
    rates = np.array([r["rate_of_draw"] for r in info["recordings"]])
    assert st.kstest(rates, st.gamma(alpha, scale=1.0 / beta).cdf).pvalue > 1e-3
    totals = np.array([r["detections"] for r in info["recordings"]])
    res = _chisquare(totals, st.nbinom(alpha, beta / (beta + Kp)))
    assert res.pvalue > 1e-3, res
    # the recordings' mean counts centre on the rate posterior mean α/β (4 standard errors)
    means = totals / Kp
    sd = math.sqrt(alpha / beta**2 + alpha / beta / Kp)
    assert abs(means.mean() - alpha / beta) < 4 * sd / math.sqrt(R)
    # the tables keep the input contract: a fit reads them back
    det = (out / "recording-0001" / "detections.csv").read_text().splitlines()[0]
    assert det.replace('"', "") == "scan,x,y"


# ----------------------------------------------------------------------- combining runs (issue 7)
def test_export_combines_a_birth_run(demo_run, cellwise_cartesian_run, tmp_path, capsys):
    """`export CLUTTER --birth BIRTH_RUN`: the birth run's mixture (summary.json 'birth', the
    contract of DEVELOPERS.md "Tracker export") reaches the clutter run's tracker.json with the
    birth run's own Cartesian region and provenance; the evaluator's birth intensity matches
    scipy.stats.multivariate_normal; refusals: a birth run in a polar space, a birth run
    without a mixture, runs with different [sensor] placements, a clutter run that already
    has its own birth mixture (exit 2, one line)."""
    from sceneprior.evaluator import load_config

    birth = tmp_path / "birth"
    shutil.copytree(cellwise_cartesian_run, birth)
    s = json.loads((birth / "summary.json").read_text())
    comps = [{"weight": 0.05, "weight_sd": 0.01, "mean": [150.0, 400.0], "cov": [[900.0, 100.0], [100.0, 400.0]]}]
    s["birth"] = {"components": comps, "state_axes": ["x", "y"], "state_units": ["m", "m"],
                  "rate_per_step": {"mean": 0.05}}
    (birth / "summary.json").write_text(json.dumps(s))
    clutter = tmp_path / "demo"
    shutil.copytree(demo_run / "demo", clutter)
    assert main(["export", str(clutter), "--birth", str(birth)]) == 0
    assert "birth: yes (from run cellwise-box)" in capsys.readouterr().out
    doc = json.loads((clutter / "tracker.json").read_text())
    validate(doc)
    b = doc["birth"]
    assert b["source_run"] == "cellwise-box" and b["region"]["frame"] == "cartesian"
    assert b["region"]["bounds"] == [[0.0, 1000.0], [0.0, 500.0]] and b["region"]["masks"][0]["kind"] == "polygon"
    assert b["convergence"]["passed"] and b["provenance"]["run"] == "cellwise-box"
    assert doc["clutter"]["rate"]["value"] == pytest.approx(json.loads((clutter / "summary.json").read_text())["rate"]["mean"])
    cfg = load_config(clutter / "tracker.json")
    pts = np.array([[150.0, 400.0], [170.0, 390.0], [1200.0, 200.0]])  # outside the triangle mask
    ref = 0.05 * st.multivariate_normal(comps[0]["mean"], comps[0]["cov"]).pdf(pts)
    ref[2] = 0.0  # outside the birth region's bounds
    np.testing.assert_allclose(cfg.birth_intensity(pts), ref, rtol=1e-12)

    def refused(args, message):
        assert main(["export", *map(str, args)]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and message in err[0], err

    refused([clutter, "--birth", demo_run / "demo"], "must be fitted in Cartesian state space")
    refused([clutter, "--birth", cellwise_cartesian_run], "has no birth mixture")
    s2 = dict(s, data={**s["data"], "spec_content": {**s["data"]["spec_content"], "sensor": {"x": 5.0}}})
    (birth / "summary.json").write_text(json.dumps(s2))
    refused([clutter, "--birth", birth], "[sensor] placement")
    (birth / "summary.json").write_text(json.dumps(s))
    refused([birth, "--birth", birth], "has a birth mixture of its own")
