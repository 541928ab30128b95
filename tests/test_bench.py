# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer bench``: the quick run emits the documented JSON; the C reference loop
computes the same recursion as the loop block; the memory soak measures RSS growth
and notices a leak. No test here asserts a speed."""

import json
import re
import math

import numpy as np
import pytest
from gnuradio import blocks, gr

from gnuradio.coherer import design, mth_power_loop_cc
from gnuradio.coherer import _loop_kernel as K
from gnuradio.coherer.bench import creference, measure, soak, stream

import clirunner

SAMPLE_RATE = 1e6
NOISE_BW_HZ = 1000.0


def test_quick_json_has_every_figure():
    proc = clirunner.coherer("bench", "--quick", "--json", timeout=300)
    assert proc.returncode == 0, proc.stderr
    result = json.loads(proc.stdout)           # the whole of stdout is one JSON document
    for key in ("machine", "samples", "repetitions", "c_reference", "blocks", "skipped",
                "framework_floor", "two_chains", "latency", "targets", "elapsed_s"):
        assert key in result, key
    assert result["machine"]["cores"] >= 1 and result["machine"]["cpu_model"]
    names = [r["block"] for r in result["blocks"]] + [s["block"] for s in result["skipped"]]
    for name in ("squaring loop (M=2)", "phase-locked loop M=1", "M-th power loop M=4",
                 "M-th power loop M=8", "third-order loop (M=2)"):
        assert name in [r["block"] for r in result["blocks"]], name
    assert any(n.startswith("lock detector") for n in names)
    assert any(n.startswith("feed-forward") for n in names)
    for row in result["blocks"]:
        for clock in ("wall", "cpu"):              # rates per wall-clock and per CPU second
            fig = row["flowgraph"][clock]
            assert fig["median"] > 0 and fig["repetitions"] == result["repetitions"]
            assert isinstance(fig["noisy"], bool)
            assert row["flowgraph_vs_c"][clock] > 0
    loops = [r for r in result["blocks"] if "loop" in r["block"]]
    for row in loops:
        # the loops (and the C loop, which runs the same recursion) update once per block
        assert row["update_block"] == design.update_block(NOISE_BW_HZ / SAMPLE_RATE) > 1
        for clock in ("wall", "cpu"):
            assert row["kernel"][clock]["median"] > 0 and row["c"][clock]["median"] > 0
            assert math.isclose(row["flowgraph_vs_c"][clock],
                                row["flowgraph"][clock]["median"] / row["c"][clock]["median"])
    assert result["framework_floor"]["wall"]["median"] > 0
    # the plain per-sample recursion, for comparison: the same C loop updated every sample
    assert all(result["c_per_sample"][clock]["median"] > 0 for clock in ("wall", "cpu"))
    assert result["two_chains"]["ratio"] > 0
    for key in ("latency", "detector_latency"):
        assert result[key]["construction_s"] > 0 and result[key]["first_output_s"] > 0
    assert {c["check"] for c in result["targets"]} >= {
        "squaring loop in flowgraph / C loop", "M=1 / M=2 in flowgraph", "M=4 / M=2 in flowgraph",
        "M=8 / M=2 in flowgraph", "third order / M=2 in flowgraph", "lock detector in flowgraph / C loop", "feed-forward in flowgraph / C loop",
        "two chains / one chain"}
    # a quick run is too short to judge a target: no verdicts, only the figures
    assert all(v is None for c in result["targets"] for v in c["met"].values())
    assert all(v is not None for c in result["targets"] for v in c["value"].values())


def test_table_is_printed_without_json():
    proc = clirunner.coherer("bench", "--quick", timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert "squaring loop (M=2)" in proc.stdout and "targets (not judged" in proc.stdout
    assert not re.search(r"\bmet\b", proc.stdout, re.IGNORECASE), proc.stdout
    assert not re.search(r"\bissues?\b|acceptance", proc.stdout + proc.stderr, re.IGNORECASE)


def test_full_run_judges_targets():
    from gnuradio.coherer.bench import suite
    result = {"blocks": [{"block": "squaring loop (M=2)", "flowgraph": {},
                          "flowgraph_vs_c": {"wall": 3.1, "cpu": 2.9}}],
              "two_chains": {"ratio": 1.8}}
    checks = {c["check"]: c["met"] for c in suite.targets(result, judged=True)}
    assert checks["squaring loop in flowgraph / C loop"] == {"wall": True, "cpu": False}
    assert checks["two chains / one chain"] == {"wall": True}
    quick = suite.targets(result, judged=False)
    assert all(v is None for c in quick for v in c["met"].values())


def test_bad_soak_length_is_one_error_line():
    proc = clirunner.coherer("bench", "--quick", "--soak-samples", "10")
    assert proc.returncode == 2
    assert "--soak-samples" in clirunner.one_error_line(proc)


@pytest.fixture(scope="module")
def reference_exe(tmp_path_factory):
    try:
        exe, _ = creference.compile_reference(tmp_path_factory.mktemp("cref"))
    except creference.CompilerMissing as exc:
        pytest.skip(str(exc))
    return exe


def _run_block(blk, x):
    tb = gr.top_block()
    src = blocks.vector_source_c(x, False)
    snk = blocks.vector_sink_c()
    tb.connect(src, blk, snk)
    tb.run()
    return np.asarray(snk.data(), dtype=np.complex64)


@pytest.mark.parametrize("power,order", [(2, 2), (4, 2), (8, 2), (2, 3), (1, 2)])
def test_c_reference_computes_the_same_loop(reference_exe, tmp_path, power, order):
    """Same data, same gains: the C loop and the block agree sample by sample.

    Both run the recursion in float64 in the same order of operations; they may
    differ only by rounding (libm vs LLVM intrinsics, FMA contraction under
    -march=native, the block's NCO arithmetic), about 1e-16 per operation. The
    loop is stable, so such differences do not grow: the NCO phases stay within
    about 1e-10 rad. Outputs are complex64 (relative quantisation 2^-24 = 6e-8,
    |y| <= about 2 here), so 1e-6 absolute is a few float32 ulps, while any
    difference in the recursion itself would show as O(1) errors."""
    x = stream.psk_stream(power, 1 << 17, seed=10 + power)
    x[20000:20050] = 0                     # a gap: both coast
    x[30000] = np.nan
    x[60000:] *= 3.0                       # a 9.5 dB level step: both rescale the moments
    path = tmp_path / "in.cf32"
    stream.write_cf32(path, x)
    blk = mth_power_loop_cc(SAMPLE_RATE, power, NOISE_BW_HZ, loop_order=order, acquire=False)
    # The C yardstick runs the recursion with the moment (M2M4) normalisation only; the block
    # switches to the M-th power line once its lock indicator has declared lock, which the
    # yardstick does not model. With the line's averaging weight at 0 the line is never
    # measured, so the block keeps the normalisation the yardstick computes.
    blk._params[K.P_LINE_ALPHA] = 0.0
    freq0 = 2 * math.pi * blk.frequency_hz() / SAMPLE_RATE
    ref = creference.run_reference(reference_exe, path, blk._params, power, freq0=freq0,
                                   reps=1, out_path=tmp_path / "out.cf32")
    c_out = np.fromfile(tmp_path / "out.cf32", dtype=np.complex64)
    gr_out = _run_block(blk, x)
    assert len(c_out) == len(gr_out) == len(x)
    np.testing.assert_allclose(c_out, gr_out, rtol=0, atol=1e-6)
    # final frequency register (rad/sample): the same within rounding
    assert abs(ref.final_freq - 2 * math.pi * blk.frequency_hz() / SAMPLE_RATE) < 1e-12
    # the loop locked on this stream (otherwise the comparison proves little)
    offset = 2 * math.pi * stream.BENCH_OFFSET
    assert abs(ref.final_freq - offset) < 0.05 * offset


def test_summarise_marks_spread_as_noisy():
    steady = measure.summarise([10.0, 10.4, 9.8, 10.1, 10.0])
    assert steady["median"] == 10.0 and not steady["noisy"]
    assert steady["spread"] == pytest.approx(0.6 / 10.0)
    assert measure.summarise([10.0, 12.0, 9.0])["noisy"]


def test_soak_short_run_is_flat(tmp_path):
    path = tmp_path / "psk.cf32"
    stream.write_cf32(path, stream.psk_stream(2, 1 << 16))
    res = soak.soak(lambda: mth_power_loop_cc(SAMPLE_RATE, 2, NOISE_BW_HZ, acquire=False),
                    path, 2_000_000)
    assert res["samples"] == 2_000_000
    assert 0 < res["rss_warm_mb"] <= res["rss_peak_mb"]
    assert res["growth_mb"] == pytest.approx(res["rss_peak_mb"] - res["rss_warm_mb"])
    assert res["passed"] and res["growth_mb"] < soak.GROWTH_LIMIT_MB


class _leaky_copy(gr.sync_block):
    """Pass-through that keeps 64 KiB per work() call: a deliberate leak."""

    def __init__(self):
        gr.sync_block.__init__(self, name="leaky_copy", in_sig=[np.complex64], out_sig=[np.complex64])
        self.kept = []

    def work(self, input_items, output_items):
        output_items[0][:] = input_items[0]
        self.kept.append(np.ones(8192))
        return len(output_items[0])


def test_soak_notices_a_leak(tmp_path):
    path = tmp_path / "psk.cf32"
    stream.write_cf32(path, stream.psk_stream(2, 1 << 16))
    blocks_made = []

    def make():
        blocks_made.append(_leaky_copy())
        return blocks_made[-1]
    res = soak.soak(make, path, 4_000_000)
    calls = len(blocks_made[0].kept)
    # what the block kept after the warm-up point, at least 90 % of calls: far above 5 MB
    assert calls * 65536 * 0.9 / 2**20 > 3 * soak.GROWTH_LIMIT_MB
    assert not res["passed"] and res["growth_mb"] > soak.GROWTH_LIMIT_MB


def test_first_sample_latency_is_measured(tmp_path):
    path = tmp_path / "psk.cf32"
    stream.write_cf32(path, stream.psk_stream(2, 1 << 16))
    construction, latency = measure.first_sample_latency(
        lambda: mth_power_loop_cc(SAMPLE_RATE, 2, NOISE_BW_HZ, acquire=False), path)
    assert construction > 0 and latency is not None and latency > 0


def test_carriers_quick_json_is_consistent():
    proc = clirunner.coherer("bench", "--carriers", "--quick", "--json", timeout=600)
    assert proc.returncode == 0, proc.stderr
    r = json.loads(proc.stdout)                # the whole of stdout is one JSON document
    # the channels the acceptance asks for: 25 ksym/s at 4 samples per symbol
    assert r["symbol_rate"] == 25e3 and r["channel_rate"] == 4 * r["symbol_rate"]
    # derived figures follow from the measured times (no speed is asserted)
    assert r["carriers_per_core"] == pytest.approx(r["carriers"] * r["capture_s"] / r["one_process"]["cpu_s"])
    n = r["capture_s"] * r["capture_rate"]
    for k in ("workers_1", "workers_2"):
        assert r[k]["rate"] == pytest.approx(n / r[k]["wall_s"])
    assert r["two_vs_one_workers"] == pytest.approx(r["workers_2"]["rate"] / r["workers_1"]["rate"])
