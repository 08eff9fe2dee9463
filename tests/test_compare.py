"""Site comparison (compare.py) and the partially pooled sites model (models/hierarchical.py).

References:
* ratio of independent Gamma posteriors: if X ~ Gamma(a₁, b₁), Y ~ Gamma(a₂, b₂), then
  (b₁X)/(b₂Y) ~ BetaPrime(a₁, a₂) (Johnson, Kotz & Balakrishnan, *Continuous Univariate
  Distributions* vol. 2, §25.7), so X/Y ~ (b₂/b₁)·BetaPrime — scipy.stats.betaprime;
* calibration of P(A > B): under identical sites it is (close to) uniform on (0, 1);
  Kolmogorov–Smirnov (scipy.stats.kstest) over 20 pairs;
* Bayesian FDR (Müller, Parmigiani, Robert & Rousseau 2004, JASA 99): the posterior
  expected FDR of the marked set equals E[FDP | data], so its average over data drawn from
  the prior is ≤ the target;
* the window overlap area: shapely polygon intersection;
* the sites model's hyperparameter posterior: quadrature of the marginal likelihood
  Π_s NB(N_s; α, (α/μ)/(α/μ + K_s)) built with scipy.stats.nbinom (BDA3 §5.3 for the
  collapsed-hierarchy approach), and E[ρ_s | data] = E[(α + N_s)/(α/μ + K_s) | data];
  with gates around known objects K_s becomes the site's exposure Σ_{k∈s}|W_k|/|W| and N_s
  the detections outside the gates, both computed here independently of the package: discs of
  radius r wholly inside the box and apart remove exactly πr² each (elementary geometry), and
  a detection is inside a disc when its distance to the centre is ≤ r (numpy hypot).
"""

from __future__ import annotations

import json
import math
import tomllib

import numpy as np
import pytest
import scipy.stats as st

from conftest import box_recording, lane_gate_recording, quick_fit, write_csv, write_spec
from sceneprior.errors import InputError

BOX = 1000.0 * 500.0


def _exact_uniform(tmp, n, name, seed, **over):
    spec = box_recording(tmp, n, rng=np.random.default_rng(seed), name=name,
                         sampler={"method": "exact", "chains": 4, "draws": 1000, "seed": seed, "progress": False},
                         output={"dir": str(tmp / "runs")}, **over)
    return quick_fit(spec)


def test_rate_ratio_matches_betaprime(tmp_path):
    from sceneprior.compare import compare_runs
    from sceneprior.results import write_run

    rng = np.random.default_rng(1)
    nA, nB = rng.poisson(10.0, 60), rng.poisson(8.0, 80)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    pa = write_run(_exact_uniform(tmp_path / "a", nA, "site-a", 11))
    pb = write_run(_exact_uniform(tmp_path / "b", nB, "site-b", 12))
    res = compare_runs(pa, pb)
    # posteriors of ρ: Gamma(1 + N, (0.1 + K)|W|) (BDA3 §2.6)
    a1, b1 = 1 + nA.sum(), (0.1 + nA.size) * BOX
    a2, b2 = 1 + nB.sum(), (0.1 + nB.size) * BOX
    ref = st.betaprime(a1, a2, scale=b2 / b1)
    R = res["_draws"]["rate_ratio"]
    assert st.kstest(R, ref.cdf).pvalue > 0.01
    assert abs(R.mean() - ref.mean()) < 4 * ref.std() / math.sqrt(R.size)
    p = ref.sf(1.0)
    assert abs(res["overlap"]["p_a_greater"] - p) < 4 * math.sqrt(p * (1 - p) / R.size) + 1e-12
    assert res["overlap"]["area_m2"] == pytest.approx(BOX, rel=1e-9)  # identical windows, no edges cut
    assert "same sensor" in res["frame"]


def test_p_a_greater_is_uniform_over_identical_pairs(tmp_path):
    from sceneprior.compare import compare_sides, side_from_fit

    rng = np.random.default_rng(2)
    ps = []
    for i in range(20):
        sides = []
        for s in ("a", "b"):
            d = tmp_path / f"{i}{s}"
            d.mkdir()
            sides.append(side_from_fit(_exact_uniform(d, rng.poisson(6.0, 50), f"p{i}{s}", 100 * i + len(s) + ord(s))))
        ps.append(compare_sides(*sides)["overlap"]["p_a_greater"])
    assert st.kstest(ps, "uniform").pvalue > 0.01, ps
    assert min(ps) < 0.25 and max(ps) > 0.75  # not "never extreme"


def test_frames_must_be_shared(tmp_path, capsys):
    from sceneprior.cli import main
    from sceneprior.results import write_run

    n = np.random.default_rng(3).poisson(4.0, 20)
    for d in ("a", "b", "c"):
        (tmp_path / d).mkdir()
    pa = write_run(_exact_uniform(tmp_path / "a", n, "placed", 1, sensor={"x": 0.0, "y": 0.0, "heading": 0.0}))
    pb = write_run(_exact_uniform(tmp_path / "b", n, "unplaced", 2))
    pc = write_run(_exact_uniform(tmp_path / "c", n, "elsewhere", 3,
                                  sensor={"x": 0.0, "y": 0.0, "heading": 0.0, "frame": "other-harbour"}))
    from sceneprior.compare import compare_runs

    with pytest.raises(InputError, match="share no frame.*unplaced has no \\[sensor\\]"):
        compare_runs(pa, pb)
    with pytest.raises(InputError, match="frames 'shared' and 'other-harbour'"):
        compare_runs(pa, pc)
    assert main(["compare", str(pa), str(pb)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "share no frame" in err[0]


def test_polar_jacobian_of_cell_intensities():
    """Per m·rad cell average = per m² cell average × r_mid, since a polar cell's area is
    (r₂² − r₁²)/2 · Δθ = r_mid Δr Δθ: expected counts agree both ways."""
    from sceneprior.compare import _per_m2
    from sceneprior.geometry import Region

    g = Region("polar", (200.0, 6000.0), (-70.0, 70.0)).grid((29, 28))
    lam = np.random.default_rng(0).uniform(1e-8, 1e-6, (3, g.n_cells))
    r_mid = np.repeat(g.centres0, g.shape[1])
    dr = np.repeat(np.diff(g.edges0), g.shape[1])
    dth = np.tile(np.deg2rad(np.diff(g.edges1)), g.shape[0])
    per_mrad = lam * r_mid
    np.testing.assert_allclose(per_mrad * dr * dth, lam * g.cell_area().reshape(-1), rtol=1e-12)
    np.testing.assert_allclose(_per_m2(per_mrad, "m-1 rad-1 scan-1", g, "t"), lam, rtol=1e-12)
    np.testing.assert_allclose(_per_m2(per_mrad * math.pi / 180, "m-1 degree-1 scan-1", g, "t"), lam, rtol=1e-12)
    with pytest.raises(InputError, match="cannot be put in common units"):
        _per_m2(lam, "degree-2 scan-1", g, "t")


@pytest.fixture(scope="module")
def two_masts(tmp_path_factory):
    """The demo's two masts (simulate_scene), uniform exact fits with the masts' specs."""
    from conftest import REPO
    from sceneprior.fitting import fit
    from sceneprior.results import write_run
    from sceneprior.simulate import simulate_scene
    from sceneprior.spec import spec_from_dict

    tmp = tmp_path_factory.mktemp("masts")
    info = simulate_scene(tmp / "demo-data", n_scans=300, log=lambda m: None)
    paths = {}
    for mast, sub in (("breakwater", ""), ("quay", "quay")):
        d = tmp / "demo-data" / sub
        raw = tomllib.loads((REPO / "models" / f"lowmarsh-{mast}.toml").read_text())
        raw["model"] = {"kind": "uniform"}  # the masts' specs with the conjugate uniform model
        data = {"detections": str(d / "detections.csv"), "scans": str(d / "scans.csv")}
        if "objects" in raw["data"]:  # the breakwater's vessels, gated out
            data["objects"] = str(d / "objects.csv")
        spec = spec_from_dict(raw, base_dir=REPO / "models", source=f"lowmarsh-{mast}.toml", overrides={
            "data": data,
            "sampler": {"method": "exact", "chains": 4, "draws": 500, "seed": 1, "progress": False},
            "output": {"dir": str(tmp / "runs")}})
        paths[mast] = write_run(fit(spec, progress=False, log=lambda m: None))
    return paths, info, tmp


def test_two_masts_overlap_matches_shapely(two_masts, capsys):
    import shapely

    from sceneprior.cli import main
    from sceneprior.compare import compare_runs
    from sceneprior.simulate import Lowmarsh, QuayMast

    paths, info, tmp = two_masts
    assert info["quay"]["sensor"] == {"x": 1500.0, "y": -200.0, "heading": -20.0, "frame": "lowmarsh"}
    res = compare_runs(paths["breakwater"], paths["quay"], out=tmp / "cmp")

    def window(r, b, land, x0=0.0, y0=0.0, h=0.0, n=400):
        def sector(b_lo, b_hi):
            t = np.deg2rad(np.linspace(b_lo, b_hi, n) + h)
            outer = np.column_stack([x0 + r[1] * np.sin(t), y0 + r[1] * np.cos(t)])
            inner = np.column_stack([x0 + r[0] * np.sin(t[::-1]), y0 + r[0] * np.cos(t[::-1])])
            return shapely.Polygon(np.vstack([outer, inner]))
        return shapely.difference(sector(*b), sector(*land))

    lm, q = Lowmarsh(), QuayMast()
    wa = window(lm.range_m, lm.bearing_deg, lm.land_bearing_deg)
    wb = window(q.range_m, q.bearing_deg, q.land_bearing_deg, q.x_m, q.y_m, q.heading_deg)
    inter = shapely.intersection(wa, wb)
    h = res["grid"]["cell_m"]
    # each midpoint sub-point stands for a square of side h/4: the misclassified area is at most
    # the overlap's perimeter × the square's diagonal
    bound = inter.length * h / 4 * math.sqrt(2)
    assert abs(res["overlap"]["area_m2"] - inter.area) < bound, (res["overlap"]["area_m2"], inter.area, bound)
    assert inter.area > 5e6  # the masts do share a lot of sea
    assert (tmp / "cmp" / "log_ratio.nc").is_file()
    saved = json.loads((tmp / "cmp" / "comparison.json").read_text())
    assert saved["runs"] == ["lowmarsh-breakwater", "lowmarsh-quay"] and "_draws" not in saved
    assert json.loads((paths["breakwater"] / "summary.json").read_text())["data"]["dropped_in_gates"] > 0
    assert main(["compare", str(paths["breakwater"]), str(paths["quay"])]) == 0
    out = capsys.readouterr().out
    assert "P(rate_lowmarsh-breakwater > rate_lowmarsh-quay)" in out and "shared frame 'lowmarsh'" in out


def test_bayesian_fdr_is_calibrated_over_prior_draws():
    """Truth per cell from the prior, data from the model, exact conjugate posteriors: the
    average false-discovery proportion (wrong sign) over 30 replicates is ≤ the target."""
    from sceneprior.compare import Side, compare_sides, fdr_select
    from sceneprior.geometry import Region

    rng = np.random.default_rng(7)
    region = Region("cartesian", (0.0, 2000.0), (0.0, 2000.0))
    grid = region.grid((20, 20))
    area = grid.cell_area().reshape(-1)
    a0, lam0, K, S, target = 6.0, 2e-6, 3, 1000, 0.1
    b0 = a0 / lam0  # prior Gamma(a0, b0) per cell [m⁻² scan⁻¹]
    fdp = []
    for _ in range(30):
        sides, truth = [], []
        for name in ("a", "b"):
            lam = rng.gamma(a0, 1 / b0, grid.n_cells)
            N = rng.poisson(K * lam * area)
            draws = rng.gamma(a0 + N, 1.0 / (b0 + K * area), size=(S, grid.n_cells))
            sides.append(Side(name, region, grid, None, draws, draws @ area, area))
            truth.append(lam)
        res = compare_sides(*sides, cell_m=100.0, fdr=target)
        c = res["cells"]
        marked = np.array(c["marked"])
        idx = np.array([i * 20 + j for i, j in c["index"]])
        says_a = np.array([d.startswith("a") for d in c["direction"]])
        wrong = says_a != (truth[0][idx] > truth[1][idx])
        fdp.append(float((marked & wrong).sum() / max(marked.sum(), 1)))
        assert res["grid"]["compared_cells"] == 400
        # the rule's own guarantee and its maximality
        v = np.array(c["v"])
        assert np.mean(1 - v[marked]) <= target + 1e-12 if marked.any() else True
        unmarked = v[~marked]
        if unmarked.size:
            nxt = np.append(v[marked], unmarked.max())
            assert np.mean(1 - nxt) > target
    fdp = np.array(fdp)
    assert fdp.mean() <= target + 3 * fdp.std(ddof=1) / math.sqrt(fdp.size), fdp
    m, f = fdr_select(np.array([0.99, 0.5, 0.97, 0.9]), 0.05)
    assert m.tolist() == [True, False, True, True] and f == pytest.approx((0.01 + 0.03 + 0.1) / 3)


# ----------------------------------------------------------------------------- sites model
SITE_SCANS = [200, 200, 150, 150, 100, 4]


@pytest.fixture(scope="module")
def sites_fit(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("sites")
    rng = np.random.default_rng(99)
    rates = np.array([6.0, 7.5, 5.0, 6.5, 8.0, 14.0])  # per scan; the 4-scan site looks hot
    site = np.repeat([f"mast{j}" for j in range(6)], SITE_SCANS)
    n = rng.poisson(rates[np.repeat(np.arange(6), SITE_SCANS)])
    spec = box_recording(tmp, n, scans_columns={"site": site}, rng=rng, name="sites",
                         model={"kind": "sites"},
                         sampler={"chains": 2, "warmup": 400, "draws": 1000, "seed": 6, "progress": False},
                         output={"dir": str(tmp / "runs")})
    return quick_fit(spec), n, site


def _quadrature(n, site, window_scans=None):
    """Posterior of (log μ_rate, log τ) on a grid: prior × Π_s nbinom(N_s; α, β/(β + E_s)),
    E_s the site's exposure in scans' worth of the window: K_s without gates, Σ_{k∈s}|W_k|/|W|
    with them (``window_scans``: per-scan |W_k|/|W|)."""
    labels = sorted(set(site))
    N = np.array([n[site == s].sum() for s in labels])
    ws = np.ones(len(site)) if window_scans is None else np.asarray(window_scans, float)
    K = np.array([ws[site == s].sum() for s in labels])
    # log group-mean rate per scan; wide, so that the tail of a few-site posterior is not cut
    lm = np.linspace(math.log(0.2), math.log(200.0), 1500)
    lt = np.linspace(math.log(1e-4), math.log(10.0), 500)  # log τ
    LM, LT = np.meshgrid(lm, lt, indexing="ij")
    mu, tau = np.exp(LM), np.exp(LT)
    alpha = 1 / tau**2
    beta = alpha / mu  # in scans
    logp = st.norm(math.log(10.0), 3.0).logpdf(LM) + st.halfnorm(scale=1.0).logpdf(tau) + LT  # Jacobian dτ = τ dlogτ
    for Ns, Ks in zip(N, K):
        logp = logp + st.nbinom(alpha, beta / (beta + Ks)).logpmf(Ns)
    w = np.exp(logp - logp.max())
    w /= w.sum()
    post_rate = (alpha[..., None] + N) / (beta[..., None] + K)  # E[ρ_s|W| | α, μ, data] per scan
    return {"log_mu": (w * LM).sum(), "log_mu_sd": math.sqrt((w * LM**2).sum() - (w * LM).sum() ** 2),
            "tau": (w * tau).sum(), "site_rate": np.tensordot(w, post_rate, axes=([0, 1], [0, 1])),
            "labels": labels, "N": N, "K": K}


def _assert_matches_quadrature(res, q):
    """Group mean, τ and the site rates of a sites fit within 4 MCSE of the quadrature."""
    import arviz as az

    post = res.idata.posterior
    log_mu_rate = np.log(np.asarray(post["rate"]))  # log(μ|W|), μ the group-mean intensity
    ds = az.convert_to_dataset({"log_mu": log_mu_rate, "cv": np.asarray(post["cv"])})
    mcse = az.mcse(ds, method="mean")
    assert abs(log_mu_rate.mean() - q["log_mu"]) < 4 * float(mcse["log_mu"]), (log_mu_rate.mean(), q["log_mu"])
    assert abs(float(post["cv"].mean()) - q["tau"]) < 4 * float(mcse["cv"]), (float(post["cv"].mean()), q["tau"])
    assert float(log_mu_rate.std()) == pytest.approx(q["log_mu_sd"], rel=0.1)
    sr = post["site_rate"]
    assert [str(s) for s in sr.coords["site"].values] == q["labels"]
    means = sr.mean(dim=("chain", "draw")).values
    site_mcse = az.mcse(res.idata, var_names=["site_rate"], method="mean")["site_rate"].values
    np.testing.assert_array_less(np.abs(means - q["site_rate"]), 4 * site_mcse)
    return means, site_mcse


def test_sites_hyperparameters_match_quadrature(sites_fit):
    res, n, site = sites_fit
    assert res.diagnostics["divergences"] == 0
    _assert_matches_quadrature(res, _quadrature(n, site))
    assert math.isclose(res.stats.window_total, BOX)


def test_sites_few_scans_shrunk_toward_group(sites_fit):
    res, n, site = sites_fit
    q = _quadrature(n, site)
    means, _ = _assert_matches_quadrature(res, q)
    raw = q["N"] / q["K"]
    group = float(res.idata.posterior["rate"].mean())
    few = q["labels"].index("mast5")
    shrink = (raw - means) / (raw - group)  # fraction of the way from the raw rate to the group
    assert 0.2 < shrink[few] < 1.0
    many = int(np.argmax(q["K"]))
    assert abs(shrink[many]) < shrink[few]
    s = res.model.summary(res)
    assert s["sites"]["mast5"]["scans"] == 4 and s["sites"]["mast5"]["raw_rate"] == pytest.approx(raw[few])


GATED_SITE_SCANS = [150, 150, 120, 5]
GATE_R = 100.0  # m: disc gates in four lane slots, wholly inside the box and apart


@pytest.fixture(scope="module")
def gated_sites_fit(tmp_path_factory):
    """Four sites, clutter uniform over the box at a known rate per site; known objects in up
    to four lane slots per scan (conftest.lane_gate_recording, gates of radius 100 m): every
    slot in every scan of mast0 and mast3 (4πr², 25 % of the window gated), none at mast1,
    each slot with probability ½ at mast2. Returns (FitResult, n outside gates per scan, site
    labels, |W_k|/|W| per scan)."""
    tmp = tmp_path_factory.mktemp("gated-sites")
    rng = np.random.default_rng(314)
    rates = np.array([6.0, 7.5, 5.0, 12.0])  # per scan over the whole box
    sidx = np.repeat(np.arange(4), GATED_SITE_SCANS)
    site = np.array([f"mast{j}" for j in sidx])
    spec, n_out, window_scans = lane_gate_recording(
        tmp, rng, rates[sidx], np.array([1.0, 0.0, 0.5, 1.0])[sidx], radius=GATE_R, name="gated-sites",
        scans_columns={"site": site}, model={"kind": "sites"},
        sampler={"chains": 2, "warmup": 400, "draws": 1000, "seed": 6, "progress": False},
        output={"dir": str(tmp / "runs")})
    return quick_fit(spec), n_out, site, window_scans


def test_gated_sites_match_quadrature_with_gated_exposure(gated_sites_fit):
    """With gates each site's exposure is Σ_{k∈s}|W_k|: the fit agrees with the quadrature built
    on the gated exposures, and not with the one that takes K_s whole windows."""
    res, n_out, site, ws = gated_sites_fit
    assert res.diagnostics["divergences"] == 0
    assert int(res.stats.counts.sum()) == int(n_out.sum())  # the same detections dropped (hypot)
    np.testing.assert_allclose(res.stats.scan_window_area / BOX, ws, rtol=0, atol=1e-9)
    q = _quadrature(n_out, site, ws)
    means, mcse = _assert_matches_quadrature(res, q)
    naive = _quadrature(n_out, site)  # K_s whole windows: biased down where gated
    g = q["labels"].index("mast0")
    assert means[g] - naive["site_rate"][g] > 20 * mcse[g], (means[g], naive["site_rate"][g], mcse[g])
    s = res.model.summary(res)
    assert s["sites"]["mast0"]["window_scans"] == pytest.approx(q["K"][g], rel=1e-9)
    assert s["sites"]["mast0"]["raw_rate"] == pytest.approx(q["N"][g] / q["K"][g], rel=1e-9)


def test_gated_sites_predictive_mean_per_scan(gated_sites_fit, tmp_path):
    """Read back from the run, scan k's expected count is ρ_site(k)·|W_k| (predictive.py)."""
    from sceneprior.predictive import load_draws
    from sceneprior.results import load_run, write_run

    res, n_out, site, ws = gated_sites_fit
    rd = load_draws(load_run(write_run(res, tmp_path)), max_draws=200)
    sr = res.idata.posterior["site_rate"]
    rates = np.asarray(sr).reshape(-1, sr.shape[-1])[rd.draw_index]  # ρ_s|W| per draw
    labels = [str(v) for v in sr.coords["site"].values]
    expect = rates[:, [labels.index(s) for s in site]] * ws[None, :]
    np.testing.assert_allclose(rd.mu(), expect, rtol=1e-6)


def test_sites_model_needs_a_site_column(tmp_path, capsys):
    from sceneprior.cli import main

    spec = box_recording(tmp_path, [2, 3, 1], scans_columns={"mast": ["a", "b", "a"]}, model={"kind": "sites"})
    assert main(["fit", str(spec)]) == 2
    err = [line for line in capsys.readouterr().err.splitlines() if "error" in line]
    assert len(err) == 1 and "'site' column" in err[0]
    spec = box_recording(tmp_path, [2, 3, 1], scans_columns={"mast": ["a", "b", "a"]},
                         model={"kind": "sites", "site_column": "mast", "overdispersion": True})
    assert main(["fit", str(spec)]) == 2
    assert "does not apply" in capsys.readouterr().err
