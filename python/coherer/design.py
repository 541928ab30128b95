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
"""

import warnings
from dataclasses import dataclass
from math import comb, factorial, inf, pi, sqrt

import numpy as np
from scipy import optimize, signal

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
    p = np.linalg.solve(kron, -np.outer(b, b).ravel()).reshape(n, n)
    return 0.5 * float(p[0, 0])


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
    """Raise ``ValueError`` naming the first out-of-range argument."""
    if not np.isfinite(sample_rate) or sample_rate <= 0:
        raise ValueError(f"sample_rate must be a positive number of samples/s, got {sample_rate!r}")
    if int(power) != power or not 1 <= power <= MAX_POWER:
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


def squaring_loss(power, esn0):
    """Squaring loss ``S_L = M^2 s2 / V_M`` (linear, <= 1) at linear Es/N0 ``esn0``."""
    return power * power / (esn0 * mth_power_noise(power, esn0))


def phase_error_variance(power, esn0, bt):
    """Linear-theory carrier phase-error variance (rad^2): ``B_L T V_M / M^2``.

    ``bt`` is the loop noise bandwidth times the symbol (update) period.
    """
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


__all__ = [
    "MAX_BT", "MAX_DAMPING", "MAX_POWER", "KAPLAN_A2", "KAPLAN_A3", "KAPLAN_B3",
    "noise_bw_per_wn", "natural_frequency", "third_order_bw_per_w0", "third_order_coefficients",
    "bilinear_second_order", "first_order_gain", "rectangular_third_order", "textbook_gains",
    "closed_loop", "closed_loop_poles", "loop_state_matrices", "noise_bandwidth_bt", "impulse_response",
    "LoopDesign", "validate_spec", "design_loop",
    "mth_power_noise", "squaring_loss", "phase_error_variance", "db_to_linear",
    "continuous_ramp_phase_error", "max_trackable_ramp_hz_per_s",
]
