# SPDX-License-Identifier: GPL-3.0-or-later
"""Carrier lock detector: pass-through block that publishes lock state, lock
metric and Es/N0 as stream tags and status messages."""

import numpy as np
import pmt
from gnuradio import gr

from . import arguments, lockstat, metadata
from ._long_calls import request_long_calls
from .mth_power_loop_cc import default_point_angle


def _tag_double(value):
    """A finite float from a numeric pmt, else None."""
    try:
        v = pmt.to_python(value)
    except (RuntimeError, ValueError, TypeError):
        return None
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not np.isfinite(v):
        return None
    return float(v)


class lock_detector_cc(gr.sync_block):
    """Carrier lock detector for M-PSK (or a pilot, M = 1) after carrier recovery.

    Output 0 is the input, sample for sample, as it arrives (nothing is held
    back, a finite stream's last fragment included), with every upstream tag
    kept. Decisions are made on non-overlapping windows of ``window`` samples
    aligned to absolute stream offsets 0, window, 2 window, ...; a decision is
    known at the last sample of its window, and that is where it is reported.

    Args:
        sample_rate: input rate, samples/s (for ``time_s``).
        power: symmetry order M, 1..16 (1 pilot, 2 BPSK, 4 QPSK, 8 8PSK).
        window: samples per decision, 32..2^20 (a multiple of ``samples_per_symbol``).
        lock_threshold: fixed metric at or above which an unlocked detector declares
            lock; default None: referenced to the measured noise (below), noise-only
            false lock <= 1e-6 per window whatever the noise spectrum.
        unlock_threshold: fixed metric below which a locked detector declares loss of
            lock, in [0, lock_threshold]; default None: referenced to the measured
            noise like the lock threshold, at a per-window level of 1e-2.
        point_angle: angle (rad) of one constellation point in the input; default
            0 (M = 1, 2, 8) or pi/4 (M = 4), as the carrier loops output.
        status_interval: 0 = no periodic status; else (samples, >= window) a
            ``carrier_status`` tag and a status message at the end of every window
            that contains an absolute offset that is a multiple of this.
        samples_per_symbol: the input's oversampling, 1..64. With more than one the
            statistics are those of the symbol-spaced samples at the timing phase of
            largest mean power (the most open eye after a matched filter), so metric,
            detection probability and Es/N0 are per symbol.

    Lock metric (REFERENCES 7.1-7.2): ``P = (1/N) sum cos(M (arg y - point_angle))``
    over the N symbols of a window, the normalised projection of (y/|y|)^M onto the
    constellation axis; its mean is ``cos(M phi) c_M(Es/N0)`` (about 1 locked at
    high SNR), 0 on noise alone or on a signal rotating against the reference.
    Default thresholds (see ``coherer.lockstat``): the larger of the white-noise
    value ``Qinv(P_FA)/sqrt(2N)`` and a factor times the null scale measured by the
    windows' null contrasts (differences of quarter means, which carry nothing of a
    carrier standing still; lower median of their squares over the last 96 of them).
    On noise they have the spread of P whatever the noise spectrum, so the threshold
    follows the noise actually present (band-limited by a matched or channel filter,
    or oversampled), where a fixed ``1/(2N)`` variance would be wrong
    (constant-false-alarm practice). At the start of a
    stream the first lock can take a few windows while the reference fills.
    Es/N0 is the M2M4 estimate (Pauluzzi & Beaulieu 2000) over the same samples,
    in dB, clamped to [-60, 100] dB. NaN, Inf and zero samples are gaps: passed
    through unchanged, they count toward the window but add nothing to it.

    Metadata (names from ``coherer.metadata``):
        ``carrier_lock`` tag (pmt bool) at every change of state, on the last
        sample of the window that decided it (``window_start + window - 1``).
        ``carrier_status`` tag (pmt dict) per ``status_interval``, on the last
        sample of its window. Message port ``status``: the same dict at every
        change of state and every periodic status (one message when both fall
        on one window). Dict keys: ``locked`` (bool), ``metric``, ``esn0_db``
        (that window's decision and values), ``sample`` (uint64: where the dict
        is placed, the window's last sample), ``window_start`` (uint64: the
        window's first sample), ``time_s`` (rx_time of the latest upstream
        ``rx_time`` tag at or before ``sample`` plus the elapsed samples /
        sample_rate; else sample / sample_rate), ``freq_hz`` (latest upstream
        ``carrier_freq`` tag at or before ``sample``; absent if none).

    Optional float outputs (connect none, out1, or out1 and out2): out1 the lock
    metric, out2 Es/N0 in dB, each the value of the latest decided window, held
    from that window's last sample until the next decision (NaN before the first).

    Getters: ``locked()``, ``metric()``, ``esn0_db()`` (latest decided window;
    NaN before the first), ``lock_threshold()``, ``unlock_threshold()`` (the
    white-noise floors, or the fixed values given), ``window()``,
    ``samples_per_symbol()``, ``timing_phase()``.

    To keep the per-call cost of a Python block low the block asks GNU Radio for
    calls of up to 131072 samples; decisions, tags and messages never depend on
    how the stream is split into calls. The lock indicator is a statistical
    decision, not a safety-of-life signal.
    """

    def __init__(self, sample_rate, power, window=1024, lock_threshold=None, unlock_threshold=None,
                 point_angle=None, status_interval=0, samples_per_symbol=1, name="lock_detector_cc"):
        checked = arguments.detector_arguments(sample_rate, power, window, lock_threshold, unlock_threshold,
                                               point_angle, status_interval, samples_per_symbol)
        power, window, sps, symbols = (checked[k] for k in ("power", "window", "samples_per_symbol", "symbols"))
        lock_threshold, unlock_threshold = checked["lock_threshold"], checked["unlock_threshold"]
        status_interval = checked["status_interval"]
        if point_angle is None:
            point_angle = default_point_angle(power)

        gr.sync_block.__init__(self, name=name, in_sig=[np.complex64],
                               out_sig=gr.py_io_signature(1, 3, [np.complex64, np.float32, np.float32]))
        self._fs = float(sample_rate)
        self._power = power
        self._window = window
        self._sps = sps
        self._symbols = symbols
        self._on_table = lockstat.threshold_table(symbols, lockstat.DEFAULT_LOCK_P_FA, lock_threshold)
        self._off_table = lockstat.threshold_table(symbols, lockstat.DEFAULT_UNLOCK_P_FA, unlock_threshold)
        self._point_angle = float(point_angle)
        rot = np.exp(-1j * power * self._point_angle)
        self._rot = (float(rot.real), float(rot.imag))
        self._status_interval = int(status_interval)

        self._skip = request_long_calls(self)      # leading history samples work() skips
        self.message_port_register_out(metadata.STATUS_PORT_PMT)

        self._partial = np.zeros(window, np.complex64)   # samples of the window in progress
        self._fill = 0                           # how many of them have arrived
        self._reference = lockstat.new_noise_reference()
        self._phase_power = np.full(sps, np.nan)
        self._phase = 0
        self._locked_state = False
        self._metric = float("nan")
        self._esn0_db = float("nan")
        self._rx_origin = None                 # (tag offset, whole seconds, fraction)
        self._freq_hz = None
        self._srcid = pmt.intern(name)
        self._bufs = None
        self._failed = False                   # an unexpected error was logged once
        self._warm_up()

    # --- helpers -------------------------------------------------------------------
    def _warm_up(self):
        """Compile the kernels now rather than in the first work() call."""
        x = np.ones(2 * self._window, np.complex64)
        bufs = self._buffers(len(x))
        k = lockstat.window_sums(x, self._power, *self._rot, self._window, self._sps, bufs[0])
        lockstat.decide_windows(bufs[0], k, self._symbols, self._sps, lockstat.new_noise_reference(),
                                np.full(self._sps, np.nan), self._on_table, self._off_table, False,
                                *bufs[1:])

    def start(self):
        """Tags carry the block's alias (its GRC id) as source id."""
        self._srcid = pmt.intern(self.alias())
        return True

    # --- getters ---------------------------------------------------------------------
    def locked(self):
        """Lock decision of the latest completed window (False before the first)."""
        return self._locked_state

    def metric(self):
        """Lock metric P of the latest completed window (NaN before the first)."""
        return self._metric

    def esn0_db(self):
        """M2M4 Es/N0 estimate of the latest completed window, dB per symbol (NaN before the first)."""
        return self._esn0_db

    def lock_threshold(self):
        """Lock threshold floor: the white-noise value Qinv(1e-6)/sqrt(2N), or the fixed value given."""
        return float(self._on_table[0])

    def unlock_threshold(self):
        """Unlock threshold floor: the white-noise value Qinv(1e-2)/sqrt(2N), or the fixed value given."""
        return float(self._off_table[0])

    def window(self):
        """Samples per decision."""
        return self._window

    def samples_per_symbol(self):
        """The input's oversampling, samples per symbol."""
        return self._sps

    def timing_phase(self):
        """Timing phase (0..samples_per_symbol - 1, sample offset modulo samples_per_symbol)
        of the latest decided window."""
        return self._phase

    # --- streaming -------------------------------------------------------------------
    def _buffers(self, n):
        """Per-window work arrays with room for the windows in ``n`` samples."""
        need = n // self._window + 2
        if self._bufs is None or len(self._bufs[1]) < need:
            self._bufs = (np.empty((need, self._sps, lockstat.SUM_FIELDS)),
                          np.empty(need), np.empty(need), np.empty(need),
                          np.empty(need, np.bool_), np.empty(need, np.int64))
        return self._bufs

    def work(self, input_items, output_items):
        x = input_items[0][self._skip:]            # skip the unused history
        n = len(x)
        output_items[0][:] = x
        held = output_items[1:]
        try:
            self._detect(x, n, held)
        except Exception as exc:                   # noqa: BLE001 - work() must never raise
            if not self._failed:
                self.logger.error(f"lock detection failed, samples still passed through: {exc!r}")
            self._failed = True
            for out in held:
                out[:] = np.nan
        return n

    def _window_sums(self, x, n):
        """Sums of the windows completed by ``x``: the one in progress (finished from a copy,
        so every window's sums come from one contiguous array, whatever the chunking), then
        the whole windows inside ``x``; the rest is kept. Returns (sums, count)."""
        w = self._window
        sums = self._buffers(n)[0]
        count = 0
        used = 0
        if self._fill:
            take = min(w - self._fill, n)
            self._partial[self._fill:self._fill + take] = x[:take]
            self._fill += take
            used = take
            if self._fill < w:
                return sums, 0
            lockstat.window_sums(self._partial, self._power, *self._rot, w, self._sps, sums)
            count = 1
            self._fill = 0
        whole = (n - used) // w
        if whole:
            lockstat.window_sums(x[used:used + whole * w], self._power, *self._rot, w, self._sps,
                                 sums[count:])
            count += whole
        rest = n - used - whole * w
        if rest:
            self._partial[:rest] = x[n - rest:]
            self._fill = rest
        return sums, count

    def _detect(self, x, n, held):
        """Decide the windows completed in ``x``; fill the held outputs, place tags, publish."""
        start = self.nitems_read(0)
        w = self._window
        first_end = (start // w + 1) * w - 1 - start  # relative index of the next window end
        sums, k = self._window_sums(x, n)
        upstream = self._upstream_tags(n)
        if k == 0:
            for out, value in zip(held, (self._metric, self._esn0_db)):
                out[:] = value
            self._apply_tags(upstream)
            return
        _, metric, q_metric, esn0_db, decisions, phases = self._buffers(n)
        before = self._locked_state
        lockstat.decide_windows(sums, k, self._symbols, self._sps, self._reference, self._phase_power,
                                self._on_table, self._off_table, before, metric, q_metric, esn0_db,
                                decisions, phases)
        ends = first_end + w * np.arange(k)         # relative indices of the windows' last samples
        for out, values, last in zip(held, (metric, esn0_db), (self._metric, self._esn0_db)):
            out[:ends[0]] = last
            for i in range(k):
                out[ends[i]:ends[i] + w] = values[i]

        previous = np.concatenate(([before], decisions[:k - 1]))
        changed = set(np.flatnonzero(decisions[:k] != previous).tolist())
        periodic = set()
        if self._status_interval:
            win_start = start + ends[:k] - (w - 1)
            below = (win_start + w - 1) // self._status_interval
            above = (win_start - 1) // self._status_interval
            periodic = set(np.flatnonzero((below > above) | (win_start == 0)).tolist())

        # state first, so it stays consistent whatever happens while publishing
        self._locked_state = bool(decisions[k - 1])
        self._metric = float(metric[k - 1])
        self._esn0_db = float(esn0_db[k - 1])
        self._phase = int(phases[k - 1])
        for i in sorted(changed | periodic):
            sample = start + int(ends[i])
            upstream = self._apply_tags(upstream, sample)
            d = metadata.status_dict(decisions[i], metric[i], esn0_db[i], sample,
                                     metadata.elapsed_time_s(self._rx_origin, sample, self._fs),
                                     sample - (w - 1), self._freq_hz)
            if i in changed:
                self.add_item_tag(0, sample, metadata.CARRIER_LOCK_PMT,
                                  pmt.from_bool(bool(decisions[i])), self._srcid)
            if i in periodic:
                self.add_item_tag(0, sample, metadata.CARRIER_STATUS_PMT, d, self._srcid)
            self.message_port_pub(metadata.STATUS_PORT_PMT, d)
        self._apply_tags(upstream)

    def _upstream_tags(self, n):
        """rx_time and carrier_freq tags in this call, sorted by offset."""
        tags = list(self.get_tags_in_window(0, 0, n, metadata.RX_TIME_PMT))
        tags += list(self.get_tags_in_window(0, 0, n, metadata.CARRIER_FREQ_PMT))
        tags.sort(key=lambda t: t.offset)
        return tags

    def _apply_tags(self, tags, upto=None):
        """Take in the upstream tags at or before absolute offset ``upto`` (all if None);
        returns the tags after it."""
        i = 0
        for tag in tags:
            if upto is not None and tag.offset > upto:
                break
            i += 1
            if pmt.eq(tag.key, metadata.RX_TIME_PMT):
                t = metadata.decode_rx_time(tag.value)
                if t is not None:
                    self._rx_origin = (tag.offset, t[0], t[1])
            else:
                f = _tag_double(tag.value)
                if f is not None:
                    self._freq_hz = f
        return tags[i:]
