# SPDX-License-Identifier: GPL-3.0-or-later
"""Loop design: gains, noise bandwidth and performance predictions.

This module is the only place that turns a user's loop specification
(sample rate in samples/s, one-sided loop noise bandwidth B_L in Hz, damping
factor, loop order, modulation symmetry order M) into loop-filter gains.
The blocks and the ``coherer design`` command both call :func:`design_loop`.

Loop model (all orders)::

    e[n]      = normalised M-th power detector output, mean sin(M*phi)
                (detector gain Kp = M per rad of carrier phase)
    v[n]      = K1 e[n] + K2 sum(e) + K3 sum(sum(e))     (rectangular integrators)
    theta^[n+1] = theta^[n] + v[n]                        (NCO gain K0 = 1, one-sample delay)

so the open loop is ``g F(z) z^-1 / (1 - z^-1)`` with ``g = Kp K0 = M`` and
``F(z) = K1 + K2/(1 - z^-1) + K3/(1 - z^-1)^2``.

Design equations
    order 1: exact discrete result ``g K1 = 4 B_L T / (1 + 2 B_L T)``;
    order 2: bilinear pole placement (Rice 2009, App. C): ``theta_n = B_L T/(zeta + 1/(4 zeta))``,
             ``D = 1 + 2 zeta theta_n + theta_n^2``, ``g K1 = 4 zeta theta_n / D``, ``g K2 = 4 theta_n^2 / D``;
    order 3: ``F(s) = b3 w0 + a3 w0^2/s + w0^3/s^2`` with rectangular integrators
             (``g K1 = b3 w0T, g K2 = a3 (w0T)^2, g K3 = (w0T)^3``); the damping factor places the
             complex pole pair: ``a3 = b3 = 1 + 2 zeta`` (closed-loop poles at ``-w0`` and
             ``w0(-zeta +- j sqrt(1 - zeta^2))``).
    The three mappings are one table (:data:`LOOP_FORMULAS`). The loop analysis (closed loop,
    bandwidth, responses, steady errors) works from a design's gain vector ``g_gains =
    (gK1, ..., gK_d)``, its length the loop order d; only the acquisition and slip predictions,
    whose published formulas differ by order, still look at the order.

These textbook mappings make the discrete loop's *actual* noise bandwidth
``0.5 sum h[n]^2 / T`` drift above the request as B_L T grows (about +0.9 % at
B_L T = 0.01 and +9 % at 0.1 for order 2). With ``exact=True`` (what the blocks
use) the design bandwidth is refined numerically so that the actual noise
bandwidth of the discrete loop equals the requested one to 1e-9.

Predictions and their sources ("from memory" where the text was not at hand):

* Jitter. The loops normalise the detector by the M-th power line L itself, so
  ``e = Im(y^M e^{-jM pa}) / L`` has slope M per rad for any signal, and the linear loop gives
  ``var(phi) = 2 (B_L T) S_e(0) / M^2`` with S_e(0) the detector noise's low-frequency density
  (the loop as a linear filter of detector noise: Gardner, Phaselock Techniques, from memory).
  One sample per symbol in white noise: ``S_e(0) = V_M / 2`` and ``var = B_L T V_M / M^2``, the
  squaring-loss result (Lindsey & Simon, Telecommunication Systems Engineering 1973, from memory;
  general sum derived, REFERENCES 4). RRC-shaped M-PSK at N samples per symbol, before or after a
  matched filter: S_e(0) by exact expectation over symbol patterns and circular Gaussian noise
  (:func:`detector_noise`; derived here, checked against enumeration and simulation in the
  tests), which includes the pulse's self-noise or pattern jitter (the context: Moeneclaey &
  de Jonghe, IEEE Trans. Commun. 1994, NDA synchronisation of rotationally symmetric
  constellations, from memory). Residual carrier (M = 1, bi-phase data at index beta):
  ``var = N0 B_L / (P cos^2 beta)`` (Gardner, from memory; REFERENCES 11.1).
* Nonlinear jitter: Tikhonov density of the first-order loop (Viterbi 1963/1966, from memory).
* Cycle slips: Viterbi's first-order mean time at the psi-domain loop SNR ``1/(2 B_L T S_e(0))``
  (REFERENCES 5), lowered by 1 dB for orders 2 and 3 (empirical).
* Acquisition: with the blocks' spectral aid (:func:`spectral_acquisition`) a few FFT blocks,
  the number from the detection probability of the z^M line in one block's periodogram
  (noncentral chi-square, Kay vol. 2, from memory); without it Gardner's pull-in time
  ``(M dw)^2 / (2 zeta wn^3)`` with Rice's ``4 (M df)^2 / B_L^3`` beside it (REFERENCES 2.2);
  frequency steps while locked: Gardner's pull-out limit ``1.8 wn (zeta + 1) / M``.
* Ramp and jerk errors: exact final values of the discrete loop (REFERENCES 2.1).
"""

from ..arguments import (
    MAX_BT, MAX_DAMPING, MAX_POWER, LOOP_ORDERS, validate_spec, PLACEMENT_CHANNEL, PLACEMENT_MATCHED,
    PLACEMENTS,
    MAX_SAMPLES_PER_SYMBOL, MAX_MODULATION_INDEX, validate_signal)
from ._gains import (
    KAPLAN_A2, KAPLAN_A3, KAPLAN_B3, noise_bw_per_wn, natural_frequency, third_order_bw_per_w0,
    third_order_coefficients, bilinear_second_order, first_order_gain, rectangular_third_order,
    textbook_gains, KERNEL_SLOTS, LoopFormulas, LOOP_FORMULAS, loop_formulas, loop_gains, gain_vector,
    padded_gains)
from ._bandwidth import (
    closed_loop, closed_loop_poles, loop_state_matrices, noise_bandwidth_bt, impulse_response,
    solve_small, steady_phase_error, steady_rate_limit)
from ._loop import (
    LoopDesign, design_loop, update_block, MAX_UPDATE_BLOCK, BLOCK_BT)
from ._detector import (
    mth_power_noise, RRC_SPAN_SYMBOLS, EXP_SERIES_MAX_POWER, rrc_taps, noise_variance_per_sample,
    DetectorNoise, detector_noise, detector_noise_density, _shaped_statistics, _shaped_terms)
from ._noise import (
    squaring_loss, phase_error_variance, db_to_linear, effective_squaring_loss)
from ._tracking import (
    continuous_ramp_phase_error, max_trackable_ramp_hz_per_s, jerk_phase_error,
    total_phase_error_variance, suggest_noise_bw)
from ._acquisition import (
    RICE_PHASE_SETTLING, ACQ_WITHIN_LOCK_IN, ACQ_PULLS_IN, ACQ_TOO_SLOW, ACQ_BEYOND_HOLD,
    ACQ_BEYOND_RANGE, unambiguous_range_hz, lock_in_range_rad_s, pull_out_rad_s,
    pull_in_time_gardner_s, pull_in_time_rice_s, phase_settling_time_rice_s, acquisition_wn,
    lock_in_range_hz, pull_out_hz, pull_in_time_s, Acquisition, assess_acquisition,
    LOCK_WINDOWS_PER_BLOCK, SpectralAcquisition, line_detect_probability, spectral_acquisition,
    FrequencyStep, frequency_step)
from ._slips import (
    SECOND_ORDER_SLIP_SHIFT_DB, loop_snr, slip_time_bt_first_order, mean_time_between_slips_s,
    tikhonov_phase_variance, nonlinear_phase_error_variance)
from ._responses import (
    SETTLING_BAND, RESPONSE_TIME_CONSTANTS, RESPONSE_POINTS, FAST_WINDOW_BT, response_length,
    StepMetrics, step_metrics, StepResponses, step_responses, closed_loop_magnitude_db,
    closed_loop_peaking_db, closed_loop_3db_hz)

#: Every name imported above except the private ones.
__all__ = sorted(name for name in dict(globals()) if not name.startswith("_"))
