# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer run --carrier``: several carriers in one wideband recording.

The recording is made here: three root-raised-cosine shaped PSK carriers whose
pulses come from the framework's own designer (``firdes.root_raised_cosine``,
through tests/shaped_signals.py, not the package's generator), each at its own
offset, symbol rate and true frequency error, in white noise, written as plain
SigMF bytes and JSON.
"""

import json

import numpy as np
import pytest

from clirunner import coherer, one_error_line, python
from shaped_signals import rrc, shaped, symbols, white

FS = 1e6                 # samples/s
DURATION_S = 1.5
ON_S = 0.1               # the carriers appear here (noise only before)
CENTER_HZ = 2.2e9
ESN0_DB = 12.0
NOISE_BW = 200.0
#: (requested centre Hz, true error Hz, M, symbol rate): BPSK, QPSK, BPSK
CARRIERS = [(-250e3, 1730.0, 2, 25e3), (40e3, -2150.0, 4, 50e3), (310e3, 640.0, 2, 12.5e3)]
ROLLOFF = 0.35


def wideband(seed=7):
    """The capture (complex, 1 Msps): white noise of unit variance per sample plus the
    carriers, each at ESN0_DB with Es = power x samples per symbol (CONVENTIONS 8)."""
    rng = np.random.default_rng(seed)
    n = int(DURATION_S * FS)
    t = np.arange(n) / FS
    x = white(rng, n, 1.0)
    for centre, err, m, rs in CARRIERS:
        sps = int(FS / rs)
        sym = symbols(rng, m, n // sps + 1, np.pi / 4 if m == 4 else 0.0)
        s = shaped(sym, sps, rrc(sps, ROLLOFF))[:n]
        amp = np.sqrt(10 ** (ESN0_DB / 10) / sps)
        x += (t >= ON_S) * amp * s * np.exp(1j * (2 * np.pi * (centre + err) * t + rng.uniform(0, 2 * np.pi)))
    return 0.1 * x


def write_recording(folder, x, name="wide"):
    iq = np.empty(2 * len(x), dtype="<f4")
    iq[0::2], iq[1::2] = x.real, x.imag
    (folder / f"{name}.sigmf-data").write_bytes(iq.tobytes())
    meta = {"global": {"core:datatype": "cf32_le", "core:sample_rate": FS, "core:version": "1.2.0",
                       "core:description": "invented test capture"},
            "captures": [{"core:sample_start": 0, "core:frequency": CENTER_HZ}], "annotations": []}
    path = folder / f"{name}.sigmf-meta"
    path.write_text(json.dumps(meta, indent=2))
    return path


def carrier_args():
    return [a for centre, _, m, _ in CARRIERS for a in ("--carrier", f"{centre:g}:{m}")]


@pytest.fixture(scope="module")
def three(tmp_path_factory):
    folder = tmp_path_factory.mktemp("three")
    meta = write_recording(folder, wideband())
    proc = coherer("run", meta, "--power", 2, "--noise-bw", NOISE_BW, *carrier_args(),
                   "--events", folder / "events.json", "--report", folder / "report", "--annotate")
    assert proc.returncode == 0, proc.stderr
    return folder, meta, proc, json.loads((folder / "events.json").read_text())


def test_each_carrier_locks_fast_on_its_frequency_and_stays_locked(three):
    _, _, _, events = three
    for centre, err, _, _ in CARRIERS:
        mine = [e for e in events if e["carrier"] == centre]
        locks = [e for e in mine if e["event"] == "lock"]
        assert len(locks) == 1, mine
        # acceptance: locked within 0.5 s of the carrier appearing, no unlock
        assert ON_S <= locks[0]["time_s"] <= ON_S + 0.5, locks[0]
        assert not [e for e in mine if e["event"] == "unlock"], mine
        assert locks[0]["carrier_hz"] == pytest.approx(CENTER_HZ + locks[0]["freq_hz"])
    assert {e["carrier"] for e in events} == {c for c, _, _, _ in CARRIERS}


def test_interval_frequency_within_10_hz_of_truth(three):
    folder = three[0]
    summary = json.loads((folder / "report" / "summary.json").read_text())
    assert len(summary["carriers"]) == len(CARRIERS)
    for (centre, err, m, rs), s in zip(CARRIERS, summary["carriers"]):
        assert s["channel"]["carrier_hz"] == centre and s["channel"]["power"] == m
        ivs = s["result"]["intervals"]
        assert len(ivs) == 1
        # freq_hz is the offset from the capture centre: requested centre + true error
        assert abs(ivs[0]["freq_hz"] - (centre + err)) <= 10.0, (centre, ivs[0])
        # per carrier symbol rate estimated from its channel; the estimator's own
        # contract is 0.1 % (symbolrate module)
        assert s["symbol_timing"]["source"] == "estimated"
        assert s["symbol_timing"]["symbol_rate_hz"] == pytest.approx(rs, rel=1e-3)
        assert (folder / "report" / s["folder"] / "timeline.png").stat().st_size > 0


def test_annotations_carry_each_channels_edges(three):
    folder, meta, _, _ = three
    notes = json.loads(meta.read_text())["annotations"]
    locked = [a for a in notes if a["core:label"] == "carrier locked"]
    assert len(locked) == len(CARRIERS)
    for (centre, err, _, rs), a in zip(sorted(CARRIERS), sorted(locked, key=lambda a: a["core:freq_lower_edge"])):
        lo, hi = a["core:freq_lower_edge"], a["core:freq_upper_edge"]
        # the RRC signal occupies symbol rate x (1 + roll-off) (Proakis, Digital
        # Communications, raised-cosine spectrum), centred on the requested carrier; the
        # rate is estimated, so the half-width carries the estimator's 0.1 % (symbolrate)
        half = rs * (1 + ROLLOFF) / 2
        assert lo == pytest.approx(CENTER_HZ + centre - half, abs=1e-3 * half)
        assert hi == pytest.approx(CENTER_HZ + centre + half, abs=1e-3 * half)
        assert lo < CENTER_HZ + centre + err < hi


def test_stdout_has_one_block_per_carrier(three):
    out = three[2].stdout
    for centre, _, m, _ in CARRIERS:
        assert f"carrier {centre:+.6g} Hz, M={m}" in out


def test_channel_sample_maps_to_capture_through_the_filter_delay():
    # an impulse through the channel's framework blocks (NCO, decimating FIR) must come out at the
    # channel sample the plan maps back to the impulse's capture sample
    code = r"""
import numpy as np
from gnuradio import blocks, gr
from gnuradio.coherer import channels
from types import SimpleNamespace
fs = 1e6
plan = channels._plan(fs, 0.0, 2, 33750.0, 25e3)
for at in (5000, 5003, 5007):
    x = np.zeros(20000, np.complex64); x[at] = 1
    y = np.abs(channels.channelise(x, plan))
    k = int(np.argmax(y))
    assert abs(plan.to_capture(k) - at) < plan.decimation, (at, k, plan.to_capture(k))
print(plan.decimation, len(plan.taps))
"""
    proc = python(code)
    assert proc.returncode == 0, proc.stderr


def test_mixer_matches_numpy_and_ignores_where_the_stream_is_cut():
    # reference: numpy's complex exponential of the absolute sample index in float64
    # (x[n] e^{-j 2 pi f n / fs}); the kernel's output is complex64, so it may differ by
    # a few float32 roundings of a unit-magnitude product (eps32 = 1.2e-7)
    code = r"""
import numpy as np
from gnuradio import blocks, gr
from gnuradio.coherer import channels
from gnuradio.coherer._mixer_kernel import mix_down
rng = np.random.default_rng(3)
x = np.exp(2j * np.pi * rng.random(50_000)).astype(np.complex64)
fs, f = 1e6, -312_345.6
n = np.arange(len(x))
ref = x * np.exp(-2j * np.pi * np.mod(n * (f / fs), 1.0))
tb = gr.top_block()
src = blocks.vector_source_c(x, False)
mix = channels._mixer(f, fs)
snk = blocks.vector_sink_c()
tb.connect(src, mix, snk)
tb.run()
y = np.array(snk.data(), dtype=np.complex64)
assert len(y) == len(x)
assert np.max(np.abs(y - ref)) < 1e-6, np.max(np.abs(y - ref))
# far into a long capture (index 1e10), cut anywhere: the same samples, bit for bit
first = 10 ** 10 + 7
whole = np.empty_like(x); mix_down(x, whole, first, f / fs)
cut = np.empty_like(x)
edges = [0, 1, 1023, 1024, 5000, 31_111, len(x)]
for a, b in zip(edges, edges[1:]):
    mix_down(x[a:b], cut[a:b], first + a, f / fs)
assert np.array_equal(whole, cut)
m = first + n
far = x * np.exp(-2j * np.pi * np.mod(m * (f / fs), 1.0))
assert np.max(np.abs(whole - far)) < 1e-5, np.max(np.abs(whole - far))
"""
    proc = python(code)
    assert proc.returncode == 0, proc.stderr


def test_channel_filter_passes_the_band_and_stops_outside():
    # response of the designed taps from numpy's DFT: flat within the occupied band,
    # and well down beyond twice the half-band (the window designer's Blackman-Harris
    # stopband is about -90 dB, common practice to ask for -60 dB)
    code = r"""
import numpy as np
from gnuradio.coherer import channels
fs, bw = 1e6, 33750.0
plan = channels._plan(fs, 0.0, 2, bw, 25e3)
h = np.array(plan.taps)
f = np.fft.fftfreq(1 << 18, 1 / fs)
H = np.abs(np.fft.fft(h, 1 << 18))
band = np.abs(f) <= bw / 2
stop = np.abs(f) >= bw
assert np.all(np.abs(20 * np.log10(H[band])) < 0.1), 20 * np.log10(H[band]).min()
assert 20 * np.log10(H[stop].max()) < -60, 20 * np.log10(H[stop].max())
"""
    proc = python(code)
    assert proc.returncode == 0, proc.stderr


@pytest.mark.parametrize("extra, words", [
    (["--carrier", "600k"], "--carrier"),                    # beyond +-fs/2
    (["--carrier", "1k:0"], "--carrier"),                    # M out of range
    (["--carrier", "1k:x"], "--carrier"),
    (["--carrier", "1k", "--carrier", "1k"], "twice"),
    (["--channel-bw", "20k"], "--channel-bw needs --carrier"),
    (["--carrier", "480k", "--channel-bw", "100k"], "--channel-bw"),
    (["--carrier", "10k", "--freq-guess", "100"], "--freq-guess"),
])
def test_bad_carrier_options_are_exit_2_one_line(tmp_path, extra, words):
    meta = write_recording(tmp_path, white(np.random.default_rng(1), 50_000, 1.0) * 0.1)
    proc = coherer("run", meta, "--power", 2, "--noise-bw", NOISE_BW, *extra)
    assert proc.returncode == 2, proc.stderr
    assert words in one_error_line(proc)
