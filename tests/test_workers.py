# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer run --carrier ... --workers N / --worker ENDPOINT`` and ``coherer worker``.

Same recording as test_carriers.py. The reference is the single-process run: the
events must be the same, value for value, whatever the spread (design contract:
"results do not depend on how the chains are spread").
"""

import json
import re
import signal
import socket
import subprocess
import time

import numpy as np
import pytest

from clirunner import coherer, command, env, one_error_line
from test_carriers import NOISE_BW, carrier_args, wideband, write_recording


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Worker:
    """A ``coherer worker`` process on loopback, its stderr read line by line."""

    def __init__(self):
        self.endpoint = f"tcp://127.0.0.1:{free_port()}"
        self.proc = subprocess.Popen(command("worker", "--listen", self.endpoint), env=env(),
                                     stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                     stderr=subprocess.PIPE, text=True)
        self.lines = []
        self.wait_for("listening on")

    def wait_for(self, text, timeout=60):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            line = self.proc.stderr.readline()
            if not line:
                break
            self.lines.append(line)
            if text in line:
                return line
        raise AssertionError(f"worker never said {text!r}: {self.lines}")

    def stop(self):
        if self.proc.poll() is None:
            self.proc.terminate()
            self.proc.wait(10)


@pytest.fixture
def workers():
    started = []
    yield lambda: started.append(Worker()) or started[-1]
    for w in started:
        w.stop()


@pytest.fixture(scope="module")
def capture(tmp_path_factory):
    folder = tmp_path_factory.mktemp("spread")
    return write_recording(folder, wideband())


def run_events(meta, tmp_path, *extra):
    events = tmp_path / f"events{len(list(tmp_path.iterdir()))}.json"
    proc = coherer("run", meta, "--power", 2, "--noise-bw", NOISE_BW, *carrier_args(), "--events", events, *extra)
    assert proc.returncode == 0, proc.stderr
    return json.loads(events.read_text())


def test_same_events_with_one_two_three_local_workers(capture, tmp_path):
    reference = run_events(capture, tmp_path)
    assert {e["carrier"] for e in reference} and any(e["event"] == "lock" for e in reference)
    for n in (1, 2, 3):
        assert run_events(capture, tmp_path, "--workers", n) == reference, n


def test_same_events_with_listening_workers(capture, tmp_path, workers):
    reference = run_events(capture, tmp_path)
    a, b = workers(), workers()
    assert run_events(capture, tmp_path, "--worker", a.endpoint, "--worker", b.endpoint) == reference
    # each served one job and is still there for the next one
    assert a.proc.poll() is None and b.proc.poll() is None


def listening_ports(pid):
    """TCP ports process ``pid`` listens on (ss -ltnp)."""
    out = subprocess.run(["ss", "-Hltnp"], capture_output=True, text=True, check=True).stdout
    return sorted({int(m.group(1)) for line in out.splitlines() if f"pid={pid}," in line
                   for m in [re.search(r":(\d+)\s", line)] if m})


def test_worker_binds_only_its_endpoint_and_drops_malformed_frames(capture, tmp_path, workers):
    import pmt
    import zmq
    w = workers()
    port = int(w.endpoint.rsplit(":", 1)[1])
    assert listening_ports(w.proc.pid) == [port]
    ctx = zmq.Context()
    push = ctx.socket(zmq.PUSH)
    push.setsockopt(zmq.LINGER, 2000)
    push.connect(w.endpoint)
    frames = [b"\x00\x01garbage",                                         # not a pmt at all
              pmt.serialize_str(pmt.intern("hello")),                      # a pmt, not a message
              pmt.serialize_str(pmt.init_u8vector(4, [1, 2, 3, 4])),       # bytes, not zlib
              pmt.serialize_str(pmt.to_pmt(np.frombuffer(__import__("zlib").compress(
                  json.dumps({"kind": "job", "samples": 3}).encode()), dtype=np.uint8)))]  # bad job
    for f in frames:
        push.send(f)
    push.close()
    ctx.term()
    for _ in frames[1:]:                   # the framework's block reports the first one itself
        w.wait_for("dropped a malformed frame")
    assert w.proc.poll() is None
    # and it still serves a real job, binding nothing more
    reference = run_events(capture, tmp_path)
    assert run_events(capture, tmp_path, "--worker", w.endpoint) == reference
    assert listening_ports(w.proc.pid) == [port]


def test_killed_worker_ends_the_run_with_one_line_and_no_annotation(tmp_path, workers):
    x = np.concatenate([wideband(seed) for seed in (11, 12, 13, 14)])     # 6 s: a long run
    meta = write_recording(tmp_path, x, name="long")
    before = meta.read_bytes()
    a, b = workers(), workers()
    proc = subprocess.Popen(command("run", meta, "--power", 2, "--noise-bw", NOISE_BW, *carrier_args(),
                                    "--worker", a.endpoint, "--worker", b.endpoint, "--annotate"),
                            env=env(), stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    b.wait_for("carrier(s)")                       # its job is running
    time.sleep(0.5)
    b.proc.send_signal(signal.SIGKILL)
    t0 = time.monotonic()
    out, err = proc.communicate(timeout=60)
    # acceptance: exit 1 within 10 s of the kill, one line, metadata unchanged
    assert time.monotonic() - t0 < 10.0
    assert proc.returncode == 1, err
    line = one_error_line(subprocess.CompletedProcess([], 1, out, err))
    assert b.endpoint in line
    assert meta.read_bytes() == before


def test_unreachable_worker_is_exit_1_one_line(capture, tmp_path):
    dead = f"tcp://127.0.0.1:{free_port()}"             # nobody listens there
    proc = coherer("run", capture, "--power", 2, "--noise-bw", NOISE_BW, *carrier_args(), "--worker", dead)
    assert proc.returncode == 1
    assert "cannot be reached" in one_error_line(proc)


@pytest.mark.parametrize("args, words", [
    (["--workers", "2"], "--workers and --worker need --carrier"),
    (["--carrier", "1k", "--worker", "127.0.0.1:5"], "--worker must be tcp://HOST:PORT"),
    (["--carrier", "1k", "--workers", "0"], "--workers"),
])
def test_bad_worker_options_are_exit_2(capture, args, words):
    proc = coherer("run", capture, "--power", 2, "--noise-bw", NOISE_BW, *args)
    assert proc.returncode == 2
    assert words in one_error_line(proc)


def test_worker_with_a_malformed_endpoint_is_exit_2():
    proc = coherer("worker", "--listen", "udp://nowhere")
    assert proc.returncode == 2
    assert "--listen must be tcp://HOST:PORT" in one_error_line(proc)


@pytest.mark.parametrize("cpus, words", [("4096", "this host lets it use CPUs"),
                                         ("0,x", "CPU numbers separated by commas")])
def test_worker_with_bad_cpus_is_exit_2(cpus, words):
    proc = coherer("worker", "--listen", f"tcp://127.0.0.1:{free_port()}", "--cpus", cpus)
    assert proc.returncode == 2
    assert words in one_error_line(proc)


def test_local_workers_each_get_a_cpu_of_their_own():
    import os

    from gnuradio.coherer.spread import start_local_workers, stop_local_workers
    allowed = sorted(os.sched_getaffinity(0))
    local = start_local_workers(len(allowed) + 1)
    try:
        deadline = time.monotonic() + 30
        want = [{allowed[i % len(allowed)]} for i in range(len(local))]
        while [os.sched_getaffinity(p.pid) for _, p in local] != want and time.monotonic() < deadline:
            time.sleep(0.2)
        assert [os.sched_getaffinity(p.pid) for _, p in local] == want
    finally:
        stop_local_workers(local)


def test_wire_byte_vectors_match_the_frameworks_own_conversion():
    # Reference: the framework's own pmt conversions (pmt.to_pmt of a numpy uint8 array,
    # pmt.u8vector_elements); the wire builds and reads the same values without a
    # Python int per byte.
    import zlib

    import pmt

    from gnuradio.coherer import wire
    rng = np.random.default_rng(5)
    for n in (0, 1, 7, 4096, 100_003):
        raw = rng.integers(0, 256, n).astype(np.uint8).tobytes()
        reference = pmt.to_pmt(np.frombuffer(raw, dtype=np.uint8)) if n else pmt.init_u8vector(0, [])
        assert pmt.equal(wire._to_u8vector(raw), reference)
        assert wire._from_u8vector(reference) == bytes(pmt.u8vector_elements(reference))
    obj = {"kind": "alive", "job_id": "x" * 32, "progress": 12345, "values": [0.5, float("inf")]}
    sent = wire.encode(obj)
    assert json.loads(zlib.decompress(bytes(pmt.u8vector_elements(sent)))) == obj
    framework_made = pmt.to_pmt(np.frombuffer(zlib.compress(json.dumps(obj).encode()), dtype=np.uint8))
    assert wire.decode(framework_made) == obj


def test_a_live_local_worker_gets_the_longer_first_answer_limit(capture, monkeypatch):
    # A local process is watched for exits, so a slow start (framework import and kernel
    # loading on a busy host) is given LOCAL_WORKER_START_S, not the remote WORKER_START_S.
    # Here the "worker" is a live process that never answers: the run must wait the local
    # limit, then fail naming it.
    import sys

    from gnuradio.coherer import spread
    from gnuradio.coherer.cli import build_parser
    from gnuradio.coherer.cli.carriers import plan
    from gnuradio.coherer.cli.run import open_input, settings_from_args
    monkeypatch.setattr(spread, "WORKER_START_S", 0.2)
    monkeypatch.setattr(spread, "LOCAL_WORKER_START_S", 2.0)
    args = build_parser().parse_args(["run", str(capture), "--power", "2", "--noise-bw",
                                      str(NOISE_BW), *carrier_args()])
    rec = open_input(args)
    settings = settings_from_args(args)
    plans = plan(args, rec, settings)
    ep = f"tcp://127.0.0.1:{free_port()}"                  # nobody listens there
    silent = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        t0 = time.monotonic()
        with pytest.raises(spread.WorkerError, match="no answer in 2 s"):
            spread.run_spread(rec, settings, plans, [ep], processes={ep: silent})
        assert time.monotonic() - t0 >= 2.0
        t0 = time.monotonic()
        with pytest.raises(spread.WorkerError, match="no answer in 0.2 s"):
            spread.run_spread(rec, settings, plans, [ep])           # a remote one: the short limit
        assert time.monotonic() - t0 < 2.0
    finally:
        silent.kill()
        silent.wait()
