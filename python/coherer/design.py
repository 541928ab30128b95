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

from dataclasses import dataclass
from functools import lru_cache
from math import comb, factorial, fsum, inf, pi, sqrt

import numpy as np
from scipy import optimize, signal, special

#: Largest B_L * T (noise bandwidth over sample rate) the blocks accept.
MAX_BT = 0.1
#: Largest accepted damping factor.
MAX_DAMPING = 10.0
#: Largest accepted symmetry order M.
MAX_POWER = 16

# Kaplan & Hegarty, Understanding GPS 2nd ed., Table 5.6 constants (see REFERENCES 1.3).
KAPLAN_A2 = 1.414
KAPLAN_A3 = 1.1
KAPLAN_B3 = 2.4


# --- continuous-time relations --------------------------------------------------------

def noise_bw_per_wn(damping):
    """B_L / wn of the continuous 2nd-order loop, ``(zeta + 1/(4 zeta)) / 2`` (Hz per rad/s)."""
    return 0.5 * (damping + 0.25 / damping)


def natural_frequency(noise_bw_hz, damping):
    """Natural frequency wn (rad/s) of a 2nd-order loop with noise bandwidth B_L (Hz)."""
    return noise_bw_hz / noise_bw_per_wn(damping)


def third_order_bw_per_w0(a3, b3):
    """B_n / w0 of the 3rd-order loop ``b3 w0 + a3 w0^2/s + w0^3/s^2``."""
    return (a3 * b3 * b3 + a3 * a3 - b3) / (4.0 * (a3 * b3 - 1.0))


def third_order_coefficients(damping):
    """(a3, b3) for a given damping of the complex pole pair: ``a3 = b3 = 1 + 2 zeta``."""
    c = 1.0 + 2.0 * damping
    return c, c


# --- discrete gains -----------------------------------------------------------------------

def bilinear_second_order(bt, damping):
    """Rice's bilinear 2nd-order gains ``(g K1, g K2)`` for B_L T = ``bt``."""
    theta_n = bt / (damping + 0.25 / damping)
    d = 1.0 + 2.0 * damping * theta_n + theta_n * theta_n
    return 4.0 * damping * theta_n / d, 4.0 * theta_n * theta_n / d


def first_order_gain(bt):
    """Exact discrete 1st-order gain ``g K1`` giving noise bandwidth ``bt`` (B_L T)."""
    return 4.0 * bt / (1.0 + 2.0 * bt)


def rectangular_third_order(bt, damping, a3=None, b3=None):
    """3rd-order gains ``(g K1, g K2, g K3)`` with rectangular integrators for B_L T = ``bt``.

    ``a3, b3`` default to :func:`third_order_coefficients` of ``damping``; pass
    Kaplan's (1.1, 2.4) to get the GPS-receiver table loop.
    """
    if a3 is None or b3 is None:
        a3, b3 = third_order_coefficients(damping)
    w0t = bt / third_order_bw_per_w0(a3, b3)
    return b3 * w0t, a3 * w0t * w0t, w0t ** 3


def textbook_gains(loop_order, bt, damping):
    """Loop-gain products ``(gK1, gK2, gK3)`` from the textbook mapping of the given order."""
    if loop_order == 1:
        return first_order_gain(bt), 0.0, 0.0
    if loop_order == 2:
        return (*bilinear_second_order(bt, damping), 0.0)
    if loop_order == 3:
        return rectangular_third_order(bt, damping)
    raise ValueError(f"loop_order must be 1, 2 or 3, got {loop_order!r}")


# --- closed-loop analysis ---------------------------------------------------------------

def closed_loop(g_gains):
    """Closed-loop ``H(z) = theta^/theta`` as ``(b, a)`` in ascending powers of z^-1.

    ``g_gains`` are the loop-gain products ``(gK1, gK2, gK3)``; the loop order is
    the number of leading non-zero entries. With ``u = 1 - z^-1`` and order d:
    ``H = z^-1 N(u) / (u^d + z^-1 N(u))``, ``N(u) = sum_i gK_i u^(d-i)``.
    """
    P = np.polynomial.polynomial
    order = 3 if g_gains[2] else (2 if g_gains[1] else 1)
    u = np.array([1.0, -1.0])
    n_u = np.zeros(1)
    for i in range(order):
        n_u = P.polyadd(n_u, g_gains[i] * P.polypow(u, order - 1 - i))
    num = P.polymul([0.0, 1.0], n_u)
    den = P.polyadd(P.polypow(u, order), num)
    n = max(len(num), len(den))
    return np.pad(num, (0, n - len(num))), np.pad(den, (0, n - len(den)))


def closed_loop_poles(g_gains):
    """Closed-loop poles (z-plane) of the loop with gain products ``g_gains``.

    Computed as ``1 + eig(Delta)`` of the delta-form model, which stays accurate
    when the poles crowd around z = 1 (narrow loops).
    """
    delta, _ = loop_state_matrices(g_gains)
    return 1.0 + np.linalg.eigvals(delta)


def loop_state_matrices(g_gains):
    """Phase-domain state-space model of the linearised loop in delta form.

    State ``x = [theta^, acc1, acc2]`` (truncated to the loop order), input the
    carrier phase theta: ``x[n+1] = x[n] + Delta x[n] + B theta[n]``, output ``theta^``.
    Returns ``(Delta, B)``. The delta form keeps the Lyapunov solution accurate for
    very narrow loops, where ``A = I + Delta`` has eigenvalues close to 1.
    """
    gk1, gk2, gk3 = g_gains
    order = 3 if gk3 else (2 if gk2 else 1)
    g_all = gk1 + gk2 + gk3
    delta = np.array([[-g_all, 1.0, 1.0],
                      [-(gk2 + gk3), 0.0, 1.0],
                      [-gk3, 0.0, 0.0]])
    b = np.array([g_all, gk2 + gk3, gk3])
    return delta[:order, :order], b[:order]


def noise_bandwidth_bt(g_gains):
    """Exact noise bandwidth ``B_L T = 0.5 sum h[n]^2`` of the discrete loop (REFERENCES 0).

    Closed form: the output variance of the state-space model for a unit white
    input, from the discrete Lyapunov equation ``P = A P A' + B B'`` written as
    ``Delta P + P Delta' + Delta P Delta' = -B B'``. ``inf`` if the loop is unstable.
    """
    if np.any(np.abs(closed_loop_poles(g_gains)) >= 1.0):
        return inf
    delta, b = loop_state_matrices(g_gains)
    n = len(b)
    eye = np.eye(n)
    kron = np.kron(delta, eye) + np.kron(eye, delta) + np.kron(delta, delta)
    p = solve_small(kron, -np.outer(b, b).ravel()).reshape(n, n)
    return 0.5 * float(p[0, 0])


def solve_small(a, b):
    """``x`` with ``a x = b`` for a small square ``a`` (n <= 9 here), by Gaussian
    elimination with partial pivoting in numpy.

    Used instead of ``np.linalg.solve`` because the threaded BLAS behind numpy's
    LAPACK starts worker threads even for a 9 x 9 system, and they keep a core
    busy (spinning) for a while after every call: in a flowgraph that core is
    taken from the blocks. Raises ``np.linalg.LinAlgError`` if ``a`` is singular.
    """
    m = np.array(a, dtype=float)
    x = np.array(b, dtype=float)
    n = len(x)
    for col in range(n):
        pivot = col + int(np.argmax(np.abs(m[col:, col])))
        if m[pivot, col] == 0.0:
            raise np.linalg.LinAlgError("singular matrix")
        if pivot != col:
            m[[col, pivot]] = m[[pivot, col]]
            x[[col, pivot]] = x[[pivot, col]]
        factors = m[col + 1:, col] / m[col, col]
        m[col + 1:, col:] -= np.outer(factors, m[col, col:])
        x[col + 1:] -= factors * x[col]
    for row in range(n - 1, -1, -1):
        x[row] = (x[row] - m[row, row + 1:] @ x[row + 1:]) / m[row, row]
    return x


def impulse_response(g_gains, n):
    """First ``n`` samples of the closed-loop impulse response h[n]."""
    b, a = closed_loop(g_gains)
    x = np.zeros(n)
    x[0] = 1.0
    return signal.lfilter(b, a, x)


# --- the design used by the blocks -----------------------------------------------------

@dataclass(frozen=True)
class LoopDesign:
    """A complete loop design. Gains ``k1, k2, k3`` are per unit detector gain
    (the kernel multiplies the normalised detector output, mean ``sin(M phi)``, by them)."""
    sample_rate: float     #: samples/s
    power: int             #: symmetry order M
    noise_bw_hz: float     #: requested one-sided loop noise bandwidth B_L, Hz
    damping: float         #: damping factor zeta
    loop_order: int        #: 1, 2 or 3
    design_bt: float       #: B_L T fed to the textbook mapping
    actual_bt: float       #: exact noise bandwidth of the discrete loop, B_L T
    g_gains: tuple         #: (gK1, gK2, gK3), loop-gain products with g = M
    k1: float
    k2: float
    k3: float

    @property
    def bt(self):
        """Requested B_L T (dimensionless)."""
        return self.noise_bw_hz / self.sample_rate

    @property
    def natural_frequency(self):
        """Natural frequency wn (rad/s) of the continuous equivalent (2nd order), or w0 (3rd order)."""
        if self.loop_order == 3:
            a3, b3 = third_order_coefficients(self.damping)
            return self.design_bt * self.sample_rate / third_order_bw_per_w0(a3, b3)
        if self.loop_order == 1:
            return 4.0 * self.noise_bw_hz   # first-order loop: closed-loop corner, rad/s
        return natural_frequency(self.design_bt * self.sample_rate, self.damping)

    def ramp_phase_error(self, rate_hz_per_s):
        """Steady-state phase error (rad, carrier-phase units) to a frequency ramp in Hz/s.

        Exact discrete final value ``alpha / (g K2)`` with ``alpha = 2 pi rate / fs^2``
        rad/sample^2 (REFERENCES 2.1); 0 for a 3rd-order loop; unbounded for order 1.
        """
        if rate_hz_per_s == 0.0:
            return 0.0
        if self.loop_order == 1:
            return inf
        if self.loop_order == 3:
            return 0.0
        alpha = 2.0 * pi * rate_hz_per_s / self.sample_rate ** 2
        return alpha / self.g_gains[1]

    def frequency_step_error(self, step_hz):
        """Steady-state phase error (rad) after a frequency step (Hz): ``dw / (g K1)`` for order 1, else 0."""
        if self.loop_order != 1 or step_hz == 0.0:
            return 0.0
        return 2.0 * pi * step_hz / self.sample_rate / self.g_gains[0]


def validate_spec(sample_rate, power, noise_bw_hz, damping, loop_order):
    """Raise ``ValueError`` naming the first out-of-range (or non-numeric) argument."""
    for name, value in (("sample_rate", sample_rate), ("power", power), ("noise_bw_hz", noise_bw_hz),
                        ("damping", damping), ("loop_order", loop_order)):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            raise ValueError(f"{name} must be a number, got {value!r}")
    if not np.isfinite(sample_rate) or sample_rate <= 0:
        raise ValueError(f"sample_rate must be a positive number of samples/s, got {sample_rate!r}")
    if not np.isfinite(power) or int(power) != power or not 1 <= power <= MAX_POWER:
        raise ValueError(f"power must be an integer in 1..{MAX_POWER}, got {power!r}")
    if not np.isfinite(noise_bw_hz) or noise_bw_hz <= 0:
        raise ValueError(f"noise_bw_hz must be > 0 Hz, got {noise_bw_hz!r}")
    if noise_bw_hz > MAX_BT * sample_rate:
        raise ValueError(
            f"noise_bw_hz must be at most {MAX_BT} * sample_rate = {MAX_BT * sample_rate:g} Hz, got {noise_bw_hz!r}")
    if not np.isfinite(damping) or not 0 < damping <= MAX_DAMPING:
        raise ValueError(f"damping must be in (0, {MAX_DAMPING}], got {damping!r}")
    if loop_order not in (1, 2, 3) or int(loop_order) != loop_order:
        raise ValueError(f"loop_order must be 1, 2 or 3, got {loop_order!r}")


def design_loop(sample_rate, power, noise_bw_hz, damping=0.707, loop_order=2, exact=True):
    """Design a loop; returns a :class:`LoopDesign`.

    Parameters
    ----------
    sample_rate : float   samples/s (the loop updates once per sample)
    power : int           symmetry order M (1 pilot, 2 BPSK, 4 QPSK, 8 8PSK)
    noise_bw_hz : float   one-sided loop noise bandwidth B_L, Hz
    damping : float       damping factor zeta (orders 2 and 3)
    loop_order : int      1, 2 or 3
    exact : bool          refine so the discrete loop's actual B_L equals the request
    """
    validate_spec(sample_rate, power, noise_bw_hz, damping, loop_order)
    power, loop_order = int(power), int(loop_order)
    target = noise_bw_hz / sample_rate
    design_bt = target
    if exact:
        def excess(bt):
            return noise_bandwidth_bt(textbook_gains(loop_order, bt, damping)) / target - 1.0
        lo = 0.25 * target
        hi = target
        while excess(hi) < 0.0:          # the mapping can also land low (order 1 never does)
            hi *= 1.25
        design_bt = optimize.brentq(excess, lo, hi, xtol=1e-15 * target, rtol=1e-13)
    g_gains = textbook_gains(loop_order, design_bt, damping)
    actual = noise_bandwidth_bt(g_gains)
    if not np.isfinite(actual):
        raise ValueError(f"noise_bw_hz={noise_bw_hz!r} gives an unstable discrete loop at this sample rate")
    k1, k2, k3 = (gk / power for gk in g_gains)
    return LoopDesign(float(sample_rate), power, float(noise_bw_hz), float(damping), loop_order,
                      design_bt, actual, tuple(g_gains), k1, k2, k3)


# --- noise performance of the M-th power detector ----------------------------------------

def mth_power_noise(power, esn0):
    """``V_M = E|w|^2 = sum_k C(M,k)^2 k! s2^k`` with ``s2 = 1/(Es/N0)`` (linear Es/N0). REFERENCES 4."""
    s2 = 1.0 / esn0
    return sum(comb(power, k) ** 2 * factorial(k) * s2 ** k for k in range(1, power + 1))


def squaring_loss(power, esn0, *, samples_per_symbol=1, rolloff=0.35, placement="channel",
                  modulation_index=None):
    """Squaring loss ``S_L = M^2 s2 / V_M`` (linear, <= 1) at linear Es/N0 ``esn0``.

    With a signal model (see :func:`detector_noise`) other than the unshaped default: the
    :func:`effective_squaring_loss` of that signal.
    """
    model = dict(samples_per_symbol=samples_per_symbol, rolloff=rolloff, placement=placement,
                 modulation_index=modulation_index)
    if not _is_unshaped(power, model):
        return effective_squaring_loss(power, esn0, **model)
    return power * power / (esn0 * mth_power_noise(power, esn0))


def phase_error_variance(power, esn0, bt, *, samples_per_symbol=1, rolloff=0.35, placement="channel",
                         modulation_index=None):
    """Linear-theory carrier phase-error variance (rad^2): ``B_L T V_M / M^2``.

    ``bt`` is the loop noise bandwidth times the loop's update (sample) period, ``esn0`` the linear
    Es/N0 per symbol. With a signal model (samples per symbol, RRC roll-off and placement, or a
    residual carrier's modulation index; see :func:`detector_noise`) the general linear result
    ``2 B_L T S_e(0) / M^2`` of the line-normalised detector (Gardner, Phaselock Techniques, from
    memory, for the loop as a linear filter of the detector noise), which is the expression above
    in the unshaped default and ``B_L T sigma_n^2 / cos^2(beta)`` for a residual carrier.
    """
    model = dict(samples_per_symbol=samples_per_symbol, rolloff=rolloff, placement=placement,
                 modulation_index=modulation_index)
    if not _is_unshaped(power, model):
        return 2.0 * bt * detector_noise_density(power, esn0, **model) / (power * power)
    return bt * mth_power_noise(power, esn0) / (power * power)


def db_to_linear(db):
    """10^(dB/10)."""
    return 10.0 ** (db / 10.0)


def continuous_ramp_phase_error(noise_bw_hz, damping, rate_hz_per_s):
    """Continuous 2nd-order approximation ``(dw/dt)/wn^2`` in rad for a ramp in Hz/s."""
    wn = natural_frequency(noise_bw_hz, damping)
    return 2.0 * pi * rate_hz_per_s / (wn * wn)


def max_trackable_ramp_hz_per_s(design):
    """Largest frequency ramp (Hz/s) for which the M-domain steady error stays within pi/2
    (the sine S-curve's usable range; REFERENCES 2.1). Unbounded for order 3, 0 for order 1."""
    if design.loop_order == 3:
        return inf
    if design.loop_order == 1:
        return 0.0
    phi_max = (pi / 2.0) / design.power
    return phi_max * design.g_gains[1] * design.sample_rate ** 2 / (2.0 * pi)


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
    from . import acquisition
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
    from . import acquisition
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


# --- cycle slips and nonlinear jitter (REFERENCES 3 and 5) -------------------------------------

#: Empirical second-order correction: a 2nd-order loop (zeta 0.707) slips about as often as a
#: first-order loop at a loop SNR this many dB lower (simulated band of REFERENCES 5).
SECOND_ORDER_SLIP_SHIFT_DB = 1.0


def loop_snr(power, esn0, bt, *, samples_per_symbol=1, rolloff=0.35, placement="channel",
             modulation_index=None):
    """Loop SNR in the psi = M phi domain, ``rho_psi = 1 / (B_L T V_M)`` (linear; REFERENCES 5).

    With a signal model (:func:`detector_noise`): ``1 / (M^2 var(phi)) = 1 / (2 B_L T S_e(0))``;
    for a residual carrier that is ``cos^2(beta) / (B_L T sigma_n^2)``, the loop SNR on the
    carrier's share of the power.
    """
    model = dict(samples_per_symbol=samples_per_symbol, rolloff=rolloff, placement=placement,
                 modulation_index=modulation_index)
    if not _is_unshaped(power, model):
        return 1.0 / (2.0 * bt * detector_noise_density(power, esn0, **model))
    return 1.0 / (bt * mth_power_noise(power, esn0))


def slip_time_bt_first_order(rho):
    """Viterbi's mean time to the first slip of a first-order loop, as ``B_L T_slip = pi^2 rho I0(rho)^2 / 2``.

    Dimensionless (divide by B_L in Hz for seconds); ``inf`` when it overflows a float.
    """
    rho = float(rho)
    if rho < 0.0 or not np.isfinite(rho):
        raise ValueError(f"rho must be a finite loop SNR >= 0, got {rho!r}")
    if rho == 0.0:
        return 0.0
    log_value = np.log(pi * pi * rho / 2.0) + 2.0 * (np.log(special.i0e(rho)) + rho)
    return float(np.exp(log_value)) if log_value < 700.0 else inf


def mean_time_between_slips_s(design, esn0, **signal_model):
    """Mean time (s) between cycle slips of 2 pi / M at linear Es/N0 ``esn0`` per symbol.

    ``signal_model``: the keyword arguments of :func:`detector_noise` (samples per symbol,
    roll-off, placement, modulation index); the loop SNR is then that of :func:`loop_snr`.

    Viterbi's first-order formula with the M-th power mapping ``rho_psi = 1/(B_L T V_M)``
    (REFERENCES 5), using the exact discrete noise bandwidth. For orders 2 and 3 the loop SNR
    is first lowered by :data:`SECOND_ORDER_SLIP_SHIFT_DB`, an empirical correction from
    simulations of a 2nd-order loop with zeta 0.707 (not a published formula; for order 3
    and other dampings it is an estimate).
    """
    rho = loop_snr(design.power, esn0, design.actual_bt, **signal_model)
    if design.loop_order >= 2:
        rho *= db_to_linear(-SECOND_ORDER_SLIP_SHIFT_DB)
    return slip_time_bt_first_order(rho) / (design.actual_bt * design.sample_rate)


def tikhonov_phase_variance(rho):
    """Variance (rad^2) of phi mod 2 pi under the Tikhonov density ``exp(rho cos phi) / (2 pi I0(rho))``:
    ``pi^2/3 + 4 sum_k (-1)^k I_k(rho) / (k^2 I0(rho))`` (first-order loop at loop SNR rho; REFERENCES 3).
    """
    rho = float(rho)
    if rho < 0.0 or not np.isfinite(rho):
        raise ValueError(f"rho must be a finite loop SNR >= 0, got {rho!r}")
    if rho > 1e8:
        return 1.0 / rho          # the series' relative departure from 1/rho is ~1/(2 rho) here
    k = np.arange(1, int(12.0 * sqrt(rho)) + 41, dtype=float)
    ratio = special.ive(k, rho) / special.ive(0, rho)        # I_k / I0 without overflow
    terms = 4.0 * np.where(k % 2 == 0, 1.0, -1.0) * ratio / (k * k)
    return fsum([pi * pi / 3.0, *terms.tolist()])


def nonlinear_phase_error_variance(power, esn0, bt, **signal_model):
    """Carrier phase-error variance (rad^2, phi mod 2 pi / M) from the Tikhonov density at
    the psi-domain loop SNR ``1/(B_L T V_M)``; first-order loop model. ``signal_model``: the
    keyword arguments of :func:`detector_noise` (the loop SNR is then :func:`loop_snr`'s)."""
    return tikhonov_phase_variance(loop_snr(power, esn0, bt, **signal_model)) / (power * power)


# --- real receiver signals: pulse shape, band-limited noise, residual carrier -------------------
#
# The loops normalise their detector by the M-th power line itself, so the detector is
#     e[n] = Im(y[n]^M e^{-j M pa}) / L,   L = time mean of E[Re(y^M e^{-j M pa})] at zero phase error,
# with a mean slope of exactly M per rad of carrier phase for any signal shape. In the linear model
# the loop's phase-error variance is then  var(phi) = 2 (B_L T) S_e(0) / M^2,  where S_e(0) is the
# low-frequency spectral density (per sample) of the detector's fluctuation at zero phase error:
# the sum over all lags of its autocovariance, averaged over the symbol period (the signal is
# cyclostationary). For white noise at one sample per symbol S_e(0) = V_M / 2 (REFERENCES 4).

#: Signal placements of the pulse-shape model (see :func:`detector_noise`).
PLACEMENT_CHANNEL = "channel"
PLACEMENT_MATCHED = "matched"
PLACEMENTS = (PLACEMENT_CHANNEL, PLACEMENT_MATCHED)
#: Largest samples per symbol of the pulse-shape model.
MAX_SAMPLES_PER_SYMBOL = 64
#: Largest phase-modulation index (rad) of the residual-carrier model.
MAX_MODULATION_INDEX = 1.4
#: Span of the root-raised-cosine pulse in symbols (11 N + 1 taps, made odd, as CONVENTIONS 8).
RRC_SPAN_SYMBOLS = 11
#: Largest M for which the shaped-signal expectation uses the exp-log series of power sums (fast;
#: beyond it the series loses digits, relative 1e-5 of the pattern jitter for 8PSK, so the
#: symbol-by-symbol product is multiplied out instead: 0.7 s for 8PSK at 64 samples per symbol).
EXP_SERIES_MAX_POWER = 4


def validate_signal(power, samples_per_symbol=1, rolloff=0.35, placement=PLACEMENT_CHANNEL,
                    modulation_index=None):
    """Raise ``ValueError`` naming the first out-of-range signal-model argument."""
    n = samples_per_symbol
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or not 1 <= n <= MAX_SAMPLES_PER_SYMBOL:
        raise ValueError(f"samples_per_symbol must be an integer in 1..{MAX_SAMPLES_PER_SYMBOL}, got {n!r}")
    if isinstance(rolloff, bool) or not isinstance(rolloff, (int, float, np.integer, np.floating)) \
            or not 0.0 <= rolloff <= 1.0:
        raise ValueError(f"rolloff must be a number in 0..1, got {rolloff!r}")
    if placement not in PLACEMENTS:
        raise ValueError(f"placement must be one of {', '.join(PLACEMENTS)}, got {placement!r}")
    if modulation_index is not None:
        beta = modulation_index
        if isinstance(beta, bool) or not isinstance(beta, (int, float, np.integer, np.floating)) \
                or not 0.0 <= beta <= MAX_MODULATION_INDEX:
            raise ValueError(f"modulation_index must be a number in 0..{MAX_MODULATION_INDEX} rad, got {beta!r}")
        if power != 1:
            raise ValueError(f"modulation_index applies to a residual carrier (power M = 1) only, got power {power!r}")


def _check_esn0(esn0):
    if isinstance(esn0, bool) or not isinstance(esn0, (int, float, np.integer, np.floating)) \
            or not np.isfinite(esn0) or esn0 <= 0.0:
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


def effective_squaring_loss(power, esn0, **signal_model):
    """Effective squaring loss (linear, <= 1 for a loss): ``var(phi) = B_L T_s / (Es/N0 * S_L)``
    with T_s the symbol period, i.e. ``S_L = N M^2 / (2 Es/N0 S_e(0))``.

    Equals :func:`squaring_loss` (Lindsey & Simon 1973, from memory) in the unshaped model,
    cos^2(beta) (the carrier share) for a residual carrier, 1 for a plain carrier.
    """
    noise = detector_noise(power, esn0, **signal_model)
    n = signal_model.get("samples_per_symbol", 1)
    return n * power * power / (2.0 * esn0 * noise.density)


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
    """``D`` with ``z[n+1] = (I + D) z[n] + [f, 0, 0]`` for the linearised loop in the kernel's order,
    ``z = [phi, acc1, acc2]`` (truncated to the loop order), ``f`` the input phase increment per sample."""
    gk1, gk2, gk3 = g_gains
    order = 3 if gk3 else (2 if gk2 else 1)
    g_all = gk1 + gk2 + gk3
    d = np.array([[-g_all, -1.0, -1.0],
                  [gk2 + gk3, 0.0, 1.0],
                  [gk3, 0.0, 0.0]])
    return d[:order, :order]


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
    """
    n = response_length(design) if n_samples is None else int(n_samples)
    fs = design.sample_rate
    d = _error_state_matrix(design.g_gains)
    order = d.shape[0]
    f = 2.0 * pi / fs                          # 1 Hz frequency step, rad/sample
    phase_start = np.zeros(order)              # phase step: z0 = [1, 0, 0] decays to 0
    phase_start[0] = 1.0
    fixed = np.zeros(order)                    # frequency step from z = 0 to the fixed point:
    if order == 1:                             # phi = f / gK1 (order 1), else phi = 0, acc1 = f
        fixed[0] = f / design.g_gains[0]
    else:
        fixed[1] = f
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
    final_error = design.frequency_step_error(1.0)
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
    (see :func:`closed_loop`), which keeps full precision for very narrow loops.
    """
    w = 2.0 * pi * np.asarray(freqs_hz, dtype=float) / design.sample_rate
    z_inv = np.exp(-1j * w)
    u = 2j * np.sin(w / 2.0) * np.exp(-0.5j * w)
    order = design.loop_order
    n_u = sum(design.g_gains[i] * u ** (order - 1 - i) for i in range(order))
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


# --- tracking and bandwidth choice -----------------------------------------------------------

def jerk_phase_error(design, rate2_hz_per_s2):
    """Steady-state phase error (rad) to a frequency acceleration in Hz/s^2: exact discrete
    ``J / (g K3)`` with ``J = 2 pi rate2 / fs^3`` rad/sample^3 for order 3 (REFERENCES 2.1); unbounded otherwise."""
    if rate2_hz_per_s2 == 0.0:
        return 0.0
    if design.loop_order != 3:
        return inf
    return 2.0 * pi * rate2_hz_per_s2 / design.sample_rate ** 3 / design.g_gains[2]


def total_phase_error_variance(design, esn0, rate_hz_per_s, **signal_model):
    """Linear jitter variance plus squared steady ramp error (rad^2) at linear Es/N0 ``esn0``
    (``signal_model``: the keyword arguments of :func:`detector_noise`)."""
    jitter = phase_error_variance(design.power, esn0, design.actual_bt, **signal_model)
    return jitter + design.ramp_phase_error(rate_hz_per_s) ** 2


def suggest_noise_bw(sample_rate, power, esn0, rate_hz_per_s, damping=0.707, loop_order=2, **signal_model):
    """Noise bandwidth B_L (Hz) of a 2nd-order loop that minimises jitter variance plus
    squared steady ramp error for linear Es/N0 ``esn0`` and a frequency ramp in Hz/s.

    Only a 2nd-order loop has this trade-off (order 1 cannot track a ramp; order 3 has no
    ramp error). The search runs over exact designs up to ``MAX_BT * sample_rate``.
    ``signal_model``: the keyword arguments of :func:`detector_noise` (jitter of that signal).
    """
    if loop_order != 2:
        raise ValueError(f"loop_order must be 2 for a bandwidth suggestion, got {loop_order!r}")
    if not np.isfinite(esn0) or esn0 <= 0.0:
        raise ValueError(f"esn0 must be a positive linear Es/N0, got {esn0!r}")
    if not np.isfinite(rate_hz_per_s) or rate_hz_per_s == 0.0:
        raise ValueError(f"rate_hz_per_s must be a non-zero frequency ramp in Hz/s, got {rate_hz_per_s!r}")
    validate_spec(sample_rate, power, MAX_BT * sample_rate, damping, loop_order)
    # continuous estimate: a B + k / B^4 with a = V_M T / M^2, k = (2 pi rate c^2)^2, c = B_L / wn
    if _is_unshaped(power, signal_model):
        a = mth_power_noise(power, esn0) / (sample_rate * power * power)
    else:
        a = 2.0 * detector_noise_density(power, esn0, **signal_model) / (sample_rate * power * power)
    k = (2.0 * pi * rate_hz_per_s * noise_bw_per_wn(damping) ** 2) ** 2
    hi = MAX_BT * sample_rate
    guess = min((4.0 * k / a) ** 0.2, hi)
    lo_log, hi_log = np.log(guess / 30.0), np.log(min(guess * 30.0, hi))

    def cost(log_bw):
        d = design_loop(sample_rate, power, float(np.exp(log_bw)), damping, loop_order)
        return total_phase_error_variance(d, esn0, rate_hz_per_s, **signal_model)

    best = optimize.minimize_scalar(cost, bounds=(lo_log, hi_log), method="bounded",
                                    options={"xatol": 1e-7})
    return float(np.exp(best.x))


__all__ = [
    "MAX_BT", "MAX_DAMPING", "MAX_POWER", "KAPLAN_A2", "KAPLAN_A3", "KAPLAN_B3",
    "noise_bw_per_wn", "natural_frequency", "third_order_bw_per_w0", "third_order_coefficients",
    "bilinear_second_order", "first_order_gain", "rectangular_third_order", "textbook_gains",
    "closed_loop", "closed_loop_poles", "loop_state_matrices", "noise_bandwidth_bt", "impulse_response",
    "LoopDesign", "validate_spec", "design_loop",
    "mth_power_noise", "squaring_loss", "phase_error_variance", "db_to_linear",
    "continuous_ramp_phase_error", "max_trackable_ramp_hz_per_s",
    "RICE_PHASE_SETTLING", "ACQ_WITHIN_LOCK_IN", "ACQ_PULLS_IN", "ACQ_TOO_SLOW", "ACQ_BEYOND_HOLD",
    "ACQ_BEYOND_RANGE", "unambiguous_range_hz", "lock_in_range_rad_s", "pull_out_rad_s",
    "pull_in_time_gardner_s", "pull_in_time_rice_s", "phase_settling_time_rice_s", "acquisition_wn",
    "lock_in_range_hz", "pull_out_hz", "pull_in_time_s", "Acquisition", "assess_acquisition",
    "SECOND_ORDER_SLIP_SHIFT_DB", "loop_snr", "slip_time_bt_first_order", "mean_time_between_slips_s",
    "tikhonov_phase_variance", "nonlinear_phase_error_variance",
    "SETTLING_BAND", "RESPONSE_TIME_CONSTANTS", "RESPONSE_POINTS", "FAST_WINDOW_BT", "response_length", "StepMetrics",
    "step_metrics", "StepResponses", "step_responses", "closed_loop_magnitude_db", "closed_loop_peaking_db",
    "closed_loop_3db_hz", "jerk_phase_error", "total_phase_error_variance", "suggest_noise_bw",
    "PLACEMENT_CHANNEL", "PLACEMENT_MATCHED", "PLACEMENTS", "MAX_SAMPLES_PER_SYMBOL", "MAX_MODULATION_INDEX",
    "RRC_SPAN_SYMBOLS", "EXP_SERIES_MAX_POWER", "validate_signal", "rrc_taps", "noise_variance_per_sample",
    "DetectorNoise", "detector_noise", "detector_noise_density", "effective_squaring_loss",
    "LOCK_WINDOWS_PER_BLOCK", "SpectralAcquisition", "line_detect_probability", "spectral_acquisition",
    "FrequencyStep", "frequency_step",
]
