# SPDX-License-Identifier: GPL-3.0-or-later
"""The whole benchmark behind ``coherer bench``: what is measured, in which order,
and how it is reported (result dict for ``--json``, text table otherwise).

Every figure is the median of several repetitions on the same data in the same
run; a figure whose repetitions spread by more than 10 % is marked noisy.
"""

import importlib
import os
import pathlib
import platform
import subprocess
import tempfile
import time

import numba
import numpy as np
from gnuradio import gr

from .. import _loop_kernel as K
from ..mth_power_loop_cc import mth_power_loop_cc
from .._long_calls import CALL_ITEMS
from ..lock_detector_cc import lock_detector_cc
from ..squaring_loop_cc import squaring_loop_cc
from . import creference, measure, soak as soak_mod, stream

#: Nominal sample rate given to the blocks, samples/s (throughput is rate independent).
SAMPLE_RATE = 1e6
#: Loop noise bandwidth of every benchmarked loop, Hz (B_L T = 1e-3).
NOISE_BW_HZ = 1000.0
#: Samples per run and repetitions: full bench and ``--quick``.
FULL = {"samples": 1 << 22, "reps": 5}
QUICK = {"samples": 1 << 15, "reps": 2}
#: Samples of the ``--soak`` run.
SOAK_SAMPLES = 200_000_000
#: Window of the feed-forward estimator in the benchmark, samples.
FEEDFORWARD_WINDOW = 256
#: Performance targets (ratios): the squaring loop in a flowgraph against the plain C loop of
#: the same recursion; every other loop (M = 1, 4, 8, third order) within 25 % of M = 2.
TARGET_LOOP_VS_C = 3.0
TARGET_OTHER_LOOPS_VS_M2 = 0.75
TARGET_DETECTOR_VS_C = 3.0
TARGET_TWO_CHAINS = 1.8
#: Performance target of the feed-forward block (in a flowgraph / C loop).
TARGET_FEEDFORWARD_VS_C = 3.0


# --- what is benchmarked ---------------------------------------------------------------

#: The row the targets and the extra figures are about.
SQUARING = "squaring loop (M=2)"

def _loop(power, loop_order=2):
    def make():
        return mth_power_loop_cc(SAMPLE_RATE, power, NOISE_BW_HZ, loop_order=loop_order,
                                 acquire=False)
    return make


def _squaring():
    return squaring_loop_cc(SAMPLE_RATE, NOISE_BW_HZ, acquire=False)


def _detector():
    return lock_detector_cc(SAMPLE_RATE, 2, 1024)


def _optional_block(module_name, class_name, *args, **kwargs):
    """Factory for a block that may not exist in this build; (factory, None) or (None, reason)."""
    try:
        module = importlib.import_module(f"..{module_name}", __package__)
        cls = getattr(module, class_name)

        def make():
            return cls(*args, **kwargs)
        make()                          # fails now, not in the middle of the table
        return make, None
    except Exception as exc:            # noqa: BLE001 - any failure means "skip with a note"
        return None, f"{class_name} not available: {type(exc).__name__}: {exc}"


def block_specs():
    """(name, power, factory or None, is_loop, skip note, input stream) for every
    benchmarked block. Input streams: ``psk{M}`` (carrier offset, random phase: what a
    loop or the feed-forward block gets) and ``corrected{M}`` (carrier removed: what
    the lock detector gets behind a locked loop; a rotating input would make it
    change state, tag and publish a message at almost every window)."""
    specs = [
        (SQUARING, 2, _squaring, True, None, "psk2"),
        ("phase-locked loop M=1", 1, _loop(1), True, None, "psk1"),
        ("M-th power loop M=4", 4, _loop(4), True, None, "psk4"),
        ("M-th power loop M=8", 8, _loop(8), True, None, "psk8"),
        ("third-order loop (M=2)", 2, _loop(2, loop_order=3), True, None, "psk2"),
    ]
    make, note = _optional_block("lock_detector_cc", "lock_detector_cc", SAMPLE_RATE, 2)
    specs.append(("lock detector (M=2)", 2, make, False, note, "corrected2"))
    make, note = _optional_block("mth_power_feedforward_cc", "mth_power_feedforward_cc",
                                 SAMPLE_RATE, 4, FEEDFORWARD_WINDOW)
    specs.append((f"feed-forward M=4 (window {FEEDFORWARD_WINDOW})", 4, make, False, note, "psk4"))
    return specs


# --- machine description ------------------------------------------------------------------

def cpu_model():
    """CPU model name from /proc/cpuinfo (or the platform's processor string)."""
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def _compiler_version(exe):
    try:
        out = subprocess.run([exe, "--version"], capture_output=True, text=True).stdout
        return out.splitlines()[0] if out else "unknown"
    except OSError:
        return "unknown"


def machine():
    """Description of the machine and software the figures were taken on."""
    return {"cpu_model": cpu_model(), "cores": os.cpu_count(),
            "load_average": list(os.getloadavg()), "python": platform.python_version(),
            "gnuradio": gr.version(), "numba": numba.__version__, "numpy": np.__version__}


# --- the run ----------------------------------------------------------------------------

def _ratio(a, b):
    return a / b if a and b else None


def _ratios(num, den):
    """Per-clock ratio of two figure pairs (``{"wall": fig, "cpu": fig}``)."""
    if not num or not den:
        return None
    return {clock: _ratio(num[clock]["median"], den[clock]["median"]) for clock in CLOCKS}


#: the two clocks every rate is measured with (see measure)
CLOCKS = ("wall", "cpu")


def run(quick=False, soak=False, soak_samples=SOAK_SAMPLES, progress=None):
    """Run the benchmark; returns the result dict (see ``--json``)."""
    say = progress or (lambda msg: None)
    cfg = QUICK if quick else FULL
    n, reps = cfg["samples"], cfg["reps"]
    started = time.perf_counter()
    result = {"machine": machine(), "samples": n, "repetitions": reps,
              "sample_rate": SAMPLE_RATE, "noise_bw_hz": NOISE_BW_HZ,
              "esn0_db": stream.BENCH_ESN0_DB, "noisy_spread": measure.NOISY_SPREAD,
              "blocks": [], "skipped": []}
    with tempfile.TemporaryDirectory(prefix="coherer-bench-") as tmp:
        tmp = pathlib.Path(tmp)
        data = {}
        for power in (1, 2, 4, 8):
            data[power] = stream.psk_stream(power, n, seed=power)
            stream.write_cf32(tmp / f"psk{power}.cf32", data[power])
        stream.write_cf32(tmp / "corrected2.cf32", stream.corrected_stream(2, n, seed=2))

        # first: a fresh block in a process that has not run the kernel yet
        say("first-sample latency")
        construction, latency = measure.first_sample_latency(_squaring, tmp / "psk2.cf32")
        result["latency"] = {"block": SQUARING, "construction_s": construction,
                             "first_output_s": latency}
        construction, latency = measure.first_sample_latency(_detector, tmp / "psk2.cf32")
        result["detector_latency"] = {"block": "lock detector (M=2, window 1024)",
                                      "construction_s": construction, "first_output_s": latency}

        say("compiling the C reference")
        exe, flags = creference.compile_reference(tmp)
        result["c_reference"] = {"command": flags, "source": creference.SOURCE.name,
                                 "compiler": _compiler_version(creference.find_compiler())}
        c_by_power = {}

        for name, power, make, is_loop, note, input_name in block_specs():
            if make is None:
                result["skipped"].append({"block": name, "reason": note})
                say(f"skipped {name}: {note}")
                continue
            say(name)
            path = tmp / f"{input_name}.cf32"
            row = {"block": name, "power": power, "input": input_name, "kernel": None, "c": None}
            if is_loop:
                row["kernel"] = measure.summarise_both(measure.kernel_rates(make, data[power], reps))
                blk = make()
                ref = creference.run_reference(exe, path, blk._params, power,
                                               freq0=blk._state[K.S_FREQ], reps=reps)
                row["c"] = measure.summarise_both({"wall": [n / t / 1e6 for t in ref.seconds],
                                                   "cpu": [n / t / 1e6 for t in ref.cpu_seconds]})
                c_by_power.setdefault(power, row["c"])
                row["update_block"] = blk.loop_design().block
                if name == SQUARING and "c_per_sample" not in result:
                    # the plain per-sample recursion: the same C loop updated every sample
                    every = blk._params.copy()
                    every[K.P_BLOCK] = 1
                    ref1 = creference.run_reference(exe, path, every, power,
                                                    freq0=blk._state[K.S_FREQ], reps=reps)
                    result["c_per_sample"] = measure.summarise_both(
                        {"wall": [n / t / 1e6 for t in ref1.seconds],
                         "cpu": [n / t / 1e6 for t in ref1.cpu_seconds]})
            row["flowgraph"] = measure.summarise_both(measure.flowgraph_rates(make, path, n, reps))
            row["c_compared"] = row["c"] or c_by_power.get(power)
            row["flowgraph_vs_c"] = _ratios(row["flowgraph"], row["c_compared"])
            row["kernel_vs_c"] = _ratios(row["kernel"], row["c_compared"])
            result["blocks"].append(row)

        say("framework floor (Python copy block)")
        result["framework_floor"] = measure.summarise_both(
            measure.flowgraph_rates(measure.copy_cc, tmp / "psk2.cf32", n, reps))
        result["framework_floor_long_calls"] = measure.summarise_both(measure.flowgraph_rates(
            lambda: measure.copy_cc(CALL_ITEMS), tmp / "psk2.cf32", n, reps))
        result["call_items"] = CALL_ITEMS

        say("two chains vs one")
        one = measure.summarise_both(measure.flowgraph_rates(_squaring, tmp / "psk2.cf32", n, reps, 1))
        two = measure.summarise_both(measure.flowgraph_rates(_squaring, tmp / "psk2.cf32", n, reps, 2))
        result["two_chains"] = {"block": SQUARING, "one_chain": one, "two_chains": two,
                                "ratio": _ratio(two["wall"]["median"], one["wall"]["median"])}

        if soak:
            say(f"soak: {soak_samples:.3g} samples through the squaring loop")
            result["soak"] = soak_mod.soak(_squaring, tmp / "psk2.cf32", soak_samples)

    result["machine"]["load_average_end"] = list(os.getloadavg())
    result["targets"] = targets(result, judged=not quick)
    result["elapsed_s"] = time.perf_counter() - started
    return result


def targets(result, judged=True):
    """The performance targets this run can evaluate: list of dicts, with the value per
    clock (``{"wall": x, "cpu": y}``; two chains: wall clock only) and whether it is
    met. A ``--quick`` run (``judged`` False) is too short to judge: ``met`` is None."""
    rows = {r["block"]: r for r in result["blocks"]}
    checks = []

    def add(what, values, target, goal=None):
        met = {clock: None if v is None or not judged else bool(v >= target)
               for clock, v in values.items()}
        checks.append({"check": what, "value": values, "target": target, "goal": goal, "met": met})

    sq = rows.get(SQUARING)
    if sq:
        add("squaring loop in flowgraph / C loop", sq["flowgraph_vs_c"], TARGET_LOOP_VS_C)
        for name, label in (("phase-locked loop M=1", "M=1"), ("M-th power loop M=4", "M=4"),
                            ("M-th power loop M=8", "M=8"), ("third-order loop (M=2)", "third order")):
            other = rows.get(name)
            if other:
                add(f"{label} / M=2 in flowgraph", _ratios(other["flowgraph"], sq["flowgraph"]),
                    TARGET_OTHER_LOOPS_VS_M2)
    det = rows.get("lock detector (M=2)")
    if det:
        add("lock detector in flowgraph / C loop", det["flowgraph_vs_c"], TARGET_DETECTOR_VS_C)
    ff = rows.get(f"feed-forward M=4 (window {FEEDFORWARD_WINDOW})")
    if ff:
        add("feed-forward in flowgraph / C loop", ff["flowgraph_vs_c"], TARGET_FEEDFORWARD_VS_C)
    if "two_chains" in result:
        add("two chains / one chain", {"wall": result["two_chains"]["ratio"]}, TARGET_TWO_CHAINS)
    if "soak" in result:
        s = result["soak"]
        checks.append({"check": "soak RSS growth after warm-up, MB", "value": {"wall": s["growth_mb"]},
                       "target": f"< {s['limit_mb']:g}", "goal": None,
                       "met": {"wall": s["passed"] if judged else None}})
    return checks


# --- text report ---------------------------------------------------------------------------

def _fig(f):
    if not f:
        return "-"
    return f"{f['median']:.1f}{'~' if f['noisy'] else ''}"


def _r(x):
    return "-" if x is None else f"{x:.2f}x"


def _table(result, clock):
    head = (f"{'block':36s} {'kernel':>8s} {'flowgraph':>10s} {'C loop':>8s} {'fg / C':>7s} "
            f"{'kernel / C':>10s}")
    lines = [head, "-" * len(head)]
    for r in result["blocks"]:
        if r["c"]:
            c_text = _fig(r["c"][clock])
        elif r["c_compared"]:
            c_text = f"({r['c_compared'][clock]['median']:.1f})"
        else:
            c_text = "-"
        kernel = _fig(r["kernel"][clock]) if r["kernel"] else "-"
        fg_c = _r(r["flowgraph_vs_c"][clock]) if r["flowgraph_vs_c"] else "-"
        k_c = _r(r["kernel_vs_c"][clock]) if r["kernel_vs_c"] else "-"
        lines.append(f"{r['block']:36s} {kernel:>8s} {_fig(r['flowgraph'][clock]):>10s} "
                     f"{c_text:>8s} {fg_c:>7s} {k_c:>10s}")
    floor = _fig(result["framework_floor"][clock])
    lines.append(f"{'framework floor (Python copy block)':36s} {'-':>8s} {floor:>10s}")
    floor = _fig(result["framework_floor_long_calls"][clock])
    label = f"  same, {result['call_items']}-sample calls"
    lines.append(f"{label:36s} {'-':>8s} {floor:>10s}")
    return lines


def format_table(result):
    """The human-readable report: throughput tables, ratios and the targets."""
    m = result["machine"]
    lines = [f"coherer bench: {result['samples']} samples per run, median of "
             f"{result['repetitions']} repetitions, Msps (~ = noisy: spread > "
             f"{100 * result['noisy_spread']:.0f} %)",
             f"machine: {m['cores']} cores, {m['cpu_model']}, load average at start "
             f"{m['load_average'][0]:.2f}, at end {m['load_average_end'][0]:.2f}",
             f"C reference: {result['c_reference']['command']} "
             f"({result['c_reference']['compiler']}); (x) = C figure of the loop with the same M",
             f"inputs: noisy M-PSK at Es/N0 {result['esn0_db']:g} dB with a carrier offset; the lock "
             "detector gets the same with the carrier removed (as behind a locked loop)",
             "", "Msps per second of wall-clock time (what a live stream gets):"]
    lines += _table(result, "wall")
    lines += ["", "Msps per second of CPU time of the process (cost; not inflated by other load):"]
    lines += _table(result, "cpu")
    for s in result["skipped"]:
        lines.append(f"skipped {s['block']}: {s['reason']}")
    blocks = sorted({r["update_block"] for r in result["blocks"] if r.get("update_block")})
    if blocks:
        lines.append(f"loops at B_L = {result['noise_bw_hz']:g} Hz, {result['sample_rate']:g} "
                     f"samples/s: loop filter updated once per "
                     f"{' / '.join(str(b) for b in blocks)} samples")
    if "c_per_sample" in result:
        sq = next((r for r in result["blocks"] if r["block"] == SQUARING), None)
        c1 = result["c_per_sample"]["wall"]["median"]
        if sq is not None:
            lines.append(f"the same C loop updated every sample (one sin/cos and one filter "
                         f"update per sample): {_fig(result['c_per_sample']['wall'])} Msps; "
                         f"{SQUARING} in a flowgraph / it = "
                         f"{_r(_ratio(sq['flowgraph']['wall']['median'], c1))}")
    t = result["two_chains"]
    lines += ["", f"two chains on two cores ({t['block']}): {_fig(t['two_chains']['wall'])} Msps "
              f"together vs {_fig(t['one_chain']['wall'])} for one chain = {_r(t['ratio'])}"]
    for lat in (result["latency"], result["detector_latency"]):
        first = "none" if lat["first_output_s"] is None else f"{1e3 * lat['first_output_s']:.1f} ms"
        lines.append(f"first-sample latency ({lat['block']}, fresh block): construction "
                     f"{1e3 * lat['construction_s']:.0f} ms, tb.start() -> first output {first}")
    if "soak" in result:
        s = result["soak"]
        lines.append(f"soak: {s['samples']:.3g} samples at {s['msps']:.1f} Msps, RSS "
                     f"{s['rss_warm_mb']:.1f} MB after warm-up, peak {s['rss_peak_mb']:.1f} MB, "
                     f"growth {s['growth_mb']:.2f} MB (limit {s['limit_mb']:g} MB)")
    judged = any(v is not None for c in result["targets"] for v in c["met"].values())
    if judged:
        lines += ["", "targets, wall-clock / CPU-time values:"]
    else:
        lines += ["", "targets (not judged: a --quick run is too short), wall-clock / CPU-time values:"]
    for c in result["targets"]:
        vals = " / ".join("-" if c["value"].get(k) is None else f"{c['value'][k]:.2f}"
                          for k in CLOCKS if k in c["value"])
        tgt = c["target"] if isinstance(c["target"], str) else f">= {c['target']:g}"
        goal = f", goal {c['goal']:g}" if c["goal"] else ""
        line = f"  {c['check']:38s} {vals:>13s}  (target {tgt}{goal})"
        if judged:
            line += "  " + " / ".join({True: "met", False: "not met", None: "n/a"}[c["met"][k]]
                                      for k in CLOCKS if k in c["met"])
        lines.append(line)
    lines.append(f"\nbench took {result['elapsed_s']:.3g} s")
    return "\n".join(lines)
