# SPDX-License-Identifier: GPL-3.0-or-later
"""The invented scenario behind ``coherer demo``: a small high-altitude
balloon's BPSK telemetry downlink, as an SDR receive chain delivers it: the
transmitter's root-raised-cosine pulses (roll-off 0.35) at 9600 symbols/s,
oversampled 4 times (38 400 samples/s), in noise that the receiver's low-pass
channel filter has band-limited; no matched filter, no timing recovery yet.

Everything here is made up for the demo: the balloon, the frequency, the
timeline. The scenario knows its own truth (carrier frequency and phase, Es/N0
and the expected events at every sample, and where the symbols are) so the demo
can judge what the receiver reports.

Signal model (the bookkeeping of the project's conventions, section 8): unit-energy
RRC pulses, a symbol on every ``samples_per_symbol``-th sample starting at sample 0
(``symbol_offset``), scaled to unit mean power per sample at the nominal level, so
Es = ``samples_per_symbol`` in sample units; complex white noise of variance
``samples_per_symbol * 10^(-Es/N0 / 10)`` per sample gives the nominal Es/N0. The
sum passes a zero-phase (symmetric, centred) low-pass FIR, flat over the signal's
band plus the largest offset: signal, carrier phase and the in-band noise density
N0, hence Es/N0, are unchanged, and the noise outside the channel is removed.
After a unit-energy RRC matched filter (``matched_filter_taps``) the samples at
``symbol_offset + k * samples_per_symbol`` are the symbols, free of ISI.

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
from math import pi, sqrt

import numpy as np


def _plateau(t, start, fall, end, rise):
    """0 before ``start``, raised-cosine up to 1 over ``fall`` s, 1 until ``end``,
    raised-cosine back to 0 over ``rise`` s."""
    up = np.clip((t - start) / fall, 0.0, 1.0)
    down = np.clip(1.0 - (t - end) / rise, 0.0, 1.0)
    return 0.5 - 0.5 * np.cos(pi * np.minimum(up, down))


def rrc_taps(samples_per_symbol, rolloff, span_symbols=11):
    """Unit-energy root-raised-cosine taps, ``span_symbols * sps + 1`` of them, centred
    (the closed form of the RRC impulse response with its two removable singularities)."""
    sps, b = int(samples_per_symbol), float(rolloff)
    t = np.arange(-(span_symbols * sps // 2), span_symbols * sps // 2 + 1) / sps   # in symbols
    h = np.empty(len(t))
    for i, ti in enumerate(t):
        if ti == 0.0:
            h[i] = 1.0 - b + 4.0 * b / pi
        elif b > 0.0 and abs(abs(ti) - 1.0 / (4.0 * b)) < 1e-12:
            h[i] = b / sqrt(2.0) * ((1.0 + 2.0 / pi) * np.sin(pi / (4.0 * b))
                                    + (1.0 - 2.0 / pi) * np.cos(pi / (4.0 * b)))
        else:
            h[i] = ((np.sin(pi * ti * (1.0 - b)) + 4.0 * b * ti * np.cos(pi * ti * (1.0 + b)))
                    / (pi * ti * (1.0 - (4.0 * b * ti) ** 2)))
    return h / np.sqrt(np.sum(h ** 2))


def lowpass_taps(cutoff, taps):
    """Zero-phase low-pass FIR (Hamming-windowed sinc, odd length, unit gain at 0);
    ``cutoff`` in cycles/sample."""
    n = np.arange(taps) - (taps - 1) / 2
    h = 2.0 * cutoff * np.sinc(2.0 * cutoff * n) * np.hamming(taps)
    return h / h.sum()


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
    symbol_rate_hz: float = 9600.0       #: symbols/s
    samples_per_symbol: int = 4          #: oversampling of the capture
    rolloff: float = 0.35                #: RRC roll-off of the transmitter's pulses
    channel_cutoff_hz: float = 10500.0   #: receiver's channel filter, one-sided cut-off
    channel_taps: int = 129
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

    def __post_init__(self):
        if not (isinstance(self.samples_per_symbol, (int, np.integer)) and 2 <= self.samples_per_symbol <= 64):
            raise ValueError(f"samples_per_symbol must be an integer 2..64, got {self.samples_per_symbol!r}")
        if not 0.0 < self.rolloff <= 1.0:
            raise ValueError(f"rolloff must be in (0, 1], got {self.rolloff!r}")
        if not self.symbol_rate_hz > 0.0:
            raise ValueError(f"symbol_rate_hz must be positive, got {self.symbol_rate_hz!r}")
        if not (isinstance(self.channel_taps, (int, np.integer)) and self.channel_taps >= 3
                and self.channel_taps % 2 == 1):
            raise ValueError(f"channel_taps must be an odd integer >= 3, got {self.channel_taps!r}")
        if not 0.0 < self.channel_cutoff_hz < self.sample_rate / 2.0:
            raise ValueError(f"channel_cutoff_hz must be in (0, sample_rate/2), got {self.channel_cutoff_hz!r}")

    @property
    def sample_rate(self):
        """Samples/s of the capture: symbol rate x samples per symbol."""
        return self.symbol_rate_hz * self.samples_per_symbol

    #: sample of the first symbol peak after a matched filter (symbols at symbol_offset + k sps)
    symbol_offset = 0

    def matched_filter_taps(self):
        """Unit-energy RRC matched filter of the transmitter's pulse (zero phase, centred)."""
        return rrc_taps(self.samples_per_symbol, self.rolloff)

    def channel_filter_taps(self):
        return lowpass_taps(self.channel_cutoff_hz / self.sample_rate, self.channel_taps)

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
        """The received samples (complex64): RRC-shaped BPSK on the carrier plus complex
        white Gaussian noise scaled for the Es/N0 profile, both through the channel filter."""
        rng = np.random.default_rng(self.seed)
        n = self.num_samples
        sps = self.samples_per_symbol
        idx = np.arange(n)
        t = self.times(idx)
        nsym = -(-n // sps)
        symbols = 2.0 * rng.integers(0, 2, nsym) - 1.0
        impulses = np.zeros(nsym * sps)
        impulses[::sps] = symbols
        # unit mean power per sample: Es = sps in sample units (conventions 8)
        baseband = np.convolve(impulses, rrc_taps(sps, self.rolloff), mode="same")[:n] * np.sqrt(sps)
        noise_var = sps * 10.0 ** (-self.esn0_db / 10.0)   # N0 at unit signal power per sample
        amp = 10.0 ** (self.signal_gain_db(t) / 20.0)      # 0 before the signal appears
        noise = rng.normal(scale=np.sqrt(noise_var / 2.0), size=(n, 2))
        x = amp * baseband * np.exp(1j * self.carrier_phase(idx)) + noise[:, 0] + 1j * noise[:, 1]
        x = np.convolve(x, self.channel_filter_taps(), mode="same")
        return x.astype(np.complex64)

    def description(self):
        return ("Invented demo scenario: BPSK telemetry from a small high-altitude balloon at "
                f"{self.symbol_rate_hz:.0f} symbols/s, root-raised-cosine pulses (roll-off "
                f"{self.rolloff:g}) at {self.samples_per_symbol} samples per symbol "
                f"({self.sample_rate:.0f} samples/s), noise band-limited by a "
                f"{self.channel_cutoff_hz / 1e3:g} kHz channel filter, no matched filter; "
                f"crystal offset {self.offset_hz:+.0f} Hz, Doppler drift {self.drift_hz_per_s:+.1f} Hz/s, "
                f"fade at {self.fade_s[0]:.1f}-{self.fade_s[1]:.1f} s, "
                f"Es/N0 {self.low_esn0_db:.0f} dB at {self.low_snr_s[0]:.0f}-{self.low_snr_s[1]:.0f} s, "
                f"{self.jump_hz:+.0f} Hz oscillator jump at {self.jump_s:.1f} s. Synthesised by gr-coherer.")


__all__ = ["Stretch", "BalloonScenario", "rrc_taps", "lowpass_taps"]
