# SPDX-License-Identifier: GPL-3.0-or-later
"""What travels between ``coherer run --workers/--worker`` and ``coherer worker``.

Every message is a pmt u8vector holding zlib-compressed JSON (the framework's
ZeroMQ message blocks carry it), one object with a ``kind``:

* ``job`` (runner -> worker): where to pull the capture samples from
  (``samples``, a ZeroMQ endpoint), where to push replies (``replies``), the
  capture's rate and length, the chain settings and the channel plans.
* ``alive`` (worker -> runner, about twice a second while a job runs) and
  ``done`` (the chains' results in channel samples) or ``failed`` (one line).

:func:`decode` rejects anything else with ValueError, so a worker can drop a
malformed frame and carry on.
"""

import base64
import json
import struct
import zlib
from dataclasses import asdict

import numpy as np
import pmt

#: Largest decompressed message accepted, bytes.
MAX_MESSAGE_BYTES = 1 << 28

JOB_FIELDS = {"samples": str, "replies": str, "job_id": str, "sample_rate": float,
              "num_samples": int, "settings": dict, "plans": list}


#: The framework's serialised form of a u8vector of n bytes is this prefix, n as a
#: big-endian uint32, one pad-count byte (1), one pad byte, then the bytes.
_U8VECTOR_PREFIX = b"\x0a\x00"
_U8VECTOR_PAD = b"\x01\x00"


def _to_u8vector(raw):
    """``raw`` (bytes) as a pmt u8vector, built by the framework's deserialiser: the same
    value as ``pmt.to_pmt`` of the byte array, without a Python int per byte."""
    return pmt.deserialize_str(_U8VECTOR_PREFIX + struct.pack(">I", len(raw)) + _U8VECTOR_PAD + raw)


def _from_u8vector(msg):
    """The bytes of a pmt u8vector (the tail of its serialised form)."""
    n = pmt.length(msg)
    return pmt.serialize_str(msg)[-n:] if n else b""


def encode(obj):
    """A JSON-able dict as the pmt blob sent over the wire."""
    return _to_u8vector(zlib.compress(json.dumps(obj, allow_nan=True).encode(), 1))


def decode(msg):
    """The dict inside a wire message; ValueError for anything malformed."""
    try:
        if not pmt.is_u8vector(msg):
            raise ValueError("not a byte vector")
        raw = _from_u8vector(msg)
        d = zlib.decompressobj()
        text = d.decompress(raw, MAX_MESSAGE_BYTES)
        if d.unconsumed_tail:
            raise ValueError("message too large")
        obj = json.loads(text)
    except ValueError:
        raise
    except Exception as exc:          # zlib.error, UnicodeDecodeError, pmt errors
        raise ValueError(f"undecodable message ({type(exc).__name__})") from None
    if not isinstance(obj, dict) or not isinstance(obj.get("kind"), str):
        raise ValueError("message without a kind")
    return obj


def check_job(obj):
    """Raise ValueError unless ``obj`` is a well-formed job."""
    for name, kind in JOB_FIELDS.items():
        value = obj.get(name)
        if kind is float and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if not isinstance(value, kind) or isinstance(value, bool):
            raise ValueError(f"job field {name} missing or not a {kind.__name__}")
    if not obj["plans"] or not all(isinstance(p, dict) for p in obj["plans"]):
        raise ValueError("job without channel plans")
    if not (obj["sample_rate"] > 0 and obj["num_samples"] > 0):
        raise ValueError("job with a non-positive rate or length")
    for ep in (obj["samples"], obj["replies"]):
        if not ep.startswith("tcp://"):
            raise ValueError("job endpoints must be tcp://")
    return obj


# --- plans and settings ---------------------------------------------------------------

def plan_to_dict(plan):
    d = asdict(plan)
    d["taps"] = [float(t) for t in plan.taps]
    d["timing"] = plan.timing.as_dict()
    return d


def plan_from_dict(d):
    from .channels import ChannelPlan
    from .receiver import SymbolTiming
    try:
        timing = SymbolTiming(**d["timing"])
        return ChannelPlan(float(d["carrier_hz"]), int(d["power"]), float(d["sample_rate"]),
                           int(d["decimation"]), float(d["bandwidth_hz"]),
                           tuple(float(t) for t in d["taps"]), timing)
    except (KeyError, TypeError) as exc:
        raise ValueError(f"bad channel plan ({exc})") from None


def settings_to_dict(settings):
    """A :class:`coherer.receiver.ReceiverSettings` as a plain dict (the inverse of
    :func:`settings_from_dict`)."""
    return asdict(settings)


def settings_from_dict(d):
    from .receiver import ReceiverSettings
    try:
        return ReceiverSettings(**d)
    except TypeError as exc:
        raise ValueError(f"bad settings ({exc})") from None


# --- results ----------------------------------------------------------------------------

#: Array types of the decimated traces (anything else is float32).
TRACE_TYPES = {"sample": np.int64, "before": np.complex64, "after": np.complex64}


def _pack(a, dtype):
    """An array as base64 of its little-endian bytes (exact, and far faster than JSON numbers)."""
    return base64.b64encode(np.ascontiguousarray(a, dtype=np.dtype(dtype).newbyteorder("<")).tobytes()).decode()


def _unpack(text, dtype):
    try:
        return np.frombuffer(base64.b64decode(text), dtype=np.dtype(dtype).newbyteorder("<")).astype(dtype)
    except (ValueError, TypeError) as exc:
        raise ValueError(f"bad array ({exc})") from None


def result_to_dict(res):
    """A chain's :class:`coherer.receiver.RunResult` (channel samples) as JSON-able data."""
    return {"num_samples": int(res.num_samples), "events": res.events,
            "intervals": [{"start": iv.start, "end": iv.end, "freq_sum": iv.freq_sum,
                           "freq_count": iv.freq_count, "esn0_lin": list(iv.esn0_lin),
                           "metric": list(iv.metric)} for iv in res.intervals],
            "status": _pack(res.status, np.float64),
            "traces": {k: _pack(v, TRACE_TYPES.get(k, np.float32)) for k, v in res.traces.items()},
            "thresholds": list(res.thresholds), "wall_s": res.wall_s,
            "slips_outside_lock": res.slips_outside_lock, "window": res.window}


def result_from_dict(d, plan, settings):
    """The :class:`coherer.receiver.RunResult` (channel samples) of one carrier."""
    from types import SimpleNamespace

    from . import design
    from .receiver import Interval, RunResult
    traces = {k: _unpack(v, TRACE_TYPES.get(k, np.float32)) for k, v in d["traces"].items()}
    intervals = [Interval(iv["start"], iv["end"], iv["freq_sum"], iv["freq_count"],
                          esn0_lin=iv["esn0_lin"], metric=iv["metric"]) for iv in d["intervals"]]
    loop = design.design_loop(plan.channel_rate, settings.power, settings.noise_bw_hz,
                              settings.damping, settings.loop_order)
    return RunResult(SimpleNamespace(center_freq_hz=None), settings, int(d["num_samples"]),
                     d["events"], intervals, _unpack(d["status"], np.float64).reshape(-1, 4),
                     traces, tuple(d["thresholds"]), loop, float(d["wall_s"]),
                     int(d["slips_outside_lock"]), plan.timing, int(d["window"]))


__all__ = ["encode", "decode", "check_job", "plan_to_dict", "plan_from_dict", "settings_from_dict",
           "result_to_dict", "result_from_dict"]
