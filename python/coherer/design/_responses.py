# SPDX-License-Identifier: GPL-3.0-or-later
"""Transient and frequency responses of the linearised discrete loop: phase and frequency
step responses (s, rad per Hz of step) and the closed-loop gain (dB) against frequency (Hz)."""

from dataclasses import dataclass
from math import pi

import numpy as np
from scipy import optimize

from ._bandwidth import closed_loop_poles, loop_state_matrices


# --- transient responses of the discrete loop ---------------------------------------------------

#: Settling band of the step responses, fraction of the final value (common practice: 2 %).
SETTLING_BAND = 0.02
#: Simulated length of the step responses, in time constants of the slowest closed-loop pole.
RESPONSE_TIME_CONSTANTS = 20.0
#: Most time points returned for a step response (the grid is strided for long windows).
RESPONSE_POINTS = 4096


def response_length(design):
    """Samples needed to watch the step responses settle (see :data:`RESPONSE_TIME_CONSTANTS`)."""
    block = design.block
    r = float(np.max(np.abs(closed_loop_poles(design.g_gains, block))))
    tau = -block / np.log(max(r, 1e-300))          # samples
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


def _error_state_matrix(g_gains, block=1):
    """``D`` with ``z[k+1] - z* = (I + D) (z[k] - z*)`` for the linearised loop updated once
    per ``block`` samples, ``z = [phi, acc1, ..., acc_(d-1)]`` at a block start (``phi = theta
    - theta^``) and ``z*`` its fixed point under the input: the delta-form matrix of
    :func:`loop_state_matrices` with the phase state's sign flipped."""
    d, _, _ = loop_state_matrices(g_gains, block)
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

    Exact at the returned samples: every ``stride``-th update (every ``stride``-th sample for a
    loop updated every sample), at most ``max_points`` over the first ``FAST_WINDOW_BT / (B_L
    T)`` samples and as many again over the whole window. The loop is advanced by
    ``(I + D)^stride`` in delta form, so very narrow loops cost no more than wide
    ones and keep full precision (the polynomial form of :func:`closed_loop` stops resolving
    ``g K3`` below B_L T ~ 1e-4). Agrees with ``scipy.signal.lfilter`` on :func:`closed_loop`
    where that is well conditioned.

    A design with an update block (``design.block`` = L > 1) is the loop it describes, updated
    once per block (the model of :func:`loop_state_matrices`), seen at block starts: the phase
    response is the NCO phase averaged over the block, the error the block's mean phase error
    (what the loop filter sees), the NCO frequency its mean step over the block; the grid
    strides in whole blocks. For L = 1 these are the per-sample values.
    """
    n = response_length(design) if n_samples is None else int(n_samples)
    fs = design.sample_rate
    block = design.block
    d = _error_state_matrix(design.g_gains, block)
    order = d.shape[0]
    half = 0.5 * (block - 1)                   # the block mean sits half a block after its start
    f = 2.0 * pi / fs                          # 1 Hz frequency step, rad/sample
    phase_start = np.zeros(order)              # phase step: z0 = [1, 0, 0] decays to 0
    phase_start[0] = 1.0
    final_error = design.frequency_step_error(1.0)
    fixed = np.zeros(order)                    # frequency step from z = 0 to the fixed point: the
    fixed[1:2] = f                             # first integrator holds f (mean error 0); without
    if order == 1:                             # one (order 1) the mean error holds f / gK1
        fixed[0] = final_error - half * f
    index, phase_rows, freq_rows = [], [], []
    for stride, points in _response_grid(-(-n // block), design.actual_bt * block, max_points):
        d_step = _delta_power(d, stride)
        index.append(stride * np.arange(points))
        phase_rows.append(_free_response(d_step, phase_start, points))
        freq_rows.append(_free_response(d_step, -fixed, points))
    index, first = np.unique(np.concatenate(index), return_index=True)
    phase_state = np.concatenate(phase_rows)[first]
    freq_offset = np.concatenate(freq_rows)[first]          # z - z* of the frequency step
    freq_state = fixed + freq_offset
    t = index * block / fs

    def mean_error(z, carrier_step):
        """Block-mean phase error: phi at the block start plus half a block of the carrier's
        step against the NCO's (which, without a frequency register, does not move)."""
        nco_step = z[:, 1] if order > 1 else 0.0
        return z[:, 0] + half * (carrier_step - nco_step)

    phase = 1.0 - mean_error(phase_state, 0.0)                      # theta^ per unit phase step
    error = mean_error(freq_state, f)                                # phi, rad per Hz of step
    # the NCO's mean step over the block: the carrier's, less the growth of phi over the block
    nco = 1.0 - (freq_offset @ d[0]) / (f * block)
    i_peak = int(np.argmax(np.abs(error)))
    peak = float(abs(error[i_peak]))
    return StepResponses(
        time_s=t, phase_step=phase, freq_step_nco=nco, freq_step_error=error,
        phase_metrics=step_metrics(t, phase, 1.0), freq_metrics=step_metrics(t, nco, 1.0),
        peak_error_rad_per_hz=peak, peak_error_time_s=float(t[i_peak]), error_final_rad_per_hz=final_error,
        error_settling_time_s=_settling_time(t, error, final_error, SETTLING_BAND * peak))


def _det(m):
    """Determinants of a stack of small square matrices ``m[..., d, d]`` (Laplace expansion
    along the first row; d is at most the loop order, 3)."""
    d = m.shape[-1]
    if d == 1:
        return m[..., 0, 0]
    total = 0.0
    for j in range(d):
        minor = np.delete(np.delete(m, 0, axis=-2), j, axis=-1)
        total = total + (-1) ** j * m[..., 0, j] * _det(minor)
    return total


def closed_loop_magnitude_db(design, freqs_hz):
    """Closed-loop gain ``20 log10 |H(f)|`` (dB) from the carrier phase to the NCO phase, at
    the frequencies ``freqs_hz`` (Hz), for the loop updated once per ``design.block`` = L
    samples (L = 1: every sample).

    ``H = A_L(w) C ((e^{j w L} - 1) I - Delta)^-1 B`` with the block model of
    :func:`loop_state_matrices` and ``A_L(w) = sin(w L / 2) / (L sin(w / 2))``, the gain of the
    block mean, ``w = 2 pi f / fs``; solved by Cramer's rule with ``e^{j w L} - 1`` written as
    ``2j sin(w L / 2) e^{j w L / 2}``, so very narrow loops keep full precision. For L = 1 this
    is ``z^-1 N(u) / (u^d + z^-1 N(u))`` of :func:`closed_loop`.
    """
    block = design.block
    w = 2.0 * pi * np.asarray(freqs_hz, dtype=float) / design.sample_rate
    delta, b, c = loop_state_matrices(design.g_gains, block)
    order = len(b)
    u = 2j * np.sin(w * block / 2.0) * np.exp(0.5j * w * block)
    m = u[:, None, None] * np.eye(order) - delta
    det = _det(m)
    h = np.zeros(len(w), dtype=complex)
    for i in range(order):                      # Cramer's rule: column i replaced by B
        if c[i] != 0.0:
            mi = m.copy()
            mi[:, :, i] = b
            h = h + c[i] * _det(mi) / det
    mean_gain = np.sinc(w * block / (2.0 * pi)) / np.sinc(w / (2.0 * pi))
    return 20.0 * np.log10(np.maximum(np.abs(h * mean_gain), 1e-300))


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
