# SPDX-License-Identifier: GPL-3.0-or-later
"""Feed-forward M-th power (Viterbi & Viterbi) carrier-phase estimation block for bursts."""

from math import pi

import numpy as np
import pmt
from gnuradio import gr

from . import _feedforward_kernel as K
from . import arguments
from ._long_calls import request_long_calls
from .mth_power_loop_cc import default_point_angle

#: Largest accepted window, samples.
MAX_WINDOW = arguments.MAX_FEEDFORWARD_WINDOW

#: Names accepted for ``weighting`` and the kernel code of each.
WEIGHTINGS = {
    "power": K.WEIGHT_POWER,          # F(|z|) = |z|^M: the sum of z^M
    "magnitude": K.WEIGHT_MAGNITUDE,  # F(|z|) = |z|
    "phase": K.WEIGHT_PHASE,          # F(|z|) = 1: phase only
}


def default_weighting(power):
    """The weighting with the lower small-error variance at the SNRs each M is used at.

    ``"power"`` for M = 1 and 2 (for M = 1 the sum of z is the maximum-likelihood
    estimate and meets the MCRB; for M = 2 it is as good as phase-only above 6 dB
    and better below), ``"phase"`` for M >= 3 (REFERENCES 6.1: at M = 4, 10 dB the
    variance is 1.14 x MCRB against 1.51 x for |z|^M; at M = 8, 15 dB 1.19 x against
    2.13 x). |z|^M only wins again at SNRs below about 3 dB (M = 4) or 5 dB (M = 8).
    """
    return "power" if power <= 2 else "phase"


class mth_power_feedforward_cc(gr.sync_block):
    """Feed-forward M-th power carrier-phase estimator (Viterbi & Viterbi 1983) for bursts.

    For every sample the carrier phase is estimated from the ``window`` samples
    centred on it::

        theta^ = arg( sum F(|z|) e^{j M arg z} e^{-j M point_angle} ) / M

    and unwrapped from sample to sample so that it never jumps by 2 pi / M
    (each new estimate is taken within +-pi/M of the previous one). There is no
    acquisition transient and no hang-up; a constant phase ambiguity of a
    multiple of 2 pi / M remains (resolve it downstream, e.g. with a unique word).

    Args:
        sample_rate: input rate, samples/s (used only to express frequency in Hz).
        power: symmetry order M, 1..16 (1 pilot/residual carrier, 2 BPSK, 4 QPSK, 8 8PSK).
        window: number of samples per estimate, 1..65536. The small-error variance
            is var_1 / window, var_1 the per-sample value for the weighting
            (``|z|^M``: V_M / (2 M^2); phase only: (1 - c_2M) / (2 M^2 c_M^2)).
        point_angle: angle (rad) of one constellation point after correction;
            default 0 (M = 1, 2, 8) or pi/4 (M = 4), as the loops.
        weighting: F, the weight of each sample's M-fold phase: ``"power"`` (|z|^M),
            ``"magnitude"`` (|z|) or ``"phase"`` (1, phase only); default
            :func:`default_weighting` (``"power"`` for M <= 2, ``"phase"`` above).
        reset_tag_key: key (string) of a stream tag marking the first sample of a
            new burst (e.g. from a burst detector or frame sync); from that sample
            on the window holds only the new burst's samples, so each burst is
            estimated on its own. None or "" = no resets.
        diagnostics: add outputs 1-3 as the loops: reference e^{j theta^} (complex),
            frequency estimate in Hz (float), phase estimate theta^ in rad,
            (-pi, pi] (float). They are optional: connect 1, 1-2 or 1-3 (in order).

    Delay: output sample n is input sample n - window // 2 times e^{-j theta^}
    (the window needs the samples after it); the first window // 2 output
    samples are 0. The delay is declared to GNU Radio (``declare_sample_delay``),
    so every upstream tag leaves on all outputs window // 2 samples later, on the
    sample it was attached to. At the end of a finite stream the last window // 2
    input samples (and their tags) stay inside the block. For odd ``window``
    the estimate is centred exactly; for even ``window`` it is centred half a
    sample late (a bias of pi f rad under a frequency offset of f cycles/sample).

    Frequency offset: a residual offset f (cycles/sample) shrinks the window sum
    by sin(pi f M W) / (W sin(pi f M)) but does not bias an odd window. Up to
    |f| <= 1 / (4 M window) (loss <= 0.9 dB) the estimate tracks the phase
    without slips wherever the estimator itself is above threshold. The
    frequency output (diagnostics) is the phase advance over the last ``window``
    estimates divided by ``window``, centred on the output sample; it is
    unambiguous for |f| < 1 / (2 window) and 0 on the first sample after a reset.

    Bursts: at a reset tag the input samples still waiting in the delay (the
    last window // 2 before the tag) are corrected with the last estimate of
    their own segment; the new segment starts with a window that grows from
    window // 2 + 1 samples to ``window`` and with the principal value of the
    estimate (so each burst carries its own 2 pi / M ambiguity).

    Input samples that are NaN, Inf or exactly zero are gaps: they add nothing
    to the window sum and their output sample is 0 (counted by ``gap_samples()``).
    With the ``power`` or ``magnitude`` weighting a huge sample dominates the
    windows that contain it (that is the estimator); it leaves no trace once it
    is out of the window (the sums are never formed by subtraction), apart from
    a possible change of the 2 pi / M ambiguity. ``phase`` weighting ignores
    amplitude. For ``power``, amplitudes above 10^(294/M) are weighted as 10^(294/M).

    Throughput: the block asks GNU Radio for calls of up to 131072 samples
    (see ``_long_calls``), because a Python block pays a fixed cost per call.
    Unconnected diagnostic outputs cost nothing.
    """

    def __init__(self, sample_rate, power, window, point_angle=None, weighting=None,
                 reset_tag_key=None, diagnostics=False):
        power, window = arguments.feedforward_arguments(sample_rate, power, window, point_angle)
        if point_angle is None:
            point_angle = default_point_angle(power)
        if weighting is None:
            weighting = default_weighting(power)
        if not isinstance(weighting, str) or weighting not in WEIGHTINGS:
            raise ValueError(f"weighting must be one of {sorted(WEIGHTINGS)} or None, got {weighting!r}")
        if reset_tag_key in (None, ""):
            reset_tag_key = None
        elif not isinstance(reset_tag_key, str):
            raise ValueError(f"reset_tag_key must be a tag key string, '' or None, got {reset_tag_key!r}")

        self._fs = float(sample_rate)
        self._power = power
        self._window = window
        self._delay = window // 2
        self._point_angle = float(point_angle)
        self._weighting = weighting
        self._reset_key = reset_tag_key
        self._reset_key_pmt = pmt.intern(reset_tag_key) if reset_tag_key else None
        self._diagnostics = bool(diagnostics)

        out_sig = [np.complex64]
        if self._diagnostics:       # outputs 1-3 optional (connect them in order)
            out_sig = gr.py_io_signature(1, 4, [np.complex64, np.complex64, np.float32, np.float32])
        gr.sync_block.__init__(self, name="mth_power_feedforward_cc", in_sig=[np.complex64],
                               out_sig=out_sig)
        # upstream tags (and the reset tags this block reads) are moved by the delay
        self.declare_sample_delay(self._delay)
        self._skip = request_long_calls(self)  # leading history samples work() skips

        rot = np.exp(-1j * power * self._point_angle)
        roots = np.exp(2j * pi * np.arange(power) / power)
        self._consts = (power, window, WEIGHTINGS[weighting], float(rot.real), float(rot.imag),
                        np.ascontiguousarray(roots.real), np.ascontiguousarray(roots.imag))
        self._state = K.new_state()
        self._buffers = K.FeedforwardBuffers(window)
        self._empty_c = np.zeros(0, np.complex64)
        self._empty_f = np.zeros(0, np.float32)
        self._no_resets = np.zeros(0, np.int64)
        self._warm_up()

    # --- helpers -------------------------------------------------------------------
    def _run_kernel(self, x, out, state, buffers, consts, diag, resets):
        """``diag``: the connected diagnostic outputs (ref, freq, phase), possibly fewer."""
        empties = (self._empty_c, self._empty_f, self._empty_f)
        ref, freq, phase = tuple(diag) + empties[len(diag):]
        power, window, weighting, rot_re, rot_im, roots_re, roots_im = consts
        K.feedforward(x, out, ref, freq, phase, resets, state, *buffers.arrays(),
                      power, window, weighting, rot_re, rot_im, roots_re, roots_im)

    def _warm_up(self):
        """Compile the kernel now rather than in the first work() call."""
        x = np.ones(4, np.complex64)
        consts = (self._power, 1) + self._consts[2:]
        diag = (np.empty(4, np.complex64), np.empty(4, np.float32), np.empty(4, np.float32))
        for d in ((), diag):
            self._run_kernel(x, np.empty(4, np.complex64), K.new_state(), K.FeedforwardBuffers(1),
                             consts, d, self._no_resets)

    # --- getters ---------------------------------------------------------------------
    def window(self):
        """Samples per estimate."""
        return self._window

    def delay(self):
        """Delay from input to output, samples (window // 2)."""
        return self._delay

    def weighting(self):
        """The weighting in use: "power", "magnitude" or "phase"."""
        return self._weighting

    def reset_tag_key(self):
        """Key of the stream tag that starts a new burst, or None."""
        return self._reset_key

    def point_angle(self):
        """Angle of one constellation point after correction, rad."""
        return self._point_angle

    def phase(self):
        """Latest phase estimate theta^ (window ending at the newest input sample), rad in (-pi, pi]."""
        return float(np.arctan2(self._state[K.S_P_IM], self._state[K.S_P_RE]))

    def gap_samples(self):
        """Number of input samples treated as gaps (NaN, Inf or zero) so far."""
        return int(self._state[K.S_GAPS])

    # --- streaming -------------------------------------------------------------------
    def work(self, input_items, output_items):
        x = input_items[0][self._skip:]           # skip the (unused) history
        n = len(x)
        resets = self._no_resets
        if self._reset_key_pmt is not None:
            start = self.nitems_read(0)
            d = self._delay
            # with a declared delay, tag offsets (and the range asked for) are shifted by d
            tags = self.get_tags_in_range(0, start + d, start + n + d, self._reset_key_pmt)
            if tags:
                resets = np.array(sorted({t.offset - d - start for t in tags}), dtype=np.int64)
        diag = output_items[1:]
        self._run_kernel(x, output_items[0], self._state, self._buffers, self._consts, diag, resets)
        if len(diag) > 1:
            np.multiply(diag[1], self._fs / (2.0 * pi), out=diag[1])   # rad/sample -> Hz
        return n
