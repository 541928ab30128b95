# SPDX-License-Identifier: GPL-3.0-or-later
"""Small numba helpers shared by the kernels."""

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
