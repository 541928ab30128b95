# SPDX-License-Identifier: GPL-3.0-or-later
"""Run the ``coherer`` command in a subprocess, as a user would.

The interpreter is the project venv's (it has the PyPI packages, e.g. sigmf)
when it exists, else the one running the tests. The source tree is made
importable as ``gnuradio.coherer`` through a private shim folder put first on
PYTHONPATH, so the tests exercise this checkout whatever the venv points at.
"""

import os
import pathlib
import subprocess
import sys
import tempfile

REPO = pathlib.Path(__file__).resolve().parents[1]
VENV_PYTHON = REPO / ".venv" / "bin" / "python"
PYTHON = str(VENV_PYTHON) if VENV_PYTHON.exists() else sys.executable

_shim = None


def _shim_dir():
    global _shim
    if _shim is None:
        d = pathlib.Path(tempfile.mkdtemp(prefix="coherer-shim-"))
        (d / "gnuradio").mkdir()
        (d / "gnuradio" / "coherer").symlink_to(REPO / "python" / "coherer")
        _shim = d
    return _shim


def env():
    """Environment for the subprocess: source-tree shim first on PYTHONPATH."""
    e = dict(os.environ)
    e["PYTHONPATH"] = os.pathsep.join([str(_shim_dir())] + [p for p in [e.get("PYTHONPATH")] if p])
    return e


def coherer(*args, cwd=None, timeout=300):
    """Run ``coherer ARGS...``; returns the CompletedProcess (text stdout/stderr)."""
    return subprocess.run([PYTHON, "-m", "gnuradio.coherer", *map(str, args)], cwd=cwd, env=env(),
                          capture_output=True, text=True, timeout=timeout, stdin=subprocess.DEVNULL)


def popen(*args, cwd=None):
    """Start ``coherer ARGS...`` without waiting."""
    return subprocess.Popen([PYTHON, "-m", "gnuradio.coherer", *map(str, args)], cwd=cwd, env=env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            stdin=subprocess.DEVNULL)


def python(code, *args):
    """Run a Python snippet with the same interpreter and environment."""
    return subprocess.run([PYTHON, "-c", code, *map(str, args)], env=env(), capture_output=True,
                          text=True, timeout=120)


def one_error_line(proc):
    """The single ``coherer: error:`` line on stderr; asserts there is exactly one line
    and no traceback."""
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert "Traceback" not in proc.stderr, proc.stderr
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith("coherer: error: "), lines[0]
    return lines[0]
