# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer run --carrier HZ[:M] ...``: several carriers of one wideband recording.

Plans one channel per carrier (:mod:`coherer.channels`), runs them, and writes
what ``coherer run`` writes for one carrier, per carrier: the events table,
symbol-rate and summary lines on stdout, the events JSON (every event with its
``carrier``), the report (one folder with a timeline per carrier, and a
``summary.json`` over all of them) and SigMF annotations that also give each
channel's edges.
"""

import argparse
import sys
from pathlib import Path

from . import UserError, errors

#: Folder of carrier ``i`` (from 1) inside the report folder.
REPORT_FOLDER = "carrier_{}"


def carrier_spec(text):
    """``HZ[:M]``: a carrier offset from the capture centre (k, M, G suffixes allowed) and
    optionally its own M. Returns ``(hz, M or None)``."""
    from ..arguments import MAX_POWER
    hz, sep, m = str(text).partition(":")
    f = errors.finite_number(hz)
    if not sep:
        return f, None
    try:
        power = int(m)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: M after ':' must be an integer") from None
    if not 1 <= power <= MAX_POWER:
        raise argparse.ArgumentTypeError(f"{text!r}: M must be in 1..{MAX_POWER}")
    return f, power


#: Most local worker processes.
MAX_WORKERS = 64


def add_options(g):
    """The several-carrier options of ``coherer run``."""
    from .run import int_in
    g.add_argument("--carrier", type=carrier_spec, action="append", metavar="HZ[:M]",
                   help="a carrier to receive, Hz from the capture centre, optionally with its "
                        "own M (e.g. -300k:2, 50k:4); repeat for several carriers, each gets "
                        "its own channel, loop and lock detector")
    g.add_argument("--channel-bw", type=errors.positive_number, metavar="HZ",
                   help="with --carrier: the band kept around every carrier, Hz (default: symbol "
                        "rate x 1.35, the rate given or estimated per carrier)")
    g.add_argument("--workers", type=int_in(1, MAX_WORKERS), default=0, metavar="N",
                   help="with --carrier: run the carriers' chains in N worker processes on this "
                        "host (connected over ZeroMQ on loopback); the results are the same")
    g.add_argument("--worker", action="append", default=[], metavar="ENDPOINT",
                   help="with --carrier: also use the worker at tcp://HOST:PORT (started there "
                        "with 'coherer worker --listen tcp://0.0.0.0:PORT'); repeatable")


def _library_message(msg):
    for name, option in (("channel_bw", "--channel-bw"), ("carrier", "--carrier")):
        if msg.startswith(name):
            return option + msg[len(name):]
    return errors.option_wording(msg, sample_rate_option=False)


def plan(args, rec, settings):
    """The channel plans, with every setting checked against each channel (UserError)."""
    from ..channels import channel_settings, plan_channels
    from ..arguments import validate_spec
    if args.freq_guess:
        raise UserError("--freq-guess does not apply with --carrier (each channel's loop "
                        "starts at its carrier)")
    try:
        plans = plan_channels(rec, args.carrier, settings, args.channel_bw)
    except ValueError as exc:
        raise UserError(_library_message(str(exc))) from None
    for p in plans:
        s = channel_settings(settings, p)
        try:
            validate_spec(p.channel_rate, s.power, s.noise_bw_hz, s.damping, s.loop_order)
        except ValueError as exc:
            raise UserError(f"carrier {p.carrier_hz:g} Hz (channel at {p.channel_rate:g} "
                            f"samples/s): {_library_message(str(exc))}") from None
    return plans


def header_line(p):
    """One line naming a carrier and its channel."""
    return (f"carrier {p.carrier_hz:+.6g} Hz, M={p.power}: channel {p.lower_edge_hz:+.6g} .. "
            f"{p.upper_edge_hz:+.6g} Hz, {p.channel_rate:.6g} samples/s (decimation {p.decimation})")


def channel_dict(p):
    """JSON-ready description of a channel."""
    return {"carrier_hz": p.carrier_hz, "power": p.power, "bandwidth_hz": p.bandwidth_hz,
            "freq_lower_edge_hz": p.lower_edge_hz, "freq_upper_edge_hz": p.upper_edge_hz,
            "decimation": p.decimation, "channel_rate": p.channel_rate, "filter_taps": len(p.taps),
            "filter_delay_samples": p.delay}


def events_of(results):
    """Every carrier's events (with the detector's symbol timing), merged by sample."""
    from .run import events_with_timing
    events = [e for r in results for e in events_with_timing(r.result)]
    return sorted(events, key=lambda e: (e["sample"], e["carrier"], e["event"] != "cycle_slip"))


def annotations_of(results, rec):
    """Each carrier's SigMF annotations, with its channel's edges (absolute when the
    capture frequency is known, else from the capture centre)."""
    from .run import annotations
    base = rec.center_freq_hz or 0.0
    notes = []
    for r in results:
        p = r.plan
        for a in annotations(r.result):
            a["core:freq_lower_edge"] = round(base + p.lower_edge_hz, 3)
            a["core:freq_upper_edge"] = round(base + p.upper_edge_hz, 3)
            a["core:comment"] = f"carrier {p.carrier_hz:+.6g} Hz: " + a["core:comment"]
            notes.append(a)
    return notes


def write_report(results, folder):
    """One sub-folder per carrier (timeline, constellation, its summary) and a
    ``summary.json`` over all carriers."""
    from .. import report
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    carriers = []
    for i, r in enumerate(results):
        sub = REPORT_FOLDER.format(i + 1)
        title = f"carrier {r.plan.carrier_hz:+.6g} Hz, M={r.plan.power}"
        s = report.write_report(r.result, folder / sub, extra={"channel": channel_dict(r.plan)},
                                title=title)
        s["folder"] = sub
        carriers.append(s)
    report.write_json(folder / "summary.json", {"carriers": carriers})


def check_workers(args):
    """--workers / --worker need --carrier, and endpoints must be tcp://HOST:PORT."""
    from .worker import check_endpoint
    if (args.workers or args.worker) and not args.carrier:
        raise UserError("--workers and --worker need --carrier")
    for ep in args.worker:
        check_endpoint(ep, "--worker")


def _spread(args, rec, settings, plans, bar):
    from ..spread import run_spread, start_local_workers, stop_local_workers
    local = start_local_workers(args.workers) if args.workers else []
    try:
        endpoints = [ep for ep, _ in local] + list(args.worker)
        return run_spread(rec, settings, plans, endpoints, progress=bar, processes=dict(local))
    finally:
        stop_local_workers(local)


def process(args, rec, settings, out):
    """Plan, run and print; returns the list of :class:`coherer.channels.CarrierResult`."""
    from .. import report
    from ..channels import run_channels
    from ..receiver import ReceiverError
    from .console import Progress, events_table
    from .run import summary_line, timing_line

    plans = plan(args, rec, settings)
    for note in rec.warnings:
        print(f"coherer: warning: {note}", file=sys.stderr)
    bar = Progress("coherer run")
    try:
        if args.workers or args.worker:
            results = _spread(args, rec, settings, plans, bar)
        else:
            results = run_channels(rec, settings, plans, progress=bar)
    except ValueError as exc:      # a block rejected a setting
        raise UserError(_library_message(str(exc))) from None
    except ReceiverError:
        raise
    finally:
        bar.close()
    for r in results:
        out.write(header_line(r.plan) + "\n")
        out.write(events_table(r.result.events, rec.center_freq_hz) + "\n")
        out.write(timing_line(r.result) + "\n")
        out.write(summary_line(r.result) + "\n")
    if args.events:
        report.write_json(args.events, events_of(results))
    return results


__all__ = ["carrier_spec", "add_options", "plan", "process", "events_of", "annotations_of", "write_report"]
