# SPDX-License-Identifier: GPL-3.0-or-later
"""Compile the numba signal kernels ahead of use, and say so when it has to happen.

numba compiles a kernel the first time a process needs it and keeps the machine
code in its on-disk cache (``cache=True``): next to the package's sources in
``__pycache__`` when that folder is writable, otherwise in the user's cache
folder. A cold cache costs tens of seconds to minutes (the lock detector and
the feed-forward estimator are the slow ones), so:

* set-up (``make setup``) and the CMake install step run this module
  (``python3 -m gnuradio.coherer._warmup``), which builds every block once and
  pushes a short stream through each in a real flowgraph, so that every kernel
  is compiled with the argument types ``work()`` uses and stored where the
  package will look for it;
* the ``coherer`` command calls :func:`prepare` before it starts: when a kernel
  it needs is not in the cache it prints one line (:data:`NOTE`) and compiles
  them before any timing or progress display starts.

Whether a kernel is cached is read from numba's own index file for it (the
same lookup numba makes: same source file stamp, bytecode and CPU).
"""

import argparse
import hashlib
import importlib
import os
import subprocess
import sys
import time

#: The kernels each group of blocks calls from Python, as (module, function). A group is
#: cold when any of them has no cache entry for this source and this CPU.
GROUPS = {
    "loop": (("_loop_kernel", "mth_power_loop"), ("_mixer_kernel", "mix_down")),   # + channel mixer
    "lock": (("lockstat", "window_sums"), ("lockstat", "decide_windows")),
    "feedforward": (("_feedforward_kernel", "feedforward"),),
}
#: Typical compile time of each group, s (measured on a shared 2-core virtual machine).
COMPILE_SECONDS = {"loop": 5.0, "lock": 35.0, "feedforward": 180.0}
#: Groups each sub-command of the ``coherer`` command runs.
COMMAND_GROUPS = {"run": ("loop", "lock"), "demo": ("loop", "lock"),
                  "bench": ("loop", "lock", "feedforward")}

#: The package this module belongs to (also when it runs as ``python -m``).
_PACKAGE = __package__ or "gnuradio.coherer"

NOTE = "coherer: compiling signal kernels, first run only, about {seconds} s"


# --- is it cached? ---------------------------------------------------------------------------

def _dispatchers(group):
    pkg = _PACKAGE
    for module_name, attr in GROUPS[group]:
        module = importlib.import_module(f"{pkg}.{module_name}")
        disp = getattr(module, attr, None)
        if disp is not None:
            yield disp


def _cached(disp):
    """True when numba's cache index holds an entry of ``disp`` for the current source,
    bytecode and CPU (what a call would load instead of compiling)."""
    cache = getattr(disp, "_cache", None)
    cache_file = getattr(cache, "_cache_file", None)
    if cache_file is None:                  # caching off or impossible here
        return False
    try:
        overloads = cache_file._load_index()
        codegen = disp.targetctx.codegen()
        magic = codegen.magic_tuple()
        code_hash = hashlib.sha256(disp.py_func.__code__.co_code).hexdigest()
    except Exception:                       # an unreadable index is a cold cache
        return False
    return any(len(k) == 3 and k[1] == magic and k[2][0] == code_hash for k in overloads)


def cold_groups(groups):
    """The groups among ``groups`` with a kernel that would be compiled on first use."""
    return [g for g in groups if not all(_cached(d) for d in _dispatchers(g))]


def estimate_s(groups, workers=1):
    """Rough compile time of ``groups``, s, when compiled by ``workers`` processes."""
    times = sorted((COMPILE_SECONDS[g] for g in groups), reverse=True)
    if not times:
        return 0
    lanes = [0.0] * max(1, min(workers, len(times)))
    for t in times:                          # longest first onto the least loaded worker
        lanes[lanes.index(min(lanes))] += t
    return int(5 * round(max(lanes) / 5)) or 5


# --- compiling -------------------------------------------------------------------------------

def _stream(n, power, seed=1):
    """A short noisy M-PSK stream with a small carrier offset (complex64)."""
    import numpy as np
    rng = np.random.default_rng(seed)
    k = np.arange(n)
    sym = np.exp(2j * np.pi * rng.integers(0, power, n) / power)
    noise = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * 0.2
    return (sym * np.exp(2j * np.pi * 1e-3 * k) + noise).astype(np.complex64)


def _run_block(block, x, outputs):
    """Push ``x`` through ``block`` (``outputs`` output ports) in a flowgraph."""
    from gnuradio import blocks, gr
    tb = gr.top_block()
    src = blocks.vector_source_c(x, False)
    sinks = [blocks.null_sink(gr.sizeof_gr_complex if i < 2 else gr.sizeof_float) for i in range(outputs)]
    tb.connect(src, block)
    for i, sink in enumerate(sinks):
        tb.connect((block, i), sink)
    tb.run()


def warm_group(group):
    """Build the group's blocks and run a short stream through them (compiles and caches
    every kernel with the argument types ``work()`` passes)."""
    pkg = importlib.import_module(_PACKAGE)
    x = _stream(1 << 14, 4)
    if group == "loop":
        _run_block(pkg.mth_power_loop_cc(1e4, 2, 20.0, tag_interval=1000, diagnostics=True), x, 4)
        _run_block(pkg.mth_power_loop_cc(1e4, 4, 20.0), x, 1)
        from .channels import _mixer
        _run_block(_mixer(1e3, 1e4), x, 1)
    elif group == "lock":
        _run_block(pkg.lock_detector_cc(1e4, 2, 1024, status_interval=2048), x, 1)
    elif group == "feedforward":
        _run_block(pkg.mth_power_feedforward_cc(1e4, 4, 64, diagnostics=True), x, 4)
        _run_block(pkg.mth_power_feedforward_cc(1e4, 2, 64), x, 1)
    else:
        raise ValueError(f"unknown kernel group {group!r}; known: {', '.join(GROUPS)}")


def _package_parent():
    """The folder that holds this ``coherer`` package (``.../gnuradio``)."""
    return os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def compile_groups(groups, workers=None):
    """Compile ``groups``: in this process, or with several cores in one child process per
    group (the children import this same copy of the package). Returns the seconds taken."""
    started = time.monotonic()
    workers = workers or min(len(groups), os.cpu_count() or 1)
    if workers <= 1 or len(groups) <= 1:
        for g in groups:
            warm_group(g)
        return time.monotonic() - started
    code = ("import sys, gnuradio; gnuradio.__path__.insert(0, sys.argv[1]); "
            "from gnuradio.coherer import _warmup; _warmup.warm_group(sys.argv[2])")
    pending = sorted(groups, key=lambda g: -COMPILE_SECONDS[g])
    running = []
    failed = []
    while pending or running:
        while pending and len(running) < workers:
            g = pending.pop(0)
            running.append((g, subprocess.Popen([sys.executable, "-c", code, _package_parent(), g],
                                                stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                                stderr=subprocess.PIPE, text=True)))
        g, proc = running.pop(0)
        _, err = proc.communicate()
        if proc.returncode != 0:
            failed.append((g, err.strip().splitlines()[-1:] or ["exit status %d" % proc.returncode]))
    if failed:
        raise RuntimeError("; ".join(f"{g}: {msg[0]}" for g, msg in failed))
    return time.monotonic() - started


def prepare(groups, stream=None):
    """Compile the cold kernels among ``groups`` now, after one line on ``stream`` (stderr)
    saying so; nothing is printed when they are all cached. Returns the cold groups."""
    cold = cold_groups(groups)
    if cold:
        stream = stream or sys.stderr
        workers = min(len(cold), os.cpu_count() or 1)
        print(NOTE.format(seconds=estimate_s(cold, workers)), file=stream, flush=True)
        compile_groups(cold, workers)
    return cold


def main(argv=None):
    """``python3 -m gnuradio.coherer._warmup [GROUP ...]``: compile (and cache) the kernels
    of the given groups, default all. Exit status 0 when they are all cached afterwards."""
    p = argparse.ArgumentParser(prog="python3 -m gnuradio.coherer._warmup",
                                description="Compile gr-coherer's signal kernels into numba's cache.")
    p.add_argument("groups", nargs="*", metavar="GROUP",
                   help=f"kernel groups ({', '.join(GROUPS)}; default all)")
    p.add_argument("--check", action="store_true",
                   help="only report which groups are not cached (exit 1 when any is not)")
    args = p.parse_args(argv)
    unknown = [g for g in args.groups if g not in GROUPS]
    if unknown:
        p.error(f"unknown group {unknown[0]!r} (known: {', '.join(GROUPS)})")
    groups = list(dict.fromkeys(args.groups)) or list(GROUPS)
    cold = cold_groups(groups)
    if args.check:
        print("not cached: " + (", ".join(cold) if cold else "none"))
        return 1 if cold else 0
    if not cold:
        return 0
    workers = min(len(cold), os.cpu_count() or 1)
    print(f"compiling signal kernels ({', '.join(cold)}), about {estimate_s(cold, workers)} s",
          file=sys.stderr, flush=True)
    seconds = compile_groups(cold, workers)
    still = cold_groups(groups)
    if still:
        print(f"the kernels of {', '.join(still)} were compiled but are not cached "
              f"(is the cache folder writable?)", file=sys.stderr)
        return 1
    print(f"signal kernels compiled in {seconds:.0f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
