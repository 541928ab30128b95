# SPDX-License-Identifier: GPL-3.0-or-later
"""The ``coherer`` command: sub-commands demo, run, design, bench.

Each sub-command lives in its own module exposing ``register(subparsers)``,
which adds its parser and sets ``func`` (a callable taking the parsed
arguments and returning an exit code). Exit codes: 0 ok, 2 bad input or
arguments (one line on stderr, no traceback), 1 internal error.
"""

import argparse
import importlib
import sys

#: sub-command modules, in the order ``--help`` lists them
SUBCOMMANDS = ("demo", "run", "design_cmd", "bench")

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2


class UserError(Exception):
    """Bad input or arguments: reported as one line on stderr with exit code 2."""


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        self.exit(EXIT_BAD_INPUT, f"coherer: error: {message}\n")


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


def main(argv=None):
    """Entry point of the ``coherer`` command; returns the exit code."""
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args) or EXIT_OK)
    except UserError as exc:
        print(f"coherer: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
