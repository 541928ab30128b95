# SPDX-License-Identifier: GPL-3.0-or-later
"""Linear-theory jitter of the loop: squaring loss and phase-error variance (rad^2) at a
linear Es/N0 and B_L T."""

from ._detector import _is_unshaped, detector_noise, detector_noise_density, mth_power_noise


def squaring_loss(power, esn0, *, samples_per_symbol=1, rolloff=0.35, placement="channel",
                  modulation_index=None):
    """Squaring loss ``S_L = M^2 s2 / V_M`` (linear, <= 1) at linear Es/N0 ``esn0``.

    With a signal model (see :func:`detector_noise`) other than the unshaped default: the
    :func:`effective_squaring_loss` of that signal.
    """
    model = dict(samples_per_symbol=samples_per_symbol, rolloff=rolloff, placement=placement,
                 modulation_index=modulation_index)
    if not _is_unshaped(power, model):
        return effective_squaring_loss(power, esn0, **model)
    return power * power / (esn0 * mth_power_noise(power, esn0))


def phase_error_variance(power, esn0, bt, *, samples_per_symbol=1, rolloff=0.35, placement="channel",
                         modulation_index=None):
    """Linear-theory carrier phase-error variance (rad^2): ``B_L T V_M / M^2``.

    ``bt`` is the loop noise bandwidth times the loop's update (sample) period, ``esn0`` the linear
    Es/N0 per symbol. With a signal model (samples per symbol, RRC roll-off and placement, or a
    residual carrier's modulation index; see :func:`detector_noise`) the general linear result
    ``2 B_L T S_e(0) / M^2`` of the line-normalised detector (Gardner, Phaselock Techniques, from
    memory, for the loop as a linear filter of the detector noise), which is the expression above
    in the unshaped default and ``B_L T sigma_n^2 / cos^2(beta)`` for a residual carrier.
    """
    model = dict(samples_per_symbol=samples_per_symbol, rolloff=rolloff, placement=placement,
                 modulation_index=modulation_index)
    if not _is_unshaped(power, model):
        return 2.0 * bt * detector_noise_density(power, esn0, **model) / (power * power)
    return bt * mth_power_noise(power, esn0) / (power * power)


def db_to_linear(db):
    """10^(dB/10)."""
    return 10.0 ** (db / 10.0)

def effective_squaring_loss(power, esn0, **signal_model):
    """Effective squaring loss (linear, <= 1 for a loss): ``var(phi) = B_L T_s / (Es/N0 * S_L)``
    with T_s the symbol period, i.e. ``S_L = N M^2 / (2 Es/N0 S_e(0))``.

    Equals :func:`squaring_loss` (Lindsey & Simon 1973, from memory) in the unshaped model,
    cos^2(beta) (the carrier share) for a residual carrier, 1 for a plain carrier.
    """
    noise = detector_noise(power, esn0, **signal_model)
    n = signal_model.get("samples_per_symbol", 1)
    return n * power * power / (2.0 * esn0 * noise.density)
