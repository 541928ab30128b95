#!/usr/bin/env python3
# SPDX-License-Identifier: GPL-3.0-or-later
"""Scripted headless receive chain: build the carrier-recovery flowgraph in Python.

What it shows (invented scenario): a ground receiver listens to an 8PSK data link
at 50 ksym/s. For the first 0.2 s there is only noise; then the signal appears
1.2 kHz below the nominal carrier at Es/N0 20 dB. The script synthesises that
signal with numpy, runs it through

    vector source -> coherer.mth_power_loop_cc (M = 8) -> coherer.lock_detector_cc -> vector sink
                                                           `-- status messages --> message_debug

and then reads what a scripting user usually wants: the lock events (``carrier_lock``
tags on the detector output) and the periodic status messages (lock state, metric,
Es/N0 estimate, frequency), printed as one line each, plus the final NCO frequency.

Run it (with gr-coherer installed, or its source tree on the import path):

    /usr/bin/python3 scripted_headless_chain.py [--esn0-db 20] [--offset-hz -1200] [--seed 7]
"""

import argparse

import numpy as np
import pmt
from gnuradio import blocks, gr

from gnuradio import coherer
from gnuradio.coherer import metadata

POWER = 8                 # 8PSK: symmetry order M


def synthesise(sample_rate, duration_s, silence_s, offset_hz, esn0_db, seed):
    """Noise-only lead-in, then unit-power 8PSK symbols on a carrier offset, in complex64."""
    rng = np.random.default_rng(seed)
    n = int(duration_s * sample_rate)
    start = int(silence_s * sample_rate)
    symbols = np.exp(2j * np.pi * rng.integers(0, POWER, n) / POWER)
    symbols[:start] = 0.0
    carrier = np.exp(2j * np.pi * offset_hz * np.arange(n) / sample_rate)
    noise_rms = 10.0 ** (-esn0_db / 20.0)          # Es = 1, so N0 = 10^(-Es/N0 / 10)
    noise = noise_rms * (rng.standard_normal(n) + 1j * rng.standard_normal(n)) / np.sqrt(2.0)
    return (symbols * carrier + noise).astype(np.complex64)


def run_chain(samples, sample_rate, noise_bw_hz, window, status_interval):
    """Run the chain over ``samples``; returns (lock events, status dicts, final NCO frequency Hz)."""
    tb = gr.top_block("scripted carrier recovery")
    source = blocks.vector_source_c(samples, False)
    loop = coherer.mth_power_loop_cc(sample_rate, POWER, noise_bw_hz, loop_order=2,
                                     tag_interval=status_interval)
    detector = coherer.lock_detector_cc(sample_rate, POWER, window=window,
                                        status_interval=status_interval)
    sink = blocks.vector_sink_c()
    statuses = blocks.message_debug()
    tb.connect(source, loop, detector, sink)
    tb.msg_connect((detector, metadata.STATUS_PORT), (statuses, "store"))
    tb.run()

    events = [(tag.offset, pmt.to_python(tag.value)) for tag in sink.tags()
              if pmt.eq(tag.key, metadata.CARRIER_LOCK_PMT)]
    status = [metadata.status_from_pmt(statuses.get_message(i)) for i in range(statuses.num_messages())]
    return events, status, loop.frequency_hz()


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sample-rate", type=float, default=50e3, help="samples/s (default 50e3)")
    parser.add_argument("--duration-s", type=float, default=1.5, help="signal length, s (default 1.5)")
    parser.add_argument("--silence-s", type=float, default=0.2, help="noise-only lead-in, s (default 0.2)")
    parser.add_argument("--offset-hz", type=float, default=-1200.0, help="carrier offset, Hz (default -1200)")
    parser.add_argument("--esn0-db", type=float, default=20.0, help="Es/N0, dB (default 20)")
    parser.add_argument("--noise-bw-hz", type=float, default=40.0, help="loop noise bandwidth B_L, Hz (default 40)")
    parser.add_argument("--seed", type=int, default=7, help="random seed (default 7)")
    args = parser.parse_args(argv)

    samples = synthesise(args.sample_rate, args.duration_s, args.silence_s, args.offset_hz,
                         args.esn0_db, args.seed)
    status_interval = int(0.1 * args.sample_rate)
    events, status, freq_hz = run_chain(samples, args.sample_rate, args.noise_bw_hz, 1024,
                                        status_interval)

    for offset, locked in events:
        print(f"lock event: sample {offset} t={offset / args.sample_rate:.4f} s "
              f"{'LOCKED' if locked else 'UNLOCKED'}")
    for d in status:
        freq = d.get(metadata.ST_FREQ_HZ)
        freq_text = "-" if freq is None else f"{freq:.2f}"
        print(f"status: t={d[metadata.ST_TIME_S]:.4f} s locked={d[metadata.ST_LOCKED]} "
              f"metric={d[metadata.ST_METRIC]:.3f} esn0_db={d[metadata.ST_ESN0_DB]:.2f} freq_hz={freq_text}")
    print(f"final NCO frequency: {freq_hz:.2f} Hz (scenario offset {args.offset_hz:.2f} Hz)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
