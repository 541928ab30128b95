# SPDX-License-Identifier: GPL-3.0-or-later
"""gr-coherer: carrier recovery blocks for GNU Radio.

Blocks
    mth_power_loop_cc         closed-loop M-th power carrier recovery (PLL, squaring, QPSK, 8PSK loops)
    squaring_loop_cc          the same loop with M fixed at 2 (BPSK)
    lock_detector_cc          carrier lock, lock metric and Es/N0 as stream tags and status messages
    mth_power_feedforward_cc  feed-forward M-th power (Viterbi & Viterbi) phase estimation for bursts

Modules
    design                    loop gains, noise bandwidth and performance predictions
    metadata                  stream-tag, message and status-dict key names
    lockstat                  lock statistic, thresholds, detection prediction, M2M4 Es/N0
"""

from . import design, metadata
from .mth_power_loop_cc import mth_power_loop_cc
from .squaring_loop_cc import squaring_loop_cc
from .lock_detector_cc import lock_detector_cc
from .mth_power_feedforward_cc import mth_power_feedforward_cc
