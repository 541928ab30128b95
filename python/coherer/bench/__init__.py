# SPDX-License-Identifier: GPL-3.0-or-later
"""Throughput, scaling, latency and memory measurements behind ``coherer bench``.

Modules
    stream        synthetic noisy M-PSK test streams (in memory and as cf32 files)
    creference    the plain C reference loop (reference_loop.c): compile and run it
    measure       kernel-only, in-flowgraph, framework-floor, two-chain and latency timings
    soak          resident-memory growth over a long run
    suite         the whole benchmark: runs everything, builds the result dict and the table
"""
