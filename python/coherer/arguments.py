# SPDX-License-Identifier: GPL-3.0-or-later
"""Argument rules shared by the blocks, the loop designer, the command line and the GRC
asserts: every check raises ``ValueError`` naming the first argument out of range and returns
the value in its working type.

Units: rates in samples/s, bandwidths and frequencies in Hz, angles in rad, windows and
intervals in samples, thresholds as lock metrics (0..1).
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

#: Lock-detector window lengths, samples.
MIN_WINDOW = 32
MAX_WINDOW = 1 << 20
#: Fewest symbols a lock-detector window may hold when the input is oversampled.
MIN_SYMBOLS = 16
#: Largest feed-forward estimation window, samples.
MAX_FEEDFORWARD_WINDOW = 65536

#: Signal placements of the pulse-shape model (see :func:`coherer.design.detector_noise`).
PLACEMENT_CHANNEL = "channel"
PLACEMENT_MATCHED = "matched"
PLACEMENTS = (PLACEMENT_CHANNEL, PLACEMENT_MATCHED)
#: Largest samples per symbol (the pulse-shape model and the lock detector).
MAX_SAMPLES_PER_SYMBOL = 64
#: Largest phase-modulation index (rad) of the residual-carrier model.
MAX_MODULATION_INDEX = 1.4

_REAL = (int, float, np.integer, np.floating)


def is_real(value):
    """True for a real number (bool excluded)."""
    return isinstance(value, _REAL) and not isinstance(value, bool)


def real(name, value):
    """``value`` if it is a real number (bool excluded), else ``ValueError`` naming ``name``."""
    if not is_real(value):
        raise ValueError(f"{name} must be a number, got {value!r}")
    return value


def integer_in(name, value, lo, hi, unit=""):
    """``int(value)`` for a real with an integer value in ``lo..hi``."""
    if not is_real(value) or not np.isfinite(value) or int(value) != value or not lo <= value <= hi:
        raise ValueError(f"{name} must be an integer in {lo}..{hi}{unit}, got {value!r}")
    return int(value)


def check_sample_rate(sample_rate):
    """A finite rate > 0 samples/s, as float."""
    if not is_real(sample_rate) or not np.isfinite(sample_rate) or sample_rate <= 0:
        raise ValueError(f"sample_rate must be a positive number of samples/s, got {sample_rate!r}")
    return float(sample_rate)


def check_power(power):
    """The symmetry order M, an integer in 1..MAX_POWER."""
    return integer_in("power", power, 1, MAX_POWER)


def check_point_angle(point_angle):
    """A finite angle in rad (``None``, the block's default, passes unchanged)."""
    if point_angle is not None and (not is_real(point_angle) or not np.isfinite(point_angle)):
        raise ValueError(f"point_angle must be a finite angle in rad, got {point_angle!r}")
    return point_angle


def max_freq_range(sample_rate, power):
    """Widest NCO range (Hz) of an M-th power loop: the unambiguous ``sample_rate / (2 M)``."""
    return sample_rate / (2.0 * power)


def check_freq_within(name, hz, limit_hz, limit_name="freq_range_hz"):
    """A finite frequency (Hz) within +-``limit_hz``, as float."""
    if not is_real(hz) or not np.isfinite(hz) or abs(hz) > limit_hz:
        raise ValueError(f"{name} must be within +-{limit_name} = +-{limit_hz:g} Hz, got {hz!r}")
    return float(hz)


def validate_spec(sample_rate, power, noise_bw_hz, damping, loop_order):
    """Raise ``ValueError`` naming the first out-of-range (or non-numeric) argument of a loop
    specification (samples/s, M, Hz, damping factor, order)."""
    for name, value in (("sample_rate", sample_rate), ("power", power), ("noise_bw_hz", noise_bw_hz),
                        ("damping", damping), ("loop_order", loop_order)):
        real(name, value)
    check_sample_rate(sample_rate)
    check_power(power)
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
    if not is_real(rolloff) or not 0.0 <= rolloff <= 1.0:
        raise ValueError(f"rolloff must be a number in 0..1, got {rolloff!r}")
    if placement not in PLACEMENTS:
        raise ValueError(f"placement must be one of {', '.join(PLACEMENTS)}, got {placement!r}")
    if modulation_index is not None:
        beta = modulation_index
        if not is_real(beta) or not 0.0 <= beta <= MAX_MODULATION_INDEX:
            raise ValueError(f"modulation_index must be a number in 0..{MAX_MODULATION_INDEX} rad, got {beta!r}")
        if power != 1:
            raise ValueError(f"modulation_index applies to a residual carrier (power M = 1) only, got power {power!r}")


def loop_arguments(sample_rate, power, noise_bw_hz, damping=0.707, loop_order=2, freq_guess_hz=0.0,
                   freq_range_hz=None, point_angle=None, tag_interval=0):
    """The M-th power loop's arguments, checked in order; returns the NCO range (Hz, the default
    ``sample_rate / (2 M)`` for ``None``) and the tag interval (samples) in working form."""
    validate_spec(sample_rate, power, noise_bw_hz, damping, loop_order)
    max_range = max_freq_range(float(sample_rate), int(power))
    if freq_range_hz is None:
        freq_range_hz = max_range
    if not is_real(freq_range_hz) or not np.isfinite(freq_range_hz) or not 0 < freq_range_hz <= max_range:
        raise ValueError(
            f"freq_range_hz must be in (0, sample_rate/(2*power)] = (0, {max_range:g}] Hz, got {freq_range_hz!r}")
    check_freq_within("freq_guess_hz", freq_guess_hz, freq_range_hz)
    check_point_angle(point_angle)
    if not is_real(tag_interval) or not np.isfinite(tag_interval) or int(tag_interval) != tag_interval \
            or tag_interval < 0:
        raise ValueError(f"tag_interval must be an integer >= 0 samples, got {tag_interval!r}")
    return float(freq_range_hz), int(tag_interval)


def detector_arguments(sample_rate, power, window=1024, lock_threshold=None, unlock_threshold=None,
                       point_angle=None, status_interval=0, samples_per_symbol=1):
    """The lock detector's arguments, checked in order. Returns a dict of the working values:
    ``power``, ``window``, ``samples_per_symbol``, ``symbols`` (per window), ``lock_threshold`` and
    ``unlock_threshold`` (``None``: the default; a lock threshold below the default unlock one
    caps the unlock threshold) and ``status_interval``."""
    from . import lockstat
    for name, value in (("sample_rate", sample_rate), ("power", power), ("window", window),
                        ("status_interval", status_interval), ("samples_per_symbol", samples_per_symbol),
                        ("lock_threshold", lock_threshold), ("unlock_threshold", unlock_threshold),
                        ("point_angle", point_angle)):
        if value is not None:
            real(name, value)
    check_sample_rate(sample_rate)
    power = check_power(power)
    window = integer_in("window", window, MIN_WINDOW, MAX_WINDOW, " samples")
    sps = integer_in("samples_per_symbol", samples_per_symbol, 1, MAX_SAMPLES_PER_SYMBOL)
    if window % sps or (sps > 1 and window // sps < MIN_SYMBOLS):
        raise ValueError(f"window must be a multiple of samples_per_symbol = {sps} holding at least "
                         f"{MIN_SYMBOLS} symbols, got {window}")
    symbols = window // sps
    default_lock, default_unlock = lockstat.default_thresholds(symbols)
    if lock_threshold is not None and (not np.isfinite(lock_threshold) or not 0.0 < lock_threshold <= 1.0):
        raise ValueError(f"lock_threshold must be in (0, 1], got {lock_threshold!r}")
    lock_floor = default_lock if lock_threshold is None else lock_threshold
    if unlock_threshold is None and lock_threshold is not None and lock_threshold < default_unlock:
        unlock_threshold = lock_threshold          # a low fixed lock threshold caps the unlock one
    if unlock_threshold is not None and (not np.isfinite(unlock_threshold)
                                         or not 0.0 <= unlock_threshold <= lock_floor):
        raise ValueError(
            f"unlock_threshold must be in [0, lock_threshold] = [0, {lock_floor:g}], got {unlock_threshold!r}")
    check_point_angle(point_angle)
    if (not np.isfinite(status_interval) or int(status_interval) != status_interval
            or (status_interval != 0 and status_interval < window)):
        raise ValueError(
            f"status_interval must be 0 (off) or an integer >= window = {window} samples, got {status_interval!r}")
    return dict(power=power, window=window, samples_per_symbol=sps, symbols=symbols,
                lock_threshold=None if lock_threshold is None else float(lock_threshold),
                unlock_threshold=None if unlock_threshold is None else float(unlock_threshold),
                status_interval=int(status_interval))


def feedforward_arguments(sample_rate, power, window, point_angle=None):
    """The feed-forward estimator's numeric arguments, checked in order; returns
    ``(power, window)`` as integers."""
    check_sample_rate(sample_rate)
    power = check_power(power)
    window = integer_in("window", window, 1, MAX_FEEDFORWARD_WINDOW, " samples")
    check_point_angle(point_angle)
    return power, window
