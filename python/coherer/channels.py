# SPDX-License-Identifier: GPL-3.0-or-later
"""Several carriers in one wideband recording: one channel per carrier.

Each carrier's channel is cut out of the capture: a stateless mixer moves the
carrier to zero (see :func:`translate` for why not the framework's oscillators),
the framework's decimating ``fir_filter_ccf`` with taps from ``firdes.low_pass``
filters, and then runs the same loop -> lock detector ->
collector chain as a single carrier (:func:`coherer.receiver.build_chain`).

Channel size: the channel keeps ``bandwidth_hz`` (the occupied band of an RRC
signal, symbol rate x (1 + roll-off), or ``--channel-bw``) and runs at the
capture rate divided by the largest whole decimation that leaves at least four
samples per symbol and at least twice the bandwidth. When no symbol rate is
given it is estimated per carrier (:mod:`coherer.symbolrate`) inside a first,
wider channel bounded by the neighbouring carriers and the capture's edges.

Results are mapped back to the capture: a channel sample k stands for capture
sample k * decimation - (taps - 1) / 2 (the filter's group delay), and the
channel loop's frequency is relative to the carrier, so ``freq_hz`` becomes
carrier + loop frequency, the offset from the capture centre.
"""

import time
from dataclasses import dataclass, replace
from math import floor
from types import SimpleNamespace

import numpy as np
from gnuradio import gr

from . import receiver
from ._long_calls import request_long_calls
from ._mixer_kernel import mix_down

#: Fewest samples per symbol a channel runs at.
CHANNEL_SPS = 4
#: A channel runs at least this many times faster than its bandwidth.
CHANNEL_OVERSAMPLE = 2.0
#: The same for the first, wider channel in which a symbol rate is estimated (as slow as
#: the band allows, so that slow symbol rates stay within the estimator's 64 samples per
#: symbol).
ESTIMATE_OVERSAMPLE = 1.25
#: The passband never reaches closer than this share of the channel's Nyquist frequency.
MAX_PASSBAND_SHARE = 0.8
#: The designer's nominal transition width, as a share of the gap between passband and
#: stopband edges: the window's own spread fills the rest (measured on the designed
#: taps: 0.6 keeps the band flat within 0.001 dB and -79 dB beyond; 1.0 loses 0.23 dB at
#: the band edge and reaches only -32 dB).
TRANSITION_SHARE = 0.6
#: A decimation ratio this close below a whole number counts as that number.
WHOLE_TOLERANCE = 1e-3
#: At most this many capture samples are channelised to estimate a carrier's symbol rate.
ESTIMATE_CAPTURE_SAMPLES = 1 << 22


@dataclass(frozen=True)
class ChannelPlan:
    """One carrier's channel (frequencies in Hz from the capture centre)."""
    carrier_hz: float              #: requested centre
    power: int                     #: M of this carrier's loop
    sample_rate: float             #: capture rate, samples/s
    decimation: int
    bandwidth_hz: float            #: band kept around the carrier
    taps: tuple                    #: low-pass taps at the capture rate
    timing: receiver.SymbolTiming  #: symbol rate and samples per symbol in the channel

    @property
    def channel_rate(self):
        """Samples/s after decimation."""
        return self.sample_rate / self.decimation

    @property
    def delay(self):
        """The filter's group delay, capture samples."""
        return (len(self.taps) - 1) // 2

    @property
    def lower_edge_hz(self):
        return self.carrier_hz - self.bandwidth_hz / 2.0

    @property
    def upper_edge_hz(self):
        return self.carrier_hz + self.bandwidth_hz / 2.0

    def to_capture(self, channel_sample):
        """Capture sample a channel sample stands for (int, or an int64 array for an array)."""
        capture = np.maximum(0, np.asarray(channel_sample, dtype=np.int64) * self.decimation - self.delay)
        return int(capture) if capture.ndim == 0 else capture

    def channel_samples(self, capture_samples):
        """Channel samples produced from ``capture_samples`` capture samples."""
        return int(capture_samples) // self.decimation


def channel_taps(sample_rate, bandwidth_hz, channel_rate):
    """Low-pass taps (the framework's window designer) passing +-bandwidth/2 and
    stopping from +-bandwidth on, or from the channel's Nyquist frequency if lower."""
    from gnuradio import fft
    from gnuradio.filter import firdes
    stop = min(channel_rate / 2.0, bandwidth_hz)
    passband = min(bandwidth_hz / 2.0, MAX_PASSBAND_SHARE * stop)
    return tuple(firdes.low_pass(1.0, sample_rate, (passband + stop) / 2.0,
                                 TRANSITION_SHARE * (stop - passband),
                                 fft.window.WIN_BLACKMAN_HARRIS))


def decimation_for(sample_rate, bandwidth_hz, symbol_rate_hz=None, oversample=CHANNEL_OVERSAMPLE):
    """The largest whole decimation that keeps ``oversample`` x bandwidth and, for a
    known symbol rate, ``CHANNEL_SPS`` samples per symbol."""
    need = oversample * bandwidth_hz
    if symbol_rate_hz is not None:
        need = max(need, CHANNEL_SPS * symbol_rate_hz)
    # an estimated rate is off by a fraction of a per mille: a ratio that is whole
    # within that stays whole, so the channel keeps a whole number of samples per symbol
    return max(1, int(floor(sample_rate / need + WHOLE_TOLERANCE)))


class _mixer(gr.sync_block):
    """x[n] e^{-j 2 pi f n / fs}, the phase taken from the absolute sample index n, so
    every sample gets the same value however the stream is cut
    (:func:`coherer._mixer_kernel.mix_down`, no state)."""

    def __init__(self, freq_hz, sample_rate):
        gr.sync_block.__init__(self, name="coherer_mixer", in_sig=[np.complex64], out_sig=[np.complex64])
        self._cycles_per_sample = float(freq_hz) / float(sample_rate)
        self._skip = request_long_calls(self)     # leading history samples work() skips

    def work(self, input_items, output_items):
        x = input_items[0][self._skip:]           # the history is there only for the buffer size
        mix_down(x, output_items[0], self.nitems_read(0), self._cycles_per_sample)
        return len(x)


def translate(tb, head, plan):
    """Add the channel of ``plan`` to ``tb``, fed from ``head``; returns its last block (the
    low-pass) and the mixer (both kept referenced by the flowgraph's owner).

    The carrier is moved to zero by :class:`_mixer`, then the framework's decimating
    ``fir_filter_ccf`` low-pass filters. The framework's own oscillators would be the
    first choice, but ``freq_xlating_fir_filter_ccc`` and ``rotator_cc`` renormalise
    their phase per call and ``sig_source_c`` differed between two identical runs
    (measured: 2.4e-7), and results must not depend on how the stream is cut.
    """
    from gnuradio import filter as gr_filter
    mix = _mixer(plan.carrier_hz, plan.sample_rate)
    lowpass = gr_filter.fir_filter_ccf(plan.decimation, [float(t) for t in plan.taps])
    tb.connect(head, mix, lowpass)
    return lowpass, mix


def channelise(samples, plan):
    """``samples`` (capture rate) through the channel filter of ``plan``: complex64 at the
    channel rate (a small flowgraph with the same block as the run)."""
    from gnuradio import blocks, gr
    tb = gr.top_block("coherer_channelise")
    src = blocks.vector_source_c(np.asarray(samples, dtype=np.complex64), False)
    xlate, mix = translate(tb, src, plan)
    snk = blocks.vector_sink_c()
    tb.connect(xlate, snk)
    tb.run()
    return np.array(snk.data(), dtype=np.complex64)


def _timing_in(rec, plan, symbol_rate_hz):
    """SymbolTiming of a carrier in the channel of ``plan`` (estimated there when
    ``symbol_rate_hz`` is None)."""
    from .recording import read_samples
    d = plan.decimation

    def read(start, count):
        return channelise(read_samples(rec, start * d, count * d), plan)

    cap = max(receiver.SYMBOL_RATE_MIN_SAMPLES, ESTIMATE_CAPTURE_SAMPLES // d)
    return receiver.stream_timing(read, plan.channel_rate, plan.channel_samples(rec.num_samples),
                                  symbol_rate_hz, max_samples=min(receiver.SYMBOL_RATE_SAMPLES, cap))


def _room(carrier_hz, others, sample_rate):
    """Width (Hz) of the band around a carrier that reaches no neighbour's centre's half-way
    point nor the capture's edges."""
    half = sample_rate / 2.0 - abs(carrier_hz)
    for f in others:
        half = min(half, abs(f - carrier_hz) / 2.0)
    return 2.0 * half


def _plan(sample_rate, carrier_hz, power, bandwidth_hz, symbol_rate_hz, timing=None,
          oversample=CHANNEL_OVERSAMPLE):
    d = decimation_for(sample_rate, bandwidth_hz, symbol_rate_hz, oversample)
    taps = channel_taps(sample_rate, bandwidth_hz, sample_rate / d)
    return ChannelPlan(float(carrier_hz), int(power), float(sample_rate), d, float(bandwidth_hz),
                       taps, timing)


def plan_channels(rec, carriers, settings, channel_bw_hz=None):
    """The channel of each carrier.

    ``carriers``: list of ``(offset_hz, power or None)`` (None: ``settings.power``);
    ``channel_bw_hz``: the band kept around every carrier (default: from the symbol
    rate, ``settings.symbol_rate_hz`` or estimated per carrier). Raises ValueError
    for a carrier or band that does not fit in the capture.
    """
    fs = rec.sample_rate
    offsets = [float(f) for f, _ in carriers]
    if len(set(offsets)) != len(offsets):
        raise ValueError("carrier: the same carrier is given twice")
    plans = []
    for f, m in carriers:
        power = settings.power if m is None else int(m)
        if abs(f) >= fs / 2.0:
            raise ValueError(f"carrier {f:g} Hz is outside the capture (+-{fs / 2:g} Hz)")
        room = _room(f, [g for g in offsets if g != f], fs)
        if channel_bw_hz is not None and abs(f) + channel_bw_hz / 2.0 > fs / 2.0:
            raise ValueError(f"channel_bw {channel_bw_hz:g} Hz around carrier {f:g} Hz reaches "
                             f"beyond the capture (+-{fs / 2:g} Hz)")
        rate = settings.symbol_rate_hz
        if rate is None:
            first = _plan(fs, f, power, channel_bw_hz or room, None, oversample=ESTIMATE_OVERSAMPLE)
            est = _timing_in(rec, first, None)
            if est.source == "none":
                plans.append(replace(first, timing=est))
                continue
            rate = est.symbol_rate_hz
        bw = channel_bw_hz or rate * (1.0 + settings.rolloff)
        plan = _plan(fs, f, power, bw, rate)
        timing = _timing_in(rec, plan, rate)
        if settings.symbol_rate_hz is None:       # keep where the rate came from
            timing = replace(timing, source="estimated", line_to_floor_db=est.line_to_floor_db)
        plans.append(replace(plan, timing=timing))
    return plans


def channel_settings(settings, plan):
    """The chain settings of one carrier: its M, the NCO starting at the carrier."""
    return replace(settings, power=plan.power, freq_guess_hz=0.0)


@dataclass
class CarrierResult:
    """One carrier's outcome, in capture samples and Hz from the capture centre."""
    plan: ChannelPlan
    result: receiver.RunResult


def to_capture(rec, plan, res):
    """A channel's :class:`RunResult` restated for the capture (see the module notes)."""
    fs, f0 = rec.sample_rate, plan.carrier_hz
    events = []
    for e in res.events:
        e = dict(e, sample=plan.to_capture(e["sample"]))
        e["time_s"] = e["sample"] / fs
        e["freq_hz"] = f0 + e["freq_hz"]
        if e["event"] == "lock" and rec.center_freq_hz is not None:
            e["carrier_hz"] = rec.center_freq_hz + e["freq_hz"]
        e["carrier"] = f0
        events.append(e)
    intervals = []
    for iv in res.intervals:
        iv = replace(iv, start=plan.to_capture(iv.start), end=plan.to_capture(iv.end),
                     freq_sum=iv.freq_sum + f0 * iv.freq_count)
        intervals.append(iv)
    status = res.status.copy()
    if len(status):
        status[:, 0] = plan.to_capture(status[:, 0])
    traces = dict(res.traces)
    if len(traces["sample"]):
        traces["sample"] = plan.to_capture(traces["sample"])
        traces["freq"] = np.asarray(traces["freq"], dtype=float) + f0
    return replace(res, recording=rec, num_samples=rec.num_samples, events=events,
                   intervals=intervals, status=status, traces=traces)


def build_channels(tb, head, rec, settings, plans):
    """Add every channel's filter and chain to ``tb`` fed from ``head``; returns the
    chains (:class:`coherer.receiver.CarrierChain`)."""
    chains = []
    for plan in plans:
        xlate, mix = translate(tb, head, plan)
        chain = receiver.build_chain(tb, xlate, plan.channel_rate, plan.channel_samples(rec.num_samples),
                                     channel_settings(settings, plan), plan.timing)
        chain.others += [xlate, mix]
        chains.append(chain)
    return chains


def run_channels(rec, settings, plans, progress=None):
    """Run every carrier's channel over ``rec`` in one flowgraph; returns a list of
    :class:`CarrierResult` in the order of ``plans``."""
    from gnuradio import gr
    tb = gr.top_block("coherer_channels")
    head, _source = receiver.source_chain(tb, rec)
    chains = build_channels(tb, head, rec, settings, plans)
    t0 = time.monotonic()
    receiver.run_flowgraph(tb, [c.sink for c in chains],
                           [p.channel_samples(rec.num_samples) for p in plans], progress,
                           overall=rec.num_samples)
    wall = time.monotonic() - t0
    stream = SimpleNamespace(center_freq_hz=None)
    return [CarrierResult(p, to_capture(rec, p, receiver.chain_result(stream, c, wall)))
            for p, c in zip(plans, chains)]


def merged_events(results):
    """Every carrier's events in one list, by sample, then carrier."""
    events = [e for r in results for e in r.result.events]
    return sorted(events, key=lambda e: (e["sample"], e["carrier"], e["event"] != "cycle_slip"))


__all__ = ["ChannelPlan", "CarrierResult", "channel_taps", "decimation_for", "translate", "channelise",
           "plan_channels", "channel_settings", "to_capture", "build_channels", "run_channels",
           "merged_events"]
