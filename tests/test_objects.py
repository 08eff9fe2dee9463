"""Recordings with known objects in them (issue 7): gates, exposure and the biases they fix.

Scenario (ours, invented): a Cartesian 1000 m × 500 m box (conftest.box_case, 100 m cells),
Poisson clutter of known rate uniform over the box, and known objects detected with
probability P_D at their position plus Gaussian noise N(0, σ²I). References:
* the clutter truth ρ|W| (the simulation's own parameter) and the conjugate Gamma–Poisson
  posterior (Gelman et al., BDA3 §2.6) — one replicate, |z| < 3.5 (DESIGN.md §7);
* the expected extra detections per scan of a fit of all detections, Σ_objects P_D·P(z ∈ W)
  with P(z ∈ box) = [Φ((x1 − x)/σ) − Φ((x0 − x)/σ)]·[Φ((y1 − y)/σ) − Φ((y0 − y)/σ)]
  (independent normal axes; scipy.stats.norm);
* the gated area: discs of radius r wholly inside the box and apart from each other remove
  exactly k·πr² from a scan with k objects (elementary geometry); the probability that a
  detection falls inside a disc gate of radius r around its object is the Rayleigh law
  P_G = 1 − exp(−r²/2σ²) (scipy.stats.rayleigh), so P_D·(1 − P_G) per object leaks in;
* scipy.stats.poisson / nbinom for the per-scan set densities with per-scan windows: the
  set density of a uniform PPP over W_k is the count pmf × n_k! / |W_k|^{n_k} (DESIGN.md §2);
* which detections a gate drops: the distance to the object (numpy hypot; a fact).
Bad input goes through ``sceneprior.cli.main`` (exit 2, one line).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import scipy.stats as st
from scipy.special import gammaln

from conftest import box_case, write_csv
from sceneprior.cli import main

W = 1000.0 * 500.0  # box area, m²
EXACT = {"method": "exact", "chains": 4, "draws": 2000, "seed": 5, "progress": False}


def _lanes(rng, K, radius):
    """Up to 4 objects per scan in slots that keep discs of ``radius`` inside the box and
    apart (radius ≤ 100 m): lanes y = 125, 375 m, x in [r, 500 − r] or [500 + r, 1000 − r].
    Returns (scan, x, y)."""
    present = rng.uniform(size=(K, 4)) < 0.75
    x = np.where(np.arange(4) % 2 == 0, rng.uniform(radius, 500.0 - radius, (K, 4)),
                 rng.uniform(500.0 + radius, 1000.0 - radius, (K, 4)))
    y = np.where(np.arange(4) < 2, 125.0, 375.0) * np.ones((K, 1))
    s = np.repeat(np.arange(K)[:, None], 4, axis=1)
    return s[present], x[present], y[present]


def _anywhere(rng, K, per_scan=4):
    """Objects uniform over the box widened by 100 m (some outside, gates cut at the edge;
    gates of one scan may overlap)."""
    s = np.repeat(np.arange(K), per_scan)
    return s, rng.uniform(-100.0, 1100.0, s.size), rng.uniform(-100.0, 600.0, s.size)


def make_case(tmp, rng, K=300, rate=20.0, p_d=0.9, sigma=20.0, layout="lanes", radius=100.0,
              gate="disc", overdispersion_phi=None, name="case", **over):
    """Write clutter + object detections (mixed, unlabeled), the scans and objects tables and a
    spec; returns (spec path, truth dict)."""
    u = np.ones(K) if overdispersion_phi is None else rng.gamma(1 / overdispersion_phi, overdispersion_phi, K)
    n = rng.poisson(rate * u)
    cs = np.repeat(np.arange(K), n)
    cx, cy = rng.uniform(0, 1000, cs.size), rng.uniform(0, 500, cs.size)
    os_, ox, oy = _lanes(rng, K, radius) if layout == "lanes" else _anywhere(rng, K)
    seen = rng.uniform(size=os_.size) < p_d
    dx = ox[seen] + rng.normal(0, sigma, int(seen.sum()))
    dy = oy[seen] + rng.normal(0, sigma, int(seen.sum()))
    inb = (dx >= 0) & (dx <= 1000) & (dy >= 0) & (dy <= 500)
    s = np.concatenate([cs, os_[seen][inb]])
    x = np.concatenate([cx, dx[inb]])
    y = np.concatenate([cy, dy[inb]])
    o = np.argsort(s, kind="stable")
    ids = np.concatenate([np.arange(c) for c in np.bincount(os_, minlength=K)])
    data = {"detections": "det.csv", "scans": "scans.csv", "objects": "obj.csv"}
    if gate == "disc":
        data["gates"] = {"radius": radius}
        write_csv(tmp / "obj.csv", ["scan", "object", "x", "y"], zip(os_, ids, ox, oy))
    else:
        data["gates"] = {"probability": 0.999}
        write_csv(tmp / "obj.csv", ["scan", "object", "x", "y", "cov_xx", "cov_xy", "cov_yy"],
                  zip(os_, ids, ox, oy, [sigma**2] * os_.size, [0.0] * os_.size, [sigma**2] * os_.size))
    over.setdefault("sampler", EXACT)
    spec = box_case(tmp, s[o], np.round(x[o], 4), np.round(y[o], 4), n_scans_table=K, name=name,
                    data=data, output={"dir": str(tmp / "runs")}, **over)
    p_in = ((st.norm.cdf((1000 - ox) / sigma) - st.norm.cdf(-ox / sigma))
            * (st.norm.cdf((500 - oy) / sigma) - st.norm.cdf(-oy / sigma)))
    truth = {"rate": rate, "K": K, "p_d": p_d, "sigma": sigma, "radius": radius,
             "object_scan": os_, "object_x": ox, "object_y": oy, "det": (s[o], x[o], y[o]),
             "extra_per_scan": p_d * p_in.sum() / K,  # E[object detections in W per scan]
             "objects_per_scan": np.bincount(os_, minlength=K)}
    return spec, truth


def _fit(spec_path, **over):
    from sceneprior.fitting import fit
    from sceneprior.spec import load_spec

    return fit(load_spec(spec_path, overrides=over or None), progress=False, log=lambda m: None)


def _rate(result):
    r = np.asarray(result.rate_draws()).reshape(-1)
    return float(r.mean()), float(r.std(ddof=1))


def _naive(spec_path):
    """The same recording fitted without its objects table (every detection is clutter)."""
    import dataclasses

    from sceneprior.fitting import fit
    from sceneprior.spec import load_spec

    spec = load_spec(spec_path)
    spec = dataclasses.replace(spec, data=dataclasses.replace(spec.data, objects=None, gate_radius=None,
                                                              gate_probability=None))
    return fit(spec, progress=False, log=lambda m: None)


# ----------------------------------------------------------------------------- the three biases
@pytest.mark.parametrize("layout, gate", [("anywhere", "disc"), ("anywhere", "ellipse"), ("lanes", "disc")])
def test_gated_rate_covers_truth_naive_is_biased_by_expected_amount(tmp_path, layout, gate):
    """Gated fit: |rate − ρ|W|| < 3.5 posterior sd. Naive fit of all detections: its excess
    over the truth equals the expected object detections per scan Σ P_D·P(z ∈ W) / K
    (normal CDFs) within 3.5 of its own posterior sd — the size, not only the sign."""
    rng = np.random.default_rng({"anywhere": 11, "lanes": 12}[layout] + (gate == "ellipse"))
    spec, truth = make_case(tmp_path, rng, layout=layout, gate=gate, radius=90.0)
    gated = _fit(spec)
    m, sd = _rate(gated)
    assert abs(m - truth["rate"]) < 3.5 * sd, (m, sd)
    # leak: P_D(1 − P_G) per object, P_G ≥ 0.999 here (Rayleigh: 1 − exp(−90²/2·20²) ≈ 1 − 4e-5)
    assert 0.9 * 4 * (1 - st.rayleigh.cdf(90.0 / 20.0)) < 0.05 * sd
    naive = _naive(spec)
    mn, sdn = _rate(naive)
    z = (mn - truth["rate"] - truth["extra_per_scan"]) / sdn
    assert abs(z) < 3.5, (mn, truth["extra_per_scan"], sdn)
    assert mn - truth["rate"] > 3.5 * sdn  # and the bias is clearly there (P_D × 2–3 objects per scan)


def test_gating_without_exposure_correction_is_biased_down_by_gated_fraction(tmp_path):
    """Dropping the gated detections but keeping E = K|W| gives rate ρ|W|·(1 − f) + leak, f the
    expected fraction of the window gated = Σ_k k_objects·πr² / (K|W|) (discs inside the box
    and apart; elementary geometry), leak = P_D·(1 − P_G)·objects per scan (Rayleigh)."""
    import dataclasses

    from sceneprior.models.uniform import exact_posterior

    rng = np.random.default_rng(21)
    spec, truth = make_case(tmp_path, rng, layout="lanes", radius=100.0)
    gated = _fit(spec)
    stats = gated.stats
    K = truth["K"]
    f = truth["objects_per_scan"].sum() * math.pi * truth["radius"] ** 2 / (K * W)
    assert f > 0.15  # a large gated share, so the bias is many sd
    # the fit's own exposure is the analytic one (exact area rule: round-off only)
    assert stats.total_exposure == pytest.approx(K * W * (1 - f), rel=1e-9)
    wrong = dataclasses.replace(stats, exposure=stats.n_scans * stats.window_area)
    a, b = exact_posterior(wrong, gated.prior)
    mean, sd = a / b * W, math.sqrt(a) / b * W
    leak = truth["p_d"] * (1 - st.rayleigh.cdf(truth["radius"] / truth["sigma"])) * truth["objects_per_scan"].mean()
    expected = truth["rate"] * (1 - f) + leak
    assert abs(mean - expected) < 3.5 * sd, (mean, expected, sd)
    assert truth["rate"] - mean > 10 * sd
    m, sdg = _rate(gated)  # the corrected fit of the same recording covers the truth
    assert abs(m - truth["rate"]) < 3.5 * sdg


def test_dropped_detections_and_exposure_in_the_run(tmp_path):
    """summary.json: dropped_in_gates = detections within r of an object of their scan (hypot),
    exposure K|W| − Σ k·πr²; scans.nc keeps |W_k| = |W| − k_objects·πr²; the printed summary
    names the gated detections."""
    from sceneprior.results import load_run

    rng = np.random.default_rng(31)
    spec, truth = make_case(tmp_path, rng, K=120, layout="lanes", radius=100.0)
    code = main(["fit", str(spec), "--out", str(tmp_path / "runs")])
    assert code == 0
    s = json.loads((tmp_path / "runs" / "case" / "summary.json").read_text())
    ds, dx, dy = truth["det"]
    os_, ox, oy = truth["object_scan"], truth["object_x"], truth["object_y"]
    inside = np.zeros(ds.size, bool)
    for k in np.unique(os_):
        rows = np.flatnonzero(ds == k)
        d = np.hypot(dx[rows, None] - ox[None, os_ == k], dy[rows, None] - oy[None, os_ == k])
        inside[rows] = (d <= truth["radius"]).any(axis=1)
    assert s["data"]["dropped_in_gates"] == int(inside.sum())
    assert s["data"]["detections_used"] == ds.size - int(inside.sum())
    k_obj = truth["objects_per_scan"]
    area = math.pi * truth["radius"] ** 2
    assert s["data"]["exposure_m2_scan"] == pytest.approx(truth["K"] * W - k_obj.sum() * area, rel=1e-9)
    assert s["gates"]["gates"] == k_obj.sum() and s["gates"]["shape"] == "disc"
    run = load_run(tmp_path / "runs" / "case")
    np.testing.assert_allclose(run.scans["window_area"].values, W - k_obj * area, rtol=1e-9)
    assert run.removed().shape == (truth["K"], 50)


def test_printed_summary_names_gated_detections(tmp_path, capsys):
    rng = np.random.default_rng(32)
    spec, _ = make_case(tmp_path, rng, K=30, layout="lanes")
    assert main(["fit", str(spec), "--out", str(tmp_path / "runs")]) == 0
    out = capsys.readouterr().out
    assert "in gates" in out and "gates:" in out and "% of the window per scan" in out


# ----------------------------------------------------------------------------- per-scan windows
def test_loo_pointwise_uses_each_scans_window(tmp_path):
    """Per-scan log-likelihood of a gated run = Poisson logpmf(n_k; ρ|W_k|) + log n_k! −
    n_k log|W_k| (scipy.stats.poisson; uniform PPP set density), |W_k| = |W| − k·πr²; and the
    predictive means of the checks are ρ|W_k|."""
    from sceneprior.loo import pointwise_loglik
    from sceneprior.predictive import load_draws
    from sceneprior.results import load_run, write_run

    rng = np.random.default_rng(41)
    spec, truth = make_case(tmp_path, rng, K=80, layout="lanes", radius=100.0,
                            sampler={"method": "exact", "chains": 2, "draws": 300, "seed": 1, "progress": False})
    run = load_run(write_run(_fit(spec)))
    rd = load_draws(run, max_draws=None)
    ll = pointwise_loglik(run, rd)
    Wk = W - truth["objects_per_scan"] * math.pi * truth["radius"] ** 2
    rho = np.asarray(run.posterior.posterior["intensity"].values).reshape(-1)
    n = rd.n
    ref = st.poisson.logpmf(n[None, :], rho[:, None] * Wk[None, :]) + gammaln(n + 1)[None, :] - n * np.log(Wk)
    # the per-cell draws are kept in float32 (cell_draws.nc): n_k·log λ carries ~1e-7 relative error
    np.testing.assert_allclose(ll, ref, rtol=1e-6)
    np.testing.assert_allclose(rd.mu(), rho[:, None] * Wk[None, :], rtol=1e-6)


def test_overdispersed_gated_likelihood_equals_scipy_sum(tmp_path):
    """uniform + over-dispersion + a scan covariate with gates: the model's likelihood factor at
    fixed (ρ, φ, γ) equals Σ_k [nbinom.logpmf(n_k; a, a/(a + μ_k)) + log n_k! − n_k log|W_k|],
    μ_k = ρ|W_k|·m_k (scipy.stats.nbinom; effect handlers, no MCMC); and the Poisson form
    (no over-dispersion) equals the scipy Poisson sum."""
    import jax.numpy as jnp
    from numpyro import handlers

    from sceneprior.fitting import prepare
    from sceneprior.models.registry import get_model, resolve_prior
    from sceneprior.spec import load_spec

    rng = np.random.default_rng(51)
    K = 60
    spec_path, truth = make_case(tmp_path, rng, K=K, rate=6.0, layout="lanes", radius=100.0)
    rain = (rng.uniform(size=K) < 0.4).astype(int)
    write_csv(tmp_path / "scans.csv", ["scan", "rain"], zip(range(K), rain))
    Wk = W - truth["objects_per_scan"] * math.pi * truth["radius"] ** 2
    for od in (True, False):
        model = {"kind": "uniform", "scan_covariates": ["rain"], "overdispersion": od}
        spec = load_spec(spec_path, overrides={"model": model, "sampler": {"method": "nuts"}})
        kind = get_model(spec.model.kind)
        prior = resolve_prior(kind, spec.model.prior, "t")
        _, rec, stats = prepare(spec)
        setup = kind.setup(stats, prior, spec.model)
        design = setup.extra["scan_design"]
        rho, phi, g = 1.1e-5, 0.35, 0.3
        params = {"intensity": rho, "phi": phi, "scan_coef_std": jnp.array([g])}
        tr = handlers.trace(handlers.substitute(handlers.seed(kind.fn, 0), data=params)).get_trace(**setup.inputs)
        got = float(tr["loglik"]["fn"].log_prob(tr["loglik"]["value"]).sum())
        m = np.exp(design.log_multiplier(np.array([[g]]))[0])
        mu = rho * Wk * m
        n = stats.scan_counts
        count = (st.nbinom(1 / phi, (1 / phi) / (1 / phi + mu)).logpmf(n) if od else st.poisson.logpmf(n, mu))
        ref = np.sum(count + gammaln(n + 1) - n * np.log(Wk))
        assert got == pytest.approx(ref, rel=1e-10, abs=1e-8), od


def test_overdispersed_gated_fit_covers_truth(tmp_path):
    """NUTS, uniform + over-dispersion with gates (19 % of the window gated on average), clutter
    with a per-scan Gamma(1/φ, φ) factor (φ = 0.15): the rate covers ρ|W| and φ its truth,
    each within 3.5 posterior sd."""
    rng = np.random.default_rng(61)
    spec, truth = make_case(tmp_path, rng, K=300, rate=20.0, layout="lanes", radius=100.0,
                            overdispersion_phi=0.15, model={"kind": "uniform", "overdispersion": True},
                            sampler={"method": "nuts", "chains": 2, "warmup": 300, "draws": 500, "seed": 2,
                                     "progress": False})
    res = _fit(spec)
    m, sd = _rate(res)
    assert abs(m - truth["rate"]) < 3.5 * sd, (m, sd)
    phi = np.asarray(res.idata.posterior["phi"]).reshape(-1)
    assert abs(phi.mean() - 0.15) < 3.5 * phi.std(ddof=1), (phi.mean(), phi.std())


# ----------------------------------------------------------------------------- bad input
def _spec_with(tmp_path, obj_rows, header=("scan", "object", "x", "y"), gates=None, model=None):
    write_csv(tmp_path / "obj.csv", list(header), obj_rows)
    data = {"detections": "det.csv", "scans": "scans.csv", "objects": "obj.csv"}
    if gates is not None:
        data["gates"] = gates
    over = {"data": data, "sampler": EXACT}
    if model is not None:
        over["model"] = model
    return box_case(tmp_path, [0, 1, 1], [10.0, 500.0, 900.0], [10.0, 250.0, 400.0], n_scans_table=4, **over)


BAD_OBJECTS = [
    # (rows, header, gates, model, expected fragments)
    ([[0, "a", 1.0, 1.0], [9, "b", 2.0, 2.0]], None, {"radius": 50.0}, None,
     ["obj.csv", "not in the scans table", "row 2", "add those scans"]),
    ([[0, "a", 1.0, 1.0, 30.0], [1, "b", 2.0, 2.0, 0.0], [2, "c", 2.0, 2.0, -4.0]],
     ("scan", "object", "x", "y", "gate_radius"), None, None,
     ["obj.csv", "'gate_radius'", "non-positive", "rows 2, 3", "positive number of metres"]),
    ([[0, "a", 1.0, 1.0], [1, "a", 2.0, 2.0], [0, "a", 3.0, 3.0]], None, {"radius": 50.0}, None,
     ["obj.csv", "object id 'a'", "more than once in scan 0", "row 3", "column 'object'"]),
    ([[0, 1, 1.0, 1.0, 100.0, 200.0, 100.0]], ("scan", "object", "x", "y", "cov_xx", "cov_xy", "cov_yy"),
     {"probability": 0.99}, None, ["obj.csv", "not positive definite", "row 1", "'cov_xy'"]),
    ([[0, 1, 1.0, 1.0]], None, {"probability": 0.99}, None,
     ["obj.csv", "no column 'cov_xx'", "data.columns.cov_xx"]),
    ([[0, 1, 1.0, 1.0]], None, None, None, ["obj.csv", "no column 'gate_radius'", "data.gates.radius"]),
    ([[0, 1, "nan", 1.0]], None, {"radius": 50.0}, None, ["obj.csv", "column 'x'", "row 1"]),
    ([[0, 1, 1.0, 1.0]], None, {"radius": 50.0, "probability": 0.9}, None, ["spec.toml", "not both"]),
    ([[0, 1, 1.0, 1.0]], None, {"radius": -5.0}, None, ["spec.toml", "data.gates.radius", "positive"]),
    ([[0, 1, 1.0, 1.0]], None, {"probability": 1.0}, None, ["spec.toml", "data.gates.probability"]),
    ([[0, 1, 1.0, 1.0]], None, {"radius": 50.0}, {"kind": "mixture"}, ["spec.toml", "mixture", "gates"]),
    ([[0, 1, 1.0, 1.0]], None, {"radius": 50.0}, {"kind": "loglinear", "covariates": ["x"], "overdispersion": True},
     ["spec.toml", "per-scan terms", "uniform"]),
]


@pytest.mark.parametrize("rows, header, gates, model, frags", BAD_OBJECTS)
def test_bad_objects_exit_2_one_line(tmp_path, capsys, rows, header, gates, model, frags):
    spec = _spec_with(tmp_path, rows, header or ("scan", "object", "x", "y"), gates, model)
    code = main(["fit", str(spec), "--out", str(tmp_path / "runs")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1, err
    for f in frags:
        assert f in err[0], (f, err[0])


def test_gates_without_objects_table_refused(tmp_path, capsys):
    spec = box_case(tmp_path, [0], [1.0], [1.0], n_scans_table=2,
                    data={"detections": "det.csv", "scans": "scans.csv", "gates": {"radius": 40.0}})
    code = main(["fit", str(spec)])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "data.objects" in err[0]


def test_objects_outside_region_allowed_and_empty_table(tmp_path, capsys):
    """Positions outside the region are fine (their gates are cut at the edge: a disc centred
    60 m outside with radius 100 m removes its circular segment, r²·acos(d/r) − d·sqrt(r² − d²)
    (elementary geometry)); a header-only objects table gives no gates."""
    spec = _spec_with(tmp_path, [[0, 1, -60.0, 250.0], [1, 2, 5000.0, 5000.0]], gates={"radius": 100.0})
    assert main(["fit", str(spec), "--out", str(tmp_path / "runs")]) == 0
    s = json.loads((tmp_path / "runs" / "case" / "summary.json").read_text())
    r, d = 100.0, 60.0
    seg = r * r * math.acos(d / r) - d * math.sqrt(r * r - d * d)
    assert s["data"]["exposure_m2_scan"] == pytest.approx(4 * W - seg, rel=1e-9)
    write_csv(tmp_path / "obj.csv", ["scan", "object", "x", "y"], [])
    assert main(["fit", str(spec), "--out", str(tmp_path / "runs")]) == 0
    s = json.loads((tmp_path / "runs" / "case" / "summary.json").read_text())
    assert s["data"]["exposure_m2_scan"] == pytest.approx(4 * W, rel=1e-12) and s["gates"]["gates"] == 0
    capsys.readouterr()


def test_zone_moments_with_gates_match_the_dense_definition():
    """checks._gated_zone_moments (sparse) against the definition written densely: for each
    draw s, zone z and scan k, μ_skz = m_sk·Σ_{c∈z} λ_sc(|c ∩ W| − removed[k, c]); returns
    Σ_k μ_skz and φ_s Σ_k μ_skz² (the negative-binomial variance term)."""
    import scipy.sparse as sp

    from sceneprior.checks import _gated_zone_moments, _zones

    rng = np.random.default_rng(71)
    S, K, shape = 5, 30, (6, 4)
    C = shape[0] * shape[1]
    w = rng.uniform(5e3, 1e4, C)
    removed = sp.random(K, C, density=0.2, random_state=3, data_rvs=lambda n: rng.uniform(0, 5e3, n)).tocsr()
    lam = rng.uniform(1e-6, 5e-6, (S, C))
    m = rng.uniform(0.5, 2.0, (S, K))
    phi = rng.uniform(0.1, 0.5, S)
    zone, Z = _zones(shape, 2)
    Lz = np.stack([(lam * w)[:, zone == z].sum(axis=1) for z in range(Z)], axis=1)
    mean_z, nb_z = _gated_zone_moments(removed, lam, m, zone, Z, Lz, m.sum(axis=1, keepdims=True),
                                       (m**2).sum(axis=1, keepdims=True), phi)
    Wk = w[None, :] - removed.toarray()  # (K, C) dense per-scan window areas
    mu = m[:, :, None] * np.stack([(lam[:, None, zone == z] * Wk[None, :, zone == z]).sum(-1)
                                   for z in range(Z)], axis=-1)  # (S, K, Z)
    np.testing.assert_allclose(mean_z, mu.sum(axis=1), rtol=1e-12)
    np.testing.assert_allclose(nb_z, phi[:, None] * (mu**2).sum(axis=1), rtol=1e-10)


def test_check_of_a_gated_run_expects_each_scans_window(tmp_path):
    """sceneprior check on a gated uniform run: the zone residuals' expected counts sum to
    Σ_k ρ|W_k| (|W_k| = |W| − k·πr², elementary geometry) averaged over the draws."""
    from sceneprior.checks import check_run
    from sceneprior.results import load_run, write_run

    rng = np.random.default_rng(72)
    spec, truth = make_case(tmp_path, rng, K=60, layout="lanes", radius=100.0,
                            sampler={"method": "exact", "chains": 2, "draws": 300, "seed": 1, "progress": False})
    path = write_run(_fit(spec))
    rep = check_run(path, prior_side=False, sensitivity=False, write=False)
    Wk = W - truth["objects_per_scan"] * math.pi * truth["radius"] ** 2
    rho = np.asarray(load_run(path).cell_draws["intensity"].values, float)[:, 0]
    expected = sum(r["expected"] for r in rep["spatial_residuals"]["table"])
    assert expected == pytest.approx(float(rho.mean() * Wk.sum()), rel=1e-9)
