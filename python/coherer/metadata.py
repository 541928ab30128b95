# SPDX-License-Identifier: GPL-3.0-or-later
"""The one place that names gr-coherer's stream-tag keys, message ports and
status-dict keys (see the metadata schema in the design contract).

Every block, the command-line tool and the tests import these names from
here; no other module spells them out. It also builds the status dict
(:func:`status_dict`) and decodes ``rx_time`` tags (:func:`decode_rx_time`,
:func:`elapsed_time_s`), so every block does both the same way.
"""

import pmt

# Stream-tag keys ------------------------------------------------------------
CARRIER_LOCK = "carrier_lock"      # pmt bool: lock state changed to this value here
CARRIER_STATUS = "carrier_status"  # pmt dict: periodic / on-change status
CYCLE_SLIP = "cycle_slip"          # pmt long: signed slips of 2*pi/M declared here
CARRIER_FREQ = "carrier_freq"      # pmt double: NCO frequency estimate, Hz
RX_TIME = "rx_time"                # hardware time tag (uint64 s, double frac), read only

# Message ports --------------------------------------------------------------
COMMAND_PORT = "command"           # in: pmt dict of runtime changes
STATUS_PORT = "status"             # out: the status dict

# Keys accepted in a command dict --------------------------------------------
CMD_NOISE_BW_HZ = "noise_bw_hz"
CMD_DAMPING = "damping"
CMD_FREQ_HZ = "freq_hz"

# Keys of the status dict -------------------------------------------------------
ST_LOCKED = "locked"      # bool
ST_METRIC = "metric"      # double
ST_ESN0_DB = "esn0_db"    # double
ST_SAMPLE = "sample"      # uint64, absolute stream offset
ST_TIME_S = "time_s"      # double, seconds
ST_FREQ_HZ = "freq_hz"    # double, Hz, only when an upstream carrier_freq was seen
ST_WINDOW_START = "window_start"  # uint64, first sample of the window these values describe

# Interned pmt symbols, built once --------------------------------------------
CARRIER_LOCK_PMT = pmt.intern(CARRIER_LOCK)
CARRIER_STATUS_PMT = pmt.intern(CARRIER_STATUS)
CYCLE_SLIP_PMT = pmt.intern(CYCLE_SLIP)
CARRIER_FREQ_PMT = pmt.intern(CARRIER_FREQ)
RX_TIME_PMT = pmt.intern(RX_TIME)
COMMAND_PORT_PMT = pmt.intern(COMMAND_PORT)
STATUS_PORT_PMT = pmt.intern(STATUS_PORT)
ST_LOCKED_PMT = pmt.intern(ST_LOCKED)
ST_METRIC_PMT = pmt.intern(ST_METRIC)
ST_ESN0_DB_PMT = pmt.intern(ST_ESN0_DB)
ST_SAMPLE_PMT = pmt.intern(ST_SAMPLE)
ST_TIME_S_PMT = pmt.intern(ST_TIME_S)
ST_FREQ_HZ_PMT = pmt.intern(ST_FREQ_HZ)
ST_WINDOW_START_PMT = pmt.intern(ST_WINDOW_START)


# Status dict -------------------------------------------------------------------

def status_dict(locked, metric, esn0_db, sample, time_s, window_start, freq_hz=None):
    """The status dict (pmt) published as ``carrier_status`` tag and ``status`` message.

    locked: bool; metric: lock statistic; esn0_db: Es/N0 estimate, dB;
    sample: absolute stream offset (uint64) where the status is placed (the last
    sample of the deciding window); time_s: seconds (absolute with rx_time, else
    offset / sample_rate); window_start: first sample (uint64) of the window whose
    decision and values these are; freq_hz: latest upstream carrier_freq tag
    value, Hz, or None to leave the key out.
    """
    d = pmt.make_dict()
    d = pmt.dict_add(d, ST_LOCKED_PMT, pmt.from_bool(bool(locked)))
    d = pmt.dict_add(d, ST_METRIC_PMT, pmt.from_double(float(metric)))
    d = pmt.dict_add(d, ST_ESN0_DB_PMT, pmt.from_double(float(esn0_db)))
    d = pmt.dict_add(d, ST_SAMPLE_PMT, pmt.from_uint64(int(sample)))
    d = pmt.dict_add(d, ST_TIME_S_PMT, pmt.from_double(float(time_s)))
    d = pmt.dict_add(d, ST_WINDOW_START_PMT, pmt.from_uint64(int(window_start)))
    if freq_hz is not None:
        d = pmt.dict_add(d, ST_FREQ_HZ_PMT, pmt.from_double(float(freq_hz)))
    return d


def status_from_pmt(d):
    """A status dict (pmt) as a plain Python dict with the same keys."""
    return pmt.to_python(d)


# rx_time (hardware time tag) ------------------------------------------------------

def rx_time_pmt(seconds, fraction):
    """An ``rx_time`` tag value: pmt tuple (uint64 whole seconds, double fraction of a second)."""
    return pmt.make_tuple(pmt.from_uint64(int(seconds)), pmt.from_double(float(fraction)))


def decode_rx_time(value):
    """``(whole_seconds, fraction)`` from an ``rx_time`` tag value, or None if it is not
    a 2-tuple of (integer seconds, real fraction)."""
    try:
        if not pmt.is_tuple(value) or pmt.length(value) != 2:
            return None
        secs = pmt.to_python(pmt.tuple_ref(value, 0))
        frac = pmt.to_python(pmt.tuple_ref(value, 1))
        if isinstance(secs, bool) or not isinstance(secs, (int, float)) or not isinstance(frac, (int, float)):
            return None
        return int(secs), float(frac)
    except (RuntimeError, ValueError, TypeError):
        return None


def elapsed_time_s(origin, sample, sample_rate):
    """Time (s) of absolute offset ``sample``: ``origin = (tag_offset, seconds, fraction)``
    from the latest ``rx_time`` at or before it, or None for ``sample / sample_rate``."""
    if origin is None:
        return sample / sample_rate
    offset, secs, frac = origin
    return secs + (frac + (sample - offset) / sample_rate)
