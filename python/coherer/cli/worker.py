# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer worker --listen ENDPOINT``: run carrier chains for ``coherer run`` on
another host (or process), reached over ZeroMQ (see :mod:`coherer.worker`)."""

import os
import re

from . import UserError

#: tcp://HOST:PORT with a numeric port (HOST: a name, an IPv4 address or *).
ENDPOINT = re.compile(r"^tcp://([A-Za-z0-9.\-]+|\*):(\d{1,5})$")


def check_endpoint(text, option):
    """``text`` as a tcp://HOST:PORT endpoint, or UserError naming ``option``."""
    m = ENDPOINT.match(str(text))
    if not m or not 0 < int(m.group(2)) < 65536:
        raise UserError(f"{option} must be tcp://HOST:PORT (port 1..65535), got {text!r}")
    return text


def check_cpus(text, option="--cpus"):
    """``text`` ("0" or "0,2") as a set of CPU numbers this process may run on, or UserError."""
    allowed = os.sched_getaffinity(0)
    try:
        cpus = {int(part) for part in str(text).split(",")}
    except ValueError:
        raise UserError(f"{option} must be CPU numbers separated by commas, got {text!r}") from None
    if not cpus <= allowed:
        raise UserError(f"{option} {text}: this host lets it use CPUs {','.join(map(str, sorted(allowed)))}")
    return cpus


def register(subparsers):
    p = subparsers.add_parser(
        "worker", help="serve carrier chains for 'coherer run --worker' over ZeroMQ",
        description="Listen on one ZeroMQ endpoint (and bind nothing else) for the channel "
                    "chains 'coherer run --carrier ... --worker ENDPOINT' sends, run them and "
                    "send the results back. Runs until interrupted.",
        epilog="Example: coherer worker --listen tcp://0.0.0.0:5710 on the other host, then "
               "coherer run CAPTURE --carrier ... --worker tcp://thathost:5710 here.")
    p.add_argument("--listen", required=True, metavar="ENDPOINT",
                   help="the endpoint to bind, tcp://HOST:PORT")
    p.add_argument("--cpus", metavar="LIST",
                   help="run only on these CPUs, e.g. 0 or 0,2 (default: all this process may use); "
                        "'coherer run --workers N' gives each of its workers one CPU of its own")
    p.set_defaults(func=main)
    return p


def main(args):
    from .._warmup import COMMAND_GROUPS, prepare
    from ..worker import serve
    endpoint = check_endpoint(args.listen, "--listen")
    if args.cpus is not None:
        os.sched_setaffinity(0, check_cpus(args.cpus))     # every thread started later inherits it
    prepare(COMMAND_GROUPS["run"])          # a cold kernel cache: compile before the first job
    try:
        serve(endpoint)
    except RuntimeError as exc:
        raise UserError(f"--listen {endpoint}: cannot bind ({exc})") from None
    except KeyboardInterrupt:
        return 0
    return 0
