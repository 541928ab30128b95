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

Default thresholds (:func:`default_thresholds`): lock at ``P_FA = 1e-6`` per
window, release at ``P_FA = 1e-2`` per window (a noise-only window keeps a lock
with probability at most 1e-2).

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
``window_sums`` (sums of whole windows, SIMD), ``hysteresis`` and
``decide_windows`` (metric, Es/N0 and decisions of completed windows).
"""

from math import sqrt

import numpy as np
from numba import njit, vectorize
from scipy import special, stats

from ._numeric import unit_pair_power

#: Per-window false-lock probability the default lock threshold is set for.
DEFAULT_LOCK_P_FA = 1e-6
#: Per-window probability that noise alone holds a declared lock (default unlock threshold).
DEFAULT_UNLOCK_P_FA = 1e-2
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


#: numba flags of the window sums: reassociation lets the sums use SIMD lanes. The
#: grouping then depends only on a sample's position in its window, never on where a
#: call starts, so a window's sums are the same whatever the stream's chunking.
#: No ``nnan``/``ninf``: the gap test must see NaN and Inf. Inlined functions are
#: compiled with their caller's flags, so ``window_sums`` carries them too.
_SIMD_MATH = {"reassoc", "contract", "nsz", "arcp"}


@njit(cache=True, inline="always", fastmath=_SIMD_MATH, error_model="numpy")
def _one_window(xs, power, rot_re, rot_im):
    """Sums (projection, |y|^2, |y|^4, valid count) of one window given as interleaved
    float32 I/Q ``xs``. Branch-free (gaps are masked, not skipped) so that it vectorises."""
    s_proj = 0.0
    s_m2 = 0.0
    s_m4 = 0.0
    s_valid = 0.0
    for i in range(xs.shape[0] // 2):
        zr = np.float64(xs[2 * i])
        zi = np.float64(xs[2 * i + 1])
        p = zr * zr + zi * zi
        ok = (p > 0.0) & (p < np.inf)
        zr = zr if ok else 0.0
        zi = zi if ok else 0.0
        p = p if ok else 0.0
        ur, ui = unit_pair_power(zr, zi, p if ok else 1.0, power)
        s_proj += ur * rot_re - ui * rot_im
        s_m2 += p
        s_m4 += p * p
        s_valid += 1.0 if ok else 0.0
    return s_proj, s_m2, s_m4, s_valid


@njit(nogil=True, cache=True, fastmath=_SIMD_MATH, error_model="numpy")
def window_sums(x, power, rot_re, rot_im, window, proj, m2, m4, valid):
    """Lock-statistic and moment sums of the whole windows of ``window`` samples in ``x``.

    ``x`` (complex64) starts on a window boundary; window k covers
    ``x[k window:(k + 1) window]``; a trailing part shorter than a window is not
    used (the lock detector only ever passes whole windows). For each window writes
    its sums (not means) to ``proj``, ``m2``, ``m4`` and its number of valid samples
    to ``valid`` (each at least ``len(x) // window`` long); returns the number of
    windows. A window's sums depend only on its own samples (bit for bit), so any
    split of a stream at window boundaries gives the same results. Gap samples
    (NaN, Inf, 0) count toward the window length but add nothing.
    """
    xf = x.view(np.float32)
    count = x.shape[0] // window
    for k in range(count):
        xs = xf[2 * k * window:2 * (k + 1) * window]
        if power == 1:                 # constant M for the common cases: straight-line code
            sums = _one_window(xs, 1, rot_re, rot_im)
        elif power == 2:
            sums = _one_window(xs, 2, rot_re, rot_im)
        elif power == 4:
            sums = _one_window(xs, 4, rot_re, rot_im)
        elif power == 8:
            sums = _one_window(xs, 8, rot_re, rot_im)
        else:
            sums = _one_window(xs, power, rot_re, rot_im)
        proj[k], m2[k], m4[k], valid[k] = sums
    return count


@njit(nogil=True, cache=True)
def hysteresis(metric, lock_threshold, unlock_threshold, locked, out):
    """Lock decisions for successive window metrics with hysteresis.

    Unlocked -> locked when ``metric >= lock_threshold``; locked -> unlocked when
    ``metric < unlock_threshold`` (NaN metrics unlock). ``locked`` is the state
    before the first window; ``out[k]`` receives the state after window k.
    Returns the final state.
    """
    state = locked
    for k in range(metric.shape[0]):
        m = metric[k]
        if state:
            if not m >= unlock_threshold:
                state = False
        elif m >= lock_threshold:
            state = True
        out[k] = state
    return state


@njit(nogil=True, cache=True)
def decide_windows(proj, m2, m4, valid, count, window, lock_threshold, unlock_threshold, locked,
                   metric, esn0_db_out, decisions):
    """Finish ``count`` windows from :func:`window_sums`: ``metric = proj / window``,
    M2M4 Es/N0 in dB from the valid samples (NaN if none), and the lock decisions
    with :func:`hysteresis` starting from ``locked``. Returns the final state."""
    for k in range(count):
        metric[k] = proj[k] / window
        if valid[k] > 0.0:
            esn0_db_out[k] = esn0_db_scalar(m2m4_esn0_scalar(m2[k] / valid[k], m4[k] / valid[k]))
        else:
            esn0_db_out[k] = np.nan
    return hysteresis(metric[:count], lock_threshold, unlock_threshold, locked, decisions[:count])


__all__ = [
    "DEFAULT_LOCK_P_FA", "DEFAULT_UNLOCK_P_FA", "ESN0_DB_MIN", "ESN0_DB_MAX",
    "noise_std", "false_lock_threshold", "false_lock_probability", "default_thresholds",
    "c_m", "projection_variance", "detection_probability",
    "m2m4_esn0_scalar", "esn0_db_scalar", "m2m4_esn0", "esn0_db",
    "unit_projection", "window_sums", "hysteresis", "decide_windows",
]
