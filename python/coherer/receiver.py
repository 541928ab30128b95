# SPDX-License-Identifier: GPL-3.0-or-later
"""The headless receive chain: file source -> format conversion -> M-th power
loop -> lock detector -> collector, run over a recording; returns what happened.

Used by ``coherer run`` and ``coherer demo``. The collector is a sink that keeps
the events (lock, unlock, cycle slip), the per-window status (lock metric,
Es/N0), per-interval statistics, and decimated traces for the plots. Nothing
here prints: progress is reported through a callback.

The lock detector decides what "locked" means for the lock/unlock events. Every
cycle slip the loop declares is listed (the loop only declares slips while its
own lock indicator says locked); those that fall where the detector says
unlocked (typically while a large frequency step is pulled in) are also counted
separately in the summary.
"""

import threading
import time
from dataclasses import dataclass, field
from math import ceil

import numpy as np
import pmt
from gnuradio import blocks, gr

from . import design, metadata
from .lock_detector_cc import lock_detector_cc
from .mth_power_loop_cc import mth_power_loop_cc

#: Decimated traces keep at most about this many points per quantity.
MAX_TRACE_POINTS = 200_000
#: Aim for at most about this many status points over a recording.
MAX_STATUS_POINTS = 20_000
#: A flowgraph whose collector sees no new sample for this long has failed (s): a block
#: whose work() raised leaves the flowgraph waiting forever.
STALL_TIMEOUT_S = 60.0
#: Samples read (spread over the recording) to estimate the symbol rate, and the fewest usable.
SYMBOL_RATE_SAMPLES = 1 << 20
SYMBOL_RATE_MIN_SAMPLES = 4096


@dataclass(frozen=True)
class ReceiverSettings:
    """Loop and detector settings (units as in the blocks)."""
    power: int                     #: symmetry order M
    noise_bw_hz: float             #: loop noise bandwidth B_L, Hz
    damping: float = 0.707
    loop_order: int = 2
    window: int = 1024             #: lock-detector window, samples
    freq_guess_hz: float = 0.0     #: NCO start frequency, Hz
    lock_threshold: float = None
    unlock_threshold: float = None
    symbol_rate_hz: float = None   #: None: estimated from the recording
    rolloff: float = 0.35          #: roll-off of the root-raised-cosine matched filter


@dataclass(frozen=True)
class SymbolTiming:
    """The symbol rate the detector was run with, and where it came from."""
    source: str                    #: "given", "estimated" or "none" (no line found)
    symbol_rate_hz: float          #: Hz (None for "none")
    samples_per_symbol: int        #: what the detector used (1 for "none")
    exact_samples_per_symbol: float = None   #: sample_rate / symbol rate
    line_to_floor_db: float = None #: strength of the spectral line (estimated only)
    note: str = ""                 #: why one sample per symbol was used, when it was

    def as_dict(self):
        return {"source": self.source, "symbol_rate_hz": self.symbol_rate_hz,
                "samples_per_symbol": self.samples_per_symbol,
                "exact_samples_per_symbol": self.exact_samples_per_symbol,
                "line_to_floor_db": self.line_to_floor_db, "note": self.note}


def symbol_timing(rec, settings):
    """The detector's samples per symbol: from ``settings.symbol_rate_hz`` when given,
    else estimated from the recording (the spectral line of |x|^2); one sample per
    symbol when no line is found."""
    from .recording import read_samples
    return stream_timing(lambda start, count: read_samples(rec, start, count), rec.sample_rate,
                         rec.num_samples, settings.symbol_rate_hz)


def stream_timing(read, sample_rate, num_samples, symbol_rate_hz=None, max_samples=SYMBOL_RATE_SAMPLES):
    """:func:`symbol_timing` for any stream of ``num_samples`` samples at ``sample_rate``
    (samples/s) that ``read(start, count)`` returns pieces of; at most ``max_samples``
    of them are analysed."""
    from .arguments import MAX_SAMPLES_PER_SYMBOL

    def whole(exact):          # the detector works at a whole number of samples per symbol
        return int(min(MAX_SAMPLES_PER_SYMBOL, max(1, round(exact))))

    fs = sample_rate
    if symbol_rate_hz is not None:
        exact = fs / symbol_rate_hz
        return SymbolTiming("given", float(symbol_rate_hz), whole(exact), exact)
    from .symbolrate import estimate_symbol_rate
    n = min(num_samples, max_samples)
    if n < SYMBOL_RATE_MIN_SAMPLES:
        return SymbolTiming("none", None, 1, note="recording too short to estimate the symbol rate; "
                                                  "treated as one sample per symbol")
    if num_samples <= n:
        est = estimate_symbol_rate(read(0, n), fs, max_samples=n)
    else:                      # four blocks spread over a long recording
        size = n // 4
        parts = [read((num_samples - size) * i // 3, size) for i in range(4)]
        est = estimate_symbol_rate(np.concatenate(parts), fs, max_samples=n, blocks=4)
    if not est.detected:
        return SymbolTiming("none", None, 1, line_to_floor_db=float(est.line_to_floor_db),
                            note=est.reason)
    exact = float(est.samples_per_symbol)
    return SymbolTiming("estimated", float(est.rate_hz), whole(exact), exact,
                        float(est.line_to_floor_db))


def matched_filter_taps(sample_rate, symbol_rate_hz, rolloff):
    """Unit-energy root-raised-cosine taps (the framework's designer), 11 symbols long."""
    from gnuradio import filter as gr_filter
    sps = sample_rate / symbol_rate_hz
    n = 2 * int(round(5.5 * sps)) + 1
    taps = np.array(gr_filter.firdes.root_raised_cosine(1.0, sample_rate, symbol_rate_hz, rolloff, n))
    return taps / np.sqrt(np.sum(taps * taps))


def detector_window(window, samples_per_symbol):
    """The detector window (samples) for a requested one: a whole number of symbols, at
    least the detector's minimum."""
    from .arguments import MIN_SYMBOLS
    sps = int(samples_per_symbol)
    return max(MIN_SYMBOLS * sps if sps > 1 else 0, (int(window) // sps) * sps)


#: Windows before an unlock left out of an interval's mean frequency: the window in
#: which the carrier faded and the one that decided the unlock.
TRAILING_WINDOWS = 2


@dataclass
class Interval:
    """One locked interval ``[start, end)`` in samples, with its statistics."""
    start: int
    end: int
    freq_sum: float = 0.0          #: sum of NCO frequency (Hz) over the interval
    freq_count: int = 0
    #: [window index, sum, count] of the latest windows, folded into freq_sum once older than
    #: TRAILING_WINDOWS; at an unlock they are dropped (the carrier was already fading there)
    recent: list = field(default_factory=list)

    def add_frequency(self, window_index, total, count):
        """Add ``count`` NCO-frequency samples (sum ``total``, Hz) of detector window ``window_index``."""
        if self.recent and self.recent[-1][0] == window_index:
            self.recent[-1][1] += total
            self.recent[-1][2] += count
        else:
            self.recent.append([window_index, total, count])
        while len(self.recent) > TRAILING_WINDOWS:
            _, old_sum, old_count = self.recent.pop(0)
            self.freq_sum += old_sum
            self.freq_count += old_count

    def close(self, end, lost):
        """End the interval at ``end``; ``lost``: the carrier went away (unlock), so the
        trailing windows, where the detector was still deciding, are left out if possible."""
        self.end = int(end)
        if not (lost and self.freq_count):
            for _, total, count in self.recent:
                self.freq_sum += total
                self.freq_count += count
        self.recent = []
    esn0_lin: list = field(default_factory=list)    #: status Es/N0 (linear) inside
    metric: list = field(default_factory=list)

    def summary(self, sample_rate, center_freq_hz=None):
        """JSON-ready description (times in s, frequencies in Hz, Es/N0 in dB)."""
        d = {"start_sample": int(self.start), "end_sample": int(self.end),
             "start_s": self.start / sample_rate, "end_s": self.end / sample_rate,
             "duration_s": (self.end - self.start) / sample_rate}
        if self.freq_count:
            d["freq_hz"] = self.freq_sum / self.freq_count
            if center_freq_hz is not None:
                d["carrier_hz"] = center_freq_hz + d["freq_hz"]
        if self.esn0_lin:
            d["esn0_db"] = _db(np.mean(self.esn0_lin))
        if self.metric:
            d["metric"] = float(np.mean(self.metric))
        return d


def _db(x):
    return 10.0 * np.log10(x) if x > 0 else float("-inf")


class _collector(gr.sync_block):
    """Sink that records events, status and decimated traces.

    Inputs: 0 detector output (corrected samples with all tags), 1 the loop's input,
    2 NCO frequency (Hz), 3 the loop's reference e^{j theta^}, 4 and 5 the detector's
    held lock metric and Es/N0 (dB). A lock change is tagged on the last sample of the
    window that decided it; the event and the interval start at that window's first
    sample, ``window - 1`` earlier, less the matched filter's delay ``delay`` (samples).
    """

    def __init__(self, sample_rate, decimation, window, delay=0):
        gr.sync_block.__init__(self, name="coherer_collector",
                               in_sig=[np.complex64, np.complex64, np.float32, np.complex64,
                                       np.float32, np.float32],
                               out_sig=None)
        self._fs = float(sample_rate)
        self._trace_step = int(decimation)
        self._window = int(window)
        self._delay = int(delay)
        self.events = []
        self.status = []              # (sample, metric, esn0_db, locked)
        self.intervals = []
        self._open = None             # the Interval being accumulated while locked
        self._trace = {"sample": [], "before": [], "after": [], "freq": [], "phase": []}
        self.slips_outside_lock = 0   # loop slip tags (listed) while the detector said unlocked
        self.progress = 0
        self.error = None             # first exception caught in work(), if any

    # --- streaming --------------------------------------------------------------------
    def work(self, input_items, output_items):
        n = len(input_items[0])
        try:
            self._consume(input_items, n)
        except Exception as exc:      # work() must never raise; reported after the run
            if self.error is None:
                self.error = exc
        self.progress = self.nitems_read(0) + n
        return n

    def _consume(self, ins, n):
        start = self.nitems_read(0)
        freq = ins[2]
        # tags in stream order; at one offset a lock change goes before the status
        order = {metadata.CARRIER_LOCK: 0, metadata.CYCLE_SLIP: 1, metadata.CARRIER_STATUS: 2}
        tags = []
        for tag in self.get_tags_in_window(0, 0, n):
            key = pmt.symbol_to_string(tag.key)
            if key in order:
                tags.append((tag.offset, order[key], key, tag.value))
        tags.sort(key=lambda t: (t[0], t[1]))
        pos = 0                       # frequency sums are split at the lock-state changes
        for offset, _, key, value in tags:
            rel = offset - start
            if key == metadata.CARRIER_LOCK:
                self._accumulate(freq, pos, rel, start)
                pos = rel
                self._on_lock_change(max(0, offset - (self._window - 1) - self._delay),
                                     bool(pmt.to_bool(value)),
                                     float(freq[rel]), float(ins[4][rel]), float(ins[5][rel]))
            elif key == metadata.CYCLE_SLIP:
                if self._open is None:    # the loop was locked, the detector already not
                    self.slips_outside_lock += 1
                self.events.append({"event": "cycle_slip", "sample": int(offset),
                                    "time_s": offset / self._fs, "freq_hz": float(freq[rel]),
                                    "slips": int(pmt.to_long(value))})
            else:
                self._on_status(value)
        self._accumulate(freq, pos, n, start)
        # decimated traces
        first = (-start) % self._trace_step
        idx = np.arange(first, n, self._trace_step)
        if len(idx):
            t = self._trace
            t["sample"].append(start + idx)
            t["before"].append(ins[1][idx].copy())
            t["after"].append(ins[0][idx].copy())
            t["freq"].append(freq[idx].copy())
            t["phase"].append(np.angle(ins[3][idx]).astype(np.float32))

    def _accumulate(self, freq, lo, hi, start):
        """Add freq[lo:hi] (absolute offset of freq[0]: ``start``) to the open interval,
        window by window."""
        if self._open is None:
            return
        while hi > lo:
            w = (start + lo) // self._window
            cut = min(hi, (w + 1) * self._window - start)
            self._open.add_frequency(w, float(np.sum(freq[lo:cut], dtype=np.float64)), cut - lo)
            lo = cut

    def _on_lock_change(self, sample, locked, freq_hz, metric, esn0_db):
        event = {"event": "lock" if locked else "unlock", "sample": int(sample),
                 "time_s": sample / self._fs, "freq_hz": freq_hz}
        if np.isfinite(metric):
            event["metric"] = metric
        if np.isfinite(esn0_db):
            event["esn0_db"] = esn0_db
        self.events.append(event)
        if locked and self._open is None:
            self._open = Interval(int(sample), int(sample))
        elif not locked and self._open is not None:
            self._open.close(sample, lost=True)
            self.intervals.append(self._open)
            self._open = None

    def _on_status(self, value):
        d = pmt.to_python(value)
        if not isinstance(d, dict):
            return
        sample = max(0, int(d.get(metadata.ST_WINDOW_START, 0)) - self._delay)
        metric = float(d.get(metadata.ST_METRIC, np.nan))
        esn0_db = float(d.get(metadata.ST_ESN0_DB, np.nan))
        locked = bool(d.get(metadata.ST_LOCKED, False))
        self.status.append((sample, metric, esn0_db, locked))
        if self._open is not None and locked:
            if np.isfinite(esn0_db):
                self._open.esn0_lin.append(10.0 ** (esn0_db / 10.0))
            if np.isfinite(metric):
                self._open.metric.append(metric)

    # --- after the run ----------------------------------------------------------------
    def finish(self, total):
        """Close an interval still open at the end of the stream (``total`` samples)."""
        if self._open is not None:
            self._open.close(total, lost=False)
            self.intervals.append(self._open)
            self._open = None

    def traces(self):
        """Decimated traces as numpy arrays: sample, before, after, freq (Hz), phase (rad)."""
        out = {}
        for k, chunks in self._trace.items():
            out[k] = np.concatenate(chunks) if chunks else np.zeros(0)
        return out


@dataclass
class RunResult:
    """Everything a run produced (times in s, frequencies in Hz)."""
    recording: object
    settings: ReceiverSettings
    num_samples: int                 #: samples processed (every sample of the recording)
    events: list
    intervals: list                  #: list of :class:`Interval`
    status: np.ndarray               #: rows (sample, metric, esn0_db, locked)
    traces: dict
    thresholds: tuple                #: (lock, unlock) thresholds of the detector
    loop_design: object              #: :class:`coherer.design.LoopDesign`
    wall_s: float
    slips_outside_lock: int = 0      #: listed slips that fell where the detector said unlocked
    timing: SymbolTiming = None      #: the symbol rate the detector used
    window: int = None               #: the detector window actually used, samples

    def interval_summaries(self):
        rec = self.recording
        return [iv.summary(rec.sample_rate, rec.center_freq_hz) for iv in self.intervals]

    def predicted_phase_rms_rad(self, esn0_db):
        """Linear-theory phase-error RMS (rad) of this loop at Es/N0 ``esn0_db`` (dB)."""
        sps = self.timing.samples_per_symbol if self.timing is not None else 1
        # Es/N0 is per symbol; the loop runs per sample and sees the shaped signal
        var = design.phase_error_variance(self.settings.power, design.db_to_linear(esn0_db),
                                          self.loop_design.actual_bt, samples_per_symbol=sps)
        return float(np.sqrt(var))


class ReceiverError(RuntimeError):
    """The flowgraph failed while running (an internal problem, not bad input)."""


def source_chain(tb, rec):
    """File source plus conversion to complex64; returns the block to connect from,
    and the list of blocks (kept referenced while the flowgraph lives)."""
    fmt = rec.fmt
    item = fmt.component_bytes if fmt.name != "cf32_le" else fmt.sample_bytes
    n_items = rec.num_samples * (fmt.sample_bytes // item)
    chain = []
    if rec.data_offset % item == 0:
        chain.append(blocks.file_source(item, str(rec.data_path), False,
                                        rec.data_offset // item, n_items))
    else:      # unaligned header: read bytes, regroup into items
        chain.append(blocks.file_source(1, str(rec.data_path), False, rec.data_offset, n_items * item))
        chain.append(blocks.stream_to_vector(1, item))
    if fmt.name == "ci16_le":
        chain.append(blocks.interleaved_short_to_complex(False, False, 32768.0))
    elif fmt.name == "ci8":
        chain.append(blocks.interleaved_char_to_complex(False, 128.0))
    elif fmt.name == "cu8":
        chain += [blocks.uchar_to_float(), blocks.add_const_ff(-fmt.offset),
                  blocks.multiply_const_ff(fmt.scale)]
    for a, b in zip(chain, chain[1:]):
        tb.connect(a, b)
    if fmt.name == "cu8":
        deint = blocks.deinterleave(gr.sizeof_float)
        to_c = blocks.float_to_complex()
        tb.connect(chain[-1], deint)
        tb.connect((deint, 0), (to_c, 0))
        tb.connect((deint, 1), (to_c, 1))
        chain += [deint, to_c]
    return chain[-1], chain


@dataclass
class CarrierChain:
    """The blocks of one carrier's chain in a flowgraph (kept referenced while it lives)."""
    loop: object
    detector: object
    sink: _collector
    timing: SymbolTiming
    window: int
    settings: ReceiverSettings
    others: list = field(default_factory=list)


def build_chain(tb, head, sample_rate, total, settings, timing):
    """Add loop -> (matched filter) -> lock detector -> collector to ``tb``, fed from
    ``head`` (a block or (block, port) giving complex64 at ``sample_rate`` samples/s,
    ``total`` samples in all). Returns the :class:`CarrierChain`."""
    fs = sample_rate
    window = detector_window(settings.window, timing.samples_per_symbol)
    # one status per k windows (at the end of the window holding each multiple)
    status_interval = window * max(1, int(ceil(total / MAX_STATUS_POINTS / window)))
    decimation = max(1, int(ceil(total / MAX_TRACE_POINTS)))

    loop = mth_power_loop_cc(fs, settings.power, settings.noise_bw_hz, settings.damping,
                             settings.loop_order, freq_guess_hz=settings.freq_guess_hz,
                             acquire=True, diagnostics=True)
    det = lock_detector_cc(fs, settings.power, window=window,
                           lock_threshold=settings.lock_threshold,
                           unlock_threshold=settings.unlock_threshold,
                           status_interval=status_interval,
                           samples_per_symbol=timing.samples_per_symbol)
    chain_after_loop = []
    delay = 0
    if timing.samples_per_symbol > 1:
        # the detector judges symbols: a matched filter first (delay (taps - 1) / 2 samples)
        from gnuradio import filter as gr_filter
        taps = matched_filter_taps(fs, timing.symbol_rate_hz, settings.rolloff)
        chain_after_loop = [gr_filter.fir_filter_ccf(1, taps.astype(np.float32).tolist())]
        delay = (len(taps) - 1) // 2
    sink = _collector(fs, decimation, window, delay)
    err_sink = blocks.null_sink(gr.sizeof_float)

    tb.connect(head, (loop, 0))
    tb.connect((loop, 0), *chain_after_loop, det, (sink, 0))
    tb.connect(head, (sink, 1))
    tb.connect((loop, 2), (sink, 2))
    tb.connect((loop, 1), (sink, 3))
    tb.connect((loop, 3), err_sink)
    tb.connect((det, 1), (sink, 4))
    tb.connect((det, 2), (sink, 5))
    return CarrierChain(loop, det, sink, timing, window, settings, chain_after_loop + [err_sink])


def run_flowgraph(tb, sinks, totals, progress=None, overall=None):
    """Run ``tb`` to the end, watching its collectors ``sinks`` (``totals``: the samples
    each will see). ``progress(done, overall)`` is called about five times a second, with
    ``done`` the least advanced collector's share of ``overall``. Raises
    :class:`ReceiverError` if a collector failed or the flowgraph stalled."""
    overall = totals[0] if overall is None else overall

    def done():
        return int(min(s.progress / max(1, t) for s, t in zip(sinks, totals)) * overall)

    finished = threading.Event()
    tb.start()
    waiter = threading.Thread(target=lambda: (tb.wait(), finished.set()), daemon=True)
    waiter.start()
    last, last_change = -1, time.monotonic()
    stalled = False
    try:
        while not finished.wait(0.2):
            if any(s.error is not None for s in sinks):
                break
            now = sum(s.progress for s in sinks)
            if now != last:
                last, last_change = now, time.monotonic()
            elif time.monotonic() - last_change > STALL_TIMEOUT_S:
                stalled = True        # a block's thread died (an exception in work())
                break
            if progress is not None:
                progress(done(), overall)
    finally:
        if not finished.is_set():
            tb.stop()
            finished.wait()
    for s in sinks:
        if s.error is not None:
            raise ReceiverError(f"collector failed: {s.error!r}")
    if stalled:
        raise ReceiverError(f"the flowgraph made no progress for {STALL_TIMEOUT_S:g} s "
                            f"(at sample {done()} of {overall}); see GNU Radio's log on stderr")
    if progress is not None:
        progress(overall, overall)      # the run is complete


def chain_result(rec, chain, wall_s):
    """The :class:`RunResult` of a chain whose flowgraph has finished (``rec``: the
    recording, or whatever describes the stream the chain saw)."""
    sink, det = chain.sink, chain.detector
    processed = sink.progress           # every sample (the detector holds nothing back)
    sink.finish(processed)
    thresholds = (_getter(det, "lock_threshold"), _getter(det, "unlock_threshold"))
    status = np.array(sink.status, dtype=float).reshape(-1, 4)
    events = sorted(sink.events, key=lambda e: (e["sample"], e["event"] != "cycle_slip"))
    if rec.center_freq_hz is not None:
        for e in events:
            if e["event"] == "lock":
                e["carrier_hz"] = rec.center_freq_hz + e["freq_hz"]
    return RunResult(rec, chain.settings, processed, events, sink.intervals, status, sink.traces(),
                     thresholds, chain.loop.loop_design(), wall_s, sink.slips_outside_lock,
                     chain.timing, chain.window)


def run_receiver(rec, settings, progress=None):
    """Run the receive chain over recording ``rec`` (a :class:`coherer.recording.Recording`).

    ``progress(done_samples, total_samples)`` is called about five times a second
    while the flowgraph runs. Raises ``ValueError`` for settings the blocks reject and
    :class:`ReceiverError` if the flowgraph fails.
    """
    timing = symbol_timing(rec, settings)
    tb = gr.top_block("coherer_run")
    head, _chain = source_chain(tb, rec)
    chain = build_chain(tb, head, rec.sample_rate, rec.num_samples, settings, timing)
    t0 = time.monotonic()
    run_flowgraph(tb, [chain.sink], [rec.num_samples], progress)
    return chain_result(rec, chain, time.monotonic() - t0)


def _getter(blk, name):
    f = getattr(blk, name, None)
    try:
        return float(f()) if callable(f) else None
    except (TypeError, ValueError):
        return None


__all__ = ["ReceiverSettings", "SymbolTiming", "symbol_timing", "stream_timing", "CarrierChain",
           "build_chain", "run_flowgraph", "chain_result", "source_chain", "detector_window", "Interval", "RunResult", "ReceiverError", "run_receiver",
           "MAX_TRACE_POINTS", "MAX_STATUS_POINTS"]
