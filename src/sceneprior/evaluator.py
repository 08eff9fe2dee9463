"""Evaluate an exported tracker configuration (``tracker.json``) inside a tracker.

This module never imports jax or numpyro (a test imports it with both blocked): it needs
numpy and the package's own geometry (numpy + shapely) only, so a tracker process can
use it without the fitting stack.

    from sceneprior.evaluator import load_config
    cfg = load_config("runs/lowmarsh-uniform/tracker.json")
    cfg.rate                                    # expected clutter detections per scan
    cfg.clutter_intensity(z_xy)                 # per m² per scan at Cartesian points (n, 2)
    cfg.clutter_intensity(z_rb, frame="polar", per="m_rad")   # per m per rad per scan
    cfg.clutter_density(z_xy)                   # per m², integrates to 1 over the window
    cfg.detection_probability(z_xy)             # P_D (exported with --detection PD_RUN)

Coordinates (the project's conventions): Cartesian x east, y north in metres; polar range
in metres and bearing in DEGREES clockwise from north, x = r·sin θ, y = r·cos θ, with the
polar origin (the sensor) at x = y = 0 of the Cartesian frame. "rad" in a unit means
radians of bearing, although bearings are given in degrees.

Units returned:
* ``frame="cartesian"``: intensity per m² per scan (density per m²).
* ``frame="polar"``: you must say which measure your tracker integrates over:
  ``per="m2"`` gives per m² (the same number as at the Cartesian point),
  ``per="m_rad"`` gives per m of range per rad of bearing, λ·r — what a tracker whose
  measurement model is (r, θ) needs (DESIGN.md §4). ∫∫ λ·r dr dθ over the window is the rate.

Interpolation:
* ``"nearest"`` (default): piecewise constant, the value of the cell that contains the
  point. It preserves every cell's integral, so ∫_W λ dA = Σ_c λ_c·|c ∩ W| = the exported
  rate exactly (also per m·rad, where λ_c·r is integrated over dr dθ).
* ``"bilinear"``: bilinear between cell centres in the grid's native coordinates (x, y or
  range, bearing), held constant beyond the outermost centres; fully masked neighbours
  are left out and the weights renormalised. Smoother, but it does NOT preserve cell
  integrals: its integral over the window differs from the rate.

Both are zero outside the region's bounds and inside permanent masks (also in the masked
part of a cell that a mask cuts).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from .geometry import Grid, PolygonMask, Region, SectorMask, _wrap_bearing, cartesian_to_polar, polar_to_cartesian

SUPPORTED_SCHEMA = "sceneprior.tracker/1"
INTERPOLATIONS = ("nearest", "bilinear")
FRAMES = ("cartesian", "polar")
PER = ("m2", "m_rad")
PD_ESTIMATES = ("mean", "q05", "q50", "q95")


def _region(sec: dict, what: str) -> Region:
    masks = []
    for m in sec.get("masks", []):
        if m.get("kind") == "polygon":
            masks.append(PolygonMask(vertices=np.asarray(m["vertices"], float), name=m.get("name", "")))
        elif m.get("kind") == "sector":
            masks.append(SectorMask(range=tuple(m["range"]), bearing=tuple(m["bearing"]), name=m.get("name", "")))
        else:
            raise ValueError(f"{what}: mask of unknown kind {m.get('kind')!r}")
    b0, b1 = sec["bounds"]
    return Region(frame=sec["frame"], bounds0=tuple(b0), bounds1=tuple(b1), masks=tuple(masks))


def _values(sec: dict, shape, what: str) -> np.ndarray:
    v = np.array([[np.nan if x is None else float(x) for x in row] for row in sec["values"]], dtype=float)
    if v.shape != tuple(shape):
        raise ValueError(f"{what}: values have shape {v.shape}, the grid has {tuple(shape)}")
    return v


class TrackerConfig:
    """A loaded tracker configuration. Attributes: ``doc`` (the JSON dict), ``rate``
    (detections per scan, the map's integral), ``rate_interval_90`` (the rate's own
    posterior 5–95 % interval), ``frame``, ``region``, ``grid``, ``caution``."""

    def __init__(self, doc: dict, source: str = "<dict>"):
        if not isinstance(doc, dict) or doc.get("schema") != SUPPORTED_SCHEMA:
            got = doc.get("schema") if isinstance(doc, dict) else type(doc).__name__
            raise ValueError(f"{source}: not a sceneprior tracker configuration of schema "
                             f"{SUPPORTED_SCHEMA!r} (found {got!r}); re-export it with this version")
        self.doc = doc
        self.source = source
        try:
            c = doc["clutter"]
            g = c["grid"]
            self.region = _region(doc["region"], source)
            self.grid = Grid(g["frame"], np.asarray(g["edges"][0], float), np.asarray(g["edges"][1], float))
            shape = self.grid.shape
            self._lam = _values(c["intensity"], shape, f"{source}: clutter.intensity")
            self.window_area = np.asarray(g["window_area_m2"], float)
            self.rate = float(c["rate"]["value"])
            self.rate_interval_90 = tuple(float(v) for v in c["rate"]["interval_90"])
        except (KeyError, TypeError, IndexError) as exc:
            raise ValueError(f"{source}: incomplete tracker configuration (missing or malformed {exc})") from None
        if self.region.frame != self.grid.frame:
            raise ValueError(f"{source}: region frame {self.region.frame!r} differs from grid frame {self.grid.frame!r}")
        self.frame = self.grid.frame
        self.caution = doc.get("caution", "")
        self._lam_flat = np.where(np.isfinite(self._lam), self._lam, 0.0).reshape(-1)
        self._birth = None
        b = doc.get("birth")
        if b:
            try:
                self._birth = {
                    "w": np.asarray([k["weight"] for k in b["components"]], float),
                    "m": np.asarray([k["mean"] for k in b["components"]], float),
                    "P": np.asarray([k["cov"] for k in b["components"]], float),
                    "region": _region(b["region"], f"{source}: birth.region"),
                    "axes": list(b["state_axes"]),
                }
            except (KeyError, TypeError, ValueError) as exc:
                raise ValueError(f"{source}: malformed birth section ({exc})") from None
            d = self._birth["m"].shape[1]
            if self._birth["P"].shape[1:] != (d, d):
                raise ValueError(f"{source}: birth covariances must be {d}×{d}")
            self._birth["L"] = np.linalg.cholesky(self._birth["P"])
        self._pd = None
        pd = doc.get("detection_probability")
        if pd:
            try:
                c = pd["curve"]
                self._pd = {"r": np.asarray(c["range_m"], float),
                            **{k: np.asarray(c[k], float) for k in PD_ESTIMATES},
                            "region": _region(pd["region"], f"{source}: detection_probability.region")}
            except (KeyError, TypeError, ValueError) as exc:
                raise ValueError(f"{source}: malformed detection_probability section ({exc})") from None
            if self._pd["r"].ndim != 1 or self._pd["r"].size < 2 or np.any(np.diff(self._pd["r"]) <= 0):
                raise ValueError(f"{source}: detection_probability.curve.range_m must increase")

    # ------------------------------------------------------------------ inputs
    @staticmethod
    def _points(points, ncol: int, what: str):
        try:
            a = np.asarray(points, dtype=float)
        except (TypeError, ValueError):
            raise ValueError(f"{what} must be an array of numbers, shape (..., {ncol})") from None
        if a.ndim == 0 or a.shape[-1] != ncol:
            raise ValueError(f"{what} must have shape (..., {ncol}) (one row per point, {ncol} columns); "
                             f"got shape {a.shape}")
        bad = ~np.isfinite(a).all(axis=-1)
        if bad.any():
            first = np.argwhere(bad)[0]
            raise ValueError(f"{what} contain NaN or infinite coordinates (first at index {tuple(int(i) for i in first)})")
        return a

    def _native(self, points, frame: str, per):
        """Native (grid-frame) coordinates of the points and the factor to the requested measure."""
        if frame not in FRAMES:
            raise ValueError(f"frame must be 'cartesian' or 'polar', got {frame!r}")
        if frame == "cartesian":
            if per not in (None, "m2"):
                raise ValueError(f"per={per!r} applies to polar points only; Cartesian points give per m² (per='m2')")
            a = self._points(points, 2, "points (x, y in m)")
            u, v = a[..., 0], a[..., 1]
            factor = None
            if self.frame == "polar":
                u, v = cartesian_to_polar(u, v)
            return u, v, factor
        if per not in PER:
            raise ValueError("polar points need per='m2' (per m² per scan) or per='m_rad' (per m of range per "
                             f"rad of bearing per scan, = λ·r, what a polar measurement model needs); got per={per!r}")
        a = self._points(points, 2, "points (range in m, bearing in degrees)")
        r, b = a[..., 0], a[..., 1]
        if (r < 0).any():
            raise ValueError("points: range must be ≥ 0 m")
        factor = r if per == "m_rad" else None
        if self.frame == "polar":
            return r, b, factor
        x, y = polar_to_cartesian(r, b)
        return x, y, factor

    def _inside(self, region: Region, u, v) -> np.ndarray:
        ok = region.inside_bounds(u, v)
        if region.masks and ok.any():
            ok = ok & ~region.in_mask(u, v)
        return ok

    def _lookup(self, u, v, interpolation: str) -> np.ndarray:
        if interpolation not in INTERPOLATIONS:
            raise ValueError(f"interpolation must be 'nearest' or 'bilinear', got {interpolation!r}")
        inside = self._inside(self.region, u, v)
        if interpolation == "nearest":
            idx = self.grid.locate(u, v)
            val = np.where(idx >= 0, self._lam_flat[np.clip(idx, 0, None)], 0.0)
        else:
            val = self._bilinear(u, v)
        return np.where(inside, val, 0.0)

    def _bilinear(self, u, v) -> np.ndarray:
        if self.frame == "polar":
            v = _wrap_bearing(v, self.grid.edges1[0])
        i, fu = _axis_weights(self.grid.centres0, u)
        j, fv = _axis_weights(self.grid.centres1, v)
        n0, n1 = self.grid.shape
        i1, j1 = np.minimum(i + 1, n0 - 1), np.minimum(j + 1, n1 - 1)
        num = np.zeros(np.shape(u))
        den = np.zeros(np.shape(u))
        for ii, jj, wt in ((i, j, (1 - fu) * (1 - fv)), (i1, j, fu * (1 - fv)),
                           (i, j1, (1 - fu) * fv), (i1, j1, fu * fv)):
            val = self._lam[ii, jj]
            ok = np.isfinite(val)
            num += np.where(ok, wt * np.where(ok, val, 0.0), 0.0)
            den += np.where(ok, wt, 0.0)
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)

    # ------------------------------------------------------------------ public
    def clutter_intensity(self, points, frame: str = "cartesian", per: str | None = None,
                          interpolation: str = "nearest") -> np.ndarray:
        """Clutter intensity at ``points`` (array (..., 2)), vectorised; shape (...).

        frame="cartesian": columns x, y [m], result per m² per scan.
        frame="polar": columns range [m], bearing [deg]; per="m2" → per m² per scan,
        per="m_rad" → per m of range per rad of bearing per scan (λ·r).
        Zero outside the region and inside permanent masks. ValueError for wrong shapes,
        non-finite coordinates, unknown frame/per/interpolation.
        """
        u, v, factor = self._native(points, frame, per)
        lam = self._lookup(u, v, interpolation)
        return lam if factor is None else lam * factor

    def clutter_density(self, points, frame: str = "cartesian", per: str | None = None,
                        interpolation: str = "nearest") -> np.ndarray:
        """Spatial density f = λ / rate at ``points`` (per m², or per m·rad for polar points
        with per="m_rad"); integrates to 1 over the window with nearest interpolation."""
        return self.clutter_intensity(points, frame, per, interpolation) / self.rate

    @property
    def has_birth(self) -> bool:
        return self._birth is not None

    def birth_intensity(self, states) -> np.ndarray:
        """Birth intensity Σ_j w_j N(x; m_j, P_j) at ``states`` (array (..., d), d = the
        dimension of the fitted states, e.g. x, y [m] or x, y, vx, vy), expected new objects
        per step per unit state volume; untruncated weights w_j, zero where the position
        (the first two state columns, in the birth region's frame) is outside the region or
        in a mask, so its integral over the region is Σ_j w_j·P_j(R)."""
        if self._birth is None:
            raise ValueError(f"{self.source}: this configuration has no birth intensity "
                             f"(run {self.doc.get('provenance', {}).get('run')!r} fitted clutter only)")
        b = self._birth
        d = b["m"].shape[1]
        a = self._points(states, d, f"states ({', '.join(b['axes'])})")
        diff = a[..., None, :] - b["m"]  # (..., J, d)
        z = np.linalg.solve(b["L"], diff[..., None])[..., 0]  # L⁻¹ (x − m)
        maha = np.sum(z * z, axis=-1)
        log_det = 2.0 * np.sum(np.log(np.diagonal(b["L"], axis1=-2, axis2=-1)), axis=-1)
        pdf = np.exp(-0.5 * maha - 0.5 * (d * math.log(2 * math.pi) + log_det))
        val = pdf @ b["w"]
        inside = self._inside(b["region"], a[..., 0], a[..., 1])
        return np.where(inside, val, 0.0)

    @property
    def has_detection_probability(self) -> bool:
        return self._pd is not None

    def detection_probability(self, points, frame: str = "cartesian", estimate: str = "mean") -> np.ndarray:
        """P_D at ``points`` (array (..., 2): x, y [m], or with frame="polar" range [m],
        bearing [deg]), vectorised; shape (...). Dimensionless probability per scan that an
        object there yields a detection in its gate.

        ``estimate``: "mean" (posterior mean of P_D(r), default), "q05", "q50" or "q95"
        (per-range posterior quantiles). Linear interpolation in range r = √(x² + y²) on the
        exported curve; 0 outside the detection run's region and inside its permanent masks
        (the sensor does not see there), like the clutter intensity. ValueError for bad
        shapes, non-finite points, an unknown frame or estimate, or a file without the section."""
        if self._pd is None:
            raise ValueError(f"{self.source}: this configuration has no detection_probability section "
                             "(export with --detection PD_RUN)")
        if estimate not in PD_ESTIMATES:
            raise ValueError(f"estimate must be one of {', '.join(PD_ESTIMATES)}, got {estimate!r}")
        if frame not in FRAMES:
            raise ValueError(f"frame must be 'cartesian' or 'polar', got {frame!r}")
        what = "points (x, y in m)" if frame == "cartesian" else "points (range in m, bearing in degrees)"
        a = self._points(points, 2, what)
        reg = self._pd["region"]
        if frame == "cartesian":
            x, y = a[..., 0], a[..., 1]
            r = np.hypot(x, y)
            u, v = (x, y) if reg.frame == "cartesian" else cartesian_to_polar(x, y)
        else:
            r, b = a[..., 0], a[..., 1]
            if (r < 0).any():
                raise ValueError("points: range must be ≥ 0 m")
            u, v = (r, b) if reg.frame == "polar" else polar_to_cartesian(r, b)
        val = np.interp(r, self._pd["r"], self._pd[estimate])
        return np.where(self._inside(reg, u, v), val, 0.0)

    def cardinality_pmf(self, n) -> np.ndarray:
        """P(n clutter detections in a scan) under the exported cardinality: Poisson(rate),
        or the negative binomial of an over-dispersed run (scipy.stats.nbinom(n, p) form)."""
        k = np.asarray(n)
        if not np.issubdtype(k.dtype, np.integer) or (k < 0).any():
            raise ValueError("n must be non-negative whole numbers")
        k = k.astype(float)
        lg = np.vectorize(math.lgamma, otypes=[float])
        card = self.doc.get("cardinality", {"distribution": "poisson", "mean": self.rate})
        if card["distribution"] == "negative_binomial":
            r, p = card["scipy_nbinom"]["n"], card["scipy_nbinom"]["p"]
            return np.exp(lg(k + r) - lg(r) - lg(k + 1) + r * math.log(p) + k * math.log1p(-p))
        mu = float(card["mean"])
        return np.exp(k * math.log(mu) - mu - lg(k + 1))


def _axis_weights(centres: np.ndarray, u):
    """Lower index and fraction for linear interpolation between centres, constant beyond."""
    n = len(centres)
    if n == 1:
        return np.zeros(np.shape(u), dtype=np.int64), np.zeros(np.shape(u))
    i = np.clip(np.searchsorted(centres, u, side="right") - 1, 0, n - 2)
    f = (u - centres[i]) / (centres[i + 1] - centres[i])
    return i, np.clip(f, 0.0, 1.0)


def load_config(path) -> TrackerConfig:
    """Read ``tracker.json`` (written by ``sceneprior export``)."""
    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ValueError(f"{p}: file not found") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ValueError(f"{p}: not a JSON file ({exc})") from None
    return TrackerConfig(doc, source=str(p))


__all__ = ["TrackerConfig", "load_config", "SUPPORTED_SCHEMA"]
