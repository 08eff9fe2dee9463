"""Model kinds named in a fit specification, bound to their numpyro function and helpers.

To add a model: write ``models/<kind>.py`` with a plain numpyro function of the binned
statistics and the helpers below, then add one :class:`ModelKind` entry here and its name
to ``spec.MODEL_KINDS`` (DEVELOPERS.md, "Adding a model").
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

from ..errors import InputError
from . import uniform


@dataclass(frozen=True)
class ModelKind:
    name: str
    fn: Callable  # numpyro model
    default_prior: dict
    inputs: Callable  # (stats, prior) -> kwargs of fn
    cell_intensity: Callable  # (posterior dict, stats) -> (chain, draw, n_cells) per m² per scan
    describe_prior: Callable  # (prior, stats) -> dict, written to summary.json
    hyper: tuple[str, ...]  # sites checked by the diagnostics (besides the rate)
    exact: Callable | None = None  # (stats, prior, rng, chains, draws) -> posterior dict


MODELS: dict[str, ModelKind] = {
    "uniform": ModelKind(
        name="uniform",
        fn=uniform.uniform_model,
        default_prior=uniform.DEFAULT_PRIOR,
        inputs=uniform.model_inputs,
        cell_intensity=uniform.cell_intensity,
        describe_prior=uniform.describe_prior,
        hyper=("intensity",),
        exact=uniform.exact_draws,
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
