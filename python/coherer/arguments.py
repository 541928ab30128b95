# SPDX-License-Identifier: GPL-3.0-or-later
"""Argument rules shared by the blocks, the loop designer, the command line and the GRC
asserts: each check raises ``ValueError`` naming the first argument out of range.

Units: rates in samples/s, bandwidths and frequencies in Hz, angles in rad, windows and
intervals in samples.
"""

import numpy as np

#: Largest B_L * T (noise bandwidth over sample rate) the blocks accept.
MAX_BT = 0.1
#: Largest accepted damping factor.
MAX_DAMPING = 10.0
#: Largest accepted symmetry order M.
MAX_POWER = 16
#: Loop orders the loops implement.
LOOP_ORDERS = (1, 2, 3)

#: Signal placements of the pulse-shape model (see :func:`coherer.design.detector_noise`).
PLACEMENT_CHANNEL = "channel"
PLACEMENT_MATCHED = "matched"
PLACEMENTS = (PLACEMENT_CHANNEL, PLACEMENT_MATCHED)
#: Largest samples per symbol of the pulse-shape model.
MAX_SAMPLES_PER_SYMBOL = 64
#: Largest phase-modulation index (rad) of the residual-carrier model.
MAX_MODULATION_INDEX = 1.4
def validate_spec(sample_rate, power, noise_bw_hz, damping, loop_order):
    """Raise ``ValueError`` naming the first out-of-range (or non-numeric) argument."""
    for name, value in (("sample_rate", sample_rate), ("power", power), ("noise_bw_hz", noise_bw_hz),
                        ("damping", damping), ("loop_order", loop_order)):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            raise ValueError(f"{name} must be a number, got {value!r}")
    if not np.isfinite(sample_rate) or sample_rate <= 0:
        raise ValueError(f"sample_rate must be a positive number of samples/s, got {sample_rate!r}")
    if not np.isfinite(power) or int(power) != power or not 1 <= power <= MAX_POWER:
        raise ValueError(f"power must be an integer in 1..{MAX_POWER}, got {power!r}")
    if not np.isfinite(noise_bw_hz) or noise_bw_hz <= 0:
        raise ValueError(f"noise_bw_hz must be > 0 Hz, got {noise_bw_hz!r}")
    if noise_bw_hz > MAX_BT * sample_rate:
        raise ValueError(
            f"noise_bw_hz must be at most {MAX_BT} * sample_rate = {MAX_BT * sample_rate:g} Hz, got {noise_bw_hz!r}")
    if not np.isfinite(damping) or not 0 < damping <= MAX_DAMPING:
        raise ValueError(f"damping must be in (0, {MAX_DAMPING}], got {damping!r}")
    if loop_order not in LOOP_ORDERS or int(loop_order) != loop_order:
        raise ValueError(f"loop_order must be 1, 2 or 3, got {loop_order!r}")


def validate_signal(power, samples_per_symbol=1, rolloff=0.35, placement=PLACEMENT_CHANNEL,
                    modulation_index=None):
    """Raise ``ValueError`` naming the first out-of-range signal-model argument."""
    n = samples_per_symbol
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or not 1 <= n <= MAX_SAMPLES_PER_SYMBOL:
        raise ValueError(f"samples_per_symbol must be an integer in 1..{MAX_SAMPLES_PER_SYMBOL}, got {n!r}")
    if isinstance(rolloff, bool) or not isinstance(rolloff, (int, float, np.integer, np.floating)) \
            or not 0.0 <= rolloff <= 1.0:
        raise ValueError(f"rolloff must be a number in 0..1, got {rolloff!r}")
    if placement not in PLACEMENTS:
        raise ValueError(f"placement must be one of {', '.join(PLACEMENTS)}, got {placement!r}")
    if modulation_index is not None:
        beta = modulation_index
        if isinstance(beta, bool) or not isinstance(beta, (int, float, np.integer, np.floating)) \
                or not 0.0 <= beta <= MAX_MODULATION_INDEX:
            raise ValueError(f"modulation_index must be a number in 0..{MAX_MODULATION_INDEX} rad, got {beta!r}")
        if power != 1:
            raise ValueError(f"modulation_index applies to a residual carrier (power M = 1) only, got power {power!r}")
