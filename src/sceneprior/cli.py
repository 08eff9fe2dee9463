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
    s.add_argument("--out", metavar="DIR", default=None,
                   help="output folder (default runs/demo-data; required with --from)")
    s.add_argument("--scans", type=int, default=None,
                   help="number of scans, 2.4 s apart (default 600; with --from: the run's number of scans)")
    s.add_argument("--seed", type=int, default=20261201, help="random seed (default %(default)s)")
    s.add_argument("--format", choices=("csv", "parquet"), default="csv", help="table format (default %(default)s)")
    s.add_argument("--from", dest="from_run", metavar="RUN",
                   help="draw posterior-predictive recordings from a fitted run directory instead of the "
                   "demo scenario (same table contract: detections + scans per recording)")
    s.add_argument("--recordings", type=int, default=None,
                   help="with --from: number of recordings (default 1), each from one posterior draw, its "
                   "scans i.i.d. given it")
    s.add_argument("--per-scan-draw", action="store_true",
                   help="with --from: a fresh posterior draw for every scan instead of one per recording")

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

    e = sub.add_parser(
        "export", help="write the tracker configuration (tracker.json) of a run",
        description="Write a schema-versioned JSON tracker configuration of RUN: the clutter intensity "
        "map (per-cell posterior mean, or --quantile Q per cell), the rate = its integral over the window "
        "with the rate's own 90 %% interval beside it, the spatial density = map / rate, masks, "
        "provenance and the caution. Also written into RUN/tracker.json. Refuses (exit 3) a run that "
        "fails the convergence gate unless --override-gate.",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    e.add_argument("run", metavar="RUN", help="run directory (runs/NAME)")
    e.add_argument("--quantile", type=float, metavar="Q",
                   help="export the per-cell posterior Q-quantile map, 0 < Q < 1 (e.g. 0.95 for a conservative "
                   "clutter map); default: posterior mean")
    e.add_argument("--override-gate", action="store_true",
                   help="export even if the convergence gate fails (written into the file)")
    e.add_argument("--out", metavar="FILE", help="also write the configuration to FILE")

    r = sub.add_parser(
        "report", help="write report.html (maps, counts, rate, sampler diagnostics) of a run",
        description="Write a self-contained HTML report of RUN: intensity mean and sd maps, exceedance "
        "maps when present, per-scan counts against the posterior predictive, the rate posterior, trace "
        "and rank plots, the diagnostics and convergence gate, and the caution.",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    r.add_argument("run", metavar="RUN", help="run directory (runs/NAME)")
    r.add_argument("--out", metavar="FILE", help="where to write the page (default RUN/report.html)")
    return p


def cmd_fit(args) -> int:
    from .fitting import fit
    from .results import write_run
    from .spec import load_spec

    spec = load_spec(args.spec)
    result = fit(spec, progress=not args.quiet, log=_log)
    path = write_run(result, Path(args.out) if args.out else None)
    print(human_summary(result, path))
    import json

    gate = json.loads((path / "summary.json").read_text(encoding="utf-8"))["gate"]
    if not gate["converged"]:  # the run is kept, marked unconverged (exit 3)
        raise ConvergenceGateError(
            f"run written to {path} but marked unconverged in summary.json: "
            + "; ".join(gate["failures"]) + "; `sceneprior export` refuses it unless --override-gate")
    return 0


def cmd_simulate(args) -> int:
    if args.from_run is not None:
        from .simulate import simulate_from_run

        if args.out is None:
            raise InputError("simulate --from RUN needs --out DIR (a folder for the predictive recordings)")
        simulate_from_run(args.from_run, Path(args.out), recordings=1 if args.recordings is None else args.recordings,
                          per_scan_draw=args.per_scan_draw, n_scans=args.scans, seed=args.seed,
                          fmt=args.format, log=_log)
        return 0
    if args.recordings is not None or args.per_scan_draw:
        raise InputError("--recordings and --per-scan-draw need --from RUN (a fitted run to draw from)")
    from .simulate import simulate_lowmarsh

    simulate_lowmarsh(Path(args.out or "runs/demo-data"), n_scans=600 if args.scans is None else args.scans,
                      seed=args.seed, fmt=args.format, log=_log)
    return 0


def cmd_export(args) -> int:
    from .export import describe, export_run

    doc, paths = export_run(args.run, quantile=args.quantile, override_gate=args.override_gate, out=args.out)
    print(describe(doc, paths))
    return 0


def cmd_report(args) -> int:
    from .report import write_report

    path = write_report(args.run, out=args.out)
    print(f"report of run {Path(args.run).name} written to {path}")
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
    g = s["gate"]
    lines.append("  convergence gate: " + ("passed" if g["converged"] else
                 f"FAILED ({len(g['failures'])} check(s)); run marked unconverged"))
    lines.append(f"  caution: {CAUTION}")
    return "\n".join(lines)


COMMANDS = {"fit": cmd_fit, "simulate": cmd_simulate, "demo": cmd_demo, "export": cmd_export,
            "report": cmd_report}


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
