"""``sceneprior report RUN``: one self-contained HTML page about a fitted run.

Everything is read from the run directory (:func:`sceneprior.results.load_run`); nothing
is re-fitted. Figures are drawn with matplotlib's Agg canvas (no display, no pyplot
state) and embedded in the page as base64 PNG, so report.html can be mailed or archived
alone. Contents:

* intensity maps — posterior mean and sd per cell (per km² per scan), polar fields of
  view drawn as fans in x/y, permanent masks hatched; exceedance-probability maps when
  intensity.nc holds any (variables named ``exceed*``);
* per-scan detection counts against the posterior predictive count distribution
  (:func:`count_predictive`: each scan's mixture over posterior draws of its own count law,
  with the per-scan means of :mod:`sceneprior.predictive` — per-scan windows W_k when known
  objects were gated out, per-scan multipliers, over-dispersion), as a histogram and per
  scan in time order. The per-scan
  counts come from the run's scans.nc; a run without it falls back to re-reading the
  recording named in summary.json — only when its SHA-256 still matches; otherwise the
  page says why the panel is missing;
* the rate posterior (with the conjugate Gamma density of a uniform run overlaid);
* trace and rank plots of the rate and hyperparameters, the diagnostics table and the
  convergence gate's checks (:mod:`sceneprior.gate`);
* provenance and the caution text.
"""

from __future__ import annotations

import base64
import dataclasses
import html
import io
import math
import os
import tempfile
from pathlib import Path

import numpy as np

from .results import CAUTION, load_run, model_notes

REPORT_FILE = "report.html"

# Our own palette ("tidewater"): paper, ink, and two accents.
PAPER = "#f7f4ec"
INK = "#1c2a33"
TEAL = "#2d6b6f"
RUST = "#b5562a"
SAND = "#e3c58f"
MIST = "#c9d6d3"


def _cmaps():
    from matplotlib.colors import LinearSegmentedColormap

    mean = LinearSegmentedColormap.from_list("tidewater", ["#f4efe0", "#a9cfc0", "#4f9a93", "#2d6b6f", "#16313a"])
    sd = LinearSegmentedColormap.from_list("emberline", ["#f6efe2", "#ecc58c", "#d98b4a", "#b5562a", "#5b2413"])
    prob = LinearSegmentedColormap.from_list("shoalwarn", ["#eef2f1", "#b7c9d6", "#6d7fa8", "#4b3b73", "#2a1337"])
    return tuple(c.with_extremes(bad=(0, 0, 0, 0)) for c in (mean, sd, prob))


def _figure(w, h):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(w, h), dpi=110, facecolor=PAPER)
    return fig


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", facecolor=fig.get_facecolor(), bbox_inches="tight")
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _style(ax):
    ax.set_facecolor(PAPER)
    for s in ("top", "right"):
        ax.spines[s].set_visible(False)
    for s in ("left", "bottom"):
        ax.spines[s].set_color(INK)
    ax.tick_params(colors=INK, labelsize=8)
    ax.xaxis.label.set_color(INK)
    ax.yaxis.label.set_color(INK)
    ax.title.set_color(INK)


# ----------------------------------------------------------------------- maps
def _mesh(grid, values):
    """x/y mesh of the grid (polar cells subdivided along bearing so arcs look round)."""
    if grid.frame == "cartesian":
        X, Y = np.meshgrid(grid.edges0, grid.edges1, indexing="ij")
        return X, Y, values
    from .geometry import polar_to_cartesian

    e1 = grid.edges1
    m = max(1, int(math.ceil(np.max(np.diff(e1)) / 1.0)))
    sub = np.concatenate([np.linspace(e1[j], e1[j + 1], m + 1)[:-1] for j in range(len(e1) - 1)] + [e1[-1:]])
    R, B = np.meshgrid(grid.edges0, sub, indexing="ij")
    X, Y = polar_to_cartesian(R, B)
    return X, Y, np.repeat(values, m, axis=1)


def _sector_outline(r0, r1, b0, b1, points: int) -> np.ndarray:
    """x/y vertices [m] of the annular sector r0…r1 m, bearings b0…b1 degrees: the outer arc
    (``points`` points) and the inner arc back."""
    from .geometry import polar_to_cartesian

    bb = np.linspace(b0, b1, points)
    xo, yo = polar_to_cartesian(np.full_like(bb, r1), bb)
    xi, yi = polar_to_cartesian(np.full_like(bb, r0), bb[::-1])
    return np.column_stack([np.concatenate([xo, xi]), np.concatenate([yo, yi])])


def _mask_patches(ax, region):
    from matplotlib.patches import Polygon

    from .geometry import PolygonMask

    for mk in region.masks:
        if isinstance(mk, PolygonMask):
            verts = np.asarray(mk.vertices)
            if region.frame == "cartesian":
                (x0, x1), (y0, y1) = region.bounds0, region.bounds1
                verts = np.column_stack([np.clip(verts[:, 0], x0, x1), np.clip(verts[:, 1], y0, y1)])
        else:
            r0 = max(mk.range[0], region.bounds0[0])
            r1 = min(mk.range[1], region.bounds0[1])
            b0 = max(mk.bearing[0], region.bounds1[0])
            b1 = min(mk.bearing[1], region.bounds1[1])
            if not (r1 > r0 and b1 > b0):
                continue
            verts = _sector_outline(r0, r1, b0, b1, 60)
        ax.add_patch(Polygon(verts, closed=True, facecolor=(0.55, 0.52, 0.47, 0.25), edgecolor=INK,
                             hatch="xx", linewidth=0.6, label=f"masked: {mk.name or 'mask'}"))


def _outline(ax, region):
    from .geometry import polar_to_cartesian

    if region.frame == "cartesian":
        (x0, x1), (y0, y1) = region.bounds0, region.bounds1
        ax.plot([x0, x1, x1, x0, x0], [y0, y0, y1, y1, y0], color=INK, lw=0.8)
        return
    (r0, r1), (b0, b1) = region.bounds0, region.bounds1
    bb = np.linspace(b0, b1, 200)
    for r in (r0, r1):
        x, y = polar_to_cartesian(np.full_like(bb, r), bb)
        ax.plot(x, y, color=INK, lw=0.8)
    for b in (b0, b1):
        x, y = polar_to_cartesian(np.array([r0, r1]), np.array([b, b]))
        ax.plot(x, y, color=INK, lw=0.8)


def _cell_polygons(grid, cells):
    """x/y outlines [m] of the grid's cells at flat indices ``cells`` (polar cells with their
    arcs subdivided, as :func:`_mesh` draws them)."""
    n1 = len(grid.edges1) - 1
    out = []
    for c in cells:
        i, j = divmod(int(c), n1)
        (a0, a1), (b0, b1) = grid.edges0[i:i + 2], grid.edges1[j:j + 2]
        if grid.frame == "cartesian":
            out.append(np.array([[a0, b0], [a1, b0], [a1, b1], [a0, b1]]))
            continue
        out.append(_sector_outline(a0, a1, b0, b1, max(2, int(math.ceil(b1 - b0)) + 1)))
    return out


def _map_figure(grid, region, panels, extrapolated=None):
    """panels: list of (title, values (n0, n1), cmap, colorbar label, vmin, vmax);
    ``extrapolated`` (n0, n1) bool: cells drawn dotted (window area but no exposure: their
    values are predicted from neighbours)."""
    from matplotlib.collections import PolyCollection

    shown = np.flatnonzero(np.asarray(extrapolated, bool).reshape(-1)) if extrapolated is not None else []
    fig = _figure(5.2 * len(panels), 4.6)
    axes = fig.subplots(1, len(panels), squeeze=False)[0]
    for ax, (title, vals, cmap, label, vmin, vmax) in zip(axes, panels):
        _style(ax)
        X, Y, V = _mesh(grid, vals)
        pm = ax.pcolormesh(X / 1000.0, Y / 1000.0, np.ma.masked_invalid(V), cmap=cmap, vmin=vmin, vmax=vmax,
                           shading="flat", rasterized=True)
        ax.set_aspect("equal")
        _outline_km(ax, region)
        _mask_patches_km(ax, region)
        if len(shown):
            ax.add_collection(PolyCollection([v / 1000.0 for v in _cell_polygons(grid, shown)], facecolor="none",
                                             edgecolor=INK, hatch="...", linewidth=0.5,
                                             label="extrapolated: no exposure"))
        ax.set_xlabel("x east [km]")
        ax.set_ylabel("y north [km]")
        ax.set_title(title, fontsize=10, loc="left")
        cb = fig.colorbar(pm, ax=ax, shrink=0.8, pad=0.02)
        cb.set_label(label, fontsize=8, color=INK)
        cb.ax.tick_params(labelsize=7, colors=INK)
        if region.masks or len(shown):
            ax.legend(loc="lower left", fontsize=7, frameon=False)
    return fig


class _KmAxes:
    """Wraps an axes so that drawing helpers in metres land on a km plot."""

    def __init__(self, ax):
        self.ax = ax

    def plot(self, x, y, **kw):
        self.ax.plot(np.asarray(x) / 1000.0, np.asarray(y) / 1000.0, **kw)

    def add_patch(self, p):
        p.set_xy(np.asarray(p.get_xy()) / 1000.0)
        self.ax.add_patch(p)


def _outline_km(ax, region):
    _outline(_KmAxes(ax), region)


def _mask_patches_km(ax, region):
    _mask_patches(_KmAxes(ax), region)


# ----------------------------------------------------------------------- counts
def _scan_counts(run, region):
    """Per-scan detection counts: from the run's scans.nc when it keeps them, else re-read
    from the recording (only if its SHA-256 still matches); (None, reason) otherwise."""
    from .errors import InputError

    if (Path(run.path) / "scans.nc").is_file() and hasattr(run, "scans"):
        n = np.asarray(run.scans["n"].values, dtype=np.int64)
        return n, None
    from .spec import spec_from_dict
    from .tables import read_recording, sha256_file

    d = run.summary.get("data", {})
    inputs = d.get("inputs_sha256") or {}
    paths = list(inputs)
    for p in paths:
        if not Path(p).is_file():
            return None, f"the recording file {p} is no longer there"
        if sha256_file(Path(p)) != inputs[p]:
            return None, f"the recording file {p} changed since the fit (SHA-256 differs)"
    try:
        spec = spec_from_dict(d["spec_content"], base_dir=Path(str(d.get("spec", "."))).parent,
                              source="summary.json spec content")
        data = spec.data
        if paths:
            data = dataclasses.replace(data, detections=Path(paths[0]),
                                       scans=Path(paths[1]) if data.scans is not None and len(paths) > 1 else data.scans)
        rec = read_recording(data, region)
    except (InputError, KeyError) as exc:
        return None, f"the recording could not be re-read ({exc})"
    counts = np.bincount(rec.scan_index, minlength=rec.n_scans)
    if rec.n_scans != d.get("scans") or int(counts.sum()) != d.get("detections_used"):
        return None, "the re-read recording does not match the run's counts"
    return counts, None


def _flat_draws(post, name, limit=None):
    a = np.asarray(post[name], dtype=float)
    flat = a.reshape(a.shape[0] * a.shape[1], -1)
    if limit and flat.shape[0] > limit:
        flat = flat[:: int(math.ceil(flat.shape[0] / limit))]
    return flat


COUNT_WORK = 2_000_000  # count-law evaluations (draws × scans × count values) per chunk
COUNT_TOTAL = 20_000_000  # ... in all: fewer draws for long recordings (at least COUNT_DRAWS_MIN)
NB_COST = 5  # a negative-binomial cdf (betainc) costs about 5 Poisson ones (pdtr)
COUNT_DRAWS, COUNT_DRAWS_MIN = 400, 20  # posterior draws for the count figure


@dataclasses.dataclass
class CountPredictive:
    """Per-scan counts against the posterior predictive (one fresh posterior draw per scan).

    Scan k's predictive law is the mixture over the posterior draws s of Poisson(μ_sk), or of
    NB(mean μ_sk, variance μ_sk + φ_sμ_sk²) when over-dispersed, with μ_sk the kind's per-scan
    mean from :func:`sceneprior.predictive.load_draws` — with gates (m_sk the per-scan
    multiplier) μ_sk = m_sk(Λ_s − R_sk) = m_sk Σ_c λ_sc |c ∩ W_k|, ρ_s|W_k| for a uniform map."""

    n: np.ndarray  # (K,) observed counts in the window (outside gates)
    order: np.ndarray  # (K,) scan indices in time order
    k: np.ndarray  # (J,) count values 0 … J−1
    observed: np.ndarray  # (J,) scans with each count
    expected: np.ndarray  # (J,) Σ_k P(N_k = j): expected number of scans with count j
    band_lo: np.ndarray  # (J,) 5 % / 95 % of Binomial(K, expected/K) per count value
    band_hi: np.ndarray
    scan_mean: np.ndarray  # (K,) predictive mean count of each scan
    scan_lo: np.ndarray  # (K,) 5 % and 95 % quantiles of each scan's predictive law
    scan_hi: np.ndarray
    draws: int  # posterior draws used
    per_scan: bool  # True: the kind's per-scan means; False: the rate for every scan (fallback)


def _mixture_cdf(mu: np.ndarray, phi: np.ndarray | None, n_values: int) -> np.ndarray:
    """(K, J) P(N_k ≤ j) of the per-scan mixtures over draws (mu (S, K), phi (S,) or None),
    chunked over scans (``COUNT_WORK``): scipy.stats.poisson, or nbinom(n = 1/φ,
    p = 1/(1 + φμ)) (mean μ, variance μ + φμ²)."""
    from scipy.stats import nbinom, poisson

    S, K = mu.shape
    j = np.arange(n_values, dtype=float)[None, None, :]
    out = np.empty((K, n_values))
    step = max(1, int(COUNT_WORK // max(S * n_values, 1)))
    ph = None if phi is None else np.asarray(phi, float)[:, None, None]
    for k0 in range(0, K, step):
        m = mu[:, k0:k0 + step, None]
        F = poisson.cdf(j, m) if ph is None else nbinom.cdf(j, 1.0 / ph, 1.0 / (1.0 + ph * m))
        out[k0:k0 + step] = F.mean(axis=0)
    return out


def count_predictive(run, counts: np.ndarray, max_draws: int | None = None) -> CountPredictive:
    """The data of the per-scan count figure. Per-scan means μ_sk come from the run
    (``predictive.load_draws``: per-scan windows, multipliers, φ); a run whose per-scan data
    cannot be read back falls back to the rate for every scan (``per_scan`` False).
    ``max_draws`` (default: ``COUNT_DRAWS``, fewer for long recordings and over-dispersed
    models, within ``COUNT_TOTAL`` count-law evaluations) evenly spaced draws."""
    from scipy.stats import binom, nbinom, poisson

    from .errors import InputError

    counts = np.asarray(counts, dtype=np.int64)
    K = counts.size
    auto = max_draws is None

    def budget(cost):  # draws within COUNT_TOTAL evaluations of ``cost`` each per scan
        return int(np.clip(COUNT_TOTAL // max(cost * K, 1), COUNT_DRAWS_MIN, COUNT_DRAWS))

    if auto:
        max_draws = budget(int(counts.max(initial=0)) + 2)
    try:
        from .predictive import load_draws

        rd = load_draws(run, max_draws=max_draws)
        if rd.n_scans != K:
            raise InputError("scan counts differ")
        mu, phi, order, per_scan = rd.mu(), rd.phi, rd.order, True  # mu (S, K), or (S, 1): same for all
    except (InputError, OSError, KeyError):
        rate = _flat_draws(run.posterior.posterior, "rate", limit=max_draws).reshape(-1)
        mu, phi, order, per_scan = rate[:, None], None, np.arange(K), False
    mu = np.maximum(np.asarray(mu, float), 0.0)
    top = mu.max()
    q_top = (poisson.ppf(0.9995, top) if phi is None
             else nbinom.ppf(0.9995, 1.0 / phi.max(), 1.0 / (1.0 + phi.max() * top)))
    J = int(max(counts.max(initial=0), q_top)) + 2
    if auto and phi is not None and mu.shape[0] > budget(NB_COST * J):
        keep = np.unique(np.linspace(0, mu.shape[0] - 1, budget(NB_COST * J)).round().astype(int))
        mu, phi = mu[keep], phi[keep]
    F = _mixture_cdf(mu, phi, J)
    if mu.shape[1] != K:  # one law for every scan
        F = np.repeat(F, K, axis=0)
    pmf = np.diff(F, axis=1, prepend=0.0)
    expected = pmf.sum(axis=0)
    pbar = np.clip(expected / K, 0.0, 1.0)

    def quantile(q):  # smallest j with P(N_k ≤ j) ≥ q per scan
        return np.minimum((F < q).sum(axis=1), J - 1)

    return CountPredictive(
        n=counts, order=np.asarray(order), k=np.arange(J), observed=np.bincount(counts, minlength=J)[:J],
        expected=expected, band_lo=binom.ppf(0.05, K, pbar), band_hi=binom.ppf(0.95, K, pbar),
        scan_mean=np.broadcast_to(mu.mean(axis=0), (K,)), scan_lo=quantile(0.05), scan_hi=quantile(0.95),
        draws=int(mu.shape[0]), per_scan=per_scan)


def _counts_figure(cp: CountPredictive):
    K = cp.n.size
    fig = _figure(6.4, 6.4)
    ax, ax_t = fig.subplots(2, 1, gridspec_kw={"height_ratios": [1.0, 1.0], "hspace": 0.45})
    _style(ax)
    _style(ax_t)
    ax.fill_between(cp.k, cp.band_lo, cp.band_hi, step="mid", color=SAND, alpha=0.55, linewidth=0,
                    label="predictive 5–95 % band per bin")
    ax.bar(cp.k, cp.observed, width=0.8, color=MIST, edgecolor=TEAL, linewidth=0.6, alpha=0.85,
           label=f"observed ({K} scans)")
    ax.plot(cp.k, cp.expected, color=RUST, marker="o", ms=3, lw=1.2, label="posterior predictive expectation")
    shown = np.flatnonzero((cp.observed > 0) | (cp.expected >= 0.05))  # the tail beyond: < 0.05 scans per bin
    ax.set_xlim(-1.0, float(shown.max(initial=0)) + 1.0)
    ax.set_xlabel("detections in a scan (inside the window)")
    ax.set_ylabel("number of scans")
    ax.set_title("Per-scan counts against the posterior predictive", fontsize=10, loc="left")
    ax.legend(fontsize=7, frameon=False)
    t = np.arange(K)
    o = cp.order
    ax_t.fill_between(t, cp.scan_lo[o], cp.scan_hi[o], step="mid", color=SAND, alpha=0.55, linewidth=0,
                      label="predictive 5–95 % of each scan")
    ax_t.plot(t, cp.scan_mean[o], color=RUST, lw=0.9, label="predictive mean of each scan")
    ax_t.plot(t, cp.n[o], ls="none", marker="o", ms=2.0 if K <= 2000 else 0.8, color=TEAL, alpha=0.8,
              label="observed")
    from matplotlib.ticker import MaxNLocator

    ax.xaxis.set_major_locator(MaxNLocator(integer=True))  # counts are whole numbers
    ax_t.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax_t.set_xlabel("scan, in time order")
    ax_t.set_ylabel("detections in the scan's window")
    ax_t.set_title("Each scan against its own predictive", fontsize=10, loc="left")
    ax_t.legend(fontsize=7, frameon=False, ncol=3, loc="upper right")
    return fig


def _rate_figure(rate, summary):
    fig = _figure(6.4, 3.4)
    ax = fig.subplots()
    _style(ax)
    ax.hist(rate, bins=60, density=True, color=MIST, edgecolor=TEAL, linewidth=0.4, label="posterior draws")
    q05, q95 = np.quantile(rate, [0.05, 0.95])
    ax.axvspan(q05, q95, color=SAND, alpha=0.35, label=f"90 % interval [{q05:.4g}, {q95:.4g}]")
    ax.axvline(rate.mean(), color=RUST, lw=1.4, label=f"mean {rate.mean():.4g}")
    ex = summary.get("exact_posterior")
    if ex:
        from scipy.stats import gamma

        W = summary["space"]["window_area_m2"]
        xs = np.linspace(rate.min(), rate.max(), 300)
        ax.plot(xs, gamma(ex["shape"], scale=W / ex["rate_m2_scan"]).pdf(xs), color=INK, lw=1.0, ls="--",
                label="conjugate Gamma posterior (BDA3 §2.6)")
    ax.set_xlabel("rate: expected detections per scan over the window")
    ax.set_ylabel("posterior density")
    ax.set_title("Clutter rate posterior", fontsize=10, loc="left")
    ax.legend(fontsize=7, frameon=False)
    return fig


def _chain_figure(post, names):
    series = []
    for n in names:
        if n not in post.data_vars:
            continue
        a = np.asarray(post[n], dtype=float)
        flat = a.reshape(a.shape[0], a.shape[1], -1)
        for j in range(min(flat.shape[2], 3)):
            label = n if flat.shape[2] == 1 else f"{n}[{j}]"
            series.append((label, flat[:, :, j]))
    series = series[:6]
    if not series:
        return None
    fig = _figure(9.0, 1.9 * len(series) + 0.4)
    axes = fig.subplots(len(series), 2, squeeze=False, gridspec_kw={"width_ratios": [2.2, 1]})
    colours = [TEAL, RUST, "#6d7fa8", "#8a7a3a", "#4f9a93", "#7a3b5d"]
    for (label, x), (ax_t, ax_r) in zip(series, axes):
        _style(ax_t)
        _style(ax_r)
        c, d = x.shape
        for i in range(c):
            ax_t.plot(np.arange(d), x[i], color=colours[i % len(colours)], lw=0.5, alpha=0.8)
        ax_t.set_ylabel(label, fontsize=8)
        ranks = np.argsort(np.argsort(x.reshape(-1), kind="stable"), kind="stable").reshape(c, d)
        bins = np.linspace(0, c * d, 21)
        for i in range(c):
            h, _ = np.histogram(ranks[i], bins=bins)
            ax_r.step(bins[:-1], h + i * d / 20 * 1.6, where="post", color=colours[i % len(colours)], lw=1.0)
            ax_r.axhline(d / 20 + i * d / 20 * 1.6, color=INK, lw=0.4, ls=":")
        ax_r.set_yticks([])
    axes[0][0].set_title("Trace per chain", fontsize=10, loc="left")
    axes[0][1].set_title("Rank histograms per chain (dotted: uniform)", fontsize=10, loc="left")
    axes[-1][0].set_xlabel("draw")
    axes[-1][1].set_xlabel("rank of the draw among all chains")
    return fig


# ----------------------------------------------------------------------- html
CSS = f"""
body {{ background: {PAPER}; color: {INK}; font: 15px/1.5 "DejaVu Sans", Verdana, sans-serif; margin: 0; }}
header {{ background: {INK}; color: {PAPER}; padding: 18px 32px 14px; border-bottom: 5px solid {SAND}; }}
header h1 {{ margin: 0; font-size: 22px; letter-spacing: 0.5px; }}
header p {{ margin: 4px 0 0; color: {MIST}; }}
main {{ max-width: 1180px; margin: 0 auto; padding: 12px 32px 40px; }}
section {{ margin: 26px 0; }}
h2 {{ font-size: 17px; border-left: 6px solid {TEAL}; padding-left: 10px; margin-bottom: 8px; }}
figure {{ margin: 8px 0; }}
figure img {{ max-width: 100%; border: 1px solid {MIST}; background: white; }}
figcaption {{ font-size: 13px; color: #4a5a63; }}
table {{ border-collapse: collapse; font-size: 13px; }}
td, th {{ border-bottom: 1px solid {MIST}; padding: 3px 10px; text-align: left; }}
th {{ background: #ece6d8; }}
.ok {{ color: {TEAL}; font-weight: bold; }} .bad {{ color: {RUST}; font-weight: bold; }}
.verdict {{ padding: 10px 14px; border-radius: 3px; margin: 14px 0; }}
.verdict.ok {{ background: #e1ece8; border: 1px solid {TEAL}; }}
.verdict.bad {{ background: #f5e2d7; border: 1px solid {RUST}; }}
.caution {{ background: #fbf1d9; border: 2px dashed {RUST}; padding: 12px 16px; }}
.note {{ color: #4a5a63; font-style: italic; }}
code {{ background: #ece6d8; padding: 0 3px; }}
"""


def _fig_html(b64: str, alt: str, caption: str) -> str:
    return (f'<figure><img src="data:image/png;base64,{b64}" alt="{html.escape(alt)}">'
            f"<figcaption>{caption}</figcaption></figure>")


def _num(v, fmt=".4g"):
    try:
        return format(float(v), fmt)
    except (TypeError, ValueError):
        return html.escape(str(v))


SITE_PANELS = 6  # site maps drawn per report (the first ones, in the run's site order)


def _sites_html(s: dict, ds, grid, region, sites: list, cmap, extrapolated=None) -> str:
    """The per-site section of a run with a map per site: each site's posterior mean map on a
    common colour scale (the first SITE_PANELS sites) and a table of the sites' rates."""
    esc = html.escape
    shown = sites[:SITE_PANELS]
    vals = np.asarray(ds["site_intensity_mean"].values, float) * 1e6
    top = float(np.nanmax(vals[: len(shown)]))
    fig = _map_figure(grid, region, [(f"Site {name}, posterior mean", vals[j], cmap, "detections per km² per scan",
                                      0.0, top) for j, name in enumerate(shown)], extrapolated=extrapolated)
    more = f" Only the first {SITE_PANELS} of {len(sites)} sites are drawn." if len(sites) > SITE_PANELS else ""
    cap = ("Each site's clutter intensity, per-cell posterior mean (per km² per scan), on one colour scale: the shared "
           "field plus the site's deviation at the site's baseline. A site with few detections is pulled toward the "
           "shared field." + more)
    info = (s.get(s["model"]["kind"]) or {}).get("sites", {})
    rows = "".join(
        f"<tr><td>{esc(name)}</td><td>{esc(str(info.get(name, {}).get('scans')))}</td>"
        f"<td>{esc(str(info.get(name, {}).get('detections')))}</td><td>{_num(info.get(name, {}).get('raw_rate'))}</td>"
        f"<td>{_num((info.get(name, {}).get('rate') or {}).get('mean'))}</td>"
        f"<td>[{_num((info.get(name, {}).get('rate') or {}).get('q05'))}, "
        f"{_num((info.get(name, {}).get('rate') or {}).get('q95'))}]</td></tr>" for name in sites)
    return ("<h3>Sites</h3>" + _fig_html(_png(fig), "site intensity maps", cap)
            + "<table><tr><th>site</th><th>scans</th><th>detections</th><th>raw rate (N/K)</th>"
            f"<th>rate, posterior mean</th><th>90 % interval</th></tr>{rows}</table>"
            '<p class="note">Rates: expected detections per scan over the window at each site; export a site with '
            "<code>sceneprior export RUN --site NAME</code>.</p>")


def build_report(run) -> str:
    """The report page (HTML text) of a loaded run."""
    from .export import run_geometry
    from .gate import check_run
    from .results import extrapolation_note

    s = run.summary
    region, grid, w = run_geometry(run)
    ds = run.intensity
    post = run.posterior.posterior
    cm_mean, cm_sd, cm_prob = _cmaps()
    esc = html.escape
    parts: list[str] = []

    # maps
    mean = np.asarray(ds["intensity_mean"].values, float) * 1e6
    sd = np.asarray(ds["intensity_sd"].values, float) * 1e6
    extrapolated = np.asarray(ds["extrapolated"].values, bool) if "extrapolated" in ds else None
    fig = _map_figure(grid, region, [
        ("Intensity, posterior mean", mean, cm_mean, "detections per km² per scan", 0.0, float(np.nanmax(mean))),
        ("Intensity, posterior sd", sd, cm_sd, "detections per km² per scan", 0.0, float(np.nanmax(sd)) or 1.0),
    ], extrapolated=extrapolated)
    uniform = bool(np.nanmax(mean) - np.nanmin(mean) == 0)
    n_extra = int(extrapolated.sum()) if extrapolated is not None else 0
    cap = ("Per-cell posterior mean and standard deviation of the clutter intensity (per km² per scan; "
           "1 km² = 10⁶ m²). Hatched: permanent masks (no data, zero intensity in the export)."
           + (f" Dotted: {n_extra} cell{'s' if n_extra != 1 else ''} inside the window without exposure (covered "
              f"by gates in every scan): no data there — {extrapolation_note(s['model']['kind'])}; the export "
              "keeps their values and flags them." if n_extra else "")
           + (" The model is uniform, so both maps are flat over the window." if uniform else ""))
    sites = [str(x) for x in ds["site"].values] if "site_intensity_mean" in ds else []
    if sites:
        cap += (" This run has a map per site: these are its group map (the group-mean baseline times the shared "
                "field, no site deviation); each site's own map follows.")
    parts.append(f"<section><h2>Where the clutter is</h2>{_fig_html(_png(fig), 'intensity maps', cap)}")
    if sites:
        parts.append(_sites_html(s, ds, grid, region, sites, cm_mean, extrapolated))
    exc = [v for v in ds.data_vars if "exceed" in v.lower()]
    for v in exc[:3]:
        da = ds[v]
        extra = [d for d in da.dims if d not in grid.axes]
        if not extra:
            layers = [(v, np.asarray(da.values, float))]
        else:
            layers = [(f"{v} [{extra[0]} = {c}]", np.asarray(da.isel({extra[0]: i}).transpose(*grid.axes).values, float))
                      for i, c in enumerate(np.asarray(da[extra[0]].values)[:3])]
        for title, vals in layers:
            f = _map_figure(grid, region, [(title, vals, cm_prob, "probability", 0.0, 1.0)], extrapolated=extrapolated)
            parts.append(_fig_html(_png(f), title, f"Exceedance probability ({esc(str(da.attrs.get('long_name', v)))})."
                                   + (" Dotted: cells without exposure, as above." if n_extra else "")))
    if not exc:
        parts.append('<p class="note">No exceedance map: this run\'s intensity.nc holds no exceedance '
                     "probabilities (the model kind writes them when thresholds are named in the spec).</p>")
    parts.append("</section>")

    # counts and rate
    rate = _flat_draws(post, "rate").reshape(-1)
    counts, why = _scan_counts(run, region)
    if sites:
        counts, why = None, ("each scan's predictive law depends on its site and this page does not draw several "
                             "sites' laws yet; the per-site rates are in the table above")
    parts.append("<section><h2>How many per scan</h2>")
    if counts is not None:
        cp = count_predictive(run, counts)
        law = ("each scan's own predictive law: a mixture over posterior draws of Poisson (negative-binomial when "
               "over-dispersed) laws with that scan's expected count — its window (the window minus its gates, "
               "when known objects were gated out) and per-scan terms included"
               if cp.per_scan else
               "a mixture of Poisson laws over the posterior rate draws, the same for every scan (this run's "
               "per-scan data could not be read back)")
        parts.append(_fig_html(_png(_counts_figure(cp)), "per-scan counts", (
            f"Top: histogram of detections per scan in the window (empty scans included) against {law}; "
            f"{cp.draws} posterior draws. The line is the expected number of scans with each count, the band the "
            "5–95 % range of a Binomial(K, expected/K) count per bin (slightly wide when the scans' laws differ). "
            "Bottom: each scan's count in time order against its predictive mean and 5–95 % range.")))
    else:
        parts.append(f'<p class="note">Per-scan count histogram not drawn: {esc(why)}.</p>')
    f = _rate_figure(rate, s)
    parts.append(_fig_html(_png(f), "rate posterior", (
        "Posterior of the rate (expected clutter detections per scan over the window). Its own interval is "
        "what a tracker should quote; the integral of a per-cell quantile map is not a quantile of the rate.")))
    parts.append("</section>")

    # sampler
    dg = s.get("diagnostics", {})
    names = list(dg.get("variables", {}))
    f = _chain_figure(post, names)
    parts.append("<section><h2>Did the sampler mix</h2>")
    if f is not None:
        parts.append(_fig_html(_png(f), "trace and rank plots", (
            "Left: every chain's draws in order. Right: where each chain's draws rank among all draws — a chain "
            "that mixes covers all ranks evenly (dotted line).")))
    g = check_run(run, quantile=True)
    fit_gate = s.get("gate", {})
    converged = fit_gate.get("converged", all(c.passed for c in g.checks if c.diagnostic != "ess_tail"))
    verdict = ("ok", "Convergence gate passed: the posterior may be exported.") if converged else (
        "bad", "Convergence gate FAILED: <code>sceneprior export</code> refuses this run unless "
               "<code>--override-gate</code> is given.")
    parts.append(f'<div class="verdict {verdict[0]}">{verdict[1]}</div>')
    rows = "".join(
        f"<tr><td>{esc(n)}</td><td>{_num(v.get('r_hat'))}</td><td>{_num(v.get('ess_bulk'), '.0f')}</td>"
        f"<td>{_num(v.get('ess_tail'), '.0f')}</td></tr>" for n, v in dg.get("variables", {}).items())
    parts.append("<table><tr><th>variable</th><th>R-hat</th><th>bulk ESS</th><th>tail ESS</th></tr>"
                 f"{rows}</table>")
    steps = (f"; leapfrog steps per draw: mean {_num(dg['leapfrog_steps_mean'], '.1f')}, "
             f"max {esc(str(dg.get('leapfrog_steps_max')))}" if "leapfrog_steps_mean" in dg else "")
    parts.append(f"<p>Divergences: {esc(str(dg.get('divergences')))}; chains × draws: {esc(str(dg.get('chains')))} × "
                 f"{esc(str(dg.get('draws')))}{steps}.</p>")
    crow = "".join(
        f"<tr><td>{esc(c.variable)}</td><td>{esc(c.diagnostic)}</td><td>{_num(c.value)}</td>"
        f"<td>{esc(c.op)} {c.limit:g}</td><td class=\"{'ok' if c.passed else 'bad'}\">"
        f"{'pass' if c.passed else 'FAIL'}</td></tr>" for c in g.checks)
    parts.append("<h3>Gate checks</h3><table><tr><th>variable</th><th>diagnostic</th><th>value</th>"
                 f"<th>limit</th><th></th></tr>{crow}</table>")
    parts.append('<p class="note">Tail ESS rows apply only to a quantile export. '
                 + esc(" ".join(g.notes)) + "</p></section>")

    # run facts
    d = s.get("data", {})
    r = s.get("rate", {})
    prior = s.get("model", {}).get("prior", {})
    prior_rows = "".join(f"<tr><td>{esc(k)}</td><td>{esc(str(v))}</td></tr>" for k, v in prior.items()
                         if isinstance(v, str))
    inputs = "".join(f"<tr><td>{esc(k)}</td><td><code>{esc(v)}</code></td></tr>"
                     for k, v in (d.get("inputs_sha256") or {}).items())
    parts.append(
        "<section><h2>What was fitted</h2><table>"
        f"<tr><th>model</th><td>{esc(s['model']['kind'])}</td></tr>"
        f"<tr><th>frame</th><td>{esc(s['space']['frame'])}, {s['space']['cells'][0]}×{s['space']['cells'][1]} cells, "
        f"masks: {esc(', '.join(s['space']['masks']) or 'none')}</td></tr>"
        f"<tr><th>window</th><td>{_num(s['space']['window_area_m2'] / 1e6)} km² (region minus masks)</td></tr>"
        f"<tr><th>scans</th><td>{d.get('scans')} ({d.get('empty_scans')} empty)</td></tr>"
        f"<tr><th>detections</th><td>{d.get('detections_used')} used; {d.get('dropped_in_masks')} dropped in masks, "
        f"{d.get('dropped_outside_bounds')} outside the bounds</td></tr>"
        f"<tr><th>rate</th><td>{_num(r.get('mean'))} detections/scan, 90 % interval "
        f"[{_num(r.get('q05'))}, {_num(r.get('q95'))}]</td></tr>"
        f"<tr><th>sampler</th><td>{esc(str(s.get('sampler')))}</td></tr>"
        f"<tr><th>spec</th><td>{esc(str(d.get('spec')))} <code>{esc(str(d.get('spec_sha256')))}</code></td></tr>"
        "</table><h3>Priors</h3><table>" + prior_rows + "</table><h3>Inputs (SHA-256)</h3><table>"
        + inputs + "</table>"
        + "".join(f'<p class="note">Note: {esc(n)}</p>' for n in model_notes(s))
        + "</section>")
    parts.append(f'<section><h2>Caution</h2><div class="caution">{esc(s.get("caution", CAUTION))}</div></section>')

    title = f"sceneprior report — run {s['run']}"
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{esc(title)}</title><style>{CSS}</style></head><body>"
            f"<header><h1>{esc(title)}</h1><p>{esc(s['model']['kind'])} clutter model · {esc(s['space']['frame'])} "
            f"field of view · written {esc(str(s.get('written_utc')))} · sceneprior "
            f"{esc(s.get('versions', {}).get('sceneprior', '?'))}</p></header><main>"
            + "".join(parts) + "</main></body></html>\n")


def write_report(run, out: str | Path | None = None) -> Path:
    """Write RUN/report.html (or ``out``) and return its path."""
    if not hasattr(run, "summary"):
        run = load_run(run)
    page = build_report(run)
    path = Path(out) if out is not None else Path(run.path) / REPORT_FILE
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(page)
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path
