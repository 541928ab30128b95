# SPDX-License-Identifier: GPL-3.0-or-later
"""Lock statistic and Es/N0 estimate shared by the lock detector and the loops.

The lock statistic over a window of N samples y_k (carrier already removed,
one constellation point at ``point_angle``) is the phase-only projection::

    P = (1/N) sum_k cos(M (arg y_k - point_angle))
      = (1/N) sum_k Re( (y_k/|y_k|)^M e^{-j M point_angle} )

It is ~1 when locked at high SNR and ~0 on noise or on a signal that rotates
against the reference. Its theory (REFERENCES 7.1-7.2):

* locked with phase error phi at Es/N0 = rho: mean ``cos(M phi) c_M(rho)`` with
  ``c_M(rho) = (sqrt(pi rho)/2) e^{-rho/2} [I_{(M-1)/2}(rho/2) + I_{(M+1)/2}(rho/2)]``
  (Fourier coefficient of the phase pdf of a tone in Gaussian noise), per-sample
  variance ``(1 + cos(2M phi) c_2M)/2 - cos^2(M phi) c_M^2``;
* noise only: arg y is uniform, so for every M the mean is 0 and the variance of
  P is exactly ``1/(2N)``. With the Gaussian approximation of the window mean,
  the threshold exceeded with probability P_FA is
  ``gamma = Qinv(P_FA) / sqrt(2N)``.

Why the threshold is referenced to the measured noise. ``1/(2N)`` holds only
when successive samples are independent. A real receiver's noise is band-limited
(matched filter, channel filter, oversampling), so successive phases are
correlated and the window mean of N samples has a larger variance,
``(1/(2N)) sum_tau rho_M(tau)``: a threshold set for white noise then declares
false locks far more often than stated (1e-3 to 1e-2 per window instead of 1e-6
at 4-8 samples per symbol). The null scale of P is therefore measured on the
noise actually present, from the windows' own samples: with s_0..s_3 the means of
the phasor (y/|y|)^M rot over the four quarters of the window, the three contrasts
``s_0 - s_1``, ``s_2 - s_3`` and ``(s_0 + s_1)/2 - (s_2 + s_3)/2``, each scaled so
that on white noise its variance is that of P (:func:`null_contrasts`), are
orthogonal to the window mean: a signal that stands still against the reference
(a locked carrier, including its static phase error and the loop's phase offset
at the window start) adds nothing to them, and one that turns slowly within the
window adds nothing to first order once they are projected on the direction of
the window's mean phasor (:func:`null_contrasts`), while noise gives them the variance of
P whatever its spectrum, as long as it is correlated over much fewer samples than
a quarter window (for a correlation length L the scale comes out low by about
L / (window / 4) in variance; at 16 samples per symbol through a 1024-sample loop
window, a few per cent; with quarters of only a few tens of samples the projection
on the window's direction lowers it by up to about 2 %, measured at 16 samples per
quarter). The scale is the lower median of the squared contrasts of the
earlier windows, the last K = REFERENCE_VALUES = 96 of them (32 windows), rather
than their mean, so that the windows of a strong signal still rotating against
the reference (a loop pulling in), whose contrasts are large, cannot hold the
threshold up once they are a minority. With the Gaussian approximation of the
window means, the factor c_k with ``P(P >= c_k scale) = P_FA`` for a scale from k
contrasts follows from the distribution of that order statistic by numerical
integration (``coherer._lock_factors``). The lock threshold is
``max(Qinv(P_FA)/sqrt(2N), c_k scale)`` (:func:`update_lock`): the white-noise
value is a floor, the second term takes over on coloured noise. Referencing a
detection threshold to the measured noise is constant-false-alarm practice
(radar and satellite-navigation lock detectors; common practice). c_96 at 1e-6
puts the threshold at 5.65 noise standard deviations, 19 % above the Gaussian
4.75 for white noise; with fewer contrasts the factor for their number is used,
and the first window of a stream never declares lock (three contrasts say
little), so at a strong signal the first lock comes after two to four windows.

Default thresholds (:func:`default_thresholds`, the white-noise floors): lock at
``P_FA = 1e-6`` per window, release at ``P_FA = 1e-2`` per window (a noise-only
window keeps a lock with probability at most 1e-2).

Oversampled input. With ``sps`` samples per symbol the statistics are taken on
the symbol-spaced samples of one timing phase: the phase of largest mean power,
averaged over windows (the most open eye after a matched filter, where the
samples are ISI-free and their noise white, since the raised-cosine pulse is
Nyquist). Metric, thresholds (N = symbols per window), detection probability
and Es/N0 are then those of the symbols.

Es/N0 uses the M2M4 moment estimator (Pauluzzi & Beaulieu 2000, complex
constant-modulus signal in complex AWGN)::

    S = sqrt(2 M2^2 - M4)  (clipped at 0),  N = M2 - S,  Es/N0 = S / N

Samples that are NaN, Inf or exactly zero are gaps: they count as window
samples (so windows stay aligned to absolute stream offsets) but add nothing to
any sum. P is still normalised by the full window, which only lowers the
noise-only variance, so the false-lock probability stays at or below P_FA; the
moments are normalised by the number of valid samples.

API
---
``noise_std(window)``, ``false_lock_threshold(window, p_fa)``,
``false_lock_probability(window, threshold)``, ``default_thresholds(window)``,
``c_m(power, esn0)``, ``projection_variance(power, esn0, phase_error)``,
``detection_probability(power, esn0, window, threshold, phase_error)``,
``m2m4_esn0(m2, m4)``, ``esn0_db(esn0)`` (element-wise; their scalar numba
forms ``m2m4_esn0_scalar``, ``esn0_db_scalar`` can be called from kernels);
numba kernels ``unit_projection`` (one sample, for use inside other kernels),
``window_sums`` (sums of whole windows per timing phase, SIMD at one sample per
symbol), ``update_lock`` (the one lock rule, also called by the loop kernel),
``decide_windows`` (metric, Es/N0 and decisions of completed windows);
``null_contrasts`` (the noise measure); ``threshold_table``, ``new_noise_reference`` build
their inputs.
"""

from math import sqrt

import numpy as np
from numba import njit, vectorize
from scipy import special, stats

from . import _lock_factors
from ._numeric import SIMD_MATH, masked_sample, unit_pair_power

#: Per-window false-lock probability the default lock threshold is set for.
DEFAULT_LOCK_P_FA = 1e-6
#: Per-window probability that noise alone holds a declared lock (default unlock threshold).
DEFAULT_UNLOCK_P_FA = 1e-2
#: Null contrasts (three per window) that measure the null scale of the lock statistic.
REFERENCE_VALUES = _lock_factors.REFERENCE_VALUES
#: Per-window probabilities for which noise-referenced thresholds are tabulated.
NOISE_REFERENCED_P_FA = tuple(sorted(_lock_factors.FACTORS))
#: Null contrasts each window adds to the noise reference.
CONTRASTS_PER_WINDOW = 3
#: Weight of a new window in the per-phase power average that picks the timing phase.
PHASE_AVERAGING = 0.125
#: Reported Es/N0 is clamped to this range, dB (the estimate is +-inf at the extremes).
ESN0_DB_MIN = -60.0
ESN0_DB_MAX = 100.0

# --- thresholds ---------------------------------------------------------------------

def noise_std(window):
    """Standard deviation of P on noise-only input, ``1/sqrt(2N)`` (exact, any M)."""
    return 1.0 / sqrt(2.0 * window)


def false_lock_threshold(window, p_fa):
    """Threshold on P exceeded by noise alone with probability ``p_fa`` per window:
    ``gamma = Qinv(p_fa) / sqrt(2 N)`` (REFERENCES 7.2, Gaussian approximation)."""
    if not 0.0 < p_fa <= 0.5:
        raise ValueError(f"p_fa must be in (0, 0.5], got {p_fa!r}")
    return float(stats.norm.isf(p_fa)) * noise_std(window)


def false_lock_probability(window, threshold):
    """Per-window probability that noise alone gives ``P >= threshold``: ``Q(threshold sqrt(2N))``."""
    return float(stats.norm.sf(threshold / noise_std(window)))


def threshold_table(window, p_fa, threshold=None):
    """Threshold table for :func:`update_lock` (float64 array of REFERENCE_VALUES + 1).

    ``t[0]`` is the white-noise threshold ``Qinv(p_fa)/sqrt(2N)`` (or the fixed
    ``threshold`` when given), ``t[k]`` (k = 1..REFERENCE_VALUES) the factor on the
    measured null scale (the lower median of k squared null contrasts) exceeded by
    noise alone with probability ``p_fa`` (``coherer._lock_factors``; 0 when a fixed
    threshold is given, which then rules alone). ``p_fa`` is one of
    ``NOISE_REFERENCED_P_FA`` unless a fixed threshold is given.
    """
    t = np.zeros(REFERENCE_VALUES + 1)
    if threshold is None:
        if p_fa not in _lock_factors.FACTORS:
            raise ValueError(f"p_fa must be one of {NOISE_REFERENCED_P_FA} for a noise-referenced "
                             f"threshold, got {p_fa!r}")
        t[0] = false_lock_threshold(window, p_fa)
        t[1:] = _lock_factors.FACTORS[p_fa]
    else:
        t[0] = float(threshold)
    return t


def new_noise_reference():
    """An empty noise reference for :func:`update_lock`: [count, position, ring of
    REFERENCE_VALUES squared null contrasts, the same values in ascending order]."""
    return np.zeros(2 * REFERENCE_VALUES + 2)


def default_thresholds(window):
    """``(lock, unlock)`` thresholds for a window of ``window`` samples.

    lock   = Qinv(1e-6) / sqrt(2N)  (= 4.7534 / sqrt(2N)): noise-only false lock <= 1e-6 per window;
    unlock = Qinv(1e-2) / sqrt(2N)  (= 2.3263 / sqrt(2N)): noise holds a lock with probability <= 1e-2.
    """
    return (false_lock_threshold(window, DEFAULT_LOCK_P_FA),
            false_lock_threshold(window, DEFAULT_UNLOCK_P_FA))


# --- statistics of P on a signal -----------------------------------------------------

def c_m(power, esn0):
    """Mean of cos(M (arg y - theta)) for a tone at Es/N0 ``esn0`` (linear), REFERENCES 7.1.

    ``c_M(rho) = (sqrt(pi rho)/2) e^{-rho/2} [I_{(M-1)/2}(rho/2) + I_{(M+1)/2}(rho/2)]``,
    evaluated with exponentially scaled Bessel functions. Works element-wise on arrays.
    """
    rho = np.asarray(esn0, dtype=np.float64)
    half = 0.5 * rho
    value = 0.5 * np.sqrt(np.pi * rho) * (special.ive(0.5 * (power - 1), half) +
                                          special.ive(0.5 * (power + 1), half))
    return float(value) if value.ndim == 0 else value


def projection_variance(power, esn0, phase_error=0.0):
    """Per-sample variance of cos(M(arg y - theta^)):
    ``(1 + cos(2M phi) c_2M)/2 - cos^2(M phi) c_M^2`` (REFERENCES 7.1). ``esn0`` linear."""
    c1 = c_m(power, esn0)
    c2 = c_m(2 * power, esn0)
    cm = np.cos(power * phase_error)
    return 0.5 * (1.0 + np.cos(2 * power * phase_error) * c2) - (cm * c1) ** 2


def detection_probability(power, esn0, window, threshold, phase_error=0.0):
    """Gaussian-approximation probability that one window gives ``P >= threshold``
    (REFERENCES 7.2): ``Q((threshold - cos(M phi) c_M) / sqrt(var / N))``."""
    mean = np.cos(power * phase_error) * c_m(power, esn0)
    std = np.sqrt(projection_variance(power, esn0, phase_error) / window)
    return stats.norm.sf((threshold - mean) / std)


# --- M2M4 --------------------------------------------------------------------------

@njit(nogil=True, cache=True)
def m2m4_esn0_scalar(m2, m4):
    """M2M4 Es/N0 (linear) from ``M2 = mean|y|^2`` and ``M4 = mean|y|^4`` (Pauluzzi & Beaulieu 2000).

    ``S = sqrt(max(2 M2^2 - M4, 0))``, ``N = M2 - S``, result ``S / N``; ``inf`` when
    N <= 0 (no noise seen), NaN unless M2 is a positive finite number.
    """
    if not (m2 > 0.0 and m2 < np.inf):
        return np.nan
    s2 = 2.0 * m2 * m2 - m4
    s = np.sqrt(s2) if s2 > 0.0 else 0.0
    n = m2 - s
    if n <= 0.0:
        return np.inf
    return s / n


@njit(nogil=True, cache=True)
def esn0_db_scalar(esn0):
    """10 log10 of a linear Es/N0, clamped to [ESN0_DB_MIN, ESN0_DB_MAX] dB; NaN stays NaN."""
    if np.isnan(esn0):
        return np.nan
    if esn0 <= 0.0:
        return ESN0_DB_MIN
    return min(max(10.0 * np.log10(esn0), ESN0_DB_MIN), ESN0_DB_MAX)


_m2m4_ufunc = vectorize(["float64(float64, float64)"], cache=True)(m2m4_esn0_scalar.py_func)
_esn0_db_ufunc = vectorize(["float64(float64)"], cache=True)(esn0_db_scalar.py_func)


def m2m4_esn0(m2, m4):
    """Element-wise :func:`m2m4_esn0_scalar` (float for scalar input, else an array)."""
    r = _m2m4_ufunc(np.asarray(m2, dtype=np.float64), np.asarray(m4, dtype=np.float64))
    return float(r) if np.ndim(r) == 0 else r


def esn0_db(esn0):
    """Element-wise :func:`esn0_db_scalar` (float for scalar input, else an array)."""
    r = _esn0_db_ufunc(np.asarray(esn0, dtype=np.float64))
    return float(r) if np.ndim(r) == 0 else r


# --- numba kernels ----------------------------------------------------------------

@njit(nogil=True, cache=True)
def unit_projection(z, power, rot):
    """``Re((z/|z|)^M rot)`` for one sample (``rot = e^{-j M point_angle}``);
    returns ``(value, valid)``, value 0 and valid False for NaN, Inf or zero ``z``."""
    zr = np.float64(z.real)
    zi = np.float64(z.imag)
    p = zr * zr + zi * zi
    if not (p > 0.0 and p < np.inf):
        return 0.0, False
    ur, ui = unit_pair_power(zr, zi, p, power)
    return ur * rot.real - ui * rot.imag, True


# The window sums run with ``_numeric.SIMD_MATH``; inlined functions are compiled with
# their caller's flags, so ``window_sums`` carries them too.

#: Fields of the per-window, per-phase sums written by :func:`window_sums`: in-phase and
#: quadrature projection, |y|^2, |y|^4, valid count, then the in-phase (SUM_I0 + j) and
#: quadrature (SUM_Q0 + j) projection of each quarter j of the window (positions i with
#: ``(4 i) // window == j``).
SUM_I, SUM_Q, SUM_M2, SUM_M4, SUM_VALID = range(5)
SUM_I0 = 5
SUM_Q0 = 9
SUM_FIELDS = 13


@njit(cache=True, inline="always", fastmath=SIMD_MATH, error_model="numpy")
def _one_window(xs, power, rot_re, rot_im):
    """Sums (in-phase and quadrature projection, |y|^2, |y|^4, valid count) of one stretch
    given as interleaved float32 I/Q ``xs``. Branch-free (gaps are masked, not skipped)
    so that it vectorises."""
    s_i = 0.0
    s_q = 0.0
    s_m2 = 0.0
    s_m4 = 0.0
    s_valid = 0.0
    for i in range(xs.shape[0] // 2):
        zr, zi, p, ok = masked_sample(xs, i)
        ur, ui = unit_pair_power(zr, zi, p if ok else 1.0, power)
        s_i += ur * rot_re - ui * rot_im
        s_q += ur * rot_im + ui * rot_re
        s_m2 += p
        s_m4 += p * p
        s_valid += 1.0 if ok else 0.0
    return s_i, s_q, s_m2, s_m4, s_valid


@njit(cache=True, inline="always")
def quarter_start(j, window):
    """First position of quarter ``j`` (0..4) of a window: ``ceil(j window / 4)``."""
    return -((-j * window) // 4)


@njit(cache=True, inline="always", fastmath=SIMD_MATH, error_model="numpy")
def _quartered_window(xs, power, rot_re, rot_im, window, out):
    """Sums of one window (interleaved float32 ``xs``) into ``out[:]`` (fields SUM_*),
    quarter by quarter."""
    for f in range(SUM_FIELDS):
        out[f] = 0.0
    for j in range(4):
        lo = quarter_start(j, window)
        hi = quarter_start(j + 1, window)
        r = _one_window(xs[2 * lo:2 * hi], power, rot_re, rot_im)
        out[SUM_I0 + j] = r[0]
        out[SUM_Q0 + j] = r[1]
        out[SUM_I] += r[0]
        out[SUM_Q] += r[1]
        out[SUM_M2] += r[2]
        out[SUM_M4] += r[3]
        out[SUM_VALID] += r[4]


@njit(cache=True, inline="always", error_model="numpy")
def _phased_window(x, power, rot_re, rot_im, sps, out):
    """Sums of one window (complex ``x``, first sample at timing phase 0) per timing phase
    ``k = position mod sps`` into ``out[k, :]`` (fields SUM_*)."""
    window = x.shape[0]
    for k in range(sps):
        for f in range(SUM_FIELDS):
            out[k, f] = 0.0
    for i in range(window):
        k = i % sps
        zr = np.float64(x[i].real)
        zi = np.float64(x[i].imag)
        p = zr * zr + zi * zi
        if p > 0.0 and p < np.inf:
            ur, ui = unit_pair_power(zr, zi, p, power)
            proj = ur * rot_re - ui * rot_im
            quad = ur * rot_im + ui * rot_re
            j = (4 * i) // window
            out[k, SUM_I] += proj
            out[k, SUM_Q] += quad
            out[k, SUM_I0 + j] += proj
            out[k, SUM_Q0 + j] += quad
            out[k, SUM_M2] += p
            out[k, SUM_M4] += p * p
            out[k, SUM_VALID] += 1.0


@njit(nogil=True, cache=True, fastmath=SIMD_MATH, error_model="numpy")
def window_sums(x, power, rot_re, rot_im, window, sps, sums):
    """Lock-statistic and moment sums of the whole windows of ``window`` samples in ``x``.

    ``x`` (complex64) starts on a window boundary; window k covers
    ``x[k window:(k + 1) window]``; a trailing part shorter than a window is not
    used. ``sums[k, ph, f]`` receives, for timing phase ``ph`` (sample position in
    the window modulo ``sps``; ``window`` is a multiple of ``sps``) the sums (not
    means) of the in-phase projection ``Re((y/|y|)^M rot)``, the quadrature one
    ``Im(...)``, |y|^2, |y|^4, the number of valid samples and the in-phase sums of
    the four quarters (fields SUM_*); it needs ``len(x) // window`` rows and ``sps``
    phases. Returns the number of windows. A window's sums depend only on its own
    samples (bit for bit), so any split of a stream at window boundaries gives the
    same results. Gap samples (NaN, Inf, 0) count toward the window length but add
    nothing.
    """
    count = x.shape[0] // window
    if sps > 1:
        for k in range(count):
            _phased_window(x[k * window:(k + 1) * window], power, rot_re, rot_im, sps, sums[k])
        return count
    xf = x.view(np.float32)
    for k in range(count):
        xs = xf[2 * k * window:2 * (k + 1) * window]
        out = sums[k, 0]
        if power == 1:                 # constant M for the common cases: straight-line code
            _quartered_window(xs, 1, rot_re, rot_im, window, out)
        elif power == 2:
            _quartered_window(xs, 2, rot_re, rot_im, window, out)
        elif power == 4:
            _quartered_window(xs, 4, rot_re, rot_im, window, out)
        elif power == 8:
            _quartered_window(xs, 8, rot_re, rot_im, window, out)
        else:
            _quartered_window(xs, power, rot_re, rot_im, window, out)
    return count


# --- the lock decision (shared by the lock detector and the loops' indicator) ---------

# layout of the noise reference: [count, position, ring of REFERENCE_VALUES squared contrasts,
# the ``count`` values held, in ascending order]
_REF_COUNT, _REF_POS, _REF_RING = range(3)


@njit(cache=True, inline="always")
def _ring_length(ref):
    """Values the noise reference ``ref`` holds at most (REFERENCE_VALUES)."""
    return (ref.shape[0] - _REF_RING) // 2


@njit(cache=True, inline="always")
def _phase_positions(lo, hi, phase, sps):
    """Positions i in [lo, hi) with ``i % sps == phase`` (lo, hi >= 0)."""
    return (hi - phase + sps - 1) // sps - (lo - phase + sps - 1) // sps


@njit(cache=True)
def null_contrasts(quarter_i, quarter_q, window, phase, sps):
    """The three null contrasts of a window from its quarter sums ``quarter_i``,
    ``quarter_q`` (arrays of 4: in-phase and quadrature projection of the timing phase
    ``phase`` of ``sps``; quarters as in :func:`window_sums`).

    The complex contrasts are first minus second quarter, third minus fourth, first
    minus second half: differences of means scaled by ``1/sqrt(N (1/n_a + 1/n_b))`` (N
    positions of the phase in the window, n_a, n_b in the parts) so that on white noise
    each has the variance of the metric, and orthogonal to the window mean. Each is
    returned projected on the direction of the window's mean phasor (the constellation
    axis if that is zero): a slow turn of the signal against the reference within the
    window moves the quarters across that direction and so drops out to first order,
    while on noise the direction is independent of the contrasts (orthogonal Gaussian
    sums), which keeps their null distribution. Returns ``(d1, d2, d3)``; NaN for a
    contrast with an empty part."""
    n = np.zeros(4)
    for j in range(4):
        n[j] = _phase_positions(quarter_start(j, window), quarter_start(j + 1, window), phase, sps)
    symbols = n[0] + n[1] + n[2] + n[3]
    w_re = quarter_i[0] + quarter_i[1] + quarter_i[2] + quarter_i[3]
    w_im = quarter_q[0] + quarter_q[1] + quarter_q[2] + quarter_q[3]
    mag = np.sqrt(w_re * w_re + w_im * w_im)
    if mag > 0.0:
        w_re /= mag
        w_im /= mag
    else:
        w_re = 1.0
        w_im = 0.0
    out = np.full(3, np.nan)
    parts = ((0, 1, 1, 2), (2, 3, 3, 4), (0, 2, 2, 4))    # [a0, a1) minus [b0, b1)
    for c in range(3):
        a0, a1, b0, b1 = parts[c]
        na = 0.0
        nb = 0.0
        sa_re = 0.0
        sa_im = 0.0
        sb_re = 0.0
        sb_im = 0.0
        for j in range(a0, a1):
            na += n[j]
            sa_re += quarter_i[j]
            sa_im += quarter_q[j]
        for j in range(b0, b1):
            nb += n[j]
            sb_re += quarter_i[j]
            sb_im += quarter_q[j]
        if na > 0.0 and nb > 0.0:
            g = 1.0 / np.sqrt(symbols * (1.0 / na + 1.0 / nb))
            d_re = (sa_re / na - sb_re / nb) * g
            d_im = (sa_im / na - sb_im / nb) * g
            out[c] = d_re * w_re + d_im * w_im
    return out[0], out[1], out[2]


@njit(cache=True)
def noise_scale(ref):
    """``(scale, count)`` of the noise reference ``ref`` (see :func:`new_noise_reference`):
    the square root of the lower median of the squared contrasts it holds, and their
    number (0: no scale yet, scale 0)."""
    count = int(ref[_REF_COUNT])
    if count == 0:
        return 0.0, 0
    lower = (count + 1) // 2 - 1             # the lower median's rank
    return np.sqrt(ref[_REF_RING + _ring_length(ref) + lower]), count


@njit(cache=True)
def push_contrast(ref, d):
    """Add one null contrast ``d`` (skipped unless finite) to the noise reference ``ref``."""
    if not np.isfinite(d):
        return
    k = _ring_length(ref)
    count = int(ref[_REF_COUNT])
    pos = int(ref[_REF_POS])
    v = d * d
    ordered = ref[_REF_RING + k:_REF_RING + 2 * k]
    held = count
    if count == k:
        # the ring is full: the value it overwrites leaves the ordered copy
        old = ref[_REF_RING + pos]
        j = 0
        while j < held - 1 and ordered[j] != old:
            j += 1
        for i in range(j, held - 1):
            ordered[i] = ordered[i + 1]
        held -= 1
    i = held
    while i > 0 and ordered[i - 1] > v:       # insertion into the ordered copy
        ordered[i] = ordered[i - 1]
        i -= 1
    ordered[i] = v
    ref[_REF_RING + pos] = v
    ref[_REF_POS] = (pos + 1) % k
    if count < k:
        ref[_REF_COUNT] = count + 1


@njit(cache=True)
def update_lock(locked, metric, d1, d2, d3, ref, on_table, off_table):
    """Lock decision after one window: the shared rule of every lock indicator here.

    ``metric`` is the window's in-phase mean of ``(y/|y|)^M rot``; ``d1, d2, d3`` its
    null contrasts (:func:`null_contrasts`); ``ref`` the noise reference of the
    earlier windows' contrasts (this window's are added afterwards, so the scale never
    contains the window it judges). A table ``t`` (from :func:`threshold_table`) gives
    the threshold ``max(t[0], t[k] * scale)`` with k the contrasts in the reference (no
    lock while it is empty, unless the table holds a fixed threshold): t[0] for white
    noise, t[k] the factor for the measured null scale.
    Unlocked -> locked when ``metric >= on``, locked -> unlocked when ``metric < off``
    (NaN unlocks). Returns the new state."""
    scale, count = noise_scale(ref)
    push_contrast(ref, d1)
    push_contrast(ref, d2)
    push_contrast(ref, d3)
    if locked:
        if count == 0:
            return metric >= off_table[0]
        off = max(off_table[0], off_table[count] * scale)
        return metric >= off
    if count == 0:
        if on_table[1] > 0.0:          # noise-referenced, and nothing measured yet
            return False
        return metric >= on_table[0]   # a fixed threshold
    on = max(on_table[0], on_table[count] * scale)
    return metric >= on


@njit(nogil=True, cache=True)
def decide_windows(sums, count, symbols, sps, ref, phase_power, on_table, off_table, locked,
                   metric, q_metric, esn0_db_out, decisions, phases):
    """Finish ``count`` windows from :func:`window_sums`.

    With ``sps > 1`` the timing phase of each window is the one of largest mean
    power, averaged over windows in ``phase_power`` (updated here; NaN entries mean
    no history yet); the statistics are those of that phase's ``symbols`` samples.
    Writes ``metric = I / symbols``, ``q_metric = Q / symbols``, the M2M4 Es/N0 in dB
    of the valid samples (NaN if none), the decision (:func:`update_lock`, starting
    from ``locked``) and the chosen phase. Returns the final state."""
    state = locked
    for k in range(count):
        best = 0
        if sps > 1:
            top = -1.0
            for ph in range(sps):
                v = sums[k, ph, SUM_VALID]
                if v > 0.0:
                    e = sums[k, ph, SUM_M2] / v
                    if np.isnan(phase_power[ph]):
                        phase_power[ph] = e
                    else:
                        phase_power[ph] += PHASE_AVERAGING * (e - phase_power[ph])
                if phase_power[ph] > top:
                    top = phase_power[ph]
                    best = ph
        s = sums[k, best]
        metric[k] = s[SUM_I] / symbols
        q_metric[k] = s[SUM_Q] / symbols
        if s[SUM_VALID] > 0.0:
            esn0_db_out[k] = esn0_db_scalar(m2m4_esn0_scalar(s[SUM_M2] / s[SUM_VALID],
                                                             s[SUM_M4] / s[SUM_VALID]))
        else:
            esn0_db_out[k] = np.nan
        d1, d2, d3 = null_contrasts(s[SUM_I0:SUM_I0 + 4], s[SUM_Q0:SUM_Q0 + 4], sps * symbols,
                                    best, sps)
        state = update_lock(state, metric[k], d1, d2, d3, ref, on_table, off_table)
        decisions[k] = state
        phases[k] = best
    return state


__all__ = [
    "DEFAULT_LOCK_P_FA", "DEFAULT_UNLOCK_P_FA", "ESN0_DB_MIN", "ESN0_DB_MAX",
    "noise_std", "false_lock_threshold", "false_lock_probability", "default_thresholds",
    "c_m", "projection_variance", "detection_probability",
    "m2m4_esn0_scalar", "esn0_db_scalar", "m2m4_esn0", "esn0_db",
    "REFERENCE_VALUES", "threshold_table", "new_noise_reference",
    "unit_projection", "window_sums", "quarter_start", "null_contrasts", "noise_scale", "push_contrast",
    "update_lock", "decide_windows",
]
