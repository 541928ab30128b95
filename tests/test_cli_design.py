# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer design`` run in a subprocess as a user would: its figures equal the design
module's and REFERENCES.md check values; --json parses; --plot writes a PNG; bad
arguments exit 2 with one line on stderr."""

import json
import math
import os
import pathlib
import subprocess
import sys

import pytest

from gnuradio.coherer import design

REPO = pathlib.Path(__file__).resolve().parents[1]
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def coherer(tmp_path_factory):
    """Run ``python -m gnuradio.coherer design ...``; returns the CompletedProcess.

    The source tree is made importable through a shim directory (gnuradio/coherer -> python/coherer),
    unless COHERER_TEST_INSTALLED=1 asks for the installed copy.
    """
    env = dict(os.environ, MPLBACKEND="Agg")
    if not os.environ.get("COHERER_TEST_INSTALLED"):
        shim = tmp_path_factory.mktemp("shim")
        (shim / "gnuradio").mkdir()
        (shim / "gnuradio" / "coherer").symlink_to(REPO / "python" / "coherer")
        env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(shim), env.get("PYTHONPATH")]))

    def run(*args):
        return subprocess.run([sys.executable, "-m", "gnuradio.coherer", "design", *map(str, args)],
                               capture_output=True, text=True, env=env, timeout=120)
    return run


def run_json(coherer, *args):
    proc = coherer(*args, "--json")
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


def matches_printed(value, printed):
    """True if ``value`` rounds to the decimal string ``printed`` (REFERENCES' printed precision)."""
    mantissa, _, exponent = printed.lower().partition("e")
    decimals = len(mantissa.split(".")[1]) if "." in mantissa else 0
    return abs(value - float(printed)) <= 0.5 * 10.0 ** (int(exponent or 0) - decimals) * (1 + 1e-9)


def test_json_equals_design_module_and_references(coherer):
    # QPSK loop, 2nd order, at one sample per symbol (fs = symbol rate)
    r = run_json(coherer, "--sample-rate", 1e4, "--power", 4, "--noise-bw", 20, "--esn0", 6,
                 "--offset", 5, "--doppler-rate", 50)
    d = design.design_loop(1e4, 4, 20.0, 0.707, 2)
    esn0 = design.db_to_linear(6.0)
    # same numbers as the module the blocks use (JSON keeps full float precision)
    assert (r["k1"], r["k2"], r["k3"]) == (d.k1, d.k2, d.k3)
    assert r["natural_frequency_rad_s"] == d.natural_frequency
    assert r["mean_time_between_slips_s"] == design.mean_time_between_slips_s(d, esn0)
    assert r["pull_in_time_s"] == design.pull_in_time_s(d, 5.0)
    assert r["ramp_phase_error_rad"] == d.ramp_phase_error(50.0)
    assert r["phase_error_rms_rad"] == math.sqrt(design.phase_error_variance(4, esn0, d.actual_bt))
    # REFERENCES 0 / 1: the discrete loop's actual noise bandwidth equals the request (exact design), rel 1e-9
    assert r["actual_noise_bw_hz"] == pytest.approx(20.0, rel=1e-9)
    # REFERENCES 4 squaring-loss table, M = 4 at 6 dB: -4.036 dB (printed precision)
    assert matches_printed(r["squaring_loss_db"], "-4.036")
    # REFERENCES 4: var = B_L T V_M / M^2 with V_4(6 dB) = 10.178954
    assert r["phase_error_rms_rad"] ** 2 == pytest.approx(20.0 / 1e4 * 10.178954 / 16, rel=1e-6)
    # REFERENCES 2.1 [DER]: exact discrete ramp error alpha / (g K2), alpha = 2 pi rate / fs^2
    assert r["ramp_phase_error_rad"] == pytest.approx(2 * math.pi * 50.0 / 1e8 / r["g_k2"], rel=1e-12)
    assert r["warnings"] == []


def test_ramp_error_continuous_example(coherer):
    # REFERENCES 2.1 (Gardner, from memory): B_L 20 Hz, zeta 0.707, 10 Hz/s -> wn 37.7143 rad/s, 0.04417 rad.
    # At B_L T = 2e-7 the discrete loop updated every sample departs from the continuous one by ~B_L T, below
    # the printed precision (the blocks would update it once per 64 samples, a departure of ~B_L L T).
    r = run_json(coherer, "--sample-rate", 1e8, "--power", 1, "--noise-bw", 20, "--doppler-rate", 10,
                 "--update-block", 1)
    assert r["update_block"] == 1
    assert matches_printed(r["natural_frequency_rad_s"], "37.7143")
    assert matches_printed(r["ramp_phase_error_rad"], "0.04417")


def test_slip_worked_example_and_pull_in(coherer):
    # REFERENCES 5 worked example: M = 4, Es/N0 3 dB, B_L T 0.02, first-order loop -> 642 symbols (fs = 1 symbol/s)
    r = run_json(coherer, "--sample-rate", 1, "--power", 4, "--noise-bw", 0.02, "--loop-order", 1, "--esn0", 3)
    assert matches_printed(r["mean_time_between_slips_s"], "642")
    assert matches_printed(10 ** (r["loop_snr_db"] / 10), "1.2593")
    # REFERENCES 2.2 (Rice App. C, secondary page): B_n 100 Hz, df 50 Hz -> 10 ms pull-in + 13 ms settling.
    # The tool reports Gardner's pull-in (M = 1, zeta 0.707) and Rice's rule beside it.
    # (the continuous formulas: the loop updated every sample, B_L T = 1e-4)
    r = run_json(coherer, "--sample-rate", 1e6, "--power", 1, "--noise-bw", 100, "--offset", 50,
                 "--update-block", 1)
    assert r["pull_in_time_rice_s"] == pytest.approx(0.010, rel=1e-9)
    assert r["lock_time_s"] - r["pull_in_time_s"] == pytest.approx(0.013, rel=1e-9)
    # Gardner (from memory) = 4.16 df^2 / B_L^3 at zeta 0.707 (REFERENCES 2.2), i.e. 10.4 ms here (printed 3 digits)
    assert r["pull_in_time_s"] == pytest.approx(4.16 * 50 ** 2 / 100 ** 3, rel=0.005)
    assert r["acquisition_needed"] is False


def test_warnings_for_unsafe_choices(coherer):
    r = run_json(coherer, "--sample-rate", 1000, "--power", 8, "--noise-bw", 80, "--esn0", 10,
                 "--doppler-rate", 1e5, "--offset", 200)
    text = " ".join(r["warnings"])
    assert len(r["warnings"]) == 4
    assert "B_L T" in text                          # 0.08 > 0.05 (REFERENCES 1.2: textbook mapping >4.5 % off)
    assert "once a minute" in text and r["mean_time_between_slips_s"] < 60
    assert "Doppler rate" in text and 1e5 > r["max_doppler_rate_hz_per_s"]
    assert "unambiguous range" in text              # 200 Hz > fs/(2M) = 62.5 Hz
    assert r["acquisition_needed"] is True and r["pull_in_time_s"] is None   # inf -> null in JSON


@pytest.mark.parametrize("name, head", [("loop.pdf", b"%PDF-"), ("loop.svg", b"<?xml")])
def test_plot_in_the_format_its_extension_names(coherer, tmp_path, name, head):
    # file signatures: PDF 1.7 (ISO 32000-1, 7.5.2 "%PDF-"), SVG as an XML document
    out = tmp_path / name
    proc = coherer("--sample-rate", 48000, "--power", 2, "--noise-bw", 50, "--plot", out)
    assert proc.returncode == 0, proc.stderr
    assert out.read_bytes()[:len(head)] == head


def test_text_report_and_plot(coherer, tmp_path):
    png = tmp_path / "loop.png"
    proc = coherer("--sample-rate", 48000, "--power", 2, "--noise-bw", 50, "--loop-order", 3, "--esn0", 8,
                   "--offset", 40, "--doppler-rate", 30, "--plot", png)
    assert proc.returncode == 0, proc.stderr
    for figure in ("gains", "natural frequency w0", "phase-error RMS", "mean time between cycle slips",
                   "pull-in time", "steady-state phase error"):
        assert figure in proc.stdout
    data = png.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.image
    image = matplotlib.image.imread(png)
    assert image.shape[0] >= 600 and image.shape[1] >= 900


def test_suggest(coherer):
    r = run_json(coherer, "--sample-rate", 1e4, "--power", 4, "--esn0", 10, "--doppler-rate", 200, "--suggest")
    expected = design.suggest_noise_bw(1e4, 4, design.db_to_linear(10.0), 200.0)
    assert r["suggested_noise_bw_hz"] == pytest.approx(expected, rel=1e-12)
    assert r["noise_bw_hz"] == r["suggested_noise_bw_hz"]


def test_help_names_units(coherer):
    proc = coherer("--help")
    assert proc.returncode == 0
    for unit in ("samples/s", "Hz", "dB", "Hz/s"):
        assert unit in proc.stdout


@pytest.mark.parametrize("args, fragment", [
    (["--sample-rate", -1, "--power", 4, "--noise-bw", 10], "--sample-rate"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 2000], "--noise-bw"),
    (["--sample-rate", 1e4, "--power", 0, "--noise-bw", 10], "--power"),
    (["--sample-rate", 1e4, "--power", 2, "--noise-bw", 10, "--damping", 0], "--damping"),
    (["--sample-rate", 1e4, "--power", 2, "--noise-bw", 10, "--loop-order", 4], "--loop-order"),
    (["--sample-rate", 1e4, "--power", 2], "--noise-bw"),
    (["--sample-rate", "fast", "--power", 2, "--noise-bw", 10], "--sample-rate"),
    (["--sample-rate", 1e4, "--power", 2, "--noise-bw", 10, "--esn0", "nan"], "--esn0"),
    (["--sample-rate", 1e4, "--power", 2, "--noise-bw", 10, "--suggest"], "--suggest"),
    (["--sample-rate", 1e4, "--power", 2, "--noise-bw", 10, "--plot", "/nonexistent-dir/x.png"], "--plot"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 10, "--modulation-index", 1.0], "--modulation-index"),
    (["--sample-rate", 1e4, "--power", 1, "--noise-bw", 10, "--modulation-index", 1.5], "--modulation-index"),
    (["--sample-rate", 1e4, "--power", 1, "--noise-bw", 10, "--modulation-index", "nan"], "--modulation-index"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 10, "--samples-per-symbol", 0], "--samples-per-symbol"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 10, "--samples-per-symbol", 65], "--samples-per-symbol"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 10, "--samples-per-symbol", 2.5], "--samples-per-symbol"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 10, "--rolloff", 1.5], "--rolloff"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 10, "--rolloff", "nan"], "--rolloff"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 10, "--placement", "after"], "--placement"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 10, "--freq-step", "inf"], "--freq-step"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 10, "--update-block", 12], "--update-block"),
    (["--sample-rate", 1e4, "--power", 4, "--noise-bw", 10, "--update-block", 128], "--update-block"),
])
def test_bad_arguments_exit_2_with_one_line(coherer, args, fragment):
    proc = coherer(*args)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and fragment in lines[0], proc.stderr
    assert "Traceback" not in proc.stderr


def test_shaped_signal_options(coherer):
    # RRC-shaped QPSK at 4 samples per symbol before the matched filter: the figures are the design module's
    # for that signal model (exact expectation over symbol patterns and noise; tests/test_design.py checks it
    # against simulation), and the text names the signal
    args = ["--sample-rate", 1e5, "--power", 4, "--noise-bw", 50, "--esn0", 10, "--samples-per-symbol", 4,
            "--rolloff", 0.35]
    r = run_json(coherer, *args)
    d = design.design_loop(1e5, 4, 50.0)
    model = dict(samples_per_symbol=4, rolloff=0.35, placement="channel")
    esn0 = design.db_to_linear(10.0)
    assert (r["samples_per_symbol"], r["rolloff"], r["placement"]) == (4, 0.35, "channel")
    assert r["symbol_rate_hz"] == 25000.0
    assert r["phase_error_rms_rad"] == math.sqrt(design.phase_error_variance(4, esn0, d.actual_bt, **model))
    assert r["detector_noise_density"] == design.detector_noise_density(4, esn0, **model)
    assert r["mean_time_between_slips_s"] == design.mean_time_between_slips_s(d, esn0, **model)
    # var = 2 B_L T S_e(0) / M^2 of the line-normalised detector
    assert r["phase_error_rms_rad"] ** 2 == pytest.approx(2 * 50 / 1e5 * r["detector_noise_density"] / 16, rel=1e-12)
    # pattern jitter makes the loss worse than the one-sample-per-symbol squaring loss (REFERENCES 4: -1.794 dB)
    assert 0.0 < r["detector_self_noise_density"] < r["detector_noise_density"]
    assert r["squaring_loss_db"] < -1.794
    text = coherer(*args, "--placement", "matched").stdout
    for fragment in ("RRC roll-off 0.35 at 4 samples per symbol", "after the matched filter",
                     "effective squaring loss", "pattern jitter"):
        assert fragment in text
    matched = run_json(coherer, *args, "--placement", "matched")
    assert matched["detector_noise_density"] == design.detector_noise_density(
        4, esn0, samples_per_symbol=4, rolloff=0.35, placement="matched")


def test_residual_carrier_option(coherer):
    # REFERENCES 11.1 (Gardner, from memory): var = N0 B_L / (P cos^2 beta); at one sample per T_s with complex
    # noise variance 1/(Es/N0) per sample that is B_L T / (Es/N0 cos^2 beta); the carrier share is the loss
    r = run_json(coherer, "--sample-rate", 1e5, "--power", 1, "--noise-bw", 50, "--esn0", 10,
                 "--modulation-index", 1.2, "--loop-order", 1)
    assert r["modulation_index_rad"] == 1.2
    assert r["carrier_share_db"] == pytest.approx(20 * math.log10(math.cos(1.2)), rel=1e-12)
    assert r["squaring_loss_db"] == pytest.approx(r["carrier_share_db"], rel=1e-9)
    actual_bt = r["actual_bt"]
    assert r["phase_error_rms_rad"] ** 2 == pytest.approx(actual_bt / 10.0 / math.cos(1.2) ** 2, rel=1e-9)
    # Viterbi's slip time (REFERENCES 5) at the loop SNR of the carrier's share
    rho = math.cos(1.2) ** 2 * 10.0 / actual_bt
    assert 10 ** (r["loop_snr_db"] / 10) == pytest.approx(rho, rel=1e-9)
    text = coherer("--sample-rate", 1e5, "--power", 1, "--noise-bw", 50, "--modulation-index", 1.2).stdout
    assert "residual carrier" in text and "carrier share" in text


def test_offset_shown_with_acquisition_on(coherer):
    # the blocks' default acquire=True: the offset is estimated from the z^M spectrum every FFT block while
    # unlocked, so the time to lock is a few blocks (README "Wide acquisition"), not the natural pull-in time
    args = ["--sample-rate", 1e5, "--power", 4, "--noise-bw", 50, "--esn0", 10, "--offset", 3000]
    r = run_json(coherer, *args)
    d = design.design_loop(1e5, 4, 50.0)
    aided = design.spectral_acquisition(d, 3000.0, design.db_to_linear(10.0))
    assert r["acquisition_time_s"] == aided.time_to_lock_s
    assert r["acquisition_fft_length"] == aided.fft_length
    assert r["acquisition_expected_blocks"] == pytest.approx(1.0, rel=1e-9)       # a strong z^M line
    assert r["acquisition_time_s"] < 1e-3 * r["pull_in_time_s"]                   # Gardner: hours here
    text = coherer(*args).stdout
    assert "time to lock with acquisition on" in text and "without acquisition: pull-in time" in text
    # a weak line: the expected number of blocks grows and a warning says so
    weak = run_json(coherer, "--sample-rate", 1e5, "--power", 4, "--noise-bw", 50, "--esn0", -3, "--offset", 3000)
    assert weak["acquisition_expected_blocks"] > 3
    assert any("acquisition takes about" in w for w in weak["warnings"])


def test_freq_step_option(coherer):
    # Gardner's pull-out limit 1.8 wn (zeta + 1) / M (from memory): within it the loop follows the step,
    # beyond it the loop slips and pulls in by itself
    base = ["--sample-rate", 1e4, "--power", 2, "--noise-bw", 20]
    limit = run_json(coherer, *base)["pull_out_hz"]
    inside = run_json(coherer, *base, "--freq-step", 0.5 * limit)
    assert inside["freq_step_followed"] is True and inside["warnings"] == []
    assert inside["freq_step_peak_phase_error_rad"] == pytest.approx(
        0.5 * limit * inside["freq_step_peak_error_rad_per_hz"], rel=1e-12)
    outside = run_json(coherer, *base, "--freq-step", 3 * limit)
    d = design.design_loop(1e4, 2, 20.0)
    assert outside["freq_step_followed"] is False
    assert outside["freq_step_pull_in_time_s"] == design.pull_in_time_s(d, 3 * limit)
    assert any("pull-out" in w for w in outside["warnings"])
    assert "beyond the pull-out limit" in coherer(*base, "--freq-step", 3 * limit).stdout
