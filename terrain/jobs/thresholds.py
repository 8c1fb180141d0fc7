"""The persistence cut-off of each realisation (jittered from its own stream when asked)."""

from __future__ import annotations

from typing import Any

import numpy as np

from ..noise import Kernel, realisation_rng

__all__ = ["realisation_threshold"]


def realisation_threshold(job: Any, kernel: Kernel, seed: int, i: int) -> float:
    """The threshold of realisation ``i`` (drawn from its own stream when jittered)."""
    if job.threshold_jitter <= 0:
        return job.threshold
    u = float(kernel.sample(realisation_rng(seed, i, 2), 1, np.float64)[0])
    # u has unit bandwidth; scale so the threshold's standard deviation is the jitter
    return max(0.0, job.threshold + u * kernel.halfwidth(job.threshold_jitter))
