# SPDX-License-Identifier: GPL-3.0-or-later
"""Squaring loop for BPSK: the M-th power loop with M = 2."""

from .mth_power_loop_cc import mth_power_loop_cc


class squaring_loop_cc(mth_power_loop_cc):
    """Squaring-loop carrier recovery for BPSK (``mth_power_loop_cc`` with power = 2).

    Args:
        sample_rate: input rate, samples/s.
        noise_bw_hz: one-sided loop noise bandwidth B_L, Hz (actual bandwidth equals it).
        damping: damping factor zeta (orders 2 and 3).
        loop_order: 1, 2 or 3.
        freq_guess_hz: initial NCO frequency, Hz.
        freq_range_hz: NCO held within +-this, Hz; default and maximum sample_rate/4.
        acquire: estimate the offset from the spectrum of z^2 while unlocked.
        point_angle: angle (rad) of one BPSK point after correction (default 0).
        tag_interval: ``carrier_freq`` tag every this many samples (0 = never).
        diagnostics: add reference, frequency (Hz) and phase-error (rad) outputs.

    Everything else (tags, ``command`` port, setters, getters) as ``mth_power_loop_cc``.
    """

    def __init__(self, sample_rate, noise_bw_hz, damping=0.707, loop_order=2,
                 freq_guess_hz=0.0, freq_range_hz=None, acquire=True, point_angle=0.0,
                 tag_interval=0, diagnostics=False):
        mth_power_loop_cc.__init__(
            self, sample_rate, 2, noise_bw_hz, damping=damping, loop_order=loop_order,
            freq_guess_hz=freq_guess_hz, freq_range_hz=freq_range_hz, acquire=acquire,
            point_angle=point_angle, tag_interval=tag_interval, diagnostics=diagnostics,
            name="squaring_loop_cc")
