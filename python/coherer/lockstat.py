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
``m2m4_esn0(m2, m4)``, ``esn0_db(esn0)``; numba kernels ``unit_projection``
(one sample, for use inside other kernels), ``window_sums`` (chunks with
carried partial-window state) and ``hysteresis``.
"""

from math import sqrt

import numpy as np
from numba import njit
from scipy import special, stats

#: Per-window false-lock probability the default lock threshold is set for.
DEFAULT_LOCK_P_FA = 1e-6
#: Per-window probability that noise alone holds a declared lock (default unlock threshold).
DEFAULT_UNLOCK_P_FA = 1e-2
#: Reported Es/N0 is clamped to this range, dB (the estimate is +-inf at the extremes).
ESN0_DB_MIN = -60.0
ESN0_DB_MAX = 100.0

# acc[] layout of window_sums: partial sums of the window in progress -----------
A_PROJ = 0     # sum of cos(M (arg y - point_angle)) over valid samples
A_M2 = 1       # sum of |y|^2 over valid samples
A_M4 = 2       # sum of |y|^4 over valid samples
A_VALID = 3    # number of valid samples
A_FILL = 4     # number of samples (valid or gap) in the window so far
ACC_SIZE = 5


def new_accumulator():
    """Partial-window state for :func:`window_sums`: an empty window."""
    return np.zeros(ACC_SIZE, dtype=np.float64)


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

def m2m4_esn0(m2, m4):
    """M2M4 Es/N0 (linear) from ``M2 = mean|y|^2`` and ``M4 = mean|y|^4`` (Pauluzzi & Beaulieu 2000).

    ``S = sqrt(max(2 M2^2 - M4, 0))``, ``N = M2 - S``, result ``S / N``; ``inf`` when
    N <= 0 (no noise seen), NaN where M2 is not a positive number. Element-wise.
    """
    m2 = np.asarray(m2, dtype=np.float64)
    m4 = np.asarray(m4, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.sqrt(np.maximum(2.0 * m2 * m2 - m4, 0.0))
        n = m2 - s
        rho = np.where(n > 0.0, s / np.where(n > 0.0, n, 1.0), np.inf)
        rho = np.where(m2 > 0.0, rho, np.nan)
    return float(rho) if rho.ndim == 0 else rho


def esn0_db(esn0):
    """10 log10 of a linear Es/N0, clamped to [ESN0_DB_MIN, ESN0_DB_MAX] dB; NaN stays NaN."""
    with np.errstate(divide="ignore"):
        db = 10.0 * np.log10(np.asarray(esn0, dtype=np.float64))
    db = np.clip(db, ESN0_DB_MIN, ESN0_DB_MAX)
    return float(db) if db.ndim == 0 else db


# --- numba kernels ----------------------------------------------------------------

@njit(cache=True, inline="always")
def _unit_power(u, m):
    """u**m for a positive integer m by repeated squaring."""
    result = 1.0 + 0.0j
    base = u
    while m > 0:
        if m & 1:
            result *= base
        base *= base
        m >>= 1
    return result


@njit(nogil=True, cache=True)
def unit_projection(z, power, rot):
    """``Re((z/|z|)^M rot)`` for one sample (``rot = e^{-j M point_angle}``);
    returns ``(value, valid)``, value 0 and valid False for NaN, Inf or zero ``z``."""
    p = z.real * z.real + z.imag * z.imag
    if not np.isfinite(p) or p == 0.0:
        return 0.0, False
    r = np.sqrt(p)
    u = complex(z.real / r, z.imag / r)
    return (_unit_power(u, power) * rot).real, True


@njit(nogil=True, cache=True)
def window_sums(x, power, rot_re, rot_im, window, acc, proj, m2, m4, valid):
    """Accumulate lock-statistic and moment sums of ``x`` over windows of ``window`` samples.

    ``acc`` (see ``A_*``) carries the window in progress between calls, so any
    split of a stream gives the same windows. For each window completed in this
    call, writes its sums (not means) to ``proj``, ``m2``, ``m4`` and its number of
    valid samples to ``valid`` (each at least ``len(x) // window + 1`` long) and
    returns how many windows were completed. Gap samples (NaN, Inf, 0) count
    toward the window length but add nothing.
    """
    rot = complex(rot_re, rot_im)
    s_proj = acc[A_PROJ]
    s_m2 = acc[A_M2]
    s_m4 = acc[A_M4]
    s_valid = acc[A_VALID]
    fill = acc[A_FILL]
    done = 0
    for n in range(x.shape[0]):
        zr = np.float64(x[n].real)
        zi = np.float64(x[n].imag)
        p = zr * zr + zi * zi
        if np.isfinite(p) and p > 0.0:
            r = np.sqrt(p)
            u = complex(zr / r, zi / r)
            s_proj += (_unit_power(u, power) * rot).real
            s_m2 += p
            s_m4 += p * p
            s_valid += 1.0
        fill += 1.0
        if fill >= window:
            proj[done] = s_proj
            m2[done] = s_m2
            m4[done] = s_m4
            valid[done] = s_valid
            done += 1
            s_proj = 0.0
            s_m2 = 0.0
            s_m4 = 0.0
            s_valid = 0.0
            fill = 0.0
    acc[A_PROJ] = s_proj
    acc[A_M2] = s_m2
    acc[A_M4] = s_m4
    acc[A_VALID] = s_valid
    acc[A_FILL] = fill
    return done


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


__all__ = [
    "DEFAULT_LOCK_P_FA", "DEFAULT_UNLOCK_P_FA", "ESN0_DB_MIN", "ESN0_DB_MAX",
    "A_PROJ", "A_M2", "A_M4", "A_VALID", "A_FILL", "ACC_SIZE", "new_accumulator",
    "noise_std", "false_lock_threshold", "false_lock_probability", "default_thresholds",
    "c_m", "projection_variance", "detection_probability", "m2m4_esn0", "esn0_db",
    "unit_projection", "window_sums", "hysteresis",
]
