# SPDX-License-Identifier: GPL-3.0-or-later
"""Synthetic test streams for the benchmark: noisy M-PSK at one sample per symbol."""

import numpy as np

#: Es/N0 of the benchmark streams, dB (a comfortably locked operating point).
BENCH_ESN0_DB = 12.0
#: Carrier frequency offset of the benchmark streams, cycles/sample.
BENCH_OFFSET = 2e-4


def psk_stream(power, n, esn0_db=BENCH_ESN0_DB, offset=BENCH_OFFSET, seed=0):
    """``n`` complex64 samples of unit-energy M-PSK (M = ``power``) with a carrier
    offset of ``offset`` cycles/sample, a random start phase and complex white
    Gaussian noise at Es/N0 = ``esn0_db`` dB."""
    rng = np.random.default_rng(seed)
    symbols = np.exp(2j * np.pi * rng.integers(0, power, n) / power)
    carrier = np.exp(1j * (2 * np.pi * offset * np.arange(n) + rng.uniform(-np.pi, np.pi)))
    sigma = np.sqrt(0.5 * 10.0 ** (-esn0_db / 10.0))
    noise = sigma * (rng.standard_normal(n) + 1j * rng.standard_normal(n))
    return (symbols * carrier + noise).astype(np.complex64)


def write_cf32(path, x):
    """Write complex samples as interleaved little-endian float32 I/Q."""
    np.asarray(x, dtype="<c8").tofile(path)
