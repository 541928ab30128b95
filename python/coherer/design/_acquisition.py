# SPDX-License-Identifier: GPL-3.0-or-later
"""Acquisition: lock-in, pull-out and pull-in (Hz, s), the verdict for a carrier offset,
the blocks' spectral aid, and frequency steps while locked."""

from dataclasses import dataclass
from math import inf, pi

import numpy as np

from ._detector import detector_noise
from ._gains import natural_frequency
from ._responses import step_responses


# --- acquisition (REFERENCES 2.2) -----------------------------------------------------------
#
# An M-th power loop tracks psi = M phi with a unit-amplitude sine detector and the same
# loop-gain products g K_i as its linear model, so the classical results for a sine-detector
# PLL hold in the psi domain. A carrier offset df (Hz) appears there as M df: every frequency
# limit below is the psi-domain one divided by M, and pull-in times use M df.

#: Rice's phase-settling rule ``T_PL ~ 1.3 / B_L`` (REFERENCES 2.2), seconds times Hz.
RICE_PHASE_SETTLING = 1.3

#: Acquisition verdicts (:attr:`Acquisition.reason`).
ACQ_WITHIN_LOCK_IN = "within the lock-in range: locks without slipping a cycle"
ACQ_PULLS_IN = "beyond the lock-in range: the loop pulls in by itself, slipping cycles meanwhile"
ACQ_TOO_SLOW = "beyond the lock-in range and the pull-in time exceeds the budget"
ACQ_BEYOND_HOLD = "beyond the first-order loop's hold range: it never locks"
ACQ_BEYOND_RANGE = "beyond the unambiguous range fs/(2M): the loop would lock to an alias"


def unambiguous_range_hz(sample_rate, power):
    """Largest carrier offset (Hz) an M-th power loop can tell from its aliases: ``fs / (2 M)``."""
    return sample_rate / (2.0 * power)


def lock_in_range_rad_s(wn, damping):
    """Gardner's lock-in estimate ``2 zeta wn`` (rad/s) of a 2nd-order type-2 loop.

    An engineering estimate; it can be optimistic (Kuznetsov et al. 2023, REFERENCES 2.2).
    """
    return 2.0 * damping * wn


def pull_out_rad_s(wn, damping):
    """Gardner's pull-out limit ``1.8 wn (zeta + 1)`` (rad/s): largest frequency step survived without a slip."""
    return 1.8 * wn * (damping + 1.0)


def pull_in_time_gardner_s(offset_hz, wn, damping):
    """Gardner's pull-in time ``dw^2 / (2 zeta wn^3)`` (s) of a type-2 loop, ``dw = 2 pi offset_hz``."""
    dw = 2.0 * pi * offset_hz
    return dw * dw / (2.0 * damping * wn ** 3)


def pull_in_time_rice_s(offset_hz, noise_bw_hz):
    """Rice's frequency pull-in rule ``4 df^2 / B_L^3`` (s), offset and B_L in Hz."""
    return 4.0 * offset_hz * offset_hz / noise_bw_hz ** 3


def phase_settling_time_rice_s(noise_bw_hz):
    """Rice's phase-settling rule ``1.3 / B_L`` (s)."""
    return RICE_PHASE_SETTLING / noise_bw_hz


def acquisition_wn(design):
    """Angular frequency (rad/s) the acquisition formulas use for ``design``.

    Order 1: the loop gain ``g K1 fs``. Order 2: the natural frequency wn. Order 3: no
    published formula; the 2nd-order loop with the same actual noise bandwidth and damping
    stands in for it (an estimate).
    """
    if design.loop_order == 1:
        return design.g_gains[0] * design.sample_rate
    if design.loop_order == 2:
        return design.natural_frequency
    return natural_frequency(design.actual_bt * design.sample_rate, design.damping)


def lock_in_range_hz(design):
    """Carrier offset (Hz) within which the loop locks without slipping a cycle.

    Order 1: the exact hold range ``g K1 fs / (2 pi M)`` (the sine detector saturates beyond it).
    Orders 2 and 3: ``2 zeta wn / (2 pi M)``, an engineering estimate (REFERENCES 2.2).
    """
    wn = acquisition_wn(design)
    if design.loop_order == 1:
        return wn / (2.0 * pi * design.power)
    return lock_in_range_rad_s(wn, design.damping) / (2.0 * pi * design.power)


def pull_out_hz(design):
    """Largest carrier frequency step (Hz) the locked loop survives without a slip.

    Order 1: the hold range. Orders 2 and 3: ``1.8 wn (zeta + 1) / (2 pi M)`` (Gardner).
    """
    if design.loop_order == 1:
        return lock_in_range_hz(design)
    return pull_out_rad_s(acquisition_wn(design), design.damping) / (2.0 * pi * design.power)


def pull_in_time_s(design, offset_hz):
    """Frequency pull-in time (s) for a carrier offset (Hz): Gardner's ``dw^2 / (2 zeta wn^3)``
    with ``dw = 2 pi M offset`` (the offset the psi-domain loop sees).

    ``inf`` beyond the unambiguous range and, for a first-order loop, beyond its hold range
    (0 within it: a first-order loop has no frequency pull-in).
    """
    offset = abs(offset_hz)
    if offset > unambiguous_range_hz(design.sample_rate, design.power):
        return inf
    if design.loop_order == 1:
        return 0.0 if offset <= lock_in_range_hz(design) else inf
    return pull_in_time_gardner_s(design.power * offset, acquisition_wn(design), design.damping)


@dataclass(frozen=True)
class Acquisition:
    """What it takes to acquire a carrier offset; frequencies in Hz, times in s."""
    offset_hz: float
    lock_in_hz: float       #: lock-in range (engineering estimate for orders 2 and 3)
    pull_out_hz: float      #: largest frequency step survived while locked
    unambiguous_hz: float   #: fs / (2 M)
    pull_in_s: float        #: Gardner's pull-in time (the one reported)
    pull_in_rice_s: float   #: Rice's 4 (M df)^2 / B_L^3, for comparison
    lock_time_s: float      #: pull_in_s + Rice's phase settling 1.3 / B_L
    budget_s: float         #: pull-in time budget (inf: none stated)
    needed: bool            #: an acquisition aid is needed (the loop alone cannot acquire in budget)
    reason: str             #: one of the ACQ_* verdicts


def assess_acquisition(design, offset_hz, budget_s=None):
    """Whether the loop acquires a carrier offset (Hz) by itself within ``budget_s`` seconds.

    ``needed`` is true when the offset is beyond the unambiguous range fs/(2M), beyond a
    first-order loop's hold range, or when the pull-in time exceeds the budget.
    """
    budget = inf if budget_s is None else float(budget_s)
    if not budget > 0.0:
        raise ValueError(f"budget_s must be > 0 s, got {budget_s!r}")
    offset = abs(float(offset_hz))
    noise_bw = design.actual_bt * design.sample_rate
    unambiguous = unambiguous_range_hz(design.sample_rate, design.power)
    lock_in = lock_in_range_hz(design)
    pull_in = pull_in_time_s(design, offset)
    if offset > unambiguous:
        needed, reason = True, ACQ_BEYOND_RANGE
    elif offset <= lock_in:
        needed, reason = False, ACQ_WITHIN_LOCK_IN
    elif design.loop_order == 1:
        needed, reason = True, ACQ_BEYOND_HOLD
    elif pull_in > budget:
        needed, reason = True, ACQ_TOO_SLOW
    else:
        needed, reason = False, ACQ_PULLS_IN
    return Acquisition(
        offset_hz=offset, lock_in_hz=lock_in, pull_out_hz=pull_out_hz(design), unambiguous_hz=unambiguous,
        pull_in_s=pull_in, pull_in_rice_s=pull_in_time_rice_s(design.power * offset, noise_bw),
        lock_time_s=pull_in + phase_settling_time_rice_s(noise_bw), budget_s=budget,
        needed=needed, reason=reason)


# --- acquisition with the blocks' spectral aid (acquire=True) ---------------------------------------
#
# While the loop's own lock indicator says unlocked, the block estimates the offset from a zero-padded
# periodogram of z^M at the end of every acquisition block (acquisition.fft_length samples) and steers
# the NCO there; the estimate error is well inside the lock-in range, so the loop then only settles in
# phase and the indicator declares lock. The time to lock is therefore a few blocks, not the natural
# pull-in time, as long as the z^M line stands out of the periodogram's noise.

#: The loops' lock indicator decides over windows of 1/LOCK_WINDOWS_PER_BLOCK of an acquisition block.
LOCK_WINDOWS_PER_BLOCK = 4


@dataclass(frozen=True)
class SpectralAcquisition:
    """Predicted acquisition with the blocks' spectral aid; times in s."""
    fft_length: int             #: samples per acquisition block
    block_s: float              #: duration of one block
    detect_probability: float   #: probability that one block's periodogram reports the z^M line
    expected_blocks: float      #: mean number of blocks until the first report, 1 / detect_probability
    settle_s: float             #: Rice's phase settling 1.3 / B_L after the NCO is steered
    decide_s: float             #: two lock-indicator windows: one partly spent settling, one to decide
    time_to_lock_s: float       #: expected_blocks * block_s + settle_s + decide_s (inf: never)
    reachable: bool             #: the offset is within the unambiguous range fs/(2M)


def line_detect_probability(fft_length, line_snr, line_to_power, p_false=None):
    """Probability that one block of ``fft_length`` samples reports the z^M line.

    The estimator (:func:`coherer.acquisition.estimate_offset`) accepts its periodogram peak when it
    exceeds ``ln(n / p_false)`` times the mean bin power, which by Parseval is ``n E|z^M|^2``. The
    peak bin is ``|n L + nu|^2`` with ``nu`` complex Gaussian of variance ``n S_c`` (S_c the
    low-frequency density of the complex fluctuation of z^M), so ``2 |.|^2 / (n S_c)`` is
    noncentral chi-square with 2 degrees of freedom and noncentrality ``2 n L^2 / S_c``
    (the Marcum-Q detection probability of a tone, e.g. Kay, Fundamentals of Statistical Signal
    Processing vol. 2, from memory). ``line_snr`` = L^2 / S_c, ``line_to_power`` = L^2 / E|z^M|^2
    (:class:`DetectorNoise`). Scalloping between the 4x zero-padded bins (at most 0.2 dB) is ignored.
    """
    from scipy import stats
    from .. import acquisition
    p_false = acquisition.P_FALSE_TONE if p_false is None else p_false
    n = float(fft_length)
    threshold = np.log(n / p_false)
    return float(stats.ncx2.sf(2.0 * threshold * line_snr / line_to_power, 2, 2.0 * n * line_snr))


def spectral_acquisition(design, offset_hz=0.0, esn0=None, **signal_model):
    """Acquisition with the blocks' spectral aid (``acquire=True``, the default) for a carrier
    offset in Hz, at linear Es/N0 ``esn0`` per symbol (``None``: a strong signal, every block
    reports the line). ``signal_model``: the keyword arguments of :func:`detector_noise`.

    Time to lock = (expected blocks until the line is reported) x block + Rice's 1.3 / B_L phase
    settling (REFERENCES 2.2) + two lock-indicator windows. The offset itself does not enter, as
    long as it is within fs/(2M) (otherwise ``inf``: the estimate would be an alias).
    """
    from .. import acquisition
    nfft = acquisition.fft_length(design.noise_bw_hz, design.sample_rate)
    fs = design.sample_rate
    if esn0 is None:
        p_detect = 1.0
    else:
        noise = detector_noise(design.power, esn0, **signal_model)
        p_detect = line_detect_probability(nfft, noise.line_snr, noise.line_to_power)
    reachable = abs(float(offset_hz)) <= unambiguous_range_hz(fs, design.power)
    blocks = 1.0 / p_detect if p_detect > 0.0 else inf
    settle = phase_settling_time_rice_s(design.noise_bw_hz)
    decide = 2.0 * (nfft // LOCK_WINDOWS_PER_BLOCK) / fs
    total = blocks * nfft / fs + settle + decide if reachable else inf
    return SpectralAcquisition(nfft, nfft / fs, p_detect, blocks, settle, decide, total, reachable)


@dataclass(frozen=True)
class FrequencyStep:
    """A sudden carrier frequency step while locked, followed by the loop alone (the spectral
    aid only works while unlocked); Hz, rad and s."""
    step_hz: float
    pull_out_hz: float          #: largest step survived without a cycle slip
    followed: bool              #: within the pull-out limit: followed without slipping
    peak_error_rad: float       #: peak phase error of the linearised loop (beyond pi/(2M): slips)
    settling_s: float           #: phase error back within 2 % of its peak (linear loop)
    pull_in_s: float            #: beyond pull-out: natural pull-in time for the step; 0 if followed
    lock_time_s: float          #: pull_in_s + 1.3/B_L beyond pull-out, else settling_s


def frequency_step(design, step_hz, responses=None):
    """How the loop follows a carrier frequency step of ``step_hz`` Hz (see :class:`FrequencyStep`).

    Pull-out limit: Gardner's 1.8 wn (zeta + 1) / M (:func:`pull_out_hz`). Peak error and settling
    from the linearised discrete loop (:func:`step_responses`; pass ``responses`` to reuse them).
    Beyond the pull-out limit the loop slips cycles and pulls in naturally: Gardner's pull-in time
    (:func:`pull_in_time_s`) plus Rice's phase settling; ``inf`` for a first-order loop beyond its
    hold range.
    """
    step = abs(float(step_hz))
    responses = step_responses(design) if responses is None else responses
    limit = pull_out_hz(design)
    followed = step <= limit
    peak = responses.peak_error_rad_per_hz * step
    if followed:
        pull_in, lock_time = 0.0, responses.error_settling_time_s if step > 0.0 else 0.0
    else:
        pull_in = pull_in_time_s(design, step)
        lock_time = pull_in + phase_settling_time_rice_s(design.actual_bt * design.sample_rate)
    return FrequencyStep(step, limit, followed, peak, responses.error_settling_time_s, pull_in, lock_time)
