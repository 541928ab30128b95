# SPDX-License-Identifier: GPL-3.0-or-later
"""Memory soak: resident-set growth of a long run through one block.

A repeating file source feeds ``total`` samples through the block into a null
sink. The resident set size (RSS) of this process is sampled while it runs;
the baseline is taken once ``warmup_fraction`` of the samples have passed
(buffers allocated, kernel compiled, caches filled). Growth after that point
must stay below ``GROWTH_LIMIT_MB``.
"""

import os
import time

from gnuradio import blocks, gr

#: Largest acceptable RSS growth after warm-up, MB.
GROWTH_LIMIT_MB = 5.0
MB = 1024.0 * 1024.0


def rss_bytes():
    """Resident set size of this process, bytes (from /proc/self/statm)."""
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def soak(make_block, data_path, total, warmup_fraction=0.1, poll_s=0.05):
    """Run ``total`` samples (cf32 file repeated) through ``make_block()`` and report
    RSS growth after warm-up. Returns a dict (sizes in MB, rate in Msps)."""
    total = int(total)
    tb = gr.top_block()
    src = blocks.file_source(gr.sizeof_gr_complex, str(data_path), True)
    head = blocks.head(gr.sizeof_gr_complex, total)
    blk = make_block()
    snk = blocks.null_sink(gr.sizeof_gr_complex)
    tb.connect(src, head, blk, snk)
    warm_at = int(warmup_fraction * total)
    baseline = None
    peak = 0
    t0 = time.perf_counter()
    tb.start()
    while True:
        done = head.nitems_written(0) >= total
        rss = rss_bytes()
        if baseline is None and head.nitems_written(0) >= warm_at:
            baseline = rss
        elif baseline is not None:
            peak = max(peak, rss)
        if done:
            break
        time.sleep(poll_s)
    tb.wait()
    seconds = time.perf_counter() - t0
    final = rss_bytes()
    peak = max(peak, final, baseline)
    return {
        "samples": total,
        "seconds": seconds,
        "msps": total / seconds / 1e6,
        "rss_warm_mb": baseline / MB,
        "rss_peak_mb": peak / MB,
        "rss_final_mb": final / MB,
        "growth_mb": (peak - baseline) / MB,
        "limit_mb": GROWTH_LIMIT_MB,
        "passed": bool((peak - baseline) / MB < GROWTH_LIMIT_MB),
    }
