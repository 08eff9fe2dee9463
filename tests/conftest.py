"""Shared fixtures. Compiled models and the demo run are shared across tests (session
scope) to keep the suite within its time budget."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest

os.environ.setdefault("JAX_PLATFORMS", "cpu")

from sceneprior.inference import configure_jax  # noqa: E402

configure_jax()

REPO = Path(__file__).resolve().parents[1]


def write_csv(path: Path, header: list[str], rows) -> Path:
    lines = [",".join(header)] + [",".join(str(v) for v in r) for r in rows]
    path.write_text("\n".join(lines) + "\n")
    return path


def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    return repr(v)


def write_spec(path: Path, spec: dict) -> Path:
    """Write a (nested) dict as TOML; lists of dicts become arrays of tables."""
    out: list[str] = []

    def emit(table: dict, prefix: str):
        scalars = {k: v for k, v in table.items() if not isinstance(v, dict)
                   and not (isinstance(v, list) and v and isinstance(v[0], dict))}
        if prefix and scalars:
            out.append(f"[{prefix}]")
        for k, v in scalars.items():
            out.append(f"{k} = {toml_value(v)}")
        for k, v in table.items():
            name = f"{prefix}.{k}" if prefix else k
            if isinstance(v, dict):
                emit(v, name)
            elif isinstance(v, list) and v and isinstance(v[0], dict):
                for item in v:
                    out.append(f"[[{name}]]")
                    for kk, vv in item.items():
                        out.append(f"{kk} = {toml_value(vv)}")

    emit(spec, "")
    path.write_text("\n".join(out) + "\n")
    return path


def box_case(tmp: Path, scan_ids, xs, ys, n_scans_table=None, name="case", **over) -> Path:
    """A Cartesian 1000 m × 500 m box recording with its spec; returns the spec path."""
    write_csv(tmp / "det.csv", ["scan", "x", "y"], zip(scan_ids, xs, ys))
    spec = {
        "name": name,
        "data": {"detections": "det.csv"},
        "space": {"frame": "cartesian", "x": [0.0, 1000.0], "y": [0.0, 500.0], "cells": [10, 5]},
        "model": {"kind": "uniform"},
        "sampler": {"chains": 2, "warmup": 300, "draws": 500, "seed": 3, "progress": False},
        "output": {"dir": "runs"},
    }
    if n_scans_table is not None:
        write_csv(tmp / "scans.csv", ["scan"], [[s] for s in range(n_scans_table)])
        spec["data"]["scans"] = "scans.csv"
    for k, v in over.items():
        if isinstance(v, dict) and isinstance(spec.get(k), dict):
            spec[k] = {**spec[k], **v}
        else:
            spec[k] = v
    for k in list(spec["data"]):
        if spec["data"][k] is None:
            del spec["data"][k]
    return write_spec(tmp / "spec.toml", spec)


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """The real `sceneprior demo`, run once for the session."""
    from sceneprior.cli import main

    runs = tmp_path_factory.mktemp("demo")
    code = main(["demo", "--runs", str(runs), "--quiet"])
    assert code == 0
    return runs


@pytest.fixture
def rng():
    return np.random.default_rng(12345)
