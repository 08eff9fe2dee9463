"""The demo: a recording of our own Lowmarsh scene (``simulate.simulate_scene``) fitted with
the packaged specs, each result set beside the simulator's truth (``sceneprior demo``)."""

from __future__ import annotations

import json
import time
from importlib import resources
from pathlib import Path


def run_demo(runs: Path, seed: int, *, quiet: bool, with_map: bool, log) -> None:
    """Simulate the Lowmarsh recording into RUNS/demo-data, fit the packaged uniform spec
    with gates around the vessels into RUNS/demo (summary lines as ``sceneprior fit`` prints
    them), set it beside the simulator's truth and an ungated fit, then (with_map)
    the clutter map; prints as it goes, progress and log lines through ``log``."""
    from .fitting import fit
    from .results import human_summary, write_run
    from .simulate import simulate_scene
    from .spec import load_spec

    t0 = time.perf_counter()
    data_dir = runs / "demo-data"
    info = simulate_scene(data_dir, seed=seed, log=log)  # breakwater (fitted) + quay mast
    spec_file = resources.files("sceneprior") / "specs" / "lowmarsh-uniform.toml"
    data = {"detections": str(data_dir / "detections.csv"), "scans": str(data_dir / "scans.csv")}
    with resources.as_file(spec_file) as sf:
        naive_spec = load_spec(sf, overrides={"name": "demo", "data": data, "output": {"dir": str(runs)}})
        # the vessels' positions per scan gate them out: ellipse gates of P_G = 0.999 from
        # their measurement covariance (objects.csv cov_xx, cov_xy, cov_yy)
        spec = load_spec(sf, overrides={
            "name": "demo",
            "data": {**data, "objects": str(data_dir / "objects.csv"), "gates": {"probability": DEMO_GATE_P}},
            "output": {"dir": str(runs)},
        })
    result = fit(spec, progress=not quiet, log=log)
    path = write_run(result)
    summary = json.loads((path / "summary.json").read_text(encoding="utf-8"))
    print(human_summary(summary, path))
    true_rate = info["true_rate_per_scan"]
    z = (summary["rate"]["mean"] - true_rate) / summary["rate"]["sd"]
    print(f"  simulated truth: {true_rate:.3f} clutter detections/scan over the window "
          f"(posterior mean is {z:+.2f} posterior sd from it)")
    print(naive_comparison(naive_spec, result.prior, true_rate, info.get("vessels")))
    if with_map:
        print(demo_map(runs, data_dir, quiet=quiet, log=log))
    print(f"  demo finished in {time.perf_counter() - t0:.0f} s")


def demo_map(runs: Path, data_dir: Path, *, quiet: bool, log) -> str:
    """Fit the packaged LGCP spec (gated like the uniform demo) into RUNS/demo-map and
    describe it: rate and zone rates against the simulator's quadrature truth, the gate."""
    from .fitting import fit
    from .results import write_run
    from .simulate import Lowmarsh
    from .spec import load_spec

    spec_file = resources.files("sceneprior") / "specs" / "lowmarsh-lgcp.toml"
    with resources.as_file(spec_file) as sf:
        spec = load_spec(sf, overrides={
            "name": "demo-map",
            "data": {"detections": str(data_dir / "detections.csv"), "scans": str(data_dir / "scans.csv"),
                     "objects": str(data_dir / "objects.csv")},
            "output": {"dir": str(runs)}})
    log("fitting the clutter map (log-Gaussian Cox model) into " + str(runs / "demo-map"))
    result = fit(spec, progress=not quiet, log=log)
    path = write_run(result)
    s = json.loads((path / "summary.json").read_text())
    scene = Lowmarsh()
    truth, _ = scene.window_rate()
    r = s["rate"]
    lines = [f"clutter map (lgcp, {result.setup.extra['kernel']}) written to {path}",
             f"  clutter rate: {r['mean']:.3f} detections/scan, 90 % interval [{r['q05']:.3f}, {r['q95']:.3f}] "
             f"(truth {truth:.3f}, {(r['mean'] - truth) / r['sd']:+.2f} sd)"]
    for z in spec.zones:
        zr = s["zones"][z.name]
        zt, _ = scene.zone_rate(z.range, z.bearing)
        lines.append(f"  zone {z.name!r}: {zr['mean']:.3f} detections/scan, 90 % interval [{zr['q05']:.3f}, "
                     f"{zr['q95']:.3f}] over {zr['area_m2'] / 1e6:.2f} km² (truth {zt:.3f}, "
                     f"{(zr['mean'] - zt) / zr['sd']:+.2f} sd)")
    dg, g = s["diagnostics"], s["gate"]
    lines.append(f"  field: σ {s['lgcp']['posterior']['sigma']['mean']:.2f}, length scales "
                 + ", ".join(f"{v['mean']:.4g} {u}" for v, u in zip(s['lgcp']['posterior']['length_scale'],
                                                                      s['lgcp']['posterior']['length_scale_units'])))
    lines.append(f"  diagnostics: cells' 99th-percentile R-hat {dg['cells']['r_hat_p99']:.4f}, median bulk ESS "
                 f"{dg['cells']['ess_bulk_median']:.0f}, divergences {dg['divergences']}; convergence gate: "
                 + ("passed" if g["converged"] else "FAILED (" + "; ".join(g["failures"]) + ")"))
    lines.append(f"  maps: {path / 'intensity.nc'} (per m² and per m·rad, 5/50/95 % and exceedance "
                 "probabilities); `sceneprior report` draws them")
    return "\n".join(lines)


DEMO_GATE_P = 0.999  # gate probability of the demo's ellipse gates around the vessels


def naive_comparison(naive_spec, prior, true_rate: float, vessels: dict | None) -> str:
    """One line: the conjugate uniform posterior of ALL detections (no gates), its bias
    against the clutter truth and the vessels' expected contribution."""
    from .fitting import prepare
    from .models.uniform import exact_posterior

    _, _, stats = prepare(naive_spec)
    a, b = exact_posterior(stats, prior)
    mean, sd = a / b * stats.window_total, a**0.5 / b * stats.window_total
    line = (f"  without gates (every detection taken as clutter): {mean:.3f} ± {sd:.3f} detections/scan, "
            f"{(mean - true_rate) / sd:+.1f} sd from the truth")
    if vessels:
        line += (f"; the vessels add {vessels['expected_object_detections_in_window_per_scan']:.3f} expected "
                 f"detections/scan (P_D {vessels['p_detection']:g} × "
                 f"{vessels['mean_objects_in_window_per_scan']:.2f} vessels in view)")
    return line
