# SPDX-License-Identifier: GPL-3.0-or-later
"""The loop design the blocks use: :class:`LoopDesign` and :func:`design_loop` (rates in
samples/s, bandwidths in Hz, gains per unit detector gain)."""

from dataclasses import dataclass
from math import inf, pi

import numpy as np
from scipy import optimize

from ..arguments import validate_spec
from ._bandwidth import noise_bandwidth_bt
from ._gains import natural_frequency, textbook_gains, third_order_bw_per_w0, third_order_coefficients


# --- the design used by the blocks -----------------------------------------------------

@dataclass(frozen=True)
class LoopDesign:
    """A complete loop design. Gains ``k1, k2, k3`` are per unit detector gain
    (the kernel multiplies the normalised detector output, mean ``sin(M phi)``, by them)."""
    sample_rate: float     #: samples/s
    power: int             #: symmetry order M
    noise_bw_hz: float     #: requested one-sided loop noise bandwidth B_L, Hz
    damping: float         #: damping factor zeta
    loop_order: int        #: 1, 2 or 3
    design_bt: float       #: B_L T fed to the textbook mapping
    actual_bt: float       #: exact noise bandwidth of the discrete loop, B_L T
    g_gains: tuple         #: (gK1, gK2, gK3), loop-gain products with g = M
    k1: float
    k2: float
    k3: float

    @property
    def bt(self):
        """Requested B_L T (dimensionless)."""
        return self.noise_bw_hz / self.sample_rate

    @property
    def natural_frequency(self):
        """Natural frequency wn (rad/s) of the continuous equivalent (2nd order), or w0 (3rd order)."""
        if self.loop_order == 3:
            a3, b3 = third_order_coefficients(self.damping)
            return self.design_bt * self.sample_rate / third_order_bw_per_w0(a3, b3)
        if self.loop_order == 1:
            return 4.0 * self.noise_bw_hz   # first-order loop: closed-loop corner, rad/s
        return natural_frequency(self.design_bt * self.sample_rate, self.damping)

    def ramp_phase_error(self, rate_hz_per_s):
        """Steady-state phase error (rad, carrier-phase units) to a frequency ramp in Hz/s.

        Exact discrete final value ``alpha / (g K2)`` with ``alpha = 2 pi rate / fs^2``
        rad/sample^2 (REFERENCES 2.1); 0 for a 3rd-order loop; unbounded for order 1.
        """
        if rate_hz_per_s == 0.0:
            return 0.0
        if self.loop_order == 1:
            return inf
        if self.loop_order == 3:
            return 0.0
        alpha = 2.0 * pi * rate_hz_per_s / self.sample_rate ** 2
        return alpha / self.g_gains[1]

    def frequency_step_error(self, step_hz):
        """Steady-state phase error (rad) after a frequency step (Hz): ``dw / (g K1)`` for order 1, else 0."""
        if self.loop_order != 1 or step_hz == 0.0:
            return 0.0
        return 2.0 * pi * step_hz / self.sample_rate / self.g_gains[0]



def design_loop(sample_rate, power, noise_bw_hz, damping=0.707, loop_order=2, exact=True):
    """Design a loop; returns a :class:`LoopDesign`.

    Parameters
    ----------
    sample_rate : float   samples/s (the loop updates once per sample)
    power : int           symmetry order M (1 pilot, 2 BPSK, 4 QPSK, 8 8PSK)
    noise_bw_hz : float   one-sided loop noise bandwidth B_L, Hz
    damping : float       damping factor zeta (orders 2 and 3)
    loop_order : int      1, 2 or 3
    exact : bool          refine so the discrete loop's actual B_L equals the request
    """
    validate_spec(sample_rate, power, noise_bw_hz, damping, loop_order)
    power, loop_order = int(power), int(loop_order)
    target = noise_bw_hz / sample_rate
    design_bt = target
    if exact:
        def excess(bt):
            return noise_bandwidth_bt(textbook_gains(loop_order, bt, damping)) / target - 1.0
        lo = 0.25 * target
        hi = target
        while excess(hi) < 0.0:          # the mapping can also land low (order 1 never does)
            hi *= 1.25
        design_bt = optimize.brentq(excess, lo, hi, xtol=1e-15 * target, rtol=1e-13)
    g_gains = textbook_gains(loop_order, design_bt, damping)
    actual = noise_bandwidth_bt(g_gains)
    if not np.isfinite(actual):
        raise ValueError(f"noise_bw_hz={noise_bw_hz!r} gives an unstable discrete loop at this sample rate")
    k1, k2, k3 = (gk / power for gk in g_gains)
    return LoopDesign(float(sample_rate), power, float(noise_bw_hz), float(damping), loop_order,
                      design_bt, actual, tuple(g_gains), k1, k2, k3)
