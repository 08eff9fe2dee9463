"""The ``sceneprior`` command: a thin layer over the library.

Each subcommand parses its arguments and calls one library function. Exit codes:
0 success, 2 bad input or usage (one line on stderr), 3 fit finished but failed the
convergence gate, 1 unexpected error (traceback).
"""

from __future__ import annotations

import argparse
import json
import sys
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
        "demo", help="simulate the Lowmarsh demo and fit it (about two minutes)",
        description="Simulate the Lowmarsh recording (clutter and vessels leaving the harbour) into "
        "RUNS/demo-data, fit the uniform clutter model into RUNS/demo with gates around the vessels' "
        "known positions, and print the clutter rate per scan with its 90 %% interval, the intensity "
        "per m² and the sampler's diagnostics beside the simulated truth and beside a fit without "
        "gates (biased upward by the vessels' detections). Then fit the clutter map (log-Gaussian Cox "
        "model, Matérn 3/2 field) into RUNS/demo-map and print its rate and zone rates (the shoal, the "
        "harbour approach) beside the truth; --no-map skips that step.",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    d.add_argument("--runs", metavar="DIR", default="runs", help="folder for data and runs (default %(default)s)")
    d.add_argument("--seed", type=int, default=20261201, help="simulation seed (default %(default)s)")
    d.add_argument("--quiet", action="store_true", help="no progress bar")
    d.add_argument("--no-map", action="store_true", help="skip the clutter map (LGCP) fit")

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
    e.add_argument("--site", metavar="NAME",
                   help="for a run fitted to several sites (kind lgcp_sites): export this site's map "
                   "(written to RUN/tracker-NAME.json); required there")

    r = sub.add_parser(
        "report", help="write report.html (maps, counts, rate, sampler diagnostics) of a run",
        description="Write a self-contained HTML report of RUN: intensity mean and sd maps, exceedance "
        "maps when present, per-scan counts against the posterior predictive, the rate posterior, trace "
        "and rank plots, the diagnostics and convergence gate, and the caution.",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    r.add_argument("run", metavar="RUN", help="run directory (runs/NAME)")
    r.add_argument("--out", metavar="FILE", help="where to write the page (default RUN/report.html)")
    _add_criticism_parsers(sub, s)
    _add_tracklog_parsers(sub)
    return p


def cmd_fit(args) -> int:
    from .fitting import fit
    from .results import human_summary, write_run
    from .spec import load_spec

    spec = load_spec(args.spec)
    result = fit(spec, progress=not args.quiet, log=_log)
    path = write_run(result, Path(args.out) if args.out else None)
    summary = json.loads((path / "summary.json").read_text(encoding="utf-8"))
    print(human_summary(summary, path))
    gate = summary["gate"]
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
    from .simulate import simulate_scene

    simulate_scene(Path(args.out or "runs/demo-data"), n_scans=600 if args.scans is None else args.scans,
                   seed=args.seed, fmt=args.format, rain=args.rain, second_mast=not args.no_second_mast,
                   vessels=args.vessels, log=_log)
    return 0


def cmd_export(args) -> int:
    from .export import describe, export_run

    doc, paths = export_run(args.run, quantile=args.quantile, override_gate=args.override_gate, out=args.out,
                            detection=args.detection, birth=args.birth, site=args.site)
    print(describe(doc, paths))
    return 0


def cmd_report(args) -> int:
    from .report import write_report

    path = write_report(args.run, out=args.out)
    print(f"report of run {Path(args.run).name} written to {path}")
    return 0


def cmd_demo(args) -> int:
    from .demo import run_demo

    run_demo(Path(args.runs), seed=args.seed, quiet=args.quiet, with_map=not args.no_map, log=_log)
    return 0


COMMANDS = {"fit": cmd_fit, "simulate": cmd_simulate, "demo": cmd_demo, "export": cmd_export,
            "report": cmd_report}


# --------------------------------------------------------------------------- criticism, comparison
def _add_criticism_parsers(sub, simulate_parser) -> None:
    """check, rank, compare, and the simulate options for weather and the second mast (issue 6)."""
    simulate_parser.add_argument("--rain", action="store_true",
                                 help="add rain episodes, sea state and per-scan gusts (over-dispersed counts); "
                                 "the scans table gains rain, sea_state and weather_episode columns")
    simulate_parser.add_argument("--vessels", action=argparse.BooleanOptionalAction, default=None,
                                 help="vessels leaving the harbour in the breakwater recording: their detections "
                                 "mixed into detections.csv, their positions per scan in objects.csv (default: on, "
                                 "off with --rain)")
    simulate_parser.add_argument("--no-second-mast", action="store_true",
                                 help="do not write the quay mast's recording (DIR/quay)")
    c = sub.add_parser(
        "check", help="posterior/prior predictive checks and prior sensitivity of a run (RUN/check.json)",
        description="Check a fitted RUN: dispersion index of the per-scan counts with its posterior "
        "predictive p-value, LOO-PIT of the per-scan counts, standardised residuals per zone, drift over "
        "time, scan-to-scan persistence, the prior predictive, and prior sensitivity (refits with every "
        "prior scale ×10 and ÷10). Each check is a test at level 0.01; results go to RUN/check.json.",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    c.add_argument("run", metavar="RUN", help="run directory (runs/NAME)")
    c.add_argument("--no-sensitivity", action="store_true", help="skip the prior-sensitivity refits")
    c.add_argument("--no-prior", action="store_true", help="skip the prior predictive check")
    c.add_argument("--zones", type=int, default=4, help="zones per grid axis for the residuals (default %(default)s)")
    c.add_argument("--seed", type=int, default=0, help="seed of the replications (default %(default)s)")
    c.add_argument("--json", action="store_true", help="print check.json instead of the table")
    k = sub.add_parser(
        "rank", help="rank runs fitted to the same data by PSIS-LOO over scans",
        description="PSIS-LOO with the per-scan set log-density (point-process measure, per m²) and "
        "leave-block-out of consecutive scans; prints elpd differences to the best run with their standard "
        "errors and Pareto-k warnings. Refuses runs fitted to different data or windows, or whose "
        "likelihoods are in measures that cannot be reconciled.",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    k.add_argument("runs", metavar="RUN", nargs="+", help="run directories")
    k.add_argument("--blocks", default="25", metavar="B",
                   help="leave-block-out blocks: N consecutive scans, 'hour', 'day', or 'column:NAME' "
                   "(episodes of a scans-table column) (default %(default)s)")
    k.add_argument("--json", action="store_true", help="print the result as JSON")
    m = sub.add_parser(
        "compare", help="compare two runs (sites, sensors, periods) on a common grid",
        description="Rate ratio of RUN_A to RUN_B over the overlap of their windows in a shared frame "
        "([sensor] x, y, heading in the specs), P(rate_A > rate_B), and the per-cell log-ratio map on a "
        "common Cartesian grid (intensities per m² per scan; polar per m·rad intensities are converted "
        "with the Jacobian 1/r) with cells marked where the difference is credible at a Bayesian "
        "false-discovery rate.",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    m.add_argument("run_a", metavar="RUN_A")
    m.add_argument("run_b", metavar="RUN_B")
    m.add_argument("--cell", type=float, metavar="M", help="common grid cell size in m (default: the coarser "
                   "of the two runs' median cell sizes)")
    m.add_argument("--fdr", type=float, default=0.05, help="Bayesian false-discovery rate (default %(default)s)")
    m.add_argument("--min-ratio", type=float, default=1.0, metavar="R",
                   help="a cell is different when its ratio exceeds R or is below 1/R (default %(default)s: sign)")
    m.add_argument("--out", metavar="DIR", help="write DIR/comparison.json and DIR/log_ratio.nc")


def cmd_check(args) -> int:
    from .checks import check_run, format_check

    rep = check_run(args.run, prior_side=not args.no_prior, sensitivity=not args.no_sensitivity,
                    seed=args.seed, zones=args.zones, log=_log)
    print(json.dumps(rep, indent=2, default=str) if args.json else format_check(rep))
    return 0


def cmd_rank(args) -> int:
    from .loo import format_rank, rank_runs

    res = rank_runs(args.runs, blocks=args.blocks)
    print(json.dumps(res, indent=2) if args.json else format_rank(res))
    return 0


def cmd_compare(args) -> int:
    from .compare import compare_runs, format_compare

    res = compare_runs(args.run_a, args.run_b, out=Path(args.out) if args.out else None, cell_m=args.cell,
                       fdr=args.fdr, min_ratio=args.min_ratio)
    print(format_compare(res))
    return 0


COMMANDS.update({"check": cmd_check, "rank": cmd_rank, "compare": cmd_compare})



# --------------------------------------------------------------------------- track log (issue 7)
def _add_tracklog_parsers(sub) -> None:
    """births, detection, and the export options that combine runs."""
    e = sub.choices["export"]
    e.add_argument("--detection", metavar="PD_RUN",
                   help="add the detection probability P_D(range) of a detection run (sceneprior detection); "
                   "its region must be the clutter run's")
    e.add_argument("--birth", metavar="BIRTH_RUN",
                   help="add the birth mixture of a birth run (a mixture fit to `sceneprior births` output); "
                   "both runs must place the sensor alike")
    b = sub.add_parser(
        "births", help="derive birth events and exposed steps from a track log (objects table)",
        description="Read the recording named by SPEC (its scans table and data.objects: scan, object id, "
        "position) and derive the birth events — the first appearance of each object id — and the steps at "
        "which a birth could be seen. Objects at the start of the recording or right after a data gap (a time "
        "jump > GAP_FACTOR × the median scan period; without times, a scan-id jump > GAP_FACTOR × the median id step) are left-censored: not births, and "
        "those steps leave the exposure. An id unseen for more than --max-unseen scans that reappears is a new "
        "object. Writes births.csv (step, x, y [m], vx, vy [m/s]; polar positions converted to Cartesian), "
        "steps.csv (exposed steps with their duration [s]) and births.json (counts, rules, the birth rate per "
        "step with its conjugate Gamma posterior) — the input of a birth-mixture fit "
        "(models/lowmarsh-birth.toml).",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    b.add_argument("spec", metavar="SPEC.toml", help="the recording's fit specification, with data.objects")
    b.add_argument("--out", metavar="DIR", required=True, help="folder for births.csv, steps.csv, births.json")
    b.add_argument("--gap-factor", type=float, default=1.5,
                   help="a data gap is a scan-time jump above this × the median scan period (without times: a "
                   "scan-id jump above this × the median id step) (default %(default)s)")
    b.add_argument("--max-unseen", type=int, default=3,
                   help="an id unseen for more than this many scans that reappears is a new object; set it to "
                   "your tracker's track-deletion threshold (default %(default)s)")
    b.add_argument("--detection-probability", type=float, metavar="P",
                   help="the log was built from detections with this P_D: censor the first scans after the start "
                   "and each gap until a present object is listed with 99 %% probability, and back-propagate "
                   "birth positions by the expected detection lag (1 − P)/P scans (default: off, the log lists "
                   "objects from their appearance)")
    b.add_argument("--settle-scans", type=int, metavar="H",
                   help="censor H scans after the start and each gap besides the first (default 0, or from "
                   "--detection-probability)")
    b.add_argument("--position-sd", type=float, default=0.0, metavar="M",
                   help="position noise sd of the log [m], for the lag correction's variance (default 0)")
    b.add_argument("--time-column", metavar="NAME",
                   help="scans-table column with scan times, seconds or ISO-8601 (default: 'time' when the table "
                   "has it, else the scans are ordered by id); a named column the table lacks is refused")
    b.add_argument("--format", choices=("csv", "parquet"), default="csv", help="table format (default %(default)s)")
    d = sub.add_parser(
        "detection", help="fit the detection probability P_D(range) of known objects (run directory)",
        description="For each known object of the recording and each scan, detected or not (a detection of "
        "that scan inside the object's gate), fit P_D as a logit-linear function of range with NUTS, and write "
        "runs/NAME/ (posterior.nc, detection.nc with P_D per range bin, per grid cell and on a range curve — "
        "posterior mean, sd, 5/50/95 % — and summary.json). SPEC is a detection spec naming the recording's "
        "fit spec (see models/lowmarsh-detection.toml). Export it with `sceneprior export CLUTTER_RUN "
        "--detection RUN`.",
        epilog=UNITS_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    d.add_argument("spec", metavar="SPEC.toml", help="detection specification")
    d.add_argument("--out", metavar="DIR", help="folder for run directories (default: the spec's output.dir)")
    d.add_argument("--quiet", action="store_true", help="no progress bar")


def cmd_births(args) -> int:
    from .births import births_from_spec

    births_from_spec(args.spec, args.out, time_column=args.time_column, fmt=args.format, log=print,
                     gap_factor=args.gap_factor, max_unseen=args.max_unseen,
                     detection_probability=args.detection_probability, settle_scans=args.settle_scans,
                     position_sd=args.position_sd)
    return 0


def cmd_detection(args) -> int:
    from .detprob import DetectionRun, describe, fit_detection, load_detection_spec, write_detection_run

    spec = load_detection_spec(args.spec)
    res = fit_detection(spec, progress=not args.quiet, log=_log)
    path = write_detection_run(res, Path(args.out) if args.out else None)
    print(describe(res, path))
    verdict = DetectionRun(path).summary["gate"]  # the verdict the run records
    if not verdict["converged"]:  # kept and marked unconverged (exit 3); export refuses it
        raise ConvergenceGateError(f"detection run written to {path} but unconverged: "
                                   + "; ".join(verdict["failures"]))
    return 0


COMMANDS.update({"births": cmd_births, "detection": cmd_detection})


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
