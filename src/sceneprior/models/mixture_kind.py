"""The `mixture` model kind: binds ``models.mixture`` (the numpyro Gaussian-mixture PPP,
fitted to the points) to the fit pipeline — setup from the binned statistics' points,
per-cell intensity for maps, the birth-mixture summary the tracker export takes.

Birth workflow: the "detections" table holds birth events (one row per new object: step
id and state position x, y in metres), the scans table lists every step (empty steps
count, as empty scans do) with an optional ``duration`` column in seconds, so that rates
can be given per step and per second when step intervals are irregular.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from ..geometry import polar_to_cartesian
from . import mixture

DEFAULT_PRIOR = dict(mixture.DEFAULT_PRIOR)
QUAD_ORDER = 24  # Gauss–Legendre order per window rectangle for masked / polar windows


def setup(stats, prior: dict, model_spec):
    from .registry import ModelSetup

    opts = model_spec.options
    K = opts.get("components", 2)
    if not isinstance(K, int) or isinstance(K, bool) or K < 1:
        raise InputError(f"model.components must be a whole number ≥ 1 (mixture components), got {K!r}")
    diagonal = opts.get("diagonal", False)
    if not isinstance(diagonal, bool):
        raise InputError("model.diagonal must be true or false")
    reg = stats.region
    if reg.frame == "polar":
        x, y = polar_to_cartesian(stats.points0, stats.points1)
    else:
        x, y = stats.points0, stats.points1
    points = np.column_stack([x, y]) if x.size else np.zeros((0, 2))
    if reg.frame == "cartesian" and not reg.masks:
        box = (tuple(reg.bounds0), tuple(reg.bounds1))
        kw = {"box": box, "bbox": box, "mass_rule": "exact normal CDFs (diagonal) / 1-D Gauss–Legendre "
              "order 64 of the conditional normal CDF (correlated)"}
    else:
        n0, n1, w = reg.quadrature(QUAD_ORDER)
        nx, ny = polar_to_cartesian(n0, n1) if reg.frame == "polar" else (n0, n1)
        nodes = np.column_stack([nx, ny])
        bbox = ((float(nx.min()), float(nx.max())), (float(ny.min()), float(ny.max())))
        kw = {"quadrature": (nodes, w), "bbox": bbox,
              "mass_rule": f"tensor Gauss–Legendre order {QUAD_ORDER} over the window's pieces "
                           "(Region.quadrature); its error is checked at the posterior mean"}
    rule = kw.pop("mass_rule")
    inputs = dict(points=points, n_steps=stats.n_scans, n_components=K, diagonal=diagonal,
                  prior={k: prior[k] for k in DEFAULT_PRIOR}, **kw)
    return ModelSetup(inputs=inputs, extra={
        "components": K, "diagonal": diagonal, "mass_rule": rule,
        "init_strategy": _init(points, kw["bbox"], K, inputs["prior"]),
        "dims": {"weight": ["component"], "weight_in": ["component"], "mass": ["component"],
                 "mean": ["component", "xy"], "scale": ["component", "xy"],
                 "cov": ["component", "xy", "xy2"]},
        "coords": {"component": list(range(K)), "xy": ["x", "y"], "xy2": ["x", "y"]},
    })


def _init(points, bbox, K, prior):
    """Start the chains with component means on well-separated birth events (greedy
    farthest-point choice) and standard deviations at their prior median. Only the
    starting point depends on the data; the posterior does not. Without it a chain can
    settle in the broad-component local mode when births cluster in small areas."""
    from numpyro.infer import init_to_value
    from scipy.special import gammaincinv
    import jax.numpy as jnp

    bb = np.asarray(bbox, float)
    theta = prior["scale_fraction"] * (bb[:, 1] - bb[:, 0])
    med = gammaincinv(prior["scale_shape"], 0.5) * theta
    values = {"scale_raw": jnp.tile(jnp.asarray(med), (K, 1))}
    if points.shape[0] >= K:
        centre = np.median(points, axis=0)
        chosen = [int(np.argmin(((points - centre) ** 2).sum(1)))]
        for _ in range(1, K):
            d = np.min(((points[:, None, :] - points[chosen][None]) ** 2).sum(-1), axis=1)
            chosen.append(int(np.argmax(d)))
        m = points[chosen]
        m[:, 0] = np.clip(m[:, 0], bb[0, 0] + 1e-6 * (bb[0, 1] - bb[0, 0]), bb[0, 1] - 1e-6 * (bb[0, 1] - bb[0, 0]))
        m[:, 1] = np.clip(m[:, 1], bb[1, 0] + 1e-6 * (bb[1, 1] - bb[1, 0]), bb[1, 1] - 1e-6 * (bb[1, 1] - bb[1, 0]))
        values["mean_x_raw"] = jnp.asarray(m[:, 0])
        values["mean_y_raw"] = jnp.asarray(m[:, 1])
    return init_to_value(values=values)


def _cell_points(grid):
    """2×2 Gauss–Legendre points per cell (Cartesian metres) and their area weights."""
    g = np.array([-1.0, 1.0]) / np.sqrt(3.0)
    e0, e1 = grid.edges0, grid.edges1
    m0, h0 = 0.5 * (e0[1:] + e0[:-1]), 0.5 * np.diff(e0)
    m1, h1 = 0.5 * (e1[1:] + e1[:-1]), 0.5 * np.diff(e1)
    c0 = (m0[:, None] + h0[:, None] * g[None, :])  # (n0, 2)
    c1 = (m1[:, None] + h1[:, None] * g[None, :])  # (n1, 2)
    A0, A1 = np.meshgrid(np.arange(grid.shape[0]), np.arange(grid.shape[1]), indexing="ij")
    p0 = c0[A0.ravel()][:, :, None] * np.ones((1, 1, 2))
    p1 = c1[A1.ravel()][:, None, :] * np.ones((1, 2, 1))
    p0, p1 = p0.reshape(-1, 4), p1.reshape(-1, 4)
    if grid.frame == "polar":
        x, y = polar_to_cartesian(p0, p1)
        jac = p0  # r dr dθ: weights ∝ r at each node
    else:
        x, y, jac = p0, p1, np.ones_like(p0)
    wts = jac / jac.sum(axis=1, keepdims=True)  # average over the cell, area-weighted
    return x, y, wts


def cell_intensity(posterior: dict, stats, setup) -> np.ndarray:
    """(chain, draw, n_cells) cell-average birth intensity [per m² per step]: the mixture
    density averaged over each cell by a 2×2 Gauss–Legendre rule (area-weighted in polar)."""
    x, y, wts = _cell_points(stats.grid)
    w = np.asarray(posterior["weight"])
    m = np.asarray(posterior["mean"])
    cov = np.asarray(posterior["cov"])
    c, d, K = w.shape
    out = np.zeros((c * d, stats.grid.n_cells))
    w, m, cov = w.reshape(c * d, K), m.reshape(c * d, K, 2), cov.reshape(c * d, K, 2, 2)
    det = cov[..., 0, 0] * cov[..., 1, 1] - cov[..., 0, 1] ** 2
    for j in range(K):
        dx = x[None] - m[:, j, 0, None, None]
        dy = y[None] - m[:, j, 1, None, None]
        a, b, cc = cov[:, j, 1, 1, None, None], -cov[:, j, 0, 1, None, None], cov[:, j, 0, 0, None, None]
        q = (a * dx * dx + 2 * b * dx * dy + cc * dy * dy) / det[:, j, None, None]
        dens = np.exp(-0.5 * q) / (2 * np.pi * np.sqrt(det[:, j, None, None]))
        out += w[:, j, None] * (dens * wts[None]).sum(axis=-1)
    return out.reshape(c, d, -1)


def describe_prior(prior: dict, stats) -> dict:
    reg = stats.region
    if reg.frame == "polar":
        n0, n1, _ = reg.quadrature(4)
        nx, ny = polar_to_cartesian(n0, n1)
        bbox = ((nx.min(), nx.max()), (ny.min(), ny.max()))
    else:
        bbox = (reg.bounds0, reg.bounds1)
    return {**mixture.describe_prior({k: prior[k] for k in DEFAULT_PRIOR}, bbox),
            "parameters": dict(prior), "defaults": dict(DEFAULT_PRIOR)}


def summary(result) -> dict:
    post = result.idata.posterior
    K = result.setup.extra["components"]

    def flat(name, shape=()):
        return np.asarray(post[name]).reshape((-1,) + shape)

    w, w_in, mass = flat("weight", (K,)), flat("weight_in", (K,)), flat("mass", (K,))
    mean, cov = flat("mean", (K, 2)), flat("cov", (K, 2, 2))
    dur = result.recording.scans_meta.get("duration")
    per_second = None
    if dur is not None:
        d = np.asarray(dur, float)
        if np.all(np.isfinite(d)) and np.all(d > 0):
            per_second = float(result.stats.n_scans / d.sum())  # steps per second
    comps = []
    for j in range(K):
        comps.append({
            "weight_untruncated": {"mean": float(w[:, j].mean()), "sd": float(w[:, j].std(ddof=1)),
                                   "units": "expected new objects per step, whole plane (w_j)"},
            "weight_in_region": {"mean": float(w_in[:, j].mean()), "sd": float(w_in[:, j].std(ddof=1)),
                                 "units": "expected new objects per step inside the window (w_j·P_j(R))"},
            "in_region_mass": float(mass[:, j].mean()),
            "mean_m": mean[:, j].mean(axis=0).tolist(),
            "mean_sd_m": mean[:, j].std(axis=0, ddof=1).tolist(),
            "cov_m2": cov[:, j].mean(axis=0).tolist(),
        })
    total_in = w_in.sum(axis=1)
    warnings = []
    for j in range(K):
        if w_in[:, j].mean() < 0.05 * total_in.mean():
            warnings.append(f"component {j} carries {w_in[:, j].mean() / total_in.mean():.1%} of the rate: "
                            "more components than the data identify?")
    for i in range(K):
        for j in range(i + 1, K):
            s = 0.5 * (cov[:, i].mean(0) + cov[:, j].mean(0))
            dm = mean[:, i].mean(0) - mean[:, j].mean(0)
            bhat = 0.125 * dm @ np.linalg.solve(s, dm)  # Bhattacharyya distance, equal-cov part
            if bhat < 0.5:
                warnings.append(f"components {i} and {j} overlap (Bhattacharyya distance {bhat:.2f} < 0.5)")
    out = {
        "frame": "cartesian state space, metres (polar positions converted: x = r sin θ, y = r cos θ)",
        "labelling": mixture.LABELLING,
        "mass_rule": result.setup.extra["mass_rule"],
        "components": comps,
        "rate_per_step": {"mean": float(total_in.mean()), "sd": float(total_in.std(ddof=1)),
                          "units": "expected new objects per step inside the window"},
        "warnings": warnings,
    }
    # the form the tracker export takes (DEVELOPERS.md, "Tracker export")
    out["birth"] = {
        "components": [{"weight": c["weight_untruncated"]["mean"], "weight_sd": c["weight_untruncated"]["sd"],
                        "weight_in_region": c["weight_in_region"]["mean"], "mass_in_region": c["in_region_mass"],
                        "mean": c["mean_m"], "cov": c["cov_m2"]} for c in comps],
        "state_axes": ["x", "y"], "state_units": ["m", "m"],
        "units": "expected new objects per step",
        "rate_per_step": out["rate_per_step"], "labelling": mixture.LABELLING,
    }
    if per_second is not None:
        out["birth"]["step_duration_s"] = 1.0 / per_second
    if per_second is not None:
        out["rate_per_second"] = {"mean": float(total_in.mean() * per_second),
                                  "sd": float(total_in.std(ddof=1) * per_second),
                                  "units": "expected new objects per second inside the window "
                                           "(from the steps' durations)"}
    return out
