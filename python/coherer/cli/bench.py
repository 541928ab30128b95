# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer bench``: throughput of every block against a plain C loop, framework floor,
two-core scaling, first-sample latency and (``--soak``) memory over a long run."""

import contextlib
import json
import os
import sys

from . import UserError


def register(subparsers):
    p = subparsers.add_parser(
        "bench", help="measure block throughput against a compiled C reference loop",
        description="Measure kernel-only and in-flowgraph throughput of each block on a "
                    "synthetic noisy M-PSK stream, against a plain C loop compiled now with "
                    "cc -O3 -march=native and run on the same data; plus the Python-block "
                    "floor, two chains on two cores, first-sample latency and, with --soak, "
                    "memory growth over 2e8 samples. Figures are medians; '~' marks noisy ones.")
    p.add_argument("--quick", action="store_true",
                   help="short runs and 2 repetitions (a smoke test, figures are rough)")
    p.add_argument("--json", action="store_true", help="print the results as JSON instead of a table")
    p.add_argument("--soak", action="store_true",
                   help="also run 2e8 samples through the squaring loop and report RSS growth")
    p.add_argument("--soak-samples", type=float, default=None, metavar="N",
                   help="samples of the soak run (default 2e8)")
    p.add_argument("--carriers", action="store_true",
                   help="instead: several carriers in one 1 Msps capture (channels of 25 ksym/s "
                        "at 4 samples per symbol): carriers per core, and 2 worker processes vs 1")
    p.set_defaults(func=run_command)


def run_command(args):
    from ..bench import creference, suite

    kwargs = {}
    if args.soak_samples is not None:
        if not args.soak_samples >= 1e5:
            raise UserError(f"--soak-samples must be >= 1e5, got {args.soak_samples:g}")
        kwargs["soak_samples"] = int(args.soak_samples)
    quiet = args.json

    def progress(msg):
        if not quiet:
            print(f"bench: {msg} ...", file=sys.stderr, flush=True)

    from .._warmup import COMMAND_GROUPS, prepare
    prepare(COMMAND_GROUPS["bench"])        # compile before anything is timed
    if args.carriers:
        return _carriers(args, progress)
    try:
        with _stdout_to_stderr() if args.json else contextlib.nullcontext():
            result = suite.run(quick=args.quick, soak=args.soak or "soak_samples" in kwargs,
                               progress=progress, **kwargs)
    except creference.CompilerMissing as exc:
        raise UserError(str(exc)) from None
    if args.json:
        print(json.dumps(result, indent=1))
    else:
        print(suite.format_table(result))
    return 0


def _carriers(args, progress):
    from ..bench import carriers
    with _stdout_to_stderr():
        result = carriers.run(quick=args.quick, progress=progress)
    print(json.dumps(result, indent=1) if args.json else carriers.format_table(result))
    return 0


@contextlib.contextmanager
def _stdout_to_stderr():
    """Send file descriptor 1 to stderr for a while: GNU Radio's logger writes to stdout
    (Debian's default), which must not end up inside the JSON document."""
    sys.stdout.flush()
    saved = os.dup(1)
    os.dup2(2, 1)
    try:
        yield
    finally:
        sys.stdout.flush()
        os.dup2(saved, 1)
        os.close(saved)
