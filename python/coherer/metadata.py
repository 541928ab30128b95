# SPDX-License-Identifier: GPL-3.0-or-later
"""The one place that names gr-coherer's stream-tag keys, message ports and
status-dict keys (see the metadata schema in the design contract).

Every block, the command-line tool and the tests import these names from
here; no other module spells them out.
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

# Interned pmt symbols, built once --------------------------------------------
CARRIER_LOCK_PMT = pmt.intern(CARRIER_LOCK)
CARRIER_STATUS_PMT = pmt.intern(CARRIER_STATUS)
CYCLE_SLIP_PMT = pmt.intern(CYCLE_SLIP)
CARRIER_FREQ_PMT = pmt.intern(CARRIER_FREQ)
RX_TIME_PMT = pmt.intern(RX_TIME)
COMMAND_PORT_PMT = pmt.intern(COMMAND_PORT)
STATUS_PORT_PMT = pmt.intern(STATUS_PORT)
