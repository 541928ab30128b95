# SPDX-License-Identifier: GPL-3.0-or-later
"""Synthetic test streams for the benchmark: noisy M-PSK at one sample per symbol."""

import numpy as np

from ..mth_power_loop_cc import default_point_angle

#: Es/N0 of the benchmark streams, dB (a comfortably locked operating point).
BENCH_ESN0_DB = 12.0
#: Carrier frequency offset of the benchmark streams, cycles/sample.
BENCH_OFFSET = 2e-4


def psk_stream(power, n, esn0_db=BENCH_ESN0_DB, offset=BENCH_OFFSET, seed=0, phase=None):
    """``n`` complex64 samples of unit-energy M-PSK (M = ``power``) with a carrier
    offset of ``offset`` cycles/sample, a start phase of ``phase`` rad (None: random)
    and complex white Gaussian noise at Es/N0 = ``esn0_db`` dB."""
    rng = np.random.default_rng(seed)
    symbols = np.exp(2j * np.pi * rng.integers(0, power, n) / power)
    start = rng.uniform(-np.pi, np.pi) if phase is None else phase
    carrier = np.exp(1j * (2 * np.pi * offset * np.arange(n) + start))
    sigma = np.sqrt(0.5 * 10.0 ** (-esn0_db / 10.0))
    noise = sigma * (rng.standard_normal(n) + 1j * rng.standard_normal(n))
    return (symbols * carrier + noise).astype(np.complex64)


def corrected_stream(power, n, seed=0):
    """What a lock detector sees behind a locked loop: :func:`psk_stream` with no
    carrier offset and one constellation point at angle 0 (M = 4: pi/4, as the
    loops output)."""
    return psk_stream(power, n, offset=0.0, seed=seed, phase=default_point_angle(power))


def write_cf32(path, x):
    """Write complex samples as interleaved little-endian float32 I/Q."""
    np.asarray(x, dtype="<c8").tofile(path)
