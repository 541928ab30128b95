# SPDX-License-Identifier: GPL-3.0-or-later
"""Carrier chains spread over worker processes and hosts, connected by the
framework's ZeroMQ blocks.

The runner's flowgraph reads the recording once and pushes the whole capture
to each worker through its own ``push_sink`` (ZeroMQ PUSH: a full queue blocks
the sender, so a slow worker slows the run down and nothing is dropped). Each
worker gets a job (:mod:`coherer.wire`) naming that stream, the reply endpoint
(one ``pull_msg_source`` bound by the runner) and its share of the carriers
(carrier i goes to worker i mod N), runs their channels exactly as a
single-process run does, and sends the chains' results back. The runner maps
them to the capture with the same :func:`coherer.channels.to_capture`, so the
events do not depend on how the carriers are spread.

A worker that exits, reports a failure, or stays silent for
``WORKER_SILENCE_S`` seconds (before its first reply: ``WORKER_START_S``, or
``LOCAL_WORKER_START_S`` for a local process, which is watched for exits and on a
busy host can take longer to import the framework and load its kernels) ends the
run with :class:`WorkerError`.
"""

import os
import socket
import subprocess
import sys
import time
import uuid
from urllib.parse import urlsplit

from gnuradio import gr, zeromq

from . import channels, receiver, wire
from .worker import STREAM_HWM, inbox, outbox

#: A worker silent for this long (s) after its first reply is taken as gone.
WORKER_SILENCE_S = 5.0
#: Time (s) a worker has to send its first reply (process start, kernel warm-up).
WORKER_START_S = 20.0
#: The same for a worker process started here: its exit is seen at once, so a slow
#: start (framework import and kernel loading on a loaded host) is given more time.
LOCAL_WORKER_START_S = 120.0
#: Seconds between checks of the replies and the local worker processes.
POLL_S = 0.02


class WorkerError(RuntimeError):
    """A worker died, failed or could not be reached."""


def free_port(host="127.0.0.1"):
    with socket.socket() as s:
        s.bind((host, 0))
        return s.getsockname()[1]


def start_local_workers(count):
    """``count`` ``coherer worker`` processes on loopback, worker i on the i-th CPU this
    process may use (round robin), so that each is one CPU's worth of work whatever
    threads its flowgraph starts; returns [(endpoint, Popen)]."""
    cpus = sorted(os.sched_getaffinity(0))
    out = []
    for i in range(count):
        ep = f"tcp://127.0.0.1:{free_port()}"
        proc = subprocess.Popen([sys.executable, "-m", "gnuradio.coherer", "worker", "--listen", ep,
                                 "--cpus", str(cpus[i % len(cpus)])],
                                stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL, env=dict(os.environ))
        out.append((ep, proc))
    return out


def stop_local_workers(workers):
    for _, proc in workers:
        if proc.poll() is None:
            proc.terminate()
    for _, proc in workers:
        try:
            proc.wait(5)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def local_address(endpoint):
    """The address of this host as seen from a worker's endpoint (loopback for a local one)."""
    host = urlsplit(endpoint.replace("tcp://", "tcp-x://")).hostname or "127.0.0.1"
    if host in ("127.0.0.1", "localhost", "*"):
        return "127.0.0.1"
    try:
        with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
            s.connect((host, 9))          # no packet is sent: this only picks the route
            return s.getsockname()[0]
    except OSError as exc:
        raise WorkerError(f"worker {endpoint} cannot be reached ({exc.strerror or exc})") from None


def run_spread(rec, settings, plans, endpoints, progress=None, processes=None):
    """Run the carriers of ``plans`` on the workers at ``endpoints`` (``processes``: the
    local worker processes by endpoint, watched for exits). Returns a list of
    :class:`coherer.channels.CarrierResult` in the order of ``plans``."""
    processes = processes or {}
    n = min(len(endpoints), len(plans))
    endpoints = list(endpoints[:n])
    groups = [list(range(i, len(plans), n)) for i in range(n)]
    tb = gr.top_block("coherer_spread")
    head, _source = receiver.source_chain(tb, rec)
    replies = {}                                   # endpoint -> reply source (one per address)
    box = inbox()
    keep = [box]
    jobs = []
    for ep, group in zip(endpoints, groups):
        here = local_address(ep)
        if here not in replies:
            replies[here] = zeromq.pull_msg_source(f"tcp://{here}:*", 100, True)
            tb.msg_connect((replies[here], "out"), (box, "in"))
        push = zeromq.push_sink(gr.sizeof_gr_complex, 1, f"tcp://{here}:*", 100, False, STREAM_HWM)
        tb.connect(head, push)
        send = outbox()
        job_sink = zeromq.push_msg_sink(ep, 100, False)
        tb.msg_connect((send, "out"), (job_sink, "in"))
        keep += [push, send, job_sink]
        job = {"kind": "job", "job_id": uuid.uuid4().hex, "samples": push.last_endpoint(),
               "replies": replies[here].last_endpoint(), "sample_rate": float(rec.sample_rate),
               "num_samples": int(rec.num_samples), "settings": wire.settings_to_dict(settings),
               "plans": [wire.plan_to_dict(plans[i]) for i in group]}
        jobs.append((ep, send, job))
    by_id = {job["job_id"]: k for k, (_, _, job) in enumerate(jobs)}
    heard = [None] * n
    done = [0] * n
    results = [None] * n
    tb.start()
    t0 = time.monotonic()
    try:
        for _, send, job in jobs:
            send.send(job)
        while any(r is None for r in results):
            time.sleep(POLL_S)
            now = time.monotonic()
            while not box.received.empty():
                _take(box.received.get(), by_id, heard, done, results, endpoints, now)
            for k, ep in enumerate(endpoints):
                if results[k] is not None:
                    continue
                proc = processes.get(ep)
                if proc is not None and proc.poll() is not None:
                    raise WorkerError(f"worker {ep} exited (status {proc.returncode}) during the run")
                start_s = WORKER_START_S if proc is None else LOCAL_WORKER_START_S
                if heard[k] is None and now - t0 > start_s:
                    raise WorkerError(f"worker {ep} cannot be reached (no answer in {start_s:g} s)")
                if heard[k] is not None and now - heard[k] > WORKER_SILENCE_S:
                    raise WorkerError(f"worker {ep} stopped answering ({WORKER_SILENCE_S:g} s silent)")
            if progress is not None:
                progress(min(done), rec.num_samples)
    finally:
        tb.stop()
        tb.wait()
    if progress is not None:
        progress(rec.num_samples, rec.num_samples)
    out = [None] * len(plans)
    for k, group in enumerate(groups):
        for i, d in zip(group, results[k]):
            plan = plans[i]
            res = wire.result_from_dict(d, plan, channels.channel_settings(settings, plan))
            out[i] = channels.CarrierResult(plan, channels.to_capture(rec, plan, res))
    return out


def _take(msg, by_id, heard, done, results, endpoints, now):
    """Book one reply (malformed or foreign replies are ignored)."""
    try:
        obj = wire.decode(msg)
    except ValueError:
        return
    k = by_id.get(obj.get("job_id"))
    if k is None:
        return
    heard[k] = now
    kind = obj["kind"]
    if kind == "alive":
        done[k] = int(obj.get("progress", 0))
    elif kind == "done":
        results[k] = obj["results"]
    elif kind == "failed":
        raise WorkerError(f"worker {endpoints[k]} failed: {obj.get('error', 'no reason given')}")


__all__ = ["WorkerError", "start_local_workers", "stop_local_workers", "run_spread",
           "WORKER_SILENCE_S", "WORKER_START_S", "LOCAL_WORKER_START_S"]
