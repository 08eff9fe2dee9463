"""Pure-array Gaussian-field maths for the lgcp model (jax.numpy; no sample sites, no I/O).

Modules, one per mathematical idea:
  kernels    stationary kernels of distance (Rasmussen & Williams 2006, §4.2)
  embedding  circulant embedding on a padded torus (Wood & Chan 1994; Dietrich & Newsam 1997)
  spectral   Fourier-mode bookkeeping of the embedded field (mode counts, periodised spectra)
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
from sceneprior.fields.spectral import (
    RetainedModes,
    aliased_eigenvalues,
    count_modes,
    modes_for_box,
    select_modes,
)

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
    "RetainedModes",
    "select_modes",
    "count_modes",
    "modes_for_box",
    "aliased_eigenvalues",
]
