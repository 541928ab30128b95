# SPDX-License-Identifier: GPL-3.0-or-later
"""Stateless frequency translation: x[n] e^{-j 2 pi c n}, n the absolute sample index.

The phasor is computed afresh from n at every multiple of ``ANCHOR`` and advanced by
one complex multiplication per sample in between (float64), so each output depends
on its absolute index only, never on where the stream was cut."""

import numpy as np
from numba import njit

#: Samples between exact phasor evaluations (the rotation drifts by ~ANCHOR x 1e-16 rad).
ANCHOR = 1024


@njit(cache=True, inline="always")
def _phasor(n, cycles_per_sample):
    """e^{-j 2 pi c n}, the phase reduced to one cycle before the exponential."""
    frac = (n * cycles_per_sample) % 1.0
    return np.exp(-2j * np.pi * frac)


@njit(nogil=True, cache=True)
def mix_down(x, out, first_index, cycles_per_sample):
    """``out[k] = x[k] e^{-j 2 pi c (first_index + k)}`` (complex64 in and out; ``c`` in
    cycles per sample, ``first_index`` the absolute index of ``x[0]``)."""
    step = np.exp(-2j * np.pi * cycles_per_sample)
    n = first_index
    anchor = n - n % ANCHOR
    p = _phasor(anchor, cycles_per_sample)
    for _ in range(n - anchor):          # a call that starts between anchors
        p *= step
    for k in range(x.shape[0]):
        if n % ANCHOR == 0:
            p = _phasor(n, cycles_per_sample)
        out[k] = x[k] * np.complex64(p)
        p *= step
        n += 1
