# SPDX-License-Identifier: GPL-3.0-or-later
"""Long work() calls for the Python blocks.

A Python block pays a fixed cost per work() call (about 150 us of scheduler and
gateway time on the benchmark machine), so the blocks ask GNU Radio for long
calls: a declared but unused history makes GNU Radio give the upstream buffer
room for about twice ``CALL_ITEMS`` items, and the block's own output buffers
hold two calls. Calls then average about half of ``CALL_ITEMS`` samples (the
upstream block and this one work on alternate halves). Nothing waits for a
call to fill: a slow live stream still gets small, prompt calls.
"""

#: Items of history each Python block declares (calls of up to this many samples).
#: Of 32768, 65536 and 131072, the largest gave the highest rates on the 2-core
#: benchmark machine (file source -> block -> null sink, 4M samples: copy block
#: 87 / 130 / 185 Msps, lock detector 74 / 105 / 124 Msps). Later, with faster kernels
#: (16M samples, three runs each): 2**18 against 2**17 gave the lock detector 182-193
#: against 125-129 Msps, the feed-forward block 102-105 against 91-96, the squaring
#: loop 62-65 against 47-64; 2**19 and 2**20 were no faster. Memory: about 4 MB per
#: output buffer (complex64).
CALL_ITEMS = 1 << 18


def request_long_calls(block, items=CALL_ITEMS, multiple=1):
    """Arrange buffers so that ``block`` gets work() calls of up to ``items`` samples.

    ``multiple`` is the block's output multiple (its output buffer holds at least
    two). Returns the number of leading history samples work() must skip.
    """
    block.set_history(items)
    level = block.logger.get_string_level()
    block.logger.set_level("warn")          # GNU Radio logs set_min_output_buffer at info level
    block.set_min_output_buffer(2 * max(items, multiple))
    block.logger.set_level(level)
    return items - 1
