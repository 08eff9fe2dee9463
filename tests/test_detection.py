"""Detection probability from a track log (models/detection.py, sceneprior.detprob,
`sceneprior detection`, export --detection, evaluator.detection_probability).

Outside references, named at each check:
* statsmodels' Logit (Newton–Raphson maximum likelihood of the logistic regression): the
  flat-prior posterior must centre on its MLE, with posterior sd ≈ its standard errors
  (Bernstein–von Mises; e.g. Gelman et al., BDA3 §4.2): both differ by O(n^-1/2) posterior
  sd, so with n = 1500 object-scans we allow 0.1 sd (plus 4 Monte Carlo standard errors
  from arviz) for the mean and 10 % for the sd;
* scipy.stats.bernoulli for the likelihood with clutter in the gate;
* replicated coverage: 20 simulated logs; at each of 5 evenly spaced ranges the number of
  logs whose 90 % band covers the true P_D is Binomial(20, 0.9) when calibrated, checked in
  the two-sided band of level 1 − 0.01/5 (Bonferroni over the 5 ranges, because the ranges
  of one log share its coefficients and are strongly correlated; DESIGN.md §7);
* the JSON Schema with the jsonschema library.
The simulated logs are inputs; the truth they are checked against is the logistic law we
simulate from, and the references above are outside the project.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.stats as st

from conftest import write_csv, write_spec
from sceneprior.cli import main

R_REP, N_ROWS = 20, 1500
TRUE_A, TRUE_B_PER_KM = 2.0, -0.6  # logit P_D(r) = a + b·r/km: 0.87 at 200 m, 0.17 at 6000 m


def true_pd(r):
    return 1.0 / (1.0 + np.exp(-(TRUE_A + TRUE_B_PER_KM * np.asarray(r) / 1000.0)))


def lowmarsh_region():
    from sceneprior.geometry import Region, SectorMask

    return Region(frame="polar", bounds0=(200.0, 6000.0), bounds1=(-70.0, 70.0),
                  masks=(SectorMask(range=(200.0, 6000.0), bearing=(42.0, 70.0), name="land"),))


def run_mcmc(model, seed, **data):
    from numpyro.infer import MCMC, NUTS, init_to_value
    import jax

    beta0 = np.zeros(data["X"].shape[:-2] + (2,))
    mcmc = MCMC(NUTS(model, init_strategy=init_to_value(values={"beta": beta0})), num_warmup=500,
                num_samples=1000, num_chains=2, chain_method="vectorized", progress_bar=False)
    mcmc.run(jax.random.PRNGKey(seed), **data)
    return mcmc


@pytest.fixture(scope="module")
def replicated():
    """20 logs of 1500 object-scans at ranges uniform by area over the Lowmarsh window, fitted
    at once: one compiled model, the replications under one numpyro.plate (their posteriors
    are independent blocks of one joint posterior)."""
    import numpyro

    from sceneprior.models.detection import design, detection_model, range_standardisation

    reg = lowmarsh_region()
    m, s = range_standardisation(reg, reg.grid((29, 28)))
    rng = np.random.default_rng(41)
    r = np.sqrt(rng.uniform(200.0**2, 6000.0**2, (R_REP, N_ROWS)))  # uniform by area in range
    y = (rng.uniform(size=r.shape) < true_pd(r)).astype(float)
    X = design(r, m, s)

    def batched(X, detected):
        with numpyro.plate("replication", X.shape[0]):
            detection_model(X, detected)

    mcmc = run_mcmc(batched, 7, X=X, detected=y)
    return {"beta": np.asarray(mcmc.get_samples(group_by_chain=True)["beta"]), "m": m, "s": s, "X": X, "y": y}


def test_pd_bands_cover_the_truth_over_20_logs(replicated):
    import arviz as az

    from sceneprior.models.detection import pd_draws

    beta = replicated["beta"]  # (chain, draw, R, 2)
    assert float(np.max(az.rhat(az.convert_to_dataset({"beta": beta}))["beta"])) < 1.01
    ranges = np.linspace(500.0, 5500.0, 5)
    truth = true_pd(ranges)
    flat = beta.reshape(-1, R_REP, 2)
    covered = np.zeros(ranges.size, int)
    for i in range(R_REP):
        p = pd_draws(flat[:, i], ranges, replicated["m"], replicated["s"])
        lo, hi = np.quantile(p, [0.05, 0.95], axis=0)
        covered += (lo <= truth) & (truth <= hi)
    band = st.binom(R_REP, 0.9).interval(1 - 0.01 / ranges.size)
    assert np.all((covered >= band[0]) & (covered <= band[1])), (covered, band)


def test_flat_prior_posterior_centres_on_statsmodels_logit(replicated):
    import arviz as az
    import statsmodels.api as sm

    from sceneprior.models.detection import detection_model

    X, y = replicated["X"][0], replicated["y"][0]
    mle = sm.Logit(y, X).fit(disp=0)
    mcmc = run_mcmc(detection_model, 3, X=X, detected=y, flat=True)
    beta = np.asarray(mcmc.get_samples(group_by_chain=True)["beta"])
    ds = az.convert_to_dataset({"beta": beta})
    mcse = np.asarray(az.mcse(ds)["beta"])
    mean, sd = beta.reshape(-1, 2).mean(0), beta.reshape(-1, 2).std(0, ddof=1)
    assert np.all(np.abs(mean - mle.params) < 4 * mcse + 0.1 * sd), (mean, mle.params, sd)
    assert np.all(np.abs(sd / mle.bse - 1.0) < 0.1), (sd, mle.bse)


def test_likelihood_with_clutter_in_the_gate_matches_scipy():
    """numpyro effect handlers (no MCMC): log p(y) with expected clutter μ in the gate is the
    Bernoulli log-pmf with P(y = 1) = 1 − (1 − P_D)·exp(−μ) (scipy.stats.bernoulli)."""
    from numpyro import handlers

    from sceneprior.models.detection import detection_model

    rng = np.random.default_rng(2)
    n = 50
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    y = rng.integers(0, 2, n).astype(float)
    mu = rng.uniform(0, 0.5, n)
    beta = np.array([0.3, -0.8])
    tr = handlers.trace(handlers.condition(handlers.seed(detection_model, 0), {"beta": beta})).get_trace(
        X, y, clutter_in_gate=mu)
    got = float(tr["detected"]["fn"].log_prob(tr["detected"]["value"]))
    pd = 1 / (1 + np.exp(-(X @ beta)))
    ref = st.bernoulli(1 - (1 - pd) * np.exp(-mu)).logpmf(y).sum()
    assert got == pytest.approx(ref, rel=1e-10)


# ----------------------------------------------------------------------- the command and export
def simulate_recording(tmp, rng, n_scans=500, n_obj=3, name="rec", bearing=(-70.0, 70.0)):
    """Polar recording: every scan n_obj known objects at random positions (ids 0..n_obj−1),
    each detected with the true P_D(range) (a detection at its position + 15 m noise),
    Poisson(2) uniform clutter; disc gates of 60 m; a land sector 42–70° masked."""
    from sceneprior.geometry import cartesian_to_polar, polar_to_cartesian

    K = n_scans
    scan = np.repeat(np.arange(K), n_obj)
    oid = np.tile(np.arange(n_obj), K)
    r = np.sqrt(rng.uniform(150.0**2, 6100.0**2, scan.size))
    b = rng.uniform(-75.0, 75.0, scan.size)
    det = rng.uniform(size=scan.size) < true_pd(r)
    x, y = polar_to_cartesian(r[det], b[det])
    dr, db = cartesian_to_polar(x + rng.normal(0, 15.0, x.size), y + rng.normal(0, 15.0, x.size))
    nc = rng.poisson(2.0, K)
    cr = np.sqrt(rng.uniform(200.0**2, 6000.0**2, nc.sum()))
    cb = rng.uniform(bearing[0], bearing[1], nc.sum())
    dscan = np.concatenate([scan[det], np.repeat(np.arange(K), nc)])
    write_csv(tmp / "det.csv", ["scan", "range", "bearing"],
              zip(dscan, np.round(np.concatenate([dr, cr]), 3), np.round(np.concatenate([db, cb]), 4)))
    write_csv(tmp / "scans.csv", ["scan", "time"], zip(range(K), np.arange(K) * 2.4))
    write_csv(tmp / "objects.csv", ["scan", "object", "range", "bearing"], zip(scan, oid, np.round(r, 3), np.round(b, 4)))
    space = {"frame": "polar", "range": [200.0, 6000.0], "bearing": list(bearing), "cells": [12, 14],
             "masks": [{"name": "land", "bearing": [42.0, bearing[1]]}]}
    base = {"name": name, "space": space, "model": {"kind": "uniform"}, "output": {"dir": str(tmp / "runs")},
            "sampler": {"method": "exact", "chains": 4, "draws": 1000, "seed": 1, "progress": False}}
    data = {"detections": "det.csv", "scans": "scans.csv", "outside": "drop"}
    write_spec(tmp / "recording.toml", {**base, "data": {**data, "objects": "objects.csv", "gates": {"radius": 60.0}}})
    write_spec(tmp / "clutter.toml", {**base, "name": f"{name}-clutter", "data": data})
    write_spec(tmp / "detection.toml", {"name": f"{name}-pd", "recording": "recording.toml",
                                        "model": {"kind": "logit_range", "range_bins": 12},
                                        "sampler": {"chains": 2, "warmup": 400, "draws": 1000, "seed": 5,
                                                    "progress": False},
                                        "output": {"dir": "runs"}})
    inside = (r >= 200) & (r <= 6000) & (b >= bearing[0]) & (b < 42.0)
    return {"r": r, "b": b, "scan": scan, "det": det, "inside": inside, "dscan": dscan,
            "dr": np.concatenate([dr, cr]), "db": np.concatenate([db, cb])}


@pytest.fixture(scope="module")
def pd_runs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("pd")
    truth = simulate_recording(tmp, np.random.default_rng(11))
    assert main(["detection", str(tmp / "detection.toml"), "--quiet"]) == 0
    assert main(["fit", str(tmp / "clutter.toml"), "--quiet"]) == 0
    return tmp, truth


def test_detection_command_writes_the_run(pd_runs, capsys):
    import statsmodels.api as sm
    import xarray as xr

    tmp, truth = pd_runs
    run = tmp / "runs" / "rec-pd"
    s = json.loads((run / "summary.json").read_text())
    assert s["schema"] == "sceneprior.detection/1" and s["gate"]["converged"] and s["caution"]
    # outcomes: every object-scan inside the window, detected when its scan has a detection
    # within 60 m (a direct distance test over all detections of the scan, clutter included)
    from sceneprior.geometry import polar_to_cartesian

    ox, oy = polar_to_cartesian(truth["r"], truth["b"])
    dx, dy = polar_to_cartesian(truth["dr"], truth["db"])
    keep_det = (truth["dr"] >= 200) & (truth["dr"] <= 6000) & (truth["db"] >= -70) & (truth["db"] <= 70) \
        & ~((truth["db"] > 42) & (truth["db"] < 70))
    hit = np.zeros(truth["r"].size, bool)
    for k in np.unique(truth["scan"]):
        i = np.flatnonzero(truth["scan"] == k)
        j = np.flatnonzero((truth["dscan"] == k) & keep_det)
        if j.size:
            hit[i] = (np.hypot(ox[i, None] - dx[None, j], oy[i, None] - dy[None, j]) <= 60.0).any(axis=1)
    ins = truth["inside"]
    assert s["data"]["object_scans_used"] == int(ins.sum())
    assert s["data"]["detected"] == int(hit[ins].sum())
    # a single replicate against statsmodels' Logit on the same outcomes: |z| < 3.5
    mle = sm.Logit(hit[ins].astype(float), np.column_stack([np.ones(ins.sum()), truth["r"][ins] / 1000.0])).fit(disp=0)
    c = s["coefficients"]
    assert abs(c["slope_per_km"]["mean"] - mle.params[1]) < 3.5 * c["slope_per_km"]["sd"]
    assert abs(c["intercept_at_0_m"]["mean"] - mle.params[0]) < 3.5 * c["intercept_at_0_m"]["sd"]
    ds = xr.open_dataset(run / "detection.nc", engine="h5netcdf")
    assert ds["pd_bin_mean"].attrs["units"] == "1" and ds["range_bin"].attrs["units"] == "m"
    assert int(ds["bin_object_scans"].sum()) == int(ins.sum())
    land = ds["bearing_edges"].values[:-1] >= 42.0  # cells wholly in the land sector (cut cells keep values)
    assert np.isnan(ds["pd_cell_mean"].values[:, land]).all() and np.isfinite(ds["pd_cell_mean"].values[:, ~land]).all()
    assert np.all(ds["pd_curve_q05"].values <= ds["pd_curve_mean"].values)
    assert np.all(ds["pd_curve_mean"].values <= ds["pd_curve_q95"].values)
    ds.close()


def test_export_with_detection_and_evaluator(pd_runs):
    import jsonschema

    from conftest import REPO
    from sceneprior.evaluator import load_config

    tmp, _ = pd_runs
    clutter, pd_run = tmp / "runs" / "rec-clutter", tmp / "runs" / "rec-pd"
    assert main(["export", str(clutter), "--detection", str(pd_run)]) == 0
    doc = json.loads((clutter / "tracker.json").read_text())
    schema = json.loads((REPO / "src" / "sceneprior" / "schemas" / "tracker-1.schema.json").read_text())
    jsonschema.Draft202012Validator(schema).validate(doc)
    sec = doc["detection_probability"]
    assert sec["convergence"]["passed"] and sec["provenance"]["run"] == "rec-pd"
    cfg = load_config(clutter / "tracker.json")
    curve = sec["curve"]
    r = np.array([300.0, 1234.5, 4000.0, 5999.0])
    pts = np.column_stack([r, np.full(r.size, -10.0)])
    np.testing.assert_allclose(cfg.detection_probability(pts, frame="polar"),
                               np.interp(r, curve["range_m"], curve["mean"]), rtol=1e-12)
    xy = np.column_stack([r * np.sin(np.radians(-10.0)), r * np.cos(np.radians(-10.0))])
    np.testing.assert_allclose(cfg.detection_probability(xy), cfg.detection_probability(pts, frame="polar"),
                               rtol=1e-12)
    assert np.all(cfg.detection_probability(pts, frame="polar", estimate="q95")
                  >= cfg.detection_probability(pts, frame="polar", estimate="q05"))
    # zero outside the field of view and in the land sector
    out = cfg.detection_probability(np.array([[100.0, 0.0], [7000.0, 0.0], [3000.0, 50.0], [3000.0, -80.0]]),
                                    frame="polar")
    assert (out == 0).all()
    with pytest.raises(ValueError, match="estimate must be"):
        cfg.detection_probability(pts, frame="polar", estimate="q99")
    with pytest.raises(ValueError, match=r"shape \(\.\.\., 2\)"):
        cfg.detection_probability(np.zeros((2, 3)))
    # the plain export of the same run has no such section, and the evaluator says so
    assert main(["export", str(clutter)]) == 0
    plain = load_config(clutter / "tracker.json")
    with pytest.raises(ValueError, match="no detection_probability"):
        plain.detection_probability(pts)


def test_export_refuses_a_detection_run_of_another_region(pd_runs, tmp_path, capsys):
    tmp, _ = pd_runs
    simulate_recording(tmp_path, np.random.default_rng(3), n_scans=40, name="narrow", bearing=(-60.0, 60.0))
    assert main(["fit", str(tmp_path / "clutter.toml"), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["export", str(tmp_path / "runs" / "narrow-clutter"), "--detection", str(tmp / "runs" / "rec-pd")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "region" in err[0] and "differs from the clutter run's" in err[0]
    assert main(["export", str(tmp_path / "runs" / "narrow-clutter"), "--detection", str(tmp_path)]) == 2
    assert "incomplete detection run, missing posterior.nc, detection.nc, summary.json" in capsys.readouterr().err


def test_export_names_a_run_of_the_wrong_kind_and_its_flag(pd_runs, capsys):
    """A run passed where export takes another kind is refused in one line (exit 2) naming its
    kind (its summary schema) and the argument that takes it, before any file check."""
    tmp, _ = pd_runs
    clutter, pd_run = str(tmp / "runs" / "rec-clutter"), str(tmp / "runs" / "rec-pd")
    for cmd, words in ((["export", clutter, "--birth", pd_run], ("detection run", "given as --birth",
                                                                  "takes it with --detection")),
                       (["export", pd_run], ("detection run", "given as RUN", "takes it with --detection")),
                       (["export", clutter, "--detection", clutter],
                        ("fit run", "given as --detection", "as RUN (a clutter run) or with --birth"))):
        assert main(cmd) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and all(w in err[0] for w in words) and "missing" not in err[0], (cmd, err)


def test_detection_run_write_is_atomic(tmp_path, monkeypatch):
    """Rewriting a detection run that crashes at the final rename leaves the old run in place
    (DESIGN.md §5: a crash never loses or half-writes a run) and no temporary folders."""
    import os

    from sceneprior.detprob import DetectionRun, fit_detection, load_detection_spec, write_detection_run

    simulate_recording(tmp_path, np.random.default_rng(6), n_scans=40, name="atomic")
    spec = load_detection_spec(write_spec(tmp_path / "a.toml", {
        "name": "atomic-pd", "recording": "recording.toml", "output": {"dir": "runs"},
        "sampler": {"chains": 1, "warmup": 20, "draws": 20, "seed": 2, "progress": False}}))
    res = fit_detection(spec, progress=False, log=lambda m: None)
    path = write_detection_run(res)
    before = (path / "summary.json").read_text()
    real = os.replace

    def crash_at_the_rename(src, dst):
        if Path(src).name.startswith(".atomic-pd.partial-"):
            raise OSError("simulated crash between writing the new run and renaming it into place")
        return real(src, dst)

    monkeypatch.setattr(os, "replace", crash_at_the_rename)
    with pytest.raises(OSError, match="simulated crash"):
        write_detection_run(res)
    monkeypatch.undo()
    assert (path / "summary.json").read_text() == before
    assert DetectionRun(path).name == "atomic-pd"
    assert sorted(p.name for p in path.parent.iterdir()) == ["atomic-pd"]


def test_detection_spec_errors(tmp_path, capsys):
    simulate_recording(tmp_path, np.random.default_rng(4), n_scans=10)
    cases = [({"model": {"kind": "field"}}, "unknown detection model kind"),
             ({"model": {"prior": {"slope_sd": 1.0}}}, "unknown prior parameter"),
             ({"model": {"prior": {"coef_sd": math.inf}}}, "a flat prior applies to both"),
             ({"sampler": {"method": "exact"}}, "sampled with NUTS"),
             ({"recording": "clutter.toml"}, "has no objects table"),
             ({"bins": 3}, "unknown key 'bins'")]
    for extra, message in cases:
        write_spec(tmp_path / "bad.toml", {"name": "bad", "recording": "recording.toml", **extra})
        assert main(["detection", str(tmp_path / "bad.toml")]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and message in err[0], (extra, err)


def test_unconverged_detection_run_exit_3_and_export_refuses(pd_runs, tmp_path, capsys):
    """2 chains × 30 draws: bulk ESS < 400 (sceneprior.gate), so `detection` keeps the run but
    exits 3, and export refuses it (exit 3) unless --override-gate, which the section records."""
    import jsonschema

    from conftest import REPO

    tmp, _ = pd_runs
    simulate_recording(tmp_path, np.random.default_rng(8), n_scans=60, name="short")
    write_spec(tmp_path / "short.toml", {"name": "short-pd", "recording": "recording.toml",
                                         "sampler": {"chains": 2, "warmup": 30, "draws": 30, "seed": 1,
                                                     "progress": False}, "output": {"dir": "runs"}})
    assert main(["detection", str(tmp_path / "short.toml"), "--quiet"]) == 3
    assert "unconverged" in capsys.readouterr().err
    run = tmp_path / "runs" / "short-pd"
    assert not json.loads((run / "summary.json").read_text())["gate"]["converged"]
    clutter = tmp / "runs" / "rec-clutter"
    assert main(["export", str(clutter), "--detection", str(run)]) == 3
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "detection run short-pd" in err[0] and "ess_bulk" in err[0]
    assert main(["export", str(clutter), "--detection", str(run), "--override-gate"]) == 0
    doc = json.loads((clutter / "tracker.json").read_text())
    schema = json.loads((REPO / "src" / "sceneprior" / "schemas" / "tracker-1.schema.json").read_text())
    jsonschema.Draft202012Validator(schema).validate(doc)
    assert doc["detection_probability"]["convergence"] == {**doc["detection_probability"]["convergence"],
                                                           "passed": False, "overridden": True}
