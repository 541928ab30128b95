# SPDX-License-Identifier: GPL-3.0-or-later
"""Steady tracking errors (rad) for frequency ramps (Hz/s) and accelerations (Hz/s^2), and
the 2nd-order bandwidth (Hz) that balances ramp error against jitter."""

from math import pi

import numpy as np
from scipy import optimize

from ..arguments import MAX_BT, validate_spec
from ._bandwidth import steady_phase_error, steady_rate_limit
from ._detector import _is_unshaped, detector_noise_density, mth_power_noise
from ._gains import natural_frequency, noise_bw_per_wn
from ._loop import design_loop
from ._noise import phase_error_variance


def continuous_ramp_phase_error(noise_bw_hz, damping, rate_hz_per_s):
    """Continuous 2nd-order approximation ``(dw/dt)/wn^2`` in rad for a ramp in Hz/s."""
    wn = natural_frequency(noise_bw_hz, damping)
    return 2.0 * pi * rate_hz_per_s / (wn * wn)


def max_trackable_ramp_hz_per_s(design):
    """Largest frequency ramp (Hz/s) for which the M-domain steady error stays within pi/2
    (the sine S-curve's usable range; REFERENCES 2.1). Unbounded for order 3, 0 for order 1."""
    phi_max = (pi / 2.0) / design.power
    return steady_rate_limit(design.g_gains, design.sample_rate, 2, phi_max)


# --- tracking and bandwidth choice -----------------------------------------------------------

def jerk_phase_error(design, rate2_hz_per_s2):
    """Steady-state phase error (rad) to a frequency acceleration in Hz/s^2: exact discrete
    ``J / (g K3)`` with ``J = 2 pi rate2 / fs^3`` rad/sample^3 for order 3 (REFERENCES 2.1); unbounded otherwise."""
    return steady_phase_error(design.g_gains, design.sample_rate, 3, rate2_hz_per_s2)


def total_phase_error_variance(design, esn0, rate_hz_per_s, **signal_model):
    """Linear jitter variance plus squared steady ramp error (rad^2) at linear Es/N0 ``esn0``
    (``signal_model``: the keyword arguments of :func:`detector_noise`)."""
    jitter = phase_error_variance(design.power, esn0, design.actual_bt, **signal_model)
    return jitter + design.ramp_phase_error(rate_hz_per_s) ** 2


def suggest_noise_bw(sample_rate, power, esn0, rate_hz_per_s, damping=0.707, loop_order=2, **signal_model):
    """Noise bandwidth B_L (Hz) of a 2nd-order loop that minimises jitter variance plus
    squared steady ramp error for linear Es/N0 ``esn0`` and a frequency ramp in Hz/s.

    Only a 2nd-order loop has this trade-off (order 1 cannot track a ramp; order 3 has no
    ramp error). The search runs over exact designs up to ``MAX_BT * sample_rate``.
    ``signal_model``: the keyword arguments of :func:`detector_noise` (jitter of that signal).
    """
    if loop_order != 2:
        raise ValueError(f"loop_order must be 2 for a bandwidth suggestion, got {loop_order!r}")
    if not np.isfinite(esn0) or esn0 <= 0.0:
        raise ValueError(f"esn0 must be a positive linear Es/N0, got {esn0!r}")
    if not np.isfinite(rate_hz_per_s) or rate_hz_per_s == 0.0:
        raise ValueError(f"rate_hz_per_s must be a non-zero frequency ramp in Hz/s, got {rate_hz_per_s!r}")
    validate_spec(sample_rate, power, MAX_BT * sample_rate, damping, loop_order)
    # continuous estimate: a B + k / B^4 with a = V_M T / M^2, k = (2 pi rate c^2)^2, c = B_L / wn
    if _is_unshaped(power, signal_model):
        a = mth_power_noise(power, esn0) / (sample_rate * power * power)
    else:
        a = 2.0 * detector_noise_density(power, esn0, **signal_model) / (sample_rate * power * power)
    k = (2.0 * pi * rate_hz_per_s * noise_bw_per_wn(damping) ** 2) ** 2
    hi = MAX_BT * sample_rate
    guess = min((4.0 * k / a) ** 0.2, hi)
    lo_log, hi_log = np.log(guess / 30.0), np.log(min(guess * 30.0, hi))

    def cost(log_bw):
        d = design_loop(sample_rate, power, float(np.exp(log_bw)), damping, loop_order)
        return total_phase_error_variance(d, esn0, rate_hz_per_s, **signal_model)

    best = optimize.minimize_scalar(cost, bounds=(lo_log, hi_log), method="bounded",
                                    options={"xatol": 1e-7})
    return float(np.exp(best.x))

