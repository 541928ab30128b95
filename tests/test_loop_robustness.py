# SPDX-License-Identifier: GPL-3.0-or-later
"""Robustness of the M-th power loop: chunking invariance, gaps and bad samples,
parameter validation, runtime control from other threads."""

import threading
import time

import numpy as np
import pmt
import pytest
from hypothesis import given, settings, strategies as st

from gnuradio import blocks, coherer, gr
from loop_harness import count_true_slips, mpsk, run_loop, wrapped_error


def chunk_stimulus():
    """Acquisition, lock, slips and frequency tags all happen inside 80000 samples:
    a QPSK carrier at a large offset at 4 dB, where a B_L T = 0.02 loop (loop SNR ~2.3)
    slips every few thousand samples."""
    rng = np.random.default_rng(21)
    n = 80000
    theta = 0.4 + 2 * np.pi * 0.071 * np.arange(n)
    x, _ = mpsk(rng, 4, n, 4, theta)
    return x


CHUNK_KW = dict(power=4, noise_bw_hz=0.02, tag_interval=777, point_angle=0.0)


@pytest.mark.parametrize("noise_bw_hz", [0.02, 0.002])
def test_same_output_and_tags_for_any_buffer_size(noise_bw_hz):
    """Per-sample updates (B_L T = 0.02) and update blocks of 8 samples (0.002): buffers of
    1 and 7 samples end calls inside blocks."""
    x = chunk_stimulus()
    kw = dict(CHUNK_KW, noise_bw_hz=noise_bw_hz)
    reference = run_loop(x, **kw)
    assert reference.block.loop_design().block == (1 if noise_bw_hz == 0.02 else 8)
    if noise_bw_hz == 0.02:
        assert reference.tags_with("cycle_slip"), "the stimulus must produce slip tags"
    assert reference.block.acquisition_log(), "the stimulus must exercise acquisition"
    assert reference.block.lock_log(), "the stimulus must exercise the lock indicator"
    for max_items in (1, 7, 100, 1023, 4095):
        other = run_loop(x, max_items=max_items, **kw)
        for a, b in ((reference.out, other.out), (reference.ref, other.ref),
                     (reference.freq, other.freq), (reference.err, other.err)):
            np.testing.assert_array_equal(a, b)
        assert other.tags == reference.tags


@settings(max_examples=6, deadline=None)
@given(st.integers(min_value=2, max_value=5000))
def test_chunking_property(max_items):
    x = chunk_stimulus()[:12000]
    a = run_loop(x, **CHUNK_KW)
    b = run_loop(x, max_items=max_items, **CHUNK_KW)
    np.testing.assert_array_equal(a.out, b.out)
    assert a.tags == b.tags


def test_nan_inf_and_zero_gaps_do_not_poison_the_loop():
    rng = np.random.default_rng(3)
    n = 200_000
    theta = 0.5 + 2 * np.pi * 0.002 * np.arange(n)
    x, _ = mpsk(rng, 2, n, 15, theta)
    x[50_000:50_500] = np.nan
    x[60_000:60_010] = np.inf
    x[60_010:60_020] = complex(np.inf, -np.inf)
    x[70_000:75_000] = 0.0
    x[80_000] = 1e30                       # a single huge spike
    run = run_loop(x, power=2, noise_bw_hz=0.002)
    assert np.all(np.isfinite(run.out)) and np.all(np.isfinite(run.ref))
    assert np.all(np.isfinite(run.freq)) and np.all(np.isfinite(run.err))
    assert np.all(run.out[50_000:50_500] == 0)          # gaps come out as zeros, not dropped
    assert len(run.out) == n
    assert run.block.gap_samples() == 500 + 20 + 5000
    # lock resumes: after the disturbances the error is back to the loop's normal jitter
    phi = wrapped_error(theta, run.ref, 2)
    sigma = np.sqrt(coherer.design.phase_error_variance(2, 10 ** 1.5, 0.002))
    assert np.std(phi[120_000:]) < 1.5 * sigma
    assert run.block.locked()


def test_huge_and_tiny_amplitudes_in_one_stream():
    rng = np.random.default_rng(4)
    n = 150_000
    theta = 0.1 + 2 * np.pi * 0.001 * np.arange(n)
    x, _ = mpsk(rng, 4, n, 15, theta, point_angle=np.pi / 4)
    x[:50_000] *= 3e4
    x[50_000:100_000] *= 1e-4
    run = run_loop(x, power=4, noise_bw_hz=0.005)
    assert np.all(np.isfinite(run.out))
    phi = wrapped_error(theta, run.ref, 4)
    sigma = np.sqrt(coherer.design.phase_error_variance(4, 10 ** 1.5, 0.005))
    assert np.std(phi[130_000:]) < 1.5 * sigma


@pytest.mark.parametrize("kwargs, name", [
    (dict(sample_rate=0), "sample_rate"),
    (dict(sample_rate=-1), "sample_rate"),
    (dict(power=0), "power"),
    (dict(power=17), "power"),
    (dict(power=2.5), "power"),
    (dict(noise_bw_hz=0), "noise_bw_hz"),
    (dict(noise_bw_hz=-3), "noise_bw_hz"),
    (dict(noise_bw_hz=5000), "noise_bw_hz"),          # > 0.1 * sample_rate
    (dict(damping=0), "damping"),
    (dict(damping=-0.5), "damping"),
    (dict(loop_order=0), "loop_order"),
    (dict(loop_order=4), "loop_order"),
    (dict(freq_range_hz=0), "freq_range_hz"),
    (dict(freq_range_hz=20000), "freq_range_hz"),     # > fs / (2M) = 12000
    (dict(freq_guess_hz=13000), "freq_guess_hz"),
    (dict(tag_interval=-1), "tag_interval"),
    (dict(point_angle=float("nan")), "point_angle"),
])
def test_bad_parameters_raise_value_error_naming_them(kwargs, name):
    args = dict(sample_rate=48000.0, power=2, noise_bw_hz=50.0)
    args.update(kwargs)
    with pytest.raises(ValueError, match=name):
        coherer.mth_power_loop_cc(**args)


def test_bad_setter_values_raise_and_leave_the_loop_unchanged():
    blk = coherer.squaring_loop_cc(48000.0, 50.0)
    with pytest.raises(ValueError, match="noise_bw_hz"):
        blk.set_noise_bw_hz(-1)
    with pytest.raises(ValueError, match="damping"):
        blk.set_damping(0)
    with pytest.raises(ValueError, match="freq_guess_hz"):
        blk.set_freq_guess_hz(1e6)
    assert blk.noise_bw_hz() == 50.0 and blk.damping() == 0.707


def test_squaring_loop_is_the_m2_loop():
    rng = np.random.default_rng(8)
    x, _ = mpsk(rng, 2, 20000, 10, 0.3 + 0.01 * np.arange(20000))
    generic = run_loop(x, power=2, noise_bw_hz=0.01)
    blk = coherer.squaring_loop_cc(1.0, 0.01, diagnostics=True)
    tb = gr.top_block()
    src = blocks.vector_source_c(x)
    snk = blocks.vector_sink_c()
    tb.connect(src, blk, snk)
    for port, sink in ((1, blocks.vector_sink_c()), (2, blocks.vector_sink_f()), (3, blocks.vector_sink_f())):
        tb.connect((blk, port), sink)
        setattr(tb, f"s{port}", sink)
    tb.run()
    np.testing.assert_array_equal(np.asarray(snk.data()), generic.out)


def test_runtime_commands_from_other_threads_are_safe():
    """Setters and command messages while running: no non-finite output, no phase jump
    beyond the loop's own jitter (checked against the widest bandwidth used)."""
    fs = 48000.0
    n = 1_500_000
    rng = np.random.default_rng(12)
    theta = 0.3 + 2 * np.pi * 200.0 / fs * np.arange(n)
    x, _ = mpsk(rng, 2, n, 12, theta)
    blk = coherer.squaring_loop_cc(fs, 40.0, diagnostics=True)
    tb = gr.top_block()
    src = blocks.vector_source_c(x)
    thr = blocks.throttle(gr.sizeof_gr_complex, 3e6)   # spread the run over ~0.5 s
    sinks = [blocks.vector_sink_c(), blocks.vector_sink_c(), blocks.vector_sink_f(), blocks.vector_sink_f()]
    tb.connect(src, thr, blk)
    for port, sink in enumerate(sinks):
        tb.connect((blk, port), sink)
    stop = threading.Event()

    def hammer():
        k = 0
        while not stop.is_set():
            bw = (20.0, 40.0, 80.0)[k % 3]
            if k % 2:
                blk.set_noise_bw_hz(bw)
                blk.set_damping((0.5, 0.707, 1.0)[k % 3])
            else:
                msg = pmt.to_pmt({"noise_bw_hz": bw, "damping": 0.8})
                blk.to_basic_block()._post(pmt.intern("command"), msg)
            k += 1
            time.sleep(0.002)

    worker = threading.Thread(target=hammer)
    tb.start()
    worker.start()
    tb.wait()
    stop.set()
    worker.join()
    out = np.asarray(sinks[0].data())
    ref = np.asarray(sinks[1].data())
    assert np.all(np.isfinite(out)) and np.all(np.isfinite(ref))
    phi = wrapped_error(theta, ref, 2)[50_000:]
    widest = np.sqrt(coherer.design.phase_error_variance(2, 10 ** 1.2, 80.0 / fs))
    assert np.max(np.abs(phi)) < 6 * widest            # Gaussian jitter: 6 sigma over ~1e4 indep. samples
    assert len(count_true_slips(theta, ref, 2, start=50_000)) == 0


def test_set_freq_guess_re_steers_and_command_freq_does_too():
    fs = 48000.0
    blk = coherer.mth_power_loop_cc(fs, 4, 30.0, acquire=False)
    blk.set_freq_guess_hz(1500.0)
    x = np.zeros(10, np.complex64)        # gaps only: the NCO coasts at the steered frequency
    tb = gr.top_block()
    src, snk = blocks.vector_source_c(x), blocks.vector_sink_c()
    tb.connect(src, blk, snk)
    tb.run()
    assert blk.frequency_hz() == pytest.approx(1500.0)
    blk._handle_command(pmt.to_pmt({"freq_hz": -700.0}))
    # the stream is 10 samples into an update block (32 samples here): the NCO runs the block
    # out at its frequency and takes the new one from the block's end on
    block = blk.loop_design().block
    assert block == 32
    tb2 = gr.top_block()
    src2, snk2 = blocks.vector_source_c(np.zeros(block - 10 - 1, np.complex64)), blocks.vector_sink_c()
    tb2.connect(src2, blk, snk2)
    tb2.run()
    assert blk.frequency_hz() == pytest.approx(1500.0)    # one sample of the block still to go
    tb3 = gr.top_block()
    src3, snk3 = blocks.vector_source_c(np.zeros(2, np.complex64)), blocks.vector_sink_c()
    tb3.connect(src3, blk, snk3)
    tb3.run()
    assert blk.frequency_hz() == pytest.approx(-700.0)
