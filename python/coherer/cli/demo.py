# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer demo``: synthesise the invented balloon downlink, write it as a SigMF
recording, run the same chain as ``coherer run`` on it, and judge the result
against the scenario's truth.

The verdict compares, with the tolerances stated beside each check:

* acquisition: the first lock is declared after the signal appears and within
  ``ACQUIRE_TOL_S``;
* the fade: an unlock during the fade and a new lock within ``RELOCK_TOL_S`` after it;
* carrier offset: mean NCO frequency vs mean true frequency over the clear-sky stretch;
* Es/N0: mean detector estimate vs truth over each steady stretch;
* phase-error RMS: the loop's reference phase against the true carrier phase (modulo
  2 pi/M) over each stretch, vs the loop designer's prediction: the linear-theory
  jitter ``B_L T V_M / M^2`` (coherer.design.phase_error_variance) combined with the
  steady-state error to the Doppler drift (LoopDesign.ramp_phase_error);
* cycle slips: the signed slips the loop declared around the frequency jump vs the
  slips it actually made (change of the true phase error in units of 2 pi/M).
"""

import sys
from math import degrees, pi
from pathlib import Path

import numpy as np

from . import UserError

DEFAULT_OUTPUT = "coherer-demo"
RECORDING_NAME = "balloon_downlink"

#: Tolerances of the verdict (see the module docstring).
ACQUIRE_TOL_S = 1.0        # wide acquisition: a few FFT blocks plus one detector window
RELOCK_TOL_S = 1.5
OFFSET_TOL_HZ = 1.0        # carrier offset within 1 Hz
ESN0_TOL_DB = 0.5          # Es/N0 within 0.5 dB
# Phase-error RMS: a stretch of T seconds holds about 2 B_L T independent loop-error
# samples, so the sample variance has relative standard error sqrt(1/(B_L T)), about
# 0.1 for 5 s at 20 Hz (0.05 on the RMS); 0.2 on the RMS is 4 standard errors, and the
# linear theory itself is within a few per cent at these loop SNRs (REFERENCES 4).
PHASE_RMS_REL_TOL = 0.2
SLIP_WINDOW_S = 3.0        # slips declared within this after the jump belong to it
TABLE_ROWS = 30            # events printed; all of them go to events.json


def register(subparsers):
    from .run import add_loop_options
    p = subparsers.add_parser(
        "demo", help="synthesise an invented balloon BPSK downlink, recover its carrier, judge the result",
        description="Synthesise an invented scenario (a small high-altitude balloon's BPSK telemetry "
                    "at 9600 symbols/s: crystal offset, Doppler drift, a deep fade, a low-SNR "
                    "stretch and an oscillator frequency jump), write it as a SigMF recording, run "
                    "the same chain as `coherer run`, print the events and a verdict against the "
                    "scenario's truth, and write the report.",
        epilog="Exit status: 0 ok (whatever the verdict), 2 bad arguments, 1 internal error.")
    p.add_argument("--output", default=DEFAULT_OUTPUT, metavar="DIR",
                   help=f"folder for the recording, events.json and the report (default ./{DEFAULT_OUTPUT})")
    p.add_argument("--seed", type=int, default=None, metavar="N",
                   help="noise and data seed (default: the scenario's fixed seed)")
    add_loop_options(p, power_required=False, noise_bw_default=20.0)
    p.set_defaults(func=main)
    return p


# --- verdict ----------------------------------------------------------------------------

def _in(samples, fs, start_s, end_s):
    return (samples >= start_s * fs) & (samples < end_s * fs)


def judge(result, sc):
    """The verdict: a list of checks, each a dict with name, measured, truth, tolerance,
    unit and ok (bool)."""
    from .. import design
    fs = sc.sample_rate
    m = result.settings.power
    tr = result.traces
    checks = []

    def add(name, measured, truth, tol, unit, ok, note=""):
        checks.append({"check": name, "measured": measured, "truth": truth, "tolerance": tol,
                       "unit": unit, "ok": bool(ok), "note": note})

    locks = [e for e in result.events if e["event"] == "lock"]
    unlocks = [e for e in result.events if e["event"] == "unlock"]
    first = locks[0]["time_s"] if locks else None
    add("first lock after the signal appears", first, sc.signal_on_s,
        f"0..+{ACQUIRE_TOL_S:g} s", "s",
        first is not None and 0.0 <= first - sc.signal_on_s <= ACQUIRE_TOL_S)

    fade0, fade1 = sc.fade_s
    lost = [e["time_s"] for e in unlocks if fade0 - 0.5 <= e["time_s"] <= fade1]
    back = [e["time_s"] for e in locks if fade1 - 0.5 <= e["time_s"] <= fade1 + RELOCK_TOL_S]
    add("unlock in the fade", lost[0] if lost else None, fade0, f"before {fade1:g} s", "s", bool(lost))
    add("lock again after the fade", back[0] if back else None, fade1,
        f"-0.5..+{RELOCK_TOL_S:g} s", "s", bool(back))

    phase_err = None
    if len(tr["sample"]):
        true_phase = sc.carrier_phase(tr["sample"])
        phase_err = np.angle(np.exp(1j * m * (true_phase - tr["phase"]))) / m    # modulo 2 pi/M
    for i, st in enumerate(sc.stretches()):
        sel = _in(tr["sample"], fs, st.start_s, st.end_s)
        if i == 0:
            f_meas = float(np.mean(tr["freq"][sel])) if sel.any() else None
            f_true = float(np.mean(sc.carrier_freq_hz(tr["sample"][sel] / fs))) if sel.any() else None
            add(f"carrier offset, {st.name}", f_meas, f_true, OFFSET_TOL_HZ, "Hz",
                f_meas is not None and abs(f_meas - f_true) <= OFFSET_TOL_HZ)
        rows = result.status[_in(result.status[:, 0], fs, st.start_s, st.end_s)] if len(result.status) else []
        esn0 = None
        if len(rows):
            esn0 = float(10.0 * np.log10(np.mean(10.0 ** (rows[:, 2] / 10.0))))
        add(f"Es/N0, {st.name}", esn0, st.esn0_db, ESN0_TOL_DB, "dB",
            esn0 is not None and abs(esn0 - st.esn0_db) <= ESN0_TOL_DB)
        rms = float(np.sqrt(np.mean(phase_err[sel] ** 2))) if phase_err is not None and sel.any() else None
        jitter = result.predicted_phase_rms_rad(st.esn0_db)   # the designer, for this signal
        ramp = result.loop_design.ramp_phase_error(sc.drift_hz_per_s)
        predicted = np.hypot(jitter, ramp)
        note = f"jitter {degrees(jitter):.2f} deg (+) drift error {degrees(abs(ramp)):.2f} deg"
        if esn0 is not None:
            note += (f"; jitter at the measured Es/N0 "
                     f"{degrees(result.predicted_phase_rms_rad(esn0)):.2f} deg")
        add(f"phase-error RMS, {st.name}", None if rms is None else degrees(rms), degrees(predicted),
            f"+-{PHASE_RMS_REL_TOL:.0%}", "deg",
            rms is not None and abs(rms / predicted - 1.0) <= PHASE_RMS_REL_TOL, note)

    # slips around the oscillator jump: declared vs actually made
    declared = sum(e["slips"] for e in result.events if e["event"] == "cycle_slip"
                   and sc.jump_s <= e["time_s"] < sc.jump_s + SLIP_WINDOW_S)
    actual = None
    if len(tr["sample"]):
        unwrapped = np.unwrap(m * (sc.carrier_phase(tr["sample"]) - tr["phase"])) / (2.0 * pi)
        s = tr["sample"] / fs
        before = _in(tr["sample"], fs, sc.jump_s - 1.0, sc.jump_s - 0.1)
        after = _in(tr["sample"], fs, sc.jump_s + SLIP_WINDOW_S - 0.5, sc.jump_s + SLIP_WINDOW_S)
        if before.any() and after.any() and s[-1] >= sc.jump_s + SLIP_WINDOW_S - 0.5:
            # carrier minus NCO grew by k cycles of 2 pi/M: the NCO fell k slips behind (-k)
            actual = -int(np.round(np.median(unwrapped[after]) - np.median(unwrapped[before])))
    lost = [e["time_s"] for e in result.events if e["event"] == "unlock"
            and sc.jump_s <= e["time_s"] < sc.jump_s + SLIP_WINDOW_S]
    note = (f"the lock detector reported unlock at {lost[0]:.2f} s; the loop counts slips through "
            "an unlock while its detector phasor stays coherent"
            if lost else "")
    add(f"cycle slips at the {sc.jump_hz:+.0f} Hz jump", declared, actual, "exact", "x 2pi/M",
        actual is not None and declared == actual, note)
    others = sum(1 for e in result.events if e["event"] == "cycle_slip"
                 and not sc.jump_s <= e["time_s"] < sc.jump_s + SLIP_WINDOW_S)
    add("cycle-slip events elsewhere", others, 0, "exact", "", others == 0)
    return checks


def verdict_table(checks):
    """The verdict as aligned text."""
    def fmt(v):
        if v is None:
            return "-"
        if isinstance(v, float):
            return f"{v:.2f}" if abs(v) < 1e5 else f"{v:.0f}"
        return str(v)
    rows = [("check", "measured", "truth/predicted", "tolerance", "ok")]
    for c in checks:
        unit = f" {c['unit']}" if c["unit"] else ""
        tol = c["tolerance"] if isinstance(c["tolerance"], str) else f"+-{fmt(c['tolerance'])}"
        rows.append((c["check"], fmt(c["measured"]) + unit, fmt(c["truth"]) + unit, tol,
                     "yes" if c["ok"] else "NO"))
    widths = [max(len(r[i]) for r in rows) for i in range(5)]
    lines = ["  ".join(x.ljust(w) if i == 0 else x.rjust(w) for i, (x, w) in enumerate(zip(r, widths)))
             for r in rows]
    notes = [f"  {c['check']}: {c['note']}" for c in checks if c["note"]]
    return "\n".join(lines + notes)


# --- the sub-command --------------------------------------------------------------------------

def main(args):
    from dataclasses import replace

    from .. import report
    from ..recording import open_recording, write_sigmf
    from ..scenario import BalloonScenario
    from .console import clean_stdout
    from .run import check_settings, process, settings_from_args

    sc = BalloonScenario() if args.seed is None else replace(BalloonScenario(), seed=args.seed)
    settings = settings_from_args(args)
    check_settings(settings, sc.sample_rate, sc.num_samples)
    out_dir = Path(args.output)
    if out_dir.exists() and not out_dir.is_dir():
        raise UserError(f"--output {out_dir} exists and is not a folder")
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UserError(f"--output {out_dir}: cannot create ({exc.strerror})") from None

    from .._warmup import COMMAND_GROUPS, prepare
    prepare(COMMAND_GROUPS["demo"])         # a cold kernel cache: one note, compile now
    meta = write_sigmf(out_dir / RECORDING_NAME, sc.synthesise(), sc.sample_rate, "cf32_le",
                       sc.center_freq_hz, sc.description(),
                       {"core:author": "gr-coherer demo (invented data)"})
    rec = open_recording(meta)

    with clean_stdout() as out:
        out.write(f"coherer demo: invented balloon BPSK downlink, {sc.duration_s:.0f} s at "
                  f"{sc.sample_rate:.0f} samples/s, written to {meta}\n")
        out.write(f"loop: M = {settings.power}, B_L = {settings.noise_bw_hz:g} Hz, "
                  f"damping {settings.damping:g}, order {settings.loop_order}\n\n")
        result = process(rec, settings, out, out_dir / "events.json", table_limit=TABLE_ROWS)
        checks = judge(result, sc)
        out.write("\nverdict against the scenario's truth\n" + verdict_table(checks) + "\n")
        report.write_report(result, out_dir / "report", truth=sc,
                            extra={"demo": {"scenario": sc.description(), "checks": checks}},
                            title="coherer demo: invented balloon BPSK downlink")
        passed = sum(c["ok"] for c in checks)
        out.write(f"\n{passed} of {len(checks)} checks passed; events in {out_dir / 'events.json'}, "
                  f"plots and summary.json in {out_dir / 'report'}\n")
    if passed < len(checks):
        print(f"coherer: note: {len(checks) - passed} verdict check(s) outside tolerance", file=sys.stderr)
    return 0
