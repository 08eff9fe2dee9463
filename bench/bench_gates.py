"""Bench: window area removed by per-scan gates (issue 7, item 2).

100 000 scans with 10 gates each on a 128 × 128 grid (target from the issue: under 30 s on
2 cores; a bench figure, not a timed test).  Scenario (ours, invented): a 12.8 km square
Cartesian region with 100 m cells and one polygonal land mask; per scan 10 known objects
placed uniformly over the region widened by 200 m (so some gates are cut at the region's
edge); half of the gates are discs of radius U(50, 250) m, half ellipses from a position
covariance with standard deviations U(20, 80) m per axis, correlation U(−0.8, 0.8) and
P_G = 0.99 (semi-axes up to ≈ 243 m).  ``--polar`` runs the same counts on a polar
Lowmarsh-like 128 × 128 grid (range 200–6000 m, bearing −70…70°, a land sector).

Prints the wall time, the process CPU time (user + system; the load of other processes on
the machine inflates wall time but much less CPU time), the peak memory (peak RSS from
resource.getrusage minus the RSS before the call; with --tracemalloc also the peak of
traced allocations, numpy's included), and the ratio of the wall time to the 30 s target.

``--against REV`` measures side by side, in this one process and on the same case, the
gates.py of git revision REV (loaded from ``git show REV:src/sceneprior/gates.py``) and the
working tree's, alternating ``--repeat`` times (default 2), and prints the largest
difference of their removed areas [m²] (peak memory is then not separable and not printed).

    python bench/bench_gates.py [--scans 100000] [--gates 10] [--threads 1] [--polar] [--polar-tol 2e-3]
    python bench/bench_gates.py --polar --against HEAD~1 --detections 0
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import resource
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

from sceneprior.gates import Gates, disc_gates, ellipse_gates, in_gates, removed_area
from sceneprior.geometry import PolygonMask, Region, SectorMask, cartesian_to_polar

TARGET_S = 30.0


def _rss_mb() -> float:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 1e6


def make_case(n_scans: int, per_scan: int, polar: bool, seed: int = 2024):
    rng = np.random.default_rng(seed)
    if polar:
        region = Region("polar", (200.0, 6000.0), (-70.0, 70.0),
                        (SectorMask((0.0, 7000.0), (42.0, 70.0), name="land"),))
        box = (-6000.0, 6000.0, 0.0, 6000.0)
    else:
        land = PolygonMask([(0.0, 9000.0), (4000.0, 8200.0), (6500.0, 10500.0),
                            (5200.0, 12800.0), (0.0, 12800.0)], name="land")
        region = Region("cartesian", (0.0, 12800.0), (0.0, 12800.0), (land,))
        box = (-200.0, 13000.0, -200.0, 13000.0)
    grid = region.grid((128, 128))
    G = n_scans * per_scan
    scan = np.repeat(np.arange(n_scans), per_scan)
    x = rng.uniform(box[0], box[1], G)
    y = rng.uniform(box[2], box[3], G)
    half = G // 2
    frame = region.frame
    c0, c1 = (x, y) if frame == "cartesian" else cartesian_to_polar(x, y)
    gd = disc_gates(scan[:half], c0[:half], c1[:half], rng.uniform(50.0, 250.0, half),
                    n_scans=n_scans, frame=frame)
    n_e = G - half
    sd = rng.uniform(20.0, 80.0, (n_e, 2))
    rho = rng.uniform(-0.8, 0.8, n_e)
    cov = np.empty((n_e, 2, 2))
    cov[:, 0, 0], cov[:, 1, 1] = sd[:, 0] ** 2, sd[:, 1] ** 2
    cov[:, 0, 1] = cov[:, 1, 0] = rho * sd[:, 0] * sd[:, 1]
    ge = ellipse_gates(scan[half:], c0[half:], c1[half:], cov, 0.99, n_scans=n_scans, frame=frame)
    return region, grid, Gates.concat(gd, ge)


def _gates_at(rev: str):
    """The gates module of git revision ``rev``, imported as sceneprior._gates_<rev>."""
    root = Path(__file__).resolve().parents[1]
    src = subprocess.run(["git", "-C", str(root), "show", f"{rev}:src/sceneprior/gates.py"],
                         capture_output=True, text=True, check=True).stdout
    path = Path(tempfile.mkdtemp(prefix="bench-gates-")) / "gates.py"
    path.write_text(src)
    name = "sceneprior._gates_" + "".join(c if c.isalnum() else "_" for c in rev)
    spec = importlib.util.spec_from_file_location(name, path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[name] = mod  # dataclasses look their module up here
    spec.loader.exec_module(mod)
    return mod


def side_by_side(args, region, grid, gates, kw) -> None:
    import sceneprior.gates as current

    old = _gates_at(args.against)
    fields = ("scan_index", "x", "y", "l11", "l21", "l22", "n_scans", "source_index")
    res = {}
    for _ in range(args.repeat):
        for label, mod in ((args.against, old), ("working tree", current)):
            g = mod.Gates(**{f: getattr(gates, f) for f in fields})
            cpu0, t0 = time.process_time(), time.perf_counter()
            ex = mod.removed_area(g, region, grid, **kw)
            wall, cpu = time.perf_counter() - t0, time.process_time() - cpu0
            print(f"  {label:>14}: removed_area wall {wall:.2f} s, CPU {cpu:.2f} s "
                  f"(ratio to the {TARGET_S:.0f} s target {wall / TARGET_S:.2f}), load average "
                  f"{os.getloadavg()[0]:.2f}", flush=True)
            res[label] = ex
            del ex, g
    a, b = res[args.against], res["working tree"]
    d = abs(a.removed - b.removed)
    print(f"  largest |difference| of removed[k, c]: {d.max() if d.nnz else 0.0:.3g} m²; of the per-scan "
          f"totals: {abs(a.per_scan - b.per_scan).max():.3g} m² (nnz {a.removed.nnz} vs {b.removed.nnz})")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scans", type=int, default=100_000)
    ap.add_argument("--gates", type=int, default=10, help="gates per scan")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--block-pairs", type=int, default=None)
    ap.add_argument("--polar", action="store_true")
    ap.add_argument("--polar-tol", type=float, default=None, help="removed_area polar_tol")
    ap.add_argument("--tracemalloc", action="store_true", help="also trace allocations (slower)")
    ap.add_argument("--detections", type=int, default=1_000_000,
                    help="detections to flag with in_gates (0: skip)")
    ap.add_argument("--against", metavar="REV", help="also time gates.py of git revision REV, side by side")
    ap.add_argument("--repeat", type=int, default=2, help="alternations with --against")
    args = ap.parse_args()

    region, grid, gates = make_case(args.scans, args.gates, args.polar)
    kw = {"threads": args.threads}
    if args.block_pairs:
        kw["block_pairs"] = args.block_pairs
    if args.polar_tol:
        kw["polar_tol"] = args.polar_tol
    print(f"case: {'polar' if args.polar else 'cartesian'} 128x128 grid, {args.scans} scans x "
          f"{args.gates} gates = {gates.n_gates} gates, threads={args.threads}, "
          f"cpus={os.cpu_count()}, load average {os.getloadavg()[0]:.2f}")
    if args.against:
        side_by_side(args, region, grid, gates, kw)
        return
    if args.tracemalloc:
        tracemalloc.start()
    rss0 = _rss_mb()
    cpu0, t0 = time.process_time(), time.perf_counter()
    ex = removed_area(gates, region, grid, **kw)
    wall, cpu = time.perf_counter() - t0, time.process_time() - cpu0
    peak_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e3  # kB -> MB (Linux)
    print(f"removed_area: wall {wall:.2f} s, CPU {cpu:.2f} s, ratio to the {TARGET_S:.0f} s "
          f"target {wall / TARGET_S:.2f} (CPU {cpu / TARGET_S:.2f})")
    print(f"  pairs {ex.n_pairs}, overlap groups {ex.n_overlap_groups}, nnz {ex.removed.nnz}, "
          f"lines {ex.lines}, polar sides {ex.polar_sides}")
    print(f"  memory: peak RSS {peak_rss:.0f} MB (RSS before the call {rss0:.0f} MB, "
          f"peak increase <= {peak_rss - rss0:.0f} MB; result CSR "
          f"{(ex.removed.data.nbytes + ex.removed.indices.nbytes + ex.removed.indptr.nbytes) / 1e6:.0f} MB)")
    if args.tracemalloc:
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        print(f"  tracemalloc peak {peak / 1e6:.0f} MB")
    print(f"  mean removed area per scan {ex.per_scan.mean():.0f} m² "
          f"({ex.per_scan.mean() / ex.window_area.sum():.4%} of the window)")
    if args.detections:
        rng = np.random.default_rng(7)
        n = args.detections
        s = rng.integers(0, args.scans, n)
        pick = rng.integers(0, gates.n_gates, n)
        dx = gates.x[pick] + rng.normal(0.0, 150.0, n)
        dy = gates.y[pick] + rng.normal(0.0, 150.0, n)
        t0 = time.perf_counter()
        flag = in_gates(gates, s, dx, dy)
        print(f"in_gates: {n} detections in {time.perf_counter() - t0:.2f} s wall "
              f"({int(flag.sum())} inside a gate of their scan)")


if __name__ == "__main__":
    main()
