# SPDX-License-Identifier: GPL-3.0-or-later
"""Transient and frequency responses of the linearised discrete loop: phase and frequency
step responses (s, rad per Hz of step) and the closed-loop gain (dB) against frequency (Hz)."""

from dataclasses import dataclass
from math import pi

import numpy as np
from scipy import optimize

from ._bandwidth import closed_loop_poles, loop_state_matrices
from ._gains import gain_vector


# --- transient responses of the discrete loop ---------------------------------------------------

#: Settling band of the step responses, fraction of the final value (common practice: 2 %).
SETTLING_BAND = 0.02
#: Simulated length of the step responses, in time constants of the slowest closed-loop pole.
RESPONSE_TIME_CONSTANTS = 20.0
#: Most time points returned for a step response (the grid is strided for long windows).
RESPONSE_POINTS = 4096


def response_length(design):
    """Samples needed to watch the step responses settle (see :data:`RESPONSE_TIME_CONSTANTS`)."""
    r = float(np.max(np.abs(closed_loop_poles(design.g_gains))))
    tau = -1.0 / np.log(max(r, 1e-300))
    return int(max(np.ceil(RESPONSE_TIME_CONSTANTS * tau), 256))


@dataclass(frozen=True)
class StepMetrics:
    """Step-response figures, seconds and percent; ``nan`` when not reached within the simulated window."""
    rise_time_s: float       #: 10 % -> 90 % of the final value
    overshoot_pct: float     #: largest excursion beyond the final value, % of the final value
    settling_time_s: float   #: from then on within SETTLING_BAND of the final value


def _first_crossing(t, y, level):
    """Time where ``y`` first reaches ``level`` (linear interpolation between samples), or nan."""
    above = np.nonzero(y >= level)[0]
    if above.size == 0:
        return np.nan
    i = int(above[0])
    if i == 0:
        return float(t[0])
    return float(t[i - 1] + (t[i] - t[i - 1]) * (level - y[i - 1]) / (y[i] - y[i - 1]))


def _settling_time(t, y, final, band):
    """First time from which ``|y - final| <= band`` holds to the end of ``t``, or nan."""
    outside = np.nonzero(np.abs(y - final) > band)[0]
    if outside.size == 0:
        return float(t[0])
    if outside[-1] == len(y) - 1:
        return np.nan
    return float(t[outside[-1] + 1])


def step_metrics(t, y, final):
    """Rise time, overshoot and settling time of a step response ``y(t)`` that tends to ``final``."""
    rise = _first_crossing(t, y, 0.9 * final) - _first_crossing(t, y, 0.1 * final)
    overshoot = max(0.0, 100.0 * (float(np.max(y)) - final) / final)
    return StepMetrics(rise, overshoot, _settling_time(t, y, final, SETTLING_BAND * abs(final)))


@dataclass(frozen=True, eq=False)
class StepResponses:
    """Phase-step and frequency-step responses of the linearised discrete loop.

    Arrays share ``time_s``; the loop is linear, so a step of any size scales them.
    """
    time_s: np.ndarray
    phase_step: np.ndarray          #: theta^ per unit phase step
    freq_step_nco: np.ndarray       #: NCO frequency per unit frequency step
    freq_step_error: np.ndarray     #: phase error phi (rad) per Hz of frequency step
    phase_metrics: StepMetrics      #: of ``phase_step``
    freq_metrics: StepMetrics       #: of ``freq_step_nco``
    peak_error_rad_per_hz: float    #: largest |phi| after a 1 Hz frequency step
    peak_error_time_s: float
    error_final_rad_per_hz: float   #: steady phase error per Hz of step (0 unless order 1)
    error_settling_time_s: float    #: |phi - final| within SETTLING_BAND of the peak from then on


def _error_state_matrix(g_gains):
    """``D`` with ``z[n+1] = (I + D) z[n] + [f, 0, ..., 0]`` for the linearised loop in the kernel's
    order, ``z = [phi, acc1, ..., acc_(d-1)]``, ``f`` the input phase increment per sample: the
    delta-form matrix of :func:`loop_state_matrices` with the phase state's sign flipped
    (``phi = theta - theta^``)."""
    d, _, _ = loop_state_matrices(g_gains)
    d[0, 1:] = -d[0, 1:]
    d[1:, 0] = -d[1:, 0]
    return d


def _delta_power(d, n):
    """``E`` with ``I + E = (I + D)^n``, by repeated squaring without forming ``I + D`` (keeps
    full precision when the eigenvalues of ``I + D`` crowd around 1)."""
    result = np.zeros_like(d)
    base = d.copy()
    while n:
        if n & 1:
            result = result + base + result @ base
        base = 2.0 * base + base @ base
        n >>= 1
    return result


def _free_response(d_step, w0, points):
    """``w[m] = (I + D_s)^m w0`` for m = 0..points-1, as rows."""
    out = np.empty((points, len(w0)))
    w = np.array(w0, dtype=float)
    for m in range(points):
        out[m] = w
        w = w + d_step @ w
    return out


#: The first segment of the response grid spans this many 1/(B_L T) samples at full resolution
#: (a second, coarser segment covers the rest of a slow loop's window).
FAST_WINDOW_BT = 40.0


def _response_grid(n, bt, max_points):
    """(stride, points) of the grid segments covering ``n`` samples."""
    n_fast = min(n, int(np.ceil(FAST_WINDOW_BT / bt)))
    segments = []
    for length in ((n_fast, n) if n_fast < n else (n,)):
        stride = max(1, -(-length // max_points))
        segments.append((stride, -(-length // stride)))
    return segments


def step_responses(design, n_samples=None, max_points=RESPONSE_POINTS):
    """Phase-step and 1 Hz frequency-step responses of the linearised discrete loop with the
    design's ``g_gains``, over ``n_samples`` samples (default :func:`response_length`).

    Exact at the returned samples: every ``stride``-th sample, at most ``max_points`` over the
    first ``FAST_WINDOW_BT / (B_L T)`` samples and as many again over the whole window. The loop
    is advanced by ``(I + D)^stride`` in delta form, so very narrow loops cost no more than wide
    ones and keep full precision (the polynomial form of :func:`closed_loop` stops resolving
    ``g K3`` below B_L T ~ 1e-4). Agrees with ``scipy.signal.lfilter`` on :func:`closed_loop`
    where that is well conditioned.

    These are the responses of the loop updated every sample with these gains. A design with
    an update block (``design.block`` > 1) runs the same filter once per block; its responses
    are these seen every block, shifted by the half-block delay, a difference of the order of
    B_L L T (at most BLOCK_BT = 1/32). Its noise bandwidth and steady errors are exact.
    """
    n = response_length(design) if n_samples is None else int(n_samples)
    fs = design.sample_rate
    d = _error_state_matrix(design.g_gains)
    order = d.shape[0]
    f = 2.0 * pi / fs                          # 1 Hz frequency step, rad/sample
    phase_start = np.zeros(order)              # phase step: z0 = [1, 0, 0] decays to 0
    phase_start[0] = 1.0
    final_error = design.frequency_step_error(1.0)
    fixed = np.zeros(order)                    # frequency step from z = 0 to the fixed point: the
    fixed[0] = final_error                     # first integrator holds f (phi = 0); without one
    fixed[1:2] = f                             # (order 1) the phase error does, phi = f / gK1
    index, phase_rows, freq_rows = [], [], []
    for stride, points in _response_grid(n, design.actual_bt, max_points):
        d_step = _delta_power(d, stride)
        index.append(stride * np.arange(points))
        phase_rows.append(_free_response(d_step, phase_start, points))
        freq_rows.append(fixed + _free_response(d_step, -fixed, points))
    index, first = np.unique(np.concatenate(index), return_index=True)
    phase_state = np.concatenate(phase_rows)[first]
    freq_state = np.concatenate(freq_rows)[first]
    t = index / fs
    phase = 1.0 - phase_state[:, 0]                                  # theta^ per unit phase step
    error = freq_state[:, 0]                                         # phi, rad per Hz of step
    nco = (sum(design.g_gains) * error + freq_state[:, 1:].sum(axis=1)) / f   # NCO step v[n] per unit step
    i_peak = int(np.argmax(np.abs(error)))
    peak = float(abs(error[i_peak]))
    return StepResponses(
        time_s=t, phase_step=phase, freq_step_nco=nco, freq_step_error=error,
        phase_metrics=step_metrics(t, phase, 1.0), freq_metrics=step_metrics(t, nco, 1.0),
        peak_error_rad_per_hz=peak, peak_error_time_s=float(t[i_peak]), error_final_rad_per_hz=final_error,
        error_settling_time_s=_settling_time(t, error, final_error, SETTLING_BAND * peak))


def closed_loop_magnitude_db(design, freqs_hz):
    """Closed-loop gain ``20 log10 |H(e^{j 2 pi f / fs})|`` (dB) at the frequencies ``freqs_hz`` (Hz).

    Evaluated as ``z^-1 N(u) / (u^d + z^-1 N(u))`` with ``u = 1 - z^-1 = 2j sin(w/2) e^{-jw/2}``
    (see :func:`closed_loop`), which keeps full precision for very narrow loops. Like
    :func:`step_responses`, this is the loop updated every sample.
    """
    w = 2.0 * pi * np.asarray(freqs_hz, dtype=float) / design.sample_rate
    z_inv = np.exp(-1j * w)
    u = 2j * np.sin(w / 2.0) * np.exp(-0.5j * w)
    g = gain_vector(design.g_gains)
    order = len(g)
    n_u = sum(g[i] * u ** (order - 1 - i) for i in range(order))
    h = z_inv * n_u / (u ** order + z_inv * n_u)
    return 20.0 * np.log10(np.maximum(np.abs(h), 1e-300))


def closed_loop_peaking_db(design):
    """Largest closed-loop gain (dB) over 0..fs/2 (jitter peaking; 0 dB for a first-order loop)."""
    freqs = np.linspace(0.0, design.sample_rate / 2.0, 1 << 16)
    freqs = np.union1d(freqs, np.geomspace(design.bt * design.sample_rate * 1e-3, design.sample_rate / 2, 4096))
    return max(0.0, float(np.max(closed_loop_magnitude_db(design, freqs))))


def closed_loop_3db_hz(design):
    """Frequency (Hz) where the closed-loop gain falls through -3 dB, or nan if it stays above up to fs/2."""
    freqs = np.geomspace(design.bt * design.sample_rate * 1e-3, design.sample_rate / 2.0, 8192)
    mag = closed_loop_magnitude_db(design, freqs) + 10.0 * np.log10(2.0)
    below = np.nonzero(mag < 0.0)[0]
    if below.size == 0 or below[0] == 0:
        return np.nan
    i = int(below[0])
    return optimize.brentq(lambda f: closed_loop_magnitude_db(design, [f])[0] + 10.0 * np.log10(2.0),
                           freqs[i - 1], freqs[i], xtol=1e-12 * freqs[i])
