"""The error model of a run: accuracy conversions, the model, its sampler.

A realisation of the DEM is ``z + e`` where ``e`` is drawn from an
:class:`ErrorModel`: independent per-cell error from a kernel
(:mod:`terrain.noise.kernels`) scaled to the stated RMSE, or a stationary
Gaussian random field (:mod:`terrain.noise.fields`) with an optional
independent nugget. Realisation ``i`` draws only from its own random stream,
so results do not depend on how realisations are spread over workers.

References
----------
.. [1] FGDC-STD-007.3-1998, National Standard for Spatial Data Accuracy;
   ASPRS Positional Accuracy Standards for Digital Geospatial Data (2014;
   Edition 2, 2023).
.. [2] O'Neill, M. E. (2014). PCG: A family of simple fast space-efficient
   statistically good algorithms for random number generation.
   HMC-CS-2014-0905 (numpy's PCG64; SeedSequence spawning).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass

import numpy as np

from ..errors import OptionError
from .fields import COVARIANCES, CorrelatedField
from .kernels import kernel

__all__ = ["ErrorModel", "ErrorSampler", "rmse_from", "realisation_rng", "LE90_FACTOR",
           "A95_FACTOR", "DRAWS", "ACCURACY_HINT"]

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


@dataclass(frozen=True)
class ErrorModel:
    """How a realisation's error is drawn.

    Attributes
    ----------
    rmse : float
        Total vertical RMSE (DEM units).
    kernel : str
        Kernel of the independent part (a name in
        :data:`terrain.noise.kernels.KERNELS`); it also draws a jittered
        threshold.
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

    Examples
    --------
    >>> ErrorModel(rmse=1.5, range_m=50).describe()
    'RMSE 1.5 (gaussian, exponential range 50 m)'
    """

    rmse: float
    kernel: str = "gaussian"
    range_m: float = 0.0
    covariance: str = "exponential"
    nugget: float = 0.0
    draw: str = "direct"

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

    @property
    def correlated(self) -> bool:
        """True when part of the error is a spatially correlated field."""
        return self.range_m > 0 and self.nugget < 1

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
    """Draws the error fields of one grid under an :class:`ErrorModel`.

    ``draw(seed, i)`` returns the error of realisation ``i`` in DEM units
    (float32, the grid's shape): a unit-scale draw times the model's RMSE,
    so models that differ only in RMSE use common random numbers.
    """

    def __init__(self, model: ErrorModel, shape, spacing_m):
        self.model = model
        self.shape = tuple(shape)
        self.kernel = kernel(model.kernel)
        self.field = None
        if model.correlated:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                self.field = CorrelatedField(self.shape, spacing_m, model.covariance, model.range_m)

    def _kernel_draw(self, rng: np.random.Generator) -> np.ndarray:
        if self.model.draw == "quantile":
            u = rng.random(self.shape)
            np.maximum(u, 2.0 ** -60, out=u)  # the quantile is finite on (0, 1)
            return self.kernel.quantile(u).astype(np.float32)
        return self.kernel.sample(rng, self.shape)

    def draw(self, seed: int, i: int) -> np.ndarray:
        m = self.model
        unit_sd = math.sqrt(self.kernel.unit_variance)
        if self.field is None:
            e = self._kernel_draw(realisation_rng(seed, i))
            e *= np.float32(m.rmse / unit_sd)
            return e
        corr = self.field.standard(realisation_rng(seed, i))
        corr *= np.float32(m.rmse * math.sqrt(1 - m.nugget))
        if m.nugget > 0:
            e = self._kernel_draw(realisation_rng(seed, i, 1))
            e *= np.float32(m.rmse * math.sqrt(m.nugget) / unit_sd)
            corr += e
        return corr
