# SPDX-License-Identifier: GPL-3.0-or-later
"""Run every block on fixed, seeded inputs in one process and print one SHA-256 per
block configuration (all outputs, tags and messages), as JSON on stdout.

Used by test_determinism.py, which runs this script in fresh processes with different
PYTHONHASHSEED values and numba cache folders and compares the digests.

    python3 determinism_chain.py PACKAGE_PARENT [KINDS]

PACKAGE_PARENT is the folder holding ``coherer`` (``<repo>/python``), put first on
``gnuradio.__path__`` so that this checkout is the package under test. KINDS, a
comma-separated subset of ``loop,lock,feedforward`` (default all), limits what runs.
"""

import hashlib
import json
import sys

import gnuradio

gnuradio.__path__.insert(0, sys.argv[1])

import numpy as np  # noqa: E402
import pmt  # noqa: E402
from gnuradio import blocks, coherer, gr  # noqa: E402

FS = 9600.0


def test_signal(power, seed):
    """M-PSK at one sample per symbol with what a real pass has: noise only first, a
    carrier offset with drift, a deep fade, a low-SNR stretch and a frequency jump."""
    rng = np.random.default_rng(seed)
    n = int(14 * FS)
    t = np.arange(n) / FS
    sym = np.exp(1j * (2 * np.pi * rng.integers(0, power, n) / power + (np.pi / 4 if power == 4 else 0.0)))
    freq = 40.0 - 1.5 * t + 16.0 * (t >= 10.0)
    phase = 2 * np.pi * np.cumsum(freq) / FS + 0.3
    amp = np.ones(n)
    amp[t < 0.5] = 0.0                           # noise only
    amp[(t >= 5.0) & (t < 6.0)] = 10 ** (-30 / 20)   # fade
    esn0_db = np.where((t >= 6.0) & (t < 9.0), 4.0, 12.0)
    noise_std = np.sqrt(10 ** (-esn0_db / 10) / 2)
    noise = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * noise_std
    return (amp * sym * np.exp(1j * phase) + noise).astype(np.complex64)


def _value(v):
    """A pmt value as an exact, order-independent text."""
    py = pmt.to_python(v)
    if isinstance(py, dict):
        return "{" + ",".join(f"{k}:{_exact(py[k])}" for k in sorted(py, key=str)) + "}"
    return _exact(py)


def _exact(x):
    if isinstance(x, float):
        return x.hex()
    if isinstance(x, (np.floating,)):
        return float(x).hex()
    return repr(x)


def run(block, x, outputs, message_port=None):
    """Digest of every output stream, tag and message of ``block`` fed ``x``."""
    tb = gr.top_block()
    src = blocks.vector_source_c(x, False)
    sinks = [blocks.vector_sink_c() if i < 2 else blocks.vector_sink_f() for i in range(outputs)]
    tb.connect(src, block)
    for i, sink in enumerate(sinks):
        tb.connect((block, i), sink)
    store = None
    if message_port:
        store = blocks.message_debug()
        tb.msg_connect((block, message_port), (store, "store"))
    tb.run()
    h = hashlib.sha256()
    for sink in sinks:
        h.update(np.asarray(sink.data()).tobytes())
    for tag in sinks[0].tags():
        h.update(f"{tag.offset} {pmt.symbol_to_string(tag.key)} {_value(tag.value)}\n".encode())
    if store is not None:
        for i in range(store.num_messages()):
            h.update((_value(store.get_message(i)) + "\n").encode())
    return h.hexdigest()


def main():
    kinds = set((sys.argv[2] if len(sys.argv) > 2 else "loop,lock,feedforward").split(","))
    qpsk = test_signal(4, 4)
    bpsk = test_signal(2, 2)
    digests = {}
    if "loop" in kinds:
        digests["loop M=2"] = run(coherer.mth_power_loop_cc(FS, 2, 20.0, tag_interval=960, diagnostics=True),
                                  bpsk, 4)
        digests["loop M=4"] = run(coherer.mth_power_loop_cc(FS, 4, 20.0, tag_interval=960, diagnostics=True),
                                  qpsk, 4)
        digests["loop M=2 third order"] = run(
            coherer.mth_power_loop_cc(FS, 2, 20.0, loop_order=3, diagnostics=True), bpsk, 4)
    # the lock detector on a carrier-free stream (as behind a locked loop): decisions,
    # metrics and Es/N0 through the fade and the low-SNR stretch
    t = np.arange(len(bpsk)) / FS
    steady = bpsk * np.exp(-1j * (2 * np.pi * np.cumsum(40.0 - 1.5 * t + 16.0 * (t >= 10.0)) / FS + 0.3))
    steady = steady.astype(np.complex64)
    for power, x in ((2, steady), (4, (qpsk * np.exp(-1j * (2 * np.pi * np.cumsum(
            40.0 - 1.5 * t + 16.0 * (t >= 10.0)) / FS + 0.3))).astype(np.complex64))):
        if "lock" in kinds:
            digests[f"lock detector M={power}"] = run(
                coherer.lock_detector_cc(FS, power, 1024, status_interval=4096), x, 1, "status")
    if "feedforward" in kinds:
        digests["feed-forward M=4"] = run(coherer.mth_power_feedforward_cc(FS, 4, 64, diagnostics=True),
                                          qpsk, 4)
        digests["feed-forward M=2"] = run(coherer.mth_power_feedforward_cc(FS, 2, 128, diagnostics=True),
                                          bpsk, 4)
    json.dump(digests, sys.stdout, indent=1)


if __name__ == "__main__":
    main()
