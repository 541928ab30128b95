# SPDX-License-Identifier: GPL-3.0-or-later
"""Noise of the line-normalised M-th power detector: V_M, the pulse-shape and residual-carrier
signal models and the exact low-frequency density S_e(0) (per sample; Es/N0 linear)."""

from dataclasses import dataclass
from functools import lru_cache
from math import comb, factorial, sqrt, pi

import numpy as np

from ..arguments import PLACEMENT_CHANNEL, PLACEMENT_MATCHED, is_real, validate_signal, validate_spec


def mth_power_noise(power, esn0):
    """``V_M = E|w|^2 = sum_k C(M,k)^2 k! s2^k`` with ``s2 = 1/(Es/N0)`` (linear Es/N0). REFERENCES 4."""
    s2 = 1.0 / esn0
    return sum(comb(power, k) ** 2 * factorial(k) * s2 ** k for k in range(1, power + 1))


# --- real receiver signals: pulse shape, band-limited noise, residual carrier -------------------
#
# The loops normalise their detector by the M-th power line itself, so the detector is
#     e[n] = Im(y[n]^M e^{-j M pa}) / L,   L = time mean of E[Re(y^M e^{-j M pa})] at zero phase error,
# with a mean slope of exactly M per rad of carrier phase for any signal shape. In the linear model
# the loop's phase-error variance is then  var(phi) = 2 (B_L T) S_e(0) / M^2,  where S_e(0) is the
# low-frequency spectral density (per sample) of the detector's fluctuation at zero phase error:
# the sum over all lags of its autocovariance, averaged over the symbol period (the signal is
# cyclostationary). For white noise at one sample per symbol S_e(0) = V_M / 2 (REFERENCES 4).

#: Span of the root-raised-cosine pulse in symbols (11 N + 1 taps, made odd, as CONVENTIONS 8).
RRC_SPAN_SYMBOLS = 11
#: Largest M for which the shaped-signal expectation uses the exp-log series of power sums (fast;
#: beyond it the series loses digits, relative 1e-5 of the pattern jitter for 8PSK, so the
#: symbol-by-symbol product is multiplied out instead: 0.7 s for 8PSK at 64 samples per symbol).
EXP_SERIES_MAX_POWER = 4


def _check_esn0(esn0):
    if not is_real(esn0) or not np.isfinite(esn0) or esn0 <= 0.0:
        raise ValueError(f"esn0 must be a positive finite linear Es/N0, got {esn0!r}")


def rrc_taps(samples_per_symbol, rolloff):
    """Root-raised-cosine pulse at ``samples_per_symbol`` samples per symbol, unit energy.

    ``RRC_SPAN_SYMBOLS * N + 1`` taps (made odd), centred: the closed form of the RRC impulse
    response (Proakis, Digital Communications, ch. 9, from memory) including its limits at t = 0 and
    t = +-T/(4 alpha). For roll-off > 0 it equals GNU Radio's
    ``firdes.root_raised_cosine(1, N, 1, rolloff, 11 N + 1)`` up to scale (checked in the tests);
    roll-off 0 (a truncated sinc), which that designer cannot make, is supported too.
    """
    validate_signal(2, samples_per_symbol, rolloff)
    n_sps, a = int(samples_per_symbol), float(rolloff)
    ntaps = RRC_SPAN_SYMBOLS * n_sps + 1
    ntaps += 1 - ntaps % 2
    t = (np.arange(ntaps) - (ntaps - 1) / 2.0) / n_sps            # time in symbols
    taps = np.empty(ntaps)
    for i, ti in enumerate(t):
        if ti == 0.0:
            taps[i] = 1.0 - a + 4.0 * a / pi
        elif a > 0.0 and abs(abs(4.0 * a * ti) - 1.0) < 1e-12:
            taps[i] = a / sqrt(2.0) * ((1.0 + 2.0 / pi) * np.sin(pi / (4.0 * a))
                                      + (1.0 - 2.0 / pi) * np.cos(pi / (4.0 * a)))
        else:
            taps[i] = (np.sin(pi * ti * (1.0 - a)) + 4.0 * a * ti * np.cos(pi * ti * (1.0 + a))) \
                / (pi * ti * (1.0 - (4.0 * a * ti) ** 2))
    return taps / sqrt(float(np.sum(taps * taps)))


def noise_variance_per_sample(esn0, samples_per_symbol=1, rolloff=0.35, placement=PLACEMENT_CHANNEL):
    """Complex noise variance per sample, as the loop sees it, of the pulse-shape model.

    With unit mean signal power per sample before any filter, Es = N (samples per symbol) and the
    white noise has complex variance ``N / esn0`` per sample (CONVENTIONS 8):

    * ``"matched"``: signal and noise pass the unit-energy matched filter g, which keeps the noise
      variance: ``N / esn0``;
    * ``"channel"``: only the noise is band-limited, by a filter of the RRC's shape normalised to unit
      gain at zero frequency, so the noise density at the carrier stays N0 and Es/N0 keeps its
      meaning: ``N / (esn0 (sum g)^2)``, about ``1 / esn0`` since ``(sum g)^2`` is about N.
    * one sample per symbol (the unshaped model): ``1 / esn0``.
    """
    _check_esn0(esn0)
    validate_signal(2, samples_per_symbol, rolloff, placement)
    n = int(samples_per_symbol)
    if n == 1:
        return 1.0 / esn0
    if placement == PLACEMENT_MATCHED:
        return n / esn0
    return n / (esn0 * float(np.sum(rrc_taps(n, rolloff))) ** 2)


def _log_bessel_series(order):
    """Coefficients c_1..c_order of ``log sum_a u^a / (a!)^2`` (that is log I0(2 sqrt(u)))."""
    f = [1.0 / factorial(a) ** 2 for a in range(order + 1)]
    c = [0.0] * (order + 1)
    for k in range(1, order + 1):
        c[k] = f[k] - sum(j * c[j] * f[k - j] for j in range(1, k)) / k
    return c


def _pulse_matrix(pulse, sps, rows):
    """``A[r, i] = pulse[rows[r] - i N + c]`` (0 outside the pulse) over every symbol index i that
    touches any of ``rows``; ``c`` centres the pulse (symbol i peaks at sample i N)."""
    lp = len(pulse)
    c = (lp - 1) // 2
    i_lo = -(-(rows[0] + c - (lp - 1)) // sps)
    i_hi = (rows[-1] + c) // sps
    sym = np.arange(i_lo, i_hi + 1)
    idx = rows[:, None] - sym[None, :] * sps + c
    inside = (idx >= 0) & (idx < lp)
    return np.where(inside, pulse[np.clip(idx, 0, lp - 1)], 0.0)


@dataclass(frozen=True, eq=False)
class _ShapedTerms:
    """SNR-independent pieces of the M-PSK detector statistics for one pulse and noise correlation,
    with the signal at unit mean power per sample (see :func:`_shaped_terms`)."""
    line: float                 #: L: time mean of E[y^M] e^{-jM pa}
    self_im: float              #: pattern-jitter density of Im(y^M e^{-jM pa}), per sample
    self_c: float               #: pattern-jitter density of the complex fluctuation of y^M
    noise_im: tuple             #: a_k, k = 1..M: density of Im(...) from noise, sum_k a_k v^k
    power_self: float           #: time mean of E|s^M|^2
    power_noise: tuple          #: b_k, k = 1..M: time mean of E|y^M|^2 = power_self + sum_k b_k v^k


def _shaped_statistics(power, sps, pulse, rho):
    """Exact expectation over M-PSK symbol patterns and circular Gaussian noise (no Monte Carlo).

    ``pulse``: the signal pulse (any scale; the signal is set to unit mean power per sample),
    ``rho``: the noise autocorrelation (odd length, centred, rho[0] = 1). Derivation [derived here]:
    with y = s + w, given the symbols the noise adds nothing to E[y^M] and
    ``E[y1^M conj(y2^M) | s] - s1^M conj(s2^M) = sum_k C(M,k)^2 k! r^k (s1 conj s2)^(M-k)``,
    ``E[y1^M y2^M | s] = s1^M s2^M`` (Isserlis, circular noise). Over i.i.d. M-PSK symbols only
    exponent patterns that cancel mod M survive: for j < M,
    ``E[(s1 conj s2)^j] = j!^2 [t^j] prod_i F(x_i t)``, ``F(u) = sum_a u^a/(a!)^2``,
    ``x_i = p1_i p2_i`` (the taps of symbol i at the two times), evaluated as
    ``exp(sum_k c_k S_k t^k)`` from the power sums ``S_k = sum_i x_i^k``; the pattern-jitter
    covariance of Im(s^M) follows from the same series at j = M and the pair moments
    ``sum_i p1^a p2^(M-a)``.
    """
    m = int(power)
    pulse = np.asarray(pulse, dtype=float)
    pulse = pulse * sqrt(sps / float(np.sum(pulse * pulse)))       # unit mean power per sample
    lp = len(pulse)
    rows = np.arange(-(lp - 1), sps + lp - 1)                     # m: every time sharing a symbol
    a_all = _pulse_matrix(pulse, sps, rows)
    a_n = a_all[lp - 1:lp - 1 + sps]                              # n = 0..N-1
    lag = rows[None, :] - np.arange(sps)[:, None]                 # m - n
    half = (len(rho) - 1) // 2
    rho_lag = np.where(np.abs(lag) <= half, rho[np.clip(lag + half, 0, len(rho) - 1)], 0.0)
    powers_n = [np.ones_like(a_n)] + [a_n ** k for k in range(1, m + 1)]
    powers_all = [np.ones_like(a_all)] + [a_all ** k for k in range(1, m + 1)]

    def pair_sum(j, k):
        """sum_i p_n,i^j p_m,i^k for every (n, m), without BLAS (see solve_small)."""
        return np.einsum("ni,ri->nr", powers_n[j], powers_all[k], optimize=False)

    s_k = [None] + [pair_sum(k, k) for k in range(1, m + 1)]
    p = [np.ones_like(s_k[1])]
    if m <= EXP_SERIES_MAX_POWER:
        c = _log_bessel_series(m)
        for d in range(1, m + 1):
            p.append(sum(k * c[k] * s_k[k] * p[d - k] for k in range(1, d + 1)) / d)
    else:                       # the series loses digits for larger M: multiply out the product
        p += [np.zeros_like(p[0]) for _ in range(m)]
        inv = [1.0 / factorial(a) ** 2 for a in range(m + 1)]
        for i in range(a_all.shape[1]):
            x = np.outer(a_n[:, i], a_all[:, i])
            x_pow = [np.ones_like(x), x]
            for a in range(2, m + 1):
                x_pow.append(x_pow[-1] * x)
            for d in range(m, 0, -1):
                p[d] = p[d] + sum(p[d - a] * (x_pow[a] * inv[a]) for a in range(1, d + 1))
    cov = factorial(m) ** 2 * p[m] - s_k[m]                        # Cov(s_n^M, conj s_m^M)
    moment = [None] + [pair_sum(a, m - a) for a in range(1, m)]
    pcov = 0.5 * sum(comb(m, a) ** 2 * (moment[a] * moment[m - a] - s_k[m]) for a in range(1, m)) \
        if m > 1 else np.zeros_like(cov)                           # E[u_n u_m] - lambda_n lambda_m
    line = float(np.mean(np.sum(powers_n[m], axis=1)))
    self_im = float(np.sum(0.5 * (cov - pcov))) / sps
    self_c = float(np.sum(cov)) / sps
    at_zero = lp - 1 + np.arange(sps)                              # column of m = n for each n
    noise_im, power_noise = [], []
    for k in range(1, m + 1):
        weight = comb(m, k) ** 2 * factorial(k) * factorial(m - k) ** 2
        if k < m:
            noise_im.append(weight * 0.5 * float(np.sum(rho_lag ** k * p[m - k])) / sps)
        else:                                                      # pure noise: every lag of rho counts
            noise_im.append(weight * 0.5 * float(np.sum(rho ** k)))
        power_noise.append(weight * float(np.mean(p[m - k][np.arange(sps), at_zero])))
    power_self = float(np.mean(np.sum(powers_n[m], axis=1) ** 2 + cov[np.arange(sps), at_zero]))
    return _ShapedTerms(line, self_im, self_c, tuple(noise_im), power_self, tuple(power_noise))


@lru_cache(maxsize=256)
def _shaped_terms(power, samples_per_symbol, rolloff, placement):
    """:func:`_shaped_statistics` for the RRC model of :func:`detector_noise` (cached: a pure
    function of M, N, roll-off and placement; Es/N0 only enters through the noise polynomial)."""
    n = int(samples_per_symbol)
    g = rrc_taps(n, rolloff)
    rc = np.convolve(g, g)                         # raised cosine: matched-filter pulse and noise correlation
    rho = rc / rc[(len(rc) - 1) // 2]
    pulse = g if placement == PLACEMENT_CHANNEL else rc
    return _shaped_statistics(int(power), n, pulse, rho)


@dataclass(frozen=True)
class DetectorNoise:
    """Statistics of the line-normalised M-th power detector at zero phase error, per sample.

    ``density`` is S_e(0), the low-frequency spectral density of the detector output
    ``Im(y^M e^{-jM pa}) / L`` (sum over lags of its autocovariance, time-averaged);
    ``self_noise`` the part that remains without noise (pattern jitter of the pulse shape),
    ``thermal`` the rest. ``line`` is L with the signal at unit mean power per sample (1 for a
    constant envelope, cos(beta) for a residual carrier). ``line_snr`` and ``line_to_power`` serve
    the acquisition prediction: the M-th power line over the low-frequency density of the complex
    fluctuation of y^M, and over the mean power of y^M.
    """
    density: float
    self_noise: float
    thermal: float
    line: float
    noise_variance: float      #: complex noise variance per sample in the signal's scale
    line_snr: float            #: L^2 / S_c(0), per sample
    line_to_power: float       #: L^2 / E|y^M|^2


def detector_noise(power, esn0, *, samples_per_symbol=1, rolloff=0.35, placement=PLACEMENT_CHANNEL,
                   modulation_index=None):
    """Detector noise density S_e(0) (and its parts) of the line-normalised M-th power detector.

    Parameters
    ----------
    power : int               symmetry order M (1..MAX_POWER)
    esn0 : float              linear Es/N0 per symbol
    samples_per_symbol : int  N, 1..64; 1 is the unshaped one-sample-per-symbol model
    rolloff : float           RRC roll-off 0..1 (N > 1 only)
    placement : str           ``"channel"``: RRC-shaped symbols in noise band-limited by the RRC
                              shape (what a loop sees before a matched filter, behind a channel
                              filter); ``"matched"``: after the matched filter (raised-cosine signal,
                              RRC-filtered noise). See :func:`noise_variance_per_sample` for the
                              noise level.
    modulation_index : float  for M = 1 only: a residual carrier ``e^{j beta d}`` phase-modulated
                              by bi-phase (Manchester) +-1 data at index beta (0..1.4 rad), in white
                              noise; roll-off and placement do not apply.

    Models (units: per sample; divide by N for per symbol)
        * M-PSK, N = 1: ``V_M / 2`` (REFERENCES 4, Lindsey & Simon 1973, from memory).
        * M = 1 without modulation index: a plain carrier; only noise at the carrier counts,
          ``S_e(0) = (v / 2) sum_tau rho(tau)``, which is ``N / (2 Es/N0)`` in both placements.
        * Residual carrier: L = cos(beta); Manchester data has no spectral density at zero
          frequency, so ``S_e(0) = (sigma_n^2 / 2) / cos^2(beta)`` with ``sigma_n^2 = N / Es/N0``
          [derived; the continuous form is N0 B_L / (P cos^2 beta), Gardner, Phaselock Techniques,
          from memory].
        * Shaped M-PSK, N > 1: exact expectation over symbol patterns and noise
          (:func:`_shaped_statistics`; no closed form is known for the pulse self-noise, the
          pattern jitter of non-data-aided synchronisers of rotationally symmetric constellations:
          Moeneclaey & de Jonghe, IEEE Trans. Commun. 1994, from memory). The only approximation is
          the RRC truncated to 11 symbols, as the framework's designer does.
    """
    _check_esn0(esn0)
    validate_spec(1.0, power, 0.01, 1.0, 1)
    validate_signal(power, samples_per_symbol, rolloff, placement, modulation_index)
    m, n = int(power), int(samples_per_symbol)
    if modulation_index is not None:
        beta = float(modulation_index)
        v = n / esn0
        line = np.cos(beta)
        if line <= 0.0:
            raise ValueError(f"modulation_index must leave a carrier (cos(beta) > 0), got {modulation_index!r}")
        density = 0.5 * v / line ** 2
        return DetectorNoise(density, 0.0, density, float(line), v, line ** 2 / v, line ** 2 / (1.0 + v))
    if n == 1:
        v = 1.0 / esn0
        vm = mth_power_noise(m, esn0)
        return DetectorNoise(0.5 * vm, 0.0, 0.5 * vm, 1.0, v, 1.0 / vm, 1.0 / (1.0 + vm))
    v_phys = noise_variance_per_sample(esn0, n, rolloff, placement)
    if m == 1:
        g = rrc_taps(n, rolloff)
        rho_sum = float(np.sum(g)) ** 2               # sum over lags of the RRC-filtered noise correlation
        if placement == PLACEMENT_CHANNEL:
            line, v = 1.0, v_phys                      # the carrier is not filtered
        else:
            line, v = 1.0, v_phys / rho_sum            # carrier through g: amplitude sum(g)
        density = 0.5 * v * rho_sum
        return DetectorNoise(density, 0.0, density, line, v, 1.0 / (v * rho_sum), 1.0 / (1.0 + v))
    terms = _shaped_terms(m, n, float(rolloff), placement)
    g = rrc_taps(n, rolloff)
    signal_power = 1.0 if placement == PLACEMENT_CHANNEL else float(np.sum(np.convolve(g, g) ** 2))
    v = v_phys / signal_power                           # noise variance with the signal at unit power
    thermal = sum(a * v ** k for k, a in enumerate(terms.noise_im, start=1))
    fluct_c = terms.self_c + 2.0 * thermal
    z_power = terms.power_self + sum(b * v ** k for k, b in enumerate(terms.power_noise, start=1))
    l2 = terms.line ** 2
    return DetectorNoise((terms.self_im + thermal) / l2, terms.self_im / l2, thermal / l2, terms.line, v,
                         l2 / fluct_c, l2 / z_power)


def detector_noise_density(power, esn0, **signal_model):
    """S_e(0) of :func:`detector_noise` (per sample); ``V_M / 2`` in the unshaped model."""
    return detector_noise(power, esn0, **signal_model).density


def _is_unshaped(power, signal_model):
    """Validate a signal model; true for the unshaped default (one sample per symbol, no modulation
    index), where the predictions keep their closed forms of REFERENCES 4."""
    validate_signal(power, **signal_model)
    return signal_model.get("samples_per_symbol", 1) == 1 and signal_model.get("modulation_index") is None
