"""DEM error models: kernels, correlated fields, the model a run draws from."""

from .fields import COVARIANCES, ConvolutionKernel, covariance
from .kernels import KERNELS, Kernel, kernel
from .model import ErrorModel, ErrorSampler, realisation_rng, rmse_from, tile_rng

__all__ = ["KERNELS", "Kernel", "kernel", "COVARIANCES", "ConvolutionKernel", "covariance",
           "ErrorModel", "ErrorSampler", "realisation_rng", "rmse_from", "tile_rng"]
