# SPDX-License-Identifier: GPL-3.0-or-later
"""The run report: ``summary.json`` and PNG plots of a :class:`coherer.receiver.RunResult`.

Files written into the report folder:

``timeline.png``
    Three panels over time (s): NCO frequency (Hz), lock metric with the lock and
    unlock thresholds, and Es/N0 (dB); locked intervals shaded, cycle slips marked.
``constellation.png``
    The loop's input (before carrier recovery) and output (after) during locked
    intervals, normalised to unit RMS.
``summary.json``
    Recording, settings, loop design, locked intervals (with mean frequency,
    Es/N0 and the predicted phase-error RMS), events, and the files written.
"""

import json
from math import degrees
from pathlib import Path

import numpy as np

#: Most points drawn per line / scatter (the traces are thinned to this).
PLOT_POINTS = 20_000
SCATTER_POINTS = 4_000

LOCK_COLOUR = "#cfe8cf"
SLIP_COLOUR = "#c0392b"


#: Plot file formats, by file-name extension (what matplotlib writes for each).
PLOT_FORMATS = {".png": "png", ".pdf": "pdf", ".svg": "svg"}


class PlotFormatError(ValueError):
    """A plot file name whose extension names no supported format."""


def plot_format(path):
    """The format a plot written to ``path`` gets, from its extension (``x.pdf`` -> "pdf");
    PlotFormatError for any other extension."""
    ext = Path(path).suffix.lower()
    if ext not in PLOT_FORMATS:
        shown = f"extension {ext!r}" if ext else "no extension"
        raise PlotFormatError(f"{path}: {shown}; a plot file must end in "
                              + ", ".join(PLOT_FORMATS))
    return PLOT_FORMATS[ext]


def save_figure(fig, path, dpi=100):
    """Write ``fig`` to ``path`` in the format its extension names (PNG, PDF or SVG)."""
    fig.savefig(path, format=plot_format(path), dpi=dpi)


def _finite(x):
    """JSON-safe float: None for NaN/Inf."""
    x = float(x)
    return x if np.isfinite(x) else None


def _clean(obj):
    """Recursively turn numpy scalars into Python ones and non-finite floats into None."""
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return _finite(obj)
    return obj


def summarise(result):
    """The summary as a JSON-ready dict."""
    rec, st, d = result.recording, result.settings, result.loop_design
    intervals = result.interval_summaries()
    for iv in intervals:
        if "esn0_db" in iv and np.isfinite(iv["esn0_db"]):
            iv["phase_error_rms_deg_predicted"] = degrees(result.predicted_phase_rms_rad(iv["esn0_db"]))
    locked = sum(iv["end_sample"] - iv["start_sample"] for iv in intervals)
    slips = [e for e in result.events if e["event"] == "cycle_slip"]
    locks = [e for e in result.events if e["event"] == "lock"]
    summary = {
        "recording": {
            "path": str(rec.meta_path or rec.data_path), "kind": rec.kind, "format": rec.fmt.name,
            "sample_rate": rec.sample_rate, "center_freq_hz": rec.center_freq_hz,
            "samples_in_file": rec.num_samples, "samples_processed": result.num_samples,
            "duration_s": result.num_samples / rec.sample_rate, "warnings": list(rec.warnings),
        },
        "settings": {
            "power": st.power, "noise_bw_hz": st.noise_bw_hz, "damping": st.damping,
            "loop_order": st.loop_order, "window": result.window or st.window,
            "requested_window": st.window, "freq_guess_hz": st.freq_guess_hz,
            "lock_threshold": result.thresholds[0], "unlock_threshold": result.thresholds[1],
        },
        "loop": {"bt": d.bt, "actual_bt": d.actual_bt, "natural_frequency_rad_s": d.natural_frequency,
                 "gains": [d.k1, d.k2, d.k3]},
        "result": {
            "locked": bool(intervals),
            "first_lock_s": locks[0]["time_s"] if locks else None,
            "locked_fraction": locked / result.num_samples if result.num_samples else 0.0,
            "lock_count": len(locks),
            "cycle_slip_events": len(slips),
            "cycle_slips_total": int(sum(e["slips"] for e in slips)),
            "loop_slip_tags_while_unlocked": result.slips_outside_lock,
            "intervals": intervals,
        },
        "symbol_timing": result.timing.as_dict() if result.timing is not None else None,
        "events": result.events,
        "wall_time_s": result.wall_s,
    }
    return _clean(summary)


def write_json(path, obj):
    """Write ``obj`` as indented JSON (non-finite numbers become null)."""
    with open(path, "w") as f:
        json.dump(_clean(obj), f, indent=2)
        f.write("\n")


def _thin(n, most):
    """Indices that keep at most ``most`` of ``n`` evenly spaced points."""
    step = max(1, int(np.ceil(n / most)))
    return np.arange(0, n, step)


def _shade_locked(ax, result, fs, label=True):
    for i, iv in enumerate(result.intervals):
        ax.axvspan(iv.start / fs, iv.end / fs, color=LOCK_COLOUR, zorder=0,
                   label="locked" if (label and i == 0) else None)


def _mark_slips(ax, result, fs, label=True):
    slips = [e for e in result.events if e["event"] == "cycle_slip"]
    for i, e in enumerate(slips):
        ax.axvline(e["sample"] / fs, color=SLIP_COLOUR, lw=0.8, ls="--", zorder=1,
                   label="cycle slip" if (label and i == 0) else None)


def plot_timeline(result, path, truth=None, title=None):
    """Three-panel timeline PNG. ``truth`` (optional) has ``carrier_freq_hz(t)`` and
    ``esn0_db_at(t)`` (t in s), drawn as dashed reference lines."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fs = result.recording.sample_rate
    tr = result.traces
    keep = _thin(len(tr["sample"]), PLOT_POINTS)
    t = tr["sample"][keep] / fs
    fig, axes = plt.subplots(3, 1, figsize=(11, 9), sharex=True, constrained_layout=True)
    fig.suptitle(title or f"Carrier recovery: {Path(str(result.recording.meta_path or result.recording.data_path)).name}")

    ax = axes[0]
    _shade_locked(ax, result, fs)
    _mark_slips(ax, result, fs)
    ax.plot(t, tr["freq"][keep], color="#1f4e79", lw=1.0, label="NCO frequency")
    if truth is not None and len(t):
        ax.plot(t, truth.carrier_freq_hz(t), color="black", lw=1.0, ls=":", label="true carrier (scenario)")
    locked_f = [iv.freq_sum / iv.freq_count for iv in result.intervals if iv.freq_count]
    if locked_f:      # zoom on the locked behaviour; acquisition swings may leave the axes
        lo, hi = min(locked_f), max(locked_f)
        pad = max(10.0, 0.5 * (hi - lo), 5.0 * result.settings.noise_bw_hz)
        ax.set_ylim(lo - pad, hi + pad)
    centre = result.recording.center_freq_hz
    ax.set_ylabel("offset from capture centre (Hz)" if centre is not None else "frequency (Hz)")
    ax.set_title("NCO frequency estimate" + (f" (capture centre {centre / 1e6:.6f} MHz)" if centre else ""))
    ax.legend(loc="upper right", fontsize=8)
    ax.grid(alpha=0.3)

    st = result.status
    ts = st[:, 0] / fs if len(st) else np.zeros(0)
    ax = axes[1]
    _shade_locked(ax, result, fs)
    _mark_slips(ax, result, fs, label=False)
    ax.plot(ts, st[:, 1] if len(st) else ts, color="#6c3483", lw=1.0, marker=".", ms=2, label="lock metric")
    lock_thr, unlock_thr = result.thresholds
    if lock_thr is not None:
        ax.axhline(lock_thr, color="#117a65", ls="--", lw=1.0, label=f"lock threshold {lock_thr:.3f}")
    if unlock_thr is not None:
        ax.axhline(unlock_thr, color="#b9770e", ls="--", lw=1.0, label=f"unlock threshold {unlock_thr:.3f}")
    ax.set_ylim(-0.3, 1.05)
    ax.set_ylabel("lock metric (1 = locked, 0 = noise)")
    ax.set_title(f"Lock metric per {result.settings.window}-sample window")
    ax.legend(loc="lower right", fontsize=8)
    ax.grid(alpha=0.3)

    ax = axes[2]
    _shade_locked(ax, result, fs)
    _mark_slips(ax, result, fs, label=False)
    if len(st):
        esn0 = np.clip(st[:, 2], -20.0, 60.0)
        ax.plot(ts, esn0, color="#a04000", lw=1.0, marker=".", ms=2, label="Es/N0 estimate (M2M4)")
    if truth is not None and len(ts):
        tt = np.linspace(0.0, result.num_samples / fs, 2000)
        ax.plot(tt, np.maximum(truth.esn0_db_at(tt), -20.0), color="black", lw=1.0, ls=":",
                label="true Es/N0 (scenario)")
    ax.set_ylabel("Es/N0 (dB)")
    ax.set_xlabel("time (s)")
    ax.set_title("Signal quality: M2M4 Es/N0 per window (values below -20 dB drawn at -20 dB)")
    ax.legend(loc="lower right", fontsize=8)
    ax.grid(alpha=0.3)
    save_figure(fig, path)
    plt.close(fig)


def plot_constellation(result, path, title=None):
    """Constellation before and after carrier recovery (locked samples only, when any)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    tr = result.traces
    s = tr["sample"]
    mask = np.zeros(len(s), bool)
    for iv in result.intervals:
        mask |= (s >= iv.start) & (s < iv.end)
    which = "locked samples" if mask.any() else "all samples (never locked)"
    if not mask.any():
        mask[:] = True
    idx = np.flatnonzero(mask)
    rng = np.random.default_rng(0)
    if len(idx) > SCATTER_POINTS:
        idx = np.sort(rng.choice(idx, SCATTER_POINTS, replace=False))
    fig, axes = plt.subplots(1, 2, figsize=(10, 5.2), constrained_layout=True)
    fig.suptitle(title or f"Constellation, {which}")
    for ax, key, name in ((axes[0], "before", "Before carrier recovery (loop input)"),
                          (axes[1], "after", "After carrier recovery (loop output)")):
        z = tr[key][idx]
        rms = np.sqrt(np.mean(np.abs(z) ** 2)) if len(z) else 1.0
        z = z / (rms if rms > 0 else 1.0)
        ax.scatter(z.real, z.imag, s=3, alpha=0.4, color="#1f4e79", label=f"{len(z)} samples")
        ax.set_xlim(-2, 2)
        ax.set_ylim(-2, 2)
        ax.set_aspect("equal")
        ax.axhline(0, color="grey", lw=0.5)
        ax.axvline(0, color="grey", lw=0.5)
        ax.set_xlabel("in-phase (normalised to unit RMS)")
        ax.set_ylabel("quadrature (normalised to unit RMS)")
        ax.set_title(name)
        ax.legend(loc="upper right", fontsize=8)
        ax.grid(alpha=0.3)
    save_figure(fig, path)
    plt.close(fig)


def write_report(result, folder, truth=None, extra=None, title=None):
    """Write the plots and ``summary.json`` into ``folder`` (created if needed).

    ``extra`` (dict) is merged into the summary at the top level. Returns the summary.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    plot_timeline(result, folder / "timeline.png", truth=truth, title=title)
    plot_constellation(result, folder / "constellation.png")
    summary = summarise(result)
    summary.update(_clean(extra or {}))
    summary["files"] = ["timeline.png", "constellation.png", "summary.json"]
    write_json(folder / "summary.json", summary)
    return summary


__all__ = ["PLOT_FORMATS", "PlotFormatError", "plot_format", "save_figure", "summarise", "write_json", "plot_timeline", "plot_constellation", "write_report"]
