# SPDX-License-Identifier: GPL-3.0-or-later
"""Wide frequency acquisition: the carrier offset from the spectrum of z^M.

Raising M-PSK samples to the M-th power strips the modulation and leaves a
tone at M times the carrier offset. Its frequency is estimated from a
zero-padded periodogram with parabolic interpolation of the peak (close to
the Rife & Boorstyn bound above threshold), divided by M. The estimate is
unambiguous within +-sample_rate/(2M).

A tone is only reported when the peak stands out of the noise: the peak
periodogram bin, divided by the mean bin power, must exceed
``ln(bins / p_false)``, the level that exponential (noise-only) bins exceed
with probability ``p_false`` in all.
"""

from math import log

import numpy as np

#: zero-padding factor of the periodogram
PADDING = 4
#: probability that noise alone produces a reported tone, per estimate
P_FALSE_TONE = 1e-3


def fft_length(noise_bw_hz, sample_rate, minimum=4096, maximum=1 << 20):
    """FFT length (power of two) for acquisition: at least 4 / (B_L T) and 4096 samples.

    With that length the z^M bin spacing divided by M is at most B_L/4 in the
    carrier domain for M >= 1, so the interpolated estimate lands well inside
    the loop's lock-in range (about 0.4 B_L for zeta = 0.707). The floor of
    4096 keeps the lock indicator's window (a quarter of this) long enough to
    see lock at low SNR.
    """
    n = 4.0 * sample_rate / noise_bw_hz
    return int(min(maximum, max(minimum, 1 << int(np.ceil(np.log2(n))))))


def estimate_offset(x, power, sample_rate, max_offset_hz=None, p_false=P_FALSE_TONE):
    """Carrier offset (Hz) of ``x`` from the spectrum of x^M, or ``None`` if no tone.

    Parameters
    ----------
    x : complex array        samples (non-finite values are ignored)
    power : int              symmetry order M
    sample_rate : float      samples/s
    max_offset_hz : float    only offsets within +-this are searched
                             (default and maximum sample_rate/(2M))
    p_false : float          probability of reporting a tone on noise alone
    """
    z = np.asarray(x, dtype=np.complex128)
    z = np.where(np.isfinite(z), z, 0.0)
    rms = np.sqrt(np.mean(np.abs(z) ** 2))
    if rms == 0.0:
        return None
    zm = (z / rms) ** power
    n = len(zm)
    nfft = PADDING * n
    spec = np.abs(np.fft.fft(zm, nfft)) ** 2
    f_bins = np.fft.fftfreq(nfft, d=1.0 / sample_rate)        # frequency of z^M, Hz
    limit = sample_rate / (2.0 * power) if max_offset_hz is None else max_offset_hz
    allowed = np.abs(f_bins) <= power * limit
    masked = np.where(allowed, spec, -1.0)
    k = int(np.argmax(masked))
    noise_level = np.mean(spec)                                # mean bin power
    if spec[k] < log(n / p_false) * noise_level:
        return None
    # parabolic interpolation of the peak on the log magnitude
    lm, l0, lp = (np.log(max(spec[(k + d) % nfft], 1e-300)) for d in (-1, 0, 1))
    denom = lm - 2.0 * l0 + lp
    delta = 0.0 if denom == 0.0 else 0.5 * (lm - lp) / denom
    f = (f_bins[k] + delta * sample_rate / nfft) / power
    return float(np.clip(f, -limit, limit))
