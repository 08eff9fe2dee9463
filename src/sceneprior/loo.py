"""Model comparison by PSIS-LOO over scans, leave-block-out, and ``sceneprior rank``.

Scans are the exchangeable units (not cells): the pointwise log-likelihood of scan k is
its set log-density in the point-process measure (DESIGN.md §2, §7),

    log f(Z_k | θ) = Σ_c n_kc log λ_c + n_k log m_k − m_k Λ_k     (Poisson)
                     with −m_kΛ_k replaced by the negative-binomial term when over-dispersed,
                     Λ_k = Σ_c λ_c |c ∩ W_k| (W_k: the window minus scan k's gates, if any)

(``models.likelihood.per_scan_loglik_general``), evaluated at the run's kept cell draws.
PSIS-LOO (Vehtari, Gelman & Gabry 2017; Vehtari et al. 2024) is computed by arviz
(``az.loo``), Pareto k > 0.7 flagged. Because consecutive scans are dependent under
weather, leave-block-out (blocks of consecutive scans, hours, days, or episodes named by a
scans-table column) is reported beside it: the block log-likelihood is the sum over its
scans and is importance-sampled the same way (its k's are larger; when they exceed 0.7 the
block estimate is unreliable and an exact refit per block would be needed).

Comparable runs (``check_comparable``): the same data (SHA-256 of the detections and scans
tables), the same window (frame, bounds, masks; grids may differ), the same handling of
detections outside the bounds, and likelihoods in the same measure. Intensities per m²
(area measure) are what every sceneprior model writes; a run whose cell draws are per m
of range per degree/radian of bearing is in the polar measure: degrees and radians differ
by the constant n_k·log(180/π) per scan (reconciled exactly); polar and area measures
differ by the Jacobian Σ_i log r_i over the scan's detections, reconciled when the
recorded detections table is still there with its hash, refused otherwise.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from .errors import InputError

PARETO_K_MAX = 0.7
AREA_UNITS = "m-2 scan-1"
POLAR_UNITS = {"m-1 rad-1 scan-1": "rad", "m-1 radian-1 scan-1": "rad",
               "m-1 degree-1 scan-1": "degree", "m-1 deg-1 scan-1": "degree"}


# ----------------------------------------------------------------------------- measure
def run_measure(run) -> dict:
    units = str(run.cell_draws["intensity"].attrs.get("units", ""))
    if units == AREA_UNITS:
        return {"space": "area", "angle": None, "units": units}
    if units in POLAR_UNITS:
        return {"space": "polar", "angle": POLAR_UNITS[units], "units": units}
    raise InputError(f"{run.path}: cell_draws.nc intensity is in '{units}', which cannot be put in "
                     f"common units (expected '{AREA_UNITS}' or per m of range per rad/degree of bearing)")


def pointwise_loglik(run, rd=None) -> np.ndarray:
    """(S_c, K) per-scan set log-density at the kept cell draws, in the run's own measure."""
    from .models.likelihood import per_scan_loglik_general
    from .predictive import load_draws

    rd = rd or load_draws(run, max_draws=None)
    log_lam, lm, phi, base = rd.at_cell_draws()
    return per_scan_loglik_general(log_lam, rd.scan_cell, rd.window_area, lm, phi, Lam=base,
                                   removed=rd.removed)


def _idata(ll: np.ndarray, run):
    import arviz as az

    step = int(run.cell_draws.attrs.get("thinning", 1))
    post = run.posterior.posterior
    C, D = int(post.sizes["chain"]), int(post.sizes["draw"])
    if step == 1 and ll.shape[0] == C * D:
        ll3 = ll.reshape(C, D, -1)
        rate = np.asarray(post["rate"].values)
    else:
        ll3 = ll[None]
        rate = np.asarray(run.cell_draws["rate"].values)[None]
    return az.from_dict(posterior={"rate": rate}, log_likelihood={"scan_loglik": ll3},
                        dims={"scan_loglik": ["scan"]})


def psis_loo(ll: np.ndarray, run) -> dict:
    """PSIS-LOO over scans via arviz; returns elpd, se, p_loo, pointwise elpd and k."""
    import arviz as az

    res = az.loo(_idata(ll, run), pointwise=True)
    k = np.asarray(res.pareto_k.values, dtype=float)
    good = float(getattr(res, "good_k", PARETO_K_MAX) or PARETO_K_MAX)
    return {"elpd": float(res.elpd_loo), "se": float(res.se), "p_loo": float(res.p_loo),
            "pointwise": np.asarray(res.loo_i.values, dtype=float), "pareto_k": k,
            "k_threshold": min(good, PARETO_K_MAX), "n_bad_k": int((k > min(good, PARETO_K_MAX)).sum()),
            "n": int(k.size)}


def psis_log_weights(ll: np.ndarray):
    """PSIS-smoothed normalised leave-one-out log weights (K, S) and k (K,) for the columns
    of ll (S, K) (arviz.psislw of −ll; Vehtari et al. 2024)."""
    import arviz as az

    lw, k = az.psislw(-np.asarray(ll, float).T)
    return np.asarray(lw), np.asarray(k)


def block_ids(rd, blocks) -> tuple[np.ndarray, str]:
    """Block index of every scan: ``int`` N consecutive scans (time order), "hour", "day",
    or "column:NAME" (episodes named by a scans-table column)."""
    from .predictive import scan_meta

    K = rd.n_scans
    if blocks is None:
        blocks = 25
    if isinstance(blocks, str) and blocks.isdigit():
        blocks = int(blocks)
    if isinstance(blocks, int):
        if blocks < 1:
            raise InputError(f"--blocks must be ≥ 1 scans, got {blocks}")
        ids = np.empty(K, np.int64)
        ids[rd.order] = np.arange(K) // blocks
        return ids, f"{blocks} consecutive scans"
    if blocks in ("hour", "day"):
        if rd.time_s is None:
            raise InputError(f"--blocks {blocks} needs a time column in the scans table")
        width = 3600.0 if blocks == "hour" else 86400.0
        _, ids = np.unique(np.floor(rd.time_s / width), return_inverse=True)
        return ids.reshape(-1), f"one {blocks} per block"
    if isinstance(blocks, str) and blocks.startswith("column:"):
        col = blocks.split(":", 1)[1]
        meta = scan_meta(rd.run)
        if col not in meta:
            raise InputError(f"--blocks {blocks}: the scans table has no column '{col}' "
                             f"(columns: {', '.join(sorted(meta)) or 'none'})")
        v = np.asarray(meta[col]).astype(str)
        # consecutive runs of the same value form one episode
        ordered = v[rd.order]
        ep = np.concatenate([[0], np.cumsum(ordered[1:] != ordered[:-1])])
        ids = np.empty(K, np.int64)
        ids[rd.order] = ep
        return ids, f"episodes of column '{col}'"
    raise InputError(f"--blocks must be a number of scans, 'hour', 'day' or 'column:NAME', got {blocks!r}")


def leave_block_out(ll: np.ndarray, ids: np.ndarray) -> dict:
    """PSIS leave-block-out: block log-likelihoods Σ_{k∈b} log f(Z_k|θ), importance-sampled."""
    from scipy.special import logsumexp

    B = int(ids.max()) + 1
    llb = np.zeros((ll.shape[0], B))
    np.add.at(llb.T, ids, ll.T)
    lw, k = psis_log_weights(llb)
    elpd_b = logsumexp(llb.T + lw, axis=1)
    return {"elpd": float(elpd_b.sum()), "se": float(np.sqrt(B * elpd_b.var())), "n_blocks": B,
            "pointwise": elpd_b, "pareto_k": k, "n_bad_k": int((k > PARETO_K_MAX).sum())}


# ----------------------------------------------------------------------------- comparability
def _space_key(run) -> dict:
    sc = (run.summary.get("data") or {}).get("spec_content") or {}
    space = dict(sc.get("space") or {})
    space.pop("cells", None)
    return space


def _data_key(run) -> tuple:
    d = run.summary.get("data") or {}
    sc = d.get("spec_content") or {}
    dd = sc.get("data") or {}
    return (tuple(sorted((d.get("inputs_sha256") or {}).values())), d.get("scans"),
            d.get("detections_used"), dd.get("outside", "error"),
            tuple(sorted((dd.get("columns") or {}).items())))


def check_comparable(runs) -> list[dict]:
    """Raise InputError (one line) unless every run scores the same data in a measure that
    can be reconciled; returns each run's measure."""
    first = runs[0]
    for r in runs[1:]:
        if _data_key(r)[0] != _data_key(first)[0]:
            raise InputError(f"cannot rank {first.name} and {r.name}: they were fitted to different data "
                             "(the SHA-256 of their detections/scans tables differ); LOO compares models "
                             "on the same data only")
        if _data_key(r)[1:] != _data_key(first)[1:]:
            raise InputError(f"cannot rank {first.name} and {r.name}: the same tables but different scans or "
                             "detections kept (data.outside, column mapping); the likelihoods score different data")
        a, b = first.summary["space"], r.summary["space"]
        if (_space_key(r) != _space_key(first) or a.get("frame") != b.get("frame")
                or not math.isclose(a["window_area_m2"], b["window_area_m2"], rel_tol=1e-9)):
            raise InputError(f"cannot rank {first.name} and {r.name}: different windows (frame, bounds or "
                             "masks); the likelihoods are densities over different sets")
    return [run_measure(r) for r in runs]


def _log_range_per_scan(run) -> np.ndarray:
    """Σ_i log r_i per scan over the detections kept in the window, from the recorded
    tables (hash-checked) — the polar/area Jacobian."""
    from .checks import rebuild

    rb = rebuild(run)
    if rb.get("error"):
        raise InputError(f"cannot reconcile the polar and area measures of {run.name}: {rb['error']}")
    rec = rb["recording"]
    if rec.frame != "polar":
        raise InputError(f"{run.name}: per m·rad intensities on a non-polar frame cannot be reconciled")
    return np.bincount(rec.scan_index, weights=np.log(rec.c0), minlength=rec.n_scans)


def to_area_measure(ll: np.ndarray, run, measure: dict, n: np.ndarray) -> tuple[np.ndarray, str]:
    """Per-scan log-densities converted to the area (per m²) measure."""
    if measure["space"] == "area":
        return ll, "area measure (per m²) as fitted"
    out = ll
    note = []
    if measure["angle"] == "degree":
        out = out + n[None, :] * math.log(180.0 / math.pi)  # per degree → per rad
        note.append("per degree → per rad: + n_k·log(180/π)")
    out = out - _log_range_per_scan(run)[None, :]
    note.append("per m·rad → per m²: − Σ_i log r_i per scan (ranges from the recorded table)")
    return out, "; ".join(note)


# ----------------------------------------------------------------------------- rank
def rank_runs(paths, blocks=None) -> dict:
    """PSIS-LOO per scan and leave-block-out for each run, ranked by elpd, with the paired
    standard error of each difference to the best (Vehtari, Gelman & Gabry 2017, §5)."""
    from .predictive import load_draws
    from .results import load_run

    if len(paths) < 2:
        raise InputError("rank needs at least two runs fitted to the same data")
    runs = [load_run(p) for p in paths]
    names = [r.name for r in runs]
    if len(set(names)) != len(names):
        names = [f"{r.name} ({r.path})" for r in runs]
    measures = check_comparable(runs)
    spaces = {m["space"] for m in measures}
    angles = {m["angle"] for m in measures if m["space"] == "polar"}
    entries = []
    for run, name, m in zip(runs, names, measures):
        rd = load_draws(run, max_draws=None)
        ll = pointwise_loglik(run, rd)
        note = "area measure (per m²) as fitted"
        if len(spaces) > 1 or len(angles) > 1:
            ll, note = to_area_measure(ll, run, m, rd.n.astype(float))
        loo = psis_loo(ll, run)
        ids, bdesc = block_ids(rd, blocks)
        lbo = leave_block_out(ll, ids)
        entries.append({"run": name, "path": str(run.path), "kind": run.summary["model"]["kind"],
                        "measure": note, "loo": loo, "block": lbo, "block_definition": bdesc})
    order = sorted(range(len(entries)), key=lambda i: -entries[i]["loo"]["elpd"])
    best = entries[order[0]]
    table = []
    for i in order:
        e = entries[i]
        d = e["loo"]["pointwise"] - best["loo"]["pointwise"]
        db = e["block"]["pointwise"] - best["block"]["pointwise"]
        table.append({
            "run": e["run"], "kind": e["kind"], "path": e["path"],
            "elpd_loo": e["loo"]["elpd"], "se": e["loo"]["se"], "p_loo": e["loo"]["p_loo"],
            "elpd_diff": float(d.sum()), "se_diff": float(np.sqrt(d.size * d.var())),
            "pareto_k_bad": e["loo"]["n_bad_k"], "pareto_k_threshold": e["loo"]["k_threshold"],
            "pareto_k_max": float(e["loo"]["pareto_k"].max()),
            "elpd_block": e["block"]["elpd"], "elpd_block_diff": float(db.sum()),
            "se_block_diff": float(np.sqrt(db.size * db.var())),
            "blocks": e["block"]["n_blocks"], "block_pareto_k_bad": e["block"]["n_bad_k"],
            "measure": e["measure"],
        })
    return {"scans": int(entries[0]["loo"]["n"]), "block_definition": entries[0]["block_definition"],
            "ranking": table,
            "note": "elpd = expected log predictive density per scan set, summed over scans, in the "
                    "point-process (set-density, per m²) measure; differences are to the best run, "
                    "SE of a difference from the paired pointwise differences"}


def format_rank(res: dict) -> str:
    lines = [f"PSIS-LOO over {res['scans']} scans (point-process measure, per m²); leave-block-out "
             f"with {res['block_definition']}",
             f"  {'run':<28} {'kind':<34} {'elpd_loo':>11} {'Δelpd':>9} {'SE(Δ)':>7} {'p_loo':>6} "
             f"{'k>thr':>5} {'Δelpd_block':>12} {'SE':>7}"]
    for r in res["ranking"]:
        lines.append(f"  {r['run'][:28]:<28} {r['kind'][:34]:<34} {r['elpd_loo']:11.1f} {r['elpd_diff']:9.1f} "
                     f"{r['se_diff']:7.1f} {r['p_loo']:6.1f} {r['pareto_k_bad']:5d} "
                     f"{r['elpd_block_diff']:12.1f} {r['se_block_diff']:7.1f}")
    for r in res["ranking"]:
        if r["pareto_k_bad"]:
            lines.append(f"  warning: {r['run']}: {r['pareto_k_bad']} scan(s) with Pareto k > "
                         f"{r['pareto_k_threshold']:.2f} (max {r['pareto_k_max']:.2f}); PSIS-LOO is unreliable "
                         "for them — refit without those scans, or use more draws")
        if r["block_pareto_k_bad"]:
            lines.append(f"  warning: {r['run']}: {r['block_pareto_k_bad']} of {r['blocks']} blocks with Pareto "
                         f"k > {PARETO_K_MAX}; the leave-block-out estimate is unreliable for them")
        if r["measure"] != "area measure (per m²) as fitted":
            lines.append(f"  note: {r['run']}: reconciled — {r['measure']}")
    lines.append("  " + res["note"])
    return "\n".join(lines)
