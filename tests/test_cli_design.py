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
    # At B_L T = 2e-7 the discrete loop departs from the continuous one by ~B_L T, below the printed precision.
    r = run_json(coherer, "--sample-rate", 1e8, "--power", 1, "--noise-bw", 20, "--doppler-rate", 10)
    assert matches_printed(r["natural_frequency_rad_s"], "37.7143")
    assert matches_printed(r["ramp_phase_error_rad"], "0.04417")


def test_slip_worked_example_and_pull_in(coherer):
    # REFERENCES 5 worked example: M = 4, Es/N0 3 dB, B_L T 0.02, first-order loop -> 642 symbols (fs = 1 symbol/s)
    r = run_json(coherer, "--sample-rate", 1, "--power", 4, "--noise-bw", 0.02, "--loop-order", 1, "--esn0", 3)
    assert matches_printed(r["mean_time_between_slips_s"], "642")
    assert matches_printed(10 ** (r["loop_snr_db"] / 10), "1.2593")
    # REFERENCES 2.2 (Rice App. C, secondary page): B_n 100 Hz, df 50 Hz -> 10 ms pull-in + 13 ms settling.
    # The tool reports Gardner's pull-in (M = 1, zeta 0.707) and Rice's rule beside it.
    r = run_json(coherer, "--sample-rate", 1e6, "--power", 1, "--noise-bw", 100, "--offset", 50)
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
])
def test_bad_arguments_exit_2_with_one_line(coherer, args, fragment):
    proc = coherer(*args)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and fragment in lines[0], proc.stderr
    assert "Traceback" not in proc.stderr
