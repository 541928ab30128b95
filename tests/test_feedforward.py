# SPDX-License-Identifier: GPL-3.0-or-later
"""Feed-forward M-th power (Viterbi & Viterbi) phase estimator: mth_power_feedforward_cc.

Oracles: a direct numpy implementation of the published estimator and unwrapping
rule (Viterbi & Viterbi 1983), the small-error variance formulas and Monte Carlo
table of REFERENCES.md section 6.1, the MCRB (D'Andrea, Mengali & Reggiannini 1994),
and c_M of REFERENCES.md 7.1.
"""

from math import comb, factorial, pi

import numpy as np
import pmt
import pytest
from gnuradio import blocks, gr
from scipy.special import ive

from gnuradio.coherer import _feedforward_kernel as K
from gnuradio.coherer.mth_power_feedforward_cc import (
    MAX_WINDOW, default_weighting, mth_power_feedforward_cc)
from gnuradio.coherer.mth_power_loop_cc import default_point_angle

FS = 1.0e6                  # sample rate of every test, samples/s
BURST_KEY = "burst_start"   # reset tag key chosen by the test (a user parameter, not a project key)


# --- oracles ---------------------------------------------------------------------------

def v_m(power, esn0):
    """V_M = sum_k C(M,k)^2 k! s2^k, s2 = 1/(Es/N0): REFERENCES 4 (derived there, checked numerically)."""
    s2 = 1.0 / esn0
    return sum(comb(power, k) ** 2 * factorial(k) * s2 ** k for k in range(1, power + 1))


def c_m(power, esn0):
    """c_M(rho) = (sqrt(pi rho)/2) e^{-rho/2} [I_{(M-1)/2}(rho/2) + I_{(M+1)/2}(rho/2)]:
    REFERENCES 7.1 (closed form from memory, checked there by numerical integration)."""
    # ive(v, x) = I_v(x) e^{-x}
    return np.sqrt(pi * esn0) / 2.0 * (ive((power - 1) / 2.0, esn0 / 2.0) + ive((power + 1) / 2.0, esn0 / 2.0))


def var_power_weighting(power, length, esn0):
    """V&V small-error variance for F = r^M: V_M / (2 L M^2) (REFERENCES 6.1, derived there)."""
    return v_m(power, esn0) / (2.0 * length * power ** 2)


def var_phase_weighting(power, length, esn0):
    """V&V small-error variance for F = 1: (1 - c_2M) / (2 L M^2 c_M^2) (REFERENCES 6.1, derived there)."""
    return (1.0 - c_m(2 * power, esn0)) / (2.0 * length * power ** 2 * c_m(power, esn0) ** 2)


def mcrb(length, esn0):
    """MCRB(theta) = 1 / (2 L Es/N0): D'Andrea, Mengali & Reggiannini 1994 (REFERENCES 6.1; formula from memory)."""
    return 1.0 / (2.0 * length * esn0)


def db(value_db):
    """Linear ratio of a value in dB."""
    return 10.0 ** (value_db / 10.0)


def wrap(a, period):
    """Wrap angles into [-period/2, period/2)."""
    return a - period * np.floor(a / period + 0.5)


def reference_estimator(x, power, window, weighting, point_angle, resets=()):
    """Direct numpy/Python implementation of the block's definition (slow, obviously correct).

    Viterbi & Viterbi 1983 (REFERENCES 6.1; notation from memory there): theta = arg(sum F(|z|) e^{jM arg z}) / M over the window
    [max(r, i-W+1), i] (r = last reset), unwrapped with theta_i = theta_{i-1} +
    wrap_{2pi/M}(phi_i - theta_{i-1}); sample c = i - W//2 is corrected with theta_i,
    or with theta_{r-1} when a reset r falls in (c, c + W//2].
    Returns (out, reference phasor, frequency in rad/sample) per output sample.
    """
    x = np.asarray(x, np.complex128)
    n_items = len(x)
    delay = window // 2
    valid = np.isfinite(x) & (x != 0)
    z = np.where(valid, x, 0.0)
    r = np.abs(z)
    u = np.where(valid, z / np.where(valid, r, 1.0), 0.0)
    weight = {"power": r ** power, "magnitude": r, "phase": valid * 1.0}[weighting]
    terms = weight * u ** power
    reset_set = set(int(v) for v in resets)
    seg_start = np.zeros(n_items, np.int64)
    current = 0
    for i in range(n_items):
        if i in reset_set:
            current = i
        seg_start[i] = current
    csum = np.concatenate([[0.0], np.cumsum(terms)])
    lo = np.maximum(seg_start, np.arange(n_items) - window + 1)
    s = (csum[np.arange(n_items) + 1] - csum[lo]) * np.exp(-1j * power * point_angle)
    theta = np.zeros(n_items)
    freq = np.zeros(n_items)
    th, have = 0.0, False
    step = 2.0 * pi / power
    for i in range(n_items):
        if i in reset_set:
            have = False
        if s[i] != 0:
            phi = np.angle(s[i]) / power
            if have:
                th = th + wrap(phi - th, step)
            else:
                th, have = phi, True
        theta[i] = th
        lag = min(i - seg_start[i], window)
        freq[i] = wrap(theta[i] - theta[i - lag], 2 * pi) / lag if lag > 0 else 0.0
    # phase applied to each sample c
    applied = np.zeros(n_items)
    applied_f = np.zeros(n_items)
    for c in range(n_items):
        est = min(c + delay, n_items - 1)
        hits = [rr for rr in reset_set if c < rr <= c + delay]
        if hits:
            est = min(hits) - 1
        applied[c] = theta[est] if est >= 0 else 0.0
        applied_f[c] = freq[est] if est >= 0 else 0.0
    out = np.zeros(n_items, np.complex128)
    ref = np.ones(n_items, np.complex128)
    fout = np.zeros(n_items)
    out[delay:] = (z * np.exp(-1j * applied))[:n_items - delay]
    ref[delay:] = np.exp(1j * applied)[:n_items - delay]
    fout[delay:] = applied_f[:n_items - delay]
    return out, ref, fout


def psk(rng, n_items, power, point_angle):
    """Random M-PSK symbols, points at point_angle + 2 pi m / M."""
    return np.exp(1j * (point_angle + 2 * pi / power * rng.integers(0, power, n_items)))


def noise(rng, n_items, esn0):
    """Circular complex white Gaussian noise of total variance 1/esn0."""
    return (rng.standard_normal(n_items) + 1j * rng.standard_normal(n_items)) * np.sqrt(0.5 / esn0)


def make_tags(offsets, key=BURST_KEY):
    tags = []
    for off in offsets:
        t = gr.tag_t()
        t.offset = int(off)
        t.key = pmt.intern(key)
        t.value = pmt.PMT_T
        tags.append(t)
    return tags


def run_block(tb, x, block, tags=(), max_items=None, n_diag=3):
    """Stream x (complex64) through block; returns (out0, ref, freq_hz, phase, out0 tags)."""
    src = blocks.vector_source_c(np.asarray(x, np.complex64), False, 1, list(tags))
    sinks = [blocks.vector_sink_c(), blocks.vector_sink_c(), blocks.vector_sink_f(), blocks.vector_sink_f()]
    if max_items is not None:
        block.set_max_noutput_items(max_items)
    tb.connect(src, block, sinks[0])
    for port in range(1, 1 + n_diag):
        tb.connect((block, port), sinks[port])
    tb.run()
    result = [np.asarray(s.data()) for s in sinks[:1 + n_diag]]
    result += [None] * (3 - n_diag)
    return (*result, sinks[0].tags())


def stream_ref(tb, x, block, tags=()):
    """Stream x through block (diagnostics on, only the reference output read); returns ref."""
    src = blocks.vector_source_c(np.asarray(x, np.complex64), False, 1, list(tags))
    null = blocks.null_sink(gr.sizeof_gr_complex)
    ref_sink = blocks.vector_sink_c()
    tb.connect(src, block, null)
    tb.connect((block, 1), ref_sink)
    tb.run()
    return np.asarray(ref_sink.data())


# --- the estimator against its definition ----------------------------------------------------

@pytest.mark.parametrize("power", [1, 2, 3, 4, 8])
@pytest.mark.parametrize("window", [1, 2, 7, 32])
def test_matches_direct_implementation(tb, power, window):
    """Output, reference, frequency and phase equal a direct numpy implementation of
    Viterbi & Viterbi (1983) with the classic unwrapping rule, for every weighting,
    with resets, gaps (zero, NaN, Inf), a frequency offset and a point angle."""
    rng = np.random.default_rng(100 * power + window)
    n_items = 2500
    point_angle = 0.3
    resets = [0, 50, 51, 900, 2000, 2003]
    for weighting in ("power", "magnitude", "phase"):
        x = psk(rng, n_items, power, point_angle) * np.exp(1j * (0.5 + 2 * pi * 1e-3 * np.arange(n_items)))
        x = (x + noise(rng, n_items, db(8))).astype(np.complex64)
        x[100:105] = 0
        x[700], x[701], x[702] = np.nan, np.inf, complex(1.0, -np.inf)
        x[1500:1540] = 0                       # longer than every window: estimate held
        want_out, want_ref, want_freq = reference_estimator(x, power, window, weighting, point_angle, resets)
        top = gr.top_block()
        blk = mth_power_feedforward_cc(FS, power, window, point_angle=point_angle, weighting=weighting,
                                       reset_tag_key=BURST_KEY, diagnostics=True)
        out, ref, freq_hz, phase, _ = run_block(top, x, blk, make_tags(resets))
        # complex64 outputs of float64 arithmetic: agreement to float32 rounding
        np.testing.assert_allclose(out, want_out, rtol=0, atol=1e-5 * np.max(np.abs(want_out)))
        np.testing.assert_allclose(ref, want_ref, rtol=0, atol=1e-5)
        np.testing.assert_allclose(np.exp(1j * phase.astype(np.float64)), want_ref, rtol=0, atol=1e-5)
        np.testing.assert_allclose(freq_hz * 2 * pi / FS, want_freq, rtol=0, atol=1e-5)
        assert blk.gap_samples() == int(np.sum(~(np.isfinite(x) & (x != 0))))


def test_first_outputs_are_the_delay(tb):
    """The first window // 2 outputs are 0 (reference 1, frequency 0, phase 0), then output n
    is input n - window // 2 derotated."""
    window = 9
    rng = np.random.default_rng(7)
    x = (psk(rng, 200, 2, 0.0) * np.exp(0.4j)).astype(np.complex64)
    blk = mth_power_feedforward_cc(FS, 2, window, diagnostics=True)
    out, ref, freq_hz, phase, _ = run_block(tb, x, blk)
    d = window // 2
    assert blk.delay() == d
    assert np.all(out[:d] == 0) and np.all(ref[:d] == 1) and np.all(freq_hz[:d] == 0) and np.all(phase[:d] == 0)
    # noiseless BPSK rotated by 0.4 rad: every corrected sample is +-1 (the estimate is exact)
    np.testing.assert_allclose(np.abs(out[d:].imag), 0, atol=1e-6)
    np.testing.assert_allclose(np.abs(out[d:].real), 1, atol=1e-6)


# --- scheduling: chunking, tags -------------------------------------------------------------

def _scheduling_input(seed=3, n_items=3000):
    rng = np.random.default_rng(seed)
    x = psk(rng, n_items, 4, pi / 4) * np.exp(1j * 2 * pi * 3e-4 * np.arange(n_items))
    x = (x + noise(rng, n_items, 10.0)).astype(np.complex64)
    x[400:410] = 0
    x[1234] = np.nan
    return x


@pytest.mark.parametrize("max_items", [1, 7, 256, 1000])
def test_chunking_invariance(tb, max_items):
    """Any max_noutput_items gives bit-identical outputs and identical tags."""
    x = _scheduling_input()
    resets = [0, 300, 301, 1000, 1023, 1024, 2047, 2500]
    other = make_tags([5, 1022, 2999], key="marker")
    tags = make_tags(resets) + other

    def run(limit):
        top = gr.top_block()
        blk = mth_power_feedforward_cc(FS, 4, 37, reset_tag_key=BURST_KEY, diagnostics=True)
        res = run_block(top, x, blk, tags, max_items=limit)
        tag_list = [(t.offset, pmt.symbol_to_string(t.key)) for t in res[4]]
        return res[:4], sorted(tag_list)

    (base, base_tags), (chunked, chunked_tags) = run(None), run(max_items)
    for a, b in zip(base, chunked):
        np.testing.assert_array_equal(a, b)
    assert base_tags == chunked_tags


def test_kernel_split_invariance():
    """The kernel over one array and over random splits of it gives bit-identical results."""
    rng = np.random.default_rng(11)
    x = _scheduling_input(seed=4, n_items=5000)
    resets = np.array(sorted(rng.choice(5000, 12, replace=False)), np.int64)
    for power, window, weighting in [(1, 1, K.WEIGHT_POWER), (2, 16, K.WEIGHT_POWER),
                                     (4, 37, K.WEIGHT_PHASE), (8, 64, K.WEIGHT_MAGNITUDE),
                                     (5, 10, K.WEIGHT_PHASE)]:
        roots = np.exp(2j * pi * np.arange(power) / power)
        consts = (power, window, weighting, 1.0, 0.0, roots.real.copy(), roots.imag.copy())
        results = []
        for cuts in ([], sorted(rng.choice(np.arange(1, 5000), 40, replace=False))):
            state, bufs = K.new_state(), K.FeedforwardBuffers(window)
            outs = [np.empty(5000, np.complex64), np.empty(5000, np.complex64),
                    np.empty(5000, np.float32), np.empty(5000, np.float32)]
            edges = [0, *cuts, 5000]
            for a, b in zip(edges[:-1], edges[1:]):
                local = resets[(resets >= a) & (resets < b)] - a
                K.feedforward(x[a:b], *(o[a:b] for o in outs), local, state, *bufs.arrays(), *consts)
            results.append(outs)
        for a, b in zip(*results):
            np.testing.assert_array_equal(a, b)


def test_tags_follow_the_delay(tb):
    """Upstream tags (the reset tags included) leave on every output window // 2 samples later,
    i.e. on the sample they were attached to; none is added or lost within the stream."""
    x = _scheduling_input(n_items=2000)
    window = 40
    d = window // 2
    offsets = [0, 3, 500, 1500, 1979, 1985]
    blk = mth_power_feedforward_cc(FS, 4, window, reset_tag_key=BURST_KEY, diagnostics=True)
    src = blocks.vector_source_c(x, False, 1, make_tags(offsets[:3]) + make_tags(offsets[3:], key="marker"))
    sinks = [blocks.vector_sink_c(), blocks.vector_sink_c(), blocks.vector_sink_f(), blocks.vector_sink_f()]
    tb.connect(src, blk, sinks[0])
    for port in (1, 2, 3):
        tb.connect((blk, port), sinks[port])
    tb.run()
    for sink in sinks:
        got = sorted((t.offset, pmt.symbol_to_string(t.key)) for t in sink.tags())
        assert got == [(0 + d, BURST_KEY), (3 + d, BURST_KEY), (500 + d, BURST_KEY), (1500 + d, "marker"),
                       (1979 + d, "marker")]
    # the tag at 1985 would leave at 2005, after the last output sample (1999): as documented,
    # it is still in the delay when the finite stream ends


# --- statistics: variance vs Viterbi & Viterbi, bursts, frequency offset --------------------------

#: REFERENCES 6.1 Monte Carlo table (V&V 1983 estimator, 20000 blocks): (M, L, Es/N0 dB, var/MCRB for F = r^M).
VV_TABLE = [
    (2, 32, 6, 1.124), (2, 32, 10, 1.058), (4, 64, 10, 1.498), (4, 64, 6, 2.632),
    (4, 256, 3, 5.111), (8, 128, 15, 2.102), (8, 128, 20, 1.270),
]
#: Independent (disjoint) windows per table point, as in REFERENCES 6.1.
VV_BLOCKS = 20000


@pytest.mark.slow
@pytest.mark.parametrize("weighting", ["power", "phase"])
@pytest.mark.parametrize("power,length,esn0_db,table_ratio", VV_TABLE)
def test_variance_matches_viterbi_viterbi(tb, weighting, power, length, esn0_db, table_ratio):
    """Sliding-window estimate variance = V_M/(2 L M^2) (F = |z|^M) or
    (1 - c_2M)/(2 L M^2 c_M^2) (F = 1) within +-10 % at the REFERENCES 6.1 table points
    (Viterbi & Viterbi 1983; formulas derived in REFERENCES 6.1); ratio to the MCRB
    (D'Andrea, Mengali & Reggiannini 1994) reported and, for F = |z|^M, compared with the table."""
    esn0 = db(esn0_db)
    rng = np.random.default_rng(1000 * power + length + esn0_db + (weighting == "phase"))
    theta0 = rng.uniform(-pi, pi)
    n_items = VV_BLOCKS * length + length
    pa = default_point_angle(power)
    x = (psk(rng, n_items, power, pa) * np.exp(1j * theta0) + noise(rng, n_items, esn0)).astype(np.complex64)
    blk = mth_power_feedforward_cc(FS, power, length, weighting=weighting, diagnostics=True)
    ref = stream_ref(tb, x, blk)
    # ref at output j is e^{j theta^} of the window ending at input j: full windows from j = L - 1
    err = wrap(np.angle(ref[length - 1:]) - theta0, 2 * pi / power)
    var = float(np.mean(err ** 2))
    pred = (var_power_weighting if weighting == "power" else var_phase_weighting)(power, length, esn0)
    bound = mcrb(length, esn0)
    print(f"M={power} L={length} {esn0_db} dB F={weighting}: var {var:.4e} pred {pred:.4e} "
          f"ratio {var / pred:.3f} var/MCRB {var / bound:.3f}")
    # Tolerance +-10 % (REFERENCES 6.1): the variance of 20000 independent windows has a
    # standard error of sqrt(2/20000) = 1 % (overlapping windows only lower it), 4 s.e. = 4 %,
    # plus up to 4 % linearisation error of the small-error formulas for F = |z|^M. For F = 1
    # at M = 4, L = 256, 3 dB the table's own Monte Carlo (5.081e-3) is 8.5 % above the formula
    # (4.682e-3): that point passes with little margin, as the issue's +-10 % allows.
    assert abs(var / pred - 1.0) < 0.10
    # no estimator beats the bound (same 4 s.e. allowance)
    assert var / bound > 1.0 - 4 * np.sqrt(2.0 / VV_BLOCKS)
    if weighting == "power":
        # the table's Monte Carlo var/MCRB (REFERENCES 6.1), same +-10 %
        assert abs((var / bound) / table_ratio - 1.0) < 0.10


def _predicted_burst_variance(power, esn0, weighting, n_signal, n_noise):
    """Small-error variance of a window holding n_signal burst samples and n_noise
    noise-only samples (linearised arg of the sum; per-term means and variances from
    REFERENCES 4 and 7.1: signal term mean 1 (|z|^M) or c_M (F = 1), quadrature variance
    V_M/2 or (1 - c_2M)/2; noise-only term mean 0, quadrature variance M! s2^M / 2 or 1/2)."""
    s2 = 1.0 / esn0
    if weighting == "power":
        quad = n_signal * v_m(power, esn0) / 2 + n_noise * factorial(power) * s2 ** power / 2
        mean = n_signal
    else:
        quad = n_signal * (1 - c_m(2 * power, esn0)) / 2 + n_noise / 2
        mean = n_signal * c_m(power, esn0)
    return quad / (power ** 2 * mean ** 2)


@pytest.mark.slow
@pytest.mark.parametrize("power,window,esn0_db", [(4, 64, 10.0), (2, 32, 6.0)])
def test_bursts_with_reset_tags(tb, power, window, esn0_db):
    """300 bursts of 200-2000 symbols, random phase each, separated by noise, a reset tag
    on each burst's first sample: every burst's phase error (mod 2 pi/M) is within 3 sigma
    (rms) of the small-error prediction from its first window on, with no transient."""
    esn0 = db(esn0_db)
    weighting = default_weighting(power)
    pa = default_point_angle(power)
    d = window // 2
    rng = np.random.default_rng(42 + power)
    n_bursts = 300
    lengths = rng.integers(200, 2001, n_bursts)
    gaps = rng.integers(d + 20, 400, n_bursts)          # > window // 2: windows never cross a reset
    starts, pos = [], int(rng.integers(50, 300))
    for length, gap in zip(lengths, gaps):
        starts.append(pos)
        pos += int(length) + int(gap)
    n_items = pos + window
    phases = rng.uniform(-pi, pi, n_bursts)
    x = noise(rng, n_items, esn0)
    for start, length, theta in zip(starts, lengths, phases):
        x[start:start + length] += psk(rng, length, power, pa) * np.exp(1j * theta)
    blk = mth_power_feedforward_cc(FS, power, window, reset_tag_key=BURST_KEY, diagnostics=True)
    ref = stream_ref(tb, x.astype(np.complex64), blk, make_tags(starts))

    first_window_u2, all_u2, worst = [], [], 0.0
    for start, length, theta in zip(starts, lengths, phases):
        c = np.arange(start, start + length)
        i = c + d                                        # input sample ending the window of c
        lo = np.maximum(start, i - window + 1)
        n_signal = np.minimum(i, start + length - 1) - lo + 1
        n_noise = (i - lo + 1) - n_signal
        sigma = np.sqrt(_predicted_burst_variance(power, esn0, weighting, n_signal, n_noise))
        err = wrap(np.angle(ref[c + d]) - theta, 2 * pi / power)   # output index of sample c is c + d
        u = err / sigma
        # per burst: rms within 3 sigma. A burst spans >= 200/window >= 3 independent windows,
        # so mean(u^2) > 9 has probability <= P(chi2_3 > 27) = 6e-6 per burst.
        assert np.mean(u ** 2) < 9.0, (start, np.mean(u ** 2))
        worst = max(worst, float(np.max(np.abs(u))))
        first_window_u2.append(u[:window] ** 2)
        all_u2.append(u ** 2)
    first = float(np.mean(np.concatenate(first_window_u2)))
    overall = float(np.mean(np.concatenate(all_u2)))
    print(f"M={power} W={window} {esn0_db} dB: mean (err/sigma)^2 first window {first:.3f}, "
          f"all {overall:.3f}, worst |err|/sigma {worst:.2f}")
    # no sample anywhere beyond 6 sigma: ~1e4 independent windows x P(|N| > 6) = 2e-9 -> 2e-5
    assert worst < 6.0
    # no transient: the first window of every burst has the predicted variance. At least one
    # independent value per burst -> standard error sqrt(2/300) = 0.08; 4 s.e. plus 5 % model error.
    assert abs(first - 1.0) < 4 * np.sqrt(2.0 / n_bursts) + 0.05, first
    n_independent = sum(lengths) / window
    assert abs(overall - 1.0) < 4 * np.sqrt(2.0 / n_independent) + 0.05, overall


@pytest.mark.slow
def test_frequency_offset_at_the_stated_limit_no_slips(tb):
    """QPSK at 10 dB with a residual offset of 1/(4 M window) cycles/sample (the documented
    limit): no unwrapping slip over 1e6 samples, error within 6 sigma throughout, and the
    frequency output averages to the offset."""
    power, window, esn0 = 4, 65, 10.0
    f = 1.0 / (4 * power * window)                       # cycles/sample
    n_items = 1_000_000
    rng = np.random.default_rng(8)
    pa = default_point_angle(power)
    theta = 0.7 + 2 * pi * f * np.arange(n_items)
    x = (psk(rng, n_items, power, pa) * np.exp(1j * theta) + noise(rng, n_items, esn0)).astype(np.complex64)
    blk = mth_power_feedforward_cc(FS, power, window, diagnostics=True)
    src = blocks.vector_source_c(x)
    ref_sink, freq_sink = blocks.vector_sink_c(), blocks.vector_sink_f()
    tb.connect(src, blk, blocks.null_sink(gr.sizeof_gr_complex))
    tb.connect((blk, 1), ref_sink)
    tb.connect((blk, 2), freq_sink)
    tb.run()
    d = window // 2
    ref = np.asarray(ref_sink.data())[d:]
    freq_hz = np.asarray(freq_sink.data())[d + window:]
    c = np.arange(n_items - d)
    err = np.angle(ref * np.exp(-1j * theta[c]))         # in (-pi, pi]; the ambiguity is a multiple of pi/2
    branch = np.round(err * power / (2 * pi))
    assert np.all(branch == branch[0]), "unwrapping slip"
    residual = wrap(err, 2 * pi / power)
    # Predicted sigma with the offset: the window sum's signal part shrinks by
    # G/W = sin(pi f M W) / (W sin(pi f M)) (odd window, no bias), so var = var_0 (W/G)^2.
    gain = np.sin(pi * f * power * window) / (window * np.sin(pi * f * power))
    sigma = np.sqrt(var_phase_weighting(power, window, esn0)) / gain
    print(f"offset {f:.3e} cycles/sample: max |err| {np.max(np.abs(residual)) / sigma:.2f} sigma, "
          f"rms {np.sqrt(np.mean(residual ** 2)) / sigma:.3f} sigma")
    assert np.max(np.abs(residual)) < 6 * sigma
    # mean frequency: the lag-W phase differences telescope, so the mean of N of them errs by
    # at most (W + W) x 6 sigma / (N W) rad/sample; in cycles/sample divide by 2 pi. The
    # estimate is unbiased for an odd window (the 1e-10 allows for float32 outputs).
    f_hat = np.mean(freq_hz.astype(np.float64)) / FS
    print(f"mean frequency estimate {f_hat:.6e} cycles/sample (true {f:.6e})")
    assert abs(f_hat - f) < 12 * sigma / len(freq_hz) / (2 * pi) + 1e-10


# --- robustness ----------------------------------------------------------------------------------

@pytest.mark.parametrize("weighting", ["power", "magnitude", "phase"])
def test_nan_inf_zero_and_huge_samples_do_not_poison_state(tb, weighting):
    """NaN, Inf, zeros (a stretch longer than the window too) and a 1e30 spike: outputs stay
    finite, gaps output 0 and are counted, and once the bad samples are out of the window the
    estimate equals that of a clean run (up to a constant multiple of 2 pi / M)."""
    power, window = 4, 33
    rng = np.random.default_rng(21)
    n_items = 6000
    clean = (psk(rng, n_items, power, pi / 4) * np.exp(0.3j) + noise(rng, n_items, db(15))).astype(np.complex64)
    bad = clean.copy()
    bad[500], bad[501], bad[502] = np.nan, np.inf, complex(-np.inf, 1.0)
    bad[1000:1100] = 0                              # longer than the window
    bad[2000] = 1e30 * np.exp(2.1j)
    bad[3000] = np.complex64(1e-40)                 # subnormal but valid
    ref_clean = stream_ref(gr.top_block(), clean, mth_power_feedforward_cc(FS, power, window, weighting=weighting,
                                                                         diagnostics=True))
    blk = mth_power_feedforward_cc(FS, power, window, weighting=weighting, diagnostics=True)
    out, ref, freq_hz, phase, _ = run_block(tb, bad, blk)
    for a in (out, ref, freq_hz, phase):
        assert np.all(np.isfinite(a))
    d = window // 2
    gap = ~(np.isfinite(bad) & (bad != 0))
    assert blk.gap_samples() == int(np.sum(gap)) == 103
    assert np.all(out[d:][gap[:n_items - d]] == 0)
    np.testing.assert_allclose(np.abs(ref), 1.0, atol=1e-6)
    # ref at output j comes from the window ending at input j: compare once the spike has left
    # every window, away from the windows holding the (different) sample 3000
    after = np.r_[2000 + window:3000, 3000 + window:n_items]
    ratio = ref[after] * np.conj(ref_clean[after])
    turns = np.angle(ratio[0]) * power / (2 * pi)
    assert abs(turns - round(turns)) < 1e-6
    np.testing.assert_allclose(ratio, ratio[0], rtol=0, atol=2e-6)


@pytest.mark.parametrize("power,weighting,scale", [(8, "power", 1e30), (16, "power", 1e30),
                                                   (4, "magnitude", 1e30), (8, "power", 1e-20)])
def test_huge_amplitude_stream(tb, power, weighting, scale):
    """A whole stream at amplitude 1e30 (or 1e-20) gives finite outputs; where the weight does
    not need capping (|z|^8 at 1e30 or 1e-20, |z|) the estimate is scale invariant, as the
    definition is (window sums of 1e240 and 1e-160 exercise the rescaling of extreme sums)."""
    rng = np.random.default_rng(5)
    n_items = 3000
    x = psk(rng, n_items, power, default_point_angle(power)) * np.exp(0.05j) + noise(rng, n_items, db(25))
    ref_unit = stream_ref(gr.top_block(), x.astype(np.complex64),
                          mth_power_feedforward_cc(FS, power, 16, weighting=weighting, diagnostics=True))
    blk = mth_power_feedforward_cc(FS, power, 16, weighting=weighting, diagnostics=True)
    out, ref, freq_hz, phase, _ = run_block(tb, (x * scale).astype(np.complex64), blk)
    for a in (out, ref, freq_hz, phase):
        assert np.all(np.isfinite(a))
    if power * np.log10(scale) < K.POWER_WEIGHT_EXPONENT_CAP or weighting != "power":
        np.testing.assert_allclose(ref, ref_unit, rtol=0, atol=1e-5)


def test_all_zero_input(tb):
    """Only zeros: every output 0, the reference stays at 1 (theta^ held at 0)."""
    blk = mth_power_feedforward_cc(FS, 2, 8, diagnostics=True)
    out, ref, freq_hz, phase, _ = run_block(tb, np.zeros(500, np.complex64), blk)
    assert np.all(out == 0) and np.all(ref == 1) and np.all(freq_hz == 0) and np.all(phase == 0)
    assert blk.gap_samples() == 500


def test_optional_diagnostic_outputs(tb):
    """With diagnostics on, outputs 1-3 are optional: only out0 + ref connected works and
    gives the same reference as all four connected."""
    x = _scheduling_input(n_items=1500)
    full = run_block(gr.top_block(), x, mth_power_feedforward_cc(FS, 4, 21, diagnostics=True))
    partial = run_block(tb, x, mth_power_feedforward_cc(FS, 4, 21, diagnostics=True), n_diag=1)
    np.testing.assert_array_equal(full[0], partial[0])
    np.testing.assert_array_equal(full[1], partial[1])


# --- parameters ---------------------------------------------------------------------------------

@pytest.mark.parametrize("kwargs,name", [
    (dict(sample_rate=0), "sample_rate"), (dict(sample_rate=float("nan")), "sample_rate"),
    (dict(sample_rate="1e6"), "sample_rate"),
    (dict(power=0), "power"), (dict(power=17), "power"), (dict(power=2.5), "power"),
    (dict(window=0), "window"), (dict(window=MAX_WINDOW + 1), "window"), (dict(window=8.5), "window"),
    (dict(window=float("inf")), "window"), (dict(window=True), "window"),
    (dict(point_angle=float("inf")), "point_angle"), (dict(point_angle="pi"), "point_angle"),
    (dict(weighting="square"), "weighting"), (dict(weighting=2), "weighting"),
    (dict(reset_tag_key=3), "reset_tag_key"),
])
def test_parameter_validation(kwargs, name):
    """Bad constructor input raises ValueError naming the parameter and its range."""
    args = dict(sample_rate=FS, power=4, window=64)
    args.update(kwargs)
    with pytest.raises(ValueError, match=name):
        mth_power_feedforward_cc(**args)


def test_defaults_match_the_loops():
    """point_angle defaults as the loops (pi/4 for QPSK, else 0); the weighting default is the
    one with the lower small-error variance (REFERENCES 6.1) at moderate SNR."""
    for power in (1, 2, 3, 4, 8):
        blk = mth_power_feedforward_cc(FS, power, 16)
        assert blk.point_angle() == default_point_angle(power)
        assert blk.weighting() == default_weighting(power)
        assert blk.delay() == 8 and blk.window() == 16 and blk.reset_tag_key() is None
    assert mth_power_feedforward_cc(FS, 4, 16, reset_tag_key="").reset_tag_key() is None
    assert mth_power_feedforward_cc(FS, 4, 16, reset_tag_key=BURST_KEY).reset_tag_key() == BURST_KEY
    assert mth_power_feedforward_cc(FS, 4, 16).point_angle() == pytest.approx(pi / 4, rel=1e-15)
    # The default weighting is the lower-variance one (small-error formulas, REFERENCES 6.1):
    # M = 1: the sum of z meets the MCRB (D'Andrea, Mengali & Reggiannini; from memory) exactly;
    assert default_weighting(1) == "power"
    assert var_power_weighting(1, 100, 10.0) == pytest.approx(mcrb(100, 10.0), rel=1e-12)
    assert var_phase_weighting(1, 100, 10.0) > mcrb(100, 10.0)
    # M = 2: |z|^2 is better at 3 dB (and equal to 0.1 % from 6 dB up);
    assert default_weighting(2) == "power"
    assert var_power_weighting(2, 1, db(3)) < var_phase_weighting(2, 1, db(3))
    # M = 4, 8: phase only is better at 10 dB and 15 dB.
    for power in (4, 8):
        assert default_weighting(power) == "phase"
        for snr in (db(10), db(15)):
            assert var_phase_weighting(power, 1, snr) < var_power_weighting(power, 1, snr)


def test_qpsk_points_on_the_diagonals(tb):
    """With the default point angle, corrected QPSK points sit at pi/4 + k pi/2."""
    rng = np.random.default_rng(9)
    x = (psk(rng, 4000, 4, pi / 4) * np.exp(1.0j) + noise(rng, 4000, 100.0)).astype(np.complex64)
    out = run_block(tb, x, mth_power_feedforward_cc(FS, 4, 64), n_diag=0)[0][32:]
    offset = wrap(np.angle(out) - pi / 4, pi / 2)
    assert np.sqrt(np.mean(offset ** 2)) < 0.1     # Es/N0 20 dB: per-sample rms ~ 0.07 rad


# --- GRC ---------------------------------------------------------------------------------------

GRC_FILE = "coherer_mth_power_feedforward_cc.block.yml"


def test_grc_yaml_schema_and_load(tmp_path):
    """The YAML passes GRC's schema check, loads into a GRC platform with no warning, renders a
    make line that builds the block, and its asserts mirror the constructor's validation."""
    import logging
    import pathlib

    import yaml
    from gnuradio.grc.core import schema_checker
    from gnuradio.grc.core.platform import Platform

    grc_dir = pathlib.Path(__file__).resolve().parents[1] / "grc"
    with open(grc_dir / GRC_FILE) as f:
        data = yaml.safe_load(f)
    validator = schema_checker.Validator(schema_checker.BLOCK_SCHEME)
    validator.run(data)
    assert not validator.messages
    assert data["id"] == "coherer_mth_power_feedforward_cc"
    assert data["category"] == "[Coherer]/Feed-forward"
    assert data["templates"]["imports"] == "from gnuradio import coherer"
    import inspect
    ctor = inspect.signature(mth_power_feedforward_cc.__init__).parameters
    assert [p["id"] for p in data["parameters"]] and all(p["id"] in ctor for p in data["parameters"])
    assert set(ctor) - {"self"} == {p["id"] for p in data["parameters"]}

    records = []
    handler = logging.Handler()
    handler.emit = records.append
    log = logging.getLogger("gnuradio.grc")
    log.addHandler(handler)
    try:
        platform = Platform(name="coherer-test", prefs=gr.prefs(), version=gr.version(),
                            version_parts=(gr.major_version(), gr.api_version(), gr.minor_version()))
        platform.build_library(path=[str(grc_dir), "/usr/share/gnuradio/grc/blocks"])
    finally:
        log.removeHandler(handler)
    assert "coherer_mth_power_feedforward_cc" in platform.blocks
    assert not [r for r in records if r.levelno >= logging.WARNING and GRC_FILE in r.getMessage()]

    def configured(**values):
        fg = platform.make_flow_graph()
        blk = fg.new_block("coherer_mth_power_feedforward_cc")
        blk.params["id"].set_value("ff0")
        blk.params["sample_rate"].set_value("1e6")
        for key, value in values.items():
            blk.params[key].set_value(value)
        fg.rewrite()
        fg.validate()
        return blk, [m for m in blk.get_error_messages() if "not connected" not in m]

    blk, errors = configured(reset_tag_key="burst_start", diagnostics="True", weighting='"phase"')
    assert errors == []
    assert [p.hidden for p in blk.sources] == [False, False, False, False]
    assert all(p.optional for p in blk.sources[1:])
    made = eval(blk.templates.render("make"), {"coherer": __import__("gnuradio.coherer").coherer})
    assert isinstance(made, mth_power_feedforward_cc) and made.weighting() == "phase"
    blk, errors = configured()
    assert errors == [] and [p.hidden for p in blk.sources] == [False, True, True, True]
    for key, value in [("window", "0"), ("window", "65537"), ("power", "17"), ("weighting", '"square"'),
                       ("sample_rate", "-1")]:
        _, errors = configured(**{key: value})
        assert any("Assertion" in m for m in errors), (key, value)


def test_grcc_compile_and_run(tmp_path):
    """A small flowgraph using the block compiles with grcc and runs: a constant QPSK point at
    pi/4 comes out unchanged after the window // 2 zeros (theta^ = 0 exactly)."""
    import os
    import pathlib
    import subprocess
    import sys

    repo = pathlib.Path(__file__).resolve().parents[1]
    out_file = tmp_path / "out.cf32"
    window = 16
    states = {"state": "enabled", "coordinate": [0, 0], "rotation": 0}
    grc = {
        "options": {"parameters": {"id": "ff_grcc_check", "generate_options": "no_gui",
                                   "run_options": "run", "output_language": "python"},
                    "states": states},
        "blocks": [
            {"name": "samp_rate", "id": "variable", "parameters": {"value": "1e6"}, "states": states},
            {"name": "src", "id": "blocks_vector_source_x", "states": states,
             "parameters": {"type": "complex", "vector": "[1+1j] * 1000", "repeat": "False",
                            "vlen": "1", "tags": "[]"}},
            {"name": "ff", "id": "coherer_mth_power_feedforward_cc", "states": states,
             "parameters": {"sample_rate": "samp_rate", "power": "4", "window": str(window),
                            "diagnostics": "True", "reset_tag_key": "burst_start"}},
            {"name": "snk", "id": "blocks_file_sink", "states": states,
             "parameters": {"type": "complex", "file": repr(str(out_file)), "vlen": "1",
                            "unbuffered": "False", "append": "False"}},
            {"name": "nul", "id": "blocks_null_sink", "states": states,
             "parameters": {"type": "complex", "vlen": "1", "num_inputs": "1"}},
        ],
        "connections": [["src", "0", "ff", "0"], ["ff", "0", "snk", "0"], ["ff", "1", "nul", "0"]],
        "metadata": {"file_format": 1},
    }
    import yaml
    grc_path = tmp_path / "ff_grcc_check.grc"
    grc_path.write_text(yaml.safe_dump(grc))
    env = dict(os.environ)
    if not os.environ.get("COHERER_TEST_INSTALLED"):       # source tree, as tests/conftest.py
        shim = tmp_path / "shim" / "gnuradio"
        shim.mkdir(parents=True)
        (shim / "coherer").symlink_to(repo / "python" / "coherer")
        env.update(GRC_BLOCKS_PATH=str(repo / "grc"), PYTHONPATH=str(tmp_path / "shim"))
    gen = subprocess.run(["grcc", "-o", str(tmp_path), str(grc_path)], env=env, capture_output=True,
                         text=True, timeout=120)
    assert gen.returncode == 0, gen.stdout + gen.stderr
    run = subprocess.run([sys.executable, str(tmp_path / "ff_grcc_check.py")], env=env,
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stdout[-2000:] + run.stderr[-2000:]
    y = np.fromfile(out_file, np.complex64)
    assert len(y) == 1000
    assert np.all(y[:window // 2] == 0)
    np.testing.assert_allclose(y[window // 2:], 1 + 1j, atol=1e-6)
