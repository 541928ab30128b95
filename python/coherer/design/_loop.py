# SPDX-License-Identifier: GPL-3.0-or-later
"""The loop design the blocks use: :class:`LoopDesign` and :func:`design_loop` (rates in
samples/s, bandwidths in Hz, gains per unit detector gain)."""

from dataclasses import dataclass

import numpy as np
from scipy import optimize

from ..arguments import validate_spec
from ._bandwidth import noise_bandwidth_bt, steady_phase_error
from ._gains import loop_formulas, loop_gains, padded_gains

#: Longest update block, samples (a power of two).
MAX_UPDATE_BLOCK = 64
#: Update blocks are at most this long in units of 1 / B_L: B_L L T <= 1/32, where the
#: block's half-block delay still changes the loop little (REFERENCES 1.4) and the designer
#: includes it exactly.
BLOCK_BT = 1.0 / 32.0


def update_block(bt, most=MAX_UPDATE_BLOCK):
    """Update block length for a loop of B_L T = ``bt``: the longest power of two L, at most
    ``most``, with ``L bt <= BLOCK_BT`` (1 for wide loops: an update every sample)."""
    block = 1
    while 2 * block <= most and 2 * block * bt <= BLOCK_BT:
        block *= 2
    return block


@dataclass(frozen=True)
class LoopDesign:
    """A complete loop design. ``g_gains`` is the loop filter as a gain vector, its length the
    loop order; ``k1, k2, k3`` are the kernel's three gain slots per unit detector gain (the kernel
    multiplies the normalised detector output, mean ``sin(M phi)``, by them; 0 beyond the order)."""
    sample_rate: float     #: samples/s
    power: int             #: symmetry order M
    noise_bw_hz: float     #: requested one-sided loop noise bandwidth B_L, Hz
    damping: float         #: damping factor zeta
    loop_order: int        #: 1, 2 or 3
    design_bt: float       #: B_L T fed to the textbook mapping
    actual_bt: float       #: exact noise bandwidth of the discrete loop, B_L T
    g_gains: tuple         #: (gK1, ..., gK_order), loop-gain products with g = M
    k1: float
    k2: float
    k3: float
    block: int = 1         #: update block: the loop filter runs once per this many samples

    @property
    def bt(self):
        """Requested B_L T (dimensionless)."""
        return self.noise_bw_hz / self.sample_rate

    @property
    def natural_frequency(self):
        """Natural frequency wn (rad/s) of the continuous equivalent (2nd order), w0 (3rd order),
        or the closed-loop corner 4 B_L (1st order)."""
        corner = loop_formulas(self.loop_order).corner
        return corner(self.noise_bw_hz, self.design_bt * self.sample_rate, self.damping)

    def ramp_phase_error(self, rate_hz_per_s):
        """Steady-state phase error (rad, carrier-phase units) to a frequency ramp in Hz/s.

        Exact discrete final value ``alpha / (g K2)`` with ``alpha = 2 pi rate / fs^2``
        rad/sample^2 (REFERENCES 2.1); 0 for a 3rd-order loop; unbounded for order 1.
        """
        return steady_phase_error(self.g_gains, self.sample_rate, 2, rate_hz_per_s)

    def frequency_step_error(self, step_hz):
        """Steady-state phase error (rad) after a frequency step (Hz): ``dw / (g K1)`` for order 1, else 0."""
        return steady_phase_error(self.g_gains, self.sample_rate, 1, step_hz)


def design_loop(sample_rate, power, noise_bw_hz, damping=0.707, loop_order=2, exact=True,
                block=None):
    """Design a loop; returns a :class:`LoopDesign`.

    Parameters
    ----------
    sample_rate : float   samples/s
    power : int           symmetry order M (1 pilot, 2 BPSK, 4 QPSK, 8 8PSK)
    noise_bw_hz : float   one-sided loop noise bandwidth B_L, Hz
    damping : float       damping factor zeta (orders 2 and 3)
    loop_order : int      1, 2 or 3
    exact : bool          refine so the discrete loop's actual B_L equals the request
    block : int or None   samples per loop update (a power of two); default
                          :func:`update_block` of B_L T. The actual B_L is that of the loop
                          updated once per block, half-block delay included.
    """
    validate_spec(sample_rate, power, noise_bw_hz, damping, loop_order)
    power, loop_order = int(power), int(loop_order)
    target = noise_bw_hz / sample_rate
    block = update_block(target) if block is None else int(block)
    if block < 1 or block > MAX_UPDATE_BLOCK or block & (block - 1):
        raise ValueError(f"block must be a power of two from 1 to {MAX_UPDATE_BLOCK}, got {block!r}")
    design_bt = target
    if exact:
        def excess(bt):
            return noise_bandwidth_bt(loop_gains(loop_order, bt, damping), block) / target - 1.0
        lo = 0.25 * target
        hi = target
        while excess(hi) < 0.0:          # the mapping can also land low (order 1 never does)
            hi *= 1.25
        design_bt = optimize.brentq(excess, lo, hi, xtol=1e-15 * target, rtol=1e-13)
    g_gains = loop_gains(loop_order, design_bt, damping)
    actual = noise_bandwidth_bt(g_gains, block)
    if not np.isfinite(actual):
        raise ValueError(f"noise_bw_hz={noise_bw_hz!r} gives an unstable discrete loop at this sample rate")
    k1, k2, k3 = (gk / power for gk in padded_gains(g_gains))
    return LoopDesign(float(sample_rate), power, float(noise_bw_hz), float(damping), loop_order,
                      design_bt, actual, g_gains, k1, k2, k3, block)
