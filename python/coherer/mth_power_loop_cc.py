# SPDX-License-Identifier: GPL-3.0-or-later
"""Closed-loop M-th power carrier recovery block."""

import threading
from math import pi

import numpy as np
import pmt
from gnuradio import gr

from . import _loop_kernel as K
from ._long_calls import request_long_calls
from . import acquisition, arguments, design, lockstat, metadata

#: Default averaging length of the signal-power (M2M4) estimator, samples:
#: at least this many, and at least AVERAGING_PER_BT / (B_L T).
MIN_AVERAGING = 16384
AVERAGING_PER_BT = 32.0
#: Detector normalisation limits: the signal fraction S/M2 used is at least
#: max(MIN_SIGNAL_FRACTION, MAX_GAIN_BOOST^(-2/M)), so the gain boost (M2/S)^(M/2)
#: never exceeds MAX_GAIN_BOOST; the loop closes after START_SAMPLES samples.
MIN_SIGNAL_FRACTION = 1e-4
MAX_GAIN_BOOST = 10.0
START_SAMPLES = 256
#: Internal lock indicator: false-lock probability per window on noise, and the
#: (higher) probability level below which a locked loop is declared unlocked.
LOCK_P_FALSE = 1e-6
UNLOCK_P_LEVEL = 1e-1
#: Averaging length of the M-th power line estimate (the detector gain while locked),
#: samples: LINE_AVERAGING_PER_BT / (B_L T), at least MIN_LINE_AVERAGING.
LINE_AVERAGING_PER_BT = 8.0
MIN_LINE_AVERAGING = 1024
#: Noise bandwidth of the slip tracker's reference, as a fraction of B_L.
SLIP_REFERENCE_BW = 0.05
#: ... and in its settling stages after lock is declared (see _loop_kernel.REF_STAGE_END).
SLIP_REFERENCE_STAGES_BW = (1.0, 0.4, 0.15)
#: Low-pass coefficient, per unit B_L T, of the detector phasor whose angle decides slips
#: while the signal is strong.
SLIP_ANGLE_BETA_PER_BT = 8.0
#: Most events remembered by acquisition_log() and lock_log().
EVENT_LOG = 1000


def _tracker_gains(bt, block):
    """Gains of the slip tracker's 3rd-order reference of noise bandwidth ``bt`` (B_L T),
    updated once per ``block`` samples, in the kernel's units (``reference_slip``): the
    per-block textbook gains ``(g1, g2, g3)`` at ``bt * block`` as ``(g1, g2 / L, g3 / L^2)``."""
    g1, g2, g3 = design.textbook_gains(3, bt * block, 1.0)
    return g1, g2 / block, g3 / (block * block)


def default_point_angle(power):
    """Constellation angle (rad) of one point after correction: pi/4 for QPSK, else 0."""
    return pi / 4.0 if power == 4 else 0.0


class mth_power_loop_cc(gr.sync_block):
    """Closed-loop M-th power carrier recovery (PLL for M = 1, squaring loop for M = 2,
    4th/8th-power loops for QPSK/8PSK).

    Args:
        sample_rate: input rate, samples/s (the loop updates once per update block,
            ``loop_design().block`` samples: 1 for wide loops, up to 64 for narrow ones).
        power: symmetry order M, 1..16 (1 pilot/residual carrier, 2 BPSK, 4 QPSK, 8 8PSK).
        noise_bw_hz: one-sided loop noise bandwidth B_L in Hz (carrier-phase domain).
            The discrete loop's actual noise bandwidth equals this value exactly,
            at any amplitude and SNR (detector normalised by the M2M4 signal estimate).
            At most 0.1 * sample_rate.
        damping: damping factor zeta, (0, 10] (orders 2 and 3).
        loop_order: 1, 2 or 3 (3 follows a frequency ramp with no steady phase error).
        freq_guess_hz: initial NCO frequency, Hz.
        freq_range_hz: the NCO frequency is held within +-this, Hz; default and
            maximum sample_rate / (2 M), the unambiguous range of z^M.
        acquire: wide acquisition. While the internal lock indicator says
            unlocked, at the end of every acquisition block (FFT length: the
            power of two >= 4 / (B_L T), counted from the stream start) the
            offset is estimated from the spectrum of z^M and the NCO is steered
            there. False: a plain loop with its natural pull-in.
        point_angle: angle (rad) of one constellation point after correction;
            default 0 (M = 1, 2, 8) or pi/4 (M = 4).
        tag_interval: add a ``carrier_freq`` tag (pmt double, Hz) every this many
            samples (0 = never).
        diagnostics: add outputs 1-3: reference e^{j theta^} (complex), NCO
            frequency in Hz (float), phase error in rad, carrier-phase units (float).
            They are optional: connect none, 1, 1-2 or 1-3 (in order).

    Output 0 is x e^{-j theta^}. Input samples that are NaN, Inf or exactly zero
    are gaps: the NCO coasts on its frequency and the output sample is 0.

    Detector gain: normalised by an estimate of the M-th power line itself while
    locked (so the loop's actual noise bandwidth is ``noise_bw_hz`` for pulse-shaped,
    oversampled signals and residual carriers too), by the M2M4 signal estimate
    while acquiring (see ``coherer._loop_kernel``).

    Internal lock indicator (``locked()``): the phase-only statistic
    mean cos(M arg y - M point_angle) over windows of a quarter acquisition
    block, decided by the lock detector's rule (``coherer.lockstat.update_lock``):
    lock at a false-lock probability of 1e-6 per window on noise of any spectrum,
    unlock at the 0.1 level.

    Tags: ``cycle_slip`` (pmt long, signed slips in units of 2*pi/M; +1 = the
    NCO phase advanced by 2*pi/M relative to the carrier) on the sample where a
    slip is declared; ``carrier_freq`` (pmt double, Hz) every ``tag_interval``
    samples, and always at every change of the internal lock state (on the last
    sample of the deciding window) and at every acquisition re-steer (on the first
    sample steered), so a reader never holds a frequency older than those events.

    Runtime setters (thread safe): set_noise_bw_hz, set_damping, set_freq_guess_hz.
    The ``command`` message port takes a pmt dict with any of ``noise_bw_hz``,
    ``damping``, ``freq_hz``.
    """

    def __init__(self, sample_rate, power, noise_bw_hz, damping=0.707, loop_order=2,
                 freq_guess_hz=0.0, freq_range_hz=None, acquire=True, point_angle=None,
                 tag_interval=0, diagnostics=False, name="mth_power_loop_cc"):
        self._freq_range, self._tag_interval = arguments.loop_arguments(
            sample_rate, power, noise_bw_hz, damping, loop_order, freq_guess_hz, freq_range_hz,
            point_angle, tag_interval)
        self._fs = float(sample_rate)
        self._power = int(power)
        if point_angle is None:
            point_angle = default_point_angle(self._power)
        self._point_angle = float(point_angle)
        self._diagnostics = bool(diagnostics)
        self._acquire = bool(acquire)

        out_sig = [np.complex64]
        if self._diagnostics:       # outputs 1-3 optional (connect a prefix of them, in order)
            out_sig = gr.py_io_signature(1, 4, [np.complex64, np.complex64, np.float32, np.float32])
        gr.sync_block.__init__(self, name=name, in_sig=[np.complex64], out_sig=out_sig)
        self._skip = request_long_calls(self)  # leading history samples work() skips

        self._lock = threading.Lock()          # serialises setters / message handler
        self._spec = (float(noise_bw_hz), float(damping), int(loop_order))
        # acquisition FFT length and lock window are fixed at construction
        self._nfft = acquisition.fft_length(noise_bw_hz, self._fs)
        self._lock_window = max(64, self._nfft // 4)
        self._on_table = lockstat.threshold_table(self._lock_window, LOCK_P_FALSE)
        self._off_table = lockstat.threshold_table(self._lock_window, UNLOCK_P_LEVEL)
        self._lock_ref = lockstat.new_noise_reference()
        self._acq_buf = np.zeros(self._nfft, np.complex64)
        self._acq_log = []
        self._lock_log = []
        self._design = None
        self._params = None
        self._publish(*self._spec)
        self._state = K.new_state()
        self._set_nco_frequency(self._hz_to_rad(freq_guess_hz))
        self._pending_freq = None              # re-steer request, consumed by work()
        self._empty_c = np.zeros(0, np.complex64)
        self._empty_f = np.zeros(0, np.float32)
        self._empty_i = np.zeros(0, np.int64)
        self._empty_d = np.zeros(0, np.float64)
        self._slip_at = np.zeros(8192, np.int64)
        self._slip_count = np.zeros(8192, np.int64)
        self._lock_at = np.zeros(64, np.int64)
        self._lock_to = np.zeros(64, np.int64)
        self._lock_freq = np.zeros(64)
        self._held_tag = None                  # (offset, Hz) of a re-steer tag for the next call

        self.message_port_register_in(metadata.COMMAND_PORT_PMT)
        self.set_msg_handler(metadata.COMMAND_PORT_PMT, self._handle_command)
        self._warm_up()

    # --- helpers -------------------------------------------------------------------
    def _hz_to_rad(self, hz):
        return 2.0 * pi * float(hz) / self._fs

    def _check_freq(self, name, hz):
        arguments.check_freq_within(name, hz, self._freq_range)

    def _publish(self, noise_bw_hz, damping, loop_order):
        """Design the loop and publish gains in one atomic assignment."""
        bt = float(noise_bw_hz) / self._fs
        block = design.update_block(bt, most=min(design.MAX_UPDATE_BLOCK, self._lock_window // 4))
        d = design.design_loop(self._fs, self._power, noise_bw_hz, damping, loop_order, block=block)
        p = np.zeros(K.PARAMS_SIZE)
        p[K.P_BLOCK] = block
        p[K.P_K1], p[K.P_K2], p[K.P_K3] = d.k1, d.k2, d.k3
        rot = np.exp(-1j * self._power * self._point_angle)
        p[K.P_ROT_RE], p[K.P_ROT_IM] = rot.real, rot.imag
        limit = self._hz_to_rad(self._freq_range)
        p[K.P_FMIN], p[K.P_FMAX] = -limit, limit
        p[K.P_ALPHA] = 1.0 / max(MIN_AVERAGING, AVERAGING_PER_BT / d.bt)
        p[K.P_STEP_IN_FREQ] = 1.0 if loop_order == 1 else 0.0
        p[K.P_LOCK_WINDOW] = self._lock_window
        p[K.P_LINE_ALPHA] = 1.0 / max(MIN_LINE_AVERAGING, LINE_AVERAGING_PER_BT / d.bt)
        p[K.P_REF_G1], p[K.P_REF_G2], p[K.P_REF_G3] = _tracker_gains(SLIP_REFERENCE_BW * d.bt, block)
        beta = min(0.5, SLIP_ANGLE_BETA_PER_BT * d.bt)
        p[K.P_LP_BETA] = beta
        p[K.P_LP_DECIM] = max(1, int(1.0 / (16.0 * beta)))
        p[K.P_BT] = d.bt
        for k, fraction in enumerate(SLIP_REFERENCE_STAGES_BW):
            p[K.P_REF_STAGE_G + 3 * k:K.P_REF_STAGE_G + 3 * k + 3] = _tracker_gains(
                fraction * d.bt, block)
        s_min = max(MIN_SIGNAL_FRACTION, MAX_GAIN_BOOST ** (-2.0 / self._power))
        p[K.P_SIG2_FLOOR] = s_min * s_min
        p[K.P_START_MW] = 1.0 - (1.0 - p[K.P_ALPHA]) ** START_SAMPLES
        p[K.P_E_MAX] = (pi / self._power) / d.k1
        self._params, self._design = p, d      # work() reads self._params once per call

    def _warm_up(self):
        """Compile the kernel now rather than in the first work() call."""
        x = np.ones(4, np.complex64)
        st = K.new_state()
        self._run_kernel(x, np.empty(4, np.complex64), st, self._params, diag=None,
                         lock_ref=lockstat.new_noise_reference())

    def _run_kernel(self, x, out, state, params, diag, marks=None, mark_freq=None,
                    stop_first=0, stop_every=0, lock_ref=None):
        """Run the kernel on ``x`` (stopping early at an unlocked FFT-block end when
        ``stop_every > 0``); returns (samples processed, slips declared, lock changes)."""
        if diag is None:
            ref, freq, err = self._empty_c, self._empty_f, self._empty_f
        else:
            ref, freq, err = diag
        if marks is None:
            marks, mark_freq = self._empty_i, self._empty_d
        if len(self._slip_at) < len(x):
            self._slip_at = np.zeros(len(x), np.int64)
            self._slip_count = np.zeros(len(x), np.int64)
        if len(self._lock_at) < len(x) // self._lock_window + 2:
            self._lock_at = np.zeros(len(x) // self._lock_window + 2, np.int64)
            self._lock_to = np.zeros(len(self._lock_at), np.int64)
            self._lock_freq = np.zeros(len(self._lock_at))
        return K.mth_power_loop(x, out, ref, freq, err, marks, mark_freq,
                                self._slip_at, self._slip_count, self._lock_at, self._lock_to,
                                self._lock_freq, stop_first, stop_every, state, params,
                                self._lock_ref if lock_ref is None else lock_ref,
                                self._on_table, self._off_table, self._power)

    def _set_nco_frequency(self, rad_per_sample):
        """Re-steer the NCO (work() thread only); the slip tracker follows, so it is not a slip."""
        K.steer_nco(self._state, rad_per_sample)

    def _steer(self, sample):
        """End of an acquisition block: if unlocked, estimate the offset from z^M and steer.
        Returns the new frequency (Hz), or None if the NCO was left alone."""
        if self._state[K.S_LOCKED] > 0.0:
            return None
        f = acquisition.estimate_offset(self._acq_buf, self._power, self._fs, self._freq_range)
        if f is None:
            return None
        self._set_nco_frequency(self._hz_to_rad(f))
        self._acq_log.append((int(sample), f))
        del self._acq_log[:-EVENT_LOG]
        return f

    # --- runtime control -------------------------------------------------------------
    def set_noise_bw_hz(self, noise_bw_hz):
        """Change the loop noise bandwidth B_L (Hz) without disturbing the phase."""
        with self._lock:
            _, damping, order = self._spec
            self._publish(float(noise_bw_hz), damping, order)
            self._spec = (float(noise_bw_hz), damping, order)

    def set_damping(self, damping):
        """Change the damping factor zeta without disturbing the phase."""
        with self._lock:
            bw, _, order = self._spec
            self._publish(bw, float(damping), order)
            self._spec = (bw, float(damping), order)

    def set_freq_guess_hz(self, freq_hz):
        """Re-steer the NCO to ``freq_hz`` (Hz) at the next update-block boundary the stream
        reaches (within ``loop_design().block`` samples of the next work() call)."""
        self._check_freq("freq_guess_hz", freq_hz)
        self._pending_freq = self._hz_to_rad(freq_hz)

    def _handle_command(self, msg):
        """``command`` port: pmt dict with any of noise_bw_hz, damping, freq_hz.
        Bad messages are logged and ignored (never raised on the scheduler thread)."""
        try:
            if not pmt.is_dict(msg):
                raise ValueError("command message must be a pmt dict")
            d = pmt.to_python(msg)
            if metadata.CMD_NOISE_BW_HZ in d:
                self.set_noise_bw_hz(float(d[metadata.CMD_NOISE_BW_HZ]))
            if metadata.CMD_DAMPING in d:
                self.set_damping(float(d[metadata.CMD_DAMPING]))
            if metadata.CMD_FREQ_HZ in d:
                self.set_freq_guess_hz(float(d[metadata.CMD_FREQ_HZ]))
        except (ValueError, TypeError) as exc:
            self.logger.warn(f"ignored command {msg}: {exc}")

    # --- getters ---------------------------------------------------------------------
    def noise_bw_hz(self):
        """Loop noise bandwidth B_L, Hz."""
        return self._spec[0]

    def damping(self):
        """Damping factor zeta."""
        return self._spec[1]

    def loop_design(self):
        """The :class:`coherer.design.LoopDesign` in use."""
        return self._design

    def frequency_hz(self):
        """Current NCO frequency estimate, Hz."""
        return float(self._state[K.S_FREQ]) * self._fs / (2.0 * pi)

    def phase(self):
        """Current NCO phase theta^, rad in [-pi, pi)."""
        return float(self._state[K.S_PHASE])

    def locked(self):
        """True when the internal lock indicator says the loop is locked."""
        return bool(self._state[K.S_LOCKED] > 0.0)

    def lock_metric(self):
        """Internal lock statistic of the last complete window (about 1 locked, 0 on noise)."""
        return float(self._state[K.S_METRIC])

    def cycle_slips(self):
        """Signed total of cycle slips declared so far, units of 2*pi/M."""
        return int(self._state[K.S_SLIPS])

    def acquisition_fft_length(self):
        """Samples per acquisition attempt (FFT length); also 4x the lock window."""
        return self._nfft

    def lock_log(self):
        """Recent changes of the internal lock indicator as (absolute sample, locked).
        The sample is the end of the window that decided the change."""
        return list(self._lock_log)

    def acquisition_log(self):
        """Recent steering events as (absolute sample, frequency Hz), oldest first."""
        return list(self._acq_log)

    def gap_samples(self):
        """Number of input samples treated as gaps (NaN, Inf or zero) so far."""
        return int(self._state[K.S_GAPS])

    # --- streaming -------------------------------------------------------------------
    def work(self, input_items, output_items):
        x = input_items[0][self._skip:]          # the history is there only for the buffer size
        n = len(x)
        start = self.nitems_read(0)
        params = self._params
        with_diag = len(output_items) > 1
        nfft = self._nfft
        if self._held_tag is not None:
            self._tag_frequency(*self._held_tag)
            self._held_tag = None
        pos = 0
        while pos < n:
            # a re-steer asked for by setter or message waits for the end of the update block
            # in progress (a block runs at one NCO frequency)
            stop = n
            if self._pending_freq is not None:
                left = K.block_remaining(self._state)
                if left == 0:
                    self._set_nco_frequency(self._pending_freq)
                    self._pending_freq = None
                else:
                    stop = min(n, pos + left)
            # one kernel call for the rest of the buffer; while acquiring it returns at each
            # unlocked FFT-block end so that the NCO can be re-steered there
            end, n_slips, n_locks = self._process(x[:stop], output_items, pos, start, params,
                                                  with_diag)
            hz = self._fs / (2.0 * pi)
            for i in range(n_locks):
                at = start + pos + int(self._lock_at[i])
                self._lock_log.append((at, bool(self._lock_to[i])))
                # a fresh frequency on the last sample of the window that changed the state
                self._tag_frequency(at - 1, float(self._lock_freq[i]) * hz)
            if n_locks:
                del self._lock_log[:-EVENT_LOG]
            if self._acquire:
                self._keep_for_acquisition(x[pos:end], start + pos)
                if (start + end) % nfft == 0:
                    f = self._steer(start + end)
                    if f is not None:         # the new frequency holds from sample start + end on
                        if end < n:
                            self._tag_frequency(start + end, f)
                        else:
                            self._held_tag = (start + end, f)
            pos = end
        return n

    def _tag_frequency(self, offset, freq_hz):
        """A ``carrier_freq`` tag (Hz) at absolute ``offset``."""
        self.add_item_tag(0, int(offset), metadata.CARRIER_FREQ_PMT, pmt.from_double(float(freq_hz)))

    def _keep_for_acquisition(self, seg, offset):
        """Copy ``seg`` (starting at absolute ``offset``) into the ring of the last FFT block:
        at a block end the ring holds that block in order."""
        nfft = self._nfft
        if len(seg) > nfft:
            offset += len(seg) - nfft
            seg = seg[-nfft:]
        first = offset % nfft
        k = min(len(seg), nfft - first)
        self._acq_buf[first:first + k] = seg[:k]
        self._acq_buf[:len(seg) - k] = seg[k:]

    def _process(self, x, output_items, pos, start, params, with_diag):
        """Run the kernel on x[pos:] and place the tags of what it processed; returns
        (end, slips declared, lock changes)."""
        diag = None
        if with_diag:
            outs = [o[pos:] for o in output_items[1:]]
            diag = (outs[0] if len(outs) > 0 else self._empty_c,
                    outs[1] if len(outs) > 1 else self._empty_f,
                    outs[2] if len(outs) > 2 else self._empty_f)
        marks = mark_freq = None
        n = len(x) - pos
        if self._tag_interval:
            first = (-(start + pos)) % self._tag_interval
            marks = np.arange(first, n, self._tag_interval, dtype=np.int64)
            mark_freq = np.empty(len(marks))
        stop_first = stop_every = 0
        if self._acquire:
            stop_every = self._nfft
            stop_first = (-(start + pos)) % self._nfft
        done, n_slips, n_locks = self._run_kernel(x[pos:], output_items[0][pos:], self._state,
                                                  params, diag, marks, mark_freq,
                                                  stop_first, stop_every)
        if diag is not None and len(diag[1]):
            np.multiply(diag[1][:done], self._fs / (2.0 * pi), out=diag[1][:done])   # -> Hz
        base = start + pos
        if marks is not None:
            scale = self._fs / (2.0 * pi)
            for i, f in zip(marks, mark_freq):
                if i >= done:
                    break
                self.add_item_tag(0, base + int(i), metadata.CARRIER_FREQ_PMT,
                                  pmt.from_double(float(f) * scale))
        for i in range(n_slips):
            self.add_item_tag(0, base + int(self._slip_at[i]), metadata.CYCLE_SLIP_PMT,
                              pmt.from_long(int(self._slip_count[i])))
        return pos + done, n_slips, n_locks
