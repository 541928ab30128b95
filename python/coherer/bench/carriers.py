# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer bench --carriers``: what several carriers cost, and what workers buy.

A synthetic 1 Msps capture holds ``CARRIERS`` BPSK carriers of 25 ksym/s
(root-raised-cosine, roll-off 0.35), each received in a channel at 4 samples
per symbol (100 ksps) with its loop and lock detector, the symbol rate given.

* Carriers per core: carriers x capture seconds / CPU seconds of the whole
  single-process run (every thread counted), i.e. how many such carriers one
  core keeps up with in real time at 1 Msps.
* Workers: capture samples per wall second with the carriers spread over 1 and
  over 2 local worker processes (ZeroMQ on loopback); each worker serves one
  warm-up job first, so process start and kernel warm-up are not timed.
"""

import os
import tempfile
import time

import numpy as np

from .. import channels, receiver
from ..recording import open_recording, write_sigmf

CAPTURE_RATE = 1e6
SYMBOL_RATE = 25e3
CARRIERS = 4
NOISE_BW_HZ = 200.0
#: Capture length, s: full bench and --quick (long enough that starting a job, about
#: 0.5 s, stays a small part of a run).
SECONDS = {"full": 24.0, "quick": 2.0}
#: Repetitions (median taken).
REPS = {"full": 3, "quick": 1}
TARGET_TWO_WORKERS = 1.7


def capture(seconds, carriers=CARRIERS, seed=0):
    """The capture (complex64): noise plus ``carriers`` shaped BPSK carriers spread over
    +-400 kHz, Es/N0 about 12 dB each."""
    from gnuradio import filter as gr_filter
    from scipy.signal import oaconvolve
    rng = np.random.default_rng(seed)
    n = int(seconds * CAPTURE_RATE)
    sps = int(CAPTURE_RATE / SYMBOL_RATE)
    taps = np.array(gr_filter.firdes.root_raised_cosine(1.0, sps, 1.0, 0.35, 11 * sps + 1))
    taps /= np.sqrt(np.sum(taps ** 2))
    x = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * np.sqrt(0.5)
    t = np.arange(n) / CAPTURE_RATE
    for f in offsets(carriers):
        up = np.zeros(n)
        up[::sps] = np.sqrt(sps) * (2.0 * rng.integers(0, 2, len(up[::sps])) - 1.0)
        s = oaconvolve(up, taps, mode="same")
        x += np.sqrt(10 ** 1.2 / sps) * s * np.exp(2j * np.pi * (f + 300.0) * t)
    return (0.1 * x).astype(np.complex64)


def offsets(carriers):
    return list(np.linspace(-400e3, 400e3, carriers))


def _plans(rec, carriers):
    settings = receiver.ReceiverSettings(power=2, noise_bw_hz=NOISE_BW_HZ, symbol_rate_hz=SYMBOL_RATE)
    return settings, channels.plan_channels(rec, [(f, None) for f in offsets(carriers)], settings)


def _median(xs):
    return float(np.median(xs))


def run(quick=False, progress=None):
    """The measurements as a dict (rates in capture samples/s)."""
    from ..spread import run_spread, start_local_workers, stop_local_workers
    mode = "quick" if quick else "full"
    seconds, reps = SECONDS[mode], REPS[mode]
    say = progress or (lambda msg: None)
    with tempfile.TemporaryDirectory(prefix="coherer-bench-") as tmp:
        base = os.path.join(tmp, "carriers")
        write_sigmf(base, capture(seconds), CAPTURE_RATE)
        rec = open_recording(base + ".sigmf-meta")
        settings, plans = _plans(rec, CARRIERS)
        say(f"{CARRIERS} carriers in one process")
        cpu, wall = [], []
        for _ in range(reps):
            t0, c0 = time.perf_counter(), time.process_time()
            channels.run_channels(rec, settings, plans)
            wall.append(time.perf_counter() - t0)
            cpu.append(time.process_time() - c0)
        result = {"capture_rate": CAPTURE_RATE, "symbol_rate": SYMBOL_RATE,
                  "channel_rate": plans[0].channel_rate, "carriers": CARRIERS, "capture_s": seconds,
                  "one_process": {"wall_s": _median(wall), "cpu_s": _median(cpu)}}
        result["carriers_per_core"] = CARRIERS * seconds / _median(cpu)
        local = start_local_workers(2)
        try:
            eps = [ep for ep, _ in local]
            procs = dict(local)
            for ep in eps:                    # warm-up job each
                run_spread(rec, settings, plans[:1], [ep], processes=procs)
            for n in (1, 2):
                say(f"{CARRIERS} carriers over {n} worker(s)")
                walls = []
                for _ in range(reps):
                    t0 = time.perf_counter()
                    run_spread(rec, settings, plans, eps[:n], processes=procs)
                    walls.append(time.perf_counter() - t0)
                result[f"workers_{n}"] = {"wall_s": _median(walls),
                                          "rate": rec.num_samples / _median(walls)}
        finally:
            stop_local_workers(local)
    result["two_vs_one_workers"] = result["workers_2"]["rate"] / result["workers_1"]["rate"]
    result["target_two_vs_one"] = TARGET_TWO_WORKERS
    return result


def format_table(r):
    lines = [f"Several carriers: {r['carriers']} BPSK carriers of {r['symbol_rate'] / 1e3:g} ksym/s in a "
             f"{r['capture_rate'] / 1e6:g} Msps capture, channels at {r['channel_rate'] / 1e3:g} ksps "
             f"(4 samples per symbol), {r['capture_s']:g} s",
             f"  one process: {r['one_process']['wall_s']:.2f} s wall, {r['one_process']['cpu_s']:.2f} s CPU"
             f" -> {r['carriers_per_core']:.1f} carriers per core in real time",
             f"  1 worker:  {r['workers_1']['rate'] / 1e6:.2f} Msps of capture ({r['workers_1']['wall_s']:.2f} s)",
             f"  2 workers: {r['workers_2']['rate'] / 1e6:.2f} Msps of capture ({r['workers_2']['wall_s']:.2f} s)",
             f"  2 workers vs 1: {r['two_vs_one_workers']:.2f}x (target >= {r['target_two_vs_one']:g}x)"]
    return "\n".join(lines)


__all__ = ["run", "format_table", "capture", "CARRIERS", "SYMBOL_RATE"]
