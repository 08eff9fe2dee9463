"""Per-scan terms for every binned model: over-dispersion, scans-table covariates and a
time-varying rate (DESIGN.md §2–3).

Scan k has intensity λ_k(z) = u_k · m_k · λ(z), where λ is the model's base intensity
(uniform, log-linear, ...) and

    log m_k = Σ_j γ̃_j x̃_kj + δ_b(k)

* x̃_kj: scans-table columns (``model.scan_covariates``, e.g. a rain flag, sea state),
  centred and scaled by their mean and sd over the scans (design only, never the counts);
  γ̃_j ~ Normal(0, scan_coef_sd), default 1 per sd of the covariate; reported on the
  original scale as γ_j = γ̃_j / s_j (log multiplier per unit of the column);
* δ_b: a log-rate offset per time bin (``[model.time]``): calendar bins of ``width_s``
  seconds, or hour of day (24 cyclic bins, 23 next to 0). Prior: an intrinsic first-order
  random walk (Rue & Held 2005, *Gaussian Markov Random Fields*, §3.3.1) on the path or
  the cycle of bins, density ∝ exp(−Σ_{b~b'} (δ_b − δ_b')² / 2σ²), constrained to
  Σ_b δ_b = 0 so that the base intensity stays identified. Bins without scans carry no
  data and are bridged by the walk: E[δ_b | neighbours] = their mean. Sampled non-centred
  as δ = σ·V Λ^{-1/2} z, z ~ N(0, I_{B−1}), from the eigen-decomposition of the graph
  Laplacian (zero eigenvalue dropped). Step sd σ ~ HalfNormal(time_step_sd·√(width/1 h)),
  default time_step_sd = 0.5 per √hour, so the prior means the same whatever the bin width;
* u_k ~ Gamma(1/φ, 1/φ) (``model.overdispersion = true``): mean 1, variance φ; integrated
  out it gives a negative-binomial cardinality (``likelihood.nb_cardinality_logterm``).
  φ ~ HalfNormal(phi_scale), default phi_scale = 1 (φ is dimensionless: the squared
  coefficient of variation of the per-scan factor).

Reported quantities: ``base_rate`` Λ = Σ_c λ_c |c ∩ W| (the rate at mean covariates and
δ = 0), and ``rate`` = Λ · mean_k m_k, the expected detections per scan averaged over the
recording's scans (E[u] = 1). The intensity map of a run with per-scan terms is the
recording-average intensity λ_c · mean_k m_k, so it integrates to ``rate``.

Cost: per-scan terms need the per-scan totals n_k only. Scans sharing a design row
(covariates, time bin) are grouped: the Poisson form needs one term per distinct design,
the over-dispersed form one per distinct (n_k, design) pair — no per-detection work.

Per-scan windows (gates around known objects, issue 7): scan k is observed over
W_k = W minus its gates, so its expected count is m_k·Λ_k with Λ_k = Λ − Σ_c λ_c removed[k, c]
(``BinnedStats.removed``). For a uniform base intensity ρ this is Λ − ρ·A_k, A_k the area
the gates remove (``gated_area``): the Poisson form subtracts ρ·Σ_{k∈d} A_k per design row,
the over-dispersed form keys its groups by (n_k, design, A_k), so ungated scans still share
groups and each gated scan has its own term. Base kinds with a per-cell map would need
Σ_c λ_c removed[k, c] per scan (a sparse product); they are refused with gates
(``fitting._refuse_gates``) until their model functions pass their cell intensities.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError

TOKENS = ("overdispersion", "scan_covariates", "time")  # order of a composite kind name
PRIOR_DEFAULTS = {
    "overdispersion": {"phi_scale": 1.0},
    "scan_covariates": {"scan_coef_sd": 1.0},
    "time": {"time_step_sd": 0.5},
}
HOUR_S = 3600.0
DAY_S = 86400.0


# ----------------------------------------------------------------------------- design
@dataclass
class ScanDesign:
    """Per-scan design of a recording (pure arrays; built the same way by a fit and by
    ``sceneprior check``/``rank`` from a run's scans.nc)."""

    n_scans: int
    names: list[str] = field(default_factory=list)  # scan covariates
    Z: np.ndarray | None = None  # (K, p) standardised
    means: np.ndarray | None = None
    scales: np.ndarray | None = None
    time_mode: str | None = None  # "calendar" | "hour_of_day"
    bins: np.ndarray | None = None  # (K,) bin of each scan
    n_bins: int = 0
    bin_width_s: float = 0.0
    bin_start_s: np.ndarray | None = None  # (B,) start of each bin [s]
    cyclic: bool = False
    time_s: np.ndarray | None = None  # (K,) scan times [s] (when a time column exists)

    def log_multiplier(self, scan_coef_std=None, time_effect=None) -> np.ndarray:
        """(S, K) log m_k for draws of the standardised coefficients (S, p) and time
        effects (S, B); zeros when the design has neither."""
        S = None
        for a in (scan_coef_std, time_effect):
            if a is not None:
                S = np.asarray(a).shape[0]
        out = np.zeros((S or 1, self.n_scans))
        if self.names and scan_coef_std is not None:
            out = out + np.asarray(scan_coef_std, float) @ self.Z.T
        if self.n_bins and time_effect is not None:
            out = out + np.asarray(time_effect, float)[:, self.bins]
        return out


def _numeric_column(values, name: str, where: str) -> np.ndarray:
    v = np.asarray(values)
    if v.dtype.kind == "b":
        return v.astype(float)
    if v.dtype.kind in "iuf":
        v = v.astype(float)
    else:
        low = np.char.lower(v.astype(str))
        if np.isin(low, ["true", "false"]).all():
            return (low == "true").astype(float)
        try:
            v = v.astype(float)
        except ValueError:
            raise InputError(f"{where}: scans-table column '{name}' must be numeric or true/false "
                             "to act on the log rate") from None
    bad = ~np.isfinite(v)
    if bad.any():
        raise InputError(f"{where}: scans-table column '{name}' has empty or non-finite values at "
                         f"scan rows {', '.join(str(i + 1) for i in np.flatnonzero(bad)[:5])}; fill them")
    return v


def time_seconds(values, name: str, where: str) -> np.ndarray:
    """Scan times as float seconds: numbers are taken as seconds (since a UTC midnight or
    the Unix epoch, for hour-of-day bins); datetimes and ISO-8601 text are converted to
    seconds since 1970-01-01T00:00 UTC."""
    v = np.asarray(values)
    if v.dtype.kind in "iuf":
        t = v.astype(float)
    elif v.dtype.kind == "M":
        t = v.astype("datetime64[ns]").astype(np.int64) / 1e9
    else:
        try:
            t = np.array([str(s).replace(" ", "T").rstrip("Z") for s in v],
                         dtype="datetime64[ns]").astype(np.int64) / 1e9
        except ValueError:
            raise InputError(f"{where}: scans-table column '{name}' must hold times: seconds (numbers) "
                             "or ISO-8601 date-times such as 2026-12-01T08:30:00") from None
    if not np.isfinite(t).all():
        raise InputError(f"{where}: scans-table column '{name}' has empty or non-finite times; fill them")
    return t


def build_design(meta: dict, n_scans: int, options: dict, where: str = "model") -> ScanDesign:
    """The per-scan design from the scans-table columns ``meta`` (name → (K,) array in the
    order of the recording's scans) and the model options of the spec."""
    d = ScanDesign(n_scans=n_scans)
    names = list(options.get("scan_covariates") or [])
    if names:
        cols = []
        for nm in names:
            if nm not in meta:
                have = ", ".join(sorted(meta)) or "none"
                raise InputError(f"{where}.scan_covariates: the scans table has no column '{nm}' "
                                 f"(columns: {have})")
            cols.append(_numeric_column(meta[nm], nm, where))
        X = np.stack(cols, axis=1)
        m = X.mean(axis=0)
        s = X.std(axis=0)
        for j, nm in enumerate(names):
            if not s[j] > 1e-12 * max(1.0, abs(m[j])):
                raise InputError(f"{where}.scan_covariates: column '{nm}' is constant over the scans; "
                                 "drop it (the base rate already carries a constant)")
        d.names, d.Z, d.means, d.scales = names, (X - m) / s, m, s
    tcol = (options.get("time") or {}).get("column", "time")
    if tcol in meta:
        try:
            d.time_s = time_seconds(meta[tcol], tcol, where)
        except InputError:
            if options.get("time") is not None:
                raise
    t = options.get("time")
    if t is not None:
        if d.time_s is None:
            raise InputError(f"{where}.time: the scans table has no time column '{tcol}' "
                             "(set model.time.column)")
        mode = t.get("bins", "calendar")
        if mode == "hour_of_day":
            d.time_mode, d.cyclic, d.bin_width_s = mode, True, HOUR_S
            d.bins = (np.floor(np.mod(d.time_s, DAY_S) / HOUR_S).astype(np.int64)) % 24
            d.n_bins = 24
            d.bin_start_s = np.arange(24) * HOUR_S
        else:
            width = float(t.get("width_s", HOUR_S))
            first = math.floor(d.time_s.min() / width)
            d.bins = (np.floor(d.time_s / width) - first).astype(np.int64)
            d.n_bins = int(d.bins.max()) + 1
            d.time_mode, d.bin_width_s = "calendar", width
            d.bin_start_s = (first + np.arange(d.n_bins)) * width
            if d.n_bins > 5000:
                raise InputError(f"{where}.time: {d.n_bins} calendar bins of {width:g} s; use wider bins")
        if len(np.unique(d.bins)) < 2:
            raise InputError(f"{where}.time: every scan falls in one time bin; use narrower bins "
                             "(model.time.width_s) or drop [model.time]")
    return d


def random_walk_basis(n_bins: int, cyclic: bool) -> np.ndarray:
    """(B, B−1) matrix V Λ^{-1/2} of the non-zero eigenpairs of the first-order random-walk
    precision (graph Laplacian of the path, or of the cycle when ``cyclic``): δ = σ·M z with
    z ~ N(0, I) has covariance σ²·L⁺, the intrinsic RW1 under Σδ = 0 (Rue & Held 2005 §3.3)."""
    L = np.zeros((n_bins, n_bins))
    edges = [(b, b + 1) for b in range(n_bins - 1)]
    if cyclic and n_bins > 2:
        edges.append((n_bins - 1, 0))
    for i, j in edges:
        L[i, i] += 1
        L[j, j] += 1
        L[i, j] -= 1
        L[j, i] -= 1
    w, V = np.linalg.eigh(L)
    return V[:, 1:] / np.sqrt(w[1:])


# ----------------------------------------------------------------------------- inputs
def scan_inputs(design: ScanDesign, scan_counts: np.ndarray, prior: dict, tokens,
                gated_area: np.ndarray | None = None) -> dict:
    """Arrays for :func:`ppp_factor`: the distinct design rows and, when over-dispersed, the
    distinct (n_k, row) pairs with their multiplicities (float64: counts of long recordings).
    ``gated_area`` (K,) [m²]: the area each scan's gates remove from the window (None or
    zeros without gates); it becomes ``rows_gated`` (Σ over each row's scans) and, when
    over-dispersed, part of the group key (``nb_gated``)."""
    K = design.n_scans
    cols = []
    if design.names:
        cols.append(design.Z)
    if design.n_bins:
        cols.append(design.bins[:, None].astype(float))
    if cols:
        key = np.concatenate(cols, axis=1)
        uniq, row = np.unique(key, axis=0, return_inverse=True)
        row = row.reshape(-1)
    else:
        uniq, row = np.zeros((1, 0)), np.zeros(K, np.int64)
    D = uniq.shape[0]
    n = np.asarray(scan_counts, float)
    st = {
        "K": float(K),
        "rows_count": np.bincount(row, weights=n, minlength=D),
        "rows_scans": np.bincount(row, minlength=D).astype(float),
        "p": len(design.names),
        "B": int(design.n_bins),
        "od": "overdispersion" in tokens,
    }
    if design.names:
        st["Z"] = uniq[:, : len(design.names)]
        st["scales"] = design.scales
        st["coef_sd"] = float(prior["scan_coef_sd"])
    if design.n_bins:
        st["bin"] = uniq[:, -1].astype(np.int64)
        st["M"] = random_walk_basis(design.n_bins, design.cyclic)
        st["step_scale"] = float(prior["time_step_sd"]) * math.sqrt(design.bin_width_s / HOUR_S)
    a = np.zeros(K) if gated_area is None else np.asarray(gated_area, float).reshape(-1)
    if a.any():
        st["rows_gated"] = np.bincount(row, weights=a, minlength=D)
    if st["od"]:
        pairs, inv = np.unique(np.stack([n, row.astype(float), a], axis=1), axis=0, return_inverse=True)
        st["nb_n"] = pairs[:, 0]
        st["nb_row"] = pairs[:, 1].astype(np.int64)
        st["nb_weight"] = np.bincount(inv.reshape(-1), minlength=pairs.shape[0]).astype(float)
        st["phi_scale"] = float(prior["phi_scale"])
        if a.any():
            st["nb_gated"] = pairs[:, 2]
    return st


# ----------------------------------------------------------------------------- numpyro
def scan_effects(st: dict):
    """Sample sites of the per-scan terms; returns (log m per design row, φ or None)."""
    import jax.numpy as jnp
    import numpyro
    import numpyro.distributions as dist

    log_m = jnp.zeros(st["rows_count"].shape[0])
    if st["p"]:
        g = numpyro.sample("scan_coef_std", dist.Normal(0.0, st["coef_sd"]).expand([st["p"]]).to_event(1))
        numpyro.deterministic("scan_coef", g / st["scales"])
        log_m = log_m + st["Z"] @ g
    if st["B"]:
        s = numpyro.sample("time_step_sd", dist.HalfNormal(st["step_scale"]))
        z = numpyro.sample("time_z", dist.Normal(0.0, 1.0).expand([st["B"] - 1]).to_event(1))
        delta = numpyro.deterministic("time_effect", s * (st["M"] @ z))
        log_m = log_m + delta[st["bin"]]
    phi = numpyro.sample("phi", dist.HalfNormal(st["phi_scale"])) if st["od"] else None
    return log_m, phi


def ppp_factor(sum_n_loglam, Lam, st: dict, intensity=None):
    """Add the per-scan PPP log-likelihood (``likelihood.scan_loglik``) as a factor and the
    deterministic ``base_rate``; returns mean_k m_k (the caller's rate = Λ·mean_k m_k).
    With gates (``st`` from ``scan_inputs(..., gated_area)``) the caller passes its uniform
    base ``intensity`` ρ [m⁻² scan⁻¹]: Λ_k = Λ − ρ·A_k (module docstring)."""
    import jax.numpy as jnp
    import numpyro

    from .likelihood import scan_loglik

    log_m, phi = scan_effects(st)
    rows_removed = nb_removed = None
    if "rows_gated" in st:
        if intensity is None:
            raise ValueError("per-scan gates need the base intensity (uniform kinds only)")
        rows_removed = intensity * st["rows_gated"]
        nb_removed = intensity * st["nb_gated"] if "nb_gated" in st else None
    numpyro.factor("loglik", scan_loglik(sum_n_loglam, Lam, log_m, st["rows_count"], st["rows_scans"],
                                         st.get("nb_n"), st.get("nb_row"), st.get("nb_weight"), phi,
                                         rows_removed=rows_removed, nb_removed=nb_removed))
    numpyro.deterministic("base_rate", Lam)
    if st["p"] or st["B"]:
        return jnp.sum(st["rows_scans"] * jnp.exp(log_m)) / st["K"]
    return 1.0


# ----------------------------------------------------------------------------- reporting
def _stat(v) -> dict:
    v = np.asarray(v, float).reshape(-1)
    q = np.quantile(v, [0.05, 0.5, 0.95])
    return {"mean": float(v.mean()), "sd": float(v.std(ddof=1)), "q05": float(q[0]),
            "q50": float(q[1]), "q95": float(q[2])}


def describe_prior(prior: dict, tokens) -> dict:
    out = {}
    if "overdispersion" in tokens:
        out["phi"] = (f"HalfNormal({prior['phi_scale']:g}) on φ, the variance of the per-scan factor "
                      "u_k ~ Gamma(1/φ, 1/φ) (dimensionless)")
    if "scan_covariates" in tokens:
        out["scan_coef_std"] = (f"Normal(0, {prior['scan_coef_sd']:g}) per standardised scans-table "
                                "covariate (log multiplier of the rate per sd of the column)")
    if "time" in tokens:
        out["time_effect"] = (f"intrinsic RW1 on the log rate per time bin, Σδ = 0; step sd σ ~ "
                              f"HalfNormal({prior['time_step_sd']:g}·√(bin width / 1 h)) (Rue & Held 2005 §3.3)")
    return out


def summary(result, tokens) -> dict:
    """Per-scan terms, cardinality and per-bin rates for summary.json."""
    post = result.idata.posterior
    design = result.setup.extra["scan_design"]
    rate = np.asarray(post["rate"]).reshape(-1)
    out: dict = {"base_rate": {"units": "detections per scan over the window at mean scan covariates "
                                        "and zero time effect", **_stat(post["base_rate"])},
                 "rate_note": "rate = base_rate × mean over the recording's scans of the per-scan "
                              "multiplier m_k: the recording-average expected detections per scan"}
    if design.names:
        coef = np.asarray(post["scan_coef"]).reshape(-1, len(design.names))
        out["scan_covariates"] = {
            nm: {"units": f"log multiplier of the rate per unit of '{nm}'", **_stat(coef[:, j]),
                 "multiplier_per_unit": _stat(np.exp(coef[:, j])),
                 "column_mean": float(design.means[j]), "column_sd": float(design.scales[j])}
            for j, nm in enumerate(design.names)}
    if design.n_bins:
        te = np.asarray(post["time_effect"]).reshape(-1, design.n_bins)
        base = np.asarray(post["base_rate"]).reshape(-1, 1)
        occupied = np.bincount(design.bins, minlength=design.n_bins)
        out["time_bins"] = {
            "mode": design.time_mode, "n_bins": design.n_bins, "width_s": design.bin_width_s,
            "cyclic": design.cyclic,
            "note": "rate per bin = base_rate × exp(time_effect) at mean scan covariates; bins "
                    "without scans are bridged by the random walk",
            "step_sd": _stat(post["time_step_sd"]),
            "bins": [{"start_s": float(design.bin_start_s[b]), "scans": int(occupied[b]),
                      "rate": _stat(base[:, 0] * np.exp(te[:, b]))} for b in range(design.n_bins)],
        }
    if "overdispersion" in tokens:
        phi = np.asarray(post["phi"]).reshape(-1)
        mean_rate, phi_mean = float(rate.mean()), float(phi.mean())
        out["overdispersion"] = {"phi": _stat(phi)}
        out["cardinality"] = {
            "distribution": "negative_binomial",
            "mean": mean_rate,
            "dispersion_phi": phi_mean,
            "dispersion_phi_posterior": _stat(phi),
            "variance": mean_rate + phi_mean * mean_rate ** 2,
            "scipy_nbinom": {"n": 1.0 / phi_mean, "p": 1.0 / (1.0 + phi_mean * mean_rate)},
            "note": "per-scan count of clutter detections over the window: a per-scan factor "
                    "u ~ Gamma(1/φ, 1/φ) (mean 1, variance φ) multiplies the intensity; integrated "
                    "out, the count is negative binomial with mean = rate and variance = rate + "
                    "φ·rate², i.e. scipy.stats.nbinom(n = 1/φ, p = 1/(1 + φ·rate)); point values "
                    "are posterior means" + ("; with scan covariates or time bins the mean is the "
                                             "recording average, each scan's own mean is "
                                             "base_rate·m_k" if (design.names or design.n_bins) else ""),
        }
    return out
