"""The error model of a run: accuracy conversions, the model, its sampler.

A realisation of the DEM is ``z + e`` where ``e`` is drawn from an
:class:`ErrorModel`: independent per-cell error from a kernel
(:mod:`terrain.noise.kernels`) scaled to the stated RMSE, or a stationary
random field (:mod:`terrain.noise.fields`) with an optional independent
nugget. The kernel sets the marginal distribution of every model: a
correlated field is drawn as a unit Gaussian field ``G`` (correlated part
plus Gaussian nugget) and passed through a Gaussian copula,
``e = RMSE * F^-1(Phi(G)) / sd(F)`` with ``F`` the kernel's distribution, so
``--kernel uniform --range 500`` has a uniform marginal (``|e| <= sqrt(3) RMSE``)
and very nearly the stated covariance. The copula changes the correlation
``rho`` of ``G`` into a monotone function of it, equal to it for the Gaussian
kernel and within 1.4% of it for the others (uniform:
``(6/pi) arcsin(rho/2)``, Kruskal 1958): at ``rho = 0.05``, where the practical
range is read, uniform 0.0478, Epanechnikov 0.0492, triangular 0.0497, so the
practical range of an exponential model shrinks by 1.5%, 0.5% and 0.2%
(gaussian model 0.8%, 0.3%, 0.1%; spherical 0.6%, 0.2%, 0.1%; computed by
Gauss-Hermite quadrature, see ``tests/test_noise.py``).

Counter-based streams: the random numbers of realisation ``i`` are drawn
tile by tile, each fixed 256 x 256 noise tile from its own stream keyed by
(seed, realisation, stream, tile row, tile column), so the error at a cell is
the same whether the raster is drawn whole or window by window, on any
number of workers or backends.

References
----------
.. [1] FGDC-STD-007.3-1998, National Standard for Spatial Data Accuracy;
   ASPRS Positional Accuracy Standards for Digital Geospatial Data (2014;
   Edition 2, 2023).
.. [2] O'Neill, M. E. (2014). PCG: A family of simple fast space-efficient
   statistically good algorithms for random number generation.
   HMC-CS-2014-0905 (numpy's PCG64; SeedSequence spawning).
.. [3] Nelsen, R. B. (2006). An Introduction to Copulas, 2nd ed. Springer
   (the Gaussian copula: a Gaussian field mapped through Phi and a quantile
   function keeps its rank correlation and takes any marginal).
.. [4] Kruskal, W. H. (1958). Ordinal measures of association. JASA 53,
   814-861 (Pearson correlation of uniform margins of a bivariate normal,
   (6/pi) arcsin(rho/2)).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

from ..errors import OptionError
from .fields import COVARIANCES, ConvolutionKernel
from .kernels import Kernel, kernel
from .normals import standard_normal64

__all__ = ["ErrorModel", "ErrorSampler", "rmse_from", "realisation_rng", "tile_rng", "NOISE_TILE",
           "LE90_FACTOR", "A95_FACTOR", "DRAWS", "ACCURACY_HINT"]

NOISE_TILE = 256  # cells per side of a noise tile (fixed: it defines the streams)
_TILE_OFFSET = 1 << 20  # tile indices may be negative (fields look past the raster edge)

# Normal error: LE90 = 1.6449 RMSE, accuracy at 95% = 1.9600 RMSE
# (FGDC-STD-007.3-1998 NSSDA; ASPRS 2014).
LE90_FACTOR = 1.6449
A95_FACTOR = 1.9600
DRAWS = ("direct", "quantile")
ACCURACY_HINT = ("typical values, from memory (use your data sheet): 1 arc-second SRTM 16 m LE90 "
                 "(about 9.7 m RMSE), current 30 m global surface models under 4 m LE90, "
                 "airborne lidar 0.05-0.2 m RMSE")


def rmse_from(*, rmse: float | None = None, le90: float | None = None,
              a95: float | None = None) -> float:
    """Vertical RMSE from exactly one data-sheet accuracy figure.

    ``le90`` (linear error at 90%) = 1.6449 RMSE; ``a95`` (accuracy at 95%
    confidence) = 1.9600 RMSE, both for normally distributed error
    (FGDC-STD-007.3-1998; ASPRS 2014). ASPRS Edition 2 (2023) states RMSE.

    Examples
    --------
    >>> round(rmse_from(le90=16.0), 3)
    9.727
    """
    given = {k: v for k, v in (("rmse", rmse), ("le90", le90), ("a95", a95)) if v is not None}
    if not given:
        raise OptionError("state the DEM's vertical accuracy with one of {rmse}, {le90} or {a95}; "
                          + ACCURACY_HINT, "rmse", "le90", "a95")
    if len(given) != 1:
        raise OptionError("give exactly one vertical accuracy: {rmse}, {le90} or {a95}",
                          "rmse", "le90", "a95")
    (name, value), = given.items()
    value = float(value)
    if not math.isfinite(value) or value <= 0:
        raise OptionError(f"{{{name}}} must be a positive finite number, got {value}", name)
    return value / {"rmse": 1.0, "le90": LE90_FACTOR, "a95": A95_FACTOR}[name]


def realisation_rng(seed: int, i: int, stream: int = 0) -> np.random.Generator:
    """The random stream of realisation ``i``: numpy SeedSequence spawning.

    ``SeedSequence(seed, spawn_key=(i, stream))`` is the ``i``-th child's
    ``stream``-th child of ``SeedSequence(seed)``, so realisations are
    independent of how they are split over workers. Stream 0 draws the
    error field, 1 the nugget, 2 the jittered threshold.
    """
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(i, stream))))


def tile_rng(seed: int, i: int, stream: int, tr: int, tc: int) -> np.random.Generator:
    """The stream of noise tile (``tr``, ``tc``) of realisation ``i``.

    ``SeedSequence(seed, spawn_key=(i, stream, tr + 2**20, tc + 2**20))``:
    a counter-based key, so any tile can be drawn alone, in any order.
    """
    key = (i, stream, tr + _TILE_OFFSET, tc + _TILE_OFFSET)
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=key)))


@dataclass(frozen=True)
class ErrorModel:
    """How a realisation's error is drawn.

    Attributes
    ----------
    rmse : float
        Total vertical RMSE (DEM units).
    kernel : str
        The error's marginal distribution (a name in
        :data:`terrain.noise.kernels.KERNELS`), independent or correlated
        (a correlated field takes it through a Gaussian copula); it also
        draws a jittered threshold.
    range_m : float
        Practical range of the correlated part in metres; 0 = independent.
    covariance : str
        Covariance model of the correlated part.
    nugget : float
        Share of the variance drawn independently when ``range_m > 0``; the
        correlated sill is ``(1 - nugget) rmse^2`` (both parts Gaussian
        before the copula, so the sum keeps the kernel's marginal).
    draw : {"direct", "quantile"}
        How kernel errors are drawn: each kernel's own fast sampler, or one
        uniform per cell through the kernel's quantile function (the same
        uniforms for every kernel: common random numbers across kernels).
    accuracy : tuple
        How the accuracy was stated, when not as an RMSE: ``("le90", 4.0)``
        or ``("a95", 2.0)`` (echoed by :meth:`describe`); empty otherwise.

    Examples
    --------
    >>> ErrorModel(rmse=1.5, range_m=50).describe()
    'RMSE 1.5 (gaussian, exponential range 50 m)'
    >>> ErrorModel(rmse=rmse_from(le90=4.0), accuracy=("le90", 4.0)).describe("m")
    'LE90 4 m = RMSE 2.43 m (gaussian)'
    """

    rmse: float
    kernel: str = "gaussian"
    range_m: float = 0.0
    covariance: str = "exponential"
    nugget: float = 0.0
    draw: str = "direct"
    accuracy: tuple = ()

    def __post_init__(self):
        for name in ("rmse", "range_m", "nugget"):
            try:
                object.__setattr__(self, name, float(getattr(self, name)))
            except (TypeError, ValueError):
                raise OptionError(f"{{{name}}} must be a number, got {getattr(self, name)!r}",
                                  name) from None
        if not (math.isfinite(self.rmse) and self.rmse > 0):
            raise OptionError(f"{{rmse}} must be positive and finite, got {self.rmse}", "rmse")
        kernel(self.kernel)
        if self.covariance not in COVARIANCES:
            raise OptionError(f"unknown {{covariance}} {self.covariance!r}; choose one of "
                              f"{', '.join(COVARIANCES)}", "covariance")
        if not (math.isfinite(self.range_m) and self.range_m >= 0):
            raise OptionError(f"{{range_m}} must be >= 0 metres, got {self.range_m}", "range_m")
        if not 0 <= self.nugget <= 1:
            raise OptionError(f"{{nugget}} is a share between 0 and 1, got {self.nugget}", "nugget")
        if self.nugget > 0 and self.range_m == 0:
            raise OptionError("{nugget} is the independent share of spatially correlated error; "
                              "give its {range_m} too (without one, all of the error is "
                              "independent already)", "nugget", "range_m")
        if self.draw not in DRAWS:
            raise OptionError(f"{{draw}} must be one of {', '.join(DRAWS)}, got {self.draw!r}",
                              "draw")
        acc = tuple(self.accuracy or ())
        if acc and (len(acc) != 2 or acc[0] not in ("le90", "a95")):
            raise OptionError(f"{{accuracy}} is (\"le90\" or \"a95\", value), got {acc!r}",
                              "accuracy")
        object.__setattr__(self, "accuracy", (acc[0], float(acc[1])) if acc else ())

    @property
    def correlated(self) -> bool:
        """True when part of the error is a spatially correlated field."""
        return self.range_m > 0 and self.nugget < 1

    def as_dict(self) -> dict:
        return asdict(self)

    def describe(self, unit: str | None = None) -> str:
        """Short text, e.g. ``RMSE 1 m (gaussian, exponential range 50 m, nugget 0.2)``;
        an accuracy stated as LE90 or at 95% is echoed beside the RMSE it gives
        (``LE90 4 m = RMSE 2.43 m``). ``unit``: the vertical unit's label."""
        extra = ""
        if self.range_m > 0:
            extra = f", {self.covariance} range {self.range_m:g} m"
            if self.nugget:
                extra += f", nugget {self.nugget:g}"
        u = f" {unit}" if unit else ""
        stated = ""
        if self.accuracy:
            name, value = self.accuracy
            stated = f"{'LE90' if name == 'le90' else 'accuracy at 95%'} {value:g}{u} = "
        return f"{stated}RMSE {_sig(self.rmse)}{u} ({self.kernel}{extra})"


def _sig(v: float) -> str:
    """A figure to three significant digits, without an exponent below 1e6."""
    return f"{v:.0f}" if 100 <= abs(v) < 1e6 else f"{v:.3g}"


class ErrorSampler:
    """Draws the error of one grid under an :class:`ErrorModel`, whole or by window.

    ``draw(seed, i)`` returns the error of realisation ``i`` in DEM units
    (float32, the grid's shape); ``draw_window(seed, i, r0, r1, c0, c1)`` the
    same values on a window. A unit-scale draw is multiplied by the model's
    RMSE, so models that differ only in RMSE use common random numbers; a
    correlated field is the same unit Gaussian field for every kernel (its
    Gaussian copula, see the module docstring), so models that differ only in
    kernel do too. Memory per window cell of a correlated draw: the float64
    field and its noise tiles, and for a non-Gaussian kernel the float64
    copula values (8 more).
    """

    def __init__(self, model: ErrorModel, shape, spacing_m):
        self.model = model
        self.shape = tuple(shape)
        self.kernel = kernel(model.kernel)
        self.gaussian = kernel("gaussian")  # the nugget's draws under a copula
        self.field = None
        if model.correlated:
            self.field = ConvolutionKernel(spacing_m, model.covariance, model.range_m)
            self.field_tile = self.field.tile_size(self.shape)

    def _tiles(self, seed, i, stream, r0, r1, c0, c1, normal: bool, cache=None, *,
               kernel: Kernel | None = None) -> np.ndarray:
        """Unit draws on a window, assembled from the fixed noise tiles (``cache``
        keeps tiles already drawn for this window's neighbours): float64 standard
        normals (``normal``) or draws of ``kernel`` (default: the model's).

        A tile whose stream is one sequential draw (:attr:`Kernel.one_stream`)
        is drawn only down to the last row the window needs: the same values
        as the whole tile's first rows, at a fraction of the cost for a grid
        smaller than a tile."""
        t = NOISE_TILE
        k = kernel or self.kernel
        prefix = normal or self.model.draw == "quantile" or k.one_stream
        out = np.empty((r1 - r0, c1 - c0), np.float64 if normal else np.float32)
        for tr in range(r0 // t, (r1 - 1) // t + 1):
            for tc in range(c0 // t, (c1 - 1) // t + 1):
                a, b = max(r0, tr * t), min(r1, (tr + 1) * t)
                c, d = max(c0, tc * t), min(c1, (tc + 1) * t)
                rows = b - tr * t if prefix else t  # the tile's rows drawn
                tile = None if cache is None else cache.get((tr, tc))
                if tile is None or len(tile) < rows:
                    rng = tile_rng(seed, i, stream, tr, tc)
                    tile = standard_normal64(rng, (rows, t)) if normal else \
                        self._kernel_draw(rng, (rows, t), k)
                    if cache is not None:
                        cache[(tr, tc)] = tile
                out[a - r0:b - r0, c - c0:d - c0] = tile[a - tr * t:b - tr * t, c - tc * t:d - tc * t]
        return out

    def _kernel_draw(self, rng: np.random.Generator, shape, k: Kernel) -> np.ndarray:
        if self.model.draw == "quantile":
            u = rng.random(shape)
            np.maximum(u, 2.0 ** -60, out=u)  # the quantile is finite on (0, 1)
            return k.quantile(u).astype(np.float32)
        return k.sample(rng, shape)

    def _field(self, seed, i, r0, r1, c0, c1) -> np.ndarray:
        """Unit-variance correlated field on a window, from fixed field tiles."""
        f, (ry, rx) = self.field_tile, self.field.radius
        out = np.empty((r1 - r0, c1 - c0), np.float64)
        cache: dict = {}
        for fr in range(r0 // f, (r1 - 1) // f + 1):
            for fc in range(c0 // f, (c1 - 1) // f + 1):
                noise = self._tiles(seed, i, 0, fr * f - ry, (fr + 1) * f + ry,
                                    fc * f - rx, (fc + 1) * f + rx, True, cache)
                tile = self.field.convolve(noise)
                a, b = max(r0, fr * f), min(r1, (fr + 1) * f)
                c, d = max(c0, fc * f), min(c1, (fc + 1) * f)
                out[a - r0:b - r0, c - c0:d - c0] = tile[a - fr * f:b - fr * f, c - fc * f:d - fc * f]
        return out

    def draw_window(self, seed: int, i: int, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        """The error of realisation ``i`` on rows ``r0:r1``, columns ``c0:c1``."""
        m = self.model
        unit_sd = math.sqrt(self.kernel.unit_variance)
        if self.field is None:
            e = self._tiles(seed, i, 0, r0, r1, c0, c1, False)
            e *= np.float32(m.rmse / unit_sd)
            return e
        if self.kernel.name != "gaussian":
            return self._copula(seed, i, r0, r1, c0, c1)
        corr = self._field(seed, i, r0, r1, c0, c1).astype(np.float32)
        corr *= np.float32(m.rmse * math.sqrt(1 - m.nugget))
        if m.nugget > 0:
            e = self._tiles(seed, i, 1, r0, r1, c0, c1, False)
            e *= np.float32(m.rmse * math.sqrt(m.nugget) / unit_sd)
            corr += e
        return corr

    def _copula(self, seed: int, i: int, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        """A correlated error with the kernel's marginal: the unit Gaussian field
        (correlated part and Gaussian nugget, the very numbers the Gaussian kernel
        uses) through Phi and the kernel's quantile function, scaled to the RMSE."""
        from scipy.special import ndtr

        m = self.model
        g = self._field(seed, i, r0, r1, c0, c1)
        g *= math.sqrt(1 - m.nugget)
        if m.nugget > 0:
            g += math.sqrt(m.nugget) * self._tiles(seed, i, 1, r0, r1, c0, c1, False,
                                                   kernel=self.gaussian)
        u = ndtr(g, out=g)
        np.clip(u, 2.0 ** -60, 1 - 2.0 ** -53, out=u)  # the quantile is finite on (0, 1)
        e = self.kernel.quantile(u)
        e *= m.rmse / math.sqrt(self.kernel.unit_variance)
        e32 = e.astype(np.float32)
        if self.kernel.compact:  # float32 rounding never takes an error past the half-width
            h = self.kernel.halfwidth(m.rmse)
            top = np.float32(h)
            if float(top) > h:
                top = np.nextafter(top, np.float32(0))
            np.clip(e32, -top, top, out=e32)
        return e32

    def draw(self, seed: int, i: int) -> np.ndarray:
        """The error of realisation ``i`` on the whole grid."""
        return self.draw_window(seed, i, 0, self.shape[0], 0, self.shape[1])
