# SPDX-License-Identifier: GPL-3.0-or-later
"""Small numba helpers shared by the kernels (inlined; branch-free once M is a constant,
so loops that call them can use SIMD)."""

import numpy as np
from numba import njit


#: fastmath flags of the vectorised sums: reassociation (so sums vectorise) without assuming
#: finite values, since gaps are detected by their non-finite or zero power.
SIMD_MATH = {"reassoc", "contract", "nsz", "arcp"}


@njit(cache=True, inline="always", error_model="numpy")
def masked_sample(xs, i):
    """Sample ``i`` of interleaved float32 I/Q ``xs`` as ``(re, im, power, ok)`` in float64;
    a gap (non-finite or exactly zero power, ``ok`` False) comes back as 0, branch-free."""
    xr = np.float64(xs[2 * i])
    xi = np.float64(xs[2 * i + 1])
    p = xr * xr + xi * xi
    ok = (p > 0.0) & (p < np.inf)
    return (xr if ok else 0.0), (xi if ok else 0.0), (p if ok else 0.0), ok


@njit(cache=True, inline="always")
def pair_power(ur, ui, m):
    """``(ur + j ui)**m`` as a real pair, by repeated squaring (m a positive integer)."""
    rr = 1.0
    ri = 0.0
    while m > 0:
        if m & 1:
            rr, ri = rr * ur - ri * ui, rr * ui + ri * ur
        ur, ui = ur * ur - ui * ui, 2.0 * ur * ui
        m >>= 1
    return rr, ri


@njit(cache=True, inline="always", error_model="numpy")
def unit_pair_power(zr, zi, p, power):
    """``(z/|z|)**M`` for ``z = zr + j zi`` with ``p = |z|^2 > 0``, as a real pair.

    M = 2, 4, 8, 16 square ``z^2/|z|^2`` (no square root), written out so that no
    loop is left once M is a constant; other M use :func:`pair_power`."""
    if power == 2 or power == 4 or power == 8 or power == 16:
        inv = 1.0 / p
        ur = (zr * zr - zi * zi) * inv
        ui = 2.0 * zr * zi * inv
        if power >= 4:
            ur, ui = ur * ur - ui * ui, 2.0 * ur * ui
        if power >= 8:
            ur, ui = ur * ur - ui * ui, 2.0 * ur * ui
        if power == 16:
            ur, ui = ur * ur - ui * ui, 2.0 * ur * ui
        return ur, ui
    inv = 1.0 / np.sqrt(p)
    if power == 1:
        return zr * inv, zi * inv
    return pair_power(zr * inv, zi * inv, power)


@njit(cache=True, inline="always")
def half_power(u, m):
    """u**(m/2) for a real u >= 0 and a positive integer m. M = 1, 2, 4, 8, 16 written
    out; others by repeated squaring, one sqrt if m is odd."""
    if m == 1:
        return np.sqrt(u)
    if m == 2:
        return u
    if m == 4:
        return u * u
    if m == 8:
        u2 = u * u
        return u2 * u2
    if m == 16:
        u2 = u * u
        u4 = u2 * u2
        return u4 * u4
    result = 1.0
    base = u
    k = m >> 1
    while k > 0:
        if k & 1:
            result *= base
        base *= base
        k >>= 1
    if m & 1:
        result *= np.sqrt(u)
    return result
