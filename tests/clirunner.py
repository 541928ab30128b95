# SPDX-License-Identifier: GPL-3.0-or-later
"""Run the ``coherer`` command in a subprocess, as a user would.

The interpreter is the project venv's (it has the PyPI packages, e.g. sigmf)
when it exists, else the one running the tests. The source tree is made
importable as ``gnuradio.coherer`` through a private shim folder put first on
PYTHONPATH, so the tests exercise this checkout whatever the venv points at.

With ``COHERER_TEST_LAUNCHER`` set to an installed ``coherer`` launcher (see
test_install.py) the command is that launcher instead, run with nothing of the
source tree or the project venv on PYTHONPATH or PATH; Python snippets then run
on /usr/bin/python3 with ``COHERER_TEST_PYTHONPATH`` (the installed package and
its dependency folder) as their only PYTHONPATH.
"""

import os
import pathlib
import subprocess
import sys
import tempfile

REPO = pathlib.Path(__file__).resolve().parents[1]
VENV_PYTHON = REPO / ".venv" / "bin" / "python"
PYTHON = str(VENV_PYTHON) if VENV_PYTHON.exists() else sys.executable

LAUNCHER = os.environ.get("COHERER_TEST_LAUNCHER")
INSTALLED_PYTHONPATH = os.environ.get("COHERER_TEST_PYTHONPATH", "")

_shim = None


def _shim_dir():
    global _shim
    if _shim is None:
        d = pathlib.Path(tempfile.mkdtemp(prefix="coherer-shim-"))
        (d / "gnuradio").mkdir()
        (d / "gnuradio" / "coherer").symlink_to(REPO / "python" / "coherer")
        _shim = d
    return _shim


def clean_env():
    """The environment without anything of the source tree or the project venv."""
    e = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV", "PYTHONHOME")}
    venv = str(REPO / ".venv")
    e["PATH"] = os.pathsep.join(p for p in e.get("PATH", "").split(os.pathsep)
                                if p and not p.startswith(venv) and not p.startswith(str(REPO)))
    return e


def env():
    """Environment for the subprocess: source-tree shim first on PYTHONPATH (or, for an
    installed launcher, nothing of the source tree at all)."""
    if LAUNCHER:
        return clean_env()
    e = dict(os.environ)
    e["PYTHONPATH"] = os.pathsep.join([str(_shim_dir())] + [p for p in [e.get("PYTHONPATH")] if p])
    return e


def command(*args):
    """The argv that runs ``coherer ARGS...``."""
    if LAUNCHER:
        return [LAUNCHER, *map(str, args)]
    return [PYTHON, "-m", "gnuradio.coherer", *map(str, args)]


def coherer(*args, cwd=None, timeout=300):
    """Run ``coherer ARGS...``; returns the CompletedProcess (text stdout/stderr)."""
    return subprocess.run(command(*args), cwd=cwd, env=env(),
                          capture_output=True, text=True, timeout=timeout, stdin=subprocess.DEVNULL)


def popen(*args, cwd=None):
    """Start ``coherer ARGS...`` without waiting."""
    return subprocess.Popen(command(*args), cwd=cwd, env=env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            stdin=subprocess.DEVNULL)


def python(code, *args):
    """Run a Python snippet with the same interpreter and environment as the command."""
    if LAUNCHER:
        e = clean_env()
        e["PYTHONPATH"] = INSTALLED_PYTHONPATH
        return subprocess.run(["/usr/bin/python3", "-c", code, *map(str, args)], env=e,
                              capture_output=True, text=True, timeout=120)
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
