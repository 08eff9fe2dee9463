"""Births and detection outcomes from a track log (the objects table).

A track log lists, per scan, the known objects: scan id, object id and position (the
objects table, read and validated by :mod:`sceneprior.tables`). This module turns it
into the data two fits need, on plain arrays (no I/O, no jax; reading the tables and
writing the birth model's input is :mod:`sceneprior.births`):

* :func:`derive_births` — birth events for the birth model (``models/mixture_kind.py``):
  the first appearance of each object, with left-censoring at the start of the recording
  and after data gaps, and the list of *exposed steps* (the steps at which a birth could
  have been seen). ``births.write_births`` writes them in the birth model's input contract:
  ``births.csv`` (``step``, ``x``, ``y`` [m], ``vx``, ``vy`` [m/s], …), ``steps.csv``
  (``step``, ``duration`` [s], ``time``) and ``births.json`` (counts and rules).
* :func:`detection_outcomes` — for each known object and scan, detected or not: a
  detection of that scan inside the object's gate (``gates.in_gates``), the data of the
  detection-probability fit (``models/detection.py``).

Steps, gaps and censoring
-------------------------
Scans are ordered by time (by id when the scans table has no time). Step k is the
interval from scan k−1 to scan k; an object first listed at scan k was born in step k.
A **data gap** before scan k is, when the scans have times, a jump in scan time larger
than ``gap_factor`` × the median scan period (default 1.5) — the ids are then not looked
at, so a log that keeps every other frame (ids 0, 2, 4, … at regular times) has no gaps;
without times, a jump in whole-number scan ids larger than ``gap_factor`` × the median id
step. A scan list in which half the steps or more would be gaps is refused: the period
cannot be told from the gaps (at most half the steps can exceed ``gap_factor`` > 1 times
the median, so this happens only when the steps are as often long as short). Objects listed at the first scan, or at the first scan after a gap, may
have appeared at any time before: they are **left-censored**, not births, and those steps
leave the birth exposure — the exposed-steps table omits them, so the birth model sees
fewer steps (a births table alone would bias the rate downward; counting censored objects
would bias it upward). With ``settle_scans = h`` the h scans after the start and after
every gap are censored as well (see the detection lag below).

Reappearing ids (the rule)
--------------------------
An id unseen for more than ``max_unseen`` consecutive scans of the scan list (default 3)
that reappears starts a new segment: a new object for the birth model — a birth if its
step is exposed, censored if it reappears at a censored step (the first scan after a data
gap: it may have been there all along). An id back within ``max_unseen`` scans continues
its segment (missed annotations or detections, not a new object). Justification: a
tracker deletes a track after a few consecutive misses (common practice, no source) and
must then start a new one from its birth intensity, so the birth model should count such
re-entries; set ``max_unseen`` to the tracker's deletion threshold. Unseen scans are
counted in the scan list, so a data gap itself never counts as unseen time.

Detection lag (P_D < 1)
-----------------------
If the log was built from detections (a tracker's output rather than annotated truth),
an object born at scan a is first listed at scan a + L, where the number of missed scans
L is geometric: P(L = l) = (1 − P_D)^l P_D, E[L] = (1 − P_D)/P_D steps, Var[L] =
(1 − P_D)/P_D² (scipy.stats.geom(P_D, loc=−1)). Its first listed position is shifted by
about v·E[L]·T (velocity v, scan period T) along its track. With ``detection_probability``
given, two corrections apply (off by default, because the default reading of the log is
annotated truth listing each object from its appearance):

1. the first ``settle_scans`` scans after the start and after each gap are censored too,
   by default the smallest h with (1 − P_D)^(h+1) ≤ 0.01, so that an object present at the
   start is listed within the censored scans with probability ≥ 99 % (else it would be a
   false birth);
2. birth positions are back-propagated by the expected lag with the differenced velocity:
   x̂ = x_f − v̂·T·E[L], v̂ = (x_n − x_f)/Δt from the segment's next row x_n, Δt later
   (constant velocity v assumed); written with the sd of its error as ``x_sd``, ``y_sd``.
   Derivation, per axis, with position noise sd σ (``position_sd``) on every listed row:
   x_f = x_a + v·T·L + e_f and v̂ = v + (e_n − e_f)/Δt, so the error of x̂ about the birth
   position x_a is

       x̂ − x_a = T·v·(L − E[L]) + e_f − T·E[L]·(v̂ − v),

   three terms: L is independent of the noise; v is fixed, so no product of two random
   factors (Goodman's Var(XY)) enters — v̂ multiplies the constant E[L]; and e_f enters both
   x_f and v̂ (Cov(e_f, v̂) = −σ²/Δt). Hence

       Var(x̂ − x_a) = T²·(v²·Var[L] + E[L]²·Var(v̂)) + σ²·(1 + 2·T·E[L]/Δt),
       Var(v̂) = 2σ²/Δt².

   v² is unknown and is replaced by v̂², which overstates it by Var(v̂) on average
   (E[v̂²] = v² + Var(v̂)): the reported sd leans conservative. Subtracting Var(v̂)
   would make the variance unbiased, but the sd is used as a divisor (a z-score, a
   gate) and 1/sd² is convex, so the unbiased variance gives over-confident z-scores
   (P_D = 0.6, 4000 births as in tests/test_tracklog.py: mean z² 1.51 with v̂² − Var(v̂),
   1.16 ± 0.08 with v̂²; the error is not Gaussian — the lag is geometric — so z² has a
   heavy tail, median 0.37).
   The birth keeps the step of its first listing (the mean lag is not a whole step); the
   rate per step is unaffected apart from births in the last E[L] steps of the recording.

Polar positions (range [m], bearing [deg] clockwise from north) are converted to
Cartesian x = r sin θ, y = r cos θ before anything else; velocities are Cartesian [m/s],
by differencing an object's first two rows of its segment (NaN where the segment has one
row, or without scan times).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .geometry import polar_to_cartesian

GAP_FACTOR = 1.5
MAX_UNSEEN = 3
SETTLE_MISS_PROB = 0.01  # P(an object present at the start is still unlisted after the settle scans)

START, GAP = 1, 2  # censoring reasons per scan (0: exposed)


# --------------------------------------------------------------------------- scans
@dataclass(frozen=True)
class ScanSteps:
    """The scan list in time order with its gaps and exposure.

    ``order``: index into the caller's scan arrays of each scan in time order;
    ``gap_before`` (K,) bool: a data gap between scan k−1 and k (time order);
    ``duration`` (K,) [s] t_k − t_{k−1} (NaN for k = 0 or without times);
    ``censor`` (K,) int: 0 exposed, 1 censored at the start, 2 censored after a gap;
    ``period_s``: median scan period [s] (None without times)."""

    order: np.ndarray
    times: np.ndarray | None
    gap_before: np.ndarray
    duration: np.ndarray
    censor: np.ndarray
    period_s: float | None
    gap_factor: float
    settle_scans: int

    @property
    def exposed(self) -> np.ndarray:
        return self.censor == 0


def scan_steps(scan_ids, times=None, *, gap_factor: float = GAP_FACTOR, settle_scans: int = 0,
               scan_period_s: float | None = None) -> ScanSteps:
    """Order the scans, find the data gaps and mark censored steps (module docstring).

    scan_ids (K,): unique ids (whole numbers or text); times (K,) seconds or None. With
    times, a gap is a time jump > gap_factor × the median period (ids not looked at);
    without, scans are ordered by id (which must then be whole numbers), a gap is an id jump
    > gap_factor × the median id step, and ``scan_period_s`` (if given) sets the durations.
    Raises InputError (one line) on bad values, and when half the steps or more are gaps."""
    ids = np.asarray(scan_ids)
    K = ids.size
    if K == 0:
        raise InputError("the scan list is empty: a track log needs the scans it covers")
    if isinstance(gap_factor, bool) or not (isinstance(gap_factor, (int, float)) and math.isfinite(gap_factor)
                                            and gap_factor > 1):
        raise InputError(f"gap factor (--gap-factor) must be a finite number > 1 (a data gap is a step longer "
                         f"than factor × the median step), got {gap_factor!r}")
    if isinstance(settle_scans, bool) or not isinstance(settle_scans, (int, np.integer)) or settle_scans < 0:
        raise InputError(f"settle scans (--settle-scans) must be a whole number ≥ 0, got {settle_scans!r}")
    if times is not None:
        t = np.asarray(times, dtype=np.float64)
        order = np.argsort(t, kind="stable")
        t = t[order]
        dt = np.diff(t)
        if (dt <= 0).any():
            i = int(np.flatnonzero(dt <= 0)[0])
            raise InputError(f"scans {ids[order][i]!r} and {ids[order][i + 1]!r} have the same time "
                             f"{t[i]:g} s; every scan needs its own time")
        period = float(np.median(dt)) if dt.size else (scan_period_s or None)
        gap = np.concatenate([[False], dt > gap_factor * period]) if dt.size else np.zeros(1, bool)
        duration = np.concatenate([[np.nan], dt])
    else:
        if ids.dtype.kind not in "iu":
            raise InputError("scans without a time column are ordered by id, which must then be whole "
                             "numbers; add a 'time' column (seconds or ISO-8601) to the scans table")
        order = np.argsort(ids, kind="stable")
        t = None
        period = float(scan_period_s) if scan_period_s else None
        jump = np.diff(ids[order].astype(np.int64))  # > 0: ids are unique
        gap = np.concatenate([[False], jump > gap_factor * np.median(jump)]) if jump.size else np.zeros(1, bool)
        duration = np.full(K, np.nan)
        if period is not None:
            duration[1:] = period * jump.astype(float)
    if gap.any() and 2 * int(gap.sum()) >= K - 1:
        what = ("scan times: their steps" if times is not None else
                "scan ids (no times): their id steps")
        raise InputError(f"{int(gap.sum())} of the {K - 1} steps between the {what} are longer than "
                         f"{gap_factor:g} × their median, so the scan period cannot be told from data gaps; "
                         "check the scans table's order and times, or raise --gap-factor")
    censor = np.zeros(K, np.int8)
    idx = np.arange(K)
    starts = np.flatnonzero(gap)
    if starts.size:
        # distance to the latest gap at or before each scan
        last = np.maximum.accumulate(np.where(gap, idx, -1))
        censor[(last >= 0) & (idx - last <= settle_scans)] = GAP
    censor[: settle_scans + 1] = START
    return ScanSteps(order=order, times=t, gap_before=gap, duration=duration, censor=censor,
                     period_s=period, gap_factor=float(gap_factor), settle_scans=int(settle_scans))


def settle_scans_for(detection_probability: float) -> int:
    """Smallest h with (1 − P_D)^(h+1) ≤ 0.01: after h + 1 scans an object that was present
    is listed with probability ≥ 99 % (geometric number of misses)."""
    p = float(detection_probability)
    if p >= 1.0:
        return 0
    # h + 1 = ceil(log 0.01 / log(1 − P)); the quotient is a whole number at the boundary cases
    # (P = 0.99: h = 0; P = 0.9: h = 1) but comes out a few ulps above it (1.0000000000000002),
    # so a relative 1e-9 is taken off before rounding up
    x = math.log(SETTLE_MISS_PROB) / math.log1p(-p)
    return max(0, math.ceil(x * (1.0 - 1e-9)) - 1)


def check_detection_probability(p) -> float:
    if isinstance(p, bool) or not isinstance(p, (int, float)) or not (0 < p <= 1):
        raise InputError(f"detection probability (--detection-probability) must lie in (0, 1], got {p!r}")
    return float(p)


# --------------------------------------------------------------------------- births
@dataclass
class Births:
    """Birth events and exposed steps derived from a track log (arrays in time order).

    Birth arrays (B,): ``step`` (scan id of the first listing), ``scan_pos`` (position in
    time order), ``object_id``, ``x``, ``y`` [m] (lag-corrected when asked), ``x_raw``,
    ``y_raw`` [m] (first listed position), ``vx``, ``vy`` [m/s] (NaN where not available),
    ``x_sd``, ``y_sd`` [m] (the lag correction's sd; None without it), ``reappearance``
    (bool: a reused id). ``steps``: the :class:`ScanSteps`; ``scan_ids`` in time order."""

    step: np.ndarray
    scan_pos: np.ndarray
    object_id: np.ndarray
    x: np.ndarray
    y: np.ndarray
    x_raw: np.ndarray
    y_raw: np.ndarray
    vx: np.ndarray
    vy: np.ndarray
    reappearance: np.ndarray
    steps: ScanSteps
    scan_ids: np.ndarray
    counts: dict
    rules: dict
    x_sd: np.ndarray | None = None
    y_sd: np.ndarray | None = None
    censored_ids: dict = field(default_factory=dict)  # reason -> object ids (first rows of censored segments)

    @property
    def n_births(self) -> int:
        return int(self.step.size)

    @property
    def n_exposed(self) -> int:
        return int(self.steps.exposed.sum())


def derive_births(scan_ids, times, obj_scan_index, object_id, c0, c1, *, frame: str = "cartesian",
                  gap_factor: float = GAP_FACTOR, max_unseen: int = MAX_UNSEEN,
                  detection_probability: float | None = None, settle_scans: int | None = None,
                  position_sd: float = 0.0, scan_period_s: float | None = None) -> Births:
    """Birth events from the first appearance of each object (module docstring).

    scan_ids (K,), times (K,) s or None: the scan list (validated, unique ids).
    obj_scan_index (n,): index into ``scan_ids`` of each objects-table row; object_id (n,);
    c0, c1 (n,): x, y [m] or range [m], bearing [deg] (``frame``). Each (object, scan) pair
    must be unique (the table reader refuses duplicates). Vectorised: sorts and
    differences, no loop per object or scan."""
    if isinstance(max_unseen, bool) or not isinstance(max_unseen, (int, np.integer)) or max_unseen < 0:
        raise InputError(f"max unseen scans (--max-unseen) must be a whole number ≥ 0, got {max_unseen!r}")
    if isinstance(position_sd, bool) or not (isinstance(position_sd, (int, float)) and position_sd >= 0
                                             and math.isfinite(position_sd)):
        raise InputError(f"position sd (--position-sd) must be a finite number ≥ 0 (m), got {position_sd!r}")
    p = None if detection_probability is None else check_detection_probability(detection_probability)
    if settle_scans is None:
        settle_scans = settle_scans_for(p) if p is not None else 0
    st = scan_steps(scan_ids, times, gap_factor=gap_factor, settle_scans=settle_scans,
                    scan_period_s=scan_period_s)
    K = st.order.size
    rank = np.empty(K, np.int64)
    rank[st.order] = np.arange(K)  # caller's scan index -> position in time order
    s = rank[np.asarray(obj_scan_index, np.int64)]
    c0 = np.asarray(c0, np.float64)
    c1 = np.asarray(c1, np.float64)
    x, y = polar_to_cartesian(c0, c1) if frame == "polar" else (c0, c1)
    oid = np.asarray(object_id)
    n = s.size
    _, code = np.unique(oid, return_inverse=True) if n else (None, np.zeros(0, np.int64))
    code = np.asarray(code).reshape(-1)
    o = np.lexsort((s, code))  # by object, then time
    s_o, c_o = s[o], code[o]
    same = np.concatenate([[False], c_o[1:] == c_o[:-1]])
    if n and (same & (np.diff(s_o, prepend=-1) == 0)).any():
        i = o[np.flatnonzero(same & (np.diff(s_o, prepend=-1) == 0))[0]]
        raise InputError(f"object id {oid[i]!r} is listed twice in one scan (row {i + 1} of the objects "
                         "table); each object may appear once per scan")
    unseen = np.where(same, s_o - np.concatenate([[0], s_o[:-1]]) - 1, -1)
    seg_start = ~same | (unseen > max_unseen)
    reappear = same & seg_start
    seg_id = np.cumsum(seg_start) - 1
    first = np.flatnonzero(seg_start)
    # next row of the same segment (for velocities by differencing)
    nxt = np.arange(n) + 1
    has_next = np.zeros(n, bool)
    has_next[:-1] = seg_id[1:] == seg_id[:-1]
    fs = s_o[first]
    reason = st.censor[fs]
    born = reason == 0
    bi = first[born]  # sorted-row index of each birth
    t = st.times
    dt = None
    vx = np.full(bi.size, np.nan)
    vy = np.full(bi.size, np.nan)
    xo, yo = x[o], y[o]
    ok = has_next[bi]
    if t is not None or st.period_s is not None:
        tt = t if t is not None else np.asarray(scan_ids)[st.order].astype(float) * st.period_s
        j = nxt[bi[ok]]
        dt = tt[s_o[j]] - tt[s_o[bi[ok]]]
        vx[ok] = (xo[j] - xo[bi[ok]]) / dt
        vy[ok] = (yo[j] - yo[bi[ok]]) / dt
    bx, by = xo[bi].copy(), yo[bi].copy()
    x_sd = y_sd = None
    lag = None
    if p is not None and p < 1.0:
        if st.period_s is None:
            raise InputError("the detection-lag correction needs scan times (a 'time' column in the scans "
                             "table) or a scan period")
        m = (1.0 - p) / p
        var_l = (1.0 - p) / (p * p)
        T = st.period_s
        have_v = np.isfinite(vx)
        var_v = np.full(bi.size, np.nan)
        if dt is not None:
            var_v[ok] = 2.0 * position_sd**2 / dt**2
        bx = np.where(have_v, bx - vx * T * m, bx)
        by = np.where(have_v, by - vy * T * m, by)
        s2 = position_sd**2  # the first listed position's own noise
        cross = np.full(bi.size, np.nan)  # σ²·2·T·E[L]/Δt: e_f in both x_f and v̂ (module docstring)
        if dt is not None:
            cross[ok] = 2.0 * s2 * T * m / dt

        def lag_sd(v):  # v² estimated by v̂² (conservative; module docstring)
            var = T * T * (v**2 * var_l + m * m * var_v) + s2 + cross
            return np.where(have_v, np.sqrt(var), np.nan)

        x_sd, y_sd = lag_sd(vx), lag_sd(vy)
        lag = {"expected_missed_scans": m, "variance_missed_scans": var_l, "scan_period_s": T,
               "expected_shift": "v·T·(1 − P_D)/P_D along the track",
               "births_without_velocity_uncorrected": int((~have_v).sum())}
    first_rows = o[first]
    censored_ids = {"start": oid[first_rows[reason == START]], "gap": oid[first_rows[reason == GAP]]}
    counts = {
        "births": int(born.sum()),
        "censored_at_start": int((reason == START).sum()),
        "censored_after_gaps": int((reason == GAP).sum()),
        "reappearances": int(reappear.sum()),
        "reappearances_counted_as_births": int((reappear[first] & born).sum()),
        "reappearances_censored": int((reappear[first] & ~born).sum()),
        "objects": int(np.unique(code).size) if n else 0,
        "segments": int(first.size),
        "rows": int(n),
        "scans": int(K),
        "exposed_steps": int(st.exposed.sum()),
        "censored_steps": int(K - st.exposed.sum()),
        "data_gaps": int(st.gap_before.sum()),
    }
    ids_t = np.asarray(scan_ids)[st.order]
    rules = {
        "gap": (f"a time jump > {gap_factor:g} × the median scan period"
                + (f" ({gap_factor * st.period_s:.4g} s)" if st.period_s else "") + "; scan ids not looked at"
                if st.times is not None else
                f"no scan times: a jump in whole-number scan ids > {gap_factor:g} × the median id step"),
        "censoring": f"objects first listed at the first {settle_scans + 1} scan(s) of the recording or "
                     f"after a gap are left-censored; those steps are not exposed",
        "reappearance": f"an id unseen for more than {max_unseen} scans that reappears is a new object "
                        "(a birth if its step is exposed, censored otherwise)",
        "velocity": "Cartesian m/s by differencing the first two rows of a segment; NaN where the "
                    "segment has one row or no scan times",
        "frame": "cartesian state space, metres (polar positions converted: x = r sin θ, y = r cos θ, "
                 "bearing in degrees clockwise from north)",
        "max_unseen_scans": int(max_unseen),
        "gap_factor": float(gap_factor),
        "settle_scans": int(settle_scans),
        "median_scan_period_s": st.period_s,
        "detection_probability": p,
        "lag_correction": lag if lag is not None else "off (the log is read as listing each object from its "
                                                      "appearance)",
        "gaps_before_scans": [v.item() if hasattr(v, "item") else v for v in ids_t[st.gap_before]],
    }
    t_order = np.argsort(fs[born], kind="stable")  # births in time order (then by object)
    x_sd, y_sd = (None, None) if x_sd is None else (x_sd[t_order], y_sd[t_order])
    return Births(step=ids_t[fs[born]][t_order], scan_pos=fs[born][t_order], object_id=oid[o[bi]][t_order],
                  x=bx[t_order], y=by[t_order], x_raw=xo[bi][t_order], y_raw=yo[bi][t_order], vx=vx[t_order],
                  vy=vy[t_order], reappearance=reappear[bi][t_order], steps=st, scan_ids=ids_t, counts=counts,
                  rules=rules, x_sd=x_sd, y_sd=y_sd, censored_ids=censored_ids)


def birth_rate_posterior(n_births, n_exposed, shape: float = 1.0, rate: float = 0.1,
                         probs=(0.05, 0.5, 0.95)) -> dict:
    """Conjugate posterior of the birth rate per exposed step: births ~ Poisson(ρ·K_exposed),
    ρ ~ Gamma(shape, rate) ⇒ ρ | data ~ Gamma(shape + B, rate + K_exposed) (Gelman et al.,
    Bayesian Data Analysis 3rd ed., §2.6). Default prior Gamma(1, 0.1 step): mean 10 births
    per step, worth a tenth of a step — the mixture model's default weight prior.
    Vectorised over arrays of (n_births, n_exposed)."""
    from scipy.stats import gamma

    a = shape + np.asarray(n_births, float)
    b = rate + np.asarray(n_exposed, float)
    q = {f"q{round(100 * pr):02d}": gamma.ppf(pr, a, scale=1.0 / b) for pr in probs}
    return {"mean": a / b, "sd": np.sqrt(a) / b, **q, "shape": a, "rate": b}


def births_summary(b: Births, prior_shape: float = 1.0, prior_rate: float = 0.1) -> dict:
    """The JSON summary of a births derivation (counts, rules, conjugate birth rate)."""
    post = birth_rate_posterior(b.n_births, b.n_exposed, prior_shape, prior_rate)
    rate = {k: float(v) for k, v in post.items()}
    out = {
        "counts": dict(b.counts),
        "rules": dict(b.rules),
        "birth_rate_per_step": {
            "units": "new objects per exposed step inside the logged area (count / step)",
            "posterior": "conjugate Gamma(shape + births, rate + exposed steps), BDA3 §2.6",
            "prior": {"shape": prior_shape, "rate_steps": prior_rate},
            **rate,
        },
    }
    if b.steps.period_s:
        out["birth_rate_per_second"] = {
            "units": "new objects per second (per exposed step / median scan period)",
            **{k: float(v) / b.steps.period_s for k, v in post.items() if k in ("mean", "sd", "q05", "q50", "q95")}}
    return out


# --------------------------------------------------------------------------- detection outcomes
def detection_outcomes(gates, det_scan_index, det_c0, det_c1, *, frame: str = "cartesian") -> np.ndarray:
    """(G,) bool in the gates' input order: does scan k have a detection inside the gate of
    each known object of scan k (``gates.in_gates``, closed gates)?

    Each gate is given a scan of its own (one pseudo-scan per gate) and the detections of
    scan k are repeated for every gate of scan k, so ``in_gates`` answers per gate instead
    of per detection; cost O(Σ_k gates_k × detections_k), vectorised."""
    from .gates import Gates, in_gates

    G = gates.n_gates
    s = np.asarray(det_scan_index, np.int64)
    out = np.zeros(G, bool)
    if G == 0 or s.size == 0:
        return out
    # detections grouped by scan; for every gate (sorted by scan) the detection range of its scan
    o = np.argsort(s, kind="stable")
    s_sorted = s[o]
    lo = np.searchsorted(s_sorted, gates.scan_index, side="left")
    hi = np.searchsorted(s_sorted, gates.scan_index, side="right")
    cnt = hi - lo
    gate_of_pair = np.repeat(np.arange(G), cnt)
    start = np.cumsum(cnt) - cnt
    det_of_pair = o[lo[gate_of_pair] + (np.arange(int(cnt.sum())) - start[gate_of_pair])]
    pseudo = Gates(scan_index=np.arange(G, dtype=np.int64), x=gates.x, y=gates.y, l11=gates.l11,
                   l21=gates.l21, l22=gates.l22, n_scans=G, source_index=np.arange(G, dtype=np.int64))
    hit = in_gates(pseudo, gate_of_pair, np.asarray(det_c0, float)[det_of_pair],
                   np.asarray(det_c1, float)[det_of_pair], frame=frame)
    per_gate = np.bincount(gate_of_pair[hit], minlength=G) > 0
    out[gates.source_index] = per_gate
    return out
