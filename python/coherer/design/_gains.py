# SPDX-License-Identifier: GPL-3.0-or-later
"""Loop-filter gains of each loop order for a requested B_L T and damping.

Gains are loop-gain products ``g K_i`` (g = detector gain M times NCO gain 1), dimensionless
per sample; bandwidths B_L in Hz, natural frequencies in rad/s. A loop filter is the gain vector
``(gK1, ..., gK_d)`` (proportional, integral, double integral), its length d the loop order;
:data:`LOOP_FORMULAS` holds the one place where the published formulas differ by order.
"""

from collections import namedtuple

#: Gain slots of the signal kernel (gK1, gK2, gK3): loop filters are padded with zeros to this.
KERNEL_SLOTS = 3

# Kaplan & Hegarty, Understanding GPS 2nd ed., Table 5.6 constants (see REFERENCES 1.3).
KAPLAN_A2 = 1.414
KAPLAN_A3 = 1.1
KAPLAN_B3 = 2.4


# --- continuous-time relations --------------------------------------------------------

def noise_bw_per_wn(damping):
    """B_L / wn of the continuous 2nd-order loop, ``(zeta + 1/(4 zeta)) / 2`` (Hz per rad/s)."""
    return 0.5 * (damping + 0.25 / damping)


def natural_frequency(noise_bw_hz, damping):
    """Natural frequency wn (rad/s) of a 2nd-order loop with noise bandwidth B_L (Hz)."""
    return noise_bw_hz / noise_bw_per_wn(damping)


def third_order_bw_per_w0(a3, b3):
    """B_n / w0 of the 3rd-order loop ``b3 w0 + a3 w0^2/s + w0^3/s^2``."""
    return (a3 * b3 * b3 + a3 * a3 - b3) / (4.0 * (a3 * b3 - 1.0))


def third_order_coefficients(damping):
    """(a3, b3) for a given damping of the complex pole pair: ``a3 = b3 = 1 + 2 zeta``."""
    c = 1.0 + 2.0 * damping
    return c, c


# --- discrete gains -----------------------------------------------------------------------

def bilinear_second_order(bt, damping):
    """Rice's bilinear 2nd-order gains ``(g K1, g K2)`` for B_L T = ``bt``."""
    theta_n = bt / (damping + 0.25 / damping)
    d = 1.0 + 2.0 * damping * theta_n + theta_n * theta_n
    return 4.0 * damping * theta_n / d, 4.0 * theta_n * theta_n / d


def first_order_gain(bt):
    """Exact discrete 1st-order gain ``g K1`` giving noise bandwidth ``bt`` (B_L T)."""
    return 4.0 * bt / (1.0 + 2.0 * bt)


def rectangular_third_order(bt, damping, a3=None, b3=None):
    """3rd-order gains ``(g K1, g K2, g K3)`` with rectangular integrators for B_L T = ``bt``.

    ``a3, b3`` default to :func:`third_order_coefficients` of ``damping``; pass
    Kaplan's (1.1, 2.4) to get the GPS-receiver table loop.
    """
    if a3 is None or b3 is None:
        a3, b3 = third_order_coefficients(damping)
    w0t = bt / third_order_bw_per_w0(a3, b3)
    return b3 * w0t, a3 * w0t * w0t, w0t ** 3


def _first_order_gains(bt, damping):
    """``(g K1,)`` of the first-order loop; it has no damping."""
    return (first_order_gain(bt),)


def _first_order_corner(noise_bw_hz, design_bw_hz, damping):
    """Closed-loop corner ``4 B_L`` (rad/s) of the first-order loop at the requested B_L (Hz)."""
    return 4.0 * noise_bw_hz


def _second_order_corner(noise_bw_hz, design_bw_hz, damping):
    """Natural frequency wn (rad/s) at the design bandwidth (Hz)."""
    return natural_frequency(design_bw_hz, damping)


def _third_order_corner(noise_bw_hz, design_bw_hz, damping):
    """w0 (rad/s) of the 3rd-order filter at the design bandwidth (Hz)."""
    a3, b3 = third_order_coefficients(damping)
    return design_bw_hz / third_order_bw_per_w0(a3, b3)


#: What differs by loop order: ``gains(bt, damping)``, the gain vector for a design B_L T, and
#: ``corner(noise_bw_hz, design_bw_hz, damping)``, the loop's characteristic frequency in rad/s.
LoopFormulas = namedtuple("LoopFormulas", "gains corner")
LOOP_FORMULAS = {
    1: LoopFormulas(_first_order_gains, _first_order_corner),
    2: LoopFormulas(bilinear_second_order, _second_order_corner),
    3: LoopFormulas(rectangular_third_order, _third_order_corner),
}


def loop_formulas(loop_order):
    """The :data:`LOOP_FORMULAS` entry of ``loop_order``; ``ValueError`` for any other order."""
    try:
        return LOOP_FORMULAS[loop_order]
    except (KeyError, TypeError):
        raise ValueError(f"loop_order must be 1, 2 or 3, got {loop_order!r}") from None


def loop_gains(loop_order, bt, damping):
    """Gain vector ``(gK1, ..., gK_d)`` of order d = ``loop_order`` from its published mapping
    for B_L T = ``bt`` (dimensionless) and damping factor ``damping``."""
    return tuple(loop_formulas(loop_order).gains(bt, damping))


def gain_vector(g_gains):
    """``g_gains`` without trailing zero slots: the loop filter, its length the loop order."""
    g = tuple(g_gains)
    order = len(g)
    while order > 1 and not g[order - 1]:
        order -= 1
    return g[:order]


def padded_gains(g_gains):
    """The loop filter padded with zeros to the kernel's :data:`KERNEL_SLOTS` slots."""
    g = tuple(g_gains)
    return g + (0.0,) * (KERNEL_SLOTS - len(g))


def textbook_gains(loop_order, bt, damping):
    """Loop-gain products ``(gK1, gK2, gK3)`` (the kernel's slots) of :func:`loop_gains`."""
    return padded_gains(loop_gains(loop_order, bt, damping))
