"""Model kinds with per-scan terms: "uniform+overdispersion", "loglinear+scan_covariates+time", ...

A spec's ``model.overdispersion``, ``model.scan_covariates`` and ``[model.time]`` turn the
base kind into a composite kind (``spec.composite_kind``): the same numpyro function,
called with ``scan_terms`` (``models.scanterms``), no conjugate shortcut, extra prior keys
and hyperparameters, and a summary that carries the per-scan terms and, when
over-dispersed, the negative-binomial cardinality. The composite name is what summary.json
reports as the model kind, so a run says which model was fitted.
"""

from __future__ import annotations

import inspect
from functools import lru_cache
from pathlib import Path

import numpy as np

from ..errors import InputError
from . import scanterms


def read_scan_meta(stats, model_spec) -> dict:
    """Scans-table columns aligned with the recording's scans (the spec stashes the table's
    path in the model options as ``_scans``)."""
    src = model_spec.options.get("_scans") if model_spec is not None else None
    if not src:
        raise InputError("model.scan_covariates / model.time / the sites model need a scans table "
                         "(data.scans) with those columns; data.n_scans has no columns")
    from ..tables import _scan_keys, read_table

    path = Path(src["path"])
    table = read_table(path, "scans")
    ids = _scan_keys(np.asarray(table.column(src["scan"]).to_numpy(zero_copy_only=False)), path, src["scan"])
    if ids.size != stats.n_scans or not np.array_equal(ids.astype(str), np.asarray(stats.scan_ids).astype(str)):
        raise InputError(f"{path}: the scans table changed since it was read; re-run the fit")
    return {nm: table.column(nm).to_numpy(zero_copy_only=False)
            for nm in table.column_names if nm != src["scan"]}


def split_kind(name: str) -> tuple[str, tuple[str, ...]]:
    base, *tokens = name.split("+")
    return base, tuple(tokens)


@lru_cache(maxsize=None)
def variant_kind(name: str):
    """The :class:`~sceneprior.models.registry.ModelKind` of a composite kind name."""
    from .registry import MODELS, ModelKind, ModelSetup  # noqa: F401  (ModelSetup re-used by setup)

    base_name, tokens = split_kind(name)
    if base_name not in MODELS:
        raise InputError(f"unknown model kind {base_name!r}; available: {', '.join(MODELS)}")
    unknown = [t for t in tokens if t not in scanterms.TOKENS]
    if unknown:
        raise InputError(f"unknown model option(s) {unknown} in kind {name!r}")
    base = MODELS[base_name]
    if base.fn is None or "scan_terms" not in inspect.signature(base.fn).parameters:
        raise InputError(f"model kind '{base_name}' does not take per-scan terms yet "
                         "(model.overdispersion, model.scan_covariates, [model.time]); drop them")
    prior_defaults = dict(base.default_prior)
    for t in tokens:
        prior_defaults.update(scanterms.PRIOR_DEFAULTS[t])
    hyper = tuple(base.hyper)
    if "overdispersion" in tokens:
        hyper += ("phi",)
    if "scan_covariates" in tokens:
        hyper += ("scan_coef",)
    if "time" in tokens:
        hyper += ("time_step_sd",)

    def setup(stats, prior, model_spec):
        s = base.setup(stats, prior, model_spec)
        s.extra.update(s.extra.pop("with_scan_terms", None) or {})  # the base's settings for a per-scan model
        needs_meta = "scan_covariates" in tokens or "time" in tokens
        meta = read_scan_meta(stats, model_spec) if needs_meta else {}
        design = scanterms.build_design(meta, stats.n_scans, model_spec.options, "model")
        s.inputs["scan_terms"] = scanterms.scan_inputs(design, stats.scan_counts, prior, tokens,
                                                       stats.gated_area)
        s.extra["scan_design"] = design
        dims = dict(s.extra.get("dims") or {})
        coords = dict(s.extra.get("coords") or {})
        if design.names:
            dims.update({"scan_coef_std": ["scan_covariate"], "scan_coef": ["scan_covariate"]})
            coords["scan_covariate"] = list(design.names)
        if design.n_bins:
            dims.update({"time_z": ["time_bin_contrast"], "time_effect": ["time_bin"]})
            coords["time_bin"] = list(range(design.n_bins))
            coords["time_bin_contrast"] = list(range(design.n_bins - 1))
        s.extra["dims"], s.extra["coords"] = dims, coords
        return s

    def cell_intensity(posterior, stats, setup):
        lam = base.cell_intensity(posterior, stats, setup)
        ratio = np.asarray(posterior["rate"]) / np.asarray(posterior["base_rate"])  # mean_k m_k
        return lam * ratio[..., None]

    def describe_prior(prior, stats):
        return {**base.describe_prior(prior, stats), **scanterms.describe_prior(prior, tokens)}

    def summary(result):
        out = scanterms.summary(result, tokens)
        if base.summary is not None:
            out[base_name] = base.summary(result)
            if out[base_name].get("notes"):  # printed lines and the report read the kind's own section
                out["notes"] = out[base_name]["notes"]
        return out

    fields = dict(name=name, fn=base.fn, default_prior=prior_defaults, setup=setup,
                  cell_intensity=cell_intensity, describe_prior=describe_prior, hyper=hyper,
                  exact=None, summary=summary)
    known = {f for f in ModelKind.__dataclass_fields__}
    for extra in ("optional_prior", "per_cell"):  # fields other kinds may define
        if extra in known:
            fields[extra] = getattr(base, extra)
    return ModelKind(**fields)
