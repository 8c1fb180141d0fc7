"""DEM error models: kernels, correlated fields, the model a run draws from."""

from .fields import COVARIANCES, CorrelatedField, covariance
from .kernels import KERNELS, Kernel, kernel
from .model import ErrorModel, ErrorSampler, realisation_rng, rmse_from

__all__ = ["KERNELS", "Kernel", "kernel", "COVARIANCES", "CorrelatedField", "covariance",
           "ErrorModel", "ErrorSampler", "realisation_rng", "rmse_from"]
