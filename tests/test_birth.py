"""Birth workflow: Gaussian-mixture birth intensity fitted to the demo's birth events.

Reference: the simulator's own ground truth (our invented mixture); the recovery criterion
|posterior mean − true mean| < 4.5 posterior sd per coordinate follows the birth issue
(about 100 simultaneous comparisons over the test suite: a normal tail beyond 4.5 sd has
probability 7e-6, so a family-wise level below 1e-3).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from conftest import REPO
from sceneprior.cli import main


@pytest.fixture(scope="module")
def birth_run(tmp_path_factory):
    from sceneprior.simulate import simulate_births

    tmp = tmp_path_factory.mktemp("birth")
    truth = simulate_births(tmp / "births", n_steps=600, seed=11, log=lambda m: None)
    from sceneprior.fitting import fit
    from sceneprior.results import write_run
    from sceneprior.spec import load_spec

    spec = load_spec(REPO / "models" / "lowmarsh-birth.toml", overrides={
        "data": {"detections": str(tmp / "births" / "births.csv"), "scans": str(tmp / "births" / "steps.csv")},
        "sampler": {"chains": 2, "warmup": 400, "draws": 600, "progress": False}})
    res = fit(spec, progress=False, log=lambda m: None)
    path = write_run(res, tmp / "runs")
    res._written = path
    return truth, res, json.loads((path / "summary.json").read_text())


def test_component_means_recovered(birth_run):
    truth, res, summary = birth_run
    comps = summary["mixture"]["components"]
    order = np.argsort([m[0] for m in truth["means_m"]])  # reported components are x-ordered
    for c, j in zip(comps, order):
        z = (np.asarray(c["mean_m"]) - np.asarray(truth["means_m"][j])) / np.asarray(c["mean_sd_m"])
        assert np.all(np.abs(z) < 4.5), (c, truth["means_m"][j])


def test_rate_and_weights_are_labelled(birth_run):
    truth, res, summary = birth_run
    mix = summary["mixture"]
    r = mix["rate_per_step"]
    assert abs(r["mean"] - truth["true_rate_per_step"]) < 3.5 * r["sd"]
    assert "per second" in mix["rate_per_second"]["units"]
    assert mix["rate_per_second"]["mean"] == pytest.approx(r["mean"] / 2.4, rel=1e-9)
    c = mix["components"][0]
    assert "untruncated" not in c["weight_in_region"]["units"] and "whole plane" in c["weight_untruncated"]["units"]
    assert "ordering" in mix["labelling"]


def test_mixture_bad_input(tmp_path, capsys):
    from conftest import box_case

    spec = box_case(tmp_path, [0, 1], [10.0, 20.0], [10.0, 20.0], n_scans_table=3,
                    model={"kind": "mixture", "components": 0})
    assert main(["fit", str(spec), "--quiet"]) == 2
    assert "model.components must be a whole number ≥ 1" in capsys.readouterr().err


def test_birth_mixture_exports_to_the_tracker_file(birth_run):
    """The run's birth mixture reaches tracker.json with untruncated and in-region weights;
    their in-region sum is the summary's rate per step (a sum of posterior means)."""
    truth, res, summary = birth_run
    from sceneprior.export import build_config
    from sceneprior.results import load_run

    doc = build_config(load_run(res._written), override_gate=True)  # short test chains
    b = doc["birth"]
    assert b["weights"] == "untruncated" and len(b["components"]) == 2
    w_in = sum(c["weight_in_region"] for c in b["components"])
    assert w_in == pytest.approx(summary["mixture"]["rate_per_step"]["mean"], rel=1e-9)
    assert b["step_duration_s"] == pytest.approx(2.4)
