# SPDX-License-Identifier: GPL-3.0-or-later
"""Timing primitives of the benchmark: kernel only, in a flowgraph, framework floor,
parallel chains and first-sample latency. All rates are in Msps (1e6 samples/s).

Each rate is measured twice: per second of wall-clock time (what a live stream
sees) and per second of CPU time of this process (what the work costs; it is
not inflated when other programs compete for the cores). Timing functions
return ``{"wall": [...], "cpu": [...]}``, one rate per repetition.
"""

import time
from statistics import median

import numpy as np
from gnuradio import blocks, gr

from .._long_calls import request_long_calls

#: A figure whose repetitions spread by more than this fraction of the median is marked noisy.
NOISY_SPREAD = 0.10


def summarise(rates):
    """Median, extremes and relative spread of repeated rate measurements (Msps)."""
    rates = [float(r) for r in rates]
    mid = median(rates)
    spread = (max(rates) - min(rates)) / mid if mid > 0 else float("inf")
    return {"median": mid, "min": min(rates), "max": max(rates), "spread": spread,
            "noisy": bool(spread > NOISY_SPREAD), "repetitions": len(rates)}


class copy_cc(gr.sync_block):
    """Trivial Python pass-through (numpy copy): the cost of a Python block with no DSP.

    ``call_items > 1`` arranges for calls of up to that many samples the way the
    loop block does (history and minimum output buffer)."""

    def __init__(self, call_items=1):
        gr.sync_block.__init__(self, name="bench_copy_cc", in_sig=[np.complex64],
                               out_sig=[np.complex64])
        self._skip = request_long_calls(self, int(call_items)) if call_items > 1 else 0

    def work(self, input_items, output_items):
        output_items[0][:] = input_items[0][self._skip:]
        return len(output_items[0])


class first_item_probe(gr.sync_block):
    """Sink that records the ``time.perf_counter()`` of the first item it receives."""

    def __init__(self):
        gr.sync_block.__init__(self, name="bench_first_item_probe", in_sig=[np.complex64],
                               out_sig=None)
        self.first_time = None

    def work(self, input_items, output_items):
        if self.first_time is None and len(input_items[0]):
            self.first_time = time.perf_counter()
        return len(input_items[0])


def kernel_runner(block):
    """``run(x, out)``: the loop block's numba kernel over ``x`` from the block's initial
    state, with no scheduler and no tags (the kernel-only figure)."""
    state0 = block._state.copy()
    params = block._params

    def run(x, out):
        block._run_kernel(x, out, state0.copy(), params, diag=None)
    return run


def kernel_rates(make_block, x, reps):
    """Kernel-only throughput (Msps) of ``reps`` runs over ``x``, one kernel call each."""
    run = kernel_runner(make_block())
    out = np.empty_like(x)
    rates = {"wall": [], "cpu": []}
    for _ in range(reps):
        t0, c0 = time.perf_counter(), time.thread_time()
        run(x, out)
        rates["wall"].append(len(x) / (time.perf_counter() - t0) / 1e6)
        rates["cpu"].append(len(x) / (time.thread_time() - c0) / 1e6)
    return rates


def chains_seconds(make_block, data_path, chains=1):
    """(wall, CPU) time in s of one flowgraph holding ``chains`` independent chains
    file source -> block -> null sink, each over the whole cf32 file."""
    tb = gr.top_block()
    keep = []                           # Python blocks must outlive the flowgraph
    for _ in range(chains):
        src = blocks.file_source(gr.sizeof_gr_complex, str(data_path), False)
        blk = make_block()
        snk = blocks.null_sink(gr.sizeof_gr_complex)
        tb.connect(src, blk, snk)
        keep += [src, blk, snk]
    t0, c0 = time.perf_counter(), time.process_time()
    tb.run()
    seconds = (time.perf_counter() - t0, time.process_time() - c0)
    del keep
    return seconds


def flowgraph_rates(make_block, data_path, n_items, reps, chains=1):
    """Aggregate in-flowgraph throughput (Msps, all chains together) of ``reps`` runs."""
    rates = {"wall": [], "cpu": []}
    for _ in range(reps):
        wall, cpu = chains_seconds(make_block, data_path, chains)
        rates["wall"].append(chains * n_items / wall / 1e6)
        rates["cpu"].append(chains * n_items / cpu / 1e6)
    return rates


def summarise_both(rates):
    """:func:`summarise` of the wall-clock and the CPU-time rates."""
    return {clock: summarise(values) for clock, values in rates.items()}


def first_sample_latency(make_block, data_path, timeout_s=30.0):
    """Construct a fresh block, then time tb.start() -> first output item at a sink.

    Returns ``(construction_s, latency_s)``; latency is None if nothing arrived
    within ``timeout_s``.
    """
    t0 = time.perf_counter()
    blk = make_block()
    construction = time.perf_counter() - t0
    tb = gr.top_block()
    src = blocks.file_source(gr.sizeof_gr_complex, str(data_path), False)
    probe = first_item_probe()
    tb.connect(src, blk, probe)
    start = time.perf_counter()
    tb.start()
    deadline = start + timeout_s
    while probe.first_time is None and time.perf_counter() < deadline:
        time.sleep(0.0005)
    tb.stop()
    tb.wait()
    latency = None if probe.first_time is None else probe.first_time - start
    return construction, latency

