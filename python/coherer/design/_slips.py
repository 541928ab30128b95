# SPDX-License-Identifier: GPL-3.0-or-later
"""Cycle slips and nonlinear jitter: loop SNR, Viterbi's mean time between slips (s) and the
Tikhonov phase variance (rad^2)."""

from math import fsum, inf, pi, sqrt

import numpy as np
from scipy import special

from ._detector import _is_unshaped, detector_noise_density, mth_power_noise
from ._noise import db_to_linear


# --- cycle slips and nonlinear jitter (REFERENCES 3 and 5) -------------------------------------

#: Empirical second-order correction: a 2nd-order loop (zeta 0.707) slips about as often as a
#: first-order loop at a loop SNR this many dB lower (simulated band of REFERENCES 5).
SECOND_ORDER_SLIP_SHIFT_DB = 1.0


def loop_snr(power, esn0, bt, *, samples_per_symbol=1, rolloff=0.35, placement="channel",
             modulation_index=None):
    """Loop SNR in the psi = M phi domain, ``rho_psi = 1 / (B_L T V_M)`` (linear; REFERENCES 5).

    With a signal model (:func:`detector_noise`): ``1 / (M^2 var(phi)) = 1 / (2 B_L T S_e(0))``;
    for a residual carrier that is ``cos^2(beta) / (B_L T sigma_n^2)``, the loop SNR on the
    carrier's share of the power.
    """
    model = dict(samples_per_symbol=samples_per_symbol, rolloff=rolloff, placement=placement,
                 modulation_index=modulation_index)
    if not _is_unshaped(power, model):
        return 1.0 / (2.0 * bt * detector_noise_density(power, esn0, **model))
    return 1.0 / (bt * mth_power_noise(power, esn0))


def slip_time_bt_first_order(rho):
    """Viterbi's mean time to the first slip of a first-order loop, as ``B_L T_slip = pi^2 rho I0(rho)^2 / 2``.

    Dimensionless (divide by B_L in Hz for seconds); ``inf`` when it overflows a float.
    """
    rho = float(rho)
    if rho < 0.0 or not np.isfinite(rho):
        raise ValueError(f"rho must be a finite loop SNR >= 0, got {rho!r}")
    if rho == 0.0:
        return 0.0
    log_value = np.log(pi * pi * rho / 2.0) + 2.0 * (np.log(special.i0e(rho)) + rho)
    return float(np.exp(log_value)) if log_value < 700.0 else inf


def mean_time_between_slips_s(design, esn0, **signal_model):
    """Mean time (s) between cycle slips of 2 pi / M at linear Es/N0 ``esn0`` per symbol.

    ``signal_model``: the keyword arguments of :func:`detector_noise` (samples per symbol,
    roll-off, placement, modulation index); the loop SNR is then that of :func:`loop_snr`.

    Viterbi's first-order formula with the M-th power mapping ``rho_psi = 1/(B_L T V_M)``
    (REFERENCES 5), using the exact discrete noise bandwidth. For orders 2 and 3 the loop SNR
    is first lowered by :data:`SECOND_ORDER_SLIP_SHIFT_DB`, an empirical correction from
    simulations of a 2nd-order loop with zeta 0.707 (not a published formula; for order 3
    and other dampings it is an estimate).
    """
    rho = loop_snr(design.power, esn0, design.actual_bt, **signal_model)
    if design.loop_order >= 2:
        rho *= db_to_linear(-SECOND_ORDER_SLIP_SHIFT_DB)
    return slip_time_bt_first_order(rho) / (design.actual_bt * design.sample_rate)


def tikhonov_phase_variance(rho):
    """Variance (rad^2) of phi mod 2 pi under the Tikhonov density ``exp(rho cos phi) / (2 pi I0(rho))``:
    ``pi^2/3 + 4 sum_k (-1)^k I_k(rho) / (k^2 I0(rho))`` (first-order loop at loop SNR rho; REFERENCES 3).
    """
    rho = float(rho)
    if rho < 0.0 or not np.isfinite(rho):
        raise ValueError(f"rho must be a finite loop SNR >= 0, got {rho!r}")
    if rho > 1e8:
        return 1.0 / rho          # the series' relative departure from 1/rho is ~1/(2 rho) here
    k = np.arange(1, int(12.0 * sqrt(rho)) + 41, dtype=float)
    ratio = special.ive(k, rho) / special.ive(0, rho)        # I_k / I0 without overflow
    terms = 4.0 * np.where(k % 2 == 0, 1.0, -1.0) * ratio / (k * k)
    return fsum([pi * pi / 3.0, *terms.tolist()])


def nonlinear_phase_error_variance(power, esn0, bt, **signal_model):
    """Carrier phase-error variance (rad^2, phi mod 2 pi / M) from the Tikhonov density at
    the psi-domain loop SNR ``1/(B_L T V_M)``; first-order loop model. ``signal_model``: the
    keyword arguments of :func:`detector_noise` (the loop SNR is then :func:`loop_snr`'s)."""
    return tikhonov_phase_variance(loop_snr(power, esn0, bt, **signal_model)) / (power * power)
