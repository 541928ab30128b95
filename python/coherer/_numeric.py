# SPDX-License-Identifier: GPL-3.0-or-later
"""Small numba helpers shared by the kernels."""

import numpy as np
from numba import njit


@njit(cache=True, inline="always")
def int_power(z, m):
    """z**m for a complex z and a positive integer m, by repeated squaring."""
    result = 1.0 + 0.0j
    base = z
    while m > 0:
        if m & 1:
            result *= base
        base *= base
        m >>= 1
    return result


@njit(cache=True, inline="always")
def half_power(u, m):
    """u**(m/2) for a real u >= 0 and a positive integer m: repeated squaring, one sqrt if m is odd."""
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
