# SPDX-License-Identifier: GPL-3.0-or-later
"""Shared test harness for the carrier loops: signal synthesis and a flowgraph runner.

The synthetic signals here are test stimuli (random M-PSK with a known carrier
phase trajectory and complex white Gaussian noise), one sample per symbol, so
Es/N0 is the per-sample SNR used throughout REFERENCES.md.
"""

from dataclasses import dataclass, field

import numpy as np
import pmt
from gnuradio import blocks, coherer, gr


def mpsk(rng, power, n, esn0_db, theta, amplitude=1.0, point_angle=0.0):
    """Unit-energy M-PSK symbols times ``e^{j theta}`` plus noise at ``esn0_db``.

    ``theta`` is a scalar or an array of n carrier phases (rad). Returns
    ``(x complex64, symbols complex128)``.
    """
    sym = np.exp(1j * (2 * np.pi * rng.integers(0, power, n) / power + point_angle))
    noise_var = 10.0 ** (-esn0_db / 10.0)
    noise = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * np.sqrt(noise_var / 2)
    x = amplitude * (sym * np.exp(1j * np.asarray(theta)) + noise)
    return x.astype(np.complex64), sym


def wrapped_error(theta, ref, power):
    """Carrier phase error theta - theta^ (rad), wrapped into (-pi/M, pi/M]."""
    return np.angle(np.exp(1j * power * (np.asarray(theta) - np.angle(ref)))) / power


def count_true_slips(theta, ref, power, start=0):
    """Slips of 2*pi/M counted against the known carrier phase, with the same
    3*pi/2 hysteresis in the M domain as the definition of a slip. Returns the
    sample indices (>= start) at which each slip completed its departure."""
    # theta is the true, unwrapped carrier phase; the NCO phase moves by far less than pi
    # per sample, so unwrapping it alone is exact (a phase hit in theta stays visible)
    psi = power * (np.asarray(theta) - np.unwrap(np.angle(ref)))
    times = []
    centre = 2 * np.pi * np.round(psi[start] / (2 * np.pi))
    for i in range(start, len(psi)):
        d = psi[i] - centre
        if d > 1.5 * np.pi or d < -1.5 * np.pi:
            centre += np.sign(d) * 2 * np.pi
            times.append(i)
    return np.array(times, dtype=np.int64)


@dataclass
class LoopRun:
    out: np.ndarray
    ref: np.ndarray
    freq: np.ndarray
    err: np.ndarray
    tags: list = field(default_factory=list)     # (offset, key, python value)
    block: object = None

    def tags_with(self, key):
        return [(o, v) for o, k, v in self.tags if k == key]


def run_loop(x, *, power=2, sample_rate=1.0, noise_bw_hz=0.005, max_items=None,
             extra_tags=(), tb=None, **kwargs):
    """Run ``x`` through ``mth_power_loop_cc`` with diagnostics in a real flowgraph."""
    blk = coherer.mth_power_loop_cc(sample_rate, power, noise_bw_hz, diagnostics=True, **kwargs)
    if max_items:
        blk.set_max_noutput_items(max_items)
    top = tb if tb is not None else gr.top_block()
    src = blocks.vector_source_c(x, False, 1, list(extra_tags))
    sinks = [blocks.vector_sink_c(), blocks.vector_sink_c(), blocks.vector_sink_f(), blocks.vector_sink_f()]
    top.connect(src, blk)
    for port, sink in enumerate(sinks):
        top.connect((blk, port), sink)
    top.run()
    tags = [(t.offset, pmt.symbol_to_string(t.key), pmt.to_python(t.value)) for t in sinks[0].tags()]
    return LoopRun(np.asarray(sinks[0].data()), np.asarray(sinks[1].data()),
                   np.asarray(sinks[2].data()), np.asarray(sinks[3].data()), tags, blk)
