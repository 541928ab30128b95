# SPDX-License-Identifier: GPL-3.0-or-later
"""``coherer design``: loop gains and performance predictions for a loop specification.

Every number comes from :mod:`coherer.design`, the module the blocks use; this
module only parses arguments, collects the figures, prints or plots them and
raises :class:`~coherer.cli.UserError` for bad arguments. The signal the loop sees
(samples per symbol, RRC roll-off and placement, a residual carrier's modulation
index) enters the jitter, slip and acquisition figures through the keyword
arguments of :func:`coherer.design.detector_noise`.
"""

import json
import math

from .. import design
from . import UserError
from .errors import si_number      # 250k, 2.4M, ...

#: Slips expected more often than once per this many seconds get a warning.
SLIP_WARNING_S = 60.0
#: B_L T above which the continuous-time theory behind the acquisition and slip predictions
#: departs from the discrete loop (the textbook gains are 4.5 % off at 0.05, REFERENCES 1.2).
LARGE_BT = 0.05
#: Acquisition expected to take more than this many blocks gets a warning.
SLOW_ACQUISITION_BLOCKS = 3.0
#: Default pull-in time budget, seconds.
DEFAULT_PULL_IN_BUDGET_S = 1.0

# command-line option for each validate_spec argument, to name the option in error messages
_OPTION_OF = {"sample_rate": "--sample-rate", "power": "--power", "noise_bw_hz": "--noise-bw",
              "damping": "--damping", "loop_order": "--loop-order", "samples_per_symbol": "--samples-per-symbol",
              "rolloff": "--rolloff", "placement": "--placement", "modulation_index": "--modulation-index",
              "block": "--update-block"}


def register(subparsers):
    """Add the ``design`` sub-command."""
    p = subparsers.add_parser(
        "design", help="loop gains and predictions (jitter, slips, pull-in, ramp error)",
        description="Design an M-th power carrier loop and predict its behaviour. All frequencies "
                    "in Hz; the loop updates once per sample, so the sample rate is the symbol rate "
                    "times --samples-per-symbol; --esn0 is Es/N0 per symbol.")
    p.add_argument("--sample-rate", type=si_number, required=True, metavar="HZ",
                   help="loop update rate, samples/s")
    p.add_argument("--power", type=int, required=True, metavar="M",
                   help=f"symmetry order M: 1 pilot/PLL, 2 BPSK, 4 QPSK, 8 8PSK (1..{design.MAX_POWER})")
    p.add_argument("--noise-bw", type=si_number, metavar="HZ",
                   help=f"one-sided loop noise bandwidth B_L, Hz (at most {design.MAX_BT} x sample rate); "
                        "required unless --suggest")
    p.add_argument("--damping", type=float, default=0.707, metavar="Z",
                   help=f"damping factor zeta, orders 2 and 3 (0 < Z <= {design.MAX_DAMPING}; default 0.707)")
    p.add_argument("--loop-order", type=int, default=2, metavar="N", help="loop order 1, 2 or 3 (default 2)")
    p.add_argument("--update-block", type=int, metavar="L",
                   help="samples per loop update, a power of two up to 64 (default: what the blocks use, "
                        "the longest with B_L L T <= 1/32; 1 updates every sample)")
    p.add_argument("--esn0", type=float, metavar="DB",
                   help="Es/N0 per symbol, dB: enables jitter, slip and acquisition-time predictions")
    p.add_argument("--samples-per-symbol", type=int, default=1, metavar="N",
                   help=f"samples per symbol of a root-raised-cosine shaped signal, 1..{design.MAX_SAMPLES_PER_SYMBOL} "
                        "(default 1: one unshaped sample per symbol)")
    p.add_argument("--rolloff", type=float, default=0.35, metavar="R",
                   help="roll-off of the root-raised-cosine pulse, 0..1 (default 0.35)")
    p.add_argument("--placement", choices=design.PLACEMENTS, default=design.PLACEMENT_CHANNEL,
                   help="where the loop sits: 'channel' (before the matched filter, noise band-limited to the "
                        "signal's band; default) or 'matched' (after the matched filter)")
    p.add_argument("--modulation-index", type=float, metavar="RAD",
                   help=f"residual carrier (--power 1 only): phase-modulation index of bi-phase data, "
                        f"0..{design.MAX_MODULATION_INDEX} rad; the carrier keeps cos^2 of the power")
    p.add_argument("--offset", type=si_number, metavar="HZ",
                   help="carrier frequency offset to acquire, Hz: acquisition time with the blocks' spectral "
                        "aid (their default) and natural pull-in without it")
    p.add_argument("--freq-step", type=si_number, metavar="HZ",
                   help="sudden carrier frequency step while locked, Hz: whether the loop follows it, peak "
                        "phase error, and the natural pull-in beyond the pull-out limit")
    p.add_argument("--pull-in-budget", type=float, default=DEFAULT_PULL_IN_BUDGET_S, metavar="S",
                   help="pull-in time the loop may take on its own before an acquisition aid is "
                        f"called for, s (default {DEFAULT_PULL_IN_BUDGET_S:g})")
    p.add_argument("--doppler-rate", type=si_number, metavar="HZ_PER_S",
                   help="carrier frequency ramp, Hz/s: enables the steady-state ramp error")
    p.add_argument("--plot", metavar="FILE",
                   help="write phase-step, frequency-step and closed-loop magnitude plots to this file "
                        "(.png, .pdf or .svg)")
    p.add_argument("--json", action="store_true", help="print machine-readable JSON instead of text")
    p.add_argument("--suggest", action="store_true",
                   help="choose B_L minimising jitter variance plus squared ramp error "
                        "(needs --esn0 and --doppler-rate, loop order 2)")
    p.set_defaults(func=run)


def _check_finite(name, value, positive=False):
    if value is not None and (not math.isfinite(value) or (positive and value <= 0.0)):
        rule = "a positive number" if positive else "a finite number"
        raise UserError(f"{name} must be {rule}, got {value!r}")


def _option_error(exc):
    """The ValueError of a design function as a UserError naming the command-line option."""
    message = str(exc)
    first = message.split(" ", 1)[0]
    return UserError(_OPTION_OF.get(first, first) + message[len(first):])


def _design_or_user_error(args, noise_bw):
    try:
        return design.design_loop(args.sample_rate, args.power, noise_bw, args.damping, args.loop_order,
                                  block=args.update_block)
    except ValueError as exc:
        raise _option_error(exc) from None


def signal_model(args):
    """The keyword arguments of :func:`coherer.design.detector_noise` for the parsed arguments."""
    return dict(samples_per_symbol=args.samples_per_symbol, rolloff=args.rolloff, placement=args.placement,
                modulation_index=args.modulation_index)


def _validate(args):
    _check_finite("--esn0", args.esn0)
    _check_finite("--offset", args.offset)
    _check_finite("--doppler-rate", args.doppler_rate)
    _check_finite("--pull-in-budget", args.pull_in_budget, positive=True)
    _check_finite("--freq-step", args.freq_step)
    _check_finite("--rolloff", args.rolloff)
    _check_finite("--modulation-index", args.modulation_index)
    if args.suggest:
        if args.esn0 is None or not args.doppler_rate:
            raise UserError("--suggest needs --esn0 and a non-zero --doppler-rate")
        if args.loop_order != 2:
            raise UserError(f"--suggest needs --loop-order 2 (order 1 cannot track a ramp, order 3 has no "
                            f"ramp error), got {args.loop_order}")
    elif args.noise_bw is None:
        raise UserError("--noise-bw is required (or use --suggest)")
    # the specification itself, with the bandwidth checked only when it is given
    probe_bw = args.noise_bw if args.noise_bw is not None else design.MAX_BT * abs(args.sample_rate or 1.0)
    _design_or_user_error(args, probe_bw)
    try:
        design.validate_signal(args.power, **signal_model(args))
    except ValueError as exc:
        raise _option_error(exc) from None


def predictions(args):
    """All figures for the parsed arguments, as a dict of plain numbers (SI units, rad)."""
    _validate(args)
    esn0 = design.db_to_linear(args.esn0) if args.esn0 is not None else None
    model = signal_model(args)
    result = {}
    noise_bw = args.noise_bw
    if args.suggest:
        noise_bw = design.suggest_noise_bw(args.sample_rate, args.power, esn0, args.doppler_rate,
                                           args.damping, args.loop_order, **model)
        result["suggested_noise_bw_hz"] = noise_bw
        if args.noise_bw is not None:
            given = _design_or_user_error(args, args.noise_bw)
            result["requested_noise_bw_hz"] = args.noise_bw
            result["requested_total_phase_error_rms_rad"] = math.sqrt(
                design.total_phase_error_variance(given, esn0, args.doppler_rate, **model))
    d = _design_or_user_error(args, noise_bw)
    steps = design.step_responses(d)
    g_gains = design.padded_gains(d.g_gains)
    result.update({
        "sample_rate_hz": d.sample_rate, "power": d.power, "loop_order": d.loop_order, "damping": d.damping,
        "noise_bw_hz": d.noise_bw_hz, "bt": d.bt,
        "actual_noise_bw_hz": d.actual_bt * d.sample_rate, "actual_bt": d.actual_bt,
        "design_bt": d.design_bt, "update_block": d.block,
        "k1": d.k1, "k2": d.k2, "k3": d.k3, "g_k1": g_gains[0], "g_k2": g_gains[1], "g_k3": g_gains[2],
        "natural_frequency_rad_s": d.natural_frequency,
        "natural_frequency_hz": d.natural_frequency / (2.0 * math.pi),
        "lock_in_range_hz": design.lock_in_range_hz(d), "pull_out_hz": design.pull_out_hz(d),
        "unambiguous_range_hz": design.unambiguous_range_hz(d.sample_rate, d.power),
        "closed_loop_peaking_db": design.closed_loop_peaking_db(d),
        "closed_loop_3db_hz": design.closed_loop_3db_hz(d),
        "phase_step_rise_time_s": steps.phase_metrics.rise_time_s,
        "phase_step_overshoot_pct": steps.phase_metrics.overshoot_pct,
        "phase_step_settling_time_s": steps.phase_metrics.settling_time_s,
        "freq_step_nco_rise_time_s": steps.freq_metrics.rise_time_s,
        "freq_step_nco_overshoot_pct": steps.freq_metrics.overshoot_pct,
        "freq_step_nco_settling_time_s": steps.freq_metrics.settling_time_s,
        "freq_step_peak_error_rad_per_hz": steps.peak_error_rad_per_hz,
        "freq_step_peak_error_time_s": steps.peak_error_time_s,
        "freq_step_final_error_rad_per_hz": steps.error_final_rad_per_hz,
        "freq_step_error_settling_time_s": steps.error_settling_time_s,
        "max_doppler_rate_hz_per_s": design.max_trackable_ramp_hz_per_s(d),
        "samples_per_symbol": args.samples_per_symbol, "symbol_rate_hz": d.sample_rate / args.samples_per_symbol,
        "rolloff": args.rolloff if args.samples_per_symbol > 1 and args.modulation_index is None else None,
        "placement": args.placement if args.samples_per_symbol > 1 and args.modulation_index is None else None,
        "modulation_index_rad": args.modulation_index,
    })
    if args.modulation_index is not None:
        result["carrier_share_db"] = 20.0 * math.log10(math.cos(args.modulation_index))
    if esn0 is not None:
        variance = design.phase_error_variance(d.power, esn0, d.actual_bt, **model)
        noise = design.detector_noise(d.power, esn0, **model)
        result.update({
            "esn0_db": args.esn0,
            "squaring_loss_db": 10.0 * math.log10(design.squaring_loss(d.power, esn0, **model)),
            "detector_noise_density": noise.density, "detector_self_noise_density": noise.self_noise,
            "loop_snr_db": 10.0 * math.log10(design.loop_snr(d.power, esn0, d.actual_bt, **model)),
            "phase_error_rms_rad": math.sqrt(variance),
            "phase_error_rms_tikhonov_rad": math.sqrt(
                design.nonlinear_phase_error_variance(d.power, esn0, d.actual_bt, **model)),
            "mean_time_between_slips_s": design.mean_time_between_slips_s(d, esn0, **model),
        })
    if args.offset is not None:
        acq = design.assess_acquisition(d, args.offset, args.pull_in_budget)
        aided = design.spectral_acquisition(d, args.offset, esn0, **model)
        result.update({
            "offset_hz": args.offset,
            "acquisition_time_s": aided.time_to_lock_s, "acquisition_fft_length": aided.fft_length,
            "acquisition_block_s": aided.block_s, "acquisition_detect_probability": aided.detect_probability,
            "acquisition_expected_blocks": aided.expected_blocks,
            "pull_in_time_s": acq.pull_in_s, "pull_in_time_rice_s": acq.pull_in_rice_s,
            "lock_time_s": acq.lock_time_s, "pull_in_budget_s": acq.budget_s,
            "acquisition_needed": acq.needed, "acquisition_reason": acq.reason,
            "offset_phase_error_rad": d.frequency_step_error(args.offset),
        })
    if args.freq_step is not None:
        step = design.frequency_step(d, args.freq_step, steps)
        reacquire = design.spectral_acquisition(d, 0.0, esn0, **model)
        result.update({
            "freq_step_hz": args.freq_step, "freq_step_followed": step.followed,
            "freq_step_reacquisition_time_s": reacquire.time_to_lock_s,
            "freq_step_peak_phase_error_rad": step.peak_error_rad,
            "freq_step_pull_in_time_s": step.pull_in_s, "freq_step_lock_time_s": step.lock_time_s,
        })
    if args.doppler_rate is not None:
        result["doppler_rate_hz_per_s"] = args.doppler_rate
        result["ramp_phase_error_rad"] = d.ramp_phase_error(args.doppler_rate)
        if esn0 is not None:
            result["total_phase_error_rms_rad"] = math.sqrt(
                design.total_phase_error_variance(d, esn0, args.doppler_rate, **model))
    result["warnings"] = warnings_for(d, result)
    return d, steps, result


def warnings_for(d, r):
    """One sentence per unsafe choice found in the figures ``r`` of design ``d``."""
    out = []
    if d.actual_bt > LARGE_BT:
        out.append(f"B_L T = {d.actual_bt:.3g} is above {LARGE_BT}: the gains are exact for the discrete loop, "
                   "but the lock-in, pull-in and slip predictions come from continuous-time theory and "
                   "grow unreliable")
    slip = r.get("mean_time_between_slips_s")
    if slip is not None and slip < SLIP_WARNING_S:
        out.append(f"cycle slips expected about every {_fmt_time(slip)}, more often than once a minute: "
                   "narrow the loop or raise the SNR")
    rate = r.get("doppler_rate_hz_per_s")
    if rate:
        limit = r["max_doppler_rate_hz_per_s"]
        if d.loop_order == 1:
            out.append(f"Doppler rate {abs(rate):g} Hz/s: a first-order loop cannot track a frequency ramp "
                       "(its phase error grows without bound): use loop order 2 or 3")
        elif abs(rate) > limit:
            out.append(f"Doppler rate {abs(rate):g} Hz/s is beyond what this loop tracks ({limit:.4g} Hz/s keeps "
                       "M x ramp error below pi/2): widen the loop or use loop order 3")
    offset = r.get("offset_hz")
    if offset is not None:
        if abs(offset) > r["unambiguous_range_hz"]:
            out.append(f"offset {abs(offset):g} Hz is beyond the unambiguous range fs/(2M) = "
                       f"{r['unambiguous_range_hz']:.6g} Hz: the loop would lock to an alias")
        elif r["acquisition_needed"]:
            out.append(f"offset {abs(offset):g} Hz: {r['acquisition_reason']}; keep frequency acquisition on "
                       "(acquire=True, the blocks' default)")
        blocks = r.get("acquisition_expected_blocks")
        if blocks is not None and abs(offset) <= r["unambiguous_range_hz"] and blocks > SLOW_ACQUISITION_BLOCKS:
            out.append(f"the z^M line is weak at this Es/N0: each acquisition block finds it with probability "
                       f"{r['acquisition_detect_probability']:.2g}, so acquisition takes about {blocks:.3g} blocks")
    if r.get("freq_step_followed") is False:
        out.append(f"frequency step {abs(r['freq_step_hz']):g} Hz is beyond the pull-out limit "
                   f"{r['pull_out_hz']:.4g} Hz: the loop slips cycles and pulls in by itself "
                   "(the spectral aid only acts once the lock indicator says unlocked)")
    return out


# --- text output ------------------------------------------------------------------------

def _fmt_time(seconds):
    if seconds is None or math.isnan(seconds):
        return "n/a (not within the simulated window)"
    if math.isinf(seconds):
        return "never"
    if seconds == 0.0:
        return "0 s"
    if seconds >= 1e6 * 86400.0 * 365.0:
        return "more than a million years"
    if seconds >= 86400.0 * 365.0:
        return f"{seconds / (86400.0 * 365.0):.3g} years"
    if seconds >= 3600.0:
        return f"{seconds / 3600.0:.3g} h"
    if seconds >= 1.0:
        return f"{seconds:.4g} s"
    if seconds >= 1e-3:
        return f"{seconds * 1e3:.4g} ms"
    return f"{seconds * 1e6:.4g} us"


def _inf(x):
    """JSON-bound figures keep inf; text shows it as 'never'."""
    return math.inf if x is None else x


def _per_symbol(n):
    return "1 sample per symbol" if n == 1 else f"{n} samples per symbol"


def _signal_text(r):
    symbol_rate = f"{r['symbol_rate_hz']:g} symbols/s"
    if r["modulation_index_rad"] is not None:
        return (f"residual carrier, bi-phase data at index {r['modulation_index_rad']:g} rad (carrier share "
                f"{r['carrier_share_db']:.2f} dB), {_per_symbol(r['samples_per_symbol'])}, white noise")
    if r["samples_per_symbol"] == 1:
        return f"one sample per symbol ({symbol_rate}), white noise"
    where = {"channel": "before the matched filter (band-limited noise)",
             "matched": "after the matched filter"}[r["placement"]]
    return (f"RRC roll-off {r['rolloff']:g} at {r['samples_per_symbol']} samples per symbol ({symbol_rate}), "
            f"{where}")


def _rad(x):
    if math.isinf(x):
        return "unbounded"
    return f"{x:.4g} rad ({math.degrees(x):.3g} deg)"


def format_text(r):
    """The human-readable report."""
    order = r["loop_order"]
    lines = [f"loop: order {order}, M = {r['power']}, sample rate {r['sample_rate_hz']:g} samples/s"
             + (f", damping {r['damping']:g}" if order > 1 else "")]
    row = lines.append
    row("  signal                               " + _signal_text(r))
    if "suggested_noise_bw_hz" in r:
        row(f"  suggested noise bandwidth B_L        {r['suggested_noise_bw_hz']:.6g} Hz "
            "(minimises jitter variance + squared ramp error)")
        if "requested_noise_bw_hz" in r:
            row(f"  (at --noise-bw {r['requested_noise_bw_hz']:g} Hz total phase error would be "
                f"{_rad(r['requested_total_phase_error_rms_rad'])} rms)")
    row(f"  requested noise bandwidth B_L        {r['noise_bw_hz']:.6g} Hz (B_L T = {r['bt']:.4g})")
    row(f"  actual noise bandwidth (discrete)    {r['actual_noise_bw_hz']:.6g} Hz (B_L T = {r['actual_bt']:.4g})")
    every = "every sample" if r["update_block"] == 1 else f"once per {r['update_block']} samples"
    row(f"  loop filter updated                  {every}")
    gains = f"K1 = {r['k1']:.6g}" + (f", K2 = {r['k2']:.6g}" if order > 1 else "") \
        + (f", K3 = {r['k3']:.6g}" if order > 2 else "")
    row(f"  gains per unit detector gain         {gains}  (loop gain g = M)")
    wn_name = {1: "loop gain K", 2: "natural frequency wn", 3: "natural frequency w0"}[order]
    row(f"  {wn_name:<37}{r['natural_frequency_rad_s']:.6g} rad/s ({r['natural_frequency_hz']:.4g} Hz)")
    lock_in_note = "" if order == 1 else " (engineering estimate 2 zeta wn / M)"
    row(f"  lock-in range                        +/-{r['lock_in_range_hz']:.4g} Hz{lock_in_note}")
    row(f"  pull-out frequency step              {r['pull_out_hz']:.4g} Hz")
    row(f"  unambiguous range fs/(2M)            +/-{r['unambiguous_range_hz']:.6g} Hz")
    row(f"  phase step: rise (10-90 %)           {_fmt_time(r['phase_step_rise_time_s'])}, overshoot "
        f"{r['phase_step_overshoot_pct']:.3g} %, settling (2 %) {_fmt_time(r['phase_step_settling_time_s'])}")
    row(f"  frequency step: NCO rise (10-90 %)   {_fmt_time(r['freq_step_nco_rise_time_s'])}, overshoot "
        f"{r['freq_step_nco_overshoot_pct']:.3g} %, settling (2 %) {_fmt_time(r['freq_step_nco_settling_time_s'])}")
    row(f"  frequency step: peak phase error     {r['freq_step_peak_error_rad_per_hz']:.4g} rad per Hz of step "
        f"at {_fmt_time(r['freq_step_peak_error_time_s'])}, settles in "
        f"{_fmt_time(r['freq_step_error_settling_time_s'])}")
    row(f"  closed-loop peaking                  {r['closed_loop_peaking_db']:.3g} dB, -3 dB at "
        f"{r['closed_loop_3db_hz']:.4g} Hz")
    if "esn0_db" in r:
        row(f"at Es/N0 {r['esn0_db']:g} dB per symbol:")
        loss_name = "squaring loss" if r["samples_per_symbol"] == 1 and r["modulation_index_rad"] is None \
            else "effective squaring loss"
        row(f"  {loss_name:<37}{r['squaring_loss_db']:.3f} dB")
        if r["samples_per_symbol"] > 1 and r["modulation_index_rad"] is None and r["power"] > 1:
            share = r["detector_self_noise_density"] / r["detector_noise_density"]
            row(f"  pulse self-noise (pattern jitter)    {100.0 * share:.3g} % of the detector noise")
        row(f"  loop SNR (M phi domain)              {r['loop_snr_db']:.3f} dB")
        row(f"  phase-error RMS (linear theory)      {_rad(r['phase_error_rms_rad'])}")
        row(f"  phase-error RMS (Tikhonov model)     {_rad(r['phase_error_rms_tikhonov_rad'])}")
        note = " (Viterbi, first order)" if order == 1 else " (Viterbi, -1 dB empirical correction)"
        slip = min(r["mean_time_between_slips_s"], 1e300)      # inf: beyond float range, not "never slips"
        row(f"  mean time between cycle slips        {_fmt_time(slip)}{note}")
    if "offset_hz" in r:
        row(f"for a carrier offset of {r['offset_hz']:g} Hz:")
        blocks = r["acquisition_expected_blocks"]
        detail = (f"{blocks:.3g} x {r['acquisition_fft_length']}-sample blocks + 1.3/B_L + 2 lock windows"
                  if blocks is not None else "the z^M line never stands out of the noise")
        row(f"  time to lock with acquisition on     {_fmt_time(_inf(r['acquisition_time_s']))} ({detail}; "
            "acquire=True, the blocks' default)")
        rice = f"  [Rice's rule: {_fmt_time(r['pull_in_time_rice_s'])}]" if order > 1 else ""
        if order > 1:
            row(f"  without acquisition: pull-in time    {_fmt_time(r['pull_in_time_s'])} (Gardner){rice}")
        else:
            row(f"  without acquisition: pull-in time    {_fmt_time(r['pull_in_time_s'])} "
                "(a first-order loop locks within its hold range or never)")
        row(f"  without acquisition: time to lock    {_fmt_time(r['lock_time_s'])} (+ 1.3/B_L settling)")
        verdict = "needed" if r["acquisition_needed"] else "not needed"
        row(f"  frequency acquisition aid            {verdict}: {r['acquisition_reason']}")
        if order == 1 and not math.isinf(r["pull_in_time_s"]):
            row(f"  steady phase error from the offset   {_rad(r['offset_phase_error_rad'])}")
    if "freq_step_hz" in r:
        row(f"for a frequency step of {r['freq_step_hz']:g} Hz while locked (the loop alone):")
        if r["freq_step_followed"]:
            row(f"  followed without a slip              peak phase error "
                f"{_rad(r['freq_step_peak_phase_error_rad'])}, settles in {_fmt_time(r['freq_step_lock_time_s'])}")
        else:
            row(f"  beyond the pull-out limit            slips cycles; natural pull-in "
                f"{_fmt_time(r['freq_step_pull_in_time_s'])}, locked again after "
                f"{_fmt_time(r['freq_step_lock_time_s'])}")
            row(f"  if the lock indicator drops meanwhile the spectral aid re-acquires in about "
                f"{_fmt_time(_inf(r['freq_step_reacquisition_time_s']))}")
    if "doppler_rate_hz_per_s" in r:
        row(f"for a Doppler rate of {r['doppler_rate_hz_per_s']:g} Hz/s:")
        row(f"  steady-state phase error             {_rad(abs(r['ramp_phase_error_rad']))}")
        limit = r["max_doppler_rate_hz_per_s"]
        limit_text = {math.inf: "unlimited (a 3rd-order loop has no ramp error)",
                      0.0: "none (a 1st-order loop cannot track a ramp)"}.get(limit, f"{limit:.4g} Hz/s")
        row(f"  largest trackable rate               {limit_text}")
        if "total_phase_error_rms_rad" in r:
            row(f"  total phase error (jitter + ramp)    {_rad(r['total_phase_error_rms_rad'])} rms")
    for w in r["warnings"]:
        row(f"warning: {w}")
    return "\n".join(lines)


def _json_safe(value):
    """JSON has no inf/nan: they become null (inf means never/unbounded, nan not determined)."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, list):
        return [_json_safe(v) for v in value]
    return value


# --- plot -------------------------------------------------------------------------------

def write_plot(path, d, steps, r):
    """Phase-step, frequency-step and closed-loop magnitude plots of design ``d`` to a file in
    the format its extension names (PNG, PDF, SVG)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    from ..report import save_figure

    def window(settling_s):
        """Samples of the returned grid up to 1.5 x the settling time (10 / B_L if not settled), and units."""
        t_end = 1.5 * (settling_s if math.isfinite(settling_s) else 10.0 / r["actual_noise_bw_hz"])
        keep = steps.time_s <= t_end
        keep[:2] = True
        scale, unit = (1e3, "ms") if t_end < 2.0 else (1.0, "s")
        return keep, steps.time_s[keep] * scale, unit

    title = (f"order {d.loop_order}, M = {d.power}, B_L = {r['actual_noise_bw_hz']:.4g} Hz, "
             f"fs = {d.sample_rate:g} samples/s" + (f", damping {d.damping:g}" if d.loop_order > 1 else ""))
    fig, axes = plt.subplots(2, 2, figsize=(12, 8))
    fig.suptitle(f"coherer design: {title}")

    keep, t, unit = window(r["phase_step_settling_time_s"])
    ax = axes[0, 0]
    ax.plot(t, steps.phase_step[keep], label="phase estimate / step")
    ax.axhline(1.0, color="k", lw=0.8, ls=":", label="step")
    ax.axhspan(1 - design.SETTLING_BAND, 1 + design.SETTLING_BAND, color="g", alpha=0.15, label="2 % band")
    ax.set(title=f"Phase step: overshoot {r['phase_step_overshoot_pct']:.3g} %, "
                 f"settling {_fmt_time(r['phase_step_settling_time_s'])}",
           xlabel=f"time ({unit})", ylabel="phase estimate / phase step")
    ax.legend(loc="lower right")

    keep, t, unit = window(r["freq_step_nco_settling_time_s"])
    ax = axes[0, 1]
    ax.plot(t, steps.freq_step_nco[keep], label="NCO frequency / step")
    ax.axhline(1.0, color="k", lw=0.8, ls=":", label="step")
    ax.set(title=f"Frequency step: NCO settling {_fmt_time(r['freq_step_nco_settling_time_s'])}",
           xlabel=f"time ({unit})", ylabel="NCO frequency / frequency step")
    ax.legend(loc="lower right")

    keep, t, unit = window(r["freq_step_error_settling_time_s"])
    ax = axes[1, 0]
    offset = r.get("offset_hz")
    if offset:
        err = np.degrees(steps.freq_step_error[keep] * offset)
        label, ylabel = f"phase error, {offset:g} Hz step", "phase error (deg)"
    else:
        err = np.degrees(steps.freq_step_error[keep])
        label, ylabel = "phase error per Hz of step", "phase error (deg per Hz)"
    peak_deg = math.degrees(r["freq_step_peak_error_rad_per_hz"] * (offset or 1.0))
    panel_title = f"Frequency step: phase error (linear loop), peak {peak_deg:.3g} deg"
    if offset and d.power * peak_deg > 90.0:
        panel_title += f"\nM x peak = {d.power * peak_deg:.3g} deg > 90 deg: the real loop slips cycles"
    ax.plot(t, err, color="C3", label=label)
    ax.axhline(0.0, color="k", lw=0.8)
    ax.set(title=panel_title, xlabel=f"time ({unit})", ylabel=ylabel)
    ax.legend(loc="upper right")

    ax = axes[1, 1]
    freqs = np.geomspace(r["actual_noise_bw_hz"] / 100.0, d.sample_rate / 2.0, 1000)
    ax.semilogx(freqs, design.closed_loop_magnitude_db(d, freqs), label="|H(f)| closed loop")
    ax.axvline(r["actual_noise_bw_hz"], color="C2", ls="--", label=f"B_L = {r['actual_noise_bw_hz']:.4g} Hz")
    ax.axhline(-3.0, color="k", lw=0.8, ls=":", label="-3 dB")
    ax.set(title=f"Closed-loop magnitude: peaking {r['closed_loop_peaking_db']:.2g} dB",
           xlabel="frequency (Hz)", ylabel="gain (dB)", ylim=(-40, max(6.0, r["closed_loop_peaking_db"] + 2)))
    ax.legend(loc="lower left")

    for ax in axes.flat:
        ax.grid(True, which="both", alpha=0.3)
    fig.tight_layout()
    try:
        save_figure(fig, path)
    except OSError as exc:
        raise UserError(f"--plot: cannot write {path}: {exc.strerror or exc}") from None
    finally:
        plt.close(fig)


def run(args):
    """Entry point of ``coherer design``."""
    d, steps, result = predictions(args)
    if args.plot:
        write_plot(args.plot, d, steps, result)
    if args.json:
        print(json.dumps({k: _json_safe(v) for k, v in result.items()}, indent=2, allow_nan=False))
    else:
        print(format_text(result))
    return 0
