"""The AR(1)/AR(2) impulse response and its prefix tables, kept for the last few (coefficients, length)."""
from __future__ import annotations

import numpy as np
from numba import njit

from ._state import FLUSH, FMA, Response

_CACHE: dict = {}
_CACHE_SIZE = 8


@njit(cache=True)
def impulse_and_length(g1, g2, n):
    """(h, K): the impulse response and the number of its leading entries that can be non-zero."""
    h = np.empty(max(n, 2))
    h[0] = 1.0
    h[1] = g1
    h1 = g1  # h[k - 1] and h[k - 2], kept out of memory (the recursion is one long chain)
    h2 = 1.0
    for k in range(2, n):
        x = g1 * h1 + g2 * h2
        if abs(x) < FLUSH and abs(h1) < FLUSH:
            h[k:] = 0.0
            return h, k  # the rest is 0: stop before subnormal numbers slow everything down
        h[k] = x
        h2 = h1
        h1 = x
    return h, max(n, 2)


@njit(cache=True, fastmath=FMA)
def response_tables(g2, h, n_nonzero, length, out):
    """Prefix sums over k < L of h_k^2, h_k f_k, f_k^2, h_k, f_k (f_k = g2 h_{k-1}), for L = 0..length.

    With unit weights they are the quadratic sums of a pool of length L;
    beyond ``n_nonzero + 1`` every term is 0 and the sums stay constant.
    """
    a = b = c = d = e = 0.0
    out[0, 0] = out[1, 0] = out[2, 0] = out[3, 0] = out[4, 0] = 0.0
    hm = 0.0
    for k in range(length):
        hk = h[k] if k < n_nonzero else 0.0
        fk = g2 * hm
        hm = hk
        a += hk * hk
        b += hk * fk
        c += fk * fk
        d += hk
        e += fk
        out[0, k + 1] = a
        out[1, k + 1] = b
        out[2, k + 1] = c
        out[3, k + 1] = d
        out[4, k + 1] = e


@njit(cache=True)
def impulse_energy(g1, g2, n):
    """sum of h_k^2 over the first n frames of the AR impulse response (stops once it has decayed away)."""
    h1 = 1.0
    h2 = 0.0
    total = 1.0
    for _ in range(1, n):
        x = g1 * h1 + g2 * h2
        h2 = h1
        h1 = x
        total += x * x
        if abs(x) < FLUSH and abs(h2) < FLUSH:
            break
    return total


def response_for(g1: float, g2: float, T: int) -> Response:
    """The :class:`Response` of coefficients (g1, g2) for T frames; the last few are kept (read-only)."""
    key = (g1, g2, T)
    found = _CACHE.get(key)
    if found is not None:
        return found
    found = _from_shorter(g1, g2, T)
    if found is None:
        h, n_nonzero = impulse_and_length(g1, g2, T + 1)
        length = min(T, n_nonzero + 1)
        tables = np.empty((5, length + 1))
        response_tables(g2, h, n_nonzero, length, tables)
        h.flags.writeable = False
        found = Response(g1, g2, h, n_nonzero, tables)
    if len(_CACHE) >= _CACHE_SIZE:
        _CACHE.pop(next(iter(_CACHE)))
    _CACHE[key] = found
    return found


def _from_shorter(g1: float, g2: float, T: int):
    """The response for T frames from one of fewer frames, when the kernel had decayed to 0 within them (the
    kernel's estimate on a block, then the whole trace): the same impulse response padded with zeros and the
    same prefix sums (they stop growing where it is 0).  None when no such entry is kept."""
    for (k1, k2, shorter), found in _CACHE.items():
        # (flushed to 0 at n_nonzero < shorter: the recursion for T frames stops at the same frame, and the
        # table length min(T, n_nonzero + 1) is the same)
        if k1 == g1 and k2 == g2 and shorter < T and found.n_nonzero < shorter:
            padded = np.zeros(max(T + 1, 2))
            padded[:found.h.size] = found.h
            padded.flags.writeable = False
            return Response(g1, g2, padded, found.n_nonzero, found.tables)
    return None


def response_energy(g1: float, g2: float, n: int) -> float:
    """sum_k h_k^2 over the first n frames: the last prefix sum of the kept tables for (g1, g2, n) when they
    are kept, else :func:`impulse_energy` (the two may differ in the last place: the tables' sum is fused)."""
    found = _CACHE.get((g1, g2, n))
    if found is not None:
        return float(found.tables[0, -1])
    return float(impulse_energy(g1, g2, n))


@njit(cache=True, inline="always")
def frame_penalty(t, T, g1, g2):
    """a_t of the linear term lambda * sum_t a_t c_t (sum_t s_t = sum_t a_t c_t)."""
    if t < T - 2:
        return 1.0 - g1 - g2
    if t == T - 2:
        return 1.0 - g1
    return 1.0
