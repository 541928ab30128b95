# SPDX-License-Identifier: GPL-3.0-or-later
"""Loop design module against the published formulas and check values of REFERENCES.md.

Every check names its source beside it. "printed precision" means half a unit
in the last digit REFERENCES prints; tolerances for simulations are stated
where they are used.
"""

import math
import subprocess
import sys

import numpy as np
import pytest
from scipy import integrate, signal, special

from gnuradio.coherer import design


def half_unit(printed):
    """Half a unit in the last printed digit of a decimal string (the printed precision)."""
    mantissa = printed.lower().split("e")[0]
    exponent = int(printed.lower().split("e")[1]) if "e" in printed.lower() else 0
    decimals = len(mantissa.split(".")[1]) if "." in mantissa else 0
    return 0.5 * 10.0 ** (exponent - decimals)


def matches_printed(value, printed):
    """True if ``value`` rounds to the decimal string ``printed``."""
    return abs(value - float(printed)) <= half_unit(printed) * (1 + 1e-9)


def brute_force_bt(g_gains, n):
    """0.5 * sum h[n]^2 from an lfilter impulse response of n samples (REFERENCES 0 definition)."""
    b, a = design.closed_loop(g_gains)
    impulse = np.zeros(n)
    impulse[0] = 1.0
    h = signal.lfilter(b, a, impulse)
    return 0.5 * float(np.sum(h * h))


def continuous_bandwidth(num, den):
    """One-sided noise bandwidth integral_0^inf |H(j 2 pi f)|^2 df (Hz) by scipy quadrature."""
    def power(f):
        s = 2j * np.pi * f
        return abs(np.polyval(num, s) / np.polyval(den, s)) ** 2
    value, _ = integrate.quad(power, 0.0, np.inf, epsabs=0.0, epsrel=1e-11, limit=500)
    return value


# --- 1.1 continuous 2nd-order loop ---------------------------------------------------------

@pytest.mark.parametrize("damping, printed", [(0.5, "0.500000"), (0.707, "0.530303"),
                                              (1.0, "0.625000"), (2.0, "1.062500")])
def test_bl_per_wn_formula_and_integral(damping, printed):
    # Best, PLLs, ch. 4 eqs. 4.8-4.10 (B_L = (wn/2)(zeta + 1/(4 zeta))), REFERENCES 1.1 check values, rel 1e-6
    assert design.noise_bw_per_wn(damping) == pytest.approx(float(printed), rel=1e-6)
    # numerical integral of |H|^2 with scipy equals the closed form (REFERENCES 1.1 [NUM]), rel 1e-6
    wn = 1.0
    integral = continuous_bandwidth([2 * damping * wn, wn * wn], [1.0, 2 * damping * wn, wn * wn])
    assert integral == pytest.approx(design.noise_bw_per_wn(damping), rel=1e-6)


def test_bl_minimum_at_half_damping():
    # Best, PLLs, ch. 4: B_L / wn has its minimum at zeta = 0.5 (REFERENCES 1.1)
    zetas = np.linspace(0.2, 2.0, 1801)
    assert zetas[np.argmin([design.noise_bw_per_wn(z) for z in zetas])] == pytest.approx(0.5, abs=1e-3)


# --- 1.2 Rice's bilinear 2nd-order gains ---------------------------------------------------------

def rice_gains(bt, damping):
    """REFERENCES 1.2 formulas written out here: (theta_n, g K1, g K2)."""
    theta_n = bt / (damping + 1.0 / (4.0 * damping))
    d = 1.0 + 2.0 * damping * theta_n + theta_n ** 2
    return theta_n, 4.0 * damping * theta_n / d, 4.0 * theta_n ** 2 / d


@pytest.mark.parametrize("bt, damping, kp, k0, theta_printed, k1_printed, k2_printed", [
    (0.01, 0.707, 1.0, 1.0, "9.42856e-3", "2.63108665e-2", "3.50882197e-4"),
    (0.05, 1.0 / math.sqrt(2.0), 2.0, 1.0, "4.714045e-2", "6.23700624e-2", "4.15800416e-3"),
])
def test_rice_gains_check_points(bt, damping, kp, k0, theta_printed, k1_printed, k2_printed):
    g = kp * k0
    gk1, gk2 = design.bilinear_second_order(bt, damping)
    theta_n, rk1, rk2 = rice_gains(bt, damping)
    # Rice 2009 App. C bilinear pole placement (REFERENCES 1.2 [DER], equation numbers from memory): rel 1e-9
    assert gk1 == pytest.approx(rk1, rel=1e-9)
    assert gk2 == pytest.approx(rk2, rel=1e-9)
    # REFERENCES 1.2 check values [NUM] to their printed precision (9 significant digits; the first K1 is
    # 2.631086647e-2, 1.1e-9 from the rounded print, so the print itself only holds to half a unit)
    assert matches_printed(theta_n, theta_printed)
    assert matches_printed(gk1 / g, k1_printed)
    assert matches_printed(gk2 / g, k2_printed)


def test_rice_small_bt_limit():
    # REFERENCES 1.2: g K1 ~ 2 zeta wn T and g K2 ~ (wn T)^2, both about 1.3 % high at B_L T = 0.01
    gk1, gk2 = design.bilinear_second_order(0.01, 0.707)
    wn_t = 0.01 / design.noise_bw_per_wn(0.707)
    assert 2 * 0.707 * wn_t / gk1 - 1 == pytest.approx(0.013, abs=0.001)
    assert wn_t ** 2 / gk2 - 1 == pytest.approx(0.013, abs=0.001)


ACTUAL_TABLE_BT = [0.001, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.25]
ACTUAL_TABLE = {
    0.707: ["0.001001", "0.005022", "0.010089", "0.020358", "0.052259", "0.109186", "0.237930", "0.310192"],
    1.0: ["0.001001", "0.005016", "0.010064", "0.020257", "0.051616", "0.106528", "0.226624", "0.292000"],
}


@pytest.mark.parametrize("damping", sorted(ACTUAL_TABLE))
def test_actual_vs_design_bandwidth_table(damping):
    for bt, printed in zip(ACTUAL_TABLE_BT, ACTUAL_TABLE[damping]):
        actual = design.noise_bandwidth_bt((*design.bilinear_second_order(bt, damping), 0.0))
        # REFERENCES 1.2 table [NUM]: rel 1e-4; the 0.001 column is printed with 4 significant digits
        # only (0.0010009 / 0.0010006), so the table's own precision (5e-7) bounds the check there
        assert actual == pytest.approx(float(printed), rel=1e-4, abs=half_unit(printed))
        # REFERENCES 1.2: the design approximation is within 5 % only for B_L T <= 0.05
        if bt <= 0.05:
            assert abs(actual / bt - 1) < 0.05


# --- 1.3 orders 1-3 (GPS-receiver table) ---------------------------------------------------

def test_kaplan_closed_forms_and_integrals():
    a2, a3, b3 = design.KAPLAN_A2, design.KAPLAN_A3, design.KAPLAN_B3
    # Kaplan & Hegarty 2006 Table 5.6 constants (secondary page), closed forms REFERENCES 1.3 [DER], rel 1e-6
    assert (1 + a2 * a2) / (4 * a2) == pytest.approx(0.5303034, rel=1e-6)
    assert design.noise_bw_per_wn(a2 / 2) == pytest.approx(0.5303034, rel=1e-6)   # same loop, zeta = a2/2
    assert design.third_order_bw_per_w0(a3, b3) == pytest.approx(0.7844512, rel=1e-6)
    # [NUM] integrating |H|^2 of each continuous loop with scipy (w0 = 1), rel 1e-6
    # order 1: H = w0 / (s + w0) -> B_n / w0 = 1/4
    assert continuous_bandwidth([1.0], [1.0, 1.0]) == pytest.approx(0.25, rel=1e-6)
    # order 2: F = a2 w0 + w0^2/s -> H = (a2 s + 1) / (s^2 + a2 s + 1)
    assert continuous_bandwidth([a2, 1.0], [1.0, a2, 1.0]) == pytest.approx(0.5303034, rel=1e-6)
    # order 3: F = b3 w0 + a3 w0^2/s + w0^3/s^2 -> H = (b3 s^2 + a3 s + 1) / (s^3 + b3 s^2 + a3 s + 1)
    assert continuous_bandwidth([b3, a3, 1.0], [1.0, b3, a3, 1.0]) == pytest.approx(0.7844512, rel=1e-6)


@pytest.mark.parametrize("damping", [0.5, 0.707, 1.0, 3.0])
def test_third_order_coefficients_bandwidth_integral(damping):
    # our order-3 pole placement a3 = b3 = 1 + 2 zeta: closed form vs scipy quadrature of |H|^2, rel 1e-6
    a3, b3 = design.third_order_coefficients(damping)
    integral = continuous_bandwidth([b3, a3, 1.0], [1.0, b3, a3, 1.0])
    assert integral == pytest.approx(design.third_order_bw_per_w0(a3, b3), rel=1e-6)
    # and its poles are -1 and -zeta +- j sqrt(1 - zeta^2) (unit w0), as the module docstring states
    poles = np.sort_complex(np.roots([1.0, b3, a3, 1.0]))
    wanted = np.sort_complex(np.roots(np.polymul([1.0, 1.0], [1.0, 2 * damping, 1.0])))
    assert np.allclose(poles, wanted, atol=1e-6)


@pytest.mark.parametrize("order, kaplan", [(1, False), (2, False), (3, False), (3, True)])
@pytest.mark.parametrize("bt", [0.005, 0.02, 0.1])
def test_exact_bandwidth_equals_impulse_response_sum(order, bt, kaplan):
    # REFERENCES 0: B_L T = 0.5 sum h[n]^2, here by brute force with scipy.signal.lfilter.
    # Order 3 also with Kaplan's constants (REFERENCES 1.3's discrete table is for a different integrator
    # arrangement, so it is not asserted; the brute-force sum is the reference).
    if kaplan:
        gains = design.rectangular_third_order(bt, 0.0, design.KAPLAN_A3, design.KAPLAN_B3)
    else:
        gains = design.textbook_gains(order, bt, 0.707)
    n = int(400 / bt)                       # tail below 1e-30 of the sum for these pole radii
    assert design.noise_bandwidth_bt(gains) == pytest.approx(brute_force_bt(gains, n), rel=1e-9)


def block_loop_phase(g_gains, block, theta_blocks):
    """The loop updated once per block simulated sample by sample, written from its definition
    (REFERENCES 1.4): within block k the NCO advances by acc1 per sample; at the block end the
    mean of theta - theta^ over the block's samples moves acc2 += L gK3 e, acc1 += L gK2 e +
    L acc2, and the block's last step is L gK1 e + acc1. ``theta_blocks`` is the carrier phase,
    constant over each block. Returns the NCO phase averaged over each block."""
    g1, g2, g3 = (tuple(g_gains) + (0.0, 0.0))[:3]
    theta_hat = acc1 = acc2 = 0.0
    means = np.empty(len(theta_blocks))
    for k, th in enumerate(theta_blocks):
        phases = theta_hat + acc1 * np.arange(block)
        means[k] = phases.mean()
        e = th - means[k]
        acc2 += block * g3 * e
        acc1 += block * g2 * e + block * acc2
        theta_hat = phases[-1] + block * g1 * e + acc1
    return means


@pytest.mark.parametrize("order", [1, 2, 3])
@pytest.mark.parametrize("block, bt", [(4, 0.005), (16, 1e-3), (64, 4e-4)])
def test_block_loop_bandwidth_equals_its_impulse_response_sum(order, block, bt):
    # REFERENCES 0 and 1.4: white detector noise averaged over a block of L samples has 1/L of
    # its variance, so B_L T = sum h_k^2 / (2 L), h the response of the block-mean NCO phase to
    # a unit impulse of the block-mean input phase; brute force by the simulation above.
    gains = design.textbook_gains(order, bt, 0.707)
    impulse = np.zeros(int(60 / (bt * block)))
    impulse[0] = 1.0
    h = block_loop_phase(gains, block, impulse)
    assert abs(h[-1]) < 1e-9 * np.max(np.abs(h))          # the tail has died out
    brute = float(np.sum(h ** 2)) / (2 * block)
    assert design.noise_bandwidth_bt(gains, block) == pytest.approx(brute, rel=1e-9)


@pytest.mark.parametrize("order", [1, 2, 3])
@pytest.mark.parametrize("bt", [1e-5, 1e-3, 0.01, 0.1])
def test_designed_block_loop_has_the_requested_bandwidth(order, bt):
    """The blocks' design: the update block from B_L T (at most BLOCK_BT / B_L T samples, a
    power of two, 1 for wide loops) and gains refined so that the loop updated once per block
    has exactly the requested noise bandwidth."""
    d = design.design_loop(1.0, 2, bt, 0.707, order)
    assert d.block == design.update_block(bt)
    assert d.block * bt <= design.BLOCK_BT or d.block == 1
    assert d.block == design.MAX_UPDATE_BLOCK or 2 * d.block * bt > design.BLOCK_BT
    assert d.actual_bt == pytest.approx(bt, rel=1e-9)
    assert design.noise_bandwidth_bt(d.g_gains, d.block) == pytest.approx(bt, rel=1e-9)


def test_update_block_rejects_a_block_that_is_not_a_power_of_two():
    with pytest.raises(ValueError, match="power of two"):
        design.design_loop(1.0, 2, 0.001, 0.707, 2, block=12)


# --- exact designs ------------------------------------------------------------------------------

def pole_radius(g_gains, order):
    """Largest closed-loop pole radius from numpy roots of the characteristic equation of REFERENCES 0's loop,
    written in u = 1 - z^-1 (well conditioned for narrow loops): u^d + (1 - u) N(u) = 0,
    N(u) = sum_i gK_i u^(d-i); then z = 1 / (1 - u)."""
    P = np.polynomial.polynomial
    n_u = np.zeros(order)
    for i in range(order):
        n_u[order - 1 - i] += g_gains[i]                 # ascending powers of u
    char = P.polyadd(P.polymul([1.0, -1.0], n_u), np.eye(order + 1)[order])
    u = P.polyroots(char)
    return float(np.max(np.abs(1.0 / (1.0 - u))))


@pytest.mark.parametrize("order", [1, 2, 3])
@pytest.mark.parametrize("damping", [0.1, 0.5, 0.707, 1.0, 3.0, 10.0])
def test_exact_design_hits_requested_bandwidth(order, damping):
    for bt in (1e-5, 1e-3, 0.01, 0.05, 0.1):
        for fs, power in ((1.0, 1), (48000.0, 4)):
            # the loop updated every sample (block=1; update blocks: test_designed_block_loop_...)
            d = design.design_loop(fs, power, bt * fs, damping, order, exact=True, block=1)
            # REFERENCES 0: the actual discrete bandwidth is the quantity to test, rel 1e-9
            assert d.actual_bt == pytest.approx(bt, rel=1e-9)
            radius = pole_radius(d.g_gains, order)
            assert radius < 1.0                       # stable
            assert d.k1 * power == pytest.approx(d.g_gains[0], rel=1e-15)  # g = Kp K0 = M
            if bt >= 0.01 and power == 1:
                # independent of the Lyapunov solution: brute-force 0.5 sum h^2 (numpy/scipy), rel 1e-9,
                # summed over 80 time constants of the slowest pole
                n = int(80 / -np.log(radius)) + 100
                assert brute_force_bt(d.g_gains, n) == pytest.approx(bt, rel=1e-9)


@pytest.mark.parametrize("order", [1, 2, 3])
def test_design_carries_one_gain_per_order(order):
    d = design.design_loop(1e4, 4, 50.0, 0.707, order)
    assert len(d.g_gains) == order and all(g > 0.0 for g in d.g_gains)
    assert design.padded_gains(d.g_gains) == pytest.approx([4.0 * k for k in (d.k1, d.k2, d.k3)], rel=1e-15)
    assert tuple(design.LOOP_FORMULAS) == design.LOOP_ORDERS


@pytest.mark.parametrize("order", [1, 2, 3])
@pytest.mark.parametrize("bt", [0.002, 0.05])
def test_state_matrices_match_closed_loop_transfer_function(order, bt):
    # scipy.signal.ss2tf of x[n+1] = (I + Delta) x[n] + B theta[n], theta^ = x_0, against the
    # polynomial closed loop z^-1 N(u) / (u^d + z^-1 N(u)) (module docstring); rel 1e-9
    g = design.loop_gains(order, bt, 0.707)
    delta, b, _ = design.loop_state_matrices(g)
    c = np.zeros((1, order))
    c[0, 0] = 1.0
    num, den = signal.ss2tf(np.eye(order) + delta, b[:, None], c, np.zeros((1, 1)))
    b_ref, a_ref = design.closed_loop(g)
    assert den == pytest.approx(a_ref, rel=1e-9, abs=1e-12)
    assert num[0] == pytest.approx(b_ref, rel=1e-9, abs=1e-12)
    # the kernel's zero-padded slots describe the same loop
    assert design.noise_bandwidth_bt(design.padded_gains(g)) == design.noise_bandwidth_bt(g)


# --- 2.1 steady-state errors ----------------------------------------------------------------

def test_continuous_ramp_error_example():
    # REFERENCES 2.1 (Gardner 2005 from memory): B_L 20 Hz, zeta 0.707 -> wn 37.7143 rad/s; 10 Hz/s -> 0.04417 rad
    assert matches_printed(design.natural_frequency(20.0, 0.707), "37.7143")
    err = design.continuous_ramp_phase_error(20.0, 0.707, 10.0)
    assert matches_printed(err, "0.04417")
    assert matches_printed(math.degrees(err), "2.531")


def test_exact_discrete_ramp_error_and_simulation():
    # REFERENCES 2.1 [DER final-value theorem]: phi_ss = alpha / (Kp K0 K2) = 0.02849959 rad
    d = design.design_loop(1.0, 1, 0.01, 0.707, 2, exact=False)       # Rice's gains, g = 1
    alpha = 1e-5
    predicted = d.ramp_phase_error(alpha / (2 * math.pi))             # rate in Hz/s at fs = 1
    assert predicted == pytest.approx(alpha / d.g_gains[1], rel=1e-12)
    assert matches_printed(predicted, "0.02849959")
    # phase-domain simulation with scipy.signal.lfilter on the closed loop, after >= 20/(B_L T) samples: rel 1e-6
    n = np.arange(4000)
    theta = alpha * n * n / 2.0
    b, a = design.closed_loop(d.g_gains)
    phi = theta - signal.lfilter(b, a, theta)
    assert phi[-1] == pytest.approx(predicted, rel=1e-6)
    # REFERENCES 2.1: the continuous approximation gives 0.02812 here
    wn_t = 2 * 0.01 / (0.707 + 1 / (4 * 0.707))
    assert matches_printed(alpha / wn_t ** 2, "0.02812")


def test_third_order_jerk_error_simulation():
    # REFERENCES 2.1: rectangular integrators, jerk J rad/sample^3 -> J/(w0 T)^3 exactly (Kaplan's form
    # (d^3R/dt^3)/w0^3 from memory); B_n T = 0.01 with Kaplan's w0 = B_n/0.7845 and J = 1e-9 -> 4.828129e-4 rad
    w0t = 0.01 / 0.7845
    gains = (design.KAPLAN_B3 * w0t, design.KAPLAN_A3 * w0t ** 2, w0t ** 3)
    jerk = 1e-9
    assert matches_printed(jerk / gains[2], "4.828129e-4")
    # phase-domain simulation of the loop of REFERENCES 0 (per sample: lfilter's direct form loses ~5e-6 of
    # this value to rounding on a cubic input of 1e3 rad, so the loop equations are iterated here instead),
    # 20000 samples = 39 time constants of the slowest pole: rel 1e-6
    phi = [0.0]
    theta_hat = acc1 = acc2 = 0.0
    for i in range(20000):
        e = jerk * i ** 3 / 6.0 - theta_hat
        acc2 += gains[2] * e
        acc1 += gains[1] * e + acc2
        theta_hat += gains[0] * e + acc1
        phi[0] = e
    phi = np.array(phi)
    assert phi[-1] == pytest.approx(jerk / gains[2], rel=1e-6)
    # the module's prediction for such a loop, in Hz/s^2 at fs = 1
    d = design.LoopDesign(1.0, 1, 0.01, 0.707, 3, 0.01, design.noise_bandwidth_bt(gains), gains, *gains)
    assert design.jerk_phase_error(d, jerk / (2 * math.pi)) == pytest.approx(phi[-1], rel=1e-6)
    # continuous example: B_n = 18 Hz -> w0 = 22.9446 rad/s; 10 Hz/s^2 -> 0.005202 rad (0.298 deg)
    w0 = 18.0 / 0.7845
    assert matches_printed(w0, "22.9446")
    fs = 1e4
    gains = (design.KAPLAN_B3 * w0 / fs, design.KAPLAN_A3 * (w0 / fs) ** 2, (w0 / fs) ** 3)
    d = design.LoopDesign(fs, 1, 18.0, 0.707, 3, 18.0 / fs, design.noise_bandwidth_bt(gains), gains, *gains)
    assert matches_printed(design.jerk_phase_error(d, 10.0), "0.005202")
    assert matches_printed(math.degrees(design.jerk_phase_error(d, 10.0)), "0.298")


def test_third_order_has_no_ramp_error_and_mth_power_margin():
    # REFERENCES 2.1: a 3rd-order loop has zero steady error for a frequency ramp
    d3 = design.design_loop(1e4, 4, 20.0, 0.707, 3)
    assert d3.ramp_phase_error(50.0) == 0.0
    # REFERENCES 2.1 [DER]: the sine S-curve holds while |M phi_ss| < pi/2, so the usable rate shrinks by M
    d1 = design.design_loop(1e4, 1, 20.0, 0.707, 2)
    d8 = design.design_loop(1e4, 8, 20.0, 0.707, 2)
    assert design.max_trackable_ramp_hz_per_s(d1) / design.max_trackable_ramp_hz_per_s(d8) == \
        pytest.approx(8.0, rel=1e-12)
    assert 8 * d8.ramp_phase_error(design.max_trackable_ramp_hz_per_s(d8)) == pytest.approx(math.pi / 2, rel=1e-12)


# --- 2.2 acquisition ------------------------------------------------------------------------------

def test_rice_pull_in_worked_example():
    # Rice 2009 App. C eqs. C.38-C.40 (secondary page), REFERENCES 2.2: B_n 100 Hz, df 50 Hz -> 10 ms + 13 ms = 23 ms
    assert design.pull_in_time_rice_s(50.0, 100.0) == pytest.approx(0.010, rel=1e-12)
    assert design.phase_settling_time_rice_s(100.0) == pytest.approx(0.013, rel=1e-12)
    d = design.design_loop(1e6, 1, 100.0, 0.707, 2)
    acq = design.assess_acquisition(d, 50.0)
    assert acq.pull_in_rice_s + design.phase_settling_time_rice_s(100.0) == pytest.approx(0.023, rel=1e-9)


@pytest.mark.parametrize("ratio, rice, gardner, simulated", [(2, "16000", "16655", 15924),
                                                             (3, "36000", "37474", 36894),
                                                             (5, "100000", "104093", 103260)])
def test_pull_in_table(ratio, rice, gardner, simulated):
    # REFERENCES 2.2 table (B_L T = 0.001, zeta 0.707, samples): Rice's and Gardner's columns (Gardner from memory)
    bt = 0.001
    df = ratio * bt
    assert matches_printed(design.pull_in_time_rice_s(df, bt), rice)
    wn = design.natural_frequency(bt, 0.707)
    assert matches_printed(design.pull_in_time_gardner_s(df, wn, 0.707), gardner)
    # the design's prediction (Gardner with the discrete design's wn) vs the simulated column: +/-20 % (REFERENCES)
    d = design.design_loop(1.0, 1, bt, 0.707, 2)
    assert design.pull_in_time_s(d, df) == pytest.approx(simulated, rel=0.20)


def test_gardner_equals_416_over_b_cubed():
    # REFERENCES 2.2 (Gardner from memory): T_P = 4.16 df^2 / B_L^3 at zeta 0.707, within 4 % of Rice's rule
    wn = design.natural_frequency(1.0, 0.707)
    coefficient = design.pull_in_time_gardner_s(1.0, wn, 0.707)
    assert matches_printed(coefficient, "4.16")
    assert abs(coefficient / 4.0 - 1) < 0.04 + 1e-3


def simulated_pull_in(power, bt, damping, offset, n, start_phases=(0.0, 1.5, 3.0, 4.5)):
    """Nonlinear discrete loop (sine detector sin(M phi), REFERENCES 0 structure, g = M), fs = 1:
    samples until the M phi error stays within 0.5 rad of its final value; mean over start phases."""
    d = design.design_loop(1.0, power, bt, damping, 2)
    k1, k2 = d.k1, d.k2
    dw = 2 * math.pi * offset
    times = []
    for phase0 in start_phases:
        theta_hat, acc = 0.0, 0.0
        err = np.empty(n)
        for i in range(n):
            psi = power * (phase0 + dw * i - theta_hat)
            e = math.sin(psi)
            err[i] = psi
            acc += k2 * e
            theta_hat += k1 * e + acc
        final = err[-1]
        wrapped = np.angle(np.exp(1j * (err - final)))
        outside = np.nonzero(np.abs(wrapped) > 0.5)[0]
        times.append(outside[-1] + 1 if outside.size else 0)
    return float(np.mean(times))


@pytest.mark.slow
def test_pull_in_mth_power_mapping_simulation():
    # M-th power mapping (REFERENCES 2.1/5 [DER]): a QPSK-type loop (M = 2 here) sees the offset as M df.
    # Predicted pull-in for df = 1.5 B_L at M = 2 equals the M = 1 case at 3 B_L, whose simulated value in
    # REFERENCES 2.2 is 36894 samples; our own simulation of the M = 2 loop must agree within +/-20 %.
    bt = 0.001
    d = design.design_loop(1.0, 2, bt, 0.707, 2)
    predicted = design.pull_in_time_s(d, 1.5 * bt)
    assert predicted == pytest.approx(design.pull_in_time_s(design.design_loop(1.0, 1, bt, 0.707, 2), 3 * bt),
                                      rel=1e-12)
    simulated = simulated_pull_in(2, bt, 0.707, 1.5 * bt, 110000)
    assert simulated == pytest.approx(predicted, rel=0.20)
    assert simulated == pytest.approx(36894, rel=0.20)


@pytest.mark.parametrize("damping, simulated", [(0.5, 2.744), (0.707, 3.085), (1.0, 3.589)])
def test_pull_out(damping, simulated):
    # Gardner 2005 ch. 5 (from memory): dw_PO ~ 1.8 wn (zeta + 1); REFERENCES 2.2 formula column 2.70/3.07/3.60
    assert matches_printed(design.pull_out_rad_s(1.0, damping), {0.5: "2.70", 0.707: "3.07", 1.0: "3.60"}[damping])
    # the design's pull-out (Hz) vs the simulated-from-lock values of REFERENCES 2.2: +/-5 %
    d = design.design_loop(1.0, 1, 0.001, damping, 2)
    assert design.pull_out_hz(d) * 2 * math.pi / d.natural_frequency == pytest.approx(simulated, rel=0.05)
    # M-th power mapping [DER]: the carrier-frequency limit shrinks by M
    d4 = design.design_loop(1.0, 4, 0.001, damping, 2)
    assert design.pull_out_hz(d4) == pytest.approx(design.pull_out_hz(d) / 4, rel=1e-12)


def test_acquisition_verdicts():
    d = design.design_loop(1e4, 4, 20.0, 0.707, 2)
    lock_in = design.lock_in_range_hz(d)
    # lock-in 2 zeta wn (Gardner, from memory) is an engineering estimate (Kuznetsov 2023): only its form is checked
    assert lock_in == pytest.approx(2 * 0.707 * d.natural_frequency / (2 * math.pi * 4), rel=1e-12)
    assert not design.assess_acquisition(d, 0.5 * lock_in).needed
    slow = design.assess_acquisition(d, 3 * lock_in)
    assert slow.reason == design.ACQ_PULLS_IN and not slow.needed
    assert design.assess_acquisition(d, 3 * lock_in, budget_s=slow.pull_in_s / 2).reason == design.ACQ_TOO_SLOW
    beyond = design.assess_acquisition(d, 1e4 / 8 + 1)             # fs/(2M) = 1250 Hz
    assert beyond.needed and beyond.reason == design.ACQ_BEYOND_RANGE
    first = design.design_loop(1e4, 4, 20.0, 0.707, 1)
    assert design.assess_acquisition(first, 2 * design.lock_in_range_hz(first)).reason == design.ACQ_BEYOND_HOLD
    # first-order hold range: the psi-domain step M dw T must not exceed g K1 (sine detector saturates at 1)
    assert design.lock_in_range_hz(first) == pytest.approx(first.g_gains[0] * 1e4 / (2 * math.pi * 4), rel=1e-12)


# --- 3. phase-error variance ------------------------------------------------------------------------

@pytest.mark.parametrize("rho, printed", [(2, "0.76446"), (5, "0.22723"), (10, "0.10566"), (100, "0.01005")])
def test_tikhonov_variance(rho, printed):
    # Viterbi 1963/1966 Tikhonov density (from memory), REFERENCES 3 values [NUM], printed precision
    value = design.tikhonov_phase_variance(rho)
    assert matches_printed(value, printed)
    # direct integral of phi^2 exp(rho cos phi) / (2 pi I0(rho)) over (-pi, pi] with scipy, rel 1e-8
    direct, _ = integrate.quad(lambda p: p * p * np.exp(rho * (np.cos(p) - 1)) / (2 * np.pi * special.i0e(rho)),
                               -np.pi, np.pi, epsabs=0.0, epsrel=1e-12)
    assert value == pytest.approx(direct, rel=1e-8)


def test_tikhonov_limits():
    # uniform phase at rho = 0: pi^2/3; high loop SNR: the linear variance 1/rho (REFERENCES 3)
    assert design.tikhonov_phase_variance(0.0) == pytest.approx(math.pi ** 2 / 3, rel=1e-12)
    for rho in (1e3, 1e5):
        assert design.tikhonov_phase_variance(rho) == pytest.approx(1 / rho, rel=1.0 / rho)


def test_linear_variance_check_values():
    # Rice 2009 eq. C.43 (secondary page): var = N0 B_L / C; C/N0 40 dB-Hz, B_L 10 Hz -> 1.000e-3 rad^2, 1.812 deg
    fs = 1000.0                                  # any update rate: Es/N0 = (C/N0) T
    var = design.phase_error_variance(1, 1e4 / fs, 10.0 / fs)
    assert var == pytest.approx(1.0e-3, rel=1e-12)
    assert matches_printed(math.degrees(math.sqrt(var)), "1.812")
    # REFERENCES 3: Es/N0 10 dB, design B_L T 0.005 (actual 0.00502) -> 5.02e-4 rad^2
    d = design.design_loop(1.0, 1, 0.005, 0.707, 2, exact=False, block=1)
    assert matches_printed(d.actual_bt, "0.00502")
    assert matches_printed(design.phase_error_variance(1, 10.0, d.actual_bt), "5.02e-4")
    assert matches_printed(design.phase_error_variance(1, design.db_to_linear(3.0), d.actual_bt), "2.517e-3")


# --- 4. squaring loss ----------------------------------------------------------------------------

V_COEFFICIENTS = {  # REFERENCES 4 [DER]: V_M(s2) = sum_k C(M,k)^2 k! s2^k
    1: [1],
    2: [4, 2],
    4: [16, 72, 96, 24],
    8: [64, 1568, 18816, 117600, 376320, 564480, 322560, 40320],
}


@pytest.mark.parametrize("power", sorted(V_COEFFICIENTS))
def test_mth_power_noise_coefficients(power):
    for s2 in (0.01, 0.1, 0.5, 1.0, 2.0):
        expected = sum(c * s2 ** (k + 1) for k, c in enumerate(V_COEFFICIENTS[power]))
        assert design.mth_power_noise(power, 1.0 / s2) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("esn0_db, v_printed", [(10, ["0.1", "0.42", "2.4184", "57.01634"]),
                                                (6, ["0.2511886", "1.1309460", "10.178954", "1420.4999"])])
def test_handy_v_m_values(esn0_db, v_printed):
    # REFERENCES 4 "handy" V_M values for M = 1, 2, 4, 8, printed precision
    for power, printed in zip((1, 2, 4, 8), v_printed):
        assert matches_printed(design.mth_power_noise(power, design.db_to_linear(esn0_db)), printed)


SL_DB_TABLE = {  # REFERENCES 4 squaring loss (dB) at Es/N0 0, 3, 6, 10, 15, 20 dB
    2: ["-1.761", "-0.971", "-0.514", "-0.212", "-0.068", "-0.022"],
    4: ["-11.139", "-6.947", "-4.036", "-1.794", "-0.601", "-0.194"],
    8: ["-43.527", "-30.225", "-19.463", "-9.498", "-3.290", "-1.060"],
}
SL_LINEAR_TABLE = {
    2: ["0.66667", "0.79962", "0.88842", "0.95238", "0.98443", "0.99502"],
    4: ["0.07692", "0.20197", "0.39484", "0.66159", "0.87081", "0.95639"],
    8: ["4.4391e-5", "0.00095", "0.01132", "0.11225", "0.46882", "0.78352"],
}
SL_ESN0_DB = [0, 3, 6, 10, 15, 20]


@pytest.mark.parametrize("power", [2, 4, 8])
def test_squaring_loss_table(power):
    for i, esn0_db in enumerate(SL_ESN0_DB):
        rho = design.db_to_linear(esn0_db)
        s_l = design.squaring_loss(power, rho)
        # exact values rel 1e-9: Lindsey & Simon closed forms for M = 2, 4 (from memory), REFERENCES 4;
        # for M = 8 the coefficient sum of REFERENCES 4 [DER]
        if power == 2:
            exact = 1.0 / (1.0 + 1.0 / (2.0 * rho))
        elif power == 4:
            exact = 1.0 / (1.0 + 9.0 / (2 * rho) + 6.0 / rho ** 2 + 3.0 / (2 * rho ** 3))
        else:
            exact = power ** 2 / rho / sum(c * rho ** -(k + 1) for k, c in enumerate(V_COEFFICIENTS[8]))
        assert s_l == pytest.approx(exact, rel=1e-9)
        # REFERENCES 4 tables, printed precision
        assert matches_printed(10 * math.log10(s_l), SL_DB_TABLE[power][i])
        assert matches_printed(s_l, SL_LINEAR_TABLE[power][i])


@pytest.mark.parametrize("power, esn0_db", [(2, 3), (2, 10), (4, 6), (4, 10)])
def test_mth_power_noise_monte_carlo(power, esn0_db):
    # REFERENCES 4 model: E|z^M - e^{jM theta}|^2 = V_M for M-PSK data in complex AWGN (MC there: 0.995-1.005).
    # Seeded, 4e5 samples; tolerance 4 standard errors of the sample mean of |w|^2 (estimated from the sample).
    rng = np.random.default_rng(1000 * power + esn0_db)
    n = 400_000
    s2 = 1.0 / design.db_to_linear(esn0_db)
    theta = 0.3
    data = np.exp(2j * np.pi * rng.integers(0, power, n) / power)
    noise = math.sqrt(s2 / 2) * (rng.standard_normal(n) + 1j * rng.standard_normal(n))
    z = data * np.exp(1j * theta) + noise
    w2 = np.abs(z ** power - np.exp(1j * power * theta)) ** 2
    standard_error = w2.std() / math.sqrt(n)
    assert abs(w2.mean() - design.mth_power_noise(power, 1 / s2)) < 4 * standard_error


# --- 5. cycle slips --------------------------------------------------------------------------------

@pytest.mark.parametrize("rho, printed", [(1, "7.91011"), (2, "51.2875"), (3, "352.673"), (5, "18308.4"),
                                          (7, "981864"), (10, "3.91244e8")])
def test_first_order_slip_time(rho, printed):
    # Viterbi 1963 / 1966 (formula from memory; matches the first-passage integral), REFERENCES 5 values
    assert matches_printed(design.slip_time_bt_first_order(rho), printed)


def test_slip_time_large_rho_form():
    # REFERENCES 5: 2 B_L T_slip ~ (pi/2) e^{2 rho}; I0(rho)^2 = e^{2 rho}/(2 pi rho) (1 + 1/(4 rho) + ...)
    for rho in (30.0, 100.0):
        ratio = 2 * design.slip_time_bt_first_order(rho) / (math.pi / 2 * math.exp(2 * rho))
        assert ratio == pytest.approx(1 + 1 / (4 * rho), abs=1 / rho ** 2)
    assert design.slip_time_bt_first_order(1000.0) == math.inf     # overflow reported as never


def test_slip_worked_example():
    # REFERENCES 5 worked example [DER, NUM]: M = 4, Es/N0 3 dB, B_L T 0.02 -> var 4.9631e-2, rho_psi 1.2593
    # (1.00 dB), B_L T_slip 12.84 -> 642 symbols
    esn0 = design.db_to_linear(3.0)
    d1 = design.design_loop(1.0, 4, 0.02, 0.707, 1)
    assert matches_printed(design.phase_error_variance(4, esn0, d1.actual_bt), "4.9631e-2")
    rho = design.loop_snr(4, esn0, d1.actual_bt)
    assert matches_printed(rho, "1.2593")
    assert matches_printed(10 * math.log10(rho), "1.00")
    assert matches_printed(design.slip_time_bt_first_order(rho), "12.84")
    first = design.mean_time_between_slips_s(d1, esn0)
    assert matches_printed(first, "642")
    # simulated first-order 718 +/- 21 and second-order (zeta 0.707) 476 +/- 13: factor 1.3 either way (REFERENCES 5)
    assert 1 / 1.3 < first / 718 < 1.3
    d2 = design.design_loop(1.0, 4, 0.02, 0.707, 2)
    second = design.mean_time_between_slips_s(d2, esn0)
    assert 1 / 1.3 < second / 476 < 1.3


@pytest.mark.parametrize("rho, simulated", [(2.0, 23.0), (2.5, 44.2), (3.0, 88.9)])
def test_second_order_slip_band(rho, simulated):
    # REFERENCES 5 empirical band (simulated 2nd-order loop, zeta 0.707, B_L T 0.002): regression band +/-25 %
    bt = 0.002
    d = design.design_loop(1.0, 1, bt, 0.707, 2)
    esn0 = rho * bt                                   # M = 1: rho = 1/(B_L T s2) = (Es/N0)/(B_L T)
    assert design.loop_snr(1, esn0, d.actual_bt) == pytest.approx(rho, rel=1e-9)
    bl_tslip = design.mean_time_between_slips_s(d, esn0) * bt
    assert bl_tslip == pytest.approx(simulated, rel=0.25)


def test_slip_mapping_bpsk():
    # REFERENCES 5: for BPSK the psi-domain loop SNR is Lindsey & Simon's rho S_L / 4 (from memory), with
    # rho = (Es/N0)/(B_L T) the unmodulated-carrier loop SNR
    bt, esn0 = 0.004, design.db_to_linear(7.0)
    assert design.loop_snr(2, esn0, bt) == pytest.approx(esn0 / bt * design.squaring_loss(2, esn0) / 4, rel=1e-12)


# --- transient and frequency responses -------------------------------------------------------------

@pytest.mark.parametrize("damping", [0.5, 0.707, 1.0])
def test_step_response_matches_continuous_loop(damping):
    # at small B_L T the discrete loop approaches the continuous H(s) of REFERENCES 1.1; scipy.signal.step of
    # that H gives the reference overshoot, rise and settling times (relative departure ~ B_L T, here 1e-4)
    fs, bl = 1e4, 1.0
    d = design.design_loop(fs, 1, bl, damping, 2, block=1)     # responses: see step_responses
    steps = design.step_responses(d)
    wn = design.natural_frequency(bl, damping)
    t = np.linspace(0.0, 40.0 / bl, 100001)
    _, y = signal.step(([2 * damping * wn, wn * wn], [1.0, 2 * damping * wn, wn * wn]), T=t)
    reference = design.step_metrics(t, y, 1.0)
    assert steps.phase_metrics.overshoot_pct == pytest.approx(reference.overshoot_pct, rel=2e-3)
    assert steps.phase_metrics.rise_time_s == pytest.approx(reference.rise_time_s, rel=2e-3)
    assert steps.phase_metrics.settling_time_s == pytest.approx(reference.settling_time_s, rel=2e-3)
    # peak phase error after a frequency step: continuous E(s) = dw / (s^2 + 2 zeta wn s + wn^2), per Hz
    _, e = signal.impulse(([2 * math.pi], [1.0, 2 * damping * wn, wn * wn]), T=t)
    assert steps.peak_error_rad_per_hz == pytest.approx(np.max(np.abs(e)), rel=2e-3)


def test_first_order_step_response():
    # first-order loop H(s) = K/(s + K), K = 4 B_L (REFERENCES 1.3 order 1: B_n = w0/4): rise time ln 9 / K,
    # no overshoot, steady error dw / K after a frequency step
    fs, bl = 1e5, 10.0
    d = design.design_loop(fs, 1, bl, 0.707, 1, block=1)
    steps = design.step_responses(d)
    k = 4 * bl
    assert steps.phase_metrics.rise_time_s == pytest.approx(math.log(9) / k, rel=1e-3)
    assert steps.phase_metrics.overshoot_pct == 0.0
    assert steps.freq_step_error[-1] == pytest.approx(2 * math.pi / k, rel=1e-3)


@pytest.mark.parametrize("order", [1, 2, 3])
def test_magnitude_response_integrates_to_noise_bandwidth(order):
    # Parseval: integral_0^{fs/2} |H(f)|^2 df = 0.5 fs sum h^2 = B_L (REFERENCES 0); trapezoid rule on a dense
    # grid (scipy.integrate), rel 1e-4; and |H(0)| = 1 (0 dB)
    fs = 1000.0
    d = design.design_loop(fs, 2, 5.0, 0.707, order, block=1)
    f = np.concatenate((np.linspace(0.0, 200.0, 400001), np.linspace(200.0, fs / 2, 100001)[1:]))
    power = 10 ** (design.closed_loop_magnitude_db(d, f) / 10)
    assert integrate.trapezoid(power, f) == pytest.approx(5.0, rel=1e-4)
    assert design.closed_loop_magnitude_db(d, [0.0])[0] == pytest.approx(0.0, abs=1e-12)
    # equals scipy.signal.freqz of the closed-loop polynomials (well conditioned at B_L T = 0.005): rel 1e-9
    b, a = design.closed_loop(d.g_gains)
    _, h = signal.freqz(b, a, worN=f[1::997], fs=fs)
    assert np.allclose(design.closed_loop_magnitude_db(d, f[1::997]), 20 * np.log10(np.abs(h)), rtol=0, atol=1e-7)
    if order == 1:
        # first-order loop: |H|^2 = 1/2 at the corner; discrete corner near K/(2 pi) = 4 B_L/(2 pi)
        assert design.closed_loop_3db_hz(d) == pytest.approx(4 * 5.0 / (2 * math.pi), rel=0.02)


@pytest.mark.parametrize("order", [1, 2, 3])
@pytest.mark.parametrize("block, bl", [(4, 5.0), (16, 1.0), (64, 0.3)])
def test_block_loop_magnitude_response_integrates_to_its_noise_bandwidth(order, block, bl):
    # Parseval (REFERENCES 0) for the loop updated once per block: the closed-loop gain from the
    # carrier phase to the NCO phase, block mean included, integrates to the B_L that the
    # Lyapunov closed form gives for that loop (computed another way: design's actual_bt);
    # trapezoid rule on a dense grid (scipy.integrate), rel 1e-6; and 0 dB at f = 0
    fs = 1000.0
    d = design.design_loop(fs, 2, bl, 0.707, order, block=block)
    assert d.block == block
    f = np.concatenate((np.linspace(0.0, 200.0, 400001), np.linspace(200.0, fs / 2, 100001)[1:]))
    power = 10 ** (design.closed_loop_magnitude_db(d, f) / 10)
    assert integrate.trapezoid(power, f) == pytest.approx(d.actual_bt * fs, rel=1e-6)
    assert design.closed_loop_magnitude_db(d, [0.0])[0] == pytest.approx(0.0, abs=1e-12)


def test_suggest_noise_bw_minimises_total_error():
    fs, power, esn0, rate = 1e4, 4, design.db_to_linear(10.0), 200.0
    best = design.suggest_noise_bw(fs, power, esn0, rate)
    total = lambda bw: design.total_phase_error_variance(design.design_loop(fs, power, bw), esn0, rate)  # noqa: E731
    assert total(best) <= total(0.97 * best) and total(best) <= total(1.03 * best)
    # continuous estimate from REFERENCES 2.1 and 4: minimise a B + k/B^4 -> B = (4k/a)^(1/5); the exact
    # discrete optimum differs from it by about B_L T (here ~1e-2)
    a = design.mth_power_noise(power, esn0) / (fs * power ** 2)
    k = (2 * math.pi * rate * design.noise_bw_per_wn(0.707) ** 2) ** 2
    assert best == pytest.approx((4 * k / a) ** 0.2, rel=0.05)
    with pytest.raises(ValueError, match="loop_order"):
        design.suggest_noise_bw(fs, power, esn0, rate, loop_order=3)


@pytest.mark.parametrize("order", [1, 2, 3])
def test_step_responses_equal_lfilter_of_closed_loop(order):
    # reference: scipy.signal.lfilter on the closed-loop H(z) (REFERENCES 1.2 form), where it is well conditioned
    fs = 1000.0
    d = design.design_loop(fs, 4, 5.0, 0.707, order, block=1)    # the per-sample loop's H(z)
    steps = design.step_responses(d, n_samples=5000, max_points=5000)     # every sample
    b, a = design.closed_loop(d.g_gains)
    n = np.arange(5000)
    # the direct form resolves the loop only to ~eps / a(1), a(1) = g K_d (the last gain): 100x that as tolerance
    tol = 100 * np.finfo(float).eps / d.g_gains[order - 1]
    assert np.allclose(steps.phase_step, signal.lfilter(b, a, np.ones(5000)), rtol=0, atol=tol)
    ramp = 2 * np.pi * n / fs                                   # 1 Hz frequency step from sample 0
    assert np.allclose(steps.freq_step_error, ramp - signal.lfilter(b, a, ramp), rtol=0, atol=tol * ramp[-1])
    # NCO step v[n] = theta^[n+1] - theta^[n]: H applied to the input increments theta[n] - theta[n-1],
    # which for theta[n] = f n are 0 at n = 0 and f from n = 1 on
    nco = signal.lfilter(b, a, np.concatenate(([0.0], np.ones(5000))))[1:]
    assert np.allclose(steps.freq_step_nco, nco, rtol=0, atol=tol)


def test_narrow_third_order_responses_scale_with_bandwidth():
    # continuous limit (REFERENCES 1.1/1.3): times scale as 1/B_L and overshoot is fixed when B_L T -> 0.
    # At B_L T = 1e-5 the closed-loop polynomial no longer resolves g K3 ~ 2e-15, so this checks the
    # simulation against a ten-times-wider loop instead (departure ~ B_L T, here < 1e-3)
    wide = design.step_responses(design.design_loop(1e5, 1, 10.0, 0.707, 3, block=1))
    narrow = design.step_responses(design.design_loop(1e5, 1, 1.0, 0.707, 3, block=1))
    assert narrow.phase_metrics.overshoot_pct == pytest.approx(wide.phase_metrics.overshoot_pct, rel=2e-3)
    assert narrow.phase_metrics.settling_time_s == pytest.approx(10 * wide.phase_metrics.settling_time_s, rel=2e-3)
    assert narrow.peak_error_rad_per_hz == pytest.approx(10 * wide.peak_error_rad_per_hz, rel=2e-3)  # ~ dw / wn
    assert abs(narrow.freq_step_error[-1]) < 1e-3 * narrow.peak_error_rad_per_hz


def test_strided_responses_equal_every_sample_simulation():
    # the strided grid (delta-form matrix powers) returns the same samples as a sample-by-sample run
    d = design.design_loop(1e4, 2, 3.0, 0.5, 3, block=1)
    n = 400000                                         # beyond the fast segment (40 / B_L T = 133333 samples)
    full = design.step_responses(d, n_samples=n, max_points=n)
    strided = design.step_responses(d, n_samples=n, max_points=4000)
    index = np.rint(strided.time_s * 1e4).astype(int)
    assert len(index) < 8000 and index[-1] == n - 100 and index[1] == 34   # strides 34 (fast) and 100 (slow)
    assert np.allclose(strided.phase_step, full.phase_step[index], rtol=0, atol=1e-12)
    assert np.allclose(strided.freq_step_error, full.freq_step_error[index], rtol=0, atol=1e-12)
    assert np.allclose(strided.freq_step_nco, full.freq_step_nco[index], rtol=0, atol=1e-12)
    assert strided.phase_metrics.settling_time_s == pytest.approx(full.phase_metrics.settling_time_s, abs=34 / 1e4)


def simulate_block_loop(g, block, theta, blocks):
    """The linearised loop updated once per ``block`` samples, written out from its definition
    (the loop kernel's docstring): within block k the NCO runs at acc1 from theta^_k; at the
    block end its mean error e moves acc2 += L g3 e, acc1 += L g2 e + L acc2, and the block's
    last NCO step is L g1 e + acc1. ``theta(t)`` is the carrier phase at sample t. Returns per
    block: the NCO phase averaged over the block, the mean error, the NCO's mean step."""
    g1, g2, g3 = (list(g) + [0.0, 0.0])[:3]
    L = block
    nco, acc1, acc2 = 0.0, 0.0, 0.0
    out = np.empty((blocks, 3))
    for k in range(blocks):
        t = k * L + np.arange(L)
        inside = nco + np.arange(L) * acc1
        e = np.mean(theta(t) - inside)
        acc1_old = acc1
        acc2 += L * g3 * e
        acc1 += L * g2 * e + L * acc2
        step = (L - 1) * acc1_old + L * g1 * e + acc1
        out[k] = inside.mean(), e, step / L
        nco += step
    return out


@pytest.mark.parametrize("order", [1, 2, 3])
@pytest.mark.parametrize("bt, block", [(5e-3, 4), (1e-3, 16), (2e-4, 64)])
def test_block_loop_responses_equal_a_simulation_of_the_block_loop(order, bt, block):
    # reference: the block loop run block by block in the test (simulate_block_loop, from the
    # kernel's definition), against step_responses of a design updated once per block: the
    # NCO's block-mean phase after a unit phase step, the mean error and the NCO's mean step
    # after a 1 Hz frequency step, at every block start; to 1e-9 (the simulation's phase grows
    # to about 2 pi f t)
    fs = 1e4
    d = design.design_loop(fs, 2, bt * fs, 0.707, order, block=block)
    assert d.block == block
    blocks = 3000
    steps = design.step_responses(d, n_samples=blocks * block, max_points=blocks)
    assert np.allclose(steps.time_s, block * np.arange(blocks) / fs, rtol=0, atol=1e-15)
    f = 2 * np.pi / fs
    phase = simulate_block_loop(d.g_gains, block, lambda t: np.ones(len(t)), blocks)
    freq = simulate_block_loop(d.g_gains, block, lambda t: f * t, blocks)
    assert np.allclose(steps.phase_step, phase[:, 0], rtol=0, atol=1e-9)
    assert np.allclose(steps.freq_step_error, freq[:, 1], rtol=0, atol=1e-9)
    assert np.allclose(steps.freq_step_nco, freq[:, 2] / f, rtol=0, atol=1e-9)
    # and the final values of the block loop: the block-mean error f / gK1 (order 1), else 0
    assert steps.error_final_rad_per_hz == pytest.approx(freq[-1, 1], abs=1e-6 * abs(freq[:, 1]).max())


@pytest.mark.parametrize("n", [1, 2, 3, 4, 9])
def test_solve_small_matches_numpy(n):
    # Reference: numpy.linalg.solve (LAPACK gesv), on seeded random systems.
    rng = np.random.default_rng(n)
    a = rng.standard_normal((n, n)) + n * np.eye(n)
    b = rng.standard_normal(n)
    np.testing.assert_allclose(design.solve_small(a, b), np.linalg.solve(a, b), rtol=1e-12, atol=1e-12)
    # a zero leading pivot needs the row exchange
    perm = np.roll(np.eye(n), 1, axis=0) if n > 1 else np.eye(1)
    np.testing.assert_allclose(design.solve_small(perm, b), np.linalg.solve(perm, b), atol=1e-15)


def test_solve_small_rejects_singular():
    with pytest.raises(np.linalg.LinAlgError):
        design.solve_small(np.ones((3, 3)), np.ones(3))


def test_designing_a_loop_leaves_no_busy_threads():
    # numpy's threaded BLAS spins worker threads after a LAPACK solve; the designer must
    # not start them (they would take a core from the flowgraph). Spinning threads burn
    # ~0.1 s of CPU in a 0.3 s sleep (measured); an idle process burns ~0. A fresh
    # process, because other tests here call numpy's LAPACK on purpose.
    code = ("import time; from gnuradio.coherer import design; "
            "design.design_loop(1e6, 2, 1000.0, loop_order=3); "
            "c = time.process_time(); time.sleep(0.3); print(time.process_time() - c)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert float(out.stdout) < 0.03


# --- real receiver signals: pulse shape, band-limited noise, residual carrier ----------------------

def framework_rrc(sps, rolloff):
    """RRC taps from GNU Radio's own designer, unit energy (CONVENTIONS 8)."""
    from gnuradio.filter import firdes
    taps = np.array(firdes.root_raised_cosine(1.0, sps, 1.0, rolloff, 11 * sps + 1))
    return taps / np.sqrt(np.sum(taps ** 2))


@pytest.mark.parametrize("sps", [2, 4, 8, 64])
@pytest.mark.parametrize("rolloff", [0.2, 0.35, 1.0])
def test_rrc_taps_equal_framework_designer(sps, rolloff):
    # the designer's closed-form RRC (Proakis ch. 9, from memory) against firdes.root_raised_cosine;
    # firdes returns float32 taps (relative precision 6e-8), so agreement within 1e-6 of the peak
    ours = design.rrc_taps(sps, rolloff)
    theirs = framework_rrc(sps, rolloff)
    assert ours.shape == theirs.shape
    assert np.max(np.abs(ours - theirs)) <= 1e-6 * np.max(np.abs(theirs))


@pytest.mark.parametrize("power", [1, 2, 4, 8])
@pytest.mark.parametrize("esn0_db", [0.0, 3.0, 6.0, 10.0, 15.0, 20.0])
def test_unshaped_density_is_v_m(power, esn0_db):
    # REFERENCES 4 (Lindsey & Simon 1973, from memory; general sum derived): S_e(0) = V_M / 2 at one
    # sample per symbol, so var = B_L T V_M / M^2 and the squaring loss are unchanged. Pure arithmetic: rel 1e-9.
    esn0 = design.db_to_linear(esn0_db)
    v_m = sum(math.comb(power, k) ** 2 * math.factorial(k) * esn0 ** -k for k in range(1, power + 1))
    assert design.detector_noise_density(power, esn0) == pytest.approx(v_m / 2, rel=1e-9)
    assert design.effective_squaring_loss(power, esn0) == pytest.approx(power ** 2 / (esn0 * v_m), rel=1e-9)
    # the general shaped-signal expectation with a one-tap pulse and white noise is the same model
    terms = design._shaped_statistics(power, 1, np.array([1.0]), np.array([1.0]))
    density = terms.self_im + sum(a * esn0 ** -k for k, a in enumerate(terms.noise_im, start=1))
    assert terms.line == pytest.approx(1.0, rel=1e-12)
    assert density == pytest.approx(v_m / 2, rel=1e-9)


@pytest.mark.parametrize("esn0_db, printed", [(10.0, ["0.1", "0.42", "2.4184", "57.01634"]),
                                              (6.0, ["0.2511886", "1.1309460", "10.178954", "1420.4999"])])
def test_unshaped_density_handy_values(esn0_db, printed):
    # REFERENCES 4 handy V_M values (M = 1, 2, 4, 8), printed precision
    for power, value in zip((1, 2, 4, 8), printed):
        assert matches_printed(2 * design.detector_noise_density(power, design.db_to_linear(esn0_db)), value)


def test_signal_model_defaults_reproduce_todays_predictions():
    # the keyword defaults (one sample per symbol, no modulation index) keep every prediction bit-identical,
    # whatever roll-off or placement is passed with them (they only apply to shaped signals)
    d = design.design_loop(1e4, 4, 20.0, 0.707, 2)
    esn0 = design.db_to_linear(6.0)
    extra = dict(samples_per_symbol=1, rolloff=0.8, placement="matched")
    assert design.phase_error_variance(4, esn0, d.actual_bt, **extra) == \
        d.actual_bt * design.mth_power_noise(4, esn0) / 16
    assert design.loop_snr(4, esn0, d.actual_bt, **extra) == design.loop_snr(4, esn0, d.actual_bt)
    assert design.squaring_loss(4, esn0, **extra) == design.squaring_loss(4, esn0)
    assert design.mean_time_between_slips_s(d, esn0, **extra) == design.mean_time_between_slips_s(d, esn0)
    assert design.nonlinear_phase_error_variance(4, esn0, d.actual_bt, **extra) == \
        design.nonlinear_phase_error_variance(4, esn0, d.actual_bt)
    assert design.total_phase_error_variance(d, esn0, 50.0, **extra) == design.total_phase_error_variance(d, esn0, 50.0)
    assert design.suggest_noise_bw(1e4, 4, esn0, 200.0, **extra) == design.suggest_noise_bw(1e4, 4, esn0, 200.0)


def enumerate_symbol_statistics(power, sps, pulse, point_angle):
    """Brute force over every symbol pattern: time-averaged line E[s^M] e^{-jM pa}, the pattern-jitter density
    sum_tau Cov(Im u_n, Im u_n+tau) and the moments E|s_n|^(2j) of a noise-free shaped M-PSK signal."""
    lp = len(pulse)
    c = (lp - 1) // 2
    span = -(-lp // sps) + 1                      # symbols touching one sample, with margin
    syms = np.arange(-2 * span, 2 * span + 1)
    times = np.arange(-(lp - 1), sps + lp - 1)
    taps = np.array([[pulse[t - i * sps + c] if 0 <= t - i * sps + c < lp else 0.0 for i in syms] for t in times])
    used = np.nonzero(np.any(taps != 0.0, axis=0))[0]
    taps = taps[:, used]
    points = np.exp(1j * (point_angle + 2 * np.pi * np.arange(power) / power))
    patterns = np.array(np.meshgrid(*[points] * len(used), indexing="ij")).reshape(len(used), -1)
    s = taps @ patterns                           # (times, patterns)
    u = s ** power * np.exp(-1j * power * point_angle)
    rows = slice(lp - 1, lp - 1 + sps)            # n = 0..N-1
    line = float(np.mean(u[rows].real))
    im = u.imag - u.imag.mean(axis=1, keepdims=True)
    cov = im[rows] @ im.T / patterns.shape[1]
    density = float(np.sum(cov)) / sps
    moments = [float(np.mean(np.abs(s[rows]) ** (2 * j))) for j in range(power + 1)]
    return line, density, moments, float(np.sum(np.abs(cov))) / sps      # the last: absolute sum of the terms


@pytest.mark.parametrize("power, sps, pulse", [
    (4, 2, [0.3, 0.7, 1.0, 0.5, -0.2]),
    (4, 3, [-0.1, 0.4, 0.9, 1.0, 0.6, 0.1, -0.15]),
    (8, 2, [0.25, 1.0, 0.45]),
    (2, 2, [0.3, 0.7, 1.0, 0.5, -0.2]),
])
def test_shaped_expectation_equals_enumeration(power, sps, pulse):
    # [derived] exact expectation over symbol patterns (series of power sums) against brute-force enumeration
    # of every pattern of the symbols that touch the samples (an independent, direct computation).
    # Both are exact: rel 1e-9. White noise (rho = delta) makes the noise terms sum_k C(M,k)^2 k! v^k
    # E|s|^(2(M-k)) / 2 (Isserlis for circular Gaussian noise), checked coefficient by coefficient.
    pulse = np.array(pulse)
    pa = np.pi / 4 if power == 4 else 0.0
    scaled = pulse * np.sqrt(sps / np.sum(pulse ** 2))       # the model's unit mean power per sample
    line, density, moments, scale = enumerate_symbol_statistics(power, sps, scaled, pa)
    terms = design._shaped_statistics(power, sps, pulse, np.array([1.0]))
    assert terms.line == pytest.approx(line, rel=1e-9)
    # the designer forms the density from pair moments of size up to E|s^M|^2 weighted by up to C(M, M/2)^2,
    # which cancel: float64 round-off of up to ~1e-13 of weight x E|s^M|^2 (thousands of terms of error 1e-16)
    round_off = 1e-13 * math.comb(power, power // 2) ** 2 * terms.power_self
    assert terms.self_im == pytest.approx(density, rel=1e-9, abs=round_off)
    assert round_off < 1e-6 * scale + 1e-6 * abs(terms.noise_im[0])
    for k, coefficient in enumerate(terms.noise_im, start=1):
        expected = 0.5 * math.comb(power, k) ** 2 * math.factorial(k) * moments[power - k]
        assert coefficient == pytest.approx(expected, rel=1e-9)
    if power == 2:
        # a real pulse keeps BPSK real: no pattern jitter at all [derived]
        assert abs(terms.self_im) <= 1e-12 * line ** 2


def simulated_detector_density(power, sps, rolloff, esn0_db, placement, seed, n_samples=1 << 22,
                               segment=1 << 14, bins=16):
    """Monte Carlo S_e(0) by the averaged periodogram at the lowest non-zero bins, on signals built as
    CONVENTIONS 8 with the framework's RRC. Returns (estimate, relative standard error)."""
    rng = np.random.default_rng(seed)
    taps = framework_rrc(sps, rolloff)
    pa = np.pi / 4 if power == 4 else 0.0
    margin = 512
    n_sym = (n_samples + 2 * margin) // sps
    symbols = np.exp(1j * (pa + 2 * np.pi * rng.integers(0, power, n_sym) / power))
    up = np.zeros(n_sym * sps, complex)
    up[::sps] = symbols * np.sqrt(sps)
    shaped = np.convolve(up, taps, mode="same")
    esn0 = design.db_to_linear(esn0_db)
    white = (rng.standard_normal(len(up)) + 1j * rng.standard_normal(len(up))) * np.sqrt(sps / esn0 / 2)
    if placement == "channel":      # noise band-limited by the RRC shape at unit gain at zero frequency
        y = shaped + np.convolve(white, taps / taps.sum(), mode="same")
    else:                           # signal and white noise through the unit-energy matched filter
        y = np.convolve(shaped + white, taps, mode="same")
    u = y[margin:margin + n_samples] ** power * np.exp(-1j * power * pa)
    e = u.imag / u.real.mean()      # the line estimated from the data, not taken from the designer
    spectrum = np.abs(np.fft.rfft(e.reshape(-1, segment), axis=1)[:, 1:bins + 1]) ** 2 / segment
    return float(spectrum.mean()), 1.0 / np.sqrt(spectrum.size)


@pytest.mark.parametrize("power, sps, rolloff, esn0_db, placement, seed", [
    (4, 4, 0.35, 10.0, "channel", 101),     # thermal and pattern jitter together
    (4, 4, 0.35, 30.0, "matched", 102),     # pattern jitter dominates
    (8, 4, 0.35, 25.0, "channel", 103),
    (2, 8, 0.5, 6.0, "matched", 104),
])
def test_shaped_density_against_periodogram(power, sps, rolloff, esn0_db, placement, seed):
    # Independent check of S_e(0) (exact expectation in the designer) by simulation with another method: each
    # periodogram ordinate at a non-zero bin is asymptotically S(f) chi^2_2 / 2 (exponential), independent across
    # bins and segments, so the mean of J ordinates has relative standard error 1/sqrt(J) (J = 4096 here, 1.6 %);
    # tolerance 4 standard errors. The bins reach 1e-3 cycles/sample, where S(f) departs from S(0) by well under
    # 0.5 % (the autocovariance spans about +-100 lags).
    estimate, rel_se = simulated_detector_density(power, sps, rolloff, esn0_db, placement, seed)
    predicted = design.detector_noise_density(power, design.db_to_linear(esn0_db), samples_per_symbol=sps,
                                              rolloff=rolloff, placement=placement)
    assert estimate == pytest.approx(predicted, rel=4 * rel_se)


@pytest.mark.parametrize("power", [4, 8])
@pytest.mark.parametrize("placement", ["channel", "matched"])
def test_pattern_jitter_of_shaped_qpsk_and_8psk(power, placement):
    # QPSK/8PSK with an RRC pulse have pattern jitter (self-noise) that no SNR removes: Moeneclaey & de Jonghe,
    # IEEE Trans. Commun. 1994 (from memory) for NDA carrier synchronisers of rotationally symmetric sets.
    for sps in (2, 4, 8):
        high = design.detector_noise(power, design.db_to_linear(60.0), samples_per_symbol=sps, placement=placement)
        assert high.self_noise > 1e-3
        assert high.density == pytest.approx(high.self_noise, rel=1e-3)     # thermal part gone at 60 dB
        # the effective squaring loss then keeps falling with SNR instead of tending to 0 dB
        loss_20 = design.effective_squaring_loss(power, 100.0, samples_per_symbol=sps, placement=placement)
        loss_30 = design.effective_squaring_loss(power, 1000.0, samples_per_symbol=sps, placement=placement)
        assert loss_30 < loss_20


@pytest.mark.parametrize("placement", ["channel", "matched"])
def test_bpsk_has_no_pattern_jitter(placement):
    # [derived] BPSK with a real pulse stays real, so Im(y^2) carries noise only; after a matched filter the
    # squaring loss at high SNR is small (a fraction of a dB) for every roll-off and oversampling
    for sps in (2, 4, 8, 16):
        for rolloff in (0.2, 0.35, 0.5):
            noise = design.detector_noise(2, 1e6, samples_per_symbol=sps, rolloff=rolloff, placement=placement)
            assert abs(noise.self_noise) <= 1e-12      # exactly 0 up to round-off (units of L^2 = 1)
            if placement == "matched":
                loss = design.effective_squaring_loss(2, 1e6, samples_per_symbol=sps, rolloff=rolloff,
                                                      placement=placement)
                assert -0.5 < 10 * np.log10(loss) < 0.0


@pytest.mark.parametrize("placement", ["channel", "matched"])
@pytest.mark.parametrize("sps", [2, 4, 16])
def test_plain_carrier_variance_does_not_depend_on_oversampling(placement, sps):
    # REFERENCES 3 (Rice 2009 eq. C.43): var = N0 B_L / P whatever the samples per symbol; with B_L T = B_L T_s / N
    # and per-sample SNR (Es/N0)/N the product is unchanged. Band-limited noise keeps the density N0 at the carrier.
    esn0 = design.db_to_linear(10.0)
    bt_symbol = 0.004
    variance = design.phase_error_variance(1, esn0, bt_symbol / sps, samples_per_symbol=sps, placement=placement)
    assert variance == pytest.approx(bt_symbol / esn0, rel=1e-9)


@pytest.mark.parametrize("beta", [0.3, 0.8, 1.2, 1.3])
def test_residual_carrier_closed_form(beta):
    # REFERENCES 11.1: sigma^2 = N0 B_L / (P cos^2 beta) (Gardner, Phaselock Techniques ch. 5, from memory),
    # here in physical units: P = 1, fs samples/s, complex noise N0 * fs per sample -> Es/N0 = 1 / (N0 fs)
    fs, noise_bw, n0 = 1e5, 50.0, 2e-7
    esn0 = 1.0 / (n0 * fs)
    closed = n0 * noise_bw / np.cos(beta) ** 2
    assert design.phase_error_variance(1, esn0, noise_bw / fs, modulation_index=beta) == pytest.approx(closed, rel=1e-9)
    assert design.effective_squaring_loss(1, esn0, modulation_index=beta) == pytest.approx(np.cos(beta) ** 2, rel=1e-9)
    # slips (REFERENCES 5, Viterbi 1963, from memory): first-order loop at the loop SNR of the carrier's share
    d = design.design_loop(fs, 1, noise_bw, loop_order=1)
    rho = np.cos(beta) ** 2 * esn0 / d.actual_bt
    viterbi = np.pi ** 2 * rho * special.i0(rho) ** 2 / (2 * d.actual_bt * fs)
    assert design.mean_time_between_slips_s(d, esn0, modulation_index=beta) == pytest.approx(viterbi, rel=1e-9)


def test_residual_carrier_density_against_periodogram():
    # [derived] bi-phase (Manchester) data has no spectral density at zero frequency: only the noise remains,
    # S_e(0) = (sigma_n^2 / 2) / cos^2 beta. Simulated as CONVENTIONS 8 (exp(j beta d), d Manchester +-1, two
    # samples per bit); periodogram tolerance as in test_shaped_density_against_periodogram (4 / sqrt(J)).
    rng = np.random.default_rng(105)
    beta, esn0_db, n, segment, bins = 1.2, 3.0, 1 << 22, 1 << 14, 16
    bits = rng.choice([-1.0, 1.0], n // 2)
    d = np.repeat(bits, 2) * np.tile([1.0, -1.0], n // 2)
    esn0 = design.db_to_linear(esn0_db)
    y = np.exp(1j * beta * d) + (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * np.sqrt(0.5 / esn0)
    e = y.imag / y.real.mean()
    spectrum = np.abs(np.fft.rfft(e.reshape(-1, segment), axis=1)[:, 1:bins + 1]) ** 2 / segment
    predicted = design.detector_noise_density(1, esn0, modulation_index=beta)
    assert predicted == pytest.approx(0.5 / esn0 / np.cos(beta) ** 2, rel=1e-12)
    assert spectrum.mean() == pytest.approx(predicted, rel=4 / np.sqrt(spectrum.size))


@pytest.mark.parametrize("kwargs, name", [
    (dict(samples_per_symbol=0), "samples_per_symbol"),
    (dict(samples_per_symbol=65), "samples_per_symbol"),
    (dict(samples_per_symbol=2.5), "samples_per_symbol"),
    (dict(samples_per_symbol=4, rolloff=-0.1), "rolloff"),
    (dict(samples_per_symbol=4, rolloff=1.5), "rolloff"),
    (dict(samples_per_symbol=4, placement="after"), "placement"),
    (dict(modulation_index=1.5), "modulation_index"),
    (dict(modulation_index=-0.1), "modulation_index"),
])
def test_signal_model_rejects_bad_values(kwargs, name):
    power = 1 if "modulation_index" in kwargs else 4
    with pytest.raises(ValueError, match=name):
        design.phase_error_variance(power, 10.0, 0.001, **kwargs)
    with pytest.raises(ValueError, match=name):
        design.detector_noise(power, 10.0, **kwargs)


def test_modulation_index_needs_power_one_and_esn0_positive():
    with pytest.raises(ValueError, match="modulation_index"):
        design.detector_noise(2, 10.0, modulation_index=1.0)
    with pytest.raises(ValueError, match="esn0"):
        design.detector_noise(4, 0.0, samples_per_symbol=4)


def test_shaped_terms_are_cached():
    # a pure function of (M, N, roll-off, placement): the second call returns the cached terms
    first = design._shaped_terms(4, 8, 0.25, "matched")
    assert design._shaped_terms(4, 8, 0.25, "matched") is first


# --- acquisition with the spectral aid, frequency steps ---------------------------------------------------

@pytest.mark.parametrize("power, esn0_db, seed", [(2, -10.4, 201), (4, -0.5, 202)])
def test_line_detect_probability_against_estimator(power, esn0_db, seed):
    # The z^M line test of acquisition.estimate_offset (peak > ln(n/p_false) x mean bin) on simulated blocks at an
    # SNR where one block finds the line about half the time, against the noncentral chi-square (Marcum Q)
    # prediction (Kay vol. 2, from memory). Binomial standard error over 400 blocks; tolerance 4 standard errors.
    from gnuradio.coherer import acquisition
    rng = np.random.default_rng(seed)
    n, blocks = 4096, 400
    esn0 = design.db_to_linear(esn0_db)
    pa = np.pi / 4 if power == 4 else 0.0
    hits = 0
    for _ in range(blocks):
        offset = rng.uniform(-0.4, 0.4) / (2 * power)
        x = np.exp(1j * (pa + 2 * np.pi * rng.integers(0, power, n) / power) + 2j * np.pi * offset * np.arange(n))
        x = x + (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * np.sqrt(0.5 / esn0)
        found = acquisition.estimate_offset(x, power, 1.0)
        hits += found is not None and abs(found - offset) < 1.0 / (n * power)
    noise = design.detector_noise(power, esn0)
    p = design.line_detect_probability(n, noise.line_snr, noise.line_to_power)
    assert 0.2 < p < 0.8
    assert hits / blocks == pytest.approx(p, abs=4 * np.sqrt(p * (1 - p) / blocks))


def test_spectral_acquisition_time():
    # README "Wide acquisition": one FFT block (acquisition.fft_length), then the loop settles in phase (Rice's
    # 1.3 / B_L, REFERENCES 2.2) and the indicator decides over quarter-block windows. A strong signal: 1 block.
    from gnuradio.coherer import acquisition
    d = design.design_loop(1.0, 4, 0.001)
    nfft = acquisition.fft_length(0.001, 1.0)
    strong = design.spectral_acquisition(d, 0.1, design.db_to_linear(10.0))
    assert strong.fft_length == nfft and strong.expected_blocks == pytest.approx(1.0, rel=1e-9)
    assert strong.time_to_lock_s == pytest.approx(nfft + 1.3 / 0.001 + 2 * nfft / 4, rel=1e-12)
    # far below the natural pull-in time for an offset near the edge of the unambiguous range
    assert strong.time_to_lock_s < 1e-3 * design.pull_in_time_s(d, 0.1)
    # a weak line takes 1 / P_d blocks; beyond fs/(2M) the block would acquire an alias
    weak = design.spectral_acquisition(d, 0.1, design.db_to_linear(-0.5))
    assert weak.expected_blocks == pytest.approx(1.0 / weak.detect_probability, rel=1e-12)
    assert weak.time_to_lock_s > strong.time_to_lock_s
    assert math.isinf(design.spectral_acquisition(d, 0.2, None).time_to_lock_s)


def test_frequency_step_followed_or_pulled_in():
    # Gardner (from memory, REFERENCES 2.2): pull-out 1.8 wn (zeta + 1) / M; beyond it the loop slips and pulls in
    # naturally in (M dw)^2 / (2 zeta wn^3); within it the linear loop's peak error scales with the step
    d = design.design_loop(1e4, 2, 20.0)
    responses = design.step_responses(d)
    limit = design.pull_out_hz(d)
    inside = design.frequency_step(d, 0.5 * limit, responses)
    assert inside.followed and inside.pull_in_s == 0.0
    assert inside.peak_error_rad == pytest.approx(responses.peak_error_rad_per_hz * 0.5 * limit, rel=1e-12)
    outside = design.frequency_step(d, -3.0 * limit, responses)
    assert not outside.followed
    wn = design.acquisition_wn(d)
    assert outside.pull_in_s == pytest.approx((2 * np.pi * 2 * 3 * limit) ** 2 / (2 * 0.707 * wn ** 3), rel=1e-12)
    assert outside.lock_time_s == pytest.approx(outside.pull_in_s + 1.3 / 20.0, rel=1e-9)
