# SPDX-License-Identifier: GPL-3.0-or-later
"""gr-coherer: carrier recovery blocks for GNU Radio.

Blocks
    mth_power_loop_cc         closed-loop M-th power carrier recovery (PLL, squaring, QPSK, 8PSK loops)
    squaring_loop_cc          the same loop with M fixed at 2 (BPSK)

Modules
    design                    loop gains, noise bandwidth and performance predictions
    metadata                  stream-tag, message and status-dict key names
"""

from . import design, metadata
from .mth_power_loop_cc import mth_power_loop_cc
from .squaring_loop_cc import squaring_loop_cc
