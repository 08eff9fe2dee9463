"""Model kinds named in a fit specification, bound to their numpyro function and helpers.

To add a model: write ``models/<kind>.py`` with a plain numpyro function of the binned
statistics and the helpers below, then add one :class:`ModelKind` entry here and its name
to ``spec.MODEL_KINDS`` (DEVELOPERS.md, "Adding a model").
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

from ..errors import InputError
from . import loglinear, uniform


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
}


def get_model(kind: str) -> ModelKind:
    try:
        return MODELS[kind]
    except KeyError:
        raise InputError(f"unknown model kind {kind!r}; available: {', '.join(MODELS)}") from None


def resolve_prior(kind: ModelKind, given: dict, source: str) -> dict:
    unknown = set(given) - set(kind.default_prior)
    if unknown:
        raise InputError(f"{source}: unknown prior parameter(s) {sorted(unknown)} for model "
                         f"'{kind.name}'; allowed: {sorted(kind.default_prior)}")
    return {**kind.default_prior, **given}
