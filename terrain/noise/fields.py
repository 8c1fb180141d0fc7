"""Spatially correlated DEM error: stationary Gaussian fields built tile by tile.

A field is white noise convolved with a kernel ``k`` whose autocorrelation
is the covariance model (process convolution): for unit white noise ``w``,
``(k * w)`` has covariance ``(k * k~)(h)``. The kernel is the spectral
square root of the covariance, computed once on a periodic grid (the
eigenvalues of the circulant covariance, as in circulant embedding, clipped
at zero) and truncated where it holds all but ``1 - energy`` of its squared
mass, then scaled to unit variance. Because each output tile is the same
convolution of the same white noise whatever window or block asks for it,
a realisation's error at a cell does not depend on the block size, the
number of workers or the backend.

Supported covariance models (every mode, blocked included): exponential,
gaussian and spherical, each with a practical range (where the covariance
falls to about 5%), plus an independent nugget drawn separately.

References
----------
.. [1] Higdon, D. (2002). Space and space-time modeling using process
   convolutions. In: Quantitative Methods for Current Environmental Issues,
   Springer, 37-56 (fields as white noise convolved with a kernel).
.. [2] Dietrich, C. R., Newsam, G. N. (1997). Fast and exact simulation of
   stationary Gaussian processes through circulant embedding of the
   covariance matrix. SIAM J. Sci. Comput. 18(4), 1088-1107 (the circulant
   eigenvalues whose square root gives the kernel).
.. [3] Holmes, K. W., Chadwick, O. A., Kyriakidis, P. C. (2000). Error in a
   USGS 30-meter digital elevation model and its impact on terrain
   modeling. J. Hydrology 233, 154-173 (exponential, Gaussian and
   spherical models of DEM error).
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import OptionError

__all__ = ["COVARIANCES", "covariance", "ConvolutionKernel", "periodic_shape", "field_tile",
           "kernel_memory", "check_range", "KERNEL_BUILD_BYTES", "FIELD_TILE_BYTES"]


def _exponential(r):
    return np.exp(-3 * r)


def _gaussian(r):
    return np.exp(-3 * r * r)


def _spherical(r):
    return np.where(r < 1, 1 - 1.5 * r + 0.5 * r ** 3, 0.0)


# unit-sill covariance as a function of distance / practical range (the usual
# geostatistical forms; the practical range is where the covariance falls to ~5%)
COVARIANCES = {"exponential": _exponential, "gaussian": _gaussian, "spherical": _spherical}


def covariance(model: str, h: np.ndarray, practical_range: float) -> np.ndarray:
    """Unit-sill covariance at distance ``h`` for a practical range ``a``.

    exponential exp(-3h/a); gaussian exp(-3 h^2/a^2); spherical
    1 - 1.5 h/a + 0.5 (h/a)^3 for h < a, else 0.

    Examples
    --------
    >>> round(float(covariance("exponential", 100.0, 100.0)), 4)
    0.0498
    """
    if model not in COVARIANCES:
        raise OptionError(f"unknown {{covariance}} {model!r}; choose one of "
                          f"{', '.join(COVARIANCES)}", "covariance")
    return COVARIANCES[model](np.asarray(h, dtype=np.float64) / practical_range)


def _good_size(n: int) -> int:
    """Smallest 2^a 3^b 5^c >= n (fast FFT length)."""
    best = 1 << (n - 1).bit_length()
    p5 = 1
    while p5 < 2 * n:
        p3 = p5
        while p3 < 2 * n:
            p2 = p3
            while p2 < n:
                p2 *= 2
            best = min(best, p2)
            p3 *= 3
        p5 *= 5
    return best


class ConvolutionKernel:
    """The kernel of a correlated field and how its tiles are made.

    Parameters
    ----------
    spacing : (dy, dx)
        Cell height and width in metres.
    model : {"exponential", "gaussian", "spherical"}
    practical_range : float
        Metres.
    energy : float
        Share of the kernel's squared mass kept by the truncation.

    Attributes
    ----------
    k : (2 * ry + 1, 2 * rx + 1) float64 array, centred, sum of squares 1.
    radius : (ry, rx) in cells.
    """

    def __init__(self, spacing, model: str, practical_range: float, *, energy: float = 0.9995):
        if not practical_range > 0:
            raise OptionError("the correlation {range_m} must be positive", "range_m")
        dy, dx = (float(v) for v in spacing)
        my, mx = periodic_shape(spacing, practical_range)
        iy = np.minimum(np.arange(my), my - np.arange(my)) * dy
        ix = np.minimum(np.arange(mx), mx - np.arange(mx)) * dx
        c = covariance(model, np.hypot(iy[:, None], ix[None, :]), practical_range)
        lam = np.maximum(np.fft.rfft2(c).real, 0.0)
        k = np.fft.fftshift(np.fft.irfft2(np.sqrt(lam), s=(my, mx)))
        cy, cx = my // 2, mx // 2
        # truncate at the smallest metric radius holding `energy` of sum(k^2)
        ry, rx = np.abs(np.arange(my) - cy) * dy, np.abs(np.arange(mx) - cx) * dx
        reach = np.maximum(ry[:, None], rx[None, :]).ravel()
        order = np.argsort(reach, kind="stable")
        mass = np.cumsum((k * k).ravel()[order])
        cut = reach[order][min(np.searchsorted(mass, energy * mass[-1]), mass.size - 1)]
        self.radius = (int(cut // dy), int(cut // dx))
        sy, sx = self.radius
        k = k[cy - sy: cy + sy + 1, cx - sx: cx + sx + 1]
        self.k = k / math.sqrt(float((k * k).sum()))

    def tile_size(self, shape: tuple[int, int]) -> int:
        """Output tile side: a power of two >= 256 and about twice the radius
        (capped at the raster's size), fixed for a raster and model."""
        return field_tile(self.radius, shape)

    def convolve(self, noise: np.ndarray) -> np.ndarray:
        """The field on the cells whose kernel window lies inside ``noise``
        ('valid' convolution; float64)."""
        from scipy.signal import fftconvolve

        return fftconvolve(noise, self.k, mode="valid")


def periodic_shape(spacing, practical_range: float) -> tuple[int, int]:
    """The periodic grid a :class:`ConvolutionKernel` is computed on: wide enough
    that the covariance has died out across it (8 ranges each way)."""
    dy, dx = (float(v) for v in spacing)
    span = 8.0 * practical_range
    return (_good_size(max(64, 2 * math.ceil(span / dy))),
            _good_size(max(64, 2 * math.ceil(span / dx))))


def field_tile(radius, shape) -> int:
    """Output tile side of a field (see :meth:`ConvolutionKernel.tile_size`)."""
    want = max(2 * max(radius), 1)
    cap = max(shape)
    side = 256
    while side < want and side < cap:
        side *= 2
    return side


# Bytes per cell of the periodic grid while a kernel is computed (the covariance, its
# real FFT, the eigenvalues' root, the kernel and the sort of its mass by reach: 52
# measured with tracemalloc for all three models, rounded up), and per cell of the
# noise a field tile is convolved from, (tile + 4 radius)^2 (the noise with its halo
# and scipy's FFT work arrays: 42-48 measured, rounded up).
KERNEL_BUILD_BYTES = 56
FIELD_TILE_BYTES = 64
# The kernel's radius, as a share of the practical range, is at most about 1 for the
# three models (truncated at 99.95% of its squared mass: exponential 1.01, spherical
# 0.97-1.0, gaussian 0.67-0.75, measured at 10 m cells): bounded here by 1.05 range + 1 cell.
_RADIUS_PER_RANGE = 1.05


def kernel_memory(spacing, practical_range: float, shape) -> tuple[int, int, int]:
    """Bytes a correlated field of ``practical_range`` metres on a grid of
    ``shape`` cells ``spacing`` = (dy, dx) metres apart needs, without computing
    it: (computing the kernel, once per process that builds it; the kernel
    itself, kept by every process that draws; drawing one field tile)."""
    my, mx = periodic_shape(spacing, practical_range)
    dy, dx = (float(v) for v in spacing)
    ry = min(my // 2, int(_RADIUS_PER_RANGE * practical_range / dy) + 1)
    rx = min(mx // 2, int(_RADIUS_PER_RANGE * practical_range / dx) + 1)
    f = field_tile((ry, rx), shape)
    return (KERNEL_BUILD_BYTES * my * mx, 8 * (2 * ry + 1) * (2 * rx + 1),
            FIELD_TILE_BYTES * (f + 4 * ry) * (f + 4 * rx))


def check_range(practical_range: float, spacing, shape, source: str = "the DEM") -> None:
    """Refuse a correlation range longer than the grid itself.

    Error correlated over more than the whole grid is nearly one offset for
    all of it, which moves no prominence, depth or flow path, while its
    kernel is computed on a grid 16 ranges wide (memory growing with the
    square of the range): such a range is refused, saying the longest that
    is accepted, the grid's larger side in metres.

    Raises
    ------
    OptionError
        Naming ``range_m``, the grid's extent and what the kernel would need.
    """
    if not practical_range > 0:
        return
    dy, dx = (float(v) for v in spacing)
    extent = max(shape[0] * dy, shape[1] * dx)
    if practical_range > extent:
        cells = 16.0 * practical_range / dy * (16.0 * practical_range / dx)  # floats: any range
        if cells < 2.0**53:
            my, mx = periodic_shape(spacing, practical_range)
            need = f"{KERNEL_BUILD_BYTES * my * mx / 2**30:,.1f} GiB"
        elif math.isfinite(cells):  # no machine: the grid is not sized (its FFT length search is slow)
            need = f"{KERNEL_BUILD_BYTES * cells / 2**30:.3g} GiB"
        else:
            need = "more memory than any machine has"
        raise OptionError(f"{source}: {{range_m}} {practical_range:g} m is longer than the grid's "
                          f"extent ({extent:,.0f} m); error correlated over more than the whole "
                          "grid is nearly one offset for all of it, and an offset moves no "
                          "prominence, depth or flow path, while its kernel would need "
                          f"{need} to compute -- give a range of at most "
                          f"{extent:,.0f} m", "range_m")
