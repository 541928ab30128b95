# SPDX-License-Identifier: GPL-3.0-or-later
"""Signals as a receiver sees them, for the real-signal tests.

The pulse comes from an independent designer (the framework's
``firdes.root_raised_cosine``), scaled to unit energy, 11 * sps + 1 taps
(CONVENTIONS 8). With the shaped signal at unit mean power per sample the symbol
energy is Es = sps, so white complex noise of variance ``sps / esn0`` per sample
gives that Es/N0.
"""

import numpy as np
from gnuradio import filter as gr_filter
from scipy import signal


def rrc(sps, rolloff):
    """Unit-energy root-raised-cosine taps, 11 * sps + 1 of them."""
    taps = np.array(gr_filter.firdes.root_raised_cosine(1.0, sps, 1.0, rolloff, 11 * sps + 1))
    return taps / np.sqrt(np.sum(taps ** 2))


def filt(x, taps):
    """Convolution centred on the (odd-length, symmetric) filter: no delay."""
    return signal.oaconvolve(x, taps, mode="same")


def white(rng, n, variance):
    """Circular complex white Gaussian noise of total variance ``variance``."""
    return (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * np.sqrt(variance / 2.0)


def symbols(rng, power, nsym, point_angle=0.0):
    return np.exp(1j * (2 * np.pi * rng.integers(0, power, nsym) / power + point_angle))


def shaped(sym, sps, taps):
    """Symbols times sqrt(sps) on every sps-th sample, through the pulse: unit mean power."""
    up = np.zeros(len(sym) * sps, dtype=complex)
    up[::sps] = np.sqrt(sps) * sym
    return filt(up, taps)


def receive(rng, power, nsym, esn0_db, sps, rolloff, placement, theta=0.0, carrier_after_filter=False,
            point_angle=0.0):
    """M-PSK as a loop sees it. Returns ``(x complex64, symbols)``.

    ``sps == 1``: unshaped symbols plus white noise of variance 1/esn0.
    ``placement == "matched"``: shaped symbols plus white noise of variance sps/esn0,
    then the same unit-energy RRC again (raised-cosine signal, RRC-filtered noise).
    ``placement == "channel"``: shaped symbols (unit mean power) plus white noise of
    density sps/esn0 per sample passed through ``taps / taps.sum()`` (the RRC shape
    with unit gain at zero frequency).

    ``theta`` (scalar or one phase per sample) is the carrier phase. It multiplies
    the signal before the noise; with ``carrier_after_filter`` it multiplies the
    matched filter's output instead (for phase trajectories whose frequency would
    leave the pulse's band; circular noise keeps its statistics under rotation).
    """
    esn0 = 10.0 ** (esn0_db / 10.0)
    sym = symbols(rng, power, nsym, point_angle)
    n = nsym * sps
    carrier = np.exp(1j * np.asarray(theta)) if np.ndim(theta) else np.exp(1j * theta)
    if sps == 1:
        x = sym * carrier + white(rng, n, 1.0 / esn0)
        return x.astype(np.complex64), sym
    taps = rrc(sps, rolloff)
    s = shaped(sym, sps, taps)
    if placement == "matched":
        if carrier_after_filter:
            x = filt(s + white(rng, n, sps / esn0), taps) * carrier
        else:
            x = filt(s * carrier + white(rng, n, sps / esn0), taps)
    elif placement == "channel":
        x = s * carrier + filt(white(rng, n, sps / esn0), taps / np.sum(taps))
    else:
        raise ValueError(placement)
    return x.astype(np.complex64), sym


def manchester(rng, nbits, samples_per_bit):
    """Bi-phase (Manchester) +-1 stream: each bit is +b for half a bit, then -b."""
    half = samples_per_bit // 2
    bits = 2 * rng.integers(0, 2, nbits) - 1
    return np.repeat(np.stack([bits, -bits], axis=1).ravel(), half).astype(float)
