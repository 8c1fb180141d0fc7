"""Priority-Flood depression filling: the reference the engine's fill is checked against.

Written for the tests from the published algorithm, independently of the
persistence engine (which fills by basin levels).

References
----------
.. [1] Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
   depression-filling and watershed-labeling algorithm for digital
   elevation models. Computers & Geosciences 62, 117-127.
   doi:10.1016/j.cageo.2013.04.024 (Algorithms 2 and 3).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from terrain.engine.grid import DC8, DR8, is_edge, neighbour


@njit(cache=True, inline="always")
def _less(hv, hi, a, b):
    return hv[a] < hv[b] or (hv[a] == hv[b] and hi[a] < hi[b])


@njit(cache=True)
def _push(hv, hi, size, v, i):
    k = size
    hv[k] = v
    hi[k] = i
    while k > 0:
        p = (k - 1) >> 1
        if _less(hv, hi, k, p):
            hv[k], hv[p] = hv[p], hv[k]
            hi[k], hi[p] = hi[p], hi[k]
            k = p
        else:
            break
    return size + 1


@njit(cache=True)
def _pop(hv, hi, size):
    i = hi[0]
    size -= 1
    hv[0] = hv[size]
    hi[0] = hi[size]
    k = 0
    while True:
        a = 2 * k + 1
        if a >= size:
            break
        b = a + 1
        m = b if (b < size and _less(hv, hi, b, a)) else a
        if _less(hv, hi, m, k):
            hv[k], hv[m] = hv[m], hv[k]
            hi[k], hi[m] = hi[m], hi[k]
            k = m
        else:
            break
    return i, size


@njit(cache=True)
def _priority_flood(z, valid, nr, nc, eps, filled):
    """Barnes et al. (2014) Priority-Flood (Alg. 2) or Priority-Flood+epsilon (Alg. 3).

    Seeds: valid cells on the raster edge or next to nodata. With ``eps``
    every raised cell is set one ulp above the cell it was reached from, so
    flats and filled depressions keep a strict drainage gradient.
    """
    n = nr * nc
    closed = np.zeros(n, np.bool_)
    hv = np.empty(n, np.float64)
    hi = np.empty(n, np.int64)
    pit = np.empty(n, np.int64)
    size = 0
    for r in range(nr):
        for c in range(nc):
            i = r * nc + c
            if not valid[i]:
                filled[i] = np.nan
                continue
            if is_edge(valid, r, c, nr, nc, DR8, DC8):
                closed[i] = True
                filled[i] = z[i]
                size = _push(hv, hi, size, z[i], i)
    ph = 0
    pt = 0
    while size > 0 or ph < pt:
        if ph < pt and size > 0 and hv[0] == filled[pit[ph]]:
            c0, size = _pop(hv, hi, size)
        elif ph < pt:
            c0 = pit[ph]
            ph += 1
        else:
            c0, size = _pop(hv, hi, size)
        r0 = c0 // nc
        cc0 = c0 - r0 * nc
        level = filled[c0]
        raised = np.nextafter(level, np.inf) if eps else level
        for k in range(8):
            j = neighbour(r0, cc0, k, nr, nc, DR8, DC8)
            if j < 0:
                continue
            if not valid[j] or closed[j]:
                continue
            closed[j] = True
            if z[j] <= raised:
                filled[j] = raised
                pit[pt] = j
                pt += 1
            else:
                filled[j] = z[j]
                size = _push(hv, hi, size, z[j], j)


def fill_depressions(z: np.ndarray, *, epsilon: bool = False, mask: np.ndarray | None = None) -> np.ndarray:
    """Fill depressions by Priority-Flood; the edge and nodata are outlets.

    Parameters
    ----------
    z : (rows, cols) array
        Elevations; NaN/inf are nodata.
    epsilon : bool
        Priority-Flood+epsilon: raise cells one float64 ulp above their
        neighbour so that every cell has a strictly lower path to an exit.
    mask : bool array, optional
        True marks nodata.

    Returns
    -------
    float64 array, NaN on nodata.

    References
    ----------
    .. [1] Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood.
       Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024

    Examples
    --------
    >>> z = np.array([[5, 5, 5], [5, 1, 5], [5, 4, 5]], dtype=float)
    >>> float(fill_depressions(z)[1, 1])
    4.0
    """
    z = np.asarray(z, dtype=np.float64)
    valid = np.isfinite(z)
    if mask is not None:
        valid &= ~np.asarray(mask, bool)
    filled = np.empty(z.size)
    _priority_flood(z.reshape(-1), valid.reshape(-1), z.shape[0], z.shape[1], epsilon, filled)
    return filled.reshape(z.shape)
