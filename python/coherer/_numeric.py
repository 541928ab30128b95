# SPDX-License-Identifier: GPL-3.0-or-later
"""Small numba helpers shared by the kernels (inlined; branch-free once M is a constant,
so loops that call them can use SIMD)."""

import numpy as np
from numba import njit


#: fastmath flags of the vectorised sums: reassociation lets a sum use SIMD lanes. Its
#: grouping then depends only on a sample's position in its window or block, never on where
#: a call starts, so the sums are the same whatever the stream's chunking. No ``nnan`` /
#: ``ninf``: gaps are detected by their non-finite or zero power.
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


#: Bits of the exponent the powers below handle: M up to 2**POWER_BITS - 1 (the package's
#: M is at most 16).
POWER_BITS = 5


@njit(cache=True, inline="always")
def pair_power(ur, ui, m):
    """``(ur + j ui)**m`` as a real pair by repeated squaring, for an integer 1 <= m < 32.
    Always POWER_BITS squarings, each factor taken or not by a select: no branch and no
    loop of its own once unrolled, so a loop over samples that calls it vectorises even
    when m is only known at run time (the same products in the same order as the
    branching method, so the same bits)."""
    rr = 1.0
    ri = 0.0
    for bit in range(POWER_BITS):
        take = (m >> bit) & 1
        nr = rr * ur - ri * ui
        ni = rr * ui + ri * ur
        rr = nr if take else rr
        ri = ni if take else ri
        ur, ui = ur * ur - ui * ui, 2.0 * ur * ui
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
    """u**(m/2) for a real u >= 0 and an integer 1 <= m < 32: sqrt(u) if m is odd, times
    u**(m//2) by repeated squaring, branch-free like :func:`pair_power` (for M = 1, 2, 4,
    8, 16 the same bits as writing the products out)."""
    root = np.sqrt(u) if m & 1 else 1.0
    result = 1.0
    base = u
    k = m >> 1
    for bit in range(POWER_BITS - 1):
        result = result * base if (k >> bit) & 1 else result
        base = base * base
    return result * root
