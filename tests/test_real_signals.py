# SPDX-License-Identifier: GPL-3.0-or-later
"""The package on signals as a receiver sees them, against published formulas.

Pulses come from an independent designer (the framework's
``firdes.root_raised_cosine``, unit energy, 11 * sps + 1 taps; tests/shaped_signals.py),
noise is band-limited by the matched filter or a channel filter, and the M = 1 case
includes a residual carrier sharing its power with bi-phase data. Every statistical
check is seeded; each tolerance is derived in a comment from the statistics of the
estimate (standard errors) plus any known model error.
"""

import math

import numpy as np
import pmt
import pytest
from gnuradio import blocks, coherer, digital, filter as gr_filter, gr
from scipy import optimize, signal, stats

import shaped_signals as ss
from loop_harness import run_loop, wrapped_error

design = coherer.design
lockstat = coherer.lockstat
acquisition = coherer.acquisition

# --- 1. loop fidelity on pulse-shaped M-PSK ------------------------------------------------

# Es/N0 per M in the linear regime of the M-th power detector (REFERENCES 4: M = 8 only
# at >= 15 dB; the shaped 8PSK self-noise needs the thermal part small as well).
ESN0_DB = {1: 10.0, 2: 10.0, 4: 13.0, 8: 25.0}
# Roll-off per (M, sps): cycled so that every roll-off appears for every M. For 8PSK the
# 0.2 roll-off sits at 2 samples per symbol, where its pattern self-noise (and so the
# number of samples needed at a given loop SNR) is smallest.
ROLLOFF = {
    1: {2: 0.2, 4: 0.35, 8: 0.5, 16: 0.2},
    2: {2: 0.35, 4: 0.5, 8: 0.2, 16: 0.35},
    4: {2: 0.5, 4: 0.2, 8: 0.35, 16: 0.5},
    8: {2: 0.2, 4: 0.35, 8: 0.5, 16: 0.5},
}
GRID = ([(m, n, ROLLOFF[m].get(n, 0.35), "matched") for m in (1, 2, 4, 8) for n in (1, 2, 4, 8, 16)]
        + [(m, n, 0.35, "channel") for m in (2, 4) for n in (4, 8)])
GRID_IDS = [f"M{m}-sps{n}-r{r}-{p}" if n > 1 else f"M{m}-sps1" for m, n, r, p in GRID]

INDEPENDENT = 5000        # independent error samples wanted; the error decorrelates in ~1/(2 B_L T)
MAX_SAMPLES = 9_000_000   # run-time cap (binds only for shaped 8PSK; see the tolerance below)


def signal_model(sps, rolloff, placement):
    return dict(samples_per_symbol=sps, rolloff=rolloff, placement=placement)


def settle_samples(bt):
    # 2nd-order loop, zeta 0.707: transient time constant 1/(zeta wn) ~ 0.75 / B_L T samples;
    # 15 / B_L T is 20 time constants (e^-20), also covering the line estimate's start. The
    # detector is normalised by the M-th power line only once the loop's own indicator has
    # declared lock, which takes up to about 30 indicator windows of a quarter acquisition
    # block while its noise reference fills (coherer.lockstat); the line estimate then
    # averages over 8 / B_L T samples: settle past both.
    window = acquisition.fft_length(bt, 1.0) // 4
    return int(15 / bt) + 2000 + 30 * window + int(24 / bt)


@pytest.mark.parametrize("power, sps, rolloff, placement", GRID, ids=GRID_IDS)
def test_phase_error_variance_on_shaped_psk(power, sps, rolloff, placement):
    # Source: linear loop theory var = 2 B_L T S_e(0) / M^2 (Gardner, Phaselock Techniques,
    # from memory; REFERENCES 4 for the one-sample-per-symbol squaring loss, Lindsey & Simon
    # 1973, from memory), with S_e(0) the designer's detector noise density for this pulse
    # (thermal plus pattern self-noise, Moeneclaey & de Jonghe 1994, from memory).
    esn0 = 10 ** (ESN0_DB[power] / 10)
    model = signal_model(sps, rolloff, placement)
    density = design.detector_noise(power, esn0, **model).density
    bt = min(0.005, 0.01 / density)                     # M^2 var = 2 bt S_e(0) <= 0.02: linear regime
    predicted = 2 * bt * density / power ** 2
    assert design.phase_error_variance(power, esn0, bt, **model) == pytest.approx(predicted, rel=1e-9)

    settle = settle_samples(bt)
    n = min(settle + int(INDEPENDENT / (2 * bt)), MAX_SAMPLES)
    nsym = -(-n // sps)
    # carrier offset a tenth of the loop's lock-in range (REFERENCES 2.2)
    lock_in = design.lock_in_range_hz(design.design_loop(1.0, power, bt))
    k = np.arange(nsym * sps)
    theta = 0.4 / power + 2 * np.pi * 0.1 * lock_in * k
    rng = np.random.default_rng(1000 + 100 * power + 10 * sps + (placement == "channel"))
    x, _ = ss.receive(rng, power, nsym, ESN0_DB[power], sps, rolloff, placement, theta=theta)
    run = run_loop(x, power=power, noise_bw_hz=bt, acquire=False, point_angle=0.0)
    measured = np.var(wrapped_error(theta, run.ref, power)[settle:])
    # Tolerance: the sample variance of K independent Gaussian samples has relative standard
    # error sqrt(2/K); K = 2 B_L T n_measured = 5000 gives 2 % (at the 8PSK run-time cap K is
    # down to 1100, 4.3 %). REFERENCES 4 reports up to +4.5 % linear-model error at
    # M^2 var < 0.05. 20 % is >= 3.6 standard errors on top of that model error everywhere.
    k_indep = 2 * bt * (len(x) - settle)
    assert k_indep > 1000
    ratio = measured / predicted
    print(f"variance M={power} sps={sps} r={rolloff} {placement}: ratio {ratio:.3f} (K {k_indep:.0f})")
    assert ratio == pytest.approx(1.0, rel=0.20), (ratio, measured, predicted, bt, k_indep)


@pytest.mark.parametrize("power, sps, rolloff, placement", GRID, ids=GRID_IDS)
def test_ramp_error_on_shaped_psk(power, sps, rolloff, placement):
    # Source: exact discrete steady-state error of a type-2 loop to a frequency ramp,
    # phi_ss = alpha / (g K2) (final-value theorem; REFERENCES 2.1, Gardner, Phaselock
    # Techniques, from memory). It holds only if the detector gain is what the design assumed,
    # so it checks the loop's normalisation on this pulse shape.
    esn0_db = 40.0
    model = signal_model(sps, rolloff, placement)
    density = design.detector_noise(power, 10 ** (esn0_db / 10), **model).density
    bt = min(0.01, 0.004 / density)                     # M^2 var = 2 bt S_e(0) <= 0.008
    g_k2 = design.design_loop(1.0, power, bt).g_gains[1]
    m_phi = 0.25                                        # steady error in the M domain, rad
    alpha = (m_phi / power) * g_k2                      # rad / sample^2
    # Bias of the check: the sine S-curve gives arcsin(0.25)/0.25 = 1.011 and the jitter
    # shrinks its slope by exp(-M^2 var/2) >= 0.996: at most +1.5 %. Statistics: the mean of
    # the error over n samples has relative s.e. sqrt(S_e(0)/n) / (M phi_ss) (independent of
    # B_L T), so n = 40000 S_e(0) keeps it <= 2 %; 10 % is > 4 s.e. beyond the bias.
    settle = settle_samples(bt)
    n = settle + max(int(40000 * density), int(20 / bt))
    nsym = -(-n // sps)
    k = np.arange(nsym * sps)
    # the frequency alpha (k - n/2) sweeps through zero, so it stays well inside the NCO's
    # range +-pi/M (rad/sample) over the whole run
    kc = k - len(k) / 2
    theta = 0.3 / power + alpha * kc * kc / 2
    rng = np.random.default_rng(2000 + 100 * power + 10 * sps + (placement == "channel"))
    # the chirp would leave the pulse's band before a matched filter: the carrier is applied
    # to the filter output (what the loop sees in a receiver tracking Doppler ahead of it)
    x, _ = ss.receive(rng, power, nsym, esn0_db, sps, rolloff, placement, theta=theta,
                      carrier_after_filter=True)
    # the NCO starts on the carrier's initial frequency, as after acquisition
    run = run_loop(x, power=power, noise_bw_hz=bt, acquire=False, point_angle=0.0,
                   freq_guess_hz=-alpha * len(k) / 2 / (2 * np.pi))
    assert run.block.loop_design().g_gains[1] == pytest.approx(g_k2, rel=1e-12)
    expected = alpha / g_k2
    measured = np.mean(wrapped_error(theta, run.ref, power)[settle:])
    ratio = measured / expected
    print(f"ramp M={power} sps={sps} r={rolloff} {placement}: ratio {ratio:.3f}")
    assert ratio == pytest.approx(1.0, rel=0.10), (ratio, measured, expected, bt)


# --- 2. residual carrier ---------------------------------------------------------------------

@pytest.mark.parametrize("beta", [0.3, 0.7, 1.0, 1.3])
def test_residual_carrier_variance(beta):
    # Source: sigma^2 = N0 B_L / Pc with Pc = P cos^2(beta) (REFERENCES 11.1; Gardner,
    # Phaselock Techniques, ch. 5 and Lindsey & Simon 1973, from memory); at one sample per
    # period with complex noise of variance sigma_n^2 per sample: B_L T sigma_n^2 / cos^2(beta).
    sigma2 = 4.0                                        # -6 dB per sample; see the self-noise bound
    bt = 0.005 * math.cos(beta) ** 2                    # predicted variance 0.02 rad^2: linear regime
    predicted = bt * sigma2 / math.cos(beta) ** 2
    assert design.phase_error_variance(1, 1 / sigma2, bt, modulation_index=beta) == \
        pytest.approx(predicted, rel=1e-9)
    samples_per_bit = 8
    settle = settle_samples(bt)
    n = settle + int(INDEPENDENT / (2 * bt))
    rng = np.random.default_rng(int(3000 + 100 * beta))
    d = ss.manchester(rng, -(-n // samples_per_bit), samples_per_bit)
    n = len(d)
    lock_in = design.lock_in_range_hz(design.design_loop(1.0, 1, bt))
    k = np.arange(n)
    theta = 0.5 + 2 * np.pi * 0.1 * lock_in * k
    x = (np.exp(1j * (theta + beta * d)) + ss.white(rng, n, sigma2)).astype(np.complex64)
    run = run_loop(x, power=1, noise_bw_hz=bt, acquire=False, point_angle=0.0)
    measured = np.var(wrapped_error(theta, run.ref, 1)[settle:])
    # The formula has no data term: bi-phase data has no density at zero frequency. Its
    # residue through the closed loop (linear model: error tan(beta) d filtered by h[n], the
    # exact closed-loop response of the design) must be a negligible share (< 2 %) or the
    # comparison would not test the formula.
    h = design.impulse_response(design.design_loop(1.0, 1, bt).g_gains, int(40 / bt))
    self_var = math.tan(beta) ** 2 * np.var(signal.lfilter(h, 1.0, d[:400_000])[int(40 / bt):])
    assert self_var < 0.02 * predicted, (self_var, predicted)
    # Tolerance: K = 5000 independent samples, s.e. of the variance 2 %; 20 % is 10 s.e.
    ratio = measured / predicted
    print(f"residual carrier beta={beta}: ratio {ratio:.3f}, data residue {self_var / predicted:.4f}")
    assert ratio == pytest.approx(1.0, rel=0.20), (ratio, measured, predicted)


# --- 3. false lock on band-limited noise -----------------------------------------------------

FALSE_LOCK_SAMPLES = 4_000_000
WINDOW = 1024
LOOP_BW = 0.001                                          # noise_bw_hz = 0.001 fs
NOISE_TYPES = [("rrc", 2), ("rrc", 4), ("rrc", 8), ("rrc", 16), ("lowpass", 0.25), ("lowpass", 2 / 3)]


def band_limited_noise(rng, kind, parameter):
    w = ss.white(rng, FALSE_LOCK_SAMPLES, 1.0)
    if kind == "rrc":
        taps = ss.rrc(parameter, 0.35)
    else:
        # low-pass channel filter, cut-off parameter/2 of the sample rate (scipy's Nyquist units)
        taps = signal.firwin(129, parameter)
    y = ss.filt(w, taps)
    return (y / np.sqrt(np.mean(np.abs(y) ** 2))).astype(np.complex64)


def lock_messages(store):
    """Number of status messages saying ``locked`` (each is a declared lock or a held one;
    with no periodic status a message is only sent at a change of state)."""
    count = 0
    for i in range(store.num_messages()):
        msg = pmt.to_python(store.get_message(i))
        count += bool(msg["locked"])
    return count


@pytest.fixture(scope="module")
def false_locks():
    fixed = lockstat.false_lock_threshold(WINDOW, lockstat.DEFAULT_LOCK_P_FA)
    out = {"pooled": 0, "windows": 0, "detail": [], "fixed": 0}
    rng = np.random.default_rng(4000)
    for kind, parameter in NOISE_TYPES:
        x = band_limited_noise(rng, kind, parameter)
        tb = gr.top_block()
        src = blocks.vector_source_c(x, False)
        entries = []
        keep = []                     # Python blocks must outlive the flowgraph run
        given = parameter if kind == "rrc" else 4
        for power in (1, 2, 4, 8):
            for sps in (given, 1):
                det = coherer.lock_detector_cc(1.0, power, window=WINDOW, samples_per_symbol=sps)
                store = blocks.message_debug()
                tb.connect(src, det, blocks.null_sink(gr.sizeof_gr_complex))
                tb.msg_connect((det, "status"), (store, "store"))
                keep.append(det)
                entries.append(("detector", power, sps, store, len(x) // WINDOW))
            loop = coherer.mth_power_loop_cc(1.0, power, LOOP_BW, acquire=True)
            tb.connect(src, loop, blocks.null_sink(gr.sizeof_gr_complex))
            window = loop.acquisition_fft_length() // 4
            entries.append(("loop", power, window, loop, len(x) // window))
            if kind == "rrc" and parameter >= 8:
                det = coherer.lock_detector_cc(1.0, power, window=WINDOW, lock_threshold=fixed,
                                               unlock_threshold=fixed)
                store = blocks.message_debug()
                tb.connect(src, det, blocks.null_sink(gr.sizeof_gr_complex))
                tb.msg_connect((det, "status"), (store, "store"))
                keep.append(det)
                entries.append(("fixed", power, 1, store, len(x) // WINDOW))
        tb.run()
        for what, power, extra, obj, windows in entries:
            if what == "loop":
                locks = sum(1 for _, locked in obj.lock_log() if locked)
            else:
                locks = lock_messages(obj)
            if what == "fixed":
                out["fixed"] += locks
            else:
                out["pooled"] += locks
                out["windows"] += windows
            out["detail"].append((kind, parameter, what, power, extra, locks))
    return out


def test_false_lock_on_band_limited_noise(false_locks):
    # Source: design probability 1e-6 per window (lockstat.DEFAULT_LOCK_P_FA; threshold
    # referenced to the measured noise, constant-false-alarm practice, REFERENCES 11.4). Pooled
    # over noise types, M, samples_per_symbol given / left at 1 and the loops' own indicators,
    # the count of declared locks must not exceed the binomial 1 - 1e-3 quantile of K windows.
    k = false_locks["windows"]
    bound = stats.binom.ppf(1 - 1e-3, k, lockstat.DEFAULT_LOCK_P_FA)
    hits = [d for d in false_locks["detail"] if d[2] != "fixed" and d[5]]
    by_kind = {w: sum(d[5] for d in hits if d[2] == w) for w in ("detector", "loop")}
    print(f"false locks: {false_locks['pooled']} in {k} windows (bound {bound:.0f}); {by_kind}")
    assert false_locks["pooled"] <= bound, (false_locks["pooled"], bound, k, hits)


def test_fixed_white_noise_threshold_false_locks(false_locks):
    # The check above is not vacuous: a detector whose threshold assumes white noise
    # (Qinv(1e-6)/sqrt(2N), REFERENCES 7.2) fires often on the same RRC noise at 8 and 16
    # samples per symbol (REFERENCES 11.3: window-mean variance (1/2N) sum_tau rho_M(tau)).
    print(f"fixed white-noise threshold: {false_locks['fixed']} false locks")
    assert false_locks["fixed"] >= 10, false_locks["detail"]


# --- 4. Es/N0 and detection with samples_per_symbol given -----------------------------------

ESN0_WINDOW = 4096
SKIP_WINDOWS = 4              # the timing phase is chosen by averaging power over windows


def window_values(x, sps, **kwargs):
    """Run the detector; return (metric, esn0_db) of every decided window."""
    det = coherer.lock_detector_cc(1.0, 4, window=ESN0_WINDOW, samples_per_symbol=sps, **kwargs)
    tb = gr.top_block()
    src = blocks.vector_source_c(x, False)
    metric, esn0 = blocks.vector_sink_f(), blocks.vector_sink_f()
    tb.connect(src, det, blocks.null_sink(gr.sizeof_gr_complex))
    tb.connect((det, 1), metric)
    tb.connect((det, 2), esn0)
    tb.run()
    ends = np.arange(ESN0_WINDOW - 1, len(x), ESN0_WINDOW)
    return np.asarray(metric.data())[ends], np.asarray(esn0.data())[ends], det


@pytest.mark.parametrize("sps", [2, 4, 8])
@pytest.mark.parametrize("esn0_db", [3, 6, 10, 15, 20])
def test_esn0_estimate_oversampled(sps, esn0_db):
    # Source: M2M4 estimator (Pauluzzi & Beaulieu 2000; REFERENCES 8) on the symbol-spaced
    # matched-filter samples (ISI-free, white noise: CONVENTIONS 8, Proakis ch. 9 from memory).
    windows = 100 + SKIP_WINDOWS
    nsym = windows * ESN0_WINDOW // sps
    rng = np.random.default_rng(5000 + 10 * sps + esn0_db)
    x, _ = ss.receive(rng, 4, nsym, esn0_db, sps, 0.35, "matched", point_angle=math.pi / 4)
    _, est, _ = window_values(x, sps)
    mean_db = np.mean(est[SKIP_WINDOWS:])
    # Tolerance: N = 4096/sps >= 512 symbols per window: M2M4 bias <= +0.1 dB, mean of dB values
    # (Jensen) about -0.1 dB at 3 dB, per-window spread <= 1 dB so the mean of 100 windows has
    # s.e. <= 0.1 dB (REFERENCES 8 table). 0.5 dB covers bias plus 3 s.e.
    print(f"Es/N0 sps={sps} true {esn0_db} dB: mean estimate {mean_db:.3f} dB")
    assert mean_db == pytest.approx(esn0_db, abs=0.5), (mean_db, est[SKIP_WINDOWS:].std())


@pytest.mark.parametrize("sps", [2, 4, 8])
def test_detection_probability_oversampled(sps):
    # Source: Gaussian approximation of the window mean, P_D = Q((gamma - c_M)/sqrt(var/N))
    # (REFERENCES 7.1-7.2; c_M from the phase pdf of a tone in noise, from memory there).
    nsym_window = ESN0_WINDOW // sps
    gamma = lockstat.false_lock_threshold(nsym_window, 1e-3)
    esn0_db = optimize.brentq(
        lambda db: lockstat.detection_probability(4, 10 ** (db / 10), nsym_window, gamma) - 0.5, -10, 10)
    windows = 600 + SKIP_WINDOWS
    rng = np.random.default_rng(6000 + sps)
    x, _ = ss.receive(rng, 4, windows * nsym_window, esn0_db, sps, 0.35, "matched",
                      point_angle=math.pi / 4)
    metric, _, det = window_values(x, sps, lock_threshold=gamma, unlock_threshold=gamma)
    assert det.lock_threshold() == pytest.approx(gamma)
    detected = metric[SKIP_WINDOWS:] >= gamma
    p = lockstat.detection_probability(4, 10 ** (esn0_db / 10), nsym_window, gamma)
    k = len(detected)
    # Windows are independent decisions (fixed thresholds): binomial s.e. sqrt(p(1-p)/K);
    # 4 s.e. plus 0.02 for the Gaussian approximation (REFERENCES 7.2 reports it within 0.01).
    band = 4 * math.sqrt(p * (1 - p) / k) + 0.02
    print(f"detection sps={sps} at {esn0_db:.2f} dB: measured {np.mean(detected):.3f}, predicted {p:.3f}, "
          f"band {band:.3f}")
    assert abs(np.mean(detected) - p) <= band, (np.mean(detected), p, band, esn0_db)


# --- 5. a chain of the framework's blocks around ours ---------------------------------------

CHAIN_FS = 100_000.0
CHAIN_SPS = 4
CHAIN_ESN0_DB = 8.0
CHAIN_SYMBOLS = 160_000
CHAIN_SKIP = 40_000           # symbols: acquisition, pull-in and timing-loop settling


def qpsk_ser(esn0_db):
    """Coherent QPSK symbol error rate, Ps = 2Q(sqrt(Es/N0)) - Q(sqrt(Es/N0))^2
    (Proakis & Salehi, Digital Communications, from memory; REFERENCES 9 per-bit form)."""
    q = stats.norm.sf(math.sqrt(10 ** (esn0_db / 10)))
    return 2 * q - q * q


def symbol_sync():
    # exactly as in CONVENTIONS 8 (the settings that do not slip on this signal)
    return digital.symbol_sync_cc(digital.TED_GARDNER, CHAIN_SPS, 0.01, 1.0, 1.0, 0.1, 1,
                                  digital.constellation_qpsk().base(), digital.IR_MMSE_8TAP, 128, [])


def symbol_errors(y, sym):
    """Errors of quadrant decisions against the sent symbols, the 4-fold phase ambiguity and
    the timing-recovery start lag resolved by search. Returns (errors, symbols compared)."""
    y = y[CHAIN_SKIP:]
    dec = np.floor(np.mod(np.angle(y), 2 * np.pi) / (np.pi / 2)).astype(int)
    ref = np.floor(np.mod(np.angle(sym), 2 * np.pi) / (np.pi / 2)).astype(int)
    best = None
    probe = 4000
    for lag in range(-64, 65):
        start = CHAIN_SKIP + lag
        seg = ref[start:start + probe]
        for rot in range(4):
            e = np.count_nonzero((dec[:probe] + rot) % 4 != seg)
            if best is None or e < best[0]:
                best = (e, lag, rot)
    _, lag, rot = best
    start = CHAIN_SKIP + lag
    m = min(len(dec), len(ref) - start)
    return int(np.count_nonzero((dec[:m] + rot) % 4 != ref[start:start + m])), m


@pytest.mark.parametrize("order", ["loop-first", "sync-first"])
def test_qpsk_chain_symbol_error_rate(order):
    rng = np.random.default_rng(7000 + (order == "sync-first"))
    taps = ss.rrc(CHAIN_SPS, 0.35)
    sym = ss.symbols(rng, 4, CHAIN_SYMBOLS, math.pi / 4)
    n = CHAIN_SYMBOLS * CHAIN_SPS
    theta = 1.0 + 2 * np.pi * 50.0 / CHAIN_FS * np.arange(n)
    x = ss.shaped(sym, CHAIN_SPS, taps) * np.exp(1j * theta) \
        + ss.white(rng, n, CHAIN_SPS * 10 ** (-CHAIN_ESN0_DB / 10))
    tb = gr.top_block()
    src = blocks.vector_source_c(x.astype(np.complex64), False)
    mf = gr_filter.fir_filter_ccf(1, taps.tolist())
    sync = symbol_sync()
    snk = blocks.vector_sink_c()
    if order == "loop-first":
        loop = coherer.mth_power_loop_cc(CHAIN_FS, 4, 20.0)
        tb.connect(src, loop, mf, sync, snk)
    else:
        loop = coherer.mth_power_loop_cc(CHAIN_FS / CHAIN_SPS, 4, 20.0)
        tb.connect(src, mf, sync, loop, snk)
    tb.run()
    y = np.asarray(snk.data())
    errors, m = symbol_errors(y, sym)
    assert errors >= 200
    ser = errors / m
    # Tolerance: >= 200 errors give a binomial s.e. of <= 7 % in SER, about 0.03 dB here;
    # the 0.5 dB band is for the implementation loss of carrier and timing jitter.
    equivalent_db = optimize.brentq(lambda db: qpsk_ser(db) - ser, -5, 20)
    print(f"chain {order}: SER {ser:.5f} ({errors} errors in {m}), theory {qpsk_ser(CHAIN_ESN0_DB):.5f}, "
          f"equivalent Es/N0 {equivalent_db:.2f} dB")
    assert abs(equivalent_db - CHAIN_ESN0_DB) <= 0.5, (ser, qpsk_ser(CHAIN_ESN0_DB), equivalent_db, errors, m)
