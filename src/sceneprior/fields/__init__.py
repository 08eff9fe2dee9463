"""Pure-array Gaussian-field maths for the lgcp model (jax.numpy; no sample sites, no I/O).

Modules, one per mathematical idea:
  kernels    stationary kernels of distance (Rasmussen & Williams 2006, §4.2)
  embedding  circulant embedding on a padded torus (Wood & Chan 1994; Dietrich & Newsam 1997)
  spectral   the torus eigenvalues a fit uses: embedding, or the periodised (aliased) spectrum
  preconditioning  the data-informed white-noise coordinates the LGCP sampler moves in
"""

from sceneprior.fields.embedding import (
    EmbeddingReport,
    TorusGeometry,
    grid_covariance,
    implied_first_row,
    plan_torus,
    sample_field,
    validate_embedding,
)
from sceneprior.fields.kernels import KERNEL_NAMES, anisotropic_kernel, get_kernel
from sceneprior.fields.spectral import (WRAP_LIMIT, WRAP_NOTE, Spectrum, aliased_eigenvalues, longest_within_wrap,
                                        periodised_report, wrap_error)

__all__ = [
    "KERNEL_NAMES",
    "get_kernel",
    "anisotropic_kernel",
    "TorusGeometry",
    "EmbeddingReport",
    "plan_torus",
    "validate_embedding",
    "sample_field",
    "implied_first_row",
    "grid_covariance",
    "Spectrum",
    "aliased_eigenvalues",
    "periodised_report",
    "wrap_error",
    "longest_within_wrap",
    "WRAP_NOTE",
    "WRAP_LIMIT",
]
