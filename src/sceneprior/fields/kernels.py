"""Stationary covariance kernels of distance (Rasmussen & Williams 2006, ch. 4).

Every kernel here is a function ``k(r, variance, length_scale)`` of a non-negative
distance ``r`` with ``k(0) = variance`` (the marginal variance sigma^2 of the field).

Array namespace: the functions are generic. NumPy inputs give NumPy float64 results
(used at plan time, where the validity checks of the circulant embedding need float64
whatever the jax precision flag says); any jax array or tracer among the inputs gives a
jax result, so the functions can be jitted and differentiated with the variance and the
length scale(s) traced.

Units: the distance and the length scale share one unit, the unit of the grid axis
(metres for x, y and radar range; on a polar grid the bearing axis has its own unit and
its own length scale, see :func:`anisotropic_kernel`). Naming: "length scale" is the
kernel parameter; "range" always means radar range in this project.

Equation numbers are those of Rasmussen & Williams (2006), quoted from memory: eq. 4.9
(squared exponential), eq. 4.14 (general Matérn), eq. 4.17 (nu = 3/2, 5/2 closed forms),
eq. 5.2 (axis-scaled distance), eq. 4.15 and 4.20 (spectral densities).
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np

from sceneprior.errors import InputError

__all__ = [
    "KERNEL_NAMES",
    "matern12",
    "matern32",
    "matern52",
    "squared_exponential",
    "get_kernel",
    "scaled_distance",
    "anisotropic_kernel",
    "spectral_density",
    "unit_spectral_density",
]


def _xp(*args):
    """jax.numpy if any argument is a jax array (or tracer), else NumPy."""
    for a in args:
        if isinstance(a, jax.Array):
            return jnp
    return np


def matern12(r, variance, length_scale):
    """Matérn nu = 1/2 (exponential) kernel, k(r) = sigma^2 exp(-r / l).

    Rasmussen & Williams (2006), eq. 4.14 with nu = 1/2 (§4.2.1, "exponential
    covariance function"): the Ornstein-Uhlenbeck covariance.
    """
    xp = _xp(r, variance, length_scale)
    return variance * xp.exp(-r / length_scale)


def matern32(r, variance, length_scale):
    """Matérn nu = 3/2 kernel, k(r) = sigma^2 (1 + sqrt(3) r/l) exp(-sqrt(3) r/l).

    Rasmussen & Williams (2006), eq. 4.17 (first line), the nu = 3/2 closed form of
    the general Matérn eq. 4.14.
    """
    xp = _xp(r, variance, length_scale)
    s = math.sqrt(3.0) * r / length_scale
    return variance * (1.0 + s) * xp.exp(-s)


def matern52(r, variance, length_scale):
    """Matérn nu = 5/2 kernel, k(r) = sigma^2 (1 + s + s^2/3) exp(-s), s = sqrt(5) r/l.

    Rasmussen & Williams (2006), eq. 4.17 (second line), the nu = 5/2 closed form of
    the general Matérn eq. 4.14.
    """
    xp = _xp(r, variance, length_scale)
    s = math.sqrt(5.0) * r / length_scale
    return variance * (1.0 + s + s * s / 3.0) * xp.exp(-s)


def squared_exponential(r, variance, length_scale):
    """Squared-exponential kernel, k(r) = sigma^2 exp(-r^2 / (2 l^2)).

    Rasmussen & Williams (2006), eq. 4.9 (§4.2.1); the nu -> infinity limit of the
    Matérn class eq. 4.14.
    """
    xp = _xp(r, variance, length_scale)
    u = r / length_scale
    return variance * xp.exp(-0.5 * u * u)


_KERNELS = {
    "matern12": matern12,
    "matern32": matern32,
    "matern52": matern52,
    "squared_exponential": squared_exponential,
}

KERNEL_NAMES = tuple(_KERNELS)


def get_kernel(name: str):
    """Return the kernel function called ``name``; InputError for an unknown name."""
    try:
        return _KERNELS[name]
    except KeyError:
        raise InputError(
            f"unknown kernel {name!r}: use one of {', '.join(KERNEL_NAMES)}"
        ) from None


def scaled_distance(lags, length_scales):
    """Anisotropic (axis-scaled) distance r = sqrt(sum_a (delta_a / l_a)^2).

    The "scaled distance" of an automatic-relevance-determination kernel
    (Rasmussen & Williams 2006, eq. 5.2 with M = diag(l)^-2). ``lags`` is a sequence of
    per-axis lag arrays (same shape) and ``length_scales`` one length scale per axis,
    each in the unit of its axis. The result is dimensionless.

    The square root is guarded so that its gradient at r = 0 is 0 rather than NaN
    (needed for jax.grad through a covariance row that contains the zero lag).
    """
    xp = _xp(length_scales, *lags)
    s = 0.0
    for a, d in enumerate(lags):
        u = d / length_scales[a]
        s = s + u * u
    positive = s > 0
    safe = xp.where(positive, s, 1.0)
    return xp.where(positive, xp.sqrt(safe), 0.0)


def anisotropic_kernel(name: str, lags, variance, length_scales):
    """Stationary kernel of the scaled distance: k(lags) = k_name(r, sigma^2, 1).

    r = :func:`scaled_distance` (one length scale per axis; Rasmussen & Williams 2006,
    eq. 5.2 applied to the kernels of eq. 4.9 and 4.14). With equal length scales it is
    the isotropic kernel of the Euclidean distance.

    On a polar grid the field is taken stationary in (range, bearing), each axis with its
    own length scale in its own unit (metres, and the bearing unit of the grid axis).
    """
    k = get_kernel(name)
    r = scaled_distance(lags, length_scales)
    return k(r, variance, 1.0)


_MATERN_NU = {"matern12": 0.5, "matern32": 1.5, "matern52": 2.5}


def unit_spectral_density(name: str, u2, xp=np):
    """2-D spectral density S₁ of the unit-length-scale, unit-variance kernel at squared
    frequency u2 = |s|² (cycles per unit length): Rasmussen & Williams (2006), D = 2,
      Matérn (eq. 4.15):  S₁ = 4π ν (2ν)^ν (2ν + 4π² u2)^-(ν+1)
      squared exponential (eq. 4.20):  S₁ = 2π exp(−2π² u2).
    The Matérn powers (ν + 1 = 3/2, 5/2, 7/2) are written with one reciprocal square root
    and products: pow is slow on CPU, and the periodised spectrum evaluates this on every
    torus mode at every gradient."""
    get_kernel(name)
    if name == "squared_exponential":
        return 2.0 * math.pi * xp.exp(-2.0 * math.pi**2 * u2)
    nu = _MATERN_NU[name]
    t = 2.0 * nu + 4.0 * math.pi**2 * u2
    r = 1.0 / xp.sqrt(t)
    tail = {"matern12": r / t, "matern32": r / (t * t), "matern52": r / (t * t * t)}[name]
    return 4.0 * math.pi * nu * (2.0 * nu) ** nu * tail


def spectral_density(name: str, freqs, variance, length_scales):
    """2-D spectral density S(s) of an axis-scaled kernel, s in cycles per axis unit.

    Convention k(x) = ∫ S(s) exp(2 pi i s.x) ds, so ∫ S = k(0) = sigma^2.
    With one length scale per axis, S(s) = sigma² l0 l1 S_1(|(l0 s0, l1 s1)|), S_1 the
    density at unit length scale (:func:`unit_spectral_density`; change of variables in
    the Fourier integral). ``freqs`` is a pair of per-axis frequency arrays (broadcastable).
    """
    get_kernel(name)
    xp = _xp(variance, length_scales, *freqs)
    u2 = 0.0
    for a, s in enumerate(freqs):
        u = s * length_scales[a]
        u2 = u2 + u * u
    return variance * length_scales[0] * length_scales[1] * unit_spectral_density(name, u2, xp)
