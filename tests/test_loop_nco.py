# SPDX-License-Identifier: GPL-3.0-or-later
"""The loop's NCO phasor recursion does not drift: over 1e9 samples the kernel's own NCO
pieces (``nco_advance`` between exact ``nco_resync`` every ``NCO_RESYNC`` samples) keep
the phasors e^{j theta^} and e^{j M theta^} on the exact phase, in angle and in magnitude."""

import numpy as np
import pytest
from numba import njit

from gnuradio.coherer import _loop_kernel as K

#: exact phase is kept as an integer count of 2*pi / 2**UNIT_BITS
UNIT_BITS = 40
UNIT = 2.0 * np.pi / 2.0 ** UNIT_BITS


@njit(nogil=True)
def _nco_run(n, power, freq_units, ramp_units, jitter_units, jump_every):
    """Drive the kernel's NCO pieces for ``n`` samples, resynchronising every NCO_RESYNC.

    Steps are integers in units of ``UNIT`` so the exact phase is known: a
    frequency ``freq_units`` that ramps by ``ramp_units`` every 4096 samples,
    plus a deterministic pseudo-random proportional part of up to
    +-``jitter_units`` and, every ``jump_every`` samples, a large step that
    takes the libm branch. Before every resync the recursion is compared with
    the float64 phase accumulator and with the exact phase.
    Returns (max |P - e^{j theta^}|, max |P^M - e^{j M theta^}|, max ||P| - 1|,
    max |theta^ - theta_exact| wrapped, checks made).
    """
    mask = (1 << UNIT_BITS) - 1
    exact = 0                                  # exact phase, units, mod 2^UNIT_BITS
    phase = 0.0                                # the kernel's float64 accumulator
    freq = freq_units
    ph_re = ph_im = pm_re = pm_im = 0.0
    rf_re = rf_im = rm_re = rm_im = 0.0
    nco_ref = 0.0
    left = 0
    state = np.uint64(88172645463325252)
    worst_p = worst_pm = worst_mag = worst_acc = 0.0
    checks = 0
    for i in range(n):
        if left <= 0:
            if i > 0:
                # compare just before the resync, where the recursion has run longest
                ex = (exact & mask) * UNIT
                worst_p = max(worst_p, abs(complex(ph_re, ph_im) - np.exp(1j * phase)))
                worst_pm = max(worst_pm, abs(complex(pm_re, pm_im) - np.exp(1j * power * phase)))
                worst_mag = max(worst_mag, abs(np.hypot(ph_re, ph_im) - 1.0),
                                abs(np.hypot(pm_re, pm_im) - 1.0))
                diff = phase - ex
                diff -= 2.0 * np.pi * np.floor(diff / (2.0 * np.pi) + 0.5)
                worst_acc = max(worst_acc, abs(diff))
                checks += 1
            ph_re, ph_im, pm_re, pm_im, nco_ref, rf_re, rf_im, rm_re, rm_im = K.nco_resync(
                phase, freq * UNIT, power)
            left = K.NCO_RESYNC
        left -= 1
        # xorshift64: proportional part of the step, uniform in +-jitter_units
        state ^= state << np.uint64(13)
        state ^= state >> np.uint64(7)
        state ^= state << np.uint64(17)
        prop = np.int64(state % np.uint64(2 * jitter_units + 1)) - jitter_units
        if jump_every > 0 and i % jump_every == jump_every - 1:
            prop += 1 << (UNIT_BITS - 3)       # a step of pi/4: beyond SMALL_ANGLE
        if i % 4096 == 4095:
            freq += ramp_units
        exact += freq + prop
        v = prop * UNIT + freq * UNIT - nco_ref
        phase, ph_re, ph_im, pm_re, pm_im = K.nco_advance(
            phase, prop * UNIT, freq * UNIT, v, ph_re, ph_im, pm_re, pm_im,
            rf_re, rf_im, rm_re, rm_im, power)
    return worst_p, worst_pm, worst_mag, worst_acc, checks


def test_rotation_series_matches_libm():
    """Below SMALL_ANGLE the series equals cos/sin to its truncation bound
    (first omitted terms v^8/8! and v^7/7! at v = 2^-5: 2.2e-17 and 6.0e-15) plus the
    rounding of a few operations (each at most 1.1e-16)."""
    v = np.linspace(-K.SMALL_ANGLE, K.SMALL_ANGLE, 20001)
    got = np.array([K._rotate(1.0, 0.0, a) for a in v])
    np.testing.assert_allclose(got[:, 0], np.cos(v), rtol=0, atol=5e-16)
    np.testing.assert_allclose(got[:, 1], np.sin(v), rtol=0, atol=6.1e-15)
    big = np.array([0.05, -0.7, 2.0, np.pi])              # libm branch
    got = np.array([K._rotate(0.6, 0.8, a) for a in big])
    np.testing.assert_allclose(got[:, 0] + 1j * got[:, 1], (0.6 + 0.8j) * np.exp(1j * big),
                               rtol=0, atol=1e-15)


@pytest.mark.slow
def test_phasors_do_not_drift_over_1e9_samples():
    """1e9 samples, M = 8, frequency 0.0123 cycles/sample ramping, jittered steps.

    Bounds: between resyncs the recursion adds at most the series error (6e-15)
    plus a few roundings (1e-16) per step, times NCO_RESYNC = 256 steps, for P^M
    with the M-fold angle: below 2e-12, asserted < 1e-11 in angle and magnitude.
    The float64 phase accumulator itself rounds by at most half an ulp of pi
    (2.2e-16) twice per sample (proportional part, then frequency): at most 4.4e-7 rad
    after 1e9 samples, asserted < 1e-6."""
    freq_units = int(0.0123 * 2 ** UNIT_BITS)
    ramp_units = 3
    jitter_units = int(3e-3 / UNIT)            # proportional steps up to 3e-3 rad
    worst_p, worst_pm, worst_mag, worst_acc, checks = _nco_run(
        1_000_000_000, 8, freq_units, ramp_units, jitter_units, 1_000_003)
    assert checks == (1_000_000_000 - 1) // K.NCO_RESYNC
    assert worst_p < 1e-11 and worst_pm < 1e-11
    assert worst_mag < 1e-11
    assert worst_acc < 1e-6
