# SPDX-License-Identifier: GPL-3.0-or-later
"""What the ``coherer`` command tells a user when something is wrong, and the number
syntax its options accept.

* :func:`si_number` parses ``250k``, ``2.4M``, ``1.5G`` (and plain numbers) for every
  rate and frequency option.
* :func:`option_wording` turns the library's parameter names (``noise_bw_hz``) into the
  option names a user typed (``--noise-bw``) in an error message.
* :func:`unknown_option_hint` suggests the option a typo was meant to be.
* :func:`missing_dependency` names the package and the command that installs it.
"""

import argparse
import difflib
import math
import os
import re
import sys

#: Multipliers of the number suffixes (SI prefixes; a lower-case m would be milli,
#: which no rate or frequency option wants, so it is refused with a hint).
SUFFIXES = {"k": 1e3, "K": 1e3, "M": 1e6, "G": 1e9}

_NUMBER = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([kKMGm]?)\s*(?:hz|Hz|HZ)?\s*$")

#: argparse's test for "this token is a negative number, not an option", widened to
#: exponents and suffixes so that ``--freq-guess -2.5k`` works (and ``--carrier -300k:4``).
NEGATIVE_NUMBER = re.compile(r"^-(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?[kKMG]?(?::\d+)?$")


def si_number(text):
    """A number with an optional k, M or G suffix (and an optional "Hz"): ``250k`` is
    250000.0, ``2.4M`` is 2400000.0. Non-finite values are returned as they are (the
    option's own check rejects them); anything else raises ArgumentTypeError."""
    s = str(text).strip()
    if s.lower() in ("inf", "+inf", "-inf", "nan", "infinity", "+infinity", "-infinity"):
        return float(s)
    m = _NUMBER.match(s)
    if not m:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number (examples: 2400000, 2.4e6, 2.4M, 250k)")
    value, suffix = m.groups()
    if suffix == "m":
        raise argparse.ArgumentTypeError(f"{text!r}: use k, M or G for kilo, mega, giga (m would mean milli)")
    return float(value) * SUFFIXES.get(suffix, 1.0)


def positive_number(text):
    """:func:`si_number`, finite and > 0."""
    v = si_number(text)
    if not v > 0 or math.isinf(v):
        raise argparse.ArgumentTypeError(f"must be a positive number, got {text}")
    return v


def finite_number(text):
    """:func:`si_number`, finite."""
    v = si_number(text)
    if not math.isfinite(v):
        raise argparse.ArgumentTypeError(f"must be a finite number, got {text}")
    return v


# --- library names -> option names ---------------------------------------------------------

#: Parameter names of the library (constructor and designer arguments) and the option that
#: sets each; names without an option are described in words.
OPTION_OF = {
    "noise_bw_hz": "--noise-bw",
    "loop_order": "--loop-order",
    "freq_guess_hz": "--freq-guess",
    "freq_range_hz": "the frequency range",
    "sample_rate": "--sample-rate",
    "samples_per_symbol": "samples per symbol",
    "lock_threshold": "the lock threshold",
    "unlock_threshold": "the unlock threshold",
    "point_angle": "the constellation point angle",
    "tag_interval": "the tag interval",
    "status_interval": "the status interval",
    "modulation_index": "the modulation index",
    "budget_s": "--pull-in-budget",
    "rate_hz_per_s": "--doppler-rate",
    "offset_hz": "--offset",
    "esn0": "--esn0",
    "freq_step_hz": "--freq-step",
    "symbol_rate": "--symbol-rate",
}
#: One-word parameters: only translated when they are the subject of the message.
SUBJECT_OPTION_OF = {"power": "--power", "damping": "--damping", "window": "--window",
                     "format": "--format"}

# not inside a longer name: "core:sample_rate" (a SigMF field) stays as it is
_NAME = re.compile(r"(?<![\w:.\-])(" + "|".join(sorted(map(re.escape, OPTION_OF), key=len, reverse=True))
                   + r")\b(=?)")


def option_wording(message, sample_rate_option=True):
    """``message`` with every library parameter name replaced by the option a user sets it
    with. ``sample_rate_option`` False describes ``sample_rate`` as "the sample rate"
    (when it came from a recording's metadata, not from ``--sample-rate``)."""
    names = dict(OPTION_OF)
    if not sample_rate_option:
        names["sample_rate"] = "the sample rate"
    first, _, rest = message.partition(" ")
    if first in SUBJECT_OPTION_OF:
        message = f"{SUBJECT_OPTION_OF[first]} {rest}"

    def swap(m):
        name = names[m.group(1)]
        if m.group(2):                        # "noise_bw_hz=2000.0" -> "--noise-bw 2000.0"
            return name + " "
        return name

    out = _NAME.sub(swap, message)
    # "x * --sample-rate = ..." reads better as "x * sample rate = ..."
    out = re.sub(r"(\*|x|times) --sample-rate\b", r"\1 sample rate", out)
    if out.startswith("the "):
        out = out[0].upper() + out[1:]
    return out


# --- typos -------------------------------------------------------------------------------

def option_strings(parser):
    """Every option string (``--sample-rate``, ``-h``, ...) of an argparse parser."""
    return [s for action in parser._actions for s in action.option_strings]


def unknown_options(parser, tokens):
    """The tokens that look like options but are none of ``parser``'s (``--name=value`` is
    reduced to ``--name``; abbreviations argparse accepts are not unknown)."""
    known = option_strings(parser)
    unknown = []
    for tok in tokens:
        if not isinstance(tok, str) or not tok.startswith("-") or tok == "-" or tok == "--":
            continue
        if NEGATIVE_NUMBER.match(tok):
            continue
        name = tok.split("=", 1)[0]
        if name in known:
            continue
        if name.startswith("--") and parser.allow_abbrev and sum(k.startswith(name) for k in known) == 1:
            continue
        unknown.append(name)
    return unknown


def unknown_option_hint(parser, name):
    """``"unknown option --samplerate (did you mean --sample-rate?)"``, or without the
    suggestion when nothing is close."""
    known = [k for k in option_strings(parser) if k.startswith("--")]
    folded = {k.replace("-", "").replace("_", "").lower(): k for k in known}
    key = name.replace("-", "").replace("_", "").lower()
    guess = folded.get(key)
    if guess is None:
        close = difflib.get_close_matches(key, list(folded), n=1, cutoff=0.75)
        guess = folded[close[0]] if close else None
    hint = f" (did you mean {guess}?)" if guess else ""
    return f"unknown option {name}{hint}"


def choice_hint(message):
    """argparse's "invalid choice: 'rnu' (choose from 'demo', 'run', ...)" with the
    closest choice suggested."""
    m = re.search(r"invalid choice: '([^']*)' \(choose from (.*)\)", message)
    if not m:
        return message
    choices = re.findall(r"'([^']*)'", m.group(2))
    close = difflib.get_close_matches(m.group(1), choices, n=1, cutoff=0.5)
    return message + (f"; did you mean {close[0]}?" if close else "")


# --- dependencies ------------------------------------------------------------------------

#: Python packages the command imports, with the Debian package that provides each.
DEBIAN_PACKAGE = {
    "gnuradio": "gnuradio", "pmt": "gnuradio", "numpy": "python3-numpy", "numba": "python3-numba",
    "llvmlite": "python3-numba", "scipy": "python3-scipy", "matplotlib": "python3-matplotlib",
    "jsonschema": "python3-jsonschema", "defusedxml": "python3-defusedxml",
}
#: Python packages that come from PyPI (not packaged by Debian 12), with the version wanted.
PYPI_REQUIREMENT = {"sigmf": "sigmf>=1.2,<2"}


def missing_dependency(exc):
    """One line naming the missing package of a ModuleNotFoundError and the command that
    installs it, or None when the missing module is not one of the command's dependencies."""
    top = (exc.name or "").split(".")[0]
    if top in PYPI_REQUIREMENT:
        return f"the Python package '{top}' is missing; install it with: {pypi_fix(top)}"
    if top in DEBIAN_PACKAGE:
        sudo = "" if os.geteuid() == 0 else "sudo "
        return (f"the Python package '{top}' is missing; install it with: "
                f"{sudo}apt-get install {DEBIAN_PACKAGE[top]}")
    return None


def pypi_fix(top):
    """The command that installs PyPI package ``top`` where this copy of gr-coherer looks."""
    req = PYPI_REQUIREMENT[top]
    deps_dir = os.environ.get("COHERER_PYTHON_DEPS")
    if deps_dir:                                  # set by the installed launcher
        return f"{sys.executable} -m pip install --no-deps --target '{deps_dir}' '{req}'"
    if sys.prefix != sys.base_prefix:             # a venv (e.g. the project's .venv)
        return f"{sys.executable} -m pip install '{req}'"
    return ("make setup in the gr-coherer source folder (then use .venv/bin/coherer), or "
            "cmake --install build (see the README)")


__all__ = ["si_number", "positive_number", "finite_number", "option_wording", "unknown_options",
           "unknown_option_hint", "choice_hint", "missing_dependency", "NEGATIVE_NUMBER"]
