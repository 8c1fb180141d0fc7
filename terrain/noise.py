"""DEM error models: kernels, accuracy conversions, correlated Gaussian fields.

A realisation of the DEM is ``z + e`` where ``e`` is drawn from an *error
model*:

* independent per-cell error from a kernel (uniform, triangular,
  Epanechnikov, Gaussian) with bandwidth ``h`` (half-width for the compact
  kernels, standard deviation for the Gaussian);
* a stationary Gaussian random field with exponential, Gaussian or spherical
  covariance and a practical range, plus an optional independent nugget,
  simulated exactly by FFT circulant embedding.

Every draw is a unit-scale field (``standard_*``) times the scale, so runs at
different error levels with the same seed use common random numbers.

References
----------
.. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
   Analysis. Chapman & Hall (kernels and their variances).
.. [2] Wand, M. P., Jones, M. C. (1995). Kernel Smoothing. Chapman & Hall.
.. [3] Devroye, L. (1986). Non-Uniform Random Variate Generation. Springer
   (Epanechnikov sampling by the median of three uniforms).
.. [4] Dietrich, C. R., Newsam, G. N. (1997). Fast and exact simulation of
   stationary Gaussian processes through circulant embedding of the
   covariance matrix. SIAM J. Sci. Comput. 18(4), 1088-1107.
   doi:10.1137/S1064827592240555
.. [5] Holmes, K. W., Chadwick, O. A., Kyriakidis, P. C. (2000). Error in a
   USGS 30-meter digital elevation model and its impact on terrain
   modeling. J. Hydrology 233, 154-173.
.. [6] FGDC-STD-007.3-1998, National Standard for Spatial Data Accuracy;
   ASPRS Positional Accuracy Standards for Digital Geospatial Data (2014;
   Edition 2, 2023).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass

import numpy as np

from .errors import EmbeddingError, OptionError

__all__ = ["KERNELS", "COVARIANCES", "ErrorModel", "rmse_from", "kernel_pdf", "kernel_variance",
           "kernel_quantile",
           "kernel_halfwidth", "kernel_lipschitz", "sample_kernel", "CorrelatedField",
           "realisation_rng"]

KERNELS = ("gaussian", "epanechnikov", "triangular", "uniform")
COVARIANCES = ("exponential", "gaussian", "spherical")

# Normal error: LE90 = 1.6449 RMSE, accuracy at 95% = 1.9600 RMSE
# (FGDC-STD-007.3-1998 NSSDA; ASPRS 2014).
LE90_FACTOR = 1.6449
A95_FACTOR = 1.9600

# variance of each kernel with unit bandwidth (Silverman 1986)
_UNIT_VAR = {"uniform": 1 / 3, "triangular": 1 / 6, "epanechnikov": 1 / 5, "gaussian": 1.0}


def rmse_from(*, rmse: float | None = None, le90: float | None = None,
              a95: float | None = None) -> float:
    """Vertical RMSE from exactly one data-sheet accuracy figure.

    ``le90`` (linear error at 90%) = 1.6449 RMSE; ``a95`` (accuracy at 95%
    confidence) = 1.9600 RMSE, both for normally distributed error
    (FGDC-STD-007.3-1998; ASPRS 2014). ASPRS Edition 2 (2023) states RMSE.
    """
    given = {k: v for k, v in (("rmse", rmse), ("le90", le90), ("a95", a95)) if v is not None}
    if len(given) != 1:
        raise OptionError("give exactly one vertical accuracy: --rmse, --le90 or --a95")
    (name, value), = given.items()
    value = float(value)
    if not math.isfinite(value) or value <= 0:
        raise OptionError(f"--{name} must be a positive finite number, got {value}")
    return value / {"rmse": 1.0, "le90": LE90_FACTOR, "a95": A95_FACTOR}[name]


def _check_kernel(kernel: str) -> None:
    if kernel not in KERNELS:
        raise OptionError(f"unknown kernel {kernel!r}; choose one of {', '.join(KERNELS)}")


def kernel_halfwidth(kernel: str, rmse: float) -> float:
    """Bandwidth ``h`` giving standard deviation ``rmse``.

    uniform h = sqrt(3) RMSE, triangular h = sqrt(6) RMSE, Epanechnikov
    h = sqrt(5) RMSE, Gaussian sigma = RMSE.
    """
    _check_kernel(kernel)
    return rmse / math.sqrt(_UNIT_VAR[kernel])


def kernel_variance(kernel: str, h: float) -> float:
    """Variance of the kernel with bandwidth ``h`` (Silverman 1986)."""
    _check_kernel(kernel)
    return _UNIT_VAR[kernel] * h * h


def kernel_pdf(kernel: str, x: np.ndarray, h: float) -> np.ndarray:
    """Density of the kernel with bandwidth ``h`` at ``x`` (integrates to 1)."""
    _check_kernel(kernel)
    u = np.asarray(x, dtype=np.float64) / h
    if kernel == "gaussian":
        return np.exp(-0.5 * u * u) / (h * math.sqrt(2 * math.pi))
    inside = np.abs(u) <= 1
    if kernel == "uniform":
        return np.where(inside, 0.5 / h, 0.0)
    if kernel == "triangular":
        return np.where(inside, (1 - np.abs(u)) / h, 0.0)
    return np.where(inside, 0.75 * (1 - u * u) / h, 0.0)


def kernel_lipschitz(kernel: str, h: float) -> float:
    """lim ||K(. - d) - K||_1 / d as d -> 0: the kernel's L1 shift constant.

    uniform 1/h, triangular 2/h, Epanechnikov 3/(2h), Gaussian sqrt(2/pi)/sigma
    (each equals the total variation of the density).
    """
    _check_kernel(kernel)
    return {"uniform": 1.0, "triangular": 2.0, "epanechnikov": 1.5,
            "gaussian": math.sqrt(2 / math.pi)}[kernel] / h


def sample_kernel(kernel: str, rng: np.random.Generator, size, dtype=np.float32) -> np.ndarray:
    """Draws from the kernel with unit bandwidth (multiply by ``h``).

    Gaussian: standard normal. Uniform: U(-1, 1). Triangular: sum of two
    U(-1/2, 1/2). Epanechnikov: of three U(-1, 1), the second if the third
    is largest in absolute value, else the third (Devroye 1986).
    """
    _check_kernel(kernel)
    if kernel == "gaussian":
        return rng.standard_normal(size, dtype=dtype)
    if kernel == "uniform":
        out = rng.random(size, dtype=dtype)
        out *= 2
        out -= 1
        return out
    if kernel == "triangular":
        out = rng.random(size, dtype=dtype)
        out += rng.random(size, dtype=dtype)
        out -= 1
        return out
    u1 = rng.random(size, dtype=dtype) * 2 - 1
    u2 = rng.random(size, dtype=dtype) * 2 - 1
    u3 = rng.random(size, dtype=dtype) * 2 - 1
    a3 = np.abs(u3)
    return np.where((a3 >= np.abs(u2)) & (a3 >= np.abs(u1)), u2, u3)


def kernel_quantile(kernel: str, u: np.ndarray) -> np.ndarray:
    """Inverse CDF of the kernel with unit bandwidth at ``u`` in (0, 1).

    Gaussian: the normal quantile (scipy.special.ndtri). Uniform: 2u - 1.
    Triangular: sqrt(2u) - 1 below the median, 1 - sqrt(2(1 - u)) above.
    Epanechnikov: F(x) = 1/2 + 3x/4 - x^3/4, inverted as
    x = 2 sin(arcsin(2u - 1) / 3).
    Mapping one set of uniforms through each kernel's quantile gives common
    random numbers across kernels.
    """
    _check_kernel(kernel)
    u = np.asarray(u, dtype=np.float64)
    if kernel == "gaussian":
        from scipy.special import ndtri

        return ndtri(u)
    if kernel == "uniform":
        return 2 * u - 1
    if kernel == "triangular":
        return np.where(u <= 0.5, np.sqrt(2 * u) - 1, 1 - np.sqrt(2 * (1 - u)))
    return 2 * np.sin(np.arcsin(2 * u - 1) / 3)


def realisation_rng(seed: int, i: int, stream: int = 0) -> np.random.Generator:
    """The random stream of realisation ``i``: numpy SeedSequence spawning.

    ``SeedSequence(seed, spawn_key=(i, stream))`` is the ``i``-th child's
    ``stream``-th child of ``SeedSequence(seed)``, so realisations are
    independent of how they are split over workers.
    """
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(i, stream))))


# ----------------------------------------------------------------------------
# correlated fields
# ----------------------------------------------------------------------------
def covariance(model: str, h: np.ndarray, practical_range: float) -> np.ndarray:
    """Unit-sill covariance at distance ``h`` for a practical range ``a``.

    exponential exp(-3h/a); gaussian exp(-3 h^2/a^2); spherical
    1 - 1.5 h/a + 0.5 (h/a)^3 for h < a, else 0 (the usual geostatistical
    forms; the practical range is where the covariance falls to ~5%).
    """
    if model not in COVARIANCES:
        raise OptionError(f"unknown covariance {model!r}; choose one of {', '.join(COVARIANCES)}")
    r = np.asarray(h, dtype=np.float64) / practical_range
    if model == "exponential":
        return np.exp(-3 * r)
    if model == "gaussian":
        return np.exp(-3 * r * r)
    return np.where(r < 1, 1 - 1.5 * r + 0.5 * r ** 3, 0.0)


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
        if not practical_range > 0:
            raise OptionError("the correlation range must be positive")
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
            lo = lam.min()
            if lo >= -tol * lam.max():
                break
            factor *= 2
            if factor > max_factor:
                raise EmbeddingError(
                    f"circulant embedding of the {model} covariance (range {practical_range:g} m) "
                    f"is not non-negative definite up to {max_factor}x the grid; add a nugget or "
                    "shorten the range")
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


# ----------------------------------------------------------------------------
# the model used by a run
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class ErrorModel:
    """How a realisation's error is drawn.

    Attributes
    ----------
    rmse : float
        Total vertical RMSE (DEM units).
    kernel : str
        Kernel of the independent part.
    range_m : float
        Practical range of the correlated part in metres; 0 = independent.
    covariance : str
        Covariance model of the correlated part.
    nugget : float
        Share of the variance drawn independently (from ``kernel``) when
        ``range_m > 0``; the correlated sill is ``(1 - nugget) rmse^2``.
    draw : {"direct", "quantile"}
        How kernel errors are drawn: each kernel's own fast sampler, or one
        uniform per cell through the kernel's quantile function (the same
        uniforms for every kernel: common random numbers across kernels).
    """

    rmse: float
    kernel: str = "gaussian"
    range_m: float = 0.0
    covariance: str = "exponential"
    nugget: float = 0.0
    draw: str = "direct"

    def __post_init__(self):
        if not (math.isfinite(self.rmse) and self.rmse > 0):
            raise OptionError(f"the vertical RMSE must be positive and finite, got {self.rmse}")
        _check_kernel(self.kernel)
        if self.covariance not in COVARIANCES:
            raise OptionError(f"unknown covariance {self.covariance!r}; choose one of "
                              f"{', '.join(COVARIANCES)}")
        if not (math.isfinite(self.range_m) and self.range_m >= 0):
            raise OptionError(f"--range must be >= 0 metres, got {self.range_m}")
        if not 0 <= self.nugget <= 1:
            raise OptionError(f"--nugget is a share between 0 and 1, got {self.nugget}")
        if self.draw not in ("direct", "quantile"):
            raise OptionError(f"draw must be 'direct' or 'quantile', got {self.draw!r}")

    @property
    def bandwidth(self) -> float:
        """Bandwidth of the independent kernel at the full RMSE."""
        return kernel_halfwidth(self.kernel, self.rmse)

    def as_dict(self) -> dict:
        return asdict(self)

    def describe(self) -> str:
        """Short text, e.g. ``RMSE 1 (gaussian, exponential range 50 m, nugget 0.2)``."""
        extra = ""
        if self.range_m > 0:
            extra = f", {self.covariance} range {self.range_m:g} m"
            if self.nugget:
                extra += f", nugget {self.nugget:g}"
        return f"RMSE {self.rmse:g} ({self.kernel}{extra})"


class ErrorSampler:
    """Draws unit-scale error fields for one grid under an :class:`ErrorModel`.

    ``draw(seed, i)`` returns the error of realisation ``i`` in DEM units;
    ``draw(seed, i, scale=s)`` multiplies the same unit draw by ``s`` instead
    of the model's RMSE (common random numbers across error levels).
    """

    def __init__(self, model: ErrorModel, shape, spacing_m):
        self.model = model
        self.shape = tuple(shape)
        self.field = None
        if model.range_m > 0 and model.nugget < 1:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                self.field = CorrelatedField(self.shape, spacing_m, model.covariance, model.range_m)

    def _kernel(self, rng: np.random.Generator) -> np.ndarray:
        m = self.model
        if m.draw == "quantile":
            u = rng.random(self.shape)
            np.maximum(u, 2.0 ** -60, out=u)  # the quantile is finite on (0, 1)
            return kernel_quantile(m.kernel, u).astype(np.float32)
        return sample_kernel(m.kernel, rng, self.shape)

    def draw(self, seed: int, i: int, scale: float | None = None) -> np.ndarray:
        m = self.model
        rmse = m.rmse if scale is None else scale
        unit_sd = math.sqrt(_UNIT_VAR[m.kernel])
        if self.field is None:
            e = self._kernel(realisation_rng(seed, i))
            e *= np.float32(rmse / unit_sd)
            return e
        corr = self.field.standard(realisation_rng(seed, i))
        corr *= np.float32(rmse * math.sqrt(1 - m.nugget))
        if m.nugget > 0:
            e = self._kernel(realisation_rng(seed, i, 1))
            e *= np.float32(rmse * math.sqrt(m.nugget) / unit_sd)
            corr += e
        return corr
