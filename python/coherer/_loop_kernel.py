# SPDX-License-Identifier: GPL-3.0-or-later
"""Kernel of the M-th power carrier loop (numba, releases the GIL): element-wise work per
sample, the loop updated once per block.

The kernel is a plain function of arrays: input samples, output arrays, a
float64 ``state`` array (everything the loop remembers between calls) and a
float64 ``params`` array (everything the block derives from its settings).
Calling it on one long array or on any split of it gives identical results.

The loop is updated once per update block of L samples (``params[P_BLOCK]``, a power of
two from 1 to MAX_BLOCK that the designer picks from B_L T and includes in the gains; blocks
are counted from the stream start). Within block k the NCO runs at one frequency: for the
block's samples t = 0..L-1 (x = input, theta^ = NCO phase, rad; acc1 = frequency register,
rad/sample)::

    theta^_t = theta^_k + t acc1                       NCO tables (block_tables)
    y_t      = x_t e^{-j theta^_t}                      corrected output (corrected)
    d_t      = (y_lim,t)^M e^{-j M point_angle}         M-th power detector (detector)
    e_t      = Im(d_t) / A_M                            normalised: mean sin(M phi)

and the sums over the block (block_sums) move, at its end, the loop filter and the NCO::

    e = mean of e_t ; acc2 += L K3 e ; acc1 += L K2 e + L acc2   (loop_filter)
    theta^_{k+1} = theta^_k + (L - 1) acc1_old + L K1 e + acc1    the block's last step

which for L = 1 is the per-sample loop. The mean over the block sees the NCO's phase half a
block late; the designer's state model includes that exactly (``coherer.design``,
REFERENCES 1.4), so the noise bandwidth is the requested one. The block's sums are taken
once it is whole, from its samples in order (a block cut by the end of a call is held in
the state until the next), so they do not depend on where calls end. The moments, the line,
the detector phasor's low-pass, both slip trackers and the lock windows are updated at block
ends from those sums; their per-sample averages become the same averages of block means.

``A_M`` is the M-th power line: the component of d that drives the loop.
While the loop's own lock indicator says locked, ``A_M = |<d>|``, the
bias-corrected exponential average of d itself (over about
``2 / LINE_ALPHA`` samples, restarted when lock is declared and at a level
step), used once it stands 8 standard errors out of its own noise. Circular
noise adds nothing to the mean of d. Measured against the NCO, the average is
shrunk by the loop's own jitter, by E[cos M phi] (0.8 at a loop SNR of 2.5,
which would make the loop gain that much high); so it is also measured against
the slip tracker's slow reference (below), which does not carry that jitter but
is shrunk while it still settles after lock. Neither exceeds the line but by
noise, and the larger of the two is used. This is the slope of the detector
whatever the signal's shape: a pulse-shaped
(oversampled, non-constant-envelope) PSK signal, or a residual carrier that
shares its power with data (line = cos(index) of the total). The loop's
actual noise bandwidth is then the designed one. While acquiring (no lock
yet), ``A_M = S^(M/2)`` with ``S`` the M2M4 estimate of the signal power
(``S = sqrt(2 M2^2 - M4)``, Pauluzzi & Beaulieu 2000) from exponentially
averaged moments of |x|^2 and |x|^4, floored so that the gain boost
``(M2/S)^(M/2)`` stays bounded; it is exact for a constant envelope and within
a few tens of per cent otherwise, which is all acquisition needs. The loop
stays open (the NCO coasts) for the first few hundred samples, until the
moments have settled. The detector output is clipped so that one sample never
moves the NCO phase by more than pi/M (half the M-domain ambiguity), and its block mean so
that one block's kick never does either. The per-sample clip
sits at about 1.7 sqrt(rho_psi / (B_L T)) standard deviations of the detector
noise (rho_psi the loop SNR of REFERENCES 5): more than 10 for rho_psi >= 2
and B_L T <= 0.05, so it only acts on start-up transients and outliers.

Robustness: a non-finite or exactly zero sample is a gap; it adds nothing to the block's
sums (a block of gaps only: the NCO coasts, theta^ += acc1), and its output is 0. A sample whose
power exceeds ``LIMIT * M2`` is limited to that power (phase kept) before it
reaches the moments and the detector, so one huge spike cannot upset the
loop gain; a lasting level step of 6 dB or more (seen by a fast average over
64 samples: a signal appearing out of noise or fading into it, a gain change)
restarts the moment estimate, so the detector gain is right again a few
hundred samples later instead of after the whole averaging length.

Lock indicator (internal, drives acquisition): the phase-only statistic
``mean cos(M arg y - M point_angle)`` over windows of ``lock_window`` samples
counted from the start of the stream, decided by the same rule as the lock
detector (``coherer.lockstat.update_lock``: a threshold referenced to the
null contrasts of the windows (quarter differences), so the false-lock
probability holds on band-limited noise too). A loop partly follows band-limited noise (it tracks
the slow part of the noise's M-th power phase), which biases the projection of
its own output toward lock even on noise alone, mostly through the
proportional path; so the statistic is taken against a reference phasor that
does not follow the window's own samples. At the end of each window its phase is
turned onto the NCO's mean M-th power phasor over that window (an average, so the
NCO's jitter at one instant does not move it) and its rate set for the next
window: at a strong signal the NCO's mean step over the last window and its change
(so a fast frequency ramp is followed), the step's disagreement with the
prediction taken modulo a whole M-domain turn per window while locked, so that a
cycle slip does not turn the reference; at a weak signal a smoothed level and trend
(Holt's linear method) corrected by how far the NCO's mean phasor turned against
the reference, which is blind to slips.

Cycle slips: a slip is a step of 2*pi/M in the NCO phase relative to the
carrier. Two trackers watch for it, and the loop SNR 1/(B_L T V_M) estimated from
the moments at the last lock-window end (kept while the moments restart after
a level step) chooses which one decides:

- weak signal (loop SNR < STRONG_LOOP_SNR): a slow third-order reference
  (noise bandwidth a fraction of B_L, no steady error to a frequency ramp)
  follows the unwrapped NCO phase; its residual carries the loop's jitter
  and, at a slip, a step of 2*pi/M. When the residual exceeds 3/4 of 2*pi/M
  a slip is declared and the reference jumps with it. The reference runs only
  while locked; it starts at zero residual on the NCO's mean frequency over the
  last lock window and its frequency rate (the loop's rate register in a
  3rd-order loop, else the change between the last two windows), and narrows
  in stages (REF_STAGE_END windows) so that it settles quickly;
- strong signal (slips from noise alone are then vanishingly rare, so the
  slips that matter come from dynamics): the unwrapped angle of the low-passed detector phasor
  d/|d| (which follows everything the loop follows) is compared with its
  stable point 2*pi*k; a departure beyond 3*pi/2 is a slip, provided the
  phasor still stands 4 noise standard deviations (sqrt(beta/4) each) out of
  the noise, so that a carrier that has just vanished does not count. The low-pass
  is fast (8 B_L T) so that its angle follows the turns of a loop that slips
  while it re-settles after a frequency jump, and the count goes on through an
  unlock for as long as the phasor stays coherent at every evaluation (the loop
  slipping but still holding the signal); once it is not, the count stops until
  the next lock. A residual
  excursion of the reference then only means the loop followed a frequency
  change: the reference is brought along without declaring anything.

Noise excursions that return before the thresholds are not counted. Sign:
+1 means the NCO phase advanced by 2*pi/M relative to the carrier (the output
constellation turned by -2*pi/M).

Arithmetic (no per-sample transcendental function or pow): the NCO keeps the phasors
``P = e^{j theta^}`` and ``P^M`` at the block start and turns them through the block by
complex multiplication with ``e^{j acc1}`` (``e^{j nco_ref}`` times a short series of the
small angle ``acc1 - nco_ref``, ``nco_ref`` the frequency register at the last resync;
libm beyond ``SMALL_ANGLE``); both are recomputed exactly from the float64 phase
accumulator every ``NCO_RESYNC`` samples of the stream, so neither phase nor magnitude can
drift (worst case between resyncs: about 1e-12). The detector is
``d = z conj(P^M)`` with ``z = (x_lim / sqrt(M2))^M e^{-j M point_angle}``, which
does not depend on the NCO. The normalisation (1/sqrt(M2), (S/M2)^(M/2), limiter
level) is recomputed from the moments every ``NORM_BLOCK`` samples once they have
settled (every update block before): the moments are exponential averages over
thousands of samples, so in between they move by about NORM_BLOCK / (averaging
length), 0.4 % for 16384. All of this is state, so results do not depend on how
the stream is chunked.
"""

import numpy as np
from numba import literally, njit

from ._numeric import SIMD_MATH, half_power, masked_sample, pair_power
from .design import MAX_UPDATE_BLOCK
from .lockstat import null_contrasts, quarter_start, update_lock

# state[] and params[] layouts ------------------------------------------------------
# Each layout is one list of (name, slots, meaning); the index of field ``name`` is the
# module constant ``S_NAME`` (state) or ``P_NAME`` (params), generated below, so the
# kernels see plain global ints and nothing is numbered by hand.
REF_STAGES = 3   # settling stages of the slip reference (REF_STAGE_END)
MAX_BLOCK = MAX_UPDATE_BLOCK   # longest update block, samples (a power of two dividing NCO_RESYNC)
TABLE_ROWS = 6                 # NCO tables of a block: P, P^M, the lock reference (re, im each)

STATE_FIELDS = (
    ("phase", 1, "theta^, rad, wrapped to [-pi, pi)"),
    ("freq", 1, "acc1: NCO frequency register, rad/sample"),
    ("acc2", 1, "acc2: frequency-rate register, rad/sample^2 (3rd order)"),
    ("m2", 1, "exponential average of |x|^2 (not bias-corrected)"),
    ("m4", 1, "exponential average of |x|^4"),
    ("mw", 1, "exponential average of 1 (bias correction of M2, M4)"),
    ("gaps", 1, "count of gap samples (non-finite or zero) seen"),
    ("last_step", 1, "proportional part K1 e of the last NCO step, rad/sample"),
    ("lock_n", 1, "valid samples in this lock window"),
    ("lock_pos", 1, "samples into this lock window"),
    ("locked", 1, "1.0 locked, 0.0 not"),
    ("metric", 1, "lock statistic of the last complete window"),
    ("ref_r", 1, "slip tracker residual: unwrapped NCO phase minus reference, rad"),
    ("ref_f", 1, "slip reference frequency, rad/sample"),
    ("ref_a", 1, "slip reference frequency rate, rad/sample^2"),
    ("slips", 1, "signed slips declared so far"),
    ("fast_m2", 1, "fast exponential average of |x|^2 (level-step detector)"),
    ("win_steps", 1, "sum of NCO steps in this lock window, rad"),
    ("prev_step", 1, "mean NCO step of the previous window, rad/sample"),
    ("since_steer", 1, "lock windows ended since the last re-steer (the two after it hold its "
                       "pull-in, not a frequency rate)"),
    ("ref_age", 1, "lock windows since the slip reference started"),
    ("lp_re", 1, "low-passed unit detector phasor d/|d| (strong-signal slip tracker), real"),
    ("lp_im", 1, "... imaginary part"),
    ("psi", 1, "unwrapped angle of the low-passed phasor, rad (M domain)"),
    ("psi_last", 1, "its last wrapped value, rad"),
    ("psi_ref", 1, "the detector angle's present stable point 2*pi*k, rad"),
    ("slip_pos", 1, "samples since the angle was last evaluated"),
    ("strong", 1, "1.0 when the last window's loop SNR was at least STRONG_LOOP_SNR"),
    ("ph_re", 1, "NCO phasor e^{j theta^} (recursion between exact resyncs), real"),
    ("ph_im", 1, "... imaginary part"),
    ("pm_re", 1, "its M-th power e^{j M theta^}, advanced alongside, real"),
    ("pm_im", 1, "... imaginary part"),
    ("nco_ref", 1, "frequency register at the last resync, rad/sample"),
    ("nco_left", 1, "samples until the next exact resync"),
    ("norm_left", 1, "samples until the detector normalisation is recomputed"),
    ("inv_rms", 1, "1/sqrt(M2) in use, 1/amplitude"),
    ("inv_norm", 1, "1/A_M in use (1/(S/M2)^(M/2) while acquiring)"),
    ("cap", 1, "limiter threshold in use, power units (0: no moments yet)"),
    ("line_re", 1, "exponential average of the detector d against the NCO: the M-th power "
                   "line (M-domain phasor), real"),
    ("line_im", 1, "... imaginary part"),
    ("line_w", 1, "its weight since the last restart (bias correction)"),
    ("line_p", 1, "exponential average of |d|^2 (the line estimate's noise scale)"),
    ("line_on", 1, "1.0 while the detector is normalised by the line estimate"),
    ("free_re", 1, "reference e^{j M theta~} of the lock statistic: set onto the NCO's mean "
                   "M-th power phasor at each window end, advanced at free_f in between; real"),
    ("free_im", 1, "... imaginary part"),
    ("free_i", 1, "sum of the in-phase projection of (y/|y|)^M on that reference over this "
                  "quarter of the lock window so far"),
    ("free_q", 1, "... and of the quadrature projection"),
    ("free_f", 1, "the reference's step, rad/sample (from free_level and free_trend)"),
    ("free_a", 1, "its change per sample (the trend spread over a window), rad/sample^2"),
    ("quarters", 8, "the window's quarter sums: in-phase 0..3, quadrature 4..7"),
    ("free_level", 1, "smoothed mean NCO step per window, rad/sample (Holt's linear method)"),
    ("free_trend", 1, "its trend per window, rad/sample"),
    ("nco_rel_re", 1, "sum over this lock window of the NCO's M-th power phasor against the "
                      "reference: where the NCO sat on average; real"),
    ("nco_rel_im", 1, "... imaginary part"),
    ("slow_re", 1, "e^{j M ref_r}: the slip tracker's slow reference against the NCO (M domain), "
                   "advanced with ref_r, recomputed exactly at each NCO resync; real"),
    ("slow_im", 1, "... imaginary part"),
    ("slow_line_re", 1, "the line average of d measured against the slow reference, "
                        "d e^{j M ref_r}; real"),
    ("slow_line_im", 1, "... imaginary part"),
    ("angle_counts", 1, "1.0 while the detector angle counts slips: from lock on, and after an "
                        "unlock for as long as the detector phasor stays coherent at a strong signal"),
    ("block_len", 1, "length of the update block in progress, samples (fixed at its start)"),
    ("block_pos", 1, "samples of that block processed so far"),
    ("block_open", 1, "1.0 if the loop is closed in this block (the moments had settled at its start)"),
    ("held", 2 * MAX_BLOCK, "the block's input samples so far, interleaved I/Q (its sums are taken once "
                     "the block is whole, so they do not depend on where calls end)"),
)

PARAMS_FIELDS = (
    ("k1", 1, "proportional gain, rad/sample per unit detector output"),
    ("k2", 1, "integral gain"),
    ("k3", 1, "double-integral gain (3rd order)"),
    ("rot_re", 1, "e^{-j M point_angle}, real"),
    ("rot_im", 1, "... imaginary part"),
    ("fmin", 1, "lower frequency register limit, rad/sample"),
    ("fmax", 1, "upper frequency register limit, rad/sample"),
    ("alpha", 1, "moment averaging coefficient (1 / averaging length)"),
    ("step_in_freq", 1, "1.0: report the whole NCO step as frequency (1st order), else 0.0"),
    ("lock_window", 1, "lock-indicator window, samples"),
    ("ref_g1", 1, "slip reference tracker gains (3rd order, unit detector gain)"),
    ("ref_g2", 1, ""),
    ("ref_g3", 1, ""),
    ("sig2_floor", 1, "floor of (S/M2)^2: caps the detector-gain boost at low SNR"),
    ("start_mw", 1, "the loop closes once the moment weight reaches this (start-up)"),
    ("e_max", 1, "clip of the normalised detector output: K1 e_max = pi / M"),
    ("ref_stage_g", 3 * REF_STAGES, "3 gains per settling stage of the slip reference"),
    ("lp_beta", 1, "low-pass coefficient of the detector phasor"),
    ("lp_decim", 1, "its angle is unwrapped every this many samples"),
    ("bt", 1, "B_L T of the loop (for the loop-SNR estimate)"),
    ("line_alpha", 1, "averaging coefficient of the line estimate"),
    ("block", 1, "update block length, samples (a power of two dividing the lock quarter)"),
)


def _number(fields, prefix):
    """Define the module constant ``prefix + NAME`` = slot index of each field; return the
    number of slots."""
    at = 0
    for name, slots, _ in fields:
        globals()[prefix + name.upper()] = at
        at += slots
    return at


STATE_SIZE = _number(STATE_FIELDS, "S_")
PARAMS_SIZE = _number(PARAMS_FIELDS, "P_")

LIMIT = 100.0                      # sample power limit relative to M2 (+20 dB)
FAST_ALPHA = 1.0 / 64.0            # averaging coefficient of the level-step detector
LEVEL_STEP = 4.0                   # a level change of 6 dB restarts the moment estimate
TWO_PI = 2.0 * np.pi
NCO_RESYNC = 256                   # phasors recomputed exactly from the phase every this many samples
SMALL_ANGLE = 2.0 ** -5            # series rotation for |angle| <= this (error < 6e-15 per step)
NORM_BLOCK = 64                    # detector normalisation recomputed every this many samples...
MW_SETTLED = 0.5                   # ...and every block while the moment weight is below this
SLIP_DEPARTURE = 0.75              # fraction of 2*pi/M that declares a slip
#: the slip reference narrows in stages after lock: stage k lasts until this many windows
REF_STAGE_END = (2.0, 6.0, 14.0)
STRONG_LOOP_SNR = 10.0            # loop SNR 1/(B_L T V_M) above which the detector angle decides
ANGLE_DEPARTURE = 1.5 * np.pi      # detector-angle departure (M domain) that is a slip
LP_NOISE_FLOOR = 4.0               # |low-passed phasor|^2 must exceed this * beta: 4 noise std
#: weights of Holt's linear method for the rate of the lock statistic's reference: level
#: and trend of the NCO's mean step per window (less noise than one window's
#: step, and no lag on a frequency ramp)
FREE_LEVEL_WEIGHT = 0.25
FREE_TREND_WEIGHT = 0.125
LINE_SIGNIFICANCE = 64.0           # the line estimate is used once it stands 8 standard errors out


def new_state():
    """A fresh state array (STATE_SIZE slots): NCO at 0 rad and 0 rad/sample, no moments yet,
    unlocked."""
    return np.zeros(STATE_SIZE, dtype=np.float64)


def state_dict(state):
    """The state array by field name (floats; ``quarters`` an array copy), for tests and
    diagnostics."""
    fields = {}
    at = 0
    for name, slots, _ in STATE_FIELDS:
        fields[name] = float(state[at]) if slots == 1 else state[at:at + slots].copy()
        at += slots
    return fields


def steer_nco(state, freq):
    """Re-steer the NCO to ``freq`` rad/sample (phase kept): the frequency register is set and
    the rate register cleared; the slip trackers and the lock statistic's reference rate move
    with it, so the jump is not a slip. An update block runs at one frequency, so this is
    for a block boundary (:func:`block_remaining` 0); ``ValueError`` within a block."""
    if state[S_BLOCK_POS] > 0.0:
        raise ValueError("the NCO can only be re-steered between update blocks")
    state[S_FREQ] = freq
    state[S_ACC2] = 0.0
    state[S_REF_R] = 0.0
    state[S_SLOW_RE] = 1.0
    state[S_SLOW_IM] = 0.0
    state[S_ANGLE_COUNTS] = 0.0          # the detector angle jumps with the NCO
    state[S_REF_F] = freq
    state[S_REF_A] = 0.0
    state[S_WIN_STEPS] = 0.0
    state[S_PREV_STEP] = freq
    state[S_SINCE_STEER] = 0.0
    state[S_FREE_F] = freq               # the lock statistic's reference follows too
    state[S_FREE_A] = 0.0
    state[S_FREE_LEVEL] = freq
    state[S_FREE_TREND] = 0.0


def block_remaining(state):
    """Samples left in the update block in progress (0 at a block boundary)."""
    pos = int(state[S_BLOCK_POS])
    return int(state[S_BLOCK_LEN]) - pos if pos > 0 else 0


@njit(cache=True)
def loop_snr(m2, m4, power, bt):
    """Loop SNR ``1/(B_L T V_M)`` (REFERENCES 5) from the moments |x|^2, |x|^4 (M2M4 SNR)."""
    r2 = 2.0 - m4 / (m2 * m2)                 # (S/M2)^2
    if r2 <= 0.0:
        return 0.0
    r = np.sqrt(r2)
    if r >= 1.0:
        return np.inf
    s2 = (1.0 - r) / r                         # N/S = 1/(Es/N0)
    v = 0.0
    coef = 1.0
    for k in range(1, power + 1):              # V_M = sum_k C(M,k)^2 k! s2^k
        coef *= (power - k + 1) * (power - k + 1) / k
        v += coef * s2 ** k
    return 1.0 / (bt * v)


# --- NCO ---------------------------------------------------------------------------

@njit(cache=True, inline="always")
def _rotate(q_re, q_im, v):
    """q e^{j v}: a short series for |v| <= SMALL_ANGLE (cos to v^6, error < 3e-17;
    sin to v^5, error < 6e-15), libm beyond."""
    if -SMALL_ANGLE <= v <= SMALL_ANGLE:
        v2 = v * v
        c = 1.0 - v2 * (0.5 - v2 * (1.0 / 24.0 - v2 * (1.0 / 720.0)))
        s = v * (1.0 - v2 * (1.0 / 6.0 - v2 * (1.0 / 120.0)))
    else:
        c = np.cos(v)
        s = np.sin(v)
    return q_re * c - q_im * s, q_re * s + q_im * c


@njit(cache=True, inline="always")
def phasor_pair(angle, power):
    """``(cos a, sin a, cos Ma, sin Ma)`` for an angle ``a`` in rad."""
    return np.cos(angle), np.sin(angle), np.cos(power * angle), np.sin(power * angle)


@njit(cache=True, inline="always")
def nco_resync(phase, freq, power):
    """Exact NCO phasors from the phase accumulator ``phase`` (rad) and the frequency
    register ``freq`` (rad/sample), which becomes ``nco_ref``: returns ``(P re, P im, P^M re,
    P^M im, nco_ref, e^{j nco_ref} re, im, e^{j M nco_ref} re, im)``."""
    ph_re, ph_im, pm_re, pm_im = phasor_pair(phase, power)
    rf_re, rf_im, rm_re, rm_im = phasor_pair(freq, power)
    return ph_re, ph_im, pm_re, pm_im, freq, rf_re, rf_im, rm_re, rm_im


@njit(cache=True, inline="always")
def nco_advance(phase, step, freq, v, ph_re, ph_im, pm_re, pm_im, rf_re, rf_im, rm_re, rm_im,
                power):
    """One NCO sample: ``theta^ += step + freq`` (rad, wrapped to [-pi, pi)) and the phasors
    ``P = e^{j theta^}``, ``P^M`` turned by ``e^{j nco_ref}`` (given as ``rf``, its M-th power
    ``rm``) times ``e^{j v}``, ``v = step + freq - nco_ref`` rad (a small angle).
    Returns ``(phase, P re, P im, P^M re, P^M im)``."""
    phase += step
    phase += freq
    q_re = ph_re * rf_re - ph_im * rf_im
    q_im = ph_re * rf_im + ph_im * rf_re
    qm_re = pm_re * rm_re - pm_im * rm_im
    qm_im = pm_re * rm_im + pm_im * rm_re
    ph_re, ph_im = _rotate(q_re, q_im, v)
    pm_re, pm_im = _rotate(qm_re, qm_im, power * v)
    if phase >= np.pi or phase < -np.pi:
        phase -= TWO_PI * np.floor((phase + np.pi) / TWO_PI)
    return phase, ph_re, ph_im, pm_re, pm_im


# --- loop filter -------------------------------------------------------------------

@njit(cache=True, inline="always")
def loop_filter(e, acc1, acc2, nco_ref, k1, k2, k3, fmin, fmax, block):
    """Order 1-3 loop filter, once per update block of ``block`` samples, on the block's mean
    normalised detector output ``e``: ``acc2 += L K3 e; acc1 += L K2 e + L acc2`` with ``acc1``
    held in [fmin, fmax] rad/sample (``acc2`` then not pushing further); ``k1..k3`` are the
    per-sample gains, ``L = block``. Returns ``(L K1 e, acc1, acc2, v)``: the proportional
    phase kick (rad), the registers (rad/sample, rad/sample^2), and ``v``, the step from the
    block's last sample to the next block's first (kick + acc1) minus ``nco_ref``, rad."""
    b1 = block * k1
    b2 = block * k2
    b3 = block * k3
    v = (b1 + b2 + block * b3) * e + (acc1 + block * acc2 - nco_ref)
    acc2 += b3 * e
    acc1 += b2 * e + block * acc2
    if acc1 > fmax:
        acc1 = fmax
        if acc2 > 0.0:
            acc2 = 0.0
        v = b1 * e + acc1 - nco_ref
    elif acc1 < fmin:
        acc1 = fmin
        if acc2 < 0.0:
            acc2 = 0.0
        v = b1 * e + acc1 - nco_ref
    return b1 * e, acc1, acc2, v


# --- line and detector normalisation -----------------------------------------------

@njit(cache=True, inline="always")
def line_update(line_re, line_im, slow_line_re, slow_line_im, line_w, line_p,
                d_re, d_im, slow_re, slow_im, mag2, line_alpha):
    """One step of the M-th power line averages (coefficient ``line_alpha``): of the detector
    ``d`` (against the NCO), of ``d e^{j M ref_r}`` (against the slow reference ``slow``), of 1
    (the weight) and of ``|d|^2 = mag2``. Returns the six updated averages in the order given."""
    line_re += line_alpha * (d_re - line_re)
    line_im += line_alpha * (d_im - line_im)
    slow_line_re += line_alpha * (d_re * slow_re - d_im * slow_im - slow_line_re)
    slow_line_im += line_alpha * (d_re * slow_im + d_im * slow_re - slow_line_im)
    line_w += line_alpha * (1.0 - line_w)
    line_p += line_alpha * (mag2 - line_p)
    return line_re, line_im, slow_line_re, slow_line_im, line_w, line_p


@njit(cache=True, inline="always")
def normalisation(m2, m4, mw, locked, line_re, line_im, slow_line_re, slow_line_im, line_w,
                  line_p, line_alpha, sig2_floor, power):
    """Detector normalisation from the moments (``m2, m4`` with weight ``mw``) and the line
    averages. Returns ``(1/sqrt(M2) in 1/amplitude, limiter level in power units, 1/A_M,
    line_on)``: ``A_M`` is the larger bias-corrected line magnitude while ``locked`` and it
    stands LINE_SIGNIFICANCE variances out (``line_on`` 1.0), else ``(S/M2)^(M/2)`` from
    M2M4 with ``(S/M2)^2`` floored at ``sig2_floor`` (``line_on`` 0.0)."""
    mm2 = m2 / mw
    inv_rms = 1.0 / np.sqrt(mm2)
    cap = LIMIT * mm2
    inv_norm = 0.0
    line_on = 0.0
    if locked > 0.0 and line_w > 0.0:
        lm2 = max(line_re * line_re + line_im * line_im,
                  slow_line_re * slow_line_re + slow_line_im * slow_line_im)
        lm2 /= line_w * line_w
        line_var_k = line_alpha / (2.0 - line_alpha)   # variance of an average / per sample
        spread = (line_p / line_w) * line_var_k * (1.0 - (1.0 - line_w) ** 2) / (line_w * line_w)
        if lm2 > LINE_SIGNIFICANCE * spread:
            inv_norm = 1.0 / np.sqrt(lm2)
            line_on = 1.0
    if line_on == 0.0:
        sig2 = 2.0 - (m4 / mw) / (mm2 * mm2)   # (S / M2)^2 from M2M4
        if sig2 < sig2_floor:
            sig2 = sig2_floor
        inv_norm = 1.0 / half_power(np.sqrt(sig2), power)
    return inv_rms, cap, inv_norm, line_on


# --- lock statistic ----------------------------------------------------------------

@njit(cache=True, inline="always")
def window_verdict(quarters, lock_window, locked, lock_ref, on_table, off_table):
    """End of a lock window: the statistic (sum of the in-phase quarter sums over
    ``lock_window`` samples) and the lock rule's verdict on it, ``(metric, locked now)``."""
    metric = (quarters[0] + quarters[1] + quarters[2] + quarters[3]) / lock_window
    d1, d2, d3 = null_contrasts(quarters[:4], quarters[4:], int(lock_window), 0, 1)
    return metric, update_lock(locked > 0.0, metric, d1, d2, d3, lock_ref, on_table, off_table)


@njit(cache=True, inline="always")
def reference_rate(mean_step, free_level, free_trend, nco_rel_re, nco_rel_im, strong, locked,
                   lock_window, power):
    """Rate of the lock statistic's reference for the next window from this window's mean NCO
    step (rad/sample): Holt's linear method on level and trend (full weight at a strong
    signal). While locked at a strong signal the step's disagreement with the prediction is
    taken modulo a whole M-domain turn per window; at a weak signal the seen level is the
    prediction corrected by the turn of the NCO's mean phasor against the reference,
    ``nco_rel``. Returns ``(level, trend, step change per sample, step)``, rad/sample."""
    last_level = free_level
    predicted = free_level + free_trend
    if strong:
        seen = mean_step
        if locked > 0.0:
            turns = power * lock_window * (mean_step - predicted) / TWO_PI
            seen -= np.floor(turns + 0.5) * TWO_PI / (power * lock_window)
    elif nco_rel_re != 0.0 or nco_rel_im != 0.0:
        seen = predicted + np.arctan2(nco_rel_im, nco_rel_re) / (power * lock_window)
    else:
        seen = mean_step
    level_weight = 1.0 if strong else FREE_LEVEL_WEIGHT
    trend_weight = 1.0 if strong else FREE_TREND_WEIGHT
    free_level = predicted + level_weight * (seen - predicted)
    free_trend += trend_weight * (free_level - last_level - free_trend)
    free_a = free_trend / lock_window
    free_f = free_level + free_trend - free_a * 0.5 * (lock_window - 1.0)
    return free_level, free_trend, free_a, free_f


@njit(cache=True, inline="always")
def turn_reference(free_re, free_im, nco_rel_re, nco_rel_im):
    """The lock statistic's reference phasor turned onto the NCO's mean M-th power phasor
    ``nco_rel`` (measured against it) and brought back to unit magnitude."""
    rel = np.sqrt(nco_rel_re * nco_rel_re + nco_rel_im * nco_rel_im)
    if rel > 0.0:
        rr = nco_rel_re / rel
        ri = nco_rel_im / rel
        free_re, free_im = free_re * rr - free_im * ri, free_re * ri + free_im * rr
    mag = np.sqrt(free_re * free_re + free_im * free_im)
    if mag > 0.0:
        free_re /= mag
        free_im /= mag
    return free_re, free_im


# --- cycle slips -------------------------------------------------------------------

@njit(cache=True, inline="always")
def angle_slip(lp_re, lp_im, psi, psi_last, psi_ref, angle_counts, locked, strong, lp_beta):
    """Strong-signal slip tracker, one evaluation: unwrap the angle of the low-passed detector
    phasor ``lp`` (rad, M domain) and compare it with its stable point ``psi_ref``; a departure
    beyond ANGLE_DEPARTURE while counting, strong and coherent is a slip. Returns
    ``(psi, psi_last, psi_ref, angle_counts, slip)``, slip -1.0, 0.0 or +1.0 (2*pi/M units;
    detector angle up = the NCO fell behind = -1)."""
    a = np.arctan2(lp_im, lp_re)
    da = a - psi_last
    if da > np.pi:
        da -= TWO_PI
    elif da < -np.pi:
        da += TWO_PI
    psi += da
    psi_last = a
    dev = psi - psi_ref
    coherent = lp_re * lp_re + lp_im * lp_im > LP_NOISE_FLOOR * lp_beta
    if locked > 0.0 and strong:
        angle_counts = 1.0
    elif not (strong and coherent):
        angle_counts = 0.0
    slip = 0.0
    if (angle_counts > 0.0 and strong and coherent
            and (dev > ANGLE_DEPARTURE or dev < -ANGLE_DEPARTURE)):
        slip = -1.0 if dev > 0.0 else 1.0
        psi_ref -= slip * TWO_PI
    elif angle_counts == 0.0:
        psi_ref = TWO_PI * np.floor(psi / TWO_PI + 0.5)
    return psi, psi_last, psi_ref, angle_counts, slip


@njit(cache=True, inline="always")
def reference_gains(params, ref_age):
    """Gains ``(g1, g2, g3)`` of the slip reference ``ref_age`` lock windows after it started:
    those of the first settling stage not yet over (REF_STAGE_END), else the slow ones."""
    for k in range(REF_STAGES):
        if ref_age < REF_STAGE_END[k]:
            at = P_REF_STAGE_G + 3 * k
            return params[at], params[at + 1], params[at + 2]
    return params[P_REF_G1], params[P_REF_G2], params[P_REF_G3]


@njit(cache=True, inline="always")
def reference_slip(ref_r, ref_f, ref_a, slow_re, slow_im, nco_step, g1, g2, g3, strong, acc2,
                   power, block):
    """Weak-signal slip tracker, one update block of ``block`` samples: the 3rd-order
    reference (gains ``g``, per block) follows the NCO's advance over the block ``nco_step``
    (rad); its residual ``ref_r`` (rad) beyond SLIP_DEPARTURE of 2*pi/M is a slip, unless
    ``strong`` (then the reference restarts on the NCO's step and rate ``acc2``). ``ref_f`` is
    in rad/sample, ``ref_a`` in rad/sample^2; ``slow`` is ``e^{j M ref_r}``.
    Returns ``(ref_r, ref_f, ref_a, slow_re, slow_im, slip)``, slip -1.0, 0.0 or +1.0."""
    slip_step = TWO_PI / power
    ref_a += g3 * ref_r
    ref_f += g2 * ref_r + block * ref_a
    ref_step = nco_step - g1 * ref_r - block * ref_f
    ref_r += ref_step
    slow_re, slow_im = _rotate(slow_re, slow_im, power * ref_step)
    slip = 0.0
    if ref_r > SLIP_DEPARTURE * slip_step or ref_r < -SLIP_DEPARTURE * slip_step:
        if strong:
            # the detector angle decides: the loop followed a frequency change the slow
            # reference had not, so bring the reference along
            ref_r = 0.0
            ref_f = nco_step / block
            ref_a = acc2
            slow_re = 1.0
            slow_im = 0.0
        else:
            slip = 1.0 if ref_r > 0.0 else -1.0
            ref_r -= slip * slip_step
    return ref_r, ref_f, ref_a, slow_re, slow_im, slip


@njit(cache=True, inline="always")
def _record_slip(slip_at, slip_count, n_slips, n, slip):
    """Write a declared slip (sample ``n``, signed count) at entry ``n_slips``; returns the
    new number of entries."""
    slip_at[n_slips] = n
    slip_count[n_slips] = int(slip)
    return n_slips + 1


@njit(cache=True)
def block_coefficients(block, alpha, line_alpha, lp_beta, weights_m, weights_f):
    """Per-block forms of the per-sample exponential averages for a block of ``block``
    samples: ``weights_m[t] = alpha (1 - alpha)^(block - 1 - t)`` (moments) and the same with
    FAST_ALPHA in ``weights_f``, so that a block's position-weighted sum plus the old value
    times the decay is the per-sample average after the block. Returns ``(moment decay,
    level-step decay, line coefficient, low-pass coefficient)``: ``(1 - a)^block`` for the
    first two, ``1 - (1 - a)^block`` for the others (each averages the block's mean)."""
    for t in range(block):
        weights_m[t] = alpha * (1.0 - alpha) ** (block - 1 - t)
        weights_f[t] = FAST_ALPHA * (1.0 - FAST_ALPHA) ** (block - 1 - t)
    if block == 1:
        return 1.0 - alpha, 1.0 - FAST_ALPHA, line_alpha, lp_beta
    return ((1.0 - alpha) ** block, (1.0 - FAST_ALPHA) ** block,
            1.0 - (1.0 - line_alpha) ** block, 1.0 - (1.0 - lp_beta) ** block)


@njit(cache=True, inline="always")
def _cmul(a_re, a_im, b_re, b_im):
    """The complex product ``a b`` as a real pair."""
    return a_re * b_re - a_im * b_im, a_re * b_im + a_im * b_re


@njit(cache=True, inline="always")
def _turning(tabs, row, t, a_re, a_im, w1_re, w1_im, w2_re, w2_im, w3_re, w3_im):
    """``tabs[row:row+2, t + k] = a w^k`` for k = 0..3 (``w1..w3`` the powers of w)."""
    tabs[row, t] = a_re
    tabs[row + 1, t] = a_im
    tabs[row, t + 1], tabs[row + 1, t + 1] = _cmul(a_re, a_im, w1_re, w1_im)
    tabs[row, t + 2], tabs[row + 1, t + 2] = _cmul(a_re, a_im, w2_re, w2_im)
    tabs[row, t + 3], tabs[row + 1, t + 3] = _cmul(a_re, a_im, w3_re, w3_im)


@njit(cache=True)
def block_tables(block, ph_re, ph_im, pm_re, pm_im, free_re, free_im, acc1, nco_ref, rf_re, rf_im,
                 rm_re, rm_im, free_f, free_a, power, tabs):
    """The NCO over one update block at the frequency register ``acc1`` (rad/sample) from
    its phasors at the block start: ``tabs[0:2, t] = e^{j theta^}``, ``tabs[2:4, t] =
    e^{j M theta^}`` and ``tabs[4:6, t]`` the lock statistic's reference (M domain, turning
    at its mean step over the block), t = 0..block-1 (``tabs`` has TABLE_ROWS rows). Four
    samples at a time (each phasor advanced by its fourth power), so the products do not
    wait on each other. Returns the reference phasor at the next block start."""
    v = acc1 - nco_ref
    w_re, w_im = _rotate(rf_re, rf_im, v)
    wm_re, wm_im = _rotate(rm_re, rm_im, power * v)
    # the reference's step against the NCO's reference frequency: a small angle (the series,
    # not libm) whenever the reference runs near the NCO, whatever the carrier offset
    wf_re, wf_im = _rotate(rm_re, rm_im, power * (free_f + free_a * 0.5 * (block - 1) - nco_ref))
    a_re, a_im = ph_re, ph_im
    b_re, b_im = pm_re, pm_im
    c_re, c_im = free_re, free_im
    if block < 4:
        for t in range(block):
            tabs[0, t], tabs[1, t] = a_re, a_im
            tabs[2, t], tabs[3, t] = b_re, b_im
            tabs[4, t], tabs[5, t] = c_re, c_im
            a_re, a_im = _cmul(a_re, a_im, w_re, w_im)
            b_re, b_im = _cmul(b_re, b_im, wm_re, wm_im)
            c_re, c_im = _cmul(c_re, c_im, wf_re, wf_im)
    else:
        w2_re, w2_im = _cmul(w_re, w_im, w_re, w_im)
        w3_re, w3_im = _cmul(w2_re, w2_im, w_re, w_im)
        w4_re, w4_im = _cmul(w2_re, w2_im, w2_re, w2_im)
        m2_re, m2_im = _cmul(wm_re, wm_im, wm_re, wm_im)
        m3_re, m3_im = _cmul(m2_re, m2_im, wm_re, wm_im)
        m4_re, m4_im = _cmul(m2_re, m2_im, m2_re, m2_im)
        f2_re, f2_im = _cmul(wf_re, wf_im, wf_re, wf_im)
        f3_re, f3_im = _cmul(f2_re, f2_im, wf_re, wf_im)
        f4_re, f4_im = _cmul(f2_re, f2_im, f2_re, f2_im)
        for t in range(0, block, 4):
            _turning(tabs, 0, t, a_re, a_im, w_re, w_im, w2_re, w2_im, w3_re, w3_im)
            _turning(tabs, 2, t, b_re, b_im, wm_re, wm_im, m2_re, m2_im, m3_re, m3_im)
            _turning(tabs, 4, t, c_re, c_im, wf_re, wf_im, f2_re, f2_im, f3_re, f3_im)
            a_re, a_im = _cmul(a_re, a_im, w4_re, w4_im)
            b_re, b_im = _cmul(b_re, b_im, m4_re, m4_im)
            c_re, c_im = _cmul(c_re, c_im, f4_re, f4_im)
    return c_re, c_im


@njit(cache=True, inline="always", error_model="numpy")
def detector(xr, xi, g_rms, cap, rot_re, rot_im, q_re, q_im, power, limited):
    """The M-th power detector on one sample ``x = xr + j xi`` (not a gap): the sample power
    limited to ``cap`` (the sample scaled down to it, phase kept), and ``d = (x_lim g_rms)^M
    e^{-j M point_angle} conj(q)`` against the NCO's ``q = e^{j M theta^}``, with ``rot =
    e^{-j M point_angle}``; ``limited`` False leaves out the limiter (for samples known to
    be within it). Returns ``(limited power, d re, d im)``."""
    p = xr * xr + xi * xi
    g = g_rms
    if limited:
        over = p > cap                               # selects, not branches: loops vectorise
        g = g_rms * np.sqrt(cap / p) if over else g_rms
        p = cap if over else p
    zr, zi = pair_power(xr * g, xi * g, power)
    zr, zi = zr * rot_re - zi * rot_im, zr * rot_im + zi * rot_re
    return p, zr * q_re + zi * q_im, zi * q_re - zr * q_im


@njit(cache=True, inline="always")
def block_sums(xs, tabs, weights_m, weights_f, g_rms, cap, e_gain, e_max, rot_re, rot_im, power):
    """Sums over the samples of one whole update block, given as interleaved float32 I/Q
    ``xs``, against the block's NCO tables ``tabs`` (:func:`block_tables`). Gaps (non-finite
    or zero samples) are masked, not skipped, so the loop vectorises. Returns the sums of: the
    normalised detector output ``Im(d) e_gain`` clipped to +-e_max; ``d`` (re, im); ``d/|d|``
    (re, im); ``|d|^2``; the lock projection ``(d/|d|) rel`` (re, im); ``rel = P^M conj(ref)``
    (the NCO against the lock reference; re, im); and of the non-gap samples: their count, the count with
    ``|d| > 0``, the limited power ``p``, and with the moment weights ``p``, ``p^2``, 1, and
    with the level-step weights ``p``.

    The orders of the package's signals, M = 1, 2, 4 and 8, are summed with M known to the
    compiler (their powers fold to a few products; M even needs no square root), other M
    with M at run time. A block is summed without the limiter, and again with it only if a
    sample was above it (the limiter costs a square root and a division per sample)."""
    block = (xs, tabs, weights_m, weights_f, g_rms, cap, e_gain, e_max, rot_re, rot_im)
    if power == 2:
        return _sums_of_order(block, 2, power)
    if power == 4:
        return _sums_of_order(block, 4, power)
    if power == 1:
        return _sums_of_order(block, 1, power)
    if power == 8:
        return _sums_of_order(block, 8, power)
    return _sums_of_order(block, 0, power)


@njit(cache=True, inline="always")
def _sums_of_order(block, order, power):
    """:func:`block_sums` of the inputs ``block`` (its arguments but M, as a tuple) for one
    ``order``: M as a compile-time constant, or 0 for ``power`` at run time."""
    sums = _detector_sums(block, order, power, False)
    if sums[-1] > 0.0:
        sums = _detector_sums(block, order, power, True)
    return sums[:-1]


@njit(cache=True, fastmath=SIMD_MATH, error_model="numpy")
def _detector_sums(block, order, power, limited):
    """The sums of :func:`block_sums` over the inputs ``block`` and, last, the count of
    samples above the limiter level ``cap``; the limiter is applied if ``limited``.
    ``order`` and ``limited`` are compiled in (a specialisation for each pair): M is
    ``order``, or ``power`` if it is 0."""
    literally(order)
    literally(limited)
    power = order if order > 0 else power
    xs, tabs, weights_m, weights_f, g_rms, cap, e_gain, e_max, rot_re, rot_im = block
    s_e = 0.0
    s_dr = 0.0
    s_di = 0.0
    s_ur = 0.0
    s_ui = 0.0
    s_mag2 = 0.0
    s_fi = 0.0
    s_fq = 0.0
    s_rr = 0.0
    s_ri = 0.0
    s_valid = 0.0
    s_unit = 0.0
    s_p = 0.0
    s_m2 = 0.0
    s_m4 = 0.0
    s_mw = 0.0
    s_fast = 0.0
    s_over = 0.0
    g_mag = g_rms * g_rms
    for t in range(xs.shape[0] // 2):
        xr, xi, p, ok = masked_sample(xs, t)
        s_over += 1.0 if p > cap else 0.0
        p, dr, di = detector(xr, xi, g_rms, cap, rot_re, rot_im, tabs[2, t], tabs[3, t], power,
                             limited)
        p = p if ok else 0.0
        dr = dr if ok else 0.0
        di = di if ok else 0.0
        e = min(max(di * e_gain, -e_max), e_max)
        mag = half_power(p * g_mag, power)              # |d| = (p/M2)^(M/2)
        has = mag > 0.0
        inv_mag = 1.0 / (mag if has else 1.0)
        ur = dr * inv_mag
        ui = di * inv_mag
        # the NCO against the lock reference, P^M conj(free): computed here, where the loop
        # only reads (a table row written for it would stop the loops vectorising)
        rel_re = tabs[2, t] * tabs[4, t] + tabs[3, t] * tabs[5, t]
        rel_im = tabs[3, t] * tabs[4, t] - tabs[2, t] * tabs[5, t]
        wm = weights_m[t] if ok else 0.0
        s_e += e
        s_dr += dr
        s_di += di
        s_ur += ur
        s_ui += ui
        s_mag2 += mag * mag
        s_fi += ur * rel_re - ui * rel_im
        s_fq += ur * rel_im + ui * rel_re
        s_rr += rel_re
        s_ri += rel_im
        s_valid += 1.0 if ok else 0.0
        s_unit += 1.0 if has else 0.0
        s_p += p
        s_m2 += wm * p
        s_m4 += wm * (p * p)
        s_mw += wm
        s_fast += weights_f[t] * p
    return (s_e, s_dr, s_di, s_ur, s_ui, s_mag2, s_fi, s_fq, s_rr, s_ri, s_valid, s_unit, s_p,
            s_m2, s_m4, s_mw, s_fast, s_over)


@njit(cache=True, fastmath=SIMD_MATH, error_model="numpy")
def corrected(xs, outs, n0, t0, run, tabs):
    """``y = x e^{-j theta^}`` for ``run`` samples of interleaved float32 ``xs`` from sample
    ``n0``, block positions ``t0 + j`` of the NCO table, into interleaved float32 ``outs``; 0 for
    a gap. Returns the number of gaps."""
    # views from the offsets first: indices from 0 need no wrap-around test, so the loop
    # vectorises
    x_run = xs[2 * n0:2 * (n0 + run)]
    y_run = outs[2 * n0:2 * (n0 + run)]
    c_run = tabs[0, t0:t0 + run]
    s_run = tabs[1, t0:t0 + run]
    gaps = 0.0
    for j in range(run):
        xr, xi, _, ok = masked_sample(x_run, j)
        c = c_run[j]
        s = s_run[j]
        y_run[2 * j] = np.float32(xr * c + xi * s) if ok else np.float32(0.0)
        y_run[2 * j + 1] = np.float32(xi * c - xr * s) if ok else np.float32(0.0)
        gaps += 0.0 if ok else 1.0
    return gaps


@njit(cache=True, inline="always", error_model="numpy")
def diagnostics(xs, ref, freq, err, n0, t0, run, tabs, f_now, g_rms, cap, rot_re, rot_im,
                inv_power, power):
    """The diagnostic outputs of ``run`` samples from ``n0`` (block positions from ``t0``), each
    written if its array is not empty: the reference ``e^{j theta^}``, the frequency ``f_now``
    (rad/sample) and the phase error ``arg(d) / M`` (rad; 0 for a gap)."""
    for j in range(run):
        i = n0 + j
        t = t0 + j
        if ref.shape[0] > 0:
            ref[i] = complex(tabs[0, t], tabs[1, t])
        if freq.shape[0] > 0:
            freq[i] = f_now
        if err.shape[0] > 0:
            xr, xi, _, ok = masked_sample(xs, i)
            err[i] = 0.0
            if ok:
                _, dr, di = detector(xr, xi, g_rms, cap, rot_re, rot_im, tabs[2, t], tabs[3, t],
                                     power, True)
                err[i] = np.arctan2(di, dr) * inv_power


@njit(cache=True, inline="always")
def block_length(wanted, lock_pos):
    """Length of the update block starting ``lock_pos`` samples into a lock window: the
    wanted power of two, halved until it divides the position (after a change of length
    the blocks stay inside the window's quarters)."""
    block = wanted
    at = int(lock_pos)
    while block > 1 and at & (block - 1):
        block //= 2
    return block


@njit(nogil=True, cache=True, error_model='numpy')
def mth_power_loop(x, out, ref, freq, err, marks, mark_freq, slip_at, slip_count, lock_at, lock_to,
                   lock_freq, stop_first, stop_every, state, params, lock_ref, on_table, off_table,
                   power):
    """Run the loop over ``x`` (complex64), writing the corrected samples to ``out``.

    ``ref``, ``freq``, ``err`` are the diagnostic outputs (reference phasor,
    frequency in rad/sample, phase error in rad, carrier-phase units); pass
    zero-length arrays to skip them. ``marks`` holds increasing sample indices
    (relative to ``x``) at which the frequency is recorded into ``mark_freq``
    (rad/sample). Declared cycle slips are written to ``slip_at`` (sample index
    relative to ``x``) and ``slip_count`` (signed, units of 2*pi/M); both must
    hold ``len(x)`` entries. Changes of the lock indicator are written to
    ``lock_at`` (index relative to ``x`` of the window end that decided, i.e. the
    first sample after the window), ``lock_to`` (1 locked, 0 not) and ``lock_freq``
    (the NCO frequency then, rad/sample); each must hold ``len(x) // lock_window + 1``
    entries. The lock decision is :func:`coherer.lockstat.update_lock` with the noise
    reference ``lock_ref`` and the threshold tables ``on_table``, ``off_table``.

    If ``stop_every > 0`` the kernel returns early at the first window end
    ``b = stop_first + k * stop_every`` (``b`` >= 1, relative to ``x``) after
    which the loop is not locked, so the caller can re-steer the NCO there
    (acquisition); it then continues with ``x[b:]``.

    The loop filter runs once per update block (``params[P_BLOCK]`` samples, blocks counted
    from the stream start, so a call may end and the next begin inside one): the samples
    of a block are corrected at the block's one NCO frequency, their detector outputs
    summed, and at the block end the filter, the NCO, the moments, the line, the slip
    trackers and the lock window are updated from the sums. Slips are declared, and lock
    windows end, on the last sample of a block.

    Returns ``(samples processed, slips declared, lock changes)``. ``state`` is
    updated in place.
    """
    k1 = params[P_K1]
    k2 = params[P_K2]
    k3 = params[P_K3]
    rot_re = params[P_ROT_RE]
    rot_im = params[P_ROT_IM]
    fmin = params[P_FMIN]
    fmax = params[P_FMAX]
    alpha = params[P_ALPHA]
    step_in_freq = params[P_STEP_IN_FREQ]
    lock_window = params[P_LOCK_WINDOW]
    window_int = int(lock_window)
    quarter_1 = float(quarter_start(1, window_int))     # window positions where quarters end
    quarter_2 = float(quarter_start(2, window_int))
    quarter_3 = float(quarter_start(3, window_int))
    line_alpha = params[P_LINE_ALPHA]
    lp_beta = params[P_LP_BETA]
    bt = params[P_BT]
    lp_decim = params[P_LP_DECIM]
    inv_power = 1.0 / power
    sig2_floor = params[P_SIG2_FLOOR]
    start_mw = params[P_START_MW]
    e_max = params[P_E_MAX]
    wanted_block = min(MAX_BLOCK, max(1, int(params[P_BLOCK])))

    phase = state[S_PHASE]
    acc1 = state[S_FREQ]
    acc2 = state[S_ACC2]
    m2 = state[S_M2]
    m4 = state[S_M4]
    mw = state[S_MW]
    gaps = state[S_GAPS]
    last_step = state[S_LAST_STEP]
    free_re = state[S_FREE_RE]
    free_im = state[S_FREE_IM]
    free_i = state[S_FREE_I]
    free_f = state[S_FREE_F]
    free_a = state[S_FREE_A]
    free_q = state[S_FREE_Q]
    free_level = state[S_FREE_LEVEL]
    nco_rel_re = state[S_NCO_REL_RE]
    nco_rel_im = state[S_NCO_REL_IM]
    free_trend = state[S_FREE_TREND]
    quarters = state[S_QUARTERS:S_QUARTERS + 8]     # a view: written in place
    line_re = state[S_LINE_RE]
    line_im = state[S_LINE_IM]
    slow_line_re = state[S_SLOW_LINE_RE]
    slow_line_im = state[S_SLOW_LINE_IM]
    line_w = state[S_LINE_W]
    line_p = state[S_LINE_P]
    line_on = state[S_LINE_ON]
    lock_n = state[S_LOCK_N]
    lock_pos = state[S_LOCK_POS]
    locked = state[S_LOCKED]
    metric = state[S_METRIC]
    ref_r = state[S_REF_R]
    slow_re = state[S_SLOW_RE]
    slow_im = state[S_SLOW_IM]
    ref_f = state[S_REF_F]
    ref_a = state[S_REF_A]
    slips = state[S_SLIPS]
    fast_m2 = state[S_FAST_M2]
    ph_re = state[S_PH_RE]
    ph_im = state[S_PH_IM]
    pm_re = state[S_PM_RE]
    pm_im = state[S_PM_IM]
    nco_ref = state[S_NCO_REF]
    nco_left = state[S_NCO_LEFT]
    rf_re, rf_im, rm_re, rm_im = phasor_pair(nco_ref, power)
    norm_left = state[S_NORM_LEFT]
    inv_rms = state[S_INV_RMS]
    inv_norm = state[S_INV_NORM]
    cap = state[S_CAP]
    win_steps = state[S_WIN_STEPS]
    prev_step = state[S_PREV_STEP]
    since_steer = state[S_SINCE_STEER]
    ref_age = state[S_REF_AGE]
    lp_re = state[S_LP_RE]
    lp_im = state[S_LP_IM]
    psi = state[S_PSI]
    psi_last = state[S_PSI_LAST]
    psi_ref = state[S_PSI_REF]
    slip_pos = state[S_SLIP_POS]
    strong = state[S_STRONG] > 0.0
    angle_counts = state[S_ANGLE_COUNTS]
    block = int(state[S_BLOCK_LEN])
    block_pos = int(state[S_BLOCK_POS])
    block_open = state[S_BLOCK_OPEN]

    xs = x.view(np.float32)                          # interleaved I/Q
    outs = out.view(np.float32)
    held = state[S_HELD:S_HELD + 2 * MAX_BLOCK]       # a view: written in place
    held_f32 = np.empty(2 * MAX_BLOCK, np.float32)
    tabs = np.empty((TABLE_ROWS, MAX_BLOCK))
    weights_m = np.empty(MAX_BLOCK)
    weights_f = np.empty(MAX_BLOCK)
    if block < 1:
        block = block_length(wanted_block, lock_pos)
    decay_m, decay_f, line_alpha_b, lp_beta_b = block_coefficients(
        block, alpha, line_alpha, lp_beta, weights_m, weights_f)
    free_next_re = 0.0
    free_next_im = 0.0
    tables_ready = False

    want_ref = ref.shape[0] > 0
    want_freq = freq.shape[0] > 0
    want_err = err.shape[0] > 0
    n_marks = marks.shape[0]
    next_mark = 0
    n_slips = 0

    n_locks = 0
    n_total = x.shape[0]
    processed = n_total
    next_stop = stop_first if stop_first >= 1 else stop_first + stop_every
    n = 0
    while n < n_total:
        if block_pos == 0:
            # a block starts: its length, an exact NCO resync when due, the lock statistic's
            # reference on the NCO, and whether the moments have settled (else it coasts)
            wanted = block_length(wanted_block, lock_pos)
            if wanted != block:
                block = wanted
                decay_m, decay_f, line_alpha_b, lp_beta_b = block_coefficients(
                    block, alpha, line_alpha, lp_beta, weights_m, weights_f)
            if nco_left <= 0.0:
                # exact resync every NCO_RESYNC samples of the stream: no drift in phase or magnitude
                ph_re, ph_im, pm_re, pm_im, nco_ref, rf_re, rf_im, rm_re, rm_im = nco_resync(
                    phase, acc1, power)
                slow_re = np.cos(power * ref_r)
                slow_im = np.sin(power * ref_r)
                nco_left = NCO_RESYNC
            if free_re == 0.0 and free_im == 0.0:
                # the lock statistic's reference starts on the NCO; it does not follow the noise
                # within a window (the loop's own output does, which biases the statistic toward
                # lock on band-limited noise)
                free_re = pm_re
                free_im = pm_im
            block_open = 1.0 if mw >= start_mw else 0.0
            tables_ready = False
        if not tables_ready:
            free_next_re, free_next_im = block_tables(
                block, ph_re, ph_im, pm_re, pm_im, free_re, free_im, acc1, nco_ref, rf_re, rf_im,
                rm_re, rm_im, free_f, free_a, power, tabs)
            tables_ready = True
        run = min(block - block_pos, n_total - n)
        f_now = acc1 + step_in_freq * last_step          # the frequency over this block
        while next_mark < n_marks and marks[next_mark] < n + run:
            mark_freq[next_mark] = f_now
            next_mark += 1
        e_gain = inv_norm if block_open > 0.0 else 0.0
        cap_now = cap if cap > 0.0 else np.inf            # no limiter before the moments exist

        # --- the block's samples: element-wise, at one NCO frequency ---------------------
        gaps += corrected(xs, outs, n, block_pos, run, tabs)
        if want_ref or want_freq or want_err:
            diagnostics(xs, ref, freq, err, n, block_pos, run, tabs, f_now, inv_rms, cap_now,
                        rot_re, rot_im, inv_power, power)
        if run == block:
            whole = xs[2 * n:2 * (n + block)]
        else:
            # part of a block: hold its samples until the block is whole, so that its sums
            # are taken over the same samples in the same order however the calls fall
            for k in range(2 * run):
                held[2 * block_pos + k] = xs[2 * n + k]
            whole = held_f32[:2 * block]
            if block_pos + run == block:
                for k in range(2 * block):
                    held_f32[k] = held[k]
        n += run
        block_pos += run
        if block_pos < block:
            break                                         # the block goes on in the next call
        block_pos = 0
        last = n - 1                                      # the block's last sample
        (blk_e, blk_d_re, blk_d_im, blk_u_re, blk_u_im, blk_mag2, blk_fi, blk_fq, blk_rr, blk_ri,
         blk_valid, blk_unit, blk_p, blk_m2, blk_m4, blk_mw, blk_fast) = block_sums(
            whole, tabs, weights_m, weights_f, inv_rms, cap_now, e_gain, e_max, rot_re, rot_im,
            power)
        free_i += blk_fi
        free_q += blk_fq
        nco_rel_re += blk_rr
        nco_rel_im += blk_ri
        lock_n += blk_unit

        # --- block end: loop filter and NCO --------------------------------------------
        acc1_block = acc1
        if blk_valid > 0.0:
            e_mean = blk_e / block
            e_clip = e_max / block                        # one kick never exceeds pi / M
            if e_mean > e_clip:
                e_mean = e_clip
            elif e_mean < -e_clip:
                e_mean = -e_clip
            last_step, acc1, acc2, v = loop_filter(e_mean, acc1, acc2, nco_ref, k1, k2, k3,
                                                   fmin, fmax, block)
        else:
            last_step = 0.0                               # gaps only: coast
            v = acc1 - nco_ref
        phase += (block - 1) * acc1_block
        phase, ph_re, ph_im, pm_re, pm_im = nco_advance(
            phase, last_step, acc1, v, tabs[0, block - 1], tabs[1, block - 1],
            tabs[2, block - 1], tabs[3, block - 1], rf_re, rf_im, rm_re, rm_im, power)
        nco_step = (block - 1) * acc1_block + last_step + acc1    # the NCO's advance, rad
        win_steps += nco_step
        nco_left -= block
        norm_left -= block
        # the reference phasor runs at the NCO's rate of the earlier windows
        free_re = free_next_re
        free_im = free_next_im
        free_f += block * free_a

        # --- the line (against the NCO and the slow reference), the detector phasor's low-pass
        if blk_valid > 0.0:
            inv_valid = 1.0 / blk_valid
            # the line, measured twice: against the NCO (shrunk by the loop's jitter,
            # E[cos M phi]) and against the slip tracker's slow reference, d e^{j M ref_r}
            # (free of that jitter, but shrunk while the reference itself still settles);
            # neither can exceed the line but by noise, so the larger is used
            line_re, line_im, slow_line_re, slow_line_im, line_w, line_p = line_update(
                line_re, line_im, slow_line_re, slow_line_im, line_w, line_p,
                blk_d_re * inv_valid, blk_d_im * inv_valid, slow_re, slow_im,
                blk_mag2 * inv_valid, line_alpha_b)
        if blk_unit > 0.0:
            lp_re += lp_beta_b * (blk_u_re / blk_unit - lp_re)
            lp_im += lp_beta_b * (blk_u_im / blk_unit - lp_im)

        # --- moments (M2M4) and the level-step restart; detector normalisation
        if blk_valid > 0.0:
            if mw > 0.0:
                # a lasting level step of 6 dB or more (a signal appearing or fading,
                # a gain change): the old moments describe another signal, so the
                # amplitude estimate starts again (the loop coasts until it settles)
                fast_m2 = decay_f * fast_m2 + blk_fast
                fw = fast_m2 * mw
                if fw > LEVEL_STEP * m2 or fw * LEVEL_STEP < m2:
                    m2 = 0.0
                    m4 = 0.0
                    mw = 0.0
                    cap = 0.0
                    norm_left = 0.0
                    line_re = 0.0
                    line_im = 0.0
                    slow_line_re = 0.0
                    slow_line_im = 0.0
                    line_w = 0.0
                    line_p = 0.0
            else:
                fast_m2 = blk_p / blk_valid
            m2 = decay_m * m2 + blk_m2
            m4 = decay_m * m4 + blk_m4
            mw = decay_m * mw + blk_mw
            if norm_left <= 0.0 or mw < MW_SETTLED:
                inv_rms, cap, inv_norm, line_on = normalisation(
                    m2, m4, mw, locked, line_re, line_im, slow_line_re, slow_line_im, line_w,
                    line_p, line_alpha, sig2_floor, power)
                norm_left = NORM_BLOCK

        # --- cycle slips. Two trackers, both updated every block:
        #  - the reference: a slow 3rd-order tracker of the unwrapped NCO phase (noise-proof,
        #    decides while the signal is weak);
        #  - the detector angle: the unwrapped angle of the low-passed detector phasor (follows
        #    whatever the loop follows, decides while the signal is strong).
        slip_pos += block
        if slip_pos >= lp_decim:
            slip_pos = 0.0
            psi, psi_last, psi_ref, angle_counts, slip = angle_slip(
                lp_re, lp_im, psi, psi_last, psi_ref, angle_counts, locked, strong, lp_beta)
            if slip != 0.0:
                slips += slip
                n_slips = _record_slip(slip_at, slip_count, n_slips, last, slip)
        if locked > 0.0:
            g1, g2, g3 = reference_gains(params, ref_age)
            ref_r, ref_f, ref_a, slow_re, slow_im, slip = reference_slip(
                ref_r, ref_f, ref_a, slow_re, slow_im, nco_step, g1, g2, g3, strong, acc2, power,
                block)
            if slip != 0.0:
                slips += slip
                n_slips = _record_slip(slip_at, slip_count, n_slips, last, slip)

        # --- lock indicator: decide at the end of each window
        lock_pos += block
        if lock_pos == quarter_1 or lock_pos == quarter_2 or lock_pos == quarter_3 or \
                lock_pos >= lock_window:
            q = (4 * (int(lock_pos) - 1)) // window_int          # the quarter just finished
            quarters[q] = free_i
            quarters[4 + q] = free_q
            free_i = 0.0
            free_q = 0.0
        if lock_pos >= lock_window:
            was_locked = locked
            ref_age += 1.0
            mean_step = win_steps / lock_window
            slope = (mean_step - prev_step) / lock_window
            # the window that begins at a re-steer holds the loop's pull-in: its mean step is
            # not the carrier's frequency, nor its change against the window before a rate
            steady = since_steer >= 1.0
            if since_steer < 2.0:
                slope = 0.0
            since_steer += 1.0
            prev_step = mean_step
            free_level, free_trend, free_a, free_f = reference_rate(
                mean_step, free_level, free_trend, nco_rel_re, nco_rel_im, strong, locked,
                lock_window, power)
            free_re, free_im = turn_reference(free_re, free_im, nco_rel_re, nco_rel_im)
            nco_rel_re = 0.0
            nco_rel_im = 0.0
            win_steps = 0.0
            if lock_n >= 0.5 * lock_window:
                metric, now = window_verdict(quarters, lock_window, locked, lock_ref,
                                             on_table, off_table)
                if locked > 0.0:
                    locked = 1.0 if now else 0.0
                elif now:
                    # lock declared: the loop sits at a stable point; start the slip
                    # reference on the NCO's mean frequency and rate over the last windows,
                    # and measure the M-th power line afresh (it rotated while unlocked)
                    locked = 1.0
                    line_re = 0.0
                    line_im = 0.0
                    slow_line_re = 0.0
                    slow_line_im = 0.0
                    line_w = 0.0
                    line_p = 0.0
                    ref_r = 0.0
                    slow_re = 1.0
                    slow_im = 0.0
                    ref_f = mean_step + 0.5 * lock_window * slope if steady else acc1
                    ref_a = acc2 if k3 > 0.0 else slope    # a 3rd-order loop knows the rate
                    ref_age = 0.0
            if locked != was_locked:
                lock_at[n_locks] = last + 1
                lock_to[n_locks] = 1 if locked > 0.0 else 0
                lock_freq[n_locks] = acc1 + step_in_freq * last_step
                n_locks += 1
            quarters[:] = 0.0
            lock_n = 0.0
            lock_pos = 0.0
            if mw >= MW_SETTLED:      # keep the last verdict while the moments restart
                strong = loop_snr(m2 / mw, m4 / mw, power, bt) >= STRONG_LOOP_SNR
        if stop_every > 0:
            while next_stop < n:
                next_stop += stop_every
            if n == next_stop:
                next_stop += stop_every
                if locked <= 0.0:
                    processed = n
                    break
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
    state[S_FREE_RE] = free_re
    state[S_FREE_IM] = free_im
    state[S_FREE_I] = free_i
    state[S_FREE_F] = free_f
    state[S_FREE_A] = free_a
    state[S_FREE_Q] = free_q
    state[S_FREE_LEVEL] = free_level
    state[S_NCO_REL_RE] = nco_rel_re
    state[S_NCO_REL_IM] = nco_rel_im
    state[S_FREE_TREND] = free_trend
    state[S_LINE_RE] = line_re
    state[S_LINE_IM] = line_im
    state[S_SLOW_LINE_RE] = slow_line_re
    state[S_SLOW_LINE_IM] = slow_line_im
    state[S_LINE_W] = line_w
    state[S_LINE_P] = line_p
    state[S_LINE_ON] = line_on
    state[S_LOCK_N] = lock_n
    state[S_LOCK_POS] = lock_pos
    state[S_LOCKED] = locked
    state[S_METRIC] = metric
    state[S_REF_R] = ref_r
    state[S_SLOW_RE] = slow_re
    state[S_SLOW_IM] = slow_im
    state[S_REF_F] = ref_f
    state[S_REF_A] = ref_a
    state[S_SLIPS] = slips
    state[S_FAST_M2] = fast_m2
    state[S_PH_RE] = ph_re
    state[S_PH_IM] = ph_im
    state[S_PM_RE] = pm_re
    state[S_PM_IM] = pm_im
    state[S_NCO_REF] = nco_ref
    state[S_NCO_LEFT] = nco_left
    state[S_NORM_LEFT] = norm_left
    state[S_INV_RMS] = inv_rms
    state[S_INV_NORM] = inv_norm
    state[S_CAP] = cap
    state[S_WIN_STEPS] = win_steps
    state[S_PREV_STEP] = prev_step
    state[S_SINCE_STEER] = since_steer
    state[S_REF_AGE] = ref_age
    state[S_LP_RE] = lp_re
    state[S_LP_IM] = lp_im
    state[S_PSI] = psi
    state[S_PSI_LAST] = psi_last
    state[S_PSI_REF] = psi_ref
    state[S_SLIP_POS] = slip_pos
    state[S_STRONG] = 1.0 if strong else 0.0
    state[S_ANGLE_COUNTS] = angle_counts
    state[S_BLOCK_LEN] = block
    state[S_BLOCK_POS] = block_pos
    state[S_BLOCK_OPEN] = block_open
    return processed, n_slips, n_locks
