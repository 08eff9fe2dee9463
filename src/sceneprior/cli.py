"""The ``sceneprior`` command: a thin layer over the library.

Each subcommand parses its arguments and calls one library function. Exit codes:
0 success, 2 bad input or usage (one line on stderr), 3 fit finished but failed the
convergence gate, 1 unexpected error (traceback).
"""

from __future__ import annotations

import argparse
import sys
import time
from importlib import resources
from pathlib import Path

from . import __version__
from .errors import ConvergenceGateError, InputError

UNITS_EPILOG = """\
units:
  rate       expected detections per scan over the window (region minus permanent
             masks), a count per scan
  intensity  detections per scan per m² (polar runs also give per m of range per rad
             of bearing, = per-m² value × range)
  density    intensity / rate: integrates to 1 over the window (per m²)
  positions  metres; bearings in degrees clockwise from north (x = r·sin θ, y = r·cos θ)
"""


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # usage errors: one line, exit 2
        self.print_usage(sys.stderr)
        print(f"sceneprior: error: {message}", file=sys.stderr)
        raise SystemExit(2)


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(
        prog="sceneprior",
        description="Fit Bayesian Poisson clutter and birth intensities to recorded scans "
        "(unordered, unlabeled detection sets, empty scans included) and hand the posterior "
        "to a multi-object tracker's configuration.",
        epilog=UNITS_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--version", action="version", version=f"sceneprior {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    f = sub.add_parser(
        "fit", help="fit a specification (TOML) and write runs/NAME/",
        description="Read the detections and scans named in SPEC, bin them on the spec's grid, "
        "sample the posterior of the clutter intensity and write the run directory "
        "(posterior.nc, intensity.nc, summary.json). Rates are detections per scan over the "
        "window; intensities per m² per scan (and per m·rad on polar grids).",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    f.add_argument("spec", metavar="SPEC.toml", help="fit specification (see models/template.toml)")
    f.add_argument("--out", metavar="DIR", help="folder for run directories (default: the spec's output.dir)")
    f.add_argument("--quiet", action="store_true", help="no progress bar")

    s = sub.add_parser(
        "simulate", help="write the invented Lowmarsh harbour demo recording",
        description="Simulate Lowmarsh radar scans (polar field of view, range 200–6000 m, bearing "
        "−70°…+70°) from a Poisson point process with range fall-off, a shoal hot spot and a "
        "masked land sector; writes detections, scans and the ground truth (true rate per scan "
        "over the window, true intensity in m⁻² scan⁻¹).",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    s.add_argument("--out", metavar="DIR", default="runs/demo-data", help="output folder (default %(default)s)")
    s.add_argument("--scans", type=int, default=600, help="number of scans, 2.4 s apart (default %(default)s)")
    s.add_argument("--seed", type=int, default=20261201, help="random seed (default %(default)s)")
    s.add_argument("--format", choices=("csv", "parquet"), default="csv", help="table format (default %(default)s)")

    d = sub.add_parser(
        "demo", help="simulate the Lowmarsh demo and fit it (about a minute)",
        description="Simulate the Lowmarsh recording into RUNS/demo-data, fit the uniform clutter "
        "model into RUNS/demo, and print the clutter rate per scan with its 90 %% interval, the "
        "intensity per m² and the sampler's diagnostics beside the simulated truth.",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    d.add_argument("--runs", metavar="DIR", default="runs", help="folder for data and runs (default %(default)s)")
    d.add_argument("--seed", type=int, default=20261201, help="simulation seed (default %(default)s)")
    d.add_argument("--quiet", action="store_true", help="no progress bar")
    return p


def cmd_fit(args) -> int:
    from .fitting import fit
    from .results import write_run
    from .spec import load_spec

    spec = load_spec(args.spec)
    result = fit(spec, progress=not args.quiet, log=_log)
    path = write_run(result, Path(args.out) if args.out else None)
    print(human_summary(result, path))
    return 0


def cmd_simulate(args) -> int:
    from .simulate import simulate_lowmarsh

    simulate_lowmarsh(Path(args.out), n_scans=args.scans, seed=args.seed, fmt=args.format, log=_log)
    return 0


def cmd_demo(args) -> int:
    import json

    from .fitting import fit
    from .results import write_run
    from .simulate import simulate_lowmarsh
    from .spec import load_spec

    t0 = time.perf_counter()
    runs = Path(args.runs)
    data_dir = runs / "demo-data"
    info = simulate_lowmarsh(data_dir, seed=args.seed, log=_log)
    spec_file = resources.files("sceneprior") / "specs" / "lowmarsh-uniform.toml"
    with resources.as_file(spec_file) as sf:
        spec = load_spec(sf, overrides={
            "name": "demo",
            "data": {"detections": str(data_dir / "detections.csv"), "scans": str(data_dir / "scans.csv")},
            "output": {"dir": str(runs)},
        })
    result = fit(spec, progress=not args.quiet, log=_log)
    path = write_run(result)
    print(human_summary(result, path))
    summary = json.loads((path / "summary.json").read_text())
    true_rate = info["true_rate_per_scan"]
    z = (summary["rate"]["mean"] - true_rate) / summary["rate"]["sd"]
    print(f"  simulated truth: {true_rate:.3f} detections/scan over the window "
          f"(posterior mean is {z:+.2f} posterior sd from it)")
    print(f"  demo finished in {time.perf_counter() - t0:.0f} s")
    return 0


def human_summary(result, path: Path) -> str:
    from .results import CAUTION, summary_dict

    s = summary_dict(result)
    d, r, mi, dg = s["data"], s["rate"], s["mean_intensity"], s["diagnostics"]
    lines = [
        f"run {s['run']} ({s['model']['kind']}, {s['space']['frame']} frame) written to {path}",
        f"  scans: {d['scans']} ({d['empty_scans']} empty); detections used: {d['detections_used']} "
        f"(dropped: {d['dropped_in_masks']} in masks, {d['dropped_outside_bounds']} outside bounds)",
        f"  window: {s['space']['window_area_m2'] / 1e6:.3f} km² (region minus masks)",
        f"  clutter rate: {r['mean']:.3f} detections/scan, 90 % interval [{r['q05']:.3f}, {r['q95']:.3f}]",
        f"  mean intensity: {mi['mean']:.4g} per m² per scan ({mi['mean'] * 1e6:.4g} per km² per scan)",
    ]
    worst_rhat = max(v["r_hat"] for v in dg["variables"].values())
    min_ess = min(v["ess_bulk"] for v in dg["variables"].values())
    lines.append(f"  diagnostics: max R-hat {worst_rhat:.4f}, min bulk ESS {min_ess:.0f}, "
                 f"divergences {dg['divergences']} ({dg['chains']} chains × {dg['draws']} draws)")
    lines.append(f"  caution: {CAUTION}")
    return "\n".join(lines)


COMMANDS = {"fit": cmd_fit, "simulate": cmd_simulate, "demo": cmd_demo}


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.command:
        parser.print_help()
        return 2
    try:
        return COMMANDS[args.command](args)
    except InputError as exc:
        print(f"sceneprior: error: {exc}", file=sys.stderr)
        return 2
    except ConvergenceGateError as exc:
        print(f"sceneprior: convergence gate failed: {exc}", file=sys.stderr)
        return 3
    except KeyboardInterrupt:
        print("sceneprior: interrupted; no partial run was left behind", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
