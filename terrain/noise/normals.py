"""Standard normal draws in compiled code: numpy's own numbers, 2.3-3.3x sooner.

A realisation's error is mostly float32 standard normals (the Gaussian
kernel's draw, one per cell). numpy's ``Generator.standard_normal(dtype=
np.float32)`` draws each through a function-pointer call into the bit
generator and took 9-10 ms per 10^6 values on the development machine,
a quarter of a peaks realisation. :func:`standard_normal32` returns the
very same numbers, bit for bit, and leaves the generator in the very same
state: it takes PCG64's raw 64-bit outputs in one call
(``random_raw``), splits each into the two 32-bit words numpy's
``next_uint32`` would hand out (low half first), and runs numpy's float32
ziggurat over them in numba: the same tables, the same float32 arithmetic,
the wedge test against a float64 exponential as numpy's C source has it.
:func:`standard_normal64` does the same for float64 (one 64-bit word per
value: a correlated field's white noise). Parity with numpy is a test
(``tests/test_noise.py``), so a numpy or numba release that changed
either side would be caught, not silently followed. The match assumes
numpy's C ziggurat is compiled without fused multiply-adds, as on x86-64;
the parity tests would show a platform where it is not.

Memory per value, while a draw runs: the output and the raw words, and for
float32 each word's boxed value (numpy's fast path, computed for every word
at once, vectorised, before the values are taken in order): 12.4 bytes for
float32 and 16.5 for float64 (numpy's own: 4 and 8). cairn draws a
256 x 256 noise tile at a time.

References
----------
.. [1] Marsaglia, G., Tsang, W. W. (2000). The ziggurat method for
   generating random variables. Journal of Statistical Software 5(8).
   doi:10.18637/jss.v005.i08
.. [2] O'Neill, M. E. (2014). PCG: A family of simple fast space-efficient
   statistically good algorithms for random number generation. Harvey Mudd
   College, HMC-CS-2014-0905 (numpy's PCG64).
"""

from __future__ import annotations

import sys

import numpy as np
from numba import float32, float64, njit, uint32, uint64

try:  # numpy's 256-layer ziggurat tables (float32, float64), as numba ships them for its
    # own port of numpy's generator methods (a private module: without it,
    # numpy draws)
    from numba.np.random._constants import (
        fi_double,
        fi_float,
        ki_double,
        ki_float,
        wi_double,
        wi_float,
        ziggurat_nor_inv_r,
        ziggurat_nor_inv_r_f,
        ziggurat_nor_r,
        ziggurat_nor_r_f,
    )
    TABLES = True
except ImportError:  # pragma: no cover - a numba that moved them
    fi_float = ki_float = wi_float = np.zeros(256, np.float32)
    fi_double = wi_double = np.zeros(256)
    ki_double = np.zeros(256, np.uint64)
    ziggurat_nor_inv_r_f = ziggurat_nor_r_f = np.float32(0)
    ziggurat_nor_inv_r = ziggurat_nor_r = 0.0
    TABLES = False

__all__ = ["standard_normal32", "standard_normal64"]

LITTLE_ENDIAN = sys.byteorder == "little"  # the float32 kernel reads raw words in memory order


@njit(cache=True, inline="always")
def _u32(raw, k):
    """The ``k``-th 32-bit word of the raw stream (low half of each 64-bit output first)."""
    w = raw[k >> 1]
    return uint32(w & 0xFFFFFFFF) if (k & 1) == 0 else uint32(w >> 32)


@njit(cache=True, inline="always")
def _f32(raw, k):
    """numpy's ``next_float``: the top 24 bits of the ``k``-th word, in [0, 1)."""
    return float32(float32(_u32(raw, k) >> 8) * float32(1.0) / float32(16777216.0))


@njit(cache=True, inline="always")
def _in_box(r):
    """numpy's float32 ziggurat on the 32-bit word ``r``, its first branch:
    ``(value, layer, |value| bits, inside)``, ``inside`` when the value lies
    in its layer's box (numpy's fast path)."""
    idx = r & 0xFF
    rabs = (r >> 9) & 0x007FFFFF
    x = float32(float32(rabs) * wi_float[idx])
    x = -x if (r >> 8) & 0x1 else x
    return x, idx, rabs, rabs < ki_float[idx]


@njit(cache=True)
def _boxed(raw, k0, xs):
    """The boxed value of words ``k0, k0 + 1, ...`` (as many as ``xs`` holds,
    to the end of the stream): the word's value when it falls inside the
    ziggurat's boxes (numpy's fast path, ~98.5% of words), NaN where it does
    not; one pass without branches that the compiler vectorises. ``raw`` is
    read as its 32-bit words in memory order, which on a little-endian
    machine is numpy's order (low half of each output first; :func:`_draw`
    lets numpy draw on any other)."""
    words = raw.view(np.uint32)
    for j in range(min(xs.size, words.size - k0)):
        x, _, _, inside = _in_box(words[k0 + j])
        xs[j] = x if inside else np.float32(np.nan)


@njit(cache=True)
def _unboxed(raw, k, lim):
    """numpy's float32 ziggurat from word ``k`` on, once that word fell
    outside the boxes: ``(value, the next word)``, or ``(0, -1)`` when the
    words ran out first."""
    while True:
        if k + 3 > lim:
            return float32(0), -1
        x, idx, rabs, inside = _in_box(_u32(raw, k))
        k += 1
        if inside:
            return x, k
        if idx == 0:  # the tail beyond r
            while True:
                if k + 2 > lim:
                    return float32(0), -1
                xx = float32(-ziggurat_nor_inv_r_f * float32(np.log1p(-_f32(raw, k))))
                yy = float32(-float32(np.log1p(-_f32(raw, k + 1))))
                k += 2
                if float32(yy + yy) > float32(xx * xx):
                    break
            t = float32(ziggurat_nor_r_f + xx)
            return (-t if (rabs >> 8) & 0x1 else t), k
        u = _f32(raw, k)  # the wedge
        k += 1
        lhs = float32(float32((fi_float[idx - 1] - fi_float[idx]) * u) + fi_float[idx])
        if float64(lhs) < np.exp(-0.5 * float64(x) * float64(x)):
            return x, k


@njit(cache=True)
def _ziggurat(raw, out):
    """Fill ``out`` from the raw words: the number of 32-bit words used, or
    -1 when ``raw`` ran out first (``out`` is then partly filled). Every
    word's boxed value is computed first, in one vectorised pass
    (:func:`_boxed`); the values are then taken in order, and a word outside
    the boxes goes through :func:`_unboxed`, which takes the words after it
    as numpy would, so the values that follow shift along the stream. (The
    boxed values of all words at once, 4 bytes a word: computing them 4096
    words at a time, in L1, made the in-order pass slower, 2.0 against 1.3
    ms per 10^6 values.)"""
    lim = 2 * raw.size
    xs = np.empty(lim, np.float32)
    _boxed(raw, 0, xs)
    k = 0
    for i in range(out.size):
        if k + 3 > lim:
            return -1
        v = xs[k]
        if v == v:
            out[i] = v
            k += 1
        else:
            v, k = _unboxed(raw, k, lim)
            if k < 0:
                return -1
            out[i] = v
    return k


@njit(cache=True, inline="always")
def _f64(raw, k):
    """numpy's ``next_double``: the top 53 bits of the ``k``-th 64-bit word, in [0, 1)."""
    return float64(raw[k] >> uint64(11)) * (1.0 / 9007199254740992.0)


@njit(cache=True)
def _ziggurat64(raw, out):
    """numpy's float64 ziggurat over 64-bit words: as :func:`_ziggurat`."""
    k = 0
    lim = raw.size
    for i in range(out.size):
        while True:
            if k + 2 > lim:
                return -1
            r = raw[k]
            k += 1
            idx = r & uint64(0xFF)
            r >>= uint64(8)
            rabs = (r >> uint64(1)) & uint64(0x000FFFFFFFFFFFFF)
            x = float64(rabs) * wi_double[idx]
            if r & uint64(0x1):
                x = -x
            if rabs < ki_double[idx]:
                out[i] = x
                break
            if idx == 0:
                while True:
                    if k + 2 > lim:
                        return -1
                    xx = -ziggurat_nor_inv_r * np.log1p(-_f64(raw, k))
                    yy = -np.log1p(-_f64(raw, k + 1))
                    k += 2
                    if yy + yy > xx * xx:
                        break
                out[i] = -(ziggurat_nor_r + xx) if (rabs >> uint64(8)) & uint64(0x1) else \
                    ziggurat_nor_r + xx
                break
            u = _f64(raw, k)
            k += 1
            if (fi_double[idx - 1] - fi_double[idx]) * u + fi_double[idx] < np.exp(-0.5 * x * x):
                out[i] = x
                break
    return k


def _first_batch(n: int) -> int:
    """Raw 64-bit outputs drawn first for ``n`` float32 values: half a word
    each, and a margin for the ~1.5% of draws that take more words (more are
    drawn if short; float64 draws take twice as many)."""
    return n // 2 + n // 32 + 64


def _draw(rng: np.random.Generator, size, dtype, kernel, words_per_value: int):
    """Fill an array of ``size`` with ``kernel`` over ``rng``'s raw words and
    leave ``rng`` as numpy's own draw would: all under the bit generator's
    lock, as numpy draws, the words taken from a copy of its state (its
    ``random_raw`` takes the lock itself). ``words_per_value``: 32-bit words
    (1, float32) or 64-bit words (2, float64) per value. None when numpy
    must draw: another bit generator, the tables missing, ``size`` None, or
    for float32 half a word pending or a big-endian machine."""
    bg = rng.bit_generator
    if type(bg) is not np.random.PCG64 or not TABLES or size is None or \
            (words_per_value == 1 and not LITTLE_ENDIAN):
        return None
    with bg.lock:
        state = bg.state
        if words_per_value == 1 and state["has_uint32"]:
            return None
        out = np.empty(size, dtype)
        flat = out.reshape(-1)
        copy = np.random.PCG64(0)
        copy.state = state
        raw = copy.random_raw(words_per_value * _first_batch(flat.size))
        while True:
            k = kernel(raw, flat)
            if k >= 0:
                break
            raw = np.concatenate([raw, copy.random_raw(raw.size // 8 + 64)])
        copy.state = state
        after = state
        if words_per_value == 1:
            # (k + 1) // 2 outputs taken, the high half of the last one kept when k is odd
            copy.advance((k + 1) // 2)
            after = copy.state
            last = int(raw[(k - 1) >> 1] >> np.uint64(32)) if k else state["uinteger"]
            after["has_uint32"], after["uinteger"] = k & 1, last
        elif k:
            # k outputs taken; a half word kept from an earlier float32 draw stays
            copy.advance(k)
            after = copy.state
            after["has_uint32"], after["uinteger"] = state["has_uint32"], state["uinteger"]
        bg.state = after
    return out


def standard_normal32(rng: np.random.Generator, size) -> np.ndarray:
    """``rng.standard_normal(size, dtype=np.float32)``: the same values, and
    ``rng`` left in the same state, drawn in compiled code.

    numpy itself draws for a generator other than PCG64, one holding half of
    a 64-bit output from an earlier 32-bit draw, or ``size`` None (a scalar).

    References
    ----------
    .. [1] Marsaglia, G., Tsang, W. W. (2000). The ziggurat method for
       generating random variables. J. Stat. Softw. 5(8).

    Examples
    --------
    >>> a = standard_normal32(np.random.default_rng(7), (3, 4))
    >>> b = np.random.default_rng(7).standard_normal((3, 4), dtype=np.float32)
    >>> bool(np.array_equal(a, b))
    True
    """
    out = _draw(rng, size, np.float32, _ziggurat, 1)
    return rng.standard_normal(size, dtype=np.float32) if out is None else out


def standard_normal64(rng: np.random.Generator, size) -> np.ndarray:
    """``rng.standard_normal(size)`` (float64): the same values, and ``rng``
    left in the same state, drawn in compiled code from one 64-bit word per
    value (and a few more for the ~1.5% of draws outside the ziggurat's
    boxes). numpy itself draws for a generator other than PCG64 or ``size``
    None.

    References
    ----------
    .. [1] Marsaglia, G., Tsang, W. W. (2000). The ziggurat method for
       generating random variables. J. Stat. Softw. 5(8).

    Examples
    --------
    >>> a = standard_normal64(np.random.default_rng(7), 5)
    >>> bool(np.array_equal(a, np.random.default_rng(7).standard_normal(5)))
    True
    """
    out = _draw(rng, size, np.float64, _ziggurat64, 2)
    return rng.standard_normal(size) if out is None else out
