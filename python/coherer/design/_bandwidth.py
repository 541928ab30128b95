# SPDX-License-Identifier: GPL-3.0-or-later
"""The closed loop of a gain vector ``(gK1, ..., gK_d)`` of any order d: transfer function,
poles, delta-form state matrices, the exact noise bandwidth B_L T (dimensionless: B_L in Hz
times T in s) and the steady phase errors (rad) of polynomial inputs."""

from math import inf, pi

import numpy as np
from scipy import signal

from ._gains import gain_vector


def closed_loop(g_gains):
    """Closed-loop ``H(z) = theta^/theta`` as ``(b, a)`` in ascending powers of z^-1.

    ``g_gains`` is the gain vector ``(gK1, ..., gK_d)`` (trailing zero slots are dropped, see
    :func:`gain_vector`); d is the loop order. With ``u = 1 - z^-1``:
    ``H = z^-1 N(u) / (u^d + z^-1 N(u))``, ``N(u) = sum_i gK_i u^(d-i)``.
    """
    P = np.polynomial.polynomial
    g = gain_vector(g_gains)
    order = len(g)
    u = np.array([1.0, -1.0])
    n_u = np.zeros(1)
    for i in range(order):
        n_u = P.polyadd(n_u, g[i] * P.polypow(u, order - 1 - i))
    num = P.polymul([0.0, 1.0], n_u)
    den = P.polyadd(P.polypow(u, order), num)
    n = max(len(num), len(den))
    return np.pad(num, (0, n - len(num))), np.pad(den, (0, n - len(den)))


def closed_loop_poles(g_gains, block=1):
    """Closed-loop poles (z-plane, one step per update block of ``block`` samples) of the
    loop with gain vector ``g_gains``.

    Computed as ``1 + eig(Delta)`` of the delta-form model, which stays accurate
    when the poles crowd around z = 1 (narrow loops).
    """
    delta, _, _ = loop_state_matrices(g_gains, block)
    return 1.0 + np.linalg.eigvals(delta)


def loop_state_matrices(g_gains, block=1):
    """Phase-domain state-space model of the linearised loop in delta form, one step per
    update block of L = ``block`` samples.

    State ``x = [theta^, acc1, acc2][:d]`` (the NCO phase at the block start, rad, and the
    filter's registers, rad/sample and rad/sample^2), input the carrier phase theta over the
    block: ``x[k+1] = x[k] + Delta x[k] + B theta[k]``, output ``C x``, the NCO phase
    averaged over the block. Within a block the NCO runs at ``acc1``; at its end the block's
    mean error ``e = theta - C x`` moves the registers, ``acc2 += L gK3 e``,
    ``acc1 += L gK2 e + L acc2``, and the NCO's last step of the block is ``L gK1 e + acc1``
    (what the kernel does). For L = 1 this is the per-sample loop: ``Delta[i, k] = 1`` for
    k > i and ``B_i = -Delta[i, 0] = sum_(j >= i) gK_(j+1)``. Returns ``(Delta, B, C)``. The
    delta form keeps the Lyapunov solution accurate for very narrow loops, where
    ``A = I + Delta`` has eigenvalues close to 1.
    """
    g = gain_vector(g_gains)
    order = len(g)
    g1, g2, g3 = (tuple(g) + (0.0, 0.0))[:3]
    L = float(block)
    c = 0.5 * (L - 1.0)                       # block mean of the phase: theta^ + c acc1
    b = np.array([L * (g1 + g2 + L * g3), L * (g2 + L * g3), L * g3])
    c_out = np.array([1.0, c, 0.0])
    delta = np.array([[0.0, L, L], [0.0, 0.0, L], [0.0, 0.0, 0.0]]) - np.outer(b, c_out)
    return delta[:order, :order], b[:order], c_out[:order]


def steady_phase_error(g_gains, sample_rate, degree, rate):
    """Final phase error (rad) for a carrier phase polynomial of ``degree`` (1 a frequency step
    of ``rate`` Hz, 2 a ramp of ``rate`` Hz/s, 3 an acceleration of ``rate`` Hz/s^2).

    A loop of order d has d integrators (the NCO and d - 1 in its filter): no error below
    degree d, the exact discrete final value ``2 pi rate / fs^d / gK_d`` at degree d
    (REFERENCES 2.1), unbounded above it.
    """
    if rate == 0.0:
        return 0.0
    g = gain_vector(g_gains)
    if degree != len(g):
        return 0.0 if degree < len(g) else inf
    return 2.0 * pi * rate / sample_rate ** degree / g[-1]


def steady_rate_limit(g_gains, sample_rate, degree, max_error_rad):
    """Largest ``rate`` (Hz/s^(degree-1)) whose :func:`steady_phase_error` stays within
    ``max_error_rad``: ``inf`` below the loop order, 0 above it."""
    g = gain_vector(g_gains)
    if degree != len(g):
        return inf if degree < len(g) else 0.0
    return max_error_rad * g[-1] * sample_rate ** degree / (2.0 * pi)


def noise_bandwidth_bt(g_gains, block=1):
    """Exact noise bandwidth ``B_L T`` of the discrete loop updated once per ``block``
    samples: ``0.5 sum h[n]^2`` for the per-sample loop (REFERENCES 0), and in general
    ``C P C' / (2 L)``, where ``P`` is the state covariance for a unit white input per block
    (the block mean of white detector noise has 1/L of its variance per sample).

    Closed form: the discrete Lyapunov equation ``P = A P A' + B B'`` written as
    ``Delta P + P Delta' + Delta P Delta' = -B B'``. ``inf`` if the loop is unstable.
    """
    if np.any(np.abs(closed_loop_poles(g_gains, block)) >= 1.0):
        return inf
    delta, b, c_out = loop_state_matrices(g_gains, block)
    n = len(b)
    eye = np.eye(n)
    kron = np.kron(delta, eye) + np.kron(eye, delta) + np.kron(delta, delta)
    p = solve_small(kron, -np.outer(b, b).ravel()).reshape(n, n)
    return float(c_out @ p @ c_out) / (2.0 * block)


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
