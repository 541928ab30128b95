# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer run``: carrier recovery and lock detection over a recording.

Reads a SigMF recording (or a raw I/Q file with --sample-rate and --format),
runs file source -> conversion -> M-th power loop -> lock detector in a GNU
Radio flowgraph, prints the events table on stdout and writes the events JSON,
the report folder and SigMF annotations on request.
"""

import argparse
import os
import sys
from pathlib import Path

from . import UserError, errors

# --- argument types (argparse turns their ArgumentTypeError into exit 2) ------------------

#: Rates and frequencies accept k, M and G suffixes: 250k, 2.4M (see cli.errors.si_number).
positive_float = errors.positive_number
finite_float = errors.finite_number


def int_in(lo, hi):
    """An integer in [lo, hi]."""
    def parse(text):
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
        if not lo <= v <= hi:
            raise argparse.ArgumentTypeError(f"must be an integer in {lo}..{hi}, got {text}")
        return v
    return parse


def add_loop_options(p, power_required=True, noise_bw_default=None):
    """Loop and detector options shared by ``run`` and ``demo``."""
    from ..arguments import LOOP_ORDERS, MAX_BT, MAX_DAMPING, MAX_POWER, MAX_WINDOW, MIN_WINDOW

    g = p.add_argument_group("carrier loop and lock detector")
    g.add_argument("--power", type=int_in(1, MAX_POWER), required=power_required, metavar="M",
                   default=None if power_required else 2,
                   help="modulation symmetry order M: 1 pilot/residual carrier, 2 BPSK, 4 QPSK, 8 8PSK"
                        + ("" if power_required else " (default 2)"))
    g.add_argument("--noise-bw", type=positive_float, required=noise_bw_default is None, metavar="HZ",
                   default=noise_bw_default,
                   help=f"loop noise bandwidth B_L, Hz (one-sided, carrier-phase domain; at most "
                        f"{MAX_BT:g} x sample rate)" + ("" if noise_bw_default is None
                                                       else f" (default {noise_bw_default:g})"))
    g.add_argument("--damping", type=positive_float, default=0.707, metavar="ZETA",
                   help=f"damping factor, (0, {MAX_DAMPING:g}] (default 0.707)")
    g.add_argument("--loop-order", type=int_in(min(LOOP_ORDERS), max(LOOP_ORDERS)), default=2, metavar="N",
                   help="loop order 1, 2 or 3 (3 follows a Doppler ramp; default 2)")
    g.add_argument("--window", type=int_in(MIN_WINDOW, MAX_WINDOW), default=1024, metavar="N",
                   help=f"lock-detector window, samples, {MIN_WINDOW}..{MAX_WINDOW} (default 1024)")
    g.add_argument("--symbol-rate", type=positive_float, default=None, metavar="HZ",
                   help="symbol rate, symbols/s: the lock detector then works on symbol-spaced "
                        "samples (default: estimated from the recording; none found = one "
                        "sample per symbol)")
    g.add_argument("--freq-guess", type=finite_float, default=0.0, metavar="HZ",
                   help="where the NCO starts, Hz from the capture centre (default 0; wide "
                        "acquisition finds offsets up to +-sample rate/(2M) anyway)")


def register(subparsers):
    p = subparsers.add_parser(
        "run", help="recover the carrier of a recording; report locks, slips, offset, Es/N0",
        description="Run carrier recovery (M-th power loop) and lock detection over a SigMF "
                    "recording or a raw I/Q file. Prints the events table on stdout.",
        epilog="Exit status: 0 ok, 2 bad arguments or unreadable/invalid input (one line on "
               "stderr), 1 internal error, 130 interrupted.")
    p.add_argument("recording", metavar="RECORDING",
                   help="SigMF .sigmf-meta / .sigmf-data pair or .sigmf archive; or a raw file "
                        "with --sample-rate and --format")
    add_loop_options(p)
    from . import carriers
    carriers.add_options(p.add_argument_group("several carriers"))
    g = p.add_argument_group("raw files")
    g.add_argument("--sample-rate", type=positive_float, metavar="HZ",
                   help="sample rate of a raw file, samples/s")
    g.add_argument("--format", choices=("cf32_le", "ci16_le", "ci8", "cu8"), metavar="FMT",
                   help="sample format of a raw file: cf32_le, ci16_le, ci8 or cu8 (interleaved I/Q)")
    g = p.add_argument_group("outputs")
    g.add_argument("--events", metavar="FILE.json", help="write the events list as JSON")
    g.add_argument("--report", metavar="DIR",
                   help="write timeline.png, constellation.png and summary.json into DIR")
    g.add_argument("--annotate", action="store_true",
                   help="add SigMF annotations (locked intervals, cycle slips) to the .sigmf-meta file")
    p.set_defaults(func=main)
    return p


# --- the sub-command ------------------------------------------------------------------------

def _check_output_file(path, what):
    parent = Path(path).resolve().parent
    if not parent.is_dir():
        raise UserError(f"{what} {path}: folder {parent} does not exist")
    if Path(path).is_dir():
        raise UserError(f"{what} {path} is a folder")
    if not os.access(parent, os.W_OK):
        raise UserError(f"{what} {path}: folder {parent} is not writable")


def _check_output_dir(path, what):
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise UserError(f"{what} {path} exists and is not a folder")
    parent = p.resolve().parent
    if not p.exists() and not parent.is_dir():
        raise UserError(f"{what} {path}: folder {parent} does not exist")
    if not os.access(p if p.exists() else parent, os.W_OK):
        raise UserError(f"{what} {path} is not writable")


def settings_from_args(args):
    """ReceiverSettings from parsed options (not yet checked against the sample rate)."""
    from ..receiver import ReceiverSettings
    return ReceiverSettings(power=args.power, noise_bw_hz=args.noise_bw, damping=args.damping,
                            loop_order=args.loop_order, window=args.window,
                            freq_guess_hz=args.freq_guess,
                            symbol_rate_hz=getattr(args, "symbol_rate", None))


def check_settings(settings, sample_rate, num_samples):
    """Check loop settings against a recording's rate (samples/s) and length (samples);
    raise UserError naming the option."""
    from .. import arguments
    try:
        arguments.validate_spec(sample_rate, settings.power, settings.noise_bw_hz, settings.damping,
                                settings.loop_order)
        arguments.check_freq_within("freq_guess_hz", settings.freq_guess_hz,
                                    arguments.max_freq_range(sample_rate, settings.power), "sample rate/(2M)")
    except ValueError as exc:
        raise UserError(_option_message(str(exc))) from None
    lowest = sample_rate / arguments.MAX_SAMPLES_PER_SYMBOL
    if settings.symbol_rate_hz is not None and not lowest <= settings.symbol_rate_hz <= sample_rate:
        raise UserError(f"--symbol-rate must be within sample rate/{arguments.MAX_SAMPLES_PER_SYMBOL} .. "
                        f"sample rate = {lowest:g} .. {sample_rate:g} symbols/s, got {settings.symbol_rate_hz:g}")
    if settings.window > num_samples:
        raise UserError(f"--window {settings.window} is longer than the recording "
                        f"({num_samples} samples)")


def _option_message(msg):
    """A library error message in the words of the command line (option names)."""
    return errors.option_wording(msg, sample_rate_option=False)


def open_input(args):
    from ..recording import RecordingError, open_recording
    try:
        return open_recording(args.recording, args.sample_rate, args.format)
    except RecordingError as exc:
        raise UserError(str(exc)) from None


def process(rec, settings, out, events_path=None, table_limit=None):
    """Run the receiver over ``rec``, print warnings (stderr) and the events table (``out``,
    at most ``table_limit`` rows), write the events JSON. Returns the RunResult."""
    from .. import report
    from ..receiver import run_receiver
    from .console import Progress, events_table

    for note in rec.warnings:
        print(f"coherer: warning: {note}", file=sys.stderr)
    bar = Progress("coherer run")
    try:
        result = run_receiver(rec, settings, progress=bar)
    except ValueError as exc:      # a block rejected a setting
        raise UserError(_option_message(str(exc))) from None
    finally:
        bar.close()
    out.write(events_table(result.events, rec.center_freq_hz, table_limit) + "\n")
    out.write(timing_line(result) + "\n")
    out.write(summary_line(result) + "\n")
    if events_path:
        report.write_json(events_path, events_with_timing(result))
    return result


def timing_line(result):
    """One line: the symbol rate the lock detector worked with, and where it came from."""
    t = result.timing
    if t.source == "none":
        return f"symbol rate: none detected, one sample per symbol ({t.note})"
    how = "given" if t.source == "given" else f"estimated, line {t.line_to_floor_db:.1f} dB over the floor"
    return (f"symbol rate: {t.symbol_rate_hz:.6g} symbols/s ({how}); lock detector at "
            f"{t.samples_per_symbol} samples per symbol, window {result.window} samples")


def events_with_timing(result):
    """The events list; lock and unlock events also say which symbol rate the detector
    used (``symbol_rate_hz``, absent when none was found), ``samples_per_symbol`` and
    ``symbol_rate_source`` (given, estimated, none)."""
    t = result.timing
    out = []
    for e in result.events:
        e = dict(e)
        if e["event"] in ("lock", "unlock"):
            if t.symbol_rate_hz is not None:
                e["symbol_rate_hz"] = t.symbol_rate_hz
            e["samples_per_symbol"] = t.samples_per_symbol
            e["symbol_rate_source"] = t.source
        out.append(e)
    return out


#: Locked intervals described one by one in the summary line; beyond this the line gives
#: the first few and the count (every interval is in summary.json and the events).
SUMMARY_INTERVALS = 4


def summary_line(result):
    """One line: locked time, each locked interval (start-end, mean offset, Es/N0), slips."""
    fs = result.recording.sample_rate
    ivs = result.interval_summaries()
    locked = sum(iv["end_sample"] - iv["start_sample"] for iv in ivs) / fs
    slips = sum(e["slips"] for e in result.events if e["event"] == "cycle_slip")
    n_slip = sum(1 for e in result.events if e["event"] == "cycle_slip")
    text = f"locked {locked:.2f} s of {result.num_samples / fs:.2f} s"
    if not ivs:
        text += " (never locked)"
    else:
        parts = []
        for i, iv in enumerate(ivs[:SUMMARY_INTERVALS]):
            part = f"#{i + 1} {iv['start_sample'] / fs:.3f}-{iv['end_sample'] / fs:.3f} s"
            if "freq_hz" in iv:
                part += f" offset {iv['freq_hz']:+.2f} Hz"
            if "esn0_db" in iv:
                part += f" Es/N0 {iv['esn0_db']:.1f} dB"
            parts.append(part)
        more = len(ivs) - len(parts)
        text += (f" in {len(ivs)} interval(s): " + "; ".join(parts)
                 + (f"; and {more} more (see the events)" if more else ""))
    return text + f"; {n_slip} cycle-slip event(s), net {slips:+d} x 2pi/{result.settings.power}"


def annotations(result):
    """SigMF annotations: one per locked interval and one per cycle slip."""
    from ..recording import EXTENSION
    ns = EXTENSION["name"]
    rec = result.recording
    notes = []
    for iv in result.interval_summaries():
        a = {"core:sample_start": iv["start_sample"],
             "core:sample_count": iv["end_sample"] - iv["start_sample"],
             "core:label": "carrier locked"}
        comment = f"M={result.settings.power} loop, B_L {result.settings.noise_bw_hz:g} Hz"
        if "freq_hz" in iv:
            a[f"{ns}:freq_hz"] = round(iv["freq_hz"], 6)
            comment += f"; carrier offset {iv['freq_hz']:+.2f} Hz"
            if rec.center_freq_hz is not None:
                a[f"{ns}:carrier_hz"] = round(iv["carrier_hz"], 3)
        if "esn0_db" in iv and abs(iv["esn0_db"]) != float("inf"):
            a[f"{ns}:esn0_db"] = round(iv["esn0_db"], 3)
            comment += f"; mean Es/N0 {iv['esn0_db']:.1f} dB"
        if "metric" in iv:
            a[f"{ns}:metric"] = round(iv["metric"], 4)
        a["core:comment"] = comment
        notes.append(a)
    for e in result.events:
        if e["event"] == "cycle_slip":
            notes.append({"core:sample_start": e["sample"], "core:sample_count": 1,
                          "core:label": f"cycle slip {e['slips']:+d}",
                          "core:comment": f"{e['slips']:+d} x 2pi/{result.settings.power} carrier "
                                          f"phase slip declared by the loop",
                          f"{ns}:slips": e["slips"], f"{ns}:freq_hz": round(e["freq_hz"], 6)})
    return notes


def main(args):
    from ..recording import RecordingError, merge_annotations
    from ..spread import WorkerError
    from .console import clean_stdout

    rec = open_input(args)
    settings = settings_from_args(args)
    check_settings(settings, rec.sample_rate, rec.num_samples)
    if args.events:
        _check_output_file(args.events, "--events")
    if args.report:
        _check_output_dir(args.report, "--report")
    if args.annotate:
        if rec.meta_path is None:
            raise UserError("--annotate needs a .sigmf-meta / .sigmf-data pair "
                            f"(not a {'SigMF archive' if rec.kind == 'archive' else 'raw file'})")
        if not os.access(rec.meta_path, os.W_OK) or not os.access(rec.meta_path.parent, os.W_OK):
            raise UserError(f"--annotate: {rec.meta_path} or its folder is not writable")

    from .._warmup import COMMAND_GROUPS, prepare
    prepare(COMMAND_GROUPS["run"])          # a cold kernel cache: one note, compile now
    if args.channel_bw is not None and not args.carrier:
        raise UserError("--channel-bw needs --carrier")
    from . import carriers
    carriers.check_workers(args)
    try:
        with clean_stdout() as out:
            if args.carrier:
                results = carriers.process(args, rec, settings, out)
                notes = carriers.annotations_of(results, rec)
            else:
                result = process(rec, settings, out, args.events)
                notes = annotations(result)
            if args.report:
                from .. import report
                if args.carrier:
                    carriers.write_report(results, args.report)
                else:
                    report.write_report(result, args.report)
                out.write(f"report written to {args.report}\n")
            if args.annotate:
                try:
                    merge_annotations(rec.meta_path, notes)
                except RecordingError as exc:
                    raise UserError(str(exc)) from None
                out.write(f"annotations added to {rec.meta_path}\n")
    except KeyboardInterrupt:
        print("coherer: interrupted; nothing was annotated", file=sys.stderr)
        return 130
    except WorkerError as exc:
        print(f"coherer: error: {exc}; nothing was annotated", file=sys.stderr)
        return 1
    return 0
