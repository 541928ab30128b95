# SPDX-License-Identifier: GPL-3.0-or-later
"""Build and run the plain C reference loop (``reference_loop.c``, shipped with the package).

The program is compiled at bench time with the machine's C compiler
(``cc -O3 -march=native``) into a temporary directory, then run on the same
cf32 data file as the GNU Radio blocks.
"""

import os
import pathlib
import shutil
import subprocess
from dataclasses import dataclass

import numpy as np

from .. import _loop_kernel as K

SOURCE = pathlib.Path(__file__).with_name("reference_loop.c")
CFLAGS = ("-O3", "-march=native")


class CompilerMissing(RuntimeError):
    """No C compiler was found (install gcc; scripts/bootstrap.sh does)."""


@dataclass(frozen=True)
class ReferenceRun:
    seconds: tuple        #: wall time of each repetition over the whole file, s
    cpu_seconds: tuple    #: CPU time of each repetition, s
    final_phase: float    #: NCO phase after the last repetition, rad
    final_freq: float     #: frequency register after the last repetition, rad/sample


def find_compiler():
    """Path of the C compiler: ``$CC`` if set, else ``cc``, ``gcc`` or ``clang``."""
    for name in (os.environ.get("CC"), "cc", "gcc", "clang"):
        if name and shutil.which(name):
            return shutil.which(name)
    raise CompilerMissing("no C compiler found (tried $CC, cc, gcc, clang)")


def kernel_constants():
    """``-D`` flags giving the C program the loop kernel's constants."""
    names = ("LIMIT", "FAST_ALPHA", "LEVEL_STEP", "NORM_BLOCK", "MW_SETTLED")
    return [f"-D{name}={float(getattr(K, name))!r}" for name in names if hasattr(K, name)]


def compile_reference(workdir):
    """Compile ``reference_loop.c`` into ``workdir``; returns (executable path, compile command)."""
    exe = pathlib.Path(workdir) / "reference_loop"
    cmd = [find_compiler(), *CFLAGS, *kernel_constants(), "-o", str(exe), str(SOURCE), "-lm"]
    subprocess.run(cmd, check=True, capture_output=True, text=True)
    return exe, " ".join([pathlib.Path(cmd[0]).name, *CFLAGS])


def loop_arguments(params, power, freq0):
    """The C program's loop arguments from a kernel ``params`` array (see _loop_kernel)."""
    def value(name, absent):
        index = getattr(K, name, None)      # a kernel without this feature: neutral value
        return params[index] if index is not None else absent
    values = (params[K.P_K1], params[K.P_K2], params[K.P_K3], params[K.P_ROT_RE],
              params[K.P_ROT_IM], params[K.P_FMIN], params[K.P_FMAX], params[K.P_ALPHA],
              value("P_SIG2_FLOOR", 0.0), value("P_START_MW", 0.0), value("P_E_MAX", np.inf))
    block = int(value("P_BLOCK", 1.0)) or 1
    return ([str(int(power))] + [repr(float(v)) for v in values]
            + [str(block), repr(float(freq0))])


def run_reference(exe, data_path, params, power, freq0=0.0, reps=1, out_path=None):
    """Run the C loop ``reps`` times over ``data_path`` (cf32) with the given kernel
    parameters; optionally write its corrected output to ``out_path`` (cf32)."""
    cmd = [str(exe), str(data_path), *loop_arguments(params, power, freq0), str(int(reps))]
    if out_path is not None:
        cmd.append(str(out_path))
    text = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout
    seconds, cpu, phase, freq = [], [], np.nan, np.nan
    for line in text.splitlines():
        fields = line.split()
        if fields[:1] == ["rep"]:
            seconds.append(float(fields[3]))
            cpu.append(float(fields[5]))
        elif fields[:1] == ["final"]:
            phase, freq = float(fields[2]), float(fields[4])
    return ReferenceRun(tuple(seconds), tuple(cpu), phase, freq)
