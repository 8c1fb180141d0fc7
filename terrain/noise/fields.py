"""Spatially correlated DEM error: stationary Gaussian random fields.

A field on the grid with unit sill and one of the registered covariance
models (:data:`COVARIANCES`) is simulated exactly by FFT circulant embedding.

References
----------
.. [1] Dietrich, C. R., Newsam, G. N. (1997). Fast and exact simulation of
   stationary Gaussian processes through circulant embedding of the
   covariance matrix. SIAM J. Sci. Comput. 18(4), 1088-1107.
   doi:10.1137/S1064827592240555
.. [2] Holmes, K. W., Chadwick, O. A., Kyriakidis, P. C. (2000). Error in a
   USGS 30-meter digital elevation model and its impact on terrain
   modeling. J. Hydrology 233, 154-173 (exponential, Gaussian and
   spherical models of DEM error).
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import EmbeddingError, OptionError

__all__ = ["COVARIANCES", "covariance", "CorrelatedField"]


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
    """
    if model not in COVARIANCES:
        raise OptionError(f"unknown {{covariance}} {model!r}; choose one of "
                          f"{', '.join(COVARIANCES)}", "covariance")
    return COVARIANCES[model](np.asarray(h, dtype=np.float64) / practical_range)


class CorrelatedField:
    """Stationary Gaussian random fields on a grid by circulant embedding.

    The covariance on the grid (cell sizes ``dy, dx`` metres, unit sill) is
    embedded in a periodic grid at least twice the size; the embedding is
    enlarged (up to ``max_factor`` times the grid) until all eigenvalues of
    the circulant matrix are non-negative, which makes the simulation exact
    (Dietrich & Newsam 1997). Eigenvalues above ``-tol * max`` are clipped to
    zero.

    Parameters
    ----------
    shape : (rows, cols)
    spacing : (dy, dx) in metres
    model : {"exponential", "gaussian", "spherical"}
    practical_range : float, metres

    Raises
    ------
    EmbeddingError
        When no embedding up to ``max_factor`` is non-negative definite.
    """

    def __init__(self, shape, spacing, model, practical_range, *, max_factor=8, tol=1e-9):
        rows, cols = shape
        dy, dx = spacing
        factor = 2
        while True:
            mr = _good_size(max(factor * rows, 2))
            mc = _good_size(max(factor * cols, 2))
            iy = np.minimum(np.arange(mr), mr - np.arange(mr)) * dy
            ix = np.minimum(np.arange(mc), mc - np.arange(mc)) * dx
            c = covariance(model, np.hypot(iy[:, None], ix[None, :]), practical_range)
            lam = np.fft.rfft2(c).real
            if lam.min() >= -tol * lam.max():
                break
            factor *= 2
            if factor > max_factor:
                # a nugget is drawn apart from the field, so it cannot help here
                other = " or use the exponential {covariance}" if model != "exponential" else ""
                raise EmbeddingError(
                    f"circulant embedding of the {model} covariance (range {practical_range:g} m) "
                    f"is not non-negative definite up to {max_factor}x the grid; shorten the "
                    "{range_m}" + other, "range_m", "covariance")
        self.shape = (rows, cols)
        self.embed = (mr, mc)
        self.factor = factor
        self._sqrt_lam = np.sqrt(np.maximum(lam, 0) / (mr * mc)).astype(np.float64)

    def standard(self, rng: np.random.Generator) -> np.ndarray:
        """One unit-variance field (float32, the grid's shape)."""
        mr, mc = self.embed
        # real white noise: its FFT has the right Hermitian symmetry, and
        # irfft2(sqrt(lam) * FFT(w)) has covariance circ(c) exactly.
        w = rng.standard_normal((mr, mc))
        f = np.fft.rfft2(w)
        f *= self._sqrt_lam * math.sqrt(mr * mc)
        out = np.fft.irfft2(f, s=(mr, mc))[: self.shape[0], : self.shape[1]]
        return out.astype(np.float32)


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
