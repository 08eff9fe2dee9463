"""Model kinds named in a fit specification, bound to their numpyro function and helpers.

To add a model: write ``models/<kind>.py`` with a plain numpyro function of the binned
statistics and the helpers below, then add one :class:`ModelKind` entry here and its name
to ``spec.MODEL_KINDS`` (DEVELOPERS.md, "Adding a model").
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

from ..errors import InputError
from . import lgcp, loglinear, mixture_kind, uniform


@dataclass(frozen=True)
class ModelKind:
    """What the pipeline needs to know of a model kind.

    setup(stats, prior, model_spec) -> ModelSetup: the numpyro inputs and anything the
        model's other helpers need (design matrices, torus geometry, ...), built once.
    cell_intensity(posterior, stats, setup) -> (chain, draw, n_cells) per m² per scan.
    describe_prior(prior, stats) -> dict written to summary.json.
    hyper: sites checked by the diagnostics and the gate, besides the rate.
    exact(stats, prior, rng, chains, draws) -> posterior dict, for conjugate models.
    summary(result) -> dict merged into summary.json under the model's name (optional).
    """

    name: str
    fn: Callable
    default_prior: dict
    setup: Callable
    cell_intensity: Callable
    describe_prior: Callable
    hyper: tuple[str, ...]
    exact: Callable | None = None
    summary: Callable | None = None
    optional_prior: tuple[str, ...] = ()  # prior keys without a default
    per_cell: bool = False  # cell-level parameters: per-cell R-hat/ESS are computed and gated
    # several sites with a map each (lgcp_sites): (posterior, stats, setup) -> (chain, draw, site,
    # n_cells) per m² per scan, site names in setup.extra["sites"]; written to intensity.nc and
    # cell_draws.nc with a site dimension and gated over every site's cells (results.py)
    site_cell_intensity: Callable | None = None
    extra_maps: Callable | None = None  # (result) -> {name: (dims ⊆ (site, cell), values, attrs)}


@dataclass
class ModelSetup:
    inputs: dict  # keyword arguments of the numpyro function
    extra: dict = field(default_factory=dict)


MODELS: dict[str, ModelKind] = {
    "uniform": ModelKind(
        name="uniform",
        fn=uniform.uniform_model,
        default_prior=uniform.DEFAULT_PRIOR,
        setup=uniform.setup,
        cell_intensity=uniform.cell_intensity,
        describe_prior=uniform.describe_prior,
        hyper=("intensity",),
        exact=uniform.exact_draws,
    ),
    "loglinear": ModelKind(
        name="loglinear",
        fn=loglinear.loglinear_model,
        default_prior=loglinear.DEFAULT_PRIOR,
        setup=loglinear.setup,
        cell_intensity=loglinear.cell_intensity,
        describe_prior=loglinear.describe_prior,
        hyper=("alpha", "beta_std"),
        summary=loglinear.summary,
    ),
    "mixture": ModelKind(
        name="mixture",
        fn=mixture_kind.mixture.mixture_model,
        default_prior=mixture_kind.DEFAULT_PRIOR,
        setup=mixture_kind.setup,
        cell_intensity=mixture_kind.cell_intensity,
        describe_prior=mixture_kind.describe_prior,
        hyper=("weight", "weight_in", "mean", "scale"),
        summary=mixture_kind.summary,
    ),
    "lgcp": ModelKind(
        name="lgcp",
        fn=lgcp.lgcp_model,
        default_prior=lgcp.DEFAULT_PRIOR,
        setup=lgcp.setup,
        cell_intensity=lgcp.cell_intensity,
        describe_prior=lgcp.describe_prior,
        hyper=("mu", "sigma", "length_scale"),
        summary=lgcp.summary,
        optional_prior=lgcp._LS_KEYS,
        per_cell=True,
    ),
}


from . import hierarchical  # noqa: E402  (partially pooled site rates, issue 6)

MODELS["sites"] = ModelKind(
    name="sites",
    fn=hierarchical.sites_model,
    default_prior=hierarchical.DEFAULT_PRIOR,
    setup=hierarchical.setup,
    cell_intensity=hierarchical.cell_intensity,
    describe_prior=hierarchical.describe_prior,
    hyper=("log_mu", "cv", "site_rate"),
    summary=hierarchical.summary,
)


from . import lgcp_sites  # noqa: E402  (a shared field plus site deviations, issue 6)

MODELS["lgcp_sites"] = ModelKind(
    name="lgcp_sites",
    fn=lgcp_sites.lgcp_sites_model,
    default_prior=lgcp_sites.DEFAULT_PRIOR,
    setup=lgcp_sites.setup,
    cell_intensity=lgcp_sites.cell_intensity,
    describe_prior=lgcp_sites.describe_prior,
    hyper=("level", "cv", "sigma", "sigma_dev", "length_scale", "site_rate"),
    summary=lgcp_sites.summary,
    optional_prior=lgcp._LS_KEYS,
    per_cell=True,
    site_cell_intensity=lgcp_sites.site_cell_intensity,
    extra_maps=lgcp_sites.extra_maps,
)


def get_model(kind: str) -> ModelKind:
    if "+" in kind:  # a base kind with per-scan terms, e.g. "uniform+overdispersion"
        from .variants import variant_kind

        return variant_kind(kind)
    try:
        return MODELS[kind]
    except KeyError:
        raise InputError(f"unknown model kind {kind!r}; available: {', '.join(MODELS)}") from None


def resolve_prior(kind: ModelKind, given: dict, source: str) -> dict:
    allowed = set(kind.default_prior) | set(kind.optional_prior)
    unknown = set(given) - allowed
    if unknown:
        import difflib

        bad = sorted(unknown)[0]
        close = difflib.get_close_matches(bad, sorted(allowed), n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        raise InputError(f"{source}: unknown prior parameter '{bad}'{hint} for model "
                         f"'{kind.name}'; allowed: {', '.join(sorted(allowed))}")
    return {**kind.default_prior, **given}
