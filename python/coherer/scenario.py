# SPDX-License-Identifier: GPL-3.0-or-later
"""The invented scenario behind ``coherer demo``: a small high-altitude
balloon's BPSK telemetry downlink, as seen at the ground receiver's matched
filter (one complex sample per symbol).

Everything here is made up for the demo: the balloon, the frequency, the
timeline. The scenario knows its own truth (carrier frequency and phase, Es/N0
and the expected events at every sample) so the demo can judge what the
receiver reports.

Timeline (defaults)::

    0.0 s   noise only (transmitter not yet heard)
    1.0 s   carrier appears: +812 Hz crystal offset, Doppler drifting -1.5 Hz/s, Es/N0 12 dB
    11.0 s  deep fade (-30 dB) for 1.2 s while the payload swings into an antenna null
    13.0 s  Es/N0 falls to 4 dB over 2 s and stays there until 21 s, then recovers
            over 1 s (payload antenna pattern null at low elevation)
    23.0 s  the transmitter's crystal jumps +16 Hz (payload heater switching on):
            beyond the loop's pull-out range, so the loop slips while it re-settles
    26.0 s  end
"""

from dataclasses import dataclass
from math import pi

import numpy as np


def _plateau(t, start, fall, end, rise):
    """0 before ``start``, raised-cosine up to 1 over ``fall`` s, 1 until ``end``,
    raised-cosine back to 0 over ``rise`` s."""
    up = np.clip((t - start) / fall, 0.0, 1.0)
    down = np.clip(1.0 - (t - end) / rise, 0.0, 1.0)
    return 0.5 - 0.5 * np.cos(pi * np.minimum(up, down))


@dataclass(frozen=True)
class Stretch:
    """A part of the timeline with steady conditions, for the verdict."""
    name: str
    start_s: float
    end_s: float
    esn0_db: float


@dataclass(frozen=True)
class BalloonScenario:
    """Parameters of the invented downlink (times in s, frequencies in Hz, Es/N0 in dB)."""
    sample_rate: float = 9600.0          #: samples/s = symbols/s
    duration_s: float = 26.0
    center_freq_hz: float = 434.3e6      #: nominal downlink frequency (capture core:frequency)
    signal_on_s: float = 1.0
    offset_hz: float = 812.0             #: crystal offset at t = 0
    drift_hz_per_s: float = -1.5         #: Doppler drift
    esn0_db: float = 12.0
    fade_s: tuple = (11.0, 12.2)
    fade_depth_db: float = 30.0
    fade_edge_s: float = 0.1             #: raised-cosine edge of the fade
    low_snr_s: tuple = (15.0, 21.0)      #: steady low-SNR stretch
    low_edges_s: tuple = (2.0, 1.0)      #: raised-cosine fall before it and rise after it
    low_esn0_db: float = 4.0
    jump_s: float = 23.0                 #: time of the oscillator frequency jump
    jump_hz: float = 16.0
    start_phase: float = 1.0             #: carrier phase at t = 0, rad
    seed: int = 20261201

    @property
    def num_samples(self):
        return int(round(self.duration_s * self.sample_rate))

    def times(self, samples):
        """Times (s) of absolute sample indices."""
        return np.asarray(samples, dtype=np.float64) / self.sample_rate

    def carrier_freq_hz(self, t):
        """True carrier offset (Hz) from the capture centre at time ``t`` (s)."""
        t = np.asarray(t, dtype=np.float64)
        return self.offset_hz + self.drift_hz_per_s * t + np.where(t >= self.jump_s, self.jump_hz, 0.0)

    def carrier_phase(self, samples):
        """True carrier phase (rad, unwrapped) at absolute sample indices."""
        t = self.times(samples)
        jumped = np.maximum(t - self.jump_s, 0.0)
        return self.start_phase + 2.0 * pi * (self.offset_hz * t + 0.5 * self.drift_hz_per_s * t * t
                                              + self.jump_hz * jumped)

    def signal_gain_db(self, t):
        """Signal power relative to the nominal Es/N0 (dB), noise power being fixed;
        -inf before the signal appears."""
        t = np.asarray(t, dtype=np.float64)
        gain = np.where(t < self.signal_on_s, -np.inf, 0.0)
        fall, rise = self.low_edges_s
        low = _plateau(t, self.low_snr_s[0] - fall, fall, self.low_snr_s[1], rise)
        fade = _plateau(t, self.fade_s[0], self.fade_edge_s, self.fade_s[1] - self.fade_edge_s,
                        self.fade_edge_s)
        return gain + (self.low_esn0_db - self.esn0_db) * low - self.fade_depth_db * fade

    def esn0_db_at(self, t):
        """True Es/N0 (dB) at time ``t``."""
        return self.esn0_db + self.signal_gain_db(t)

    def stretches(self):
        """Steady stretches the verdict evaluates (1 s settling margin after each change)."""
        return [
            Stretch("clear sky", self.signal_on_s + 2.0, self.fade_s[0] - 0.2, self.esn0_db),
            Stretch("low SNR", self.low_snr_s[0] + 0.5, self.low_snr_s[1] - 0.2, self.low_esn0_db),
        ]

    def synthesise(self):
        """The received samples (complex64): BPSK symbols on the carrier, plus unit-power
        complex white Gaussian noise scaled for the Es/N0 profile."""
        rng = np.random.default_rng(self.seed)
        n = self.num_samples
        idx = np.arange(n)
        t = self.times(idx)
        symbols = 2.0 * rng.integers(0, 2, n) - 1.0
        noise_var = 10.0 ** (-self.esn0_db / 10.0)        # signal amplitude 1 at nominal Es/N0
        amp = 10.0 ** (self.signal_gain_db(t) / 20.0)      # 0 before the signal appears
        noise = rng.normal(scale=np.sqrt(noise_var / 2.0), size=(n, 2))
        x = amp * symbols * np.exp(1j * self.carrier_phase(idx)) + noise[:, 0] + 1j * noise[:, 1]
        return x.astype(np.complex64)

    def description(self):
        return ("Invented demo scenario: BPSK telemetry from a small high-altitude balloon at "
                f"{self.sample_rate:.0f} symbols/s, one sample per symbol at the matched filter; "
                f"crystal offset {self.offset_hz:+.0f} Hz, Doppler drift {self.drift_hz_per_s:+.1f} Hz/s, "
                f"fade at {self.fade_s[0]:.1f}-{self.fade_s[1]:.1f} s, "
                f"Es/N0 {self.low_esn0_db:.0f} dB at {self.low_snr_s[0]:.0f}-{self.low_snr_s[1]:.0f} s, "
                f"{self.jump_hz:+.0f} Hz oscillator jump at {self.jump_s:.1f} s. Synthesised by gr-coherer.")


__all__ = ["Stretch", "BalloonScenario"]
