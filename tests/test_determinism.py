# SPDX-License-Identifier: GPL-3.0-or-later
"""Output is bit-identical across processes: any PYTHONHASHSEED, cold or warm kernel cache.

numba compiles the kernels in each process that finds no cached copy, and what it hands
to LLVM can depend on the iteration order of Python sets of strings, which follows the
hash seed. Wherever the floating-point flags let LLVM choose (fused multiply-add
contraction, reassociation), that order can then change the machine code and the
rounding. So every subject here is run in fresh processes:

* two with different hash seeds, each with its own empty numba cache folder (cold: the
  kernels are compiled in that process under that seed);
* one with a third seed reusing the first cache folder (warm: the kernels are loaded);
* ``coherer run`` on the demo recording cold under one seed, and warm on the kernels the
  two cold processes compiled under the two seeds;

and the outputs (every stream, tag and message, or the events file of ``coherer run``)
must be the same bytes. The seeds 0 and 2 fall on different sides of the difference
the loop kernel showed (0, 1, 6 one way; 2-5, 7 the other).
"""

import json
import os
import pathlib
import shutil
import subprocess
import sys

import pytest

import clirunner

REPO = pathlib.Path(__file__).resolve().parents[1]
CHAIN = pathlib.Path(__file__).resolve().parent / "determinism_chain.py"
COLD_SEEDS = ("0", "2")
WARM_SEED = "5"
TIMEOUT_S = 1800           # a cold numba cache means minutes of compiling per process

pytestmark = pytest.mark.timeout(2 * TIMEOUT_S)


def _env(seed, cache_dir, base=None):
    env = dict(base if base is not None else os.environ)
    env["PYTHONHASHSEED"] = seed
    env["NUMBA_CACHE_DIR"] = str(cache_dir)
    return env


def _finish(procs):
    """Wait for every (Popen, label) and return {label: stdout}."""
    out = {}
    for proc, label in procs:
        stdout, stderr = proc.communicate(timeout=TIMEOUT_S)
        assert proc.returncode == 0, f"{label}: {stderr[-3000:]}"
        out[label] = stdout
    return out


@pytest.fixture(scope="module")
def processes(tmp_path_factory):
    """Run the chain script and ``coherer run`` in fresh processes; returns
    ({label: {subject: digest}}, {label: (events bytes, stdout)}).

    Everything runs on a snapshot of the package taken now, so that edits to the source
    tree while the test runs cannot make processes differ. Two chain processes compile
    everything cold under seeds 0 and 2 (side by side, one per core); a third loads what
    the first compiled. ``coherer run`` runs cold under seed 0 in a cache of its own, and
    warm under seed 2 and seed 5 on the caches the chain processes filled under seeds 2 and 0.
    """
    tmp = tmp_path_factory.mktemp("determinism")
    parent = tmp / "snapshot" / "gnuradio"
    shutil.copytree(REPO / "python" / "coherer", parent / "coherer",
                    ignore=shutil.ignore_patterns("__pycache__"))
    run_env = clirunner.env()
    run_env["PYTHONPATH"] = os.pathsep.join([str(tmp / "snapshot")] + [
        p for p in run_env.get("PYTHONPATH", "").split(os.pathsep)[1:] if p])   # the snapshot, not the shim
    caches = {name: tmp / f"numba_cache_{name}" for name in ("A", "B", "R")}
    for d in caches.values():
        d.mkdir()

    code = ("import sys, gnuradio; gnuradio.__path__.insert(0, sys.argv[2]); "
            "from gnuradio.coherer.scenario import BalloonScenario; "
            "from gnuradio.coherer.recording import write_sigmf; sc = BalloonScenario(); "
            "write_sigmf(sys.argv[1], sc.synthesise(), sc.sample_rate, 'cf32_le', sc.center_freq_hz)")
    made = subprocess.run([clirunner.PYTHON, "-c", code, str(tmp / "demo"), str(parent)], env=run_env,
                          capture_output=True, text=True, timeout=300)
    assert made.returncode == 0, made.stderr
    meta = tmp / "demo.sigmf-meta"

    def chain(seed, cache):
        proc = subprocess.Popen([sys.executable, str(CHAIN), str(parent)], env=_env(seed, caches[cache]),
                                cwd=str(tmp), text=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                stdin=subprocess.DEVNULL)
        return proc, f"seed {seed}, {'warm' if cache == 'A' and seed == WARM_SEED else 'cold'} cache"

    def run(seed, cache, label):
        events = tmp / f"events_{cache}_{seed}.json"
        cmd = [clirunner.PYTHON, "-m", "gnuradio.coherer", "run", str(meta), "--power", "2",
               "--noise-bw", "20", "--events", str(events)]
        proc = subprocess.Popen(cmd, env=_env(seed, caches[cache], run_env), cwd=str(tmp), text=True,
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL)
        run_files[label] = events
        return proc, label

    run_files = {}
    chains = _finish([chain(COLD_SEEDS[0], "A"), chain(COLD_SEEDS[1], "B")])
    first = f"seed {COLD_SEEDS[0]}, cold cache"
    both = _finish([chain(WARM_SEED, "A"), run(COLD_SEEDS[0], "R", first)])
    chains.update({k: v for k, v in both.items() if k != first})
    runs = {first: both[first]}
    runs.update(_finish([run(COLD_SEEDS[1], "B", f"seed {COLD_SEEDS[1]}, warm cache (compiled under that seed)"),
                         run(WARM_SEED, "A", f"seed {WARM_SEED}, warm cache (compiled under seed "
                                             f"{COLD_SEEDS[0]})")]))
    return ({label: json.loads(text) for label, text in chains.items()},
            {label: (run_files[label].read_bytes(), text) for label, text in runs.items()})


@pytest.fixture(scope="module")
def chain_digests(processes):
    return processes[0]


@pytest.fixture(scope="module")
def run_outputs(processes):
    return processes[1]


def _same(results, subject):
    values = {label: r[subject] for label, r in results.items()}
    assert len(set(values.values())) == 1, f"{subject} differs between processes: {values}"


# The loop kernel is compiled without FMA contraction: with fastmath={'contract'}, which
# multiply-add pairs LLVM fused followed the order of numba's generated IR, and so the hash
# seed (75 vs 76 FMA instructions under seeds 0 and 2).
@pytest.mark.parametrize("subject", ["loop M=2", "loop M=4", "loop M=2 third order"])
def test_loops_identical_across_processes(chain_digests, subject):
    _same(chain_digests, subject)


@pytest.mark.parametrize("subject", ["lock detector M=2", "lock detector M=4"])
def test_lock_detector_identical_across_processes(chain_digests, subject):
    _same(chain_digests, subject)


@pytest.mark.parametrize("subject", ["feed-forward M=4", "feed-forward M=2"])
def test_feedforward_identical_across_processes(chain_digests, subject):
    _same(chain_digests, subject)


def test_every_subject_was_run(chain_digests, run_outputs):
    assert len(chain_digests) == 3 and len(run_outputs) == 3
    for result in chain_digests.values():
        assert len(result) == 7 and all(len(v) == 64 for v in result.values())


def test_run_events_identical_across_processes(run_outputs):
    events = {label: ev for label, (ev, _) in run_outputs.items()}
    first = next(iter(events.values()))
    assert json.loads(first), "no events"
    assert len(set(events.values())) == 1, {k: json.loads(v)[:4] for k, v in events.items()}


def test_run_printout_identical_across_processes(run_outputs):
    printed = {label: text for label, (_, text) in run_outputs.items()}
    assert len(set(printed.values())) == 1, printed
