"""Births from a track log (sceneprior.tracklog, `sceneprior births`).

Outside references, named at each check:
* the birth rate per exposed step: births at exposed steps are Poisson(ρ·K_exposed), so the
  conjugate posterior is Gamma(a + B, b + K_exposed) (Gelman et al., Bayesian Data Analysis
  3rd ed., §2.6), its quantiles from scipy.stats.gamma; replicated coverage of the 90 %
  interval is checked in the two-sided 99 % binomial band (scipy.stats.binom) for the
  number of replications (DESIGN.md §7);
* the detection lag: the number of missed scans before a first detection is geometric,
  scipy.stats.geom(P_D, loc=−1): mean (1 − P_D)/P_D, variance (1 − P_D)/P_D²;
* per-gate detection outcomes against a brute-force distance test (plain geometry).
Simulated logs are our own; the references above are outside the project.
"""

from __future__ import annotations

import json

import numpy as np
import pyarrow.csv as pacsv
import pytest
import scipy.stats as st

from conftest import REPO, write_csv, write_spec
from sceneprior.cli import main
from sceneprior.tracklog import birth_rate_posterior, derive_births, detection_outcomes, settle_scans_for

PERIOD = 2.4  # s


def simulate_log(rng, n_full=400, rho=0.3, n_start=6, mean_life=40.0, gaps=((100, 8), (250, 3))):
    """A truth log: scans 0..n_full−1 every 2.4 s with the scans of ``gaps`` (start, length)
    missing; ``n_start`` objects present at scan 0, then Poisson(ρ) new objects at every
    scan (missing ones too), geometric lifetimes, straight tracks. Returns the scan list,
    times, the rows (object, scan, x, y), each object's birth scan and the recorded mask."""
    recorded = np.ones(n_full, bool)
    for g0, length in gaps:
        recorded[g0:g0 + length] = False
    nb = rng.poisson(rho, n_full)
    nb[0] = 0
    birth = np.concatenate([np.zeros(n_start, int), np.repeat(np.arange(n_full), nb)])
    n = birth.size
    life = rng.geometric(1.0 / mean_life, n)
    p0 = rng.uniform(-1000.0, 1000.0, (n, 2))
    v = rng.normal(0.0, 5.0, (n, 2))
    obj = np.repeat(np.arange(n), life)
    age = np.arange(life.sum()) - np.repeat(np.cumsum(life) - life, life)
    scan = birth[obj] + age
    keep = (scan < n_full) & recorded[np.minimum(scan, n_full - 1)]
    obj, scan, age = obj[keep], scan[keep], age[keep]
    pos = p0[obj] + v[obj] * (age * PERIOD)[:, None]
    ids = np.flatnonzero(recorded)
    return ids, ids * PERIOD, obj, scan, pos, birth, recorded


def exposed_truth(recorded):
    """Exposed steps by construction: recorded scans that are not the first one and do not
    follow a missing scan."""
    prev = np.concatenate([[False], recorded[:-1]])
    return recorded & prev


def test_births_cover_the_rate_and_never_count_censored_objects():
    """20 simulated truth logs (ρ = 0.3 births per step, 6 objects present at the start, two
    data gaps). Exact: the derived births are exactly the objects born at exposed steps,
    and no object present at the start or first seen after a gap is among them. Coverage:
    the 90 % interval of Gamma(1 + B, 0.1 + K_exposed) covers ρ in a number of replications
    inside the two-sided 99 % band of Binomial(20, 0.9)."""
    rng = np.random.default_rng(20260701)
    rho, R = 0.3, 20
    B, K = np.zeros(R), np.zeros(R)
    for i in range(R):
        ids, t, obj, scan, pos, birth, rec = simulate_log(rng, rho=rho)
        b = derive_births(ids, t, np.searchsorted(ids, scan), obj, pos[:, 0], pos[:, 1])
        ex = exposed_truth(rec)
        truth = np.flatnonzero(ex[birth])
        np.testing.assert_array_equal(np.sort(b.object_id), truth)
        at_start = np.flatnonzero(birth == 0)
        after_gap = np.flatnonzero(rec[birth] & ~ex[birth] & (birth > 0))
        seen_after_gap = [o for o in np.unique(obj) if birth[o] > 0 and not ex[birth[o]]]
        assert not np.isin(b.object_id, at_start).any() and not np.isin(b.object_id, seen_after_gap).any()
        np.testing.assert_array_equal(np.sort(b.censored_ids["start"]), at_start)
        assert b.counts["censored_after_gaps"] == len(seen_after_gap) >= after_gap.size
        assert b.n_exposed == int(ex.sum()) and b.counts["data_gaps"] == 2
        # births keep their step (the scan id where they were first listed) and exposed steps only
        assert np.all(ex[b.step]) and np.all(birth[b.object_id] == b.step)
        B[i], K[i] = b.n_births, b.n_exposed
    post = birth_rate_posterior(B, K)
    ref = st.gamma(1.0 + B, scale=1.0 / (0.1 + K))  # BDA3 §2.6
    np.testing.assert_allclose(post["q05"], ref.ppf(0.05), rtol=1e-12)
    np.testing.assert_allclose(post["q95"], ref.ppf(0.95), rtol=1e-12)
    covered = int(((post["q05"] <= rho) & (rho <= post["q95"])).sum())
    lo, hi = st.binom(R, 0.9).interval(0.99)
    assert lo <= covered <= hi, (covered, lo, hi)


def test_reappearance_rule_and_censoring_by_hand():
    """The documented rule on a hand-made log of 40 scans (ids 0..39, 2.4 s apart; scan 26
    comes after a 60 s gap): id 7 present at the start (censored), unseen for 4 > 3 scans,
    back at scan 10 (a reappearance, a birth); id 8 from scan 12, unseen for 2 ≤ 3 scans,
    back at 15 (the same object); id 9 born at 18, unseen 19..25, back at 26 right after
    the gap (censored reappearance); id 5 first at 26 (censored after the gap); id 6 at 30
    (a birth)."""
    ids = np.arange(40)
    t = ids * PERIOD + np.where(ids >= 26, 60.0, 0.0)
    rows = ([(s, 7) for s in range(0, 6)] + [(s, 7) for s in range(10, 14)]
            + [(12, 8), (13, 8), (15, 8), (16, 8)]
            + [(18, 9), (26, 9), (27, 9)] + [(26, 5), (27, 5)] + [(30, 6), (31, 6)])
    s = np.array([r[0] for r in rows])
    o = np.array([r[1] for r in rows])
    x, y = 10.0 * s, 5.0 * o + 0.0 * s
    b = derive_births(ids, t, s, o, x, y)
    c = b.counts
    assert sorted(zip(b.step.tolist(), b.object_id.tolist())) == [(10, 7), (12, 8), (18, 9), (30, 6)]
    assert c["censored_at_start"] == 1 and c["censored_after_gaps"] == 2 and c["data_gaps"] == 1
    assert c["reappearances"] == 2 and c["reappearances_counted_as_births"] == 1
    assert c["reappearances_censored"] == 1 and c["exposed_steps"] == 38
    assert b.step.tolist() == [10, 12, 18, 30]  # births come in time order
    assert b.reappearance.tolist() == [True, False, False, False]
    # velocities by differencing within a segment: 10 m per scan along x = 10 / 2.4 m/s; id 9's
    # segment at 18 has one row (its next row starts a new segment), so no velocity
    np.testing.assert_allclose(b.vx, [10.0 / PERIOD, 10.0 / PERIOD, np.nan, 10.0 / PERIOD])
    np.testing.assert_allclose(b.vy, [0.0, 0.0, np.nan, 0.0])
    # with max_unseen = 5 id 7 continues its segment: no reappearance birth at 10
    b5 = derive_births(ids, t, s, o, x, y, max_unseen=5)
    assert (10, 7) not in zip(b5.step.tolist(), b5.object_id.tolist())


def test_detection_lag_shift_and_correction():
    """Logs built from detections (P_D = 0.6): an object born at scan a is first listed at
    a + L, L ~ scipy.stats.geom(0.6, loc=−1) (mean (1 − P)/P = 2/3, variance (1 − P)/P² =
    10/9). The raw first position is shifted along the track by v·T·E[L]; the corrected one
    is unbiased and its reported sd matches the spread (mean squared z ≈ 1). Tolerances: 4
    Monte Carlo standard errors over 4000 births."""
    p, n, T = 0.6, 4000, PERIOD
    geo = st.geom(p, loc=-1)
    assert geo.mean() == pytest.approx((1 - p) / p) and geo.var() == pytest.approx((1 - p) / p**2)
    rng = np.random.default_rng(5)
    K = 3000
    a = rng.integers(10, K - 40, n)  # birth scans, away from the start and the end
    L = geo.rvs(size=n, random_state=rng)
    v = rng.normal(0.0, 6.0, (n, 2))
    x0 = rng.uniform(-2000, 2000, (n, 2))
    # each object listed at its first detection a + L and at its next detection (geometric gap)
    L2 = 1 + st.geom(p, loc=-1).rvs(size=n, random_state=rng)
    s1, s2 = a + L, a + L + L2
    ids = np.arange(K)
    sd = 2.0  # m, position noise of the log
    p1 = x0 + v * (L * T)[:, None] + rng.normal(0, sd, (n, 2))
    p2 = x0 + v * ((L + L2) * T)[:, None] + rng.normal(0, sd, (n, 2))
    obj = np.concatenate([np.arange(n), np.arange(n)])
    b = derive_births(ids, ids * T, np.concatenate([s1, s2]), obj, np.concatenate([p1[:, 0], p2[:, 0]]),
                      np.concatenate([p1[:, 1], p2[:, 1]]), detection_probability=p, position_sd=sd,
                      max_unseen=10**6, settle_scans=0)
    assert b.n_births == n
    o = np.argsort(b.object_id)
    raw = np.column_stack([b.x_raw[o], b.y_raw[o]]) - x0
    cor = np.column_stack([b.x[o], b.y[o]]) - x0
    # the raw shift along the track, per unit velocity: E[(raw · v)/|v|²] = T·E[L]
    along = np.sum(raw * v, axis=1) / np.sum(v * v, axis=1)
    assert abs(along.mean() - T * geo.mean()) < 4 * along.std(ddof=1) / np.sqrt(n)
    for k in range(2):
        assert abs(cor[:, k].mean()) < 4 * cor[:, k].std(ddof=1) / np.sqrt(n)
    z2 = (cor[:, 0] / b.x_sd[o]) ** 2
    assert abs(z2.mean() - 1.0) < 4 * z2.std(ddof=1) / np.sqrt(n)


@pytest.mark.parametrize("p", [0.3, 0.6, 0.8, 0.95])
def test_settle_scans_from_the_geometric_law(p):
    """h = settle_scans_for(P) is the smallest h with P(L ≤ h) ≥ 0.99 (scipy.stats.geom)."""
    h = settle_scans_for(p)
    geo = st.geom(p, loc=-1)
    assert geo.cdf(h) >= 0.99 - 1e-12 and (h == 0 or geo.cdf(h - 1) < 0.99)


def test_detection_outcomes_against_brute_force():
    """Per-gate 'detected' (tracklog.detection_outcomes through gates.in_gates) equals a
    direct distance test: some detection of the same scan within the disc radius."""
    from sceneprior.gates import disc_gates

    rng = np.random.default_rng(9)
    K, G, N = 50, 200, 600
    gs = rng.integers(0, K, G)
    gx, gy = rng.uniform(0, 1000, G), rng.uniform(0, 1000, G)
    rad = rng.uniform(20, 120, G)
    ds = rng.integers(0, K, N)
    dx, dy = rng.uniform(0, 1000, N), rng.uniform(0, 1000, N)
    got = detection_outcomes(disc_gates(gs, gx, gy, rad, n_scans=K), ds, dx, dy)
    d = np.hypot(gx[:, None] - dx[None], gy[:, None] - dy[None])
    ref = ((d <= rad[:, None]) & (gs[:, None] == ds[None])).any(axis=1)
    np.testing.assert_array_equal(got, ref)
    assert 0 < ref.sum() < G


# ----------------------------------------------------------------------- the command
def polar_log(tmp, n_scans=60, with_gap=True):
    """A small polar recording (range 200–6000 m, bearing −70…70°) with a scans table
    (times, a 30 s gap before scan 40), a few detections and an objects table."""
    t = np.arange(n_scans) * PERIOD + np.where(np.arange(n_scans) >= 40, 30.0 if with_gap else 0.0, 0.0)
    write_csv(tmp / "scans.csv", ["scan", "time"], zip(range(n_scans), t))
    write_csv(tmp / "det.csv", ["scan", "range", "bearing"], [(0, 1000.0, 0.0), (5, 2000.0, 10.0)])
    rows = []
    for s in range(0, 20):  # object 1 present at the start
        rows.append((s, 1, 1000.0 + 10 * s, 0.0))
    for s in range(12, 30):  # object 2 born at scan 12, moving outwards along bearing 30°
        rows.append((s, 2, 2000.0 + 24.0 * (s - 12), 30.0))
    for s in range(40, 45):  # object 3 first seen right after the gap
        rows.append((s, 3, 3000.0, -20.0))
    for s in range(50, 52):  # object 4 born at scan 50
        rows.append((s, 4, 2500.0, -40.0))
    write_csv(tmp / "objects.csv", ["scan", "object", "range", "bearing"], rows)
    spec = {"name": "log", "data": {"detections": "det.csv", "scans": "scans.csv", "objects": "objects.csv",
                                    "gates": {"radius": 150.0}},
            "space": {"frame": "polar", "range": [200.0, 6000.0], "bearing": [-70.0, 70.0], "cells": [10, 7]},
            "model": {"kind": "uniform"}, "output": {"dir": "runs"}}
    return write_spec(tmp / "spec.toml", spec)


def test_births_command_writes_the_birth_model_contract(tmp_path, capsys):
    spec = polar_log(tmp_path)
    out = tmp_path / "births"
    assert main(["births", str(spec), "--out", str(out)]) == 0
    line = capsys.readouterr().out
    assert "2 births over 58 exposed steps (of 60)" in line and "1 at the start, 1 after 1 data gap" in line
    births = pacsv.read_csv(out / "births.csv").to_pydict()
    assert births["step"] == [12, 50] and births["object"] == [2, 4]
    # polar → Cartesian: x = r sin θ, y = r cos θ (bearing clockwise from north)
    np.testing.assert_allclose(births["x"], [2000 * np.sin(np.radians(30)), 2500 * np.sin(np.radians(-40))])
    np.testing.assert_allclose(births["y"], [2000 * np.cos(np.radians(30)), 2500 * np.cos(np.radians(-40))])
    # velocity by differencing: 24 m per 2.4 s outward along 30°
    np.testing.assert_allclose([births["vx"][0], births["vy"][0]],
                               [10 * np.sin(np.radians(30)), 10 * np.cos(np.radians(30))], rtol=1e-9)
    steps = pacsv.read_csv(out / "steps.csv").to_pydict()
    assert 0 not in steps["step"] and 40 not in steps["step"] and len(steps["step"]) == 58
    np.testing.assert_allclose(steps["duration"], PERIOD)
    doc = json.loads((out / "births.json").read_text())
    assert doc["counts"]["births"] == 2 and doc["caution"] and "per exposed step" in doc["birth_rate_per_step"]["units"]
    # the birth model reads these tables as they are (models/lowmarsh-birth.toml's columns)
    from sceneprior.fitting import prepare
    from sceneprior.spec import load_spec

    bspec = load_spec(REPO / "models" / "lowmarsh-birth.toml", overrides={
        "data": {"detections": str(out / "births.csv"), "scans": str(out / "steps.csv")}})
    _, rec, stats = prepare(bspec)
    assert stats.n_scans == 58 and rec.n_detections == 2


@pytest.mark.parametrize("case, message", [
    ("unknown_scan", "whose scan id is not in"),
    ("zero_radius", "gate radi"),
    ("twice", "appears more than once in scan"),
])
def test_births_and_detection_bad_input_one_line_exit_2(tmp_path, capsys, case, message):
    spec = polar_log(tmp_path)
    text = (tmp_path / "objects.csv").read_text().splitlines()
    if case == "unknown_scan":
        text.append("999,8,1000.0,0.0")
    elif case == "zero_radius":
        text[0] += ",gate_radius"
        text[1:] = [r + (",0.0" if i == 3 else ",150.0") for i, r in enumerate(text[1:])]
    else:
        text.append("13,2,2100.0,30.0")
    (tmp_path / "objects.csv").write_text("\n".join(text) + "\n")
    write_spec(tmp_path / "det.toml", {"name": "pd", "recording": "spec.toml",
                                       "sampler": {"chains": 1, "warmup": 10, "draws": 10, "progress": False}})
    for cmd in (["births", str(spec), "--out", str(tmp_path / "b")], ["detection", str(tmp_path / "det.toml")]):
        assert main(cmd) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and message in err[0] and "objects.csv" in err[0], err


def test_births_option_errors(tmp_path, capsys):
    spec = polar_log(tmp_path)
    for opts, message in ((["--gap-factor", "0.5"], "gap factor (--gap-factor) must be a finite number > 1"),
                          (["--gap-factor", "nan"], "gap factor (--gap-factor) must be a finite number > 1"),
                          (["--max-unseen", "-1"], "max unseen scans (--max-unseen)"),
                          (["--detection-probability", "1.5"],
                           "detection probability (--detection-probability) must lie in (0, 1]"),
                          (["--time-column", "stamp"], "--time-column stamp: the scans table")):
        assert main(["births", str(spec), "--out", str(tmp_path / "b"), *opts]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and message in err[0], err


def test_gaps_without_times_from_the_id_steps():
    """Without scan times a gap is an id jump > gap_factor × the median id step: a log that
    keeps every other frame (ids 0, 2, 4, …) has no gaps, a jump of 10 there is one; a scan
    list whose steps are as often long as short is refused (the period cannot be told)."""
    from sceneprior.errors import InputError
    from sceneprior.tracklog import scan_steps

    ids = np.concatenate([np.arange(0, 40, 2), np.arange(50, 90, 2)])
    st_ = scan_steps(ids)
    assert int(st_.gap_before.sum()) == 1 and ids[st_.order][st_.gap_before].tolist() == [50]
    assert not scan_steps(np.arange(0, 80, 2)).gap_before.any()
    with pytest.raises(InputError, match="cannot be told from data gaps"):
        scan_steps(np.array([0, 1, 5, 6, 10, 11, 15]))
