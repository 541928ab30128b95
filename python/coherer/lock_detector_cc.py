# SPDX-License-Identifier: GPL-3.0-or-later
"""Carrier lock detector: pass-through block that publishes lock state, lock
metric and Es/N0 as stream tags and status messages."""

import numpy as np
import pmt
from gnuradio import gr

from . import lockstat, metadata
from ._long_calls import request_long_calls
from .design import MAX_POWER
from .mth_power_loop_cc import default_point_angle

#: Accepted window lengths, samples.
MIN_WINDOW = 32
MAX_WINDOW = 1 << 20


def _real(name, value):
    """``float(value)``, or ValueError naming the parameter if it is not a real number."""
    try:
        return float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a real number, got {value!r}") from None


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

    The output is the input, sample for sample, with every upstream tag kept.
    Decisions are made on non-overlapping windows of ``window`` samples aligned
    to absolute stream offsets 0, window, 2 window, ...

    Args:
        sample_rate: input rate, samples/s (for ``time_s``).
        power: symmetry order M, 1..16 (1 pilot, 2 BPSK, 4 QPSK, 8 8PSK).
        window: samples per decision, 32..2^20.
        lock_threshold: metric at or above which an unlocked detector declares lock;
            default ``Qinv(1e-6)/sqrt(2 window)`` (noise-only false lock <= 1e-6 per window).
        unlock_threshold: metric below which a locked detector declares loss of lock,
            in [0, lock_threshold]; default ``Qinv(1e-2)/sqrt(2 window)`` (noise holds
            a lock for another window with probability <= 1e-2), capped at lock_threshold.
        point_angle: angle (rad) of one constellation point in the input; default
            0 (M = 1, 2, 8) or pi/4 (M = 4), as the carrier loops output.
        status_interval: add a ``carrier_status`` tag and publish a status message
            at every absolute offset that is a multiple of this (samples; 0 = never,
            else at least ``window``: one status per decided window at most).

    Lock metric (REFERENCES 7.1-7.2): ``P = (1/N) sum cos(M (arg y - point_angle))``,
    the normalised projection of (y/|y|)^M onto the constellation axis. Its mean is
    ``cos(M phi) c_M(Es/N0)`` (about 1 locked at high SNR); on noise alone, or on
    a signal rotating against the reference, its mean is 0 and its variance exactly
    ``1/(2N)`` for every M, so ``gamma = Qinv(P_FA)/sqrt(2N)`` gives false-lock
    probability P_FA per window (Gaussian approximation). Unlocked -> locked when
    ``P >= lock_threshold``; locked -> unlocked when ``P < unlock_threshold``.
    Es/N0 is the M2M4 estimate (Pauluzzi & Beaulieu 2000) over the same window,
    in dB, clamped to [-60, 100] dB. NaN, Inf and zero samples are gaps: passed
    through unchanged, they count toward the window but add nothing to it.

    Metadata (names from ``coherer.metadata``):
        ``carrier_lock`` tag (pmt bool) at every change of state, on the first
        sample of the window that decided it. ``carrier_status`` tag (pmt dict)
        every ``status_interval`` samples. Message port ``status``: the same
        dict at every change of state and every status interval (one message
        when both fall on one sample). Dict keys: ``locked`` (bool, the
        decision of the window containing ``sample``), ``metric``, ``esn0_db``
        (that window's values), ``sample`` (uint64 offset), ``time_s`` (rx_time
        of the latest upstream ``rx_time`` tag at or before ``sample`` plus the
        elapsed samples / sample_rate; else sample / sample_rate), ``freq_hz``
        (latest upstream ``carrier_freq`` tag at or before ``sample``; absent if
        none).

    Getters: ``locked()``, ``metric()``, ``esn0_db()`` (latest decided window;
    NaN before the first), ``lock_threshold()``, ``unlock_threshold()``, ``window()``.

    Samples are released in whole windows (the decision for a window is needed
    before its first sample leaves the block), so a finite stream's last
    incomplete window, fewer than ``window`` samples, is not passed on.
    To keep the per-call cost of a Python block low the block asks GNU Radio for
    calls of up to 131072 samples (an unused input history enlarges the upstream
    buffer); decisions never depend on how the stream is split into calls.
    The lock indicator is a statistical decision, not a safety-of-life signal.
    """

    def __init__(self, sample_rate, power, window=1024, lock_threshold=None, unlock_threshold=None,
                 point_angle=None, status_interval=0, name="lock_detector_cc"):
        sample_rate, power, window = (_real(k, v) for k, v in
                                      (("sample_rate", sample_rate), ("power", power), ("window", window)))
        status_interval = _real("status_interval", status_interval)
        if lock_threshold is not None:
            lock_threshold = _real("lock_threshold", lock_threshold)
        if unlock_threshold is not None:
            unlock_threshold = _real("unlock_threshold", unlock_threshold)
        if point_angle is not None:
            point_angle = _real("point_angle", point_angle)
        if not np.isfinite(sample_rate) or sample_rate <= 0:
            raise ValueError(f"sample_rate must be a positive number of samples/s, got {sample_rate!r}")
        if not np.isfinite(power) or int(power) != power or not 1 <= power <= MAX_POWER:
            raise ValueError(f"power must be an integer in 1..{MAX_POWER}, got {power!r}")
        if not np.isfinite(window) or int(window) != window or not MIN_WINDOW <= window <= MAX_WINDOW:
            raise ValueError(f"window must be an integer in {MIN_WINDOW}..{MAX_WINDOW} samples, got {window!r}")
        power, window = int(power), int(window)
        default_lock, default_unlock = lockstat.default_thresholds(window)
        if lock_threshold is None:
            lock_threshold = default_lock
        if not np.isfinite(lock_threshold) or not 0.0 < lock_threshold <= 1.0:
            raise ValueError(f"lock_threshold must be in (0, 1], got {lock_threshold!r}")
        if unlock_threshold is None:
            unlock_threshold = min(default_unlock, lock_threshold)
        if not np.isfinite(unlock_threshold) or not 0.0 <= unlock_threshold <= lock_threshold:
            raise ValueError(
                f"unlock_threshold must be in [0, lock_threshold] = [0, {lock_threshold:g}], got {unlock_threshold!r}")
        if point_angle is None:
            point_angle = default_point_angle(power)
        if not np.isfinite(point_angle):
            raise ValueError(f"point_angle must be a finite angle in rad, got {point_angle!r}")
        if (not np.isfinite(status_interval) or int(status_interval) != status_interval
                or (status_interval != 0 and status_interval < window)):
            raise ValueError(
                f"status_interval must be 0 (off) or an integer >= window = {window} samples, got {status_interval!r}")

        gr.sync_block.__init__(self, name=name, in_sig=[np.complex64], out_sig=[np.complex64])
        self._fs = float(sample_rate)
        self._power = power
        self._window = window
        self._lock_thr = float(lock_threshold)
        self._unlock_thr = float(unlock_threshold)
        self._point_angle = float(point_angle)
        rot = np.exp(-1j * power * self._point_angle)
        self._rot = (float(rot.real), float(rot.imag))
        self._status_interval = int(status_interval)

        # Whole windows per call, so a window's decision exists before its first sample leaves.
        self.set_output_multiple(window)
        self._skip = request_long_calls(self, multiple=window)  # leading history samples work() skips
        self.message_port_register_out(metadata.STATUS_PORT_PMT)

        self._windows_done = 0                 # absolute index of the next window to complete
        self._locked_state = False
        self._metric = float("nan")
        self._esn0_db = float("nan")
        self._next_status = 0                  # next absolute offset for an interval status
        self._rx_origin = None                 # (tag offset, whole seconds, fraction)
        self._freq_hz = None
        self._srcid = pmt.intern(name)
        self._bufs = None
        self._failed = False                   # an unexpected error was logged once
        self._warm_up()

    # --- helpers -------------------------------------------------------------------
    def _warm_up(self):
        """Compile the kernels now rather than in the first work() call."""
        x = np.ones(2 * MIN_WINDOW, np.complex64)
        bufs = [np.zeros(3) for _ in range(6)]
        k = lockstat.window_sums(x, self._power, *self._rot, MIN_WINDOW, *bufs[:4])
        lockstat.decide_windows(*bufs[:4], k, MIN_WINDOW, 0.5, 0.25, False, *bufs[4:], np.zeros(3, np.bool_))

    def start(self):
        """Tags carry the block's alias (its GRC id) as source id."""
        self._srcid = pmt.intern(self.alias())
        return True

    def set_max_noutput_items(self, m):
        """Cap items per call; rounded down to whole windows (at least one window),
        since the block only ever processes whole windows."""
        m = int(m)
        self.gateway.set_max_noutput_items(max(self._window, m - m % self._window))

    # --- getters ---------------------------------------------------------------------
    def locked(self):
        """Lock decision of the latest completed window (False before the first)."""
        return self._locked_state

    def metric(self):
        """Lock metric P of the latest completed window (NaN before the first)."""
        return self._metric

    def esn0_db(self):
        """M2M4 Es/N0 estimate of the latest completed window, dB (NaN before the first)."""
        return self._esn0_db

    def lock_threshold(self):
        """Metric at or above which lock is declared."""
        return self._lock_thr

    def unlock_threshold(self):
        """Metric below which a declared lock is dropped."""
        return self._unlock_thr

    def window(self):
        """Samples per decision."""
        return self._window

    # --- streaming -------------------------------------------------------------------
    def _buffers(self, n):
        """Per-window work arrays with room for the windows in ``n`` samples."""
        need = n // self._window + 1
        if self._bufs is None or len(self._bufs[0]) < need:
            self._bufs = tuple(np.empty(need) for _ in range(6)) + (np.empty(need, np.bool_),)
        return self._bufs

    def work(self, input_items, output_items):
        x = input_items[0][self._skip:]            # skip the unused history
        n = len(x)
        output_items[0][:] = x
        try:
            self._detect(x, n)
        except Exception as exc:                   # noqa: BLE001 - work() must never raise
            if not self._failed:
                self.logger.error(f"lock detection failed, samples still passed through: {exc!r}")
            self._failed = True
        return n

    def _detect(self, x, n):
        """Decide the windows completed in ``x``; place tags and publish messages."""
        if n % self._window:                       # the output multiple rules this out
            raise RuntimeError(f"work() got {n} samples, not a whole number of {self._window}-sample windows")
        proj, m2, m4, valid, metric, esn0_db, decisions = self._buffers(n)
        k = lockstat.window_sums(x, self._power, self._rot[0], self._rot[1], self._window,
                                 proj, m2, m4, valid)
        upstream = self._upstream_tags(n)
        if k == 0:
            self._apply_tags(upstream)
            return
        before = self._locked_state
        lockstat.decide_windows(proj, m2, m4, valid, k, self._window, self._lock_thr,
                                self._unlock_thr, before, metric, esn0_db, decisions)
        first = self._windows_done
        w = self._window

        # events: state changes (at window starts) and interval statuses
        change_at = set()
        if decisions[0] != before or (k > 1 and np.any(decisions[1:k] != decisions[:k - 1])):
            previous = np.concatenate(([before], decisions[:k - 1]))
            change_at = {(first + int(i)) * w for i in np.flatnonzero(decisions[:k] != previous)}
        end = (first + k) * w
        status_at = set()
        if self._status_interval and self._next_status < end:
            status_at = set(range(self._next_status, end, self._status_interval))
            self._next_status = max(status_at) + self._status_interval

        # state first, so it stays consistent whatever happens while publishing
        self._windows_done = first + k
        self._locked_state = bool(decisions[k - 1])
        self._metric = float(metric[k - 1])
        self._esn0_db = float(esn0_db[k - 1])
        if change_at or status_at:
            self._publish(sorted(change_at | status_at), change_at, status_at, upstream,
                          first, metric, esn0_db, decisions)
        else:
            self._apply_tags(upstream)

    def _upstream_tags(self, n):
        """rx_time and carrier_freq tags in this call, sorted by offset."""
        tags = list(self.get_tags_in_window(0, 0, n, metadata.RX_TIME_PMT))
        tags += list(self.get_tags_in_window(0, 0, n, metadata.CARRIER_FREQ_PMT))
        tags.sort(key=lambda t: t.offset)
        return tags

    def _apply_tags(self, tags):
        for tag in tags:
            if pmt.eq(tag.key, metadata.RX_TIME_PMT):
                t = metadata.decode_rx_time(tag.value)
                if t is not None:
                    self._rx_origin = (tag.offset, t[0], t[1])
            else:
                f = _tag_double(tag.value)
                if f is not None:
                    self._freq_hz = f

    def _publish(self, samples, change_at, status_at, upstream, first, metric, esn0_db, decisions):
        """Add tags and publish messages for each event sample, in stream order."""
        pending = 0
        for sample in samples:
            while pending < len(upstream) and upstream[pending].offset <= sample:
                pending += 1
            self._apply_tags(upstream[:pending])
            upstream = upstream[pending:]
            pending = 0
            i = sample // self._window - first
            d = metadata.status_dict(decisions[i], metric[i], esn0_db[i], sample,
                                     metadata.elapsed_time_s(self._rx_origin, sample, self._fs),
                                     self._freq_hz)
            if sample in change_at:
                self.add_item_tag(0, sample, metadata.CARRIER_LOCK_PMT,
                                  pmt.from_bool(bool(decisions[i])), self._srcid)
            if sample in status_at:
                self.add_item_tag(0, sample, metadata.CARRIER_STATUS_PMT, d, self._srcid)
            self.message_port_pub(metadata.STATUS_PORT_PMT, d)
        self._apply_tags(upstream)
