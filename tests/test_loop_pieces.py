# SPDX-License-Identifier: GPL-3.0-or-later
"""The named pieces of the M-th power loop kernel, each called on its own against a
reference written here: the state layout and re-steering, the NCO, the loop filter, the
line averages and detector normalisation, the lock statistic's window verdict and
reference rate, and both slip trackers."""

import math

import numpy as np
import pytest
from scipy.signal import lfilter

from gnuradio.coherer import _loop_kernel as K
from gnuradio.coherer import design, lockstat
from gnuradio.coherer.mth_power_loop_cc import _tracker_gains, mth_power_loop_cc


def wrap(a):
    """Angle(s) wrapped into [-pi, pi), rad."""
    return (np.asarray(a) + np.pi) % (2 * np.pi) - np.pi


# --- state layout and re-steering ----------------------------------------------------

def test_state_layout_numbers_every_field_once():
    """Each field's constant S_NAME is the sum of the slots before it; the state is that long
    and state_dict reads every slot back under its name."""
    names = [name for name, _, _ in K.STATE_FIELDS]
    assert len(set(names)) == len(names)
    at = 0
    st = np.arange(K.STATE_SIZE, dtype=np.float64)
    fields = K.state_dict(st)
    assert list(fields) == names
    for name, slots, _ in K.STATE_FIELDS:
        assert getattr(K, "S_" + name.upper()) == at
        np.testing.assert_array_equal(fields[name], st[at:at + slots] if slots > 1 else at)
        at += slots
    assert at == K.STATE_SIZE == len(K.new_state())
    assert not np.any(K.new_state())
    at = 0
    for name, slots, _ in K.PARAMS_FIELDS:
        assert getattr(K, "P_" + name.upper()) == at
        at += slots
    assert at == K.PARAMS_SIZE


def coast(state, n, power=2, chunk=1_000_000):
    """Run the kernel on ``n`` gap samples (zeros), ``chunk`` at a time: the NCO coasts on its
    frequency register. Returns the reference output e^{j theta^} of the first chunk
    (complex64)."""
    params = np.zeros(K.PARAMS_SIZE)
    params[K.P_FMIN], params[K.P_FMAX] = -np.pi / power, np.pi / power
    params[K.P_LOCK_WINDOW] = 256.0
    params[K.P_LP_DECIM] = 1.0
    on, off = lockstat.threshold_table(256, 1e-6), lockstat.threshold_table(256, 1e-1)
    noise_ref = lockstat.new_noise_reference()
    first = None
    while n > 0:
        m = min(n, chunk)
        x = np.zeros(m, np.complex64)
        ref = np.empty(m, np.complex64)
        none_f = np.zeros(0, np.float32)
        ints = [np.zeros(m + 1, np.int64) for _ in range(4)]
        K.mth_power_loop(x, np.empty(m, np.complex64), ref, none_f, none_f,
                         np.zeros(0, np.int64), np.zeros(0), *ints, np.zeros(m + 1), 0, 0,
                         state, params, noise_ref, on, off, power)
        first = ref if first is None else first
        n -= m
    return first


def test_steer_nco_sets_the_frequency_and_moves_the_trackers_with_it():
    """After steer_nco the NCO turns by exactly the new frequency per sample (np.angle of the
    reference output's increments), and the slip and lock-statistic references start on
    that frequency with no residual or rate (the kernel's contract for a re-steer)."""
    st = K.new_state()
    st[K.S_ACC2] = 1e-6
    st[K.S_REF_R] = 0.4
    st[K.S_ANGLE_COUNTS] = 1.0
    st[K.S_WIN_STEPS] = 3.0
    f = 0.0123
    K.steer_nco(st, f)
    fields = K.state_dict(st)
    for name in ("freq", "ref_f", "prev_step", "free_f", "free_level"):
        assert fields[name] == f, name
    for name in ("acc2", "ref_r", "ref_a", "angle_counts", "win_steps", "free_a", "free_trend",
                 "slow_im", "since_steer"):
        assert fields[name] == 0.0, name
    assert fields["slow_re"] == 1.0
    ref = coast(st, 1000)
    steps = np.angle(ref[1:].astype(np.complex128) * np.conj(ref[:-1]))
    np.testing.assert_allclose(steps, f, rtol=0, atol=1e-6)    # complex64 output: 6e-8 each
    assert K.state_dict(st)["gaps"] == 1000.0


def test_kernel_nco_coasts_on_the_exact_phase():
    """10^7 coasting samples at 0.0123 rad/sample: the kernel's phase accumulator stays on
    n f (float64 roundings, at most 2.2e-16 per sample: 2.2e-9; asserted < 3e-9) and its
    phasor on e^{j theta^}: between resyncs at most NCO_RESYNC complex products by
    e^{j nco_ref}, a few roundings (1.1e-16) each, i.e. < 2e-13; without the resync the
    magnitude would drift by |e^{j nco_ref}| - 1 every sample."""
    n = 10_000_017
    f = 0.0123
    st = K.new_state()
    K.steer_nco(st, f)
    coast(st, n)
    fields = K.state_dict(st)
    assert abs(wrap(fields["phase"] - wrap(n * f))) < 3e-9
    p = complex(fields["ph_re"], fields["ph_im"])
    pm = complex(fields["pm_re"], fields["pm_im"])
    assert abs(p - np.exp(1j * fields["phase"])) < 2e-13
    assert abs(pm - np.exp(2j * fields["phase"])) < 2e-13
    assert abs(abs(p) - 1.0) < 2e-13 and abs(abs(pm) - 1.0) < 2e-13


# --- NCO --------------------------------------------------------------------------------

@pytest.mark.parametrize("power", [1, 4, 8])
def test_nco_pieces_follow_the_summed_phase(power):
    """nco_resync every NCO_RESYNC samples and nco_advance in between: the accumulator
    against the phase summed in extended precision (numpy longdouble), the phasors against
    np.exp of the accumulator. Steps: 0.01 rad/sample
    plus a seeded proportional part within +-0.04 (so both the series and the libm rotation
    are used). Bounds: series error 6e-15 per step (the rotation's bound, checked against
    libm in test_loop_nco) times NCO_RESYNC = 256 steps, below 2e-12 for the
    phasors; the accumulator rounds twice per sample (2.2e-16 each), 5000 samples: < 5e-12."""
    rng = np.random.default_rng(power)
    n = 5000
    freq = 0.01
    prop = rng.uniform(-0.04, 0.04, n)
    phase = 0.3
    exact = np.longdouble(0.3)
    worst_p = worst_pm = worst_phase = 0.0
    ph = pm = rf = rm = None
    nco_ref = 0.0
    for i in range(n):
        if i % K.NCO_RESYNC == 0:
            ph_re, ph_im, pm_re, pm_im, nco_ref, rf_re, rf_im, rm_re, rm_im = K.nco_resync(
                phase, freq, power)
            assert (ph_re, ph_im) == (math.cos(phase), math.sin(phase))   # libm, exactly
            assert nco_ref == freq
            ph, pm, rf, rm = (ph_re, ph_im), (pm_re, pm_im), (rf_re, rf_im), (rm_re, rm_im)
        v = prop[i] + freq - nco_ref
        phase, ph_re, ph_im, pm_re, pm_im = K.nco_advance(phase, prop[i], freq, v, *ph, *pm,
                                                          *rf, *rm, power)
        ph, pm = (ph_re, ph_im), (pm_re, pm_im)
        exact += np.longdouble(prop[i]) + np.longdouble(freq)
        want = float(exact % np.longdouble(2 * np.pi))
        assert -np.pi <= phase < np.pi
        worst_phase = max(worst_phase, abs(wrap(phase - want)))
        worst_p = max(worst_p, abs(complex(*ph) - np.exp(1j * phase)))
        worst_pm = max(worst_pm, abs(complex(*pm) - np.exp(1j * power * phase)))
    assert worst_phase < 5e-12
    assert worst_p < 2e-12 and worst_pm < 2e-12


# --- loop filter ------------------------------------------------------------------------

@pytest.mark.parametrize("block", [1, 8])
@pytest.mark.parametrize("order", [1, 2, 3])
def test_loop_filter_is_the_published_transfer_function(order, block):
    """The NCO step K1 e + acc1 against scipy.signal.lfilter of the loop filter
    F(z) = K1 + K2/(1 - z^-1) + K3/(1 - z^-1)^2 (REFERENCES 1.2, 1.3: proportional plus
    integral, rectangular integrators), gains from design.textbook_gains at B_L T = 0.02,
    seeded detector outputs; float64 agreement to 1e-12 of the largest step. Once per block
    of L samples (REFERENCES 1.4) the same filter acts with the gains (L K1, L K2, L^2 K3):
    the registers move by what L samples of the same error would move them."""
    k1, k2, k3 = design.textbook_gains(order, 0.02, 0.707)
    rng = np.random.default_rng(10 + order)
    e = rng.standard_normal(3000)
    acc1 = acc2 = 0.0
    steps = np.empty_like(e)
    for i, ei in enumerate(e):
        prop, acc1, acc2, v = K.loop_filter(ei, acc1, acc2, 0.25, k1, k2, k3, -np.inf, np.inf,
                                            block)
        steps[i] = prop + acc1
        assert prop == block * k1 * ei
        assert abs(v - (steps[i] - 0.25)) <= 1e-14 * (1 + abs(steps[i]))
    k1, k2, k3 = block * k1, block * k2, block * block * k3
    u = np.array([1.0, -1.0])                      # 1 - z^-1
    b = {1: [k1], 2: k1 * u + [k2, 0.0], 3: k1 * np.convolve(u, u) + np.r_[k2 * u, 0] + [k3, 0, 0]}
    a = {1: [1.0], 2: u, 3: np.convolve(u, u)}
    want = lfilter(b[order], a[order], e)
    np.testing.assert_allclose(steps, want, rtol=0, atol=1e-12 * np.max(np.abs(want)))


def test_loop_filter_holds_the_frequency_register_at_its_limits():
    """A held integrator (from memory: anti-windup by clamping): with e = 1, K2 = 0.1 and
    fmax = 0.35 the register runs 0.1, 0.2, 0.3 and stays at 0.35; a 3rd-order rate register
    pushing further is cleared; going down, fmin likewise."""
    acc1 = acc2 = 0.0
    seen = []
    for _ in range(5):
        _, acc1, acc2, v = K.loop_filter(1.0, acc1, acc2, 0.0, 0.0, 0.1, 0.0, -0.35, 0.35, 1)
        seen.append(acc1)
    np.testing.assert_allclose(seen, [0.1, 0.2, 0.30000000000000004, 0.35, 0.35], rtol=1e-15)
    assert v == 0.35
    _, acc1, acc2, _ = K.loop_filter(1.0, 0.3, 0.2, 0.0, 0.0, 0.0, 0.01, -0.35, 0.35, 1)
    assert (acc1, acc2) == (0.35, 0.0)
    _, acc1, acc2, _ = K.loop_filter(-1.0, -0.3, -0.2, 0.0, 0.0, 0.0, 0.01, -0.35, 0.35, 1)
    assert (acc1, acc2) == (-0.35, 0.0)


# --- line averages and normalisation ---------------------------------------------------

def qpsk_detector(rng, n, esn0_db, theta):
    """Seeded QPSK at ``esn0_db`` turned by ``theta``; returns (x, d = (x / rms)^4 with rms
    the true sqrt(M2))."""
    sym = np.exp(1j * (np.pi / 2 * rng.integers(0, 4, n) + np.pi / 4))
    s2 = 10 ** (-esn0_db / 10)
    x = sym * np.exp(1j * theta) + np.sqrt(s2 / 2) * (rng.standard_normal(n) + 1j * rng.standard_normal(n))
    return x, (x / np.sqrt(1 + s2)) ** 4


def run_line(d, slow, alpha):
    """line_update over the detector samples ``d`` with the slow-reference phasor ``slow``."""
    line = (0.0,) * 6
    for di in d:
        line = K.line_update(*line, di.real, di.imag, slow.real, slow.imag, abs(di) ** 2, alpha)
    return line


def test_line_is_the_weighted_mean_of_z_to_the_m():
    """line_update is an exponentially weighted mean of d = z^M (numpy np.average with
    weights (1 - alpha)^(N-1-k), from the recursion's definition), its weight the sum of those
    weights (1 - (1 - alpha)^N), the slow line the same mean of d times the slow phasor; and
    normalisation returns 1/|line| once locked. QPSK at 10 dB, seeded, 4000 samples."""
    rng = np.random.default_rng(5)
    x, d = qpsk_detector(rng, 4000, 10.0, 0.2)
    alpha = 1.0 / 1024
    slow = np.exp(0.7j)
    line_re, line_im, sl_re, sl_im, line_w, line_p = run_line(d, slow, alpha)
    w = (1 - alpha) ** np.arange(len(d) - 1, -1, -1)
    mean_d = np.average(d, weights=w)
    np.testing.assert_allclose(line_w, 1 - (1 - alpha) ** len(d), rtol=1e-12)
    np.testing.assert_allclose(complex(line_re, line_im) / line_w, mean_d, rtol=1e-10)
    np.testing.assert_allclose(complex(sl_re, sl_im) / line_w, mean_d * slow, rtol=1e-10)
    np.testing.assert_allclose(line_p / line_w, np.average(np.abs(d) ** 2, weights=w), rtol=1e-10)
    m2 = np.mean(np.abs(x) ** 2)
    m4 = np.mean(np.abs(x) ** 4)
    inv_rms, cap, inv_norm, line_on = K.normalisation(
        m2, m4, 1.0, 1.0, line_re, line_im, sl_re, sl_im, line_w, line_p, alpha, 1e-8, 4)
    assert line_on == 1.0
    np.testing.assert_allclose(inv_norm, 1 / abs(mean_d), rtol=1e-10)
    np.testing.assert_allclose(inv_rms, 1 / np.sqrt(m2), rtol=1e-14)
    np.testing.assert_allclose(cap, K.LIMIT * m2, rtol=1e-14)


@pytest.mark.parametrize("power", [1, 2, 4, 8])
def test_acquiring_normalisation_is_m2m4(power):
    """Not locked (or no line): 1/A_M = (S/M2)^(-M/2) with S = sqrt(2 M2^2 - M4) (REFERENCES 8,
    Pauluzzi & Beaulieu), here on the true moments M2 = 1.1, M4 = 1.42 of 10 dB (S = 1); the
    moments' weight divides out. Noise alone (M4 = 2 M2^2) gives the floor of (S/M2)^2."""
    mw = 0.25
    _, _, inv_norm, line_on = K.normalisation(1.1 * mw, 1.42 * mw, mw, 0.0, 1.0, 0.0, 0.0, 0.0,
                                              1.0, 1.0, 0.01, 1e-4, power)
    assert line_on == 0.0
    np.testing.assert_allclose(inv_norm, (1.0 / 1.1) ** (-power / 2), rtol=1e-12)
    _, _, inv_norm, _ = K.normalisation(1.0, 2.0, 1.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0,
                                        0.01, 1e-4, power)
    np.testing.assert_allclose(inv_norm, 1e-2 ** (-power / 2), rtol=1e-12)


def test_a_line_lost_in_its_noise_is_not_used():
    """Locked, but d is noise (seeded uniform phases, no line): the line average stands well
    within LINE_SIGNIFICANCE of its variance, so the M2M4 normalisation stays in use."""
    rng = np.random.default_rng(8)
    d = np.exp(2j * np.pi * rng.random(3000))
    line = run_line(d, 1.0 + 0j, 1.0 / 1024)
    _, _, inv_norm, line_on = K.normalisation(1.1, 1.42, 1.0, 1.0, *line, 1.0 / 1024, 1e-4, 2)
    assert line_on == 0.0
    np.testing.assert_allclose(inv_norm, 1.1, rtol=1e-12)


# --- lock statistic ---------------------------------------------------------------------

def test_window_verdict_is_the_mean_projection():
    """The window statistic is mean cos(M phi) over the window (REFERENCES 7.1), from the
    quarter sums split as lockstat.quarter_start does; with a fixed threshold of 0.5 the rule
    locks at a seeded phase error of 0.3 rad spread and not on uniform phases."""
    window = 256
    on = lockstat.threshold_table(window, 1e-6, threshold=0.5)
    off = lockstat.threshold_table(window, 1e-1, threshold=0.5)
    rng = np.random.default_rng(2)
    for phi, want in ((0.3 * rng.standard_normal(window), True),
                      (np.pi * rng.uniform(-1, 1, window), False)):
        quarters = np.zeros(8)
        for j in range(4):
            lo, hi = lockstat.quarter_start(j, window), lockstat.quarter_start(j + 1, window)
            quarters[j] = np.sum(np.cos(phi[lo:hi]))
            quarters[4 + j] = np.sum(np.sin(phi[lo:hi]))
        metric, now = K.window_verdict(quarters, float(window), 0.0,
                                       lockstat.new_noise_reference(), on, off)
        np.testing.assert_allclose(metric, np.mean(np.cos(phi)), rtol=1e-13)
        assert now is want


def holt(y, level, trend, alpha, beta):
    """Holt's linear method (C. C. Holt 1957, from memory): l = a y + (1-a)(l + b);
    b = c (l - l_prev) + (1-c) b. Returns the last (level, trend)."""
    for yi in y:
        last = level
        level = alpha * yi + (1 - alpha) * (level + trend)
        trend = beta * (level - last) + (1 - beta) * trend
    return level, trend


def test_reference_rate_is_holts_method_on_the_mean_step():
    """Weak signal, no phasor measurement: reference_rate smooths the windows' mean NCO steps
    by Holt's linear method with FREE_LEVEL_WEIGHT, FREE_TREND_WEIGHT; the next window's steps
    free_f + k free_a (k = 0..W-1) then average to level + trend (derived)."""
    window = 256.0
    rng = np.random.default_rng(4)
    y = 1e-3 + 2e-6 * np.arange(40) + 1e-5 * rng.standard_normal(40)
    level = trend = 0.0
    for yi in y:
        level, trend, free_a, free_f = K.reference_rate(yi, level, trend, 0.0, 0.0, False, 0.0,
                                                        window, 4)
    want = holt(y, 0.0, 0.0, K.FREE_LEVEL_WEIGHT, K.FREE_TREND_WEIGHT)
    np.testing.assert_allclose((level, trend), want, rtol=1e-12)
    assert free_a == trend / window
    np.testing.assert_allclose(np.mean(free_f + free_a * np.arange(window)), level + trend,
                               rtol=1e-12)


def test_reference_rate_ignores_a_slip_while_locked_at_a_strong_signal():
    """Strong and locked: a mean step that differs from the prediction by one M-domain turn
    per window, 2 pi / (M W), plus a small error is taken as the small error alone."""
    window, power = 256.0, 4
    turn = 2 * np.pi / (power * window)
    level, trend, _, _ = K.reference_rate(1e-3 + turn + 1e-6, 1e-3, 0.0, 0.0, 0.0, True, 1.0,
                                          window, power)
    np.testing.assert_allclose(level, 1e-3 + 1e-6, rtol=1e-9)
    np.testing.assert_allclose(trend, 1e-6, rtol=1e-6)


def test_turn_reference_adds_the_mean_phasor_angle():
    """The reference phasor is turned by the angle of the NCO's mean phasor and comes back to
    unit magnitude (np.angle, numpy)."""
    free = 0.9 * np.exp(0.4j)
    rel = 37.0 * np.exp(-1.1j)
    got = complex(*K.turn_reference(free.real, free.imag, rel.real, rel.imag))
    np.testing.assert_allclose(got, np.exp(1j * (0.4 - 1.1)), rtol=0, atol=1e-15)
    got = complex(*K.turn_reference(free.real, free.imag, 0.0, 0.0))
    np.testing.assert_allclose(got, np.exp(0.4j), rtol=0, atol=1e-15)


# --- cycle slips ------------------------------------------------------------------------

def angle_run(psi_path, radius, strong=True, locked=1.0, beta=0.01):
    """angle_slip over a path of detector angles (rad, M domain) of a phasor of ``radius``.
    Returns the declared slips."""
    psi = psi_last = psi_ref = 0.0
    counts = 0.0
    slips = []
    for a in psi_path:
        lp = radius * np.exp(1j * a)
        psi, psi_last, psi_ref, counts, slip = K.angle_slip(
            lp.real, lp.imag, psi, psi_last, psi_ref, counts, locked, strong, beta)
        if slip:
            slips.append(slip)
    return slips


@pytest.mark.parametrize("turns", [1, 3, -2])
def test_angle_tracker_counts_whole_turns_of_a_ramp(turns):
    """A detector angle ramping by ``turns`` whole M-domain turns plus 0.3 rad, 0.05 rad per
    evaluation, is that many slips, one sign each (REFERENCES 5: a slip is 2 pi/M of NCO phase,
    i.e. 2 pi here; the angle rising means the NCO fell behind, -1); the count of turns is
    np.unwrap's (numpy). Too weak a phasor (below 4 noise standard deviations) or a weak
    signal counts nothing."""
    path = np.linspace(0.0, 2 * np.pi * turns + np.sign(turns) * 0.3,
                       int(abs(turns) * 2 * np.pi / 0.05) + 2)
    want = int(np.round((np.unwrap(wrap(path))[-1] - path[0]) / (2 * np.pi)))
    slips = angle_run(path, 1.0)
    assert len(slips) == abs(want) and sum(slips) == -want
    assert angle_run(path, 0.5 * np.sqrt(K.LP_NOISE_FLOOR * 0.01)) == []
    assert angle_run(path, 1.0, strong=False) == []


def test_angle_tracker_ignores_a_return_before_the_threshold():
    """An excursion to 1.4 pi and back is noise, not a slip (threshold 3 pi/2, REFERENCES 5)."""
    path = np.r_[np.linspace(0, 1.4 * np.pi, 100), np.linspace(1.4 * np.pi, 0, 100)]
    assert angle_run(path, 1.0) == []


def reference_params(bt):
    """Params holding the slip reference's slow and stage gains: 3rd-order textbook gains
    (design.textbook_gains, unit detector gain) at ``bt`` and at 4x, 2x, 1.5x of it."""
    p = np.zeros(K.PARAMS_SIZE)
    p[K.P_REF_G1:K.P_REF_G3 + 1] = design.textbook_gains(3, bt, 1.0)
    for k, f in enumerate((4.0, 2.0, 1.5)):
        p[K.P_REF_STAGE_G + 3 * k:K.P_REF_STAGE_G + 3 * k + 3] = design.textbook_gains(3, f * bt, 1.0)
    return p


def test_reference_gains_narrow_in_stages():
    """Stage k's gains until REF_STAGE_END[k] windows, then the slow ones."""
    p = reference_params(1e-3)
    for age, at in ((0.0, K.P_REF_STAGE_G), (1.9, K.P_REF_STAGE_G), (2.0, K.P_REF_STAGE_G + 3),
                    (13.0, K.P_REF_STAGE_G + 6), (14.0, K.P_REF_G1)):
        assert K.reference_gains(p, age) == tuple(p[at:at + 3]), age


@pytest.mark.parametrize("block", [1, 4])
@pytest.mark.parametrize("power", [2, 4])
def test_reference_tracker_counts_steps_of_two_pi_over_m(power, block):
    """The NCO phase on a frequency ramp, with steps of +2 pi/M at 3000 and 9000 and -2 pi/M at
    15000 samples: the slow 3rd-order reference (no steady error to a ramp, REFERENCES 2.1)
    follows the ramp and declares exactly those slips; at a strong signal it declares none
    and restarts on the NCO instead. Updated once per block of L samples it sees the NCO's
    advance over each block, with the block's textbook gains in its per-sample units (the
    loop block's own conversion)."""
    bt = 2e-3
    g = _tracker_gains(bt, block)
    n = 20000
    steps = 1e-3 + 1e-8 * np.arange(n)
    for at, sign in ((3000, 1), (9000, 1), (15000, -1)):
        steps[at] += sign * 2 * np.pi / power
    steps = steps.reshape(-1, block).sum(axis=1)
    for strong, want in ((False, [1.0, 1.0, -1.0]), (True, [])):
        ref = (0.0, 1e-3, 0.0, 1.0, 0.0)
        slips = []
        for s in steps:
            *ref, slip = K.reference_slip(*ref, s, *g, strong, 0.0, power, block)
            if slip:
                slips.append(slip)
        assert slips == want
        ref_r, _, _, slow_re, slow_im = ref
        assert abs(ref_r) < 0.05
        np.testing.assert_allclose(complex(slow_re, slow_im), np.exp(1j * power * ref_r),
                                   rtol=0, atol=1e-9)


# --- update blocks ----------------------------------------------------------------------

def block_tables_reference(block, theta, freq, free_theta, free_f, free_a, power):
    """The NCO over a block by numpy's exp of the phases: theta + t freq, and the lock
    reference's M-domain phase M free_theta + t M (free_f + free_a (L - 1) / 2)."""
    t = np.arange(block)
    p = np.exp(1j * (theta + t * freq))
    free = np.exp(1j * (power * free_theta + t * power * (free_f + free_a * 0.5 * (block - 1))))
    return p, p ** power, free


@pytest.mark.parametrize("carrier", [0.0, 0.3])
@pytest.mark.parametrize("block", [1, 2, 16, 64])
@pytest.mark.parametrize("power", [1, 2, 8])
def test_block_tables_are_the_nco_at_one_frequency(power, block, carrier):
    """block_tables against np.exp of the phases (from the definition): the NCO phasor and its
    M-th power at the block's one frequency, and the lock reference turning at its own rate;
    to 1e-13 (at most 64 complex products of unit phasors); near the carrier and 0.3 rad per
    sample (a large offset) away from it."""
    theta, free_theta, free_a = 0.3, -1.1, 1e-7
    nco_ref, freq, free_f = 0.011 + carrier, 0.0113 + carrier, 0.0109 + carrier
    tabs = np.empty((K.TABLE_ROWS, K.MAX_BLOCK))
    rf, rm = np.exp(1j * nco_ref), np.exp(1j * power * nco_ref)
    ph, free = np.exp(1j * theta), np.exp(1j * power * free_theta)
    nxt = K.block_tables(block, ph.real, ph.imag, (ph ** power).real, (ph ** power).imag,
                         free.real, free.imag, freq, nco_ref, rf.real, rf.imag, rm.real, rm.imag,
                         free_f, free_a, power, tabs)
    p, pm, lock_ref = block_tables_reference(block, theta, freq, free_theta, free_f, free_a,
                                             power)
    for got, want in ((tabs[0] + 1j * tabs[1], p), (tabs[2] + 1j * tabs[3], pm),
                      (tabs[4] + 1j * tabs[5], lock_ref)):
        np.testing.assert_allclose(got[:block], want, rtol=0, atol=1e-13)
    want_next = np.exp(1j * (power * free_theta + block * power * (free_f + free_a * 0.5 * (block - 1))))
    assert abs(complex(*nxt) - want_next) < 1e-13


@pytest.mark.parametrize("spike", [True, False])
@pytest.mark.parametrize("power", [1, 2, 3, 4, 8, 16])
def test_block_sums_are_the_sums_of_the_detector(power, spike):
    """block_sums on a QPSK block with a gap (NaN), a zero and (or not) a spike beyond the
    limiter, against the same quantities computed with numpy from their definitions: the
    limited sample x min(1, sqrt(cap/p)), d = (x_lim / rms)^M e^{-j M point_angle} conj(P^M),
    the clipped normalised error, d/|d|, the lock projection (d/|d|) rel and the
    position-weighted moments; to 1e-12 relative. M = 1, 2, 4, 8 are summed with M compiled
    in, 3 and 16 with M at run time; with no spike the limiter is left out."""
    rng = np.random.default_rng(5)
    block, rms, cap, e_gain, e_max = 32, 1.3, 20.0, 0.7, 0.5
    x, _ = qpsk_detector(rng, block, 10.0, 0.2)
    x = (x * rms).astype(np.complex64)
    x[3] = np.nan
    x[7] = 0.0
    if spike:
        x[11] = 9.0 * rms                            # p = 81 rms^2 > cap
    assert (np.nanmax(np.abs(x) ** 2) > cap) == spike
    pm = np.exp(1j * rng.uniform(-np.pi, np.pi, block))
    lock_ref = np.exp(1j * rng.uniform(-np.pi, np.pi, block))
    rel = pm * np.conj(lock_ref)                     # the NCO against the lock reference
    tabs = np.zeros((K.TABLE_ROWS, K.MAX_BLOCK))
    tabs[2, :block], tabs[3, :block] = pm.real, pm.imag
    tabs[4, :block], tabs[5, :block] = lock_ref.real, lock_ref.imag
    alpha = 1e-3
    wm, wf = np.zeros(K.MAX_BLOCK), np.zeros(K.MAX_BLOCK)
    K.block_coefficients(block, alpha, 1e-3, 1e-2, wm, wf)
    rot = np.exp(-1j * power * np.pi / 4)
    got = K.block_sums(x.view(np.float32), tabs, wm, wf, 1.0 / rms, cap, e_gain, e_max,
                       rot.real, rot.imag, power)

    xd = x.astype(np.complex128)
    ok = np.isfinite(xd) & (xd != 0)
    xd = np.where(ok, xd, 0)
    p = np.abs(xd) ** 2
    scale = np.sqrt(np.minimum(1.0, cap / np.where(ok, p, 1.0)))
    p_lim = np.minimum(p, cap)
    d = np.where(ok, (xd * scale / rms) ** power * rot * np.conj(pm), 0)
    mag = np.abs(d)
    u = np.where(mag > 0, d / np.where(mag > 0, mag, 1), 0)
    w = np.where(ok, wm[:block], 0)
    want = (np.sum(np.clip(d.imag * e_gain, -e_max, e_max)), d.real.sum(), d.imag.sum(),
            u.real.sum(), u.imag.sum(), np.sum(mag ** 2), np.sum(u * rel).real,
            np.sum(u * rel).imag, rel.real.sum(), rel.imag.sum(), ok.sum(), np.sum(mag > 0),
            p_lim.sum(), np.sum(w * p_lim), np.sum(w * p_lim ** 2), w.sum(),
            np.sum(np.where(ok, wf[:block], 0) * p_lim))
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12)


def test_block_coefficients_give_the_per_sample_averages():
    """A block's position-weighted sum plus the old average times the block decay equals the
    per-sample exponential average m += alpha (p - m) run over the block (its definition),
    and the block coefficient of an average of block means is 1 - (1 - a)^L."""
    rng = np.random.default_rng(2)
    alpha, block = 3e-3, 16
    wm, wf = np.zeros(K.MAX_BLOCK), np.zeros(K.MAX_BLOCK)
    decay_m, decay_f, line_b, lp_b = K.block_coefficients(block, alpha, 0.01, 0.02, wm, wf)
    p = rng.exponential(size=block)
    for a, decay, w in ((alpha, decay_m, wm), (K.FAST_ALPHA, decay_f, wf)):
        m = 0.7
        for pi in p:
            m += a * (pi - m)
        assert decay * 0.7 + np.dot(w[:block], p) == pytest.approx(m, rel=1e-13)
    assert line_b == pytest.approx(1 - 0.99 ** block, rel=1e-14)
    assert lp_b == pytest.approx(1 - 0.98 ** block, rel=1e-14)


def test_block_length_keeps_blocks_inside_the_window_quarters():
    """A block starting at a position not a multiple of the wanted length is halved until it
    is, so no block straddles a quarter end (multiples of the window / 4)."""
    assert K.block_length(16, 0.0) == 16
    assert K.block_length(16, 48.0) == 16
    assert K.block_length(16, 40.0) == 8
    assert K.block_length(16, 36.0) == 4
    assert K.block_length(16, 37.0) == 1
    for pos in range(0, 1024, 3):
        length = K.block_length(64, float(pos))
        assert pos % length == 0 and (pos // 256) == ((pos + length - 1) // 256)


def test_steering_waits_for_a_block_boundary():
    """The NCO runs at one frequency over an update block: steer_nco refuses within one, and
    block_remaining says how many samples are left."""
    st = K.new_state()
    st[K.S_BLOCK_LEN], st[K.S_BLOCK_POS] = 16.0, 5.0
    assert K.block_remaining(st) == 11
    with pytest.raises(ValueError, match="between update blocks"):
        K.steer_nco(st, 0.01)
    st[K.S_BLOCK_POS] = 0.0
    assert K.block_remaining(st) == 0
    K.steer_nco(st, 0.01)
    assert st[K.S_FREQ] == 0.01


def test_one_block_never_kicks_the_nco_by_more_than_pi_over_m():
    """A whole update block of spikes in quadrature (power 100 x M2, the limiter's level, at
    +90 degrees of the carrier: a detector output far beyond its clip) moves the NCO by at
    most pi/M beyond its frequency (the clip of the block mean, e_max / L; the kernel's
    contract: one update never moves the phase by more than half the M-domain ambiguity)."""
    power, bt = 2, 1e-3
    blk = mth_power_loop_cc(1.0, power, bt, acquire=False)
    block = blk.loop_design().block
    assert block == 16
    n0 = 40_000                                       # a block boundary; moments settled
    rng = np.random.default_rng(3)
    x = np.exp(1j * 0.3) * np.ones(n0 + block) + 0.05 * (rng.standard_normal(n0 + block)
                                                            + 1j * rng.standard_normal(n0 + block))
    x[n0:] = 10.0 * np.exp(1j * (0.3 + np.pi / 2 / power))   # 45 deg: sin(M phi) = 1
    x = x.astype(np.complex64)
    out = np.empty_like(x)
    st = blk._state
    blk._run_kernel(x[:n0], out[:n0], st, blk._params, diag=None)
    phase0, freq0 = st[K.S_PHASE], st[K.S_FREQ]
    blk._run_kernel(x[n0:], out[n0:], st, blk._params, diag=None)
    moved = np.angle(np.exp(1j * (st[K.S_PHASE] - phase0 - (block - 1) * freq0 - st[K.S_FREQ])))
    assert abs(moved) <= np.pi / power + 1e-12
    assert abs(moved) > 0.5 * np.pi / power              # the clip, not a small error, acted
