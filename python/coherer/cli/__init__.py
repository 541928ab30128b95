# SPDX-License-Identifier: GPL-3.0-or-later
"""The ``coherer`` command: sub-commands demo, run, design, bench.

Each sub-command lives in its own module exposing ``register(subparsers)``,
which adds its parser and sets ``func`` (a callable taking the parsed
arguments and returning an exit code). Exit codes: 0 ok, 2 bad input or
arguments (one line on stderr, no traceback), 1 internal error.

Handled here for every sub-command: unknown options (with a suggestion),
library parameter names in error messages (shown as option names), a missing
Python dependency (one line naming the command that installs it) and a reader
that closed stdout early (``coherer run ... | head``: the command finishes its
work quietly and exits 0).
"""

import argparse
import errno
import importlib
import os
import sys

from . import errors

#: sub-command modules, in the order ``--help`` lists them
SUBCOMMANDS = ("demo", "run", "design_cmd", "bench", "worker")

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2


class UserError(Exception):
    """Bad input or arguments: reported as one line on stderr with exit code 2."""


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors (exit 2), typo suggestions for unknown options and
    negative numbers with exponents or suffixes (``-2.5k``) taken as values."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._negative_number_matcher = errors.NEGATIVE_NUMBER
        self._tokens = []

    def parse_known_args(self, args=None, namespace=None):
        self._tokens = list(sys.argv[1:] if args is None else args)
        return super().parse_known_args(args, namespace)

    def error(self, message):
        # an unknown option explains most other complaints ("expected one argument",
        # "required: --power" after "--pwoer 2"): name it first
        unknown = errors.unknown_options(self, self._tokens_for_me())
        if unknown and not message.startswith("unknown option"):
            message = errors.unknown_option_hint(self, unknown[0])
        elif "invalid choice: " in message:
            message = errors.choice_hint(message)
        self.exit(EXIT_BAD_INPUT, f"coherer: error: {message}\n")

    def _tokens_for_me(self):
        """The tokens this parser itself interprets (the top-level parser stops at the
        sub-command name)."""
        subs = [a for a in self._actions if isinstance(a, argparse._SubParsersAction)]
        if not subs:
            return self._tokens
        for i, tok in enumerate(self._tokens):
            if tok in subs[0].choices:
                return self._tokens[:i]
        return self._tokens


def build_parser():
    """The argument parser with every available sub-command registered."""
    parser = _Parser(prog="coherer", description="Carrier recovery and lock detection for GNU Radio.")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    subparsers.required = True
    for name in SUBCOMMANDS:
        try:
            module = importlib.import_module(f"{__name__}.{name}")
        except ModuleNotFoundError as exc:
            if exc.name != f"{__name__}.{name}":
                raise
            continue            # sub-command not present in this build
        module.register(subparsers)
    return parser


def _parse(parser, argv):
    args, extra = parser.parse_known_args(argv)
    if extra:
        sub = parser._subparsers._group_actions[0].choices.get(getattr(args, "command", None))
        target = sub or parser
        unknown = errors.unknown_options(target, extra)
        if unknown:
            target.exit(EXIT_BAD_INPUT, f"coherer: error: {errors.unknown_option_hint(target, unknown[0])}\n")
        target.exit(EXIT_BAD_INPUT, f"coherer: error: unexpected argument(s): {' '.join(extra)}\n")
    return args


def _check_plot_name(args):
    """A ``--plot FILE`` must name a format by its extension (.png, .pdf, .svg): checked
    before any work is done."""
    path = getattr(args, "plot", None)
    if path:
        from ..report import PlotFormatError, plot_format
        try:
            plot_format(path)
        except PlotFormatError as exc:
            raise UserError(f"--plot {exc}") from None


def _stdout_gone():
    """Point file descriptor 1 at /dev/null after the reader went away, so that
    nothing further (including the interpreter's final flush) fails on it."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, 1)
        os.close(devnull)
    except OSError:
        pass


def _fail(message):
    print(f"coherer: error: {message}", file=sys.stderr)
    return EXIT_BAD_INPUT


def main(argv=None):
    """Entry point of the ``coherer`` command; returns the exit code."""
    args = None
    try:
        parser = build_parser()
        args = _parse(parser, argv)
        _check_plot_name(args)
        return int(args.func(args) or EXIT_OK)
    except UserError as exc:
        raw_rate = getattr(args, "sample_rate", None) is not None or getattr(args, "command", "") == "design"
        return _fail(errors.option_wording(str(exc), sample_rate_option=raw_rate))
    except ModuleNotFoundError as exc:
        line = errors.missing_dependency(exc)
        if line is None:
            raise
        return _fail(line)
    except BrokenPipeError:
        _stdout_gone()
        return EXIT_OK
    except OSError as exc:
        if exc.errno != errno.EPIPE:
            raise
        _stdout_gone()
        return EXIT_OK
