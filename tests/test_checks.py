"""Model criticism (checks.py) and model comparison by PSIS-LOO (loo.py).

References named at each test:
* conjugate Gamma–Poisson posterior and its negative-binomial predictive (Gelman et al.,
  BDA3 §2.6; scipy.stats.nbinom): exact leave-one-scan-out, exact zone predictive moments,
  exact LOO-PIT, exact prior predictive and exact prior-sensitivity shifts;
* posterior predictive p-values are conservative (Meng 1994, Ann. Statist. 22; Bayarri &
  Berger 2000, JASA 95): false alarms at level 0.01 are bounded by about 1 %, so "≤ 2 of 40"
  is the two-sided 99 % binomial band's upper end (P(Bin(40, 0.01) ≥ 3) = 0.0075);
* permutation distributions: exact enumeration of all within-block permutations;
* the change of variables dA = r dr dθ (polar Jacobian) and 1 rad = 180/π degrees.
"""

from __future__ import annotations

import itertools
import json
import math
import shutil
from types import SimpleNamespace

import numpy as np
import pytest
import scipy.integrate as si
import scipy.sparse as sp
import scipy.stats as st
from scipy.special import gammaln

from conftest import box_recording, quick_fit
from sceneprior.errors import InputError

BOX = 1000.0 * 500.0


# ----------------------------------------------------------------------------- dispersion
def test_dispersion_check_false_alarms_and_power():
    """40 Poisson data sets (500 scans, mean 30): at most 2 flagged at p < 0.01. 40 gamma-
    mixed sets (φ = 0.3, same mean): at least 38 flagged. Power we computed: under the
    alternative the dispersion index is 1 + φμ ≈ 10 with sd ≈ 0.8 (20 000 simulated
    replications, minimum 7.3), while the Poisson posterior predictive puts it at
    1 ± √(2/(K−1)) = 1 ± 0.063, two-sided 1 % point ≈ 1.16: the miss probability per data
    set is below 1e-20 (normal approximation 6e-31), so P(≥ 38 of 40) ≈ 1."""
    from sceneprior.checks import dispersion_check
    from sceneprior.predictive import simulate_counts

    rng = np.random.default_rng(606)
    K, mu, S = 500, 30.0, 1000
    a0, b0 = 1.0, 0.1  # default prior on the rate per scan, Gamma(shape, rate in scans)

    def flagged(n):
        # exact conjugate posterior of the rate per scan: Gamma(a0 + N, b0 + K) (BDA3 §2.6)
        rate = rng.gamma(a0 + n.sum(), 1.0 / (b0 + K), size=S)
        rep = simulate_counts(rng, np.broadcast_to(rate[:, None], (S, K)), None)
        return dispersion_check(n, rep)["flagged"]

    false_alarms = sum(flagged(rng.poisson(mu, K)) for _ in range(40))
    hits = sum(flagged(rng.poisson(mu * rng.gamma(1 / 0.3, 0.3, K))) for _ in range(40))
    assert false_alarms <= 2, false_alarms
    assert hits >= 38, hits


# ----------------------------------------------------------------------------- conjugate run
@pytest.fixture(scope="module")
def uniform_run(tmp_path_factory):
    """Exact uniform fit (4 × 1000 draws) on 200 Poisson scans (mean 12) in the box."""
    from sceneprior.results import write_run

    tmp = tmp_path_factory.mktemp("loo")
    rng = np.random.default_rng(17)
    K = 200
    n = rng.poisson(12.0, K)
    spec = box_recording(tmp, n, scans_columns={"time": 2.0 * np.arange(K)}, rng=rng, name="flat",
                         sampler={"method": "exact", "chains": 4, "draws": 1000, "seed": 3, "progress": False},
                         output={"dir": str(tmp / "runs")})
    return write_run(quick_fit(spec)), n


def _exact_loo_terms(n, a=1.0, b_scans=0.1):
    """Leave-one-scan-out predictive set log-density of each scan under the conjugate model:
    ρ | Z_{−k} ~ Gamma(a + N − n_k, (b + K − 1)|W|), p(Z_k | Z_{−k}) = NB count pmf × n_k! ×
    |W|^{−n_k} (positions uniform), NB(a', p' = b'/(b' + |W|)) — scipy.stats.nbinom."""
    K, N = n.size, n.sum()
    a_k = a + N - n
    b_k = (b_scans + K - 1) * BOX
    return st.nbinom(a_k, b_k / (b_k + BOX)).logpmf(n) + gammaln(n + 1) - n * math.log(BOX), a_k, b_k


def test_psis_loo_matches_exact_leave_one_scan_out(uniform_run):
    from sceneprior.loo import pointwise_loglik, psis_loo
    from sceneprior.results import load_run

    path, n = uniform_run
    run = load_run(path)
    loo = psis_loo(pointwise_loglik(run), run)
    exact, _, _ = _exact_loo_terms(n)
    assert abs(loo["elpd"] - exact.sum()) < 0.5, (loo["elpd"], exact.sum())
    assert loo["n_bad_k"] == 0 and loo["n"] == n.size
    np.testing.assert_allclose(loo["pointwise"], exact, atol=0.05)


def test_loo_pit_matches_exact_predictive_cdf(uniform_run):
    from sceneprior.checks import loo_pit
    from sceneprior.loo import pointwise_loglik, psis_log_weights
    from sceneprior.predictive import load_draws
    from sceneprior.results import load_run

    path, n = uniform_run
    run = load_run(path)
    rd = load_draws(run, max_draws=None)
    _, _, phi, base = rd.at_cell_draws()
    lw, _ = psis_log_weights(pointwise_loglik(run, rd))
    got = loo_pit(n, np.broadcast_to(base[:, None], (base.size, n.size)), phi, lw, np.random.default_rng(9))
    _, a_k, b_k = _exact_loo_terms(n)
    ref = st.nbinom(a_k, b_k / (b_k + BOX))
    v = np.random.default_rng(9).uniform(size=n.size)  # the same randomisation
    u = ref.cdf(n - 1) + v * (ref.cdf(n) - ref.cdf(n - 1))
    np.testing.assert_allclose(got["values"], u, atol=0.01)
    assert not got["flagged"]


def test_zone_residual_moments_match_conjugate_predictive(uniform_run):
    """Zone counts of a uniform model: N_z | data ~ NB(a', b'/(b' + E_z)), E_z = K |z ∩ W|."""
    from sceneprior.checks import zone_residuals
    from sceneprior.predictive import load_draws
    from sceneprior.results import load_run

    path, n = uniform_run
    run = load_run(path)
    rd = load_draws(run, max_draws=None)
    log_lam, lm, phi, _ = rd.at_cell_draws()
    res = zone_residuals(rd, log_lam, lm, phi, n_zones=2)
    a_post, b_post = 1.0 + n.sum(), (0.1 + n.size) * BOX
    S = log_lam.shape[0]
    for row in res["table"]:
        E_z = n.size * row["window_area_m2"]
        ref = st.nbinom(a_post, b_post / (b_post + E_z))
        # Monte Carlo error of the draw-based predictive mean: sd(ρ)·E_z/√S
        assert row["expected"] == pytest.approx(ref.mean(), abs=4 * math.sqrt(a_post) / b_post * E_z / math.sqrt(S))
        r_exact = (row["observed"] - ref.mean()) / ref.std()
        assert row["residual"] == pytest.approx(r_exact, abs=0.05)
    assert not res["flagged"]


def test_prior_predictive_and_sensitivity_against_conjugate_formulas(tmp_path):
    """Informative prior Gamma(50, 5 scans) with 20 scans at rate 6: the prior matters, so
    ÷10 of its scale (rate parameter 50 scans) moves the posterior and ×10 does too; the
    reported shifts equal the conjugate ones within Monte Carlo error (4000 draws per fit:
    sd of a difference of means √(2/4000) ≈ 0.022 sd)."""
    from sceneprior.checks import check_run

    rng = np.random.default_rng(23)
    K = 20
    n = rng.poisson(6.0, K)
    spec = box_recording(tmp_path, n, rng=rng, name="informative",
                         model={"kind": "uniform", "prior": {"shape": 50.0, "rate": 5.0}},
                         sampler={"method": "exact", "chains": 4, "draws": 1000, "seed": 8, "progress": False},
                         output={"dir": str(tmp_path / "runs")})
    from sceneprior.results import write_run

    rep = check_run(write_run(quick_fit(spec)), seed=1)
    N = n.sum()
    post = lambda b: st.gamma(50.0 + N, scale=1.0 / (b + K))  # noqa: E731  rate per scan
    ref = post(5.0)
    sens = rep["prior_sensitivity"]
    assert sens["scale_keys"] == {"rate": "inverse scale"}
    for r in sens["refits"]:
        new = post(5.0 / r["factor"])
        want = (new.mean() - ref.mean()) / ref.std()
        got = r["quantities"]["rate"]["shift_sd"]
        assert got == pytest.approx(want, abs=4 * math.sqrt(2 / 4000)), (r["factor"], got, want)
        assert ("rate" in r["moved"]) == (abs(want) > 0.25 or not 0.8 <= new.std() / ref.std() <= 1.25)
    # prior predictive quantile of the observed mean count: ∫ P(Poisson(K·λ) < N) Gamma(λ; 50, 5) dλ
    pp = rep["prior_predictive"]
    pois = lambda lam: st.poisson(K * lam).cdf(N - 1) + 0.5 * st.poisson(K * lam).pmf(N)  # noqa: E731
    q, _ = si.quad(lambda lam: pois(lam) * st.gamma(50.0, scale=1 / 5.0).pdf(lam), 0, 40, limit=200)
    assert pp["observed_quantile"] == pytest.approx(q, abs=4 * math.sqrt(q * (1 - q) / pp["draws"]))


# ----------------------------------------------------------------------------- drift, persistence
def test_drift_flags_a_step_in_the_rate(tmp_path):
    rng = np.random.default_rng(41)
    K = 300
    n = rng.poisson(np.where(np.arange(K) < K // 2, 8.0, 12.0))
    spec = box_recording(tmp_path, n, scans_columns={"time": 2.4 * np.arange(K)}, rng=rng,
                         sampler={"method": "exact", "chains": 2, "draws": 500, "seed": 1, "progress": False})
    from sceneprior.checks import drift_check
    from sceneprior.predictive import load_draws
    from sceneprior.results import load_run, write_run

    rd = load_draws(load_run(write_run(quick_fit(spec), tmp_path / "runs")))
    d = drift_check(rd, np.random.default_rng(0))
    assert d["flagged"] and d["p_value"] < 0.01
    ratios = np.array(d["observed_over_expected"])
    assert ratios[: d["blocks"] // 2].mean() < 1 < ratios[d["blocks"] // 2:].mean()


def _rd(A, shape):
    return SimpleNamespace(scan_cell=sp.csr_matrix(A), order=np.arange(A.shape[0]), shape=shape)


def test_persistence_expectation_equals_exact_enumeration():
    """The closed-form expectation under within-block permutations equals the average over
    all 4!·4! within-block permutations of an 8-scan, 3-cell example."""
    from sceneprior.checks import persistence_check

    A = np.array([[1, 0, 2], [0, 1, 0], [3, 0, 1], [1, 1, 0], [0, 0, 1], [2, 1, 0], [0, 2, 1], [1, 0, 0]])
    res = persistence_check(_rd(A, (1, 3)), np.random.default_rng(0), block_len=4, n_perm=400)
    vals = []
    for p1 in itertools.permutations(range(4)):
        for p2 in itertools.permutations(range(4, 8)):
            B = A[list(p1) + list(p2)]
            vals.append((B[:-1] * B[1:]).sum())
    exact = np.mean(vals)
    assert res["expected_closed_form"] == pytest.approx(exact, rel=1e-12)
    assert res["permutation_mean"] == pytest.approx(exact, abs=4 * np.std(vals) / math.sqrt(400))


def test_persistence_flags_a_fixed_return():
    """A return present in runs of 10 consecutive scans in one cell, over Poisson background."""
    from sceneprior.checks import persistence_check

    rng = np.random.default_rng(5)
    K, C = 300, 50
    A = rng.poisson(0.1, (K, C))
    on = (np.arange(K) // 10) % 3 == 0
    A[on, 17] += 1
    res = persistence_check(_rd(A, (10, 5)), np.random.default_rng(1))
    assert res["flagged"] and res["top_cells"][0]["cell"] == 17
    quiet = persistence_check(_rd(rng.poisson(0.1, (K, C)), (10, 5)), np.random.default_rng(2))
    assert not quiet["flagged"]


# ----------------------------------------------------------------------------- the rain demo
def test_rain_demo_check_flags_plain_and_passes_overdispersed(rain_runs, capsys):
    from sceneprior.checks import check_run
    from sceneprior.cli import main

    plain = check_run(rain_runs["plain"], prior_side=False, sensitivity=False)
    assert plain["dispersion"]["flagged"] and plain["dispersion"]["direction"] == "over-dispersed"
    assert plain["loo_pit"]["flagged"] and plain["drift"]["flagged"]
    assert main(["check", str(rain_runs["od"]), "--no-sensitivity"]) == 0
    out = capsys.readouterr().out
    assert "dispersion index" in out and "LOO-PIT" in out
    od = json.loads((rain_runs["od"] / "check.json").read_text())
    for name in ("dispersion", "loo_pit", "drift", "persistence", "prior_predictive"):
        assert not od[name]["flagged"], (name, od[name])
    # both uniform maps miss the range fall-off of Lowmarsh sea clutter: the zones say so
    assert od["spatial_residuals"]["flagged"] and plain["spatial_residuals"]["flagged"]


def test_rank_prefers_overdispersed_on_rain_data(rain_runs, capsys):
    from sceneprior.cli import main
    from sceneprior.loo import rank_runs

    res = rank_runs([rain_runs["plain"], rain_runs["od"]], blocks="column:weather_episode")
    best, other = res["ranking"]
    assert best["run"] == "lowmarsh-rain" and other["elpd_diff"] < -4 * other["se_diff"]
    assert other["elpd_block_diff"] < 0
    assert main(["rank", str(rain_runs["plain"]), str(rain_runs["od"]), "--blocks", "hour"]) == 0
    out = capsys.readouterr().out
    assert "Δelpd" in out and "lowmarsh-rain-poisson" in out


def test_rank_refuses_other_data_and_other_windows(rain_runs, uniform_run, tmp_path, capsys):
    from sceneprior.cli import main
    from sceneprior.fitting import fit
    from sceneprior.loo import rank_runs
    from sceneprior.results import write_run
    from sceneprior.spec import load_spec
    from conftest import REPO

    with pytest.raises(InputError, match="different data"):
        rank_runs([rain_runs["plain"], uniform_run[0]])
    data = rain_runs["data"]
    other = fit(load_spec(REPO / "models" / "lowmarsh-rain-poisson.toml", overrides={
        "name": "narrower", "space": {"range": [200.0, 5000.0]}, "data": {
            "detections": str(data / "detections.csv"), "scans": str(data / "scans.csv"), "outside": "drop"},
        "output": {"dir": str(tmp_path)}}), progress=False, log=lambda m: None)
    with pytest.raises(InputError, match="different"):
        rank_runs([rain_runs["plain"], write_run(other)])
    assert main(["rank", str(rain_runs["plain"]), str(uniform_run[0])]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "different data" in err[0]


def test_rank_reconciles_degrees_and_the_polar_jacobian(rain_runs, tmp_path):
    """The plain run's map re-expressed per m of range per degree of bearing (λ·r_mid·π/180):
    reconciled, its per-scan densities differ from the per-m² model by exactly
    Σ_i [log r_mid(c_i) − log r_i] (the two are different piecewise-constant models), which
    the test computes from the detections table; without the table it is refused."""
    import pyarrow.csv as pacsv
    import xarray as xr

    from sceneprior.loo import rank_runs

    copy = tmp_path / "per-degree"
    shutil.copytree(rain_runs["plain"], copy)
    cd = xr.load_dataset(copy / "cell_draws.nc", engine="h5netcdf")
    ds = xr.load_dataset(copy / "intensity.nc", engine="h5netcdf")
    e = ds["range_edges"].values
    r_mid = np.repeat(0.5 * (e[:-1] + e[1:]), ds.sizes["bearing"])
    vals = cd["intensity"].values.astype(np.float64) * r_mid * math.pi / 180.0
    cd["intensity"] = (("sample", "cell"), vals.astype(np.float32), {"units": "m-1 degree-1 scan-1"})
    cd.to_netcdf(copy / "cell_draws.nc", engine="h5netcdf")
    res = rank_runs([rain_runs["plain"], copy])
    det = pacsv.read_csv(rain_runs["data"] / "detections.csv").to_pandas()
    sea = det[(det["bearing"] < 42.0) | (det["bearing"] > 70.0)]
    i0 = np.clip(np.searchsorted(e, sea["range"].values, side="right") - 1, 0, e.size - 2)
    want = float(np.sum(np.log(0.5 * (e[i0] + e[i0 + 1])) - np.log(sea["range"].values)))
    rows = {r["path"]: r for r in res["ranking"]}
    d = rows[str(copy)]["elpd_loo"] - rows[str(rain_runs["plain"])]["elpd_loo"]
    assert d == pytest.approx(want, abs=0.02), (d, want)
    assert "per degree" in rows[str(copy)]["measure"]
    moved = tmp_path / "moved"
    shutil.copytree(rain_runs["data"], moved)
    shutil.rmtree(rain_runs["data"])
    try:
        with pytest.raises(InputError, match="cannot reconcile"):
            rank_runs([rain_runs["plain"], copy])
    finally:
        shutil.copytree(moved, rain_runs["data"])


# ----------------------------------------------------------------------------- LGCP vs uniform
def _lgcp_available():
    try:
        import sceneprior.models.lgcp  # noqa: F401
    except ImportError:
        return False
    return True


needs_lgcp = pytest.mark.skipif(not _lgcp_available(), reason="sceneprior.models.lgcp is not importable "
                                "(the LGCP model is not in this tree yet)")


def _lgcp_vs_uniform(tmp_path, intensity, lam_peak, seed):
    from sceneprior.geometry import Region
    from sceneprior.loo import rank_runs
    from sceneprior.results import write_run
    from sceneprior.simulate import sample_thinning
    from conftest import write_csv, write_spec

    rng = np.random.default_rng(seed)
    region = Region("cartesian", (0.0, 2000.0), (0.0, 1600.0))
    K = 150
    lam_max = lam_peak
    scan, x, y = sample_thinning(rng, region, intensity, lam_max, K)
    write_csv(tmp_path / "det.csv", ["scan", "x", "y"], zip(scan, np.round(x, 3), np.round(y, 3)))
    base = {"data": {"detections": "det.csv", "n_scans": K},
            "space": {"frame": "cartesian", "x": [0.0, 2000.0], "y": [0.0, 1600.0], "cells": [10, 8]},
            "output": {"dir": str(tmp_path / "runs")}}
    paths = []
    for name, model, sampler in (
            ("flat", {"kind": "uniform"}, {"method": "exact", "chains": 4, "draws": 1000, "seed": 1}),
            ("field", {"kind": "lgcp"}, {"chains": 2, "warmup": 200, "draws": 300, "seed": 1})):
        spec = write_spec(tmp_path / f"{name}.toml", {"name": name, **base, "model": model,
                                                      "sampler": {**sampler, "progress": False}})
        paths.append(write_run(quick_fit(spec)))
    res = rank_runs(paths)
    return {r["run"]: r for r in res["ranking"]}


@needs_lgcp
def test_lgcp_beats_uniform_on_an_inhomogeneous_field(tmp_path):
    def lam(x, y):  # a hot patch ×20 over a floor (m⁻² scan⁻¹)
        return 2e-6 * (0.05 + np.exp(-0.5 * ((x - 600) ** 2 + (y - 1100) ** 2) / 250.0**2))

    rows = _lgcp_vs_uniform(tmp_path, lam, 2e-6 * 1.05, 3)
    flat = rows["flat"]
    assert rows["field"]["elpd_diff"] == 0.0 and flat["elpd_diff"] < -4 * flat["se_diff"], flat


@needs_lgcp
def test_lgcp_does_not_overfit_uniform_data(tmp_path):
    rows = _lgcp_vs_uniform(tmp_path, lambda x, y: np.full(np.shape(x), 3e-6), 3e-6, 4)
    d = rows["field"]["elpd_loo"] - rows["flat"]["elpd_loo"]
    se = rows["field"]["se_diff"] if rows["field"]["elpd_diff"] else rows["flat"]["se_diff"]
    assert d < 2 * se and d > -4.0, (d, se)
