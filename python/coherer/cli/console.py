# SPDX-License-Identifier: GPL-3.0-or-later
"""Terminal output of the ``run`` and ``demo`` sub-commands: a clean stdout for
results, a progress bar on stderr, and the events table.

GNU Radio on Debian logs to stdout (``log_file = stdout``), from C++ threads.
:func:`clean_stdout` therefore lowers GNU Radio's log level to warnings and
points file descriptor 1 at stderr while a flowgraph may run; results are
written to a duplicate of the original stdout. When the reader of stdout goes
away (``coherer run ... | head -1``) further results are dropped quietly and the
command finishes its other work (events file, report, annotations).
"""

import contextlib
import errno
import os
import sys
import time


class PipeSafeWriter:
    """A text stream that drops its output once the reader has closed the pipe, instead
    of raising BrokenPipeError into the middle of a run. ``gone`` tells whether that
    happened."""

    def __init__(self, stream):
        self._stream = stream
        self.gone = False

    def _guard(self, op, *args):
        if self.gone:
            return None
        try:
            return op(*args)
        except OSError as exc:
            if not isinstance(exc, BrokenPipeError) and exc.errno != errno.EPIPE:
                raise
            self.gone = True
            return None

    def write(self, text):
        self._guard(self._stream.write, text)
        return len(text)

    def flush(self):
        self._guard(self._stream.flush)

    def close(self):
        try:
            self._stream.close()
        except OSError:
            pass

    def isatty(self):
        return not self.gone and self._stream.isatty()

    def fileno(self):
        return self._stream.fileno()


@contextlib.contextmanager
def clean_stdout():
    """Yield a text stream on the original stdout; meanwhile anything else written to
    file descriptor 1 (GNU Radio's log, stray prints) goes to stderr."""
    try:
        from gnuradio import gr
        gr.logging().set_default_level(gr.log_levels.warn)
    except (ImportError, AttributeError):
        pass
    sys.stdout.flush()
    saved = os.dup(1)
    os.dup2(2, 1)
    out = PipeSafeWriter(os.fdopen(os.dup(saved), "w", buffering=1))
    try:
        yield out
    finally:
        out.flush()
        with contextlib.suppress(OSError):
            sys.stdout.flush()
        os.dup2(saved, 1)
        os.close(saved)
        out.close()


class Progress:
    """A one-line progress bar on stderr, drawn only when stderr is a terminal.

    The rate is counted from the first report on: set-up before it (building the
    flowgraph, compiling kernels) does not dilute it."""

    def __init__(self, label, stream=None):
        self._stream = stream or sys.stderr
        self._on = self._stream.isatty()
        self._label = label
        self._start = None          # (time, samples done) of the first report
        self._drawn = False

    def rate(self, done, now=None):
        """Samples/s since the first report (None before a second report)."""
        now = time.monotonic() if now is None else now
        if self._start is None:
            self._start = (now, done)
            return None
        t0, d0 = self._start
        if now <= t0:
            return None
        return (done - d0) / (now - t0)

    def __call__(self, done, total):
        rate = self.rate(done)
        if not self._on or total <= 0:
            return
        frac = min(1.0, done / total)
        width = 30
        bar = "#" * int(frac * width) + "-" * (width - int(frac * width))
        speed = "" if rate is None else f"  {rate / 1e6:6.2f} Msamples/s"
        self._stream.write(f"\r{self._label} [{bar}] {100 * frac:5.1f}%{speed}")
        self._stream.flush()
        self._drawn = True

    def close(self):
        if self._drawn:
            self._stream.write("\n")
            self._stream.flush()


def events_table(events, center_freq_hz=None, limit=None):
    """The events as an aligned text table (one line per event; with ``limit``, the
    first ``limit`` events and a line counting the rest)."""
    rows = [("time (s)", "sample", "event", "freq (Hz)", "metric", "Es/N0 (dB)", "slips")]
    shown = events if limit is None else events[:limit]
    for e in shown:
        rows.append((f"{e['time_s']:.4f}", str(e["sample"]), e["event"],
                     _num(e.get("freq_hz"), "{:+.2f}"), _num(e.get("metric"), "{:.3f}"),
                     _num(e.get("esn0_db"), "{:.2f}"), _num(e.get("slips"), "{:+d}")))
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    lines = ["  ".join(c.rjust(w) if i != 2 else c.ljust(w) for i, (c, w) in enumerate(zip(r, widths)))
             for r in rows]
    if len(rows) == 1:
        lines.append("(no events: the carrier never locked)")
    if len(shown) < len(events):
        lines.append(f"... and {len(events) - len(shown)} more event(s), all in the events file")
    if center_freq_hz is not None:
        lines.append(f"freq is the offset from the capture centre {center_freq_hz / 1e6:.6f} MHz")
    return "\n".join(lines)


def _num(value, fmt):
    return "" if value is None else fmt.format(value)


__all__ = ["clean_stdout", "Progress", "events_table"]
