# SPDX-License-Identifier: GPL-3.0-or-later
"""The serving side of a spread run (``coherer worker --listen ENDPOINT``).

A worker binds one ZeroMQ endpoint only, the one it is given, with the
framework's ``pull_msg_source``, and waits there for jobs (:mod:`coherer.wire`).
For each job it connects (never binds) a ``pull_source`` to the runner's sample
stream and a ``push_msg_sink`` to the runner's reply endpoint, runs the job's
channels with the same code as a single-process run
(:func:`coherer.channels.build_channels`), reports that it is alive about twice
a second, and sends the chains' results. A malformed frame or job is reported
on stderr (one line) and dropped; the worker keeps listening.
"""

import queue
import sys
import threading
import time
from types import SimpleNamespace

import pmt
from gnuradio import blocks, gr, zeromq

from . import channels, receiver, wire

#: Seconds between "alive" replies while a job runs.
ALIVE_INTERVAL_S = 0.5
#: A job whose sample stream brings nothing new for this long is abandoned (s).
JOB_STALL_S = 30.0
#: ZeroMQ high-water mark (messages) of the sample stream: a full queue blocks the sender.
STREAM_HWM = 64
#: Seconds between checks of a running job (its collectors, a stall, the end).
WATCH_S = 0.02
#: Seconds a reply socket is kept open after the last reply, for it to leave.
REPLY_LINGER_S = 1.0

IN = pmt.intern("in")
OUT = pmt.intern("out")


class inbox(gr.basic_block):
    """Message sink that queues what arrives on ``in`` for another thread."""

    def __init__(self):
        gr.basic_block.__init__(self, name="coherer_inbox", in_sig=None, out_sig=None)
        self.received = queue.Queue()
        self.message_port_register_in(IN)
        self.set_msg_handler(IN, self._keep)

    def _keep(self, msg):
        self.received.put(msg)


class outbox(gr.basic_block):
    """Message source: :meth:`send` publishes on ``out`` from any thread."""

    def __init__(self):
        gr.basic_block.__init__(self, name="coherer_outbox", in_sig=None, out_sig=None)
        self.message_port_register_out(OUT)

    def send(self, obj):
        self.message_port_pub(OUT, wire.encode(obj))


class Replies:
    """A running flowgraph outbox -> push_msg_sink (connecting to ``endpoint``)."""

    def __init__(self, endpoint):
        self.tb = gr.top_block("coherer_replies")
        self.box = outbox()
        self.sink = zeromq.push_msg_sink(endpoint, 100, False)
        self.tb.msg_connect((self.box, "out"), (self.sink, "in"))
        self.tb.start()

    def send(self, obj):
        self.box.send(obj)

    def close(self):
        """Stop after ``REPLY_LINGER_S`` (for the last reply to leave), from a thread of
        its own, so the worker can take its next job meanwhile."""
        threading.Thread(target=self._linger_and_stop, daemon=True).start()

    def _linger_and_stop(self):
        time.sleep(REPLY_LINGER_S)
        self.tb.stop()
        self.tb.wait()


def run_job(job, log=sys.stderr):
    """Run one checked job; replies go to the job's reply endpoint."""
    replies = Replies(job["replies"])
    jid = job["job_id"]
    alive = _Heartbeat(replies, jid)          # from now on until the last reply
    try:
        plans = [wire.plan_from_dict(p) for p in job["plans"]]
        settings = wire.settings_from_dict(job["settings"])
        total = int(job["num_samples"])
        tb = gr.top_block("coherer_worker_job")
        src = zeromq.pull_source(gr.sizeof_gr_complex, 1, job["samples"], 100, False, STREAM_HWM)
        head = blocks.head(gr.sizeof_gr_complex, total)
        tb.connect(src, head)
        chains = channels.build_channels(tb, head, SimpleNamespace(num_samples=total), settings, plans)
    except (ValueError, RuntimeError) as exc:
        alive.stop()
        replies.send({"kind": "failed", "job_id": jid, "error": f"job rejected: {exc}"})
        replies.close()
        print(f"coherer worker: job rejected: {exc}", file=log, flush=True)
        return
    print(f"coherer worker: job {jid[:8]}: {len(plans)} carrier(s), {total} samples", file=log, flush=True)
    sinks = [c.sink for c in chains]
    totals = [p.channel_samples(total) for p in plans]
    alive.watch(sinks, plans)
    t0 = time.monotonic()
    finished = threading.Event()
    tb.start()
    threading.Thread(target=lambda: (tb.wait(), finished.set()), daemon=True).start()
    last, last_change = -1, time.monotonic()
    error = None
    try:
        while not finished.wait(WATCH_S):
            done = alive.progress()
            if done != last:
                last, last_change = done, time.monotonic()
            elif time.monotonic() - last_change > JOB_STALL_S:
                error = f"no samples for {JOB_STALL_S:g} s"
                break
            if any(s.error is not None for s in sinks):
                error = "a collector failed: " + repr(next(s.error for s in sinks if s.error is not None))
                break
            if all(s.progress >= t for s, t in zip(sinks, totals)):
                break         # every chain has its samples; the network source itself never ends
        if not finished.is_set():
            tb.stop()
            finished.wait()
        if error is None:
            wall = time.monotonic() - t0
            stream = SimpleNamespace(center_freq_hz=None)
            results = [wire.result_to_dict(receiver.chain_result(stream, c, wall)) for c in chains]
            message = {"kind": "done", "job_id": jid, "results": results}
        else:
            message = {"kind": "failed", "job_id": jid, "error": error}
            print(f"coherer worker: job abandoned: {error}", file=log, flush=True)
    finally:
        alive.stop()
    replies.send(message)
    replies.close()


class _Heartbeat:
    """Sends "alive" (with the capture samples every chain has seen) at once and then
    every ALIVE_INTERVAL_S from its own thread, until :meth:`stop`."""

    def __init__(self, replies, job_id):
        self._replies, self._id = replies, job_id
        self._watched = ((), ())
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def watch(self, sinks, plans):
        """Report the progress of these collectors (until then: 0)."""
        self._watched = (tuple(sinks), tuple(plans))

    def progress(self):
        sinks, plans = self._watched
        return min((s.progress * p.decimation for s, p in zip(sinks, plans)), default=0)

    def _run(self):
        while True:
            self._replies.send({"kind": "alive", "job_id": self._id, "progress": int(self.progress())})
            if self._stop.wait(ALIVE_INTERVAL_S):
                return

    def stop(self):
        self._stop.set()
        self._thread.join()


def serve(endpoint, log=sys.stderr, jobs=None):
    """Listen on ``endpoint`` (bound) and run jobs as they come; ``jobs``: stop after that
    many (None: forever). Raises RuntimeError when the endpoint cannot be bound."""
    tb = gr.top_block("coherer_worker_listen")
    src = zeromq.pull_msg_source(endpoint, 100, True)
    box = inbox()
    tb.msg_connect((src, "out"), (box, "in"))
    tb.start()
    print(f"coherer worker: listening on {src.last_endpoint()}", file=log, flush=True)
    count = 0
    try:
        while jobs is None or count < jobs:
            msg = box.received.get()
            try:
                obj = wire.decode(msg)
                if obj["kind"] != "job":
                    raise ValueError(f"unexpected message kind {obj['kind']!r}")
                job = wire.check_job(obj)
            except ValueError as exc:
                print(f"coherer worker: dropped a malformed frame: {exc}", file=log, flush=True)
                continue
            run_job(job, log)
            count += 1
    finally:
        tb.stop()
        tb.wait()


__all__ = ["inbox", "outbox", "Replies", "run_job", "serve"]
