# SPDX-License-Identifier: GPL-3.0-or-later
"""Per-sample kernel of the M-th power carrier loop (numba, releases the GIL).

The kernel is a plain function of arrays: input samples, output arrays, a
float64 ``state`` array (everything the loop remembers between calls) and a
float64 ``params`` array (everything the block derives from its settings).
Calling it on one long array or on any split of it gives identical results.

Per sample n (x = input, theta^ = NCO phase, rad; v = NCO step, rad/sample)::

    y      = x e^{-j theta^}                          corrected output
    d      = (y_lim)^M e^{-j M point_angle}            M-th power detector
    e      = Im(d) / A_M                               normalised: mean sin(M phi)
    acc2  += K3 e ; acc1 += K2 e + acc2 ; v = K1 e + acc1
    theta^ += v                                        (used from the next sample on)

``A_M = S^(M/2)`` where ``S`` is the M2M4 estimate of the signal power
(``S = sqrt(2 M2^2 - M4)``, Pauluzzi & Beaulieu 2000) from exponentially
averaged moments of |x|^2 and |x|^4, floored at ``S_FLOOR * M2``. Normalising
by the signal part (not total power) keeps the detector gain at exactly M and
hence the loop noise bandwidth at its design value for any amplitude and SNR.

Robustness: a non-finite or exactly zero sample is a gap; the NCO coasts
(theta^ += acc1), nothing else changes, and the output is 0. A sample whose
power exceeds ``LIMIT * M2`` is limited to that power (phase kept) before it
reaches the moments and the detector, so one huge spike cannot upset the
loop gain.
"""

import numpy as np
from numba import njit

# state[] layout -------------------------------------------------------------------
S_PHASE = 0      # theta^, rad, wrapped to [-pi, pi)
S_FREQ = 1       # acc1: NCO frequency register, rad/sample
S_ACC2 = 2       # acc2: frequency-rate register, rad/sample^2 (3rd order)
S_M2 = 3         # exponential average of |x|^2 (not bias-corrected)
S_M4 = 4         # exponential average of |x|^4
S_MW = 5         # exponential average of 1 (bias correction of M2, M4)
S_GAPS = 6       # count of gap samples (non-finite or zero) seen
S_LAST_STEP = 7  # proportional part K1 e of the last NCO step, rad/sample
STATE_SIZE = 8

# params[] layout ------------------------------------------------------------------
P_K1 = 0
P_K2 = 1
P_K3 = 2
P_ROT_RE = 3     # e^{-j M point_angle}
P_ROT_IM = 4
P_FMIN = 5       # frequency register limits, rad/sample
P_FMAX = 6
P_ALPHA = 7      # moment averaging coefficient (1 / averaging length)
P_STEP_IN_FREQ = 8   # 1.0: report the whole NCO step as frequency (1st order), else 0.0
PARAMS_SIZE = 9

S_FLOOR = 10.0 ** (-25.0 / 10.0)   # signal-power floor relative to M2 (-25 dB)
LIMIT = 100.0                      # sample power limit relative to M2 (+20 dB)
TWO_PI = 2.0 * np.pi


def new_state():
    """A fresh state array: NCO at 0 rad and 0 rad/sample, no moments yet."""
    return np.zeros(STATE_SIZE, dtype=np.float64)


@njit(cache=True, inline="always")
def _cpow(z, m):
    """z**m for a positive integer m by repeated squaring."""
    result = 1.0 + 0.0j
    base = z
    while m > 0:
        if m & 1:
            result *= base
        base *= base
        m >>= 1
    return result


@njit(nogil=True, cache=True)
def mth_power_loop(x, out, ref, freq, err, marks, mark_freq, state, params, power):
    """Run the loop over ``x`` (complex64), writing the corrected samples to ``out``.

    ``ref``, ``freq``, ``err`` are the diagnostic outputs (reference phasor,
    frequency register in rad/sample, phase error in rad, carrier-phase units);
    pass zero-length arrays to skip them. ``marks`` holds increasing sample
    indices (relative to ``x``) at which the frequency register is recorded
    into ``mark_freq`` (rad/sample). ``state`` is updated in place.
    """
    k1 = params[P_K1]
    k2 = params[P_K2]
    k3 = params[P_K3]
    rot = complex(params[P_ROT_RE], params[P_ROT_IM])
    fmin = params[P_FMIN]
    fmax = params[P_FMAX]
    alpha = params[P_ALPHA]
    step_in_freq = params[P_STEP_IN_FREQ]
    inv_power = 1.0 / power

    phase = state[S_PHASE]
    acc1 = state[S_FREQ]
    acc2 = state[S_ACC2]
    m2 = state[S_M2]
    m4 = state[S_M4]
    mw = state[S_MW]
    gaps = state[S_GAPS]
    last_step = state[S_LAST_STEP]

    want_ref = ref.shape[0] > 0
    want_freq = freq.shape[0] > 0
    want_err = err.shape[0] > 0
    n_marks = marks.shape[0]
    next_mark = 0

    for n in range(x.shape[0]):
        while next_mark < n_marks and marks[next_mark] == n:
            mark_freq[next_mark] = acc1 + step_in_freq * last_step
            next_mark += 1
        c = np.cos(phase)
        s = np.sin(phase)
        xn = complex(x[n].real, x[n].imag)
        p = xn.real * xn.real + xn.imag * xn.imag
        if not np.isfinite(p) or p == 0.0:
            # gap: coast on the frequency register, output nothing
            out[n] = 0.0
            gaps += 1.0
            last_step = 0.0
            e_theta = 0.0
        else:
            y = complex(xn.real * c + xn.imag * s, xn.imag * c - xn.real * s)
            out[n] = y
            # limiter against spikes (only once the moments exist)
            if mw > 0.0:
                cap = LIMIT * m2 / mw
                if p > cap:
                    scale = np.sqrt(cap / p)
                    y *= scale
                    p = cap
            # M2M4 moments and signal-power estimate
            m2 += alpha * (p - m2)
            m4 += alpha * (p * p - m4)
            mw += alpha * (1.0 - mw)
            mm2 = m2 / mw
            mm4 = m4 / mw
            sig2 = 2.0 * mm2 * mm2 - mm4
            floor2 = S_FLOOR * S_FLOOR * mm2 * mm2
            if sig2 < floor2:
                sig2 = floor2
            a_m = sig2 ** (0.25 * power)            # S^(M/2) with S = sqrt(sig2)
            d = _cpow(y, power) * rot
            e = d.imag / a_m
            acc2 += k3 * e
            acc1 += k2 * e + acc2
            if acc1 > fmax:
                acc1 = fmax
                if acc2 > 0.0:
                    acc2 = 0.0
            elif acc1 < fmin:
                acc1 = fmin
                if acc2 < 0.0:
                    acc2 = 0.0
            last_step = k1 * e
            phase += last_step
            e_theta = np.arctan2(d.imag, d.real) * inv_power if want_err else 0.0
        if want_ref:
            ref[n] = complex(c, s)
        if want_freq:
            freq[n] = acc1 + step_in_freq * last_step
        if want_err:
            err[n] = e_theta
        phase += acc1
        if phase >= np.pi or phase < -np.pi:
            phase -= TWO_PI * np.floor((phase + np.pi) / TWO_PI)
    while next_mark < n_marks:
        mark_freq[next_mark] = acc1 + step_in_freq * last_step
        next_mark += 1

    state[S_PHASE] = phase
    state[S_FREQ] = acc1
    state[S_ACC2] = acc2
    state[S_M2] = m2
    state[S_M4] = m4
    state[S_MW] = mw
    state[S_GAPS] = gaps
    state[S_LAST_STEP] = last_step
    return x.shape[0]
