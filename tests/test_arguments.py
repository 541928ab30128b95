# SPDX-License-Identifier: GPL-3.0-or-later
"""The shared argument rules (coherer.arguments) against the GRC asserts of every block.

For a table of parameter values at and just beyond each limit, the ``asserts:`` of the
block's YAML, evaluated the way GRC evaluates them (each ``${ ... }`` expression with the
parameter values as names and the blocks' template imports in scope), must all pass exactly
when the argument module accepts the same values. GRC's own parameter types (int, enum) are
respected: only values GRC can hold for the parameter are tried.
"""

import math
import re

import numpy as np
import pytest

from test_grc import GRC_DIR, load_yaml

from gnuradio import coherer
from gnuradio.coherer import arguments, lockstat
from gnuradio.coherer.mth_power_feedforward_cc import WEIGHTINGS

FS = 48000.0
INF, NAN = float("inf"), float("nan")
#: Default lock threshold of a 1024-symbol window (lockstat's 1e-6 rule) and the next float above it.
FLOOR = lockstat.default_thresholds(1024)[0]
ABOVE_FLOOR = float(np.nextafter(FLOOR, 1.0))


def _loop(p, power=None):
    """What the M-th power loop accepts (``power`` fixed for the squaring loop)."""
    arguments.loop_arguments(p["sample_rate"], p["power"] if power is None else power, p["noise_bw_hz"],
                             p["damping"], p["loop_order"], p["freq_guess_hz"], p["freq_range_hz"],
                             p["point_angle"], p["tag_interval"])


def _detector(p):
    """What the lock detector accepts; a ``false_lock:P`` choice becomes the threshold the make
    template passes (lockstat.false_lock_threshold of the window's symbols)."""
    lock = p["lock_threshold"]
    if isinstance(lock, str):
        lock = lockstat.false_lock_threshold(p["window"] // p["samples_per_symbol"], float(lock.split(":")[1]))
    arguments.detector_arguments(p["sample_rate"], p["power"], p["window"], lock, p["unlock_threshold"],
                                 p["point_angle"], p["status_interval"], p["samples_per_symbol"])


def _feedforward(p):
    arguments.feedforward_arguments(p["sample_rate"], p["power"], p["window"], p["point_angle"])
    if p["weighting"] is not None and p["weighting"] not in WEIGHTINGS:
        raise ValueError("weighting")


LOOP_BASE = dict(sample_rate=FS, power=4, noise_bw_hz=50.0, damping=0.707, loop_order=2, freq_guess_hz=0.0,
                 freq_range_hz=None, acquire=True, point_angle=None, tag_interval=0, diagnostics=False)
SPEC_CASES = [      # the loop specification, shared by both loops
    dict(sample_rate=0.0), dict(sample_rate=-FS), dict(sample_rate=INF), dict(sample_rate=NAN),
    dict(sample_rate=500.0), dict(sample_rate=499.9),                 # noise_bw 50 Hz at / beyond 0.1 fs
    dict(noise_bw_hz=4800.0), dict(noise_bw_hz=4800.5), dict(noise_bw_hz=1e-9), dict(noise_bw_hz=0.0),
    dict(noise_bw_hz=-1.0), dict(noise_bw_hz=NAN), dict(noise_bw_hz=INF),
    dict(damping=10.0), dict(damping=10.01), dict(damping=1e-6), dict(damping=0.0), dict(damping=-0.1),
    dict(damping=NAN),
    dict(loop_order=1), dict(loop_order=3), dict(loop_order=1, noise_bw_hz=4800.0),
    dict(loop_order=3, noise_bw_hz=4800.0, damping=10.0),
    dict(tag_interval=1), dict(tag_interval=-1),
]
CASES = {
    "coherer_mth_power_loop_cc": (LOOP_BASE, _loop, SPEC_CASES + [
        dict(power=1), dict(power=16), dict(power=0), dict(power=17),
        dict(freq_range_hz=6000.0), dict(freq_range_hz=6000.5), dict(freq_range_hz=1e-3), dict(freq_range_hz=0.0),
        dict(freq_range_hz=-1.0), dict(freq_range_hz=NAN), dict(power=1, freq_range_hz=24000.0),
        dict(freq_guess_hz=-6000.0), dict(freq_guess_hz=6000.5), dict(freq_guess_hz=NAN),
        dict(freq_range_hz=100.0, freq_guess_hz=100.0), dict(freq_range_hz=100.0, freq_guess_hz=-100.5),
        dict(point_angle=3.0), dict(point_angle=NAN), dict(point_angle=-INF),
    ]),
    "coherer_squaring_loop_cc": ({**LOOP_BASE, "point_angle": 0.0}, lambda p: _loop(p, power=2),
                                 [{k: v for k, v in c.items()} for c in SPEC_CASES] + [
        dict(freq_range_hz=12000.0), dict(freq_range_hz=12000.5), dict(freq_range_hz=0.0),
        dict(freq_guess_hz=12000.0), dict(freq_guess_hz=-12000.5),
        dict(freq_range_hz=50.0, freq_guess_hz=50.0), dict(freq_range_hz=50.0, freq_guess_hz=51.0),
        dict(point_angle=-3.0), dict(point_angle=INF), dict(point_angle=NAN),
    ]),
    "coherer_lock_detector_cc": (
        dict(sample_rate=FS, power=4, window=1024, lock_threshold=None, unlock_threshold=None, point_angle=None,
             status_interval=0, samples_per_symbol=1), _detector, [
            dict(sample_rate=1.0), dict(sample_rate=0.0), dict(sample_rate=-1.0), dict(sample_rate=INF),
            dict(power=1), dict(power=16), dict(power=0), dict(power=17),
            dict(window=32), dict(window=1 << 20), dict(window=31), dict(window=(1 << 20) + 1),
            dict(samples_per_symbol=64), dict(samples_per_symbol=65), dict(samples_per_symbol=0),
            dict(samples_per_symbol=3), dict(window=1026, samples_per_symbol=3),
            dict(window=1000, samples_per_symbol=16),
            dict(window=64, samples_per_symbol=4), dict(window=60, samples_per_symbol=4),
            dict(window=32, samples_per_symbol=4), dict(window=32, samples_per_symbol=1),
            dict(status_interval=1024), dict(status_interval=1023), dict(status_interval=-1),
            dict(lock_threshold=1.0), dict(lock_threshold=1e-9), dict(lock_threshold=0.0),
            dict(lock_threshold=1.5), dict(lock_threshold=NAN), dict(lock_threshold=0.01),
            dict(lock_threshold="false_lock:1e-9"), dict(lock_threshold="false_lock:0.4"),
            dict(lock_threshold="false_lock:0.5"), dict(lock_threshold="false_lock:0.7"),
            dict(lock_threshold="false_lock:0"), dict(lock_threshold="false_lock:1e-20", window=32),
            dict(lock_threshold="false_lock:1e-9", window=32),
            dict(unlock_threshold=0.0), dict(unlock_threshold=-0.01), dict(unlock_threshold=FLOOR),
            dict(unlock_threshold=ABOVE_FLOOR), dict(unlock_threshold=INF), dict(unlock_threshold=NAN),
            dict(lock_threshold=0.5, unlock_threshold=0.5), dict(lock_threshold=0.5, unlock_threshold=0.6),
            dict(samples_per_symbol=4, unlock_threshold=0.21), dict(samples_per_symbol=4, unlock_threshold=0.2101),
            dict(lock_threshold="false_lock:1e-9", unlock_threshold=0.1),
            dict(lock_threshold="false_lock:1e-9", unlock_threshold=0.9),
            dict(point_angle=0.0), dict(point_angle=NAN), dict(point_angle=INF),
        ]),
    "coherer_mth_power_feedforward_cc": (
        dict(sample_rate=FS, power=4, window=64, point_angle=None, weighting=None, reset_tag_key="",
             diagnostics=False), _feedforward, [
            dict(sample_rate=1.0), dict(sample_rate=0.0), dict(sample_rate=-FS), dict(sample_rate=INF),
            dict(power=1), dict(power=16), dict(power=0), dict(power=17),
            dict(window=1), dict(window=65536), dict(window=0), dict(window=65537),
            *(dict(weighting=w) for w in sorted(WEIGHTINGS)), dict(weighting="square"),
            dict(point_angle=-1.0), dict(point_angle=NAN), dict(point_angle=INF),
        ]),
}


def grc_asserts(block_id):
    """The block's assert expressions, without their ``${ }``."""
    data = load_yaml(GRC_DIR / f"{block_id}.block.yml")
    return [re.fullmatch(r"\$\{\s*(.*?)\s*\}", a).group(1) for a in data.get("asserts", [])]


def failed_asserts(block_id, params):
    """The asserts GRC reports as failed (or not evaluating) for these parameter values: GRC
    evaluates each with the block's parameters as local names over the flowgraph namespace,
    which holds the blocks' ``imports`` (here ``from gnuradio import coherer``)."""
    namespace = {"coherer": coherer}
    failed = []
    for expr in grc_asserts(block_id):
        try:
            ok = eval(expr, namespace, dict(params))       # noqa: S307 (the repository's own YAML)
        except Exception:                                  # GRC: 'Assertion "..." did not evaluate.'
            ok = False
        if not ok:
            failed.append(expr)
    return failed


def module_accepts(check, params):
    try:
        check(params)
    except ValueError:
        return False
    return True


def _cases():
    for block_id, (base, check, overrides) in CASES.items():
        for override in overrides:
            yield pytest.param(block_id, {**base, **override}, check,
                               id=f"{block_id[len('coherer_'):]}:{override}")


@pytest.mark.parametrize("block_id, params, check", list(_cases()))
def test_grc_asserts_pass_exactly_when_the_module_accepts(block_id, params, check):
    failed = failed_asserts(block_id, params)
    assert (failed == []) == module_accepts(check, params), failed


@pytest.mark.parametrize("block_id", list(CASES))
def test_every_assert_is_reached_by_a_case(block_id):
    """Each YAML assert fails for at least one value of the table (so each limit is tried)."""
    base, _, overrides = CASES[block_id]
    failing = set()
    for override in overrides:
        failing.update(failed_asserts(block_id, {**base, **override}))
    assert sorted(set(grc_asserts(block_id)) - failing) == []


def test_every_block_has_a_case_table():
    assert sorted(CASES) == sorted(p.name[:-len(".block.yml")] for p in GRC_DIR.glob("*.block.yml"))


def test_base_values_are_accepted():
    for block_id, (base, check, _) in CASES.items():
        assert module_accepts(check, base) and failed_asserts(block_id, base) == [], block_id


def test_limits_are_the_constructors():
    # the blocks take their limits from the argument module
    from gnuradio.coherer.mth_power_feedforward_cc import MAX_WINDOW
    assert MAX_WINDOW == arguments.MAX_FEEDFORWARD_WINDOW
    assert coherer.design.MAX_BT is arguments.MAX_BT and coherer.design.validate_spec is arguments.validate_spec
    assert tuple(coherer.design.LOOP_FORMULAS) == arguments.LOOP_ORDERS


@pytest.mark.parametrize("name, value", [("sample_rate", True), ("power", "4"), ("noise_bw_hz", None),
                                         ("damping", [0.7]), ("loop_order", 2.5)])
def test_spec_names_the_bad_argument(name, value):
    spec = dict(sample_rate=FS, power=4, noise_bw_hz=50.0, damping=0.707, loop_order=2)
    spec[name] = value
    with pytest.raises(ValueError, match=f"^{name} "):
        arguments.validate_spec(**spec)


def test_nco_range_default_is_the_unambiguous_range():
    # fs / (2 M): the range an M-th power loop can tell from its aliases (common practice)
    freq_range, tag_interval = arguments.loop_arguments(FS, 4, 50.0)
    assert freq_range == FS / 8 == arguments.max_freq_range(FS, 4) and tag_interval == 0
    assert math.isclose(arguments.check_freq_within("f", -6000, 6000.0), -6000.0)
