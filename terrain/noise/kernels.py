"""Kernels of independent per-cell DEM error: one registry, no name branches.

Each :class:`Kernel` is given at unit bandwidth ``h = 1`` (half-width for
the compact kernels, standard deviation for the Gaussian) and scales to any
bandwidth. A run states the DEM's RMSE; :meth:`Kernel.halfwidth` turns it
into the bandwidth whose standard deviation is that RMSE.

References
----------
.. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
   Analysis. Chapman & Hall (kernels and their variances).
.. [2] Wand, M. P., Jones, M. C. (1995). Kernel Smoothing. Chapman & Hall.
.. [3] Devroye, L. (1986). Non-Uniform Random Variate Generation. Springer
   (Epanechnikov sampling by the median of three uniforms).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..errors import OptionError
from .normals import standard_normal32, standard_normal64

__all__ = ["Kernel", "KERNELS", "kernel"]


@dataclass(frozen=True)
class Kernel:
    """A symmetric error kernel, described at unit bandwidth.

    Attributes
    ----------
    name : str
    unit_variance : float
        Variance at ``h = 1`` (Silverman 1986): uniform 1/3, triangular 1/6,
        Epanechnikov 1/5, Gaussian 1.
    unit_lipschitz : float
        ``lim ||K(. - d) - K||_1 / d`` at ``h = 1`` (the total variation of
        the density): uniform 1, triangular 2, Epanechnikov 3/2, Gaussian
        sqrt(2/pi).
    compact : bool
        Support ``[-h, h]`` (else the whole line).
    unit_pdf, unit_quantile, unit_sample : callables
        Density, inverse CDF and sampler at ``h = 1``.
    one_stream : bool
        The sampler fills its output from one sequential draw of the
        generator (one value after another, row-major), so the first rows of
        a tile drawn alone equal the first rows of the whole tile: a window
        that needs only the top of a tile draws only that. False when the
        sampler makes several passes over the output (triangular,
        Epanechnikov).
    """

    name: str
    unit_variance: float
    unit_lipschitz: float
    compact: bool
    unit_pdf: Callable[[np.ndarray], np.ndarray]
    unit_quantile: Callable[[np.ndarray], np.ndarray]
    unit_sample: Callable[..., np.ndarray]
    one_stream: bool = False

    def halfwidth(self, rmse: float) -> float:
        """Bandwidth ``h`` whose standard deviation is ``rmse``."""
        return rmse / math.sqrt(self.unit_variance)

    def variance(self, h: float) -> float:
        """Variance at bandwidth ``h``."""
        return self.unit_variance * h * h

    def pdf(self, x: np.ndarray, h: float) -> np.ndarray:
        """Density at ``x`` for bandwidth ``h`` (integrates to 1)."""
        return self.unit_pdf(np.asarray(x, dtype=np.float64) / h) / h

    def lipschitz(self, h: float) -> float:
        """The kernel's L1 shift constant at bandwidth ``h``."""
        return self.unit_lipschitz / h

    def quantile(self, u: np.ndarray) -> np.ndarray:
        """Inverse CDF at ``u`` in (0, 1), unit bandwidth."""
        return self.unit_quantile(np.asarray(u, dtype=np.float64))

    def sample(self, rng: np.random.Generator, size, dtype=np.float32) -> np.ndarray:
        """Draws at unit bandwidth (multiply by ``h``)."""
        return self.unit_sample(rng, size, dtype)


# -- densities at unit bandwidth ---------------------------------------------------
def _gauss_pdf(u):
    return np.exp(-0.5 * u * u) / math.sqrt(2 * math.pi)


def _uniform_pdf(u):
    return np.where(np.abs(u) <= 1, 0.5, 0.0)


def _triangular_pdf(u):
    return np.where(np.abs(u) <= 1, 1 - np.abs(u), 0.0)


def _epanechnikov_pdf(u):
    return np.where(np.abs(u) <= 1, 0.75 * (1 - u * u), 0.0)


# -- quantiles: one uniform per cell through each kernel (common random numbers) ----
def _gauss_quantile(u):
    from scipy.special import ndtri

    return ndtri(u)


def _uniform_quantile(u):
    return 2 * u - 1


def _triangular_quantile(u):
    return np.where(u <= 0.5, np.sqrt(2 * u) - 1, 1 - np.sqrt(2 * (1 - u)))


def _epanechnikov_quantile(u):
    # F(x) = 1/2 + 3x/4 - x^3/4 inverted as x = 2 sin(arcsin(2u - 1) / 3)
    return 2 * np.sin(np.arcsin(2 * u - 1) / 3)


# -- fast direct samplers ------------------------------------------------------------
def _gauss_sample(rng, size, dtype):
    # numpy's numbers, drawn in compiled code (another dtype: numpy's answer)
    dt = np.dtype(dtype)
    if dt == np.float32:
        return standard_normal32(rng, size)
    if dt == np.float64:
        return standard_normal64(rng, size)
    return rng.standard_normal(size, dtype=dtype)


def _uniform_sample(rng, size, dtype):
    out = rng.random(size, dtype=dtype)
    out *= 2
    out -= 1
    return out


def _triangular_sample(rng, size, dtype):
    # the sum of two U(-1/2, 1/2)
    out = rng.random(size, dtype=dtype)
    out += rng.random(size, dtype=dtype)
    out -= 1
    return out


def _epanechnikov_sample(rng, size, dtype):
    # of three U(-1, 1): the second if the third is largest in absolute value,
    # else the third (Devroye 1986)
    u1 = rng.random(size, dtype=dtype) * 2 - 1
    u2 = rng.random(size, dtype=dtype) * 2 - 1
    u3 = rng.random(size, dtype=dtype) * 2 - 1
    a3 = np.abs(u3)
    return np.where((a3 >= np.abs(u2)) & (a3 >= np.abs(u1)), u2, u3)


KERNELS: dict[str, Kernel] = {k.name: k for k in (
    Kernel("gaussian", 1.0, math.sqrt(2 / math.pi), False, _gauss_pdf, _gauss_quantile,
           _gauss_sample, one_stream=True),
    Kernel("epanechnikov", 1 / 5, 1.5, True, _epanechnikov_pdf, _epanechnikov_quantile,
           _epanechnikov_sample),
    Kernel("triangular", 1 / 6, 2.0, True, _triangular_pdf, _triangular_quantile,
           _triangular_sample),
    Kernel("uniform", 1 / 3, 1.0, True, _uniform_pdf, _uniform_quantile, _uniform_sample,
           one_stream=True),
)}


def kernel(name: str) -> Kernel:
    """The registered kernel called ``name``.

    Raises
    ------
    OptionError
        For an unknown name (the message lists the known ones).
    """
    try:
        return KERNELS[name]
    except (KeyError, TypeError):
        raise OptionError(f"unknown {{kernel}} {name!r}; choose one of {', '.join(KERNELS)}",
                          "kernel") from None
