"""A run read back as arrays for predictive checks and leave-one-scan-out (no re-fitting).

From ``posterior.nc`` (all draws), ``cell_draws.nc`` (thinned per-cell draws), ``scans.nc``
(per-scan totals, scans-table columns, sparse scan × cell counts) and ``summary.json``
(the model kind and options) this builds, per posterior draw s and scan k,

    μ_sk = Λ_s · m_sk         expected detections of scan k over the window
    φ_s                       over-dispersion (None for Poisson models)
    log λ_sc                  base log intensity per cell (thinned draws only)

with Λ the base rate (``base_rate`` when the model has per-scan terms, else ``rate``) and
m_sk the per-scan multiplier: scans-table covariates and time bins (``models.scanterms``)
or, for the sites model, ρ_site(k)/μ. The per-scan design is rebuilt from scans.nc with
the same function the fit used (``scanterms.build_design``).

Runs with gates around known objects (issue 7) observed scan k over W_k ⊆ W only:
μ_sk = (Λ_s − R_sk)·m_sk with R_sk = Σ_c λ_sc removed[k, c] (``likelihood.gated_integral``;
``removed`` read back sparse from scans.nc). R needs the per-cell draws, so for such runs
the count-level draws are taken among the kept cell draws (all draws unless thinned).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError


@dataclass
class RunDraws:
    run: object
    kind: str
    n: np.ndarray  # (K,) observed per-scan totals over the window
    scan_cell: object  # (K, C) scipy.sparse CSR
    window_area: np.ndarray  # (C,) m²
    cell_area: np.ndarray  # (C,) m²
    shape: tuple[int, int]
    order: np.ndarray  # (K,) scan indices in time order
    time_s: np.ndarray | None  # (K,) seconds, when the scans table has a time column
    draw_index: np.ndarray  # (S,) indices into the chain-major flattened draws
    base_rate: np.ndarray  # (S,)
    log_mult: np.ndarray | None  # (S, K)
    phi: np.ndarray | None  # (S,)
    cell_index: np.ndarray  # (S_c,) flattened draw index of each kept cell draw
    n_draws_total: int
    removed: object = None  # (K, C) scipy.sparse CSR gated area [m²], None without gates
    gated: np.ndarray | None = None  # (S, K) R_sk at draw_index (None without gates)

    @property
    def n_scans(self) -> int:
        return int(self.n.size)

    def mu(self, which=None) -> np.ndarray:
        """(S, K) expected per-scan counts at the draws ``which`` (indices into draw_index)."""
        sel = slice(None) if which is None else which
        base = self.base_rate[sel][:, None]
        if self.gated is not None:
            base = base - self.gated[sel]
        return base if self.log_mult is None else base * np.exp(self.log_mult[sel])

    def gated_integral(self, log_lam) -> np.ndarray | None:
        """(S, K) R_sk = Σ_c λ_sc removed[k, c] for base log-intensity draws (S, C), or None
        without gates."""
        if self.removed is None:
            return None
        from .models.likelihood import gated_integral

        return gated_integral(log_lam, self.removed)

    def at_cell_draws(self):
        """(base log λ (S_c, C), log m (S_c, K) or None, φ (S_c,) or None, Λ (S_c,)) for the
        kept cell draws (cell_draws.nc), aligned by their flattened draw index."""
        run = self.run
        post = run.posterior.posterior
        log_lam, base = _base_log_intensity(run, self.cell_index)
        lm = phi = None
        full = _log_mult_all(run, self.kind, post)
        if full is not None:
            lm = full[self.cell_index]
        if "phi" in post:
            phi = _flat(post, "phi")[self.cell_index]
        return log_lam, lm, phi, base


def _base_log_intensity(run, cell_index, pick=None):
    """(log λ of the base intensity (S_c, C), base rate Λ (S_c,)) at the kept cell draws
    (``pick``: positions among them, default all): cell_draws.nc holds the
    recording-average map λ·mean_k m_k, divided out here."""
    cd = run.cell_draws
    pick = slice(None) if pick is None else pick
    lam = np.asarray(cd["intensity"].values, dtype=np.float64)[pick]
    post = run.posterior.posterior
    rate = _flat(post, "rate")[cell_index][pick]
    if "rate" in cd and not np.allclose(np.asarray(cd["rate"].values)[pick], rate, rtol=1e-6):
        raise InputError(f"{run.path}: cell_draws.nc and posterior.nc do not match (rate draws differ); "
                         "re-run the fit")
    base = _flat(post, "base_rate")[cell_index][pick] if "base_rate" in post else rate
    with np.errstate(divide="ignore"):
        log_lam = np.log(lam) - np.log(rate / base)[:, None]
    return log_lam, base


def _flat(post, name) -> np.ndarray:
    v = np.asarray(post[name].values, dtype=np.float64)
    return v.reshape((v.shape[0] * v.shape[1],) + v.shape[2:])


def model_options(run) -> dict:
    return dict(((run.summary.get("data") or {}).get("spec_content") or {}).get("model") or {})


def scan_meta(run) -> dict:
    ds = run.scans
    return {name[5:]: ds[name].values for name in ds.data_vars if name.startswith("meta_")}


def scan_design(run):
    from .models import scanterms
    from .models.variants import split_kind

    kind = run.summary["model"]["kind"]
    _, tokens = split_kind(kind)
    opts = model_options(run)
    options = {t: opts[t] for t in ("scan_covariates", "time") if t in tokens and t in opts}
    if "time" in tokens and "time" not in options:
        options["time"] = {}
    return scanterms.build_design(scan_meta(run), int(run.scans.sizes["scan"]), options,
                                  where=f"{run.path}: model")


def _log_mult_all(run, kind, post):
    """(S_total, K) log m_k for every flattened draw, or None."""
    if kind == "sites":
        col = model_options(run).get("site_column", "site")
        meta = scan_meta(run)
        if col not in meta:
            raise InputError(f"{run.path}: scans.nc has no '{col}' column for the sites model")
        lab = np.asarray(meta[col]).astype(str)
        sites = [str(s) for s in post["site_intensity"].coords["site"].values]
        pos = {s: i for i, s in enumerate(sites)}
        try:
            idx = np.array([pos[s] for s in lab])
        except KeyError as exc:
            raise InputError(f"{run.path}: scan site {exc} is not among the fitted sites") from None
        rho = _flat(post, "site_intensity")
        mu = _flat(post, "intensity")
        return np.log(rho[:, idx]) - np.log(mu)[:, None]
    design = scan_design(run)
    if not design.names and not design.n_bins:
        return None
    coef = _flat(post, "scan_coef_std") if design.names else None
    te = _flat(post, "time_effect") if design.n_bins else None
    return design.log_multiplier(coef, te)


def load_draws(run, max_draws: int | None = 1000) -> RunDraws:
    """Arrays of a run for checks and LOO; ``max_draws`` evenly spaced posterior draws are
    used for the count-level checks (None: all)."""
    post = run.posterior.posterior
    kind = run.summary["model"]["kind"]
    if kind == "lgcp_sites":  # each scan's law depends on its site's own map, not a scale of one map
        raise InputError(f"{run.path}: run {run.name} has a map per site (kind \"lgcp_sites\"); check and rank "
                         "read one map scaled per scan and do not handle per-site maps yet — fit each site with "
                         "kind \"lgcp\" to check or rank it")
    S_total = int(post.sizes["chain"] * post.sizes["draw"])
    cd = run.cell_draws
    step = int(cd.attrs.get("thinning", 1))
    cell_index = np.arange(cd.sizes["sample"]) * step
    removed = run.removed()
    pool = np.arange(S_total) if removed is None else cell_index  # gates: R needs cell draws
    if max_draws is None or max_draws >= pool.size:
        pick = np.arange(pool.size)
    else:
        pick = np.unique(np.linspace(0, pool.size - 1, max_draws).round().astype(int))
    idx = pool[pick]
    gated = None
    if removed is not None:
        from .models.likelihood import gated_integral

        log_lam, _ = _base_log_intensity(run, cell_index, pick)
        gated = gated_integral(log_lam, removed)
    rate = _flat(post, "rate")
    base = _flat(post, "base_rate") if "base_rate" in post else rate
    lm_all = _log_mult_all(run, kind, post)
    phi = _flat(post, "phi")[idx] if "phi" in post else None
    ds = run.scans
    n = np.asarray(ds["n"].values, dtype=np.int64)
    meta = scan_meta(run)
    tcol = (model_options(run).get("time") or {}).get("column", "time") if isinstance(
        model_options(run).get("time"), dict) else "time"
    time_s = None
    if tcol in meta:
        from .models.scanterms import time_seconds

        try:
            time_s = time_seconds(meta[tcol], tcol, str(run.path))
        except InputError:
            time_s = None
    order = np.argsort(time_s, kind="stable") if time_s is not None else np.arange(n.size)
    inten = run.intensity
    wa = np.asarray(inten["window_area"].values, dtype=np.float64)
    ca = np.asarray(inten["cell_area"].values, dtype=np.float64)
    return RunDraws(run=run, kind=kind, n=n, scan_cell=run.scan_cell(), window_area=wa.reshape(-1),
                    cell_area=ca.reshape(-1), shape=tuple(wa.shape), order=order, time_s=time_s,
                    draw_index=idx, base_rate=base[idx],
                    log_mult=None if lm_all is None else lm_all[idx], phi=phi,
                    cell_index=cell_index, n_draws_total=S_total, removed=removed, gated=gated)


def simulate_counts(rng: np.random.Generator, mu: np.ndarray, phi: np.ndarray | None,
                    chunk_elems: int = 4_000_000) -> np.ndarray:
    """Replicated per-scan counts (S, K): Poisson(μ), or Poisson(u·μ) with u ~ Gamma(1/φ, φ)
    (negative binomial) per scan; drawn in chunks of draws to bound memory."""
    S, K = mu.shape
    out = np.empty((S, K), dtype=np.int64)
    step = max(1, chunk_elems // max(K, 1))
    for s0 in range(0, S, step):
        m = mu[s0:s0 + step]
        if phi is not None:
            p = np.asarray(phi[s0:s0 + step], float)[:, None]
            a = 1.0 / np.maximum(p, 1e-300)
            m = m * rng.gamma(np.broadcast_to(a, m.shape), 1.0 / np.broadcast_to(a, m.shape))
        out[s0:s0 + step] = rng.poisson(m)
    return out
