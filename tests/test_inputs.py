"""Every bad input gives exit code 2 and one line that names the problem, through the CLI
entry point (``sceneprior.cli.main``; one case also through the installed console script)."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from conftest import box_case, write_csv
from sceneprior.cli import main


def run_cli(capsys, *args):
    code = main(list(args))
    err = capsys.readouterr().err.strip().splitlines()
    return code, err


def _good(tmp_path, **over):
    return box_case(tmp_path, [0, 1, 1], [10.0, 500.0, 900.0], [10.0, 250.0, 400.0], n_scans_table=4, **over)


def test_missing_column(tmp_path, capsys):
    spec = _good(tmp_path)
    write_csv(tmp_path / "det.csv", ["scan", "x", "north"], [[0, 1.0, 2.0]])
    code, err = run_cli(capsys, "fit", str(spec))
    assert code == 2 and len(err) == 1
    assert "no column 'y'" in err[0] and "det.csv" in err[0]


def test_nan_and_inf_coordinates(tmp_path, capsys):
    spec = _good(tmp_path)
    write_csv(tmp_path / "det.csv", ["scan", "x", "y"], [[0, 1.0, 2.0], [1, "nan", 2.0], [1, "inf", 3.0]])
    code, err = run_cli(capsys, "fit", str(spec))
    assert code == 2 and len(err) == 1
    assert "NaN, empty or infinite" in err[0] and "rows 2, 3" in err[0] and "'x'" in err[0]


def test_unknown_scan(tmp_path, capsys):
    spec = _good(tmp_path)
    write_csv(tmp_path / "det.csv", ["scan", "x", "y"], [[0, 1.0, 2.0], [17, 2.0, 2.0]])
    code, err = run_cli(capsys, "fit", str(spec))
    assert code == 2 and "not in the scans table" in err[0] and "row 2" in err[0]


def test_duplicate_scan_ids(tmp_path, capsys):
    spec = _good(tmp_path)
    write_csv(tmp_path / "scans.csv", ["scan"], [[0], [1], [1], [2]])
    code, err = run_cli(capsys, "fit", str(spec))
    assert code == 2 and "duplicate scan ids" in err[0] and "row 3" in err[0]


def test_no_scan_list(tmp_path, capsys):
    spec = box_case(tmp_path, [0], [1.0], [1.0])
    code, err = run_cli(capsys, "fit", str(spec))
    assert code == 2 and "no scan list" in err[0]


@pytest.mark.parametrize("which", ["det.csv", "scans.csv"])
def test_empty_files(tmp_path, capsys, which):
    spec = _good(tmp_path)
    (tmp_path / which).write_text("")
    code, err = run_cli(capsys, "fit", str(spec))
    assert code == 2 and "empty" in err[0] and which in err[0]


def test_outside_bounds_error_then_drop(tmp_path, capsys):
    spec = box_case(tmp_path, [0, 1, 2], [10.0, 1500.0, 20.0], [10.0, 10.0, -5.0], n_scans_table=3,
                    sampler={"method": "exact", "chains": 2, "draws": 400, "seed": 0, "progress": False})
    code, err = run_cli(capsys, "fit", str(spec), "--out", str(tmp_path / "runs"))
    assert code == 2 and "2 detection(s) outside the region's bounds" in err[0] and "rows 2, 3" in err[0]
    spec = box_case(tmp_path, [0, 1, 2], [10.0, 1500.0, 20.0], [10.0, 10.0, -5.0], n_scans_table=3,
                    data={"detections": "det.csv", "scans": "scans.csv", "outside": "drop"},
                    sampler={"method": "exact", "chains": 2, "draws": 400, "seed": 0, "progress": False})
    code, _ = run_cli(capsys, "fit", str(spec), "--out", str(tmp_path / "runs"))
    assert code == 0
    import json

    s = json.loads((tmp_path / "runs" / "case" / "summary.json").read_text())
    assert s["data"]["dropped_outside_bounds"] == 2 and s["data"]["detections_used"] == 1


def test_detections_in_mask_are_dropped_and_counted(tmp_path, capsys):
    spec = box_case(tmp_path, [0, 1, 2], [100.0, 700.0, 750.0], [100.0, 220.0, 300.0], n_scans_table=3,
                    space={"frame": "cartesian", "x": [0.0, 1000.0], "y": [0.0, 500.0], "cells": [10, 5],
                           "masks": [{"name": "pier", "polygon": [[500.0, 200.0], [800.0, 200.0], [800.0, 400.0]]}]},
                    sampler={"method": "exact", "chains": 2, "draws": 400, "seed": 0, "progress": False})
    code, _ = run_cli(capsys, "fit", str(spec), "--out", str(tmp_path / "runs"))
    assert code == 0
    import json

    s = json.loads((tmp_path / "runs" / "case" / "summary.json").read_text())
    # (700, 220) and (750, 300) lie inside the triangle (500,200)-(800,200)-(800,400), whose
    # hypotenuse is y = 200 + (x − 500)·2/3; its area is 300·200/2 = 30 000 m² (by hand)
    assert s["data"]["dropped_in_masks"] == 2
    assert s["space"]["window_area_m2"] == pytest.approx(500000.0 - 0.5 * 300.0 * 200.0, rel=1e-12)


def test_unparsable_toml(tmp_path, capsys):
    (tmp_path / "bad.toml").write_text("name = 'x'\n[data\n")
    code, err = run_cli(capsys, "fit", str(tmp_path / "bad.toml"))
    assert code == 2 and "cannot parse TOML" in err[0]


def test_unknown_key_suggests_nearest(tmp_path, capsys):
    spec = _good(tmp_path, sampler={"chians": 4})
    code, err = run_cli(capsys, "fit", str(spec))
    assert code == 2 and "unknown key 'chians'" in err[0] and "did you mean 'chains'" in err[0]


def test_unknown_prior_parameter(tmp_path, capsys):
    spec = _good(tmp_path, model={"kind": "uniform", "prior": {"shpe": 2.0}})
    code, err = run_cli(capsys, "fit", str(spec))
    assert code == 2 and "shpe" in err[0]


def test_console_script_exit_code_and_no_traceback(tmp_path):
    spec = _good(tmp_path, sampler={"chians": 4})
    exe = [sys.executable, "-m", "sceneprior.cli", "fit", str(spec)]
    p = subprocess.run(exe, capture_output=True, text=True, timeout=120)
    assert p.returncode == 2
    assert "Traceback" not in p.stderr and "did you mean 'chains'" in p.stderr
    assert len(p.stderr.strip().splitlines()) == 1


def test_unknown_gate_key_suggests_nearest(tmp_path, capsys):
    # [data.gates] keys go through the same unknown-key machinery (issue 7)
    write_csv(tmp_path / "obj.csv", ["scan", "object", "x", "y"], [[0, 1, 5.0, 5.0]])
    spec = _good(tmp_path, data={"detections": "det.csv", "scans": "scans.csv", "objects": "obj.csv",
                                 "gates": {"raduis": 30.0}})
    code, err = run_cli(capsys, "fit", str(spec))
    assert code == 2 and len(err) == 1
    assert "unknown key 'raduis' in [data.gates]" in err[0] and "did you mean 'radius'" in err[0]
