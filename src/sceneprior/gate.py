"""The convergence gate: may a posterior be handed to a tracker?

A run passes when (issue 5; Vehtari et al. 2021 for the diagnostics themselves):

* every hyperparameter and every region or zone rate has rank-normalised split R-hat
  ≤ 1.01 and bulk ESS ≥ 400;
* the sampler reported no divergent transition;
* when the run has per-cell parameters (a field or a per-cell intensity in the posterior),
  the 99th percentile of their R-hat over the cells is ≤ 1.02 and their median bulk ESS is
  ≥ 400 — a maximum over 10⁴ cells would fail healthy runs by chance;
* when a per-cell quantile is to be exported, the tail ESS of the rates and
  hyperparameters is ≥ 400 as well (quantiles live in the tails).

The same function judges a run read back from disk (``summary.json`` diagnostics and
``posterior.nc``; :func:`check_run`) and a fit still in memory (:func:`check_fit`), so
``sceneprior fit`` and ``sceneprior export`` cannot disagree. ``fit`` writes the verdict
into summary.json ("gate") and exits 3 when it fails; ``export`` refuses (exit 3) unless
overridden, and an override is written into the exported file.

Which posterior variables are what: the "scalar" group is every variable the fit's
diagnostics list (the rate and the model's ``hyper`` sites, worst element of a vector
site) plus any other posterior variable whose name contains "rate" or that has a ``zone``
dimension (zone rates), with R-hat and ESS from arviz. The cell checks are made on the
per-cell intensity draws of the cells inside the window — what is exported, and what
every model leaves in cell_draws.nc even when its latent field is not kept in
posterior.nc — by :func:`cell_diagnostics` (the same estimators, vectorised over cells);
they do not apply to a map that is uniform over the cells.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import ConvergenceGateError

R_HAT_MAX = 1.01
ESS_BULK_MIN = 400.0
ESS_TAIL_MIN = 400.0
CELL_R_HAT_Q99_MAX = 1.02
CELL_ESS_BULK_MEDIAN_MIN = 400.0
THRESHOLDS = {
    "r_hat_max": R_HAT_MAX,
    "ess_bulk_min": ESS_BULK_MIN,
    "ess_tail_min_for_quantile_export": ESS_TAIL_MIN,
    "divergences_max": 0,
    "cell_r_hat_q99_max": CELL_R_HAT_Q99_MAX,
    "cell_ess_bulk_median_min": CELL_ESS_BULK_MEDIAN_MIN,
}


@dataclass(frozen=True)
class Check:
    """One comparison of a diagnostic with its limit."""

    variable: str
    diagnostic: str  # r_hat, ess_bulk, ess_tail, divergences, cell_r_hat_q99, cell_ess_bulk_median
    value: float
    limit: float
    op: str  # "<=" or ">="

    @property
    def passed(self) -> bool:
        if not math.isfinite(self.value):
            return False
        return self.value <= self.limit if self.op == "<=" else self.value >= self.limit

    def describe(self) -> str:
        if not math.isfinite(self.value):
            return f"{self.variable}: {self.diagnostic} is not finite ({self.value})"
        if self.passed:
            return f"{self.variable}: {self.diagnostic} {self.value:.4g} {self.op} {self.limit:g}"
        gap = abs(self.value - self.limit)
        how = "above" if self.op == "<=" else "below"
        bad = ">" if self.op == "<=" else "<"
        return (f"{self.variable}: {self.diagnostic} {self.value:.4g} {bad} {self.limit:g} "
                f"({gap:.3g} {how} the limit)")

    def to_dict(self) -> dict:
        return {"variable": self.variable, "diagnostic": self.diagnostic, "value": _json_num(self.value),
                "limit": self.limit, "op": self.op, "passed": self.passed}


@dataclass
class GateResult:
    """The verdict: ``passed``, every check made, and notes (what was not checked and why)."""

    checks: list[Check]
    quantile: bool
    notes: list[str] = field(default_factory=list)

    @property
    def passed(self) -> bool:
        return all(c.passed for c in self.checks)

    @property
    def failures(self) -> list[Check]:
        return [c for c in self.checks if not c.passed]

    def message(self) -> str:
        """One line listing the failed diagnostics and by how much."""
        f = self.failures
        if not f:
            return f"all {len(self.checks)} convergence checks passed"
        return (f"{len(f)} of {len(self.checks)} convergence checks failed: "
                + "; ".join(c.describe() for c in f))

    def to_dict(self) -> dict:
        return {
            "passed": self.passed,
            "quantile_export_checks": self.quantile,
            "thresholds": dict(THRESHOLDS),
            "failures": [c.describe() for c in self.failures],
            "checks": [c.to_dict() for c in self.checks],
            "notes": list(self.notes),
        }


def _json_num(v: float):
    return float(v) if math.isfinite(v) else None


def _worst(vals, worst) -> float:
    a = np.asarray(vals, dtype=float).reshape(-1)
    a = a[np.isfinite(a)] if np.isfinite(a).any() else a
    return float(worst(a)) if a.size else float("nan")


def _is_constant(post, name: str) -> bool:
    v = np.asarray(post[name], dtype=float)
    flat = v.reshape(v.shape[0] * v.shape[1], -1)
    return bool(np.all(np.ptp(flat, axis=0) == 0))


def _sample_dims(post, name: str) -> tuple[str, ...]:
    return tuple(d for d in post[name].dims if d not in ("chain", "draw"))


def classify(post, listed) -> list[str]:
    """Posterior variables to judge besides the listed ones: region and zone rates (a name
    containing "rate", or a ``zone`` dimension)."""
    return [name for name in post.data_vars if name not in listed
            and ("rate" in name or "zone" in _sample_dims(post, name))]


def evaluate(diagnostics: dict, posterior=None, cell_draws=None, quantile: bool = False) -> GateResult:
    """Judge the diagnostics of one posterior.

    diagnostics: the fit's diagnostics dict (``inference.diagnostics``: per-variable
    ``r_hat``, ``ess_bulk``, ``ess_tail``, and ``divergences``) as kept in summary.json.
    posterior: the arviz posterior group (xarray Dataset), for zone rates not listed in the
    diagnostics, or None.
    cell_draws: per-cell intensity draws (chain, draw, n_cells) of the cells inside the
    window, or None; the cell checks apply when the map varies over cells (models with
    per-cell parameters: fields, per-cell levels; for parametric maps they are implied by
    the parameters' own checks and cost little), not to a uniform map.
    quantile: also require tail ESS ≥ 400 of the rates and hyperparameters.
    """
    checks: list[Check] = []
    notes: list[str] = []
    variables = dict(diagnostics.get("variables", {}))
    if posterior is not None:
        import arviz as az

        extra = classify(posterior, set(variables))
        live = [v for v in extra if not _is_constant(posterior, v)]
        if live:
            rh = az.rhat(posterior, var_names=live)
            eb = az.ess(posterior, var_names=live, method="bulk")
            et = az.ess(posterior, var_names=live, method="tail")
            for v in live:
                variables[v] = {"r_hat": _worst(rh[v], np.max), "ess_bulk": _worst(eb[v], np.min),
                                "ess_tail": _worst(et[v], np.min)}
    for name, d in variables.items():
        if posterior is not None and name in posterior.data_vars and _is_constant(posterior, name):
            notes.append(f"{name}: constant over the draws, not checked")
            continue
        checks.append(Check(name, "r_hat", _num(d.get("r_hat")), R_HAT_MAX, "<="))
        checks.append(Check(name, "ess_bulk", _num(d.get("ess_bulk")), ESS_BULK_MIN, ">="))
        if quantile:
            checks.append(Check(name, "ess_tail", _num(d.get("ess_tail")), ESS_TAIL_MIN, ">="))
    checks.append(Check("sampler", "divergences", float(diagnostics.get("divergences", 0)), 0, "<="))
    if cell_draws is None:
        notes.append("no per-cell draws given: cell checks not made")
    else:
        x = np.asarray(cell_draws)
        flat = x.reshape(-1, x.shape[-1])
        if x.shape[-1] < 2 or np.all(np.ptp(flat, axis=1) == 0):
            notes.append("the intensity map is uniform over the cells: per-cell checks do not apply")
        else:
            r, e = cell_diagnostics(x)
            ok = np.isfinite(r) & np.isfinite(e)
            if (~ok).any():
                notes.append(f"{int((~ok).sum())} of {r.size} cells have constant draws (undefined R-hat/ESS) "
                             "and were left out")
            if ok.any():
                what = f"cell intensity ({int(ok.sum())} cells, {x.shape[0]} chains × {x.shape[1]} kept draws)"
                checks.append(Check(what, "cell_r_hat_q99", float(np.percentile(r[ok], 99)),
                                    CELL_R_HAT_Q99_MAX, "<="))
                checks.append(Check(what, "cell_ess_bulk_median", float(np.median(e[ok])),
                                    CELL_ESS_BULK_MEDIAN_MIN, ">="))
    return GateResult(checks=checks, quantile=quantile, notes=notes)


def chains_from_kept(flat: np.ndarray, chains: int, draws_total: int, step: int) -> np.ndarray:
    """(chain, draw, n) from kept draws that are the chain-major flattening of (chain,
    draw) thinned by ``step`` (cell_draws.nc's layout); chains trimmed to a common length."""
    flat = np.asarray(flat)
    per_chain = max(1, draws_total // max(1, chains))
    chain_of = (np.arange(flat.shape[0]) * step) // per_chain
    parts = [flat[chain_of == c] for c in range(chains)]
    m = min(p.shape[0] for p in parts)
    return np.stack([p[:m] for p in parts])


# ----------------------------------------------------------------------- per-cell diagnostics
# arviz computes R-hat and ESS one array element at a time (a Python loop), which takes
# seconds per thousand cells; the gate needs them over up to ~10⁴ cells. These are the same
# estimators vectorised over cells: rank-normalised split R-hat (max of bulk and folded) and
# bulk ESS with Geyer's initial monotone sequence (Vehtari, Gelman, Simpson, Carpenter &
# Bürkner 2021, "Rank-normalization, folding, and localization: an improved R-hat", Bayesian
# Analysis 16(2); Geyer 1992), following arviz 0.23's conventions (Blom offset 3/8, split
# halves d//2, FFT autocovariance). tests/test_export.py checks them against arviz.
# Arrays below are laid out (n, chain, draw): one contiguous row of draws per cell.
def _split(x: np.ndarray) -> np.ndarray:
    half = x.shape[2] // 2
    return np.concatenate([x[:, :, :half], x[:, :, x.shape[2] - half:]], axis=1)


def _z_scale(x: np.ndarray) -> np.ndarray:
    from scipy.special import ndtri
    from scipy.stats import rankdata

    n, c, d = x.shape
    flat = x.reshape(n, c * d)
    order = np.argsort(flat, axis=1)
    srt = np.take_along_axis(flat, order, axis=1)
    tied = (srt[:, 1:] == srt[:, :-1]).any(axis=1)
    r = np.empty(flat.shape)
    np.put_along_axis(r, order, np.broadcast_to(np.arange(1.0, c * d + 1.0), flat.shape), axis=1)
    if tied.any():  # average ranks where values repeat (scipy.stats.rankdata)
        r[tied] = rankdata(flat[tied], axis=1, method="average")
    return ndtri((r - 0.375) / (c * d - 0.75 + 1.0)).reshape(n, c, d)


def _rhat_cells(x: np.ndarray) -> np.ndarray:
    d = x.shape[2]
    with np.errstate(divide="ignore", invalid="ignore"):
        between = d * x.mean(axis=2).var(axis=1, ddof=1)
        within = x.var(axis=2, ddof=1).mean(axis=1)
        return np.sqrt((between / within + d - 1) / d)


def _ess_cells(x: np.ndarray) -> np.ndarray:
    n, c, d = x.shape
    m = 1 << int(math.ceil(math.log2(2 * d)))
    xc = x - x.mean(axis=2, keepdims=True)
    f = np.fft.rfft(xc, n=m, axis=2)
    acov = np.fft.irfft(f * np.conjugate(f), n=m, axis=2)[:, :, :d] / d  # (n, c, d)
    mean_acov = acov.mean(axis=1).T  # (d, n)
    mean_var = mean_acov[0] * d / (d - 1.0)
    var_plus = mean_var * (d - 1.0) / d
    if c > 1:
        var_plus = var_plus + x.mean(axis=2).var(axis=1, ddof=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho_of = 1.0 - (mean_var[None, :] - mean_acov) / var_plus[None, :]
    rho = np.zeros((d, n))
    rho[0] = 1.0
    rho[1] = rho_of[1]
    even, odd = np.ones(n), rho_of[1].copy()
    t_end = np.ones(n, dtype=np.int64)
    active = even + odd > 0
    for t in range(1, d - 3, 2):  # Geyer's initial positive sequence
        if not active.any():
            break
        even = np.where(active, rho_of[t + 1], even)
        odd = np.where(active, rho_of[t + 2], odd)
        ok = active & (even + odd >= 0)
        rho[t + 1] = np.where(ok, even, rho[t + 1])
        rho[t + 2] = np.where(ok, odd, rho[t + 2])
        t_end = np.where(active, t + 2, t_end)
        active = active & (even + odd > 0)
    max_t = t_end - 2
    cols = np.arange(n)
    fix = (even > 0) & (max_t + 1 < d)
    rho[max_t[fix] + 1, cols[fix]] = even[fix]
    for t in range(1, int(max_t.max(initial=0)) - 1, 2):  # Geyer's initial monotone sequence
        mono = (t <= max_t - 2) & (rho[t + 1] + rho[t + 2] > rho[t - 1] + rho[t])
        if mono.any():
            rho[t + 1] = np.where(mono, (rho[t - 1] + rho[t]) / 2.0, rho[t + 1])
            rho[t + 2] = np.where(mono, rho[t + 1], rho[t + 2])
    cs = np.cumsum(rho, axis=0)
    tail = np.where(max_t + 1 < d, rho[np.minimum(max_t + 1, d - 1), cols], 0.0)
    tau = -1.0 + 2.0 * cs[max_t, cols] + tail
    size = c * d
    tau = np.maximum(tau, 1.0 / math.log10(size))
    ess = size / tau
    return np.where(np.isnan(rho).any(axis=0), np.nan, ess)


def cell_diagnostics(draws: np.ndarray, chunk: int = 1024) -> tuple[np.ndarray, np.ndarray]:
    """Rank-normalised split R-hat and bulk ESS of every element of ``draws`` (chain, draw,
    ...), vectorised over the elements (in chunks of ``chunk`` to bound memory). Elements
    whose draws are constant get NaN."""
    x = np.asarray(draws, dtype=np.float64)
    c, d = x.shape[:2]
    x = x.reshape(c, d, -1)
    n = x.shape[2]
    rhat = np.full(n, np.nan)
    ess = np.full(n, np.nan)
    if d < 4 or c * (d // 2) < 4:
        return rhat, ess
    for a in range(0, n, chunk):
        xs = _split(np.ascontiguousarray(np.moveaxis(x[:, :, a:a + chunk], 2, 0)))  # (n, 2c, d//2)
        flat = xs.reshape(xs.shape[0], -1)
        const = (flat.max(axis=1) - flat.min(axis=1)) < np.finfo(float).resolution
        z = _z_scale(xs)
        folded = np.abs(xs - np.median(flat, axis=1)[:, None, None])
        r = np.maximum(_rhat_cells(z), _rhat_cells(_z_scale(folded)))
        e = _ess_cells(z)
        rhat[a:a + chunk] = np.where(const, np.nan, r)
        ess[a:a + chunk] = np.where(const, np.nan, e)
    return rhat, ess


def _num(v) -> float:
    try:
        return float(v)
    except (TypeError, ValueError):
        return float("nan")


def check_run(run, quantile: bool = False) -> GateResult:
    """Gate a run read back with :func:`sceneprior.results.load_run`: summary.json's
    diagnostics, posterior.nc, and the kept cell draws of cell_draws.nc."""
    s = run.summary
    cd = run.cell_draws
    window = np.asarray(run.intensity["window_area"].values).reshape(-1) > 0
    draws = chains_from_kept(np.asarray(cd["intensity"].values)[:, window], int(s["diagnostics"]["chains"]),
                             int(cd.attrs.get("draws_total", cd.sizes["sample"])), int(cd.attrs.get("thinning", 1)))
    return evaluate(s.get("diagnostics", {}), run.posterior.posterior, draws, quantile)


def check_fit(result, quantile: bool = False) -> GateResult:
    """Gate a :class:`sceneprior.fitting.FitResult` (before or after it is written). The
    cell checks use the draws exactly as cell_draws.nc will keep them (same thinning,
    float32), so a run read back gets the same verdict."""
    from .results import thin_for_budget

    lam = result.cell_intensity()
    c, d, n = lam.shape
    step = thin_for_budget(c * d, n, result.spec.draws_budget_mb)
    window = np.asarray(result.stats.window_area) > 0
    kept = np.asarray(lam.reshape(c * d, n)[::step][:, window], dtype=np.float32)
    return evaluate(result.diagnostics, result.idata.posterior, chains_from_kept(kept, c, c * d, step), quantile)


def check(obj, quantile: bool = False) -> GateResult:
    """Gate a Run or a FitResult."""
    return check_run(obj, quantile) if hasattr(obj, "summary") else check_fit(obj, quantile)


def summary_entry(result) -> dict:
    """The "gate" entry of summary.json: the fit-time verdict (no quantile asked), and
    whether the tail-ESS condition of a quantile export holds too."""
    g = check_fit(result, quantile=True)
    base = [c for c in g.checks if c.diagnostic != "ess_tail"]
    converged = all(c.passed for c in base)
    out = GateResult(checks=base, quantile=False, notes=g.notes).to_dict()
    out.pop("passed")
    out.pop("quantile_export_checks")
    return {"converged": converged,
            "quantile_export_ok": converged and g.passed,
            **out}


def require(obj, quantile: bool = False, override: bool = False) -> GateResult:
    """Raise :class:`ConvergenceGateError` (exit 3) when the gate fails and is not overridden."""
    g = check(obj, quantile)
    if not g.passed and not override:
        name = getattr(obj, "name", None) or getattr(getattr(obj, "spec", None), "name", "run")
        raise ConvergenceGateError(f"run {name}: {g.message()}; nothing exported "
                                   "(--override-gate exports anyway and records it in the file)")
    return g
