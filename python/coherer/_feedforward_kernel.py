# SPDX-License-Identifier: GPL-3.0-or-later
"""Per-sample kernel of the feed-forward M-th power (Viterbi & Viterbi) phase estimator.

numba, releases the GIL. A plain function of arrays: the input samples, the
output arrays, a float64 ``state`` array of scalars and the ring buffers of
:class:`FeedforwardBuffers` (everything the estimator remembers between
calls). Calling it on one long array or on any split of it gives bit-identical
results: every operation depends only on the sample's position since the
last reset, never on where a call starts.

Per input sample i (W = window, D = W // 2, M = power, pa = point_angle)::

    t_i    = F(|x_i|) e^{j M arg x_i}                 0 for a gap (NaN, Inf, 0)
    S_i    = sum of t over [max(r, i - W + 1), i]     r = last reset (or stream start)
    w_i    = S_i e^{-j M pa} / |S_i|                  = e^{j M phi_i}, phi_i in (-pi/M, pi/M]
    theta_i = theta_{i-1} + wrap(phi_i - theta_{i-1})  wrap into [-pi/M, pi/M): V&V unwrapping
    y      = x_{i-D} e^{-j theta_i}                   output i (delay D samples)

so output i is the input sample at the centre of the window that estimated
its phase (exactly for odd W; for even W the window's centre lies half a
sample after it).

Weightings F: ``WEIGHT_POWER`` |x|^M (F(|x|) e^{jM arg x} = x^M), ``WEIGHT_MAGNITUDE``
|x|, ``WEIGHT_PHASE`` 1 (phase only).

Implementation notes
    * Each call is processed in pieces of up to PIECE samples, each in four
      passes: terms (element-wise), sliding sums (serial), principal roots
      (element-wise), unwrapping / delay line / outputs (serial).
    * Sliding sum without cancellation: the stream since the reset is cut
      into blocks of W samples. The window sum is the suffix sum of the
      previous block (stored when it completed, reverse cumulative sum) plus
      the running prefix sum of the current block. Nothing is ever
      subtracted, so one huge sample cannot leave a residue behind once it is
      out of the window, and rounding cannot drift.
    * The unwrapping decision uses only the signs of Im S_{i-1}, Im S_i and of
      their cross product (exactly the rule above); the phasor e^{j theta} is
      the principal M-th root of w (half-angle steps for M = 2, 4, 8, 16, else
      atan2/cos/sin) times e^{j 2 pi k / M}, k the unwrapping index mod M.
    * When S_i = 0 (only gaps in the window) theta is held.
    * A reset at sample r: input samples r-D .. r-1 not yet output are
      corrected with the last estimate of their own segment (window ending
      at r-1); the window then restarts empty and the first estimate after
      the reset takes the principal value (k = 0).
"""

import numpy as np
from numba import njit

# weightings ------------------------------------------------------------------------
WEIGHT_POWER = 0
WEIGHT_MAGNITUDE = 1
WEIGHT_PHASE = 2

# state[] layout ---------------------------------------------------------------------
S_TOTAL = 0        # input samples processed since stream start
S_SINCE_RESET = 1  # input samples processed since the last reset (saturates at 2^52)
S_POS = 2          # position within the current block of W samples
S_PREFIX_RE = 3    # prefix sum of the current block
S_PREFIX_IM = 4
S_HAVE = 5         # 1.0 once an estimate exists in this segment
S_W_RE = 6         # last w (unnormalised S e^{-jM pa}), for the unwrapping decision
S_W_IM = 7
S_K = 8            # unwrapping index k mod M
S_P_RE = 9         # current phasor e^{j theta}
S_P_IM = 10
S_ASSIGNED = 11    # every input sample before this absolute index has its phase assigned
S_GAPS = 12        # number of gap samples (NaN, Inf or zero)
S_FREQ = 13        # latest frequency estimate, rad/sample
STATE_SIZE = 14

#: Amplitude above which |x|^M is evaluated at this amplitude instead (power
#: weighting): |x|^M <= 1e294, so a sum of up to 65536 terms stays finite.
POWER_WEIGHT_EXPONENT_CAP = 294.0
SATURATE = 2 ** 52
#: Samples per pass: a call is processed in pieces of at most this many samples,
#: so the scratch arrays stay small and in cache whatever the call size.
PIECE = 4096
TWO_PI = 2.0 * np.pi


class FeedforwardBuffers:
    """Ring buffers of one estimator instance (all of length ``window`` or ``window + 1``).

    ``terms``: terms t of the current block; ``suffix``: suffix sums of the
    previous block (``suffix[window] == 0``); ``delay_x``: the last ``window``
    input samples; ``delay_p``/``delay_f``: phasor and frequency (rad/sample)
    assigned to each pending input sample; ``history_p``: the phasor of the
    last ``window`` estimates (frequency diagnostic).
    """

    def __init__(self, window):
        self.terms = np.zeros(window, np.complex128)
        self.suffix = np.zeros(window + 1, np.complex128)
        self.delay_x = np.zeros(window, np.complex128)
        self.delay_p = np.ones(window, np.complex128)
        self.delay_f = np.zeros(window, np.float64)
        self.history_p = np.ones(window, np.complex128)

    def arrays(self):
        return self.terms, self.suffix, self.delay_x, self.delay_p, self.delay_f, self.history_p


def new_state():
    """A fresh state array: nothing seen, phase 0."""
    st = np.zeros(STATE_SIZE, dtype=np.float64)
    st[S_P_RE] = 1.0
    return st


def power_weight_cap(power):
    """Amplitude cap used by the power weighting, ``10^(294/M)``."""
    return 10.0 ** (POWER_WEIGHT_EXPONENT_CAP / power)


@njit(cache=True, error_model="numpy")
def _mth_power_terms(x, power, weighting, tr, ti, valid, br, bi, mag):
    """Terms t = F(|x|) e^{j M arg x} of every sample (0 for a gap), element-wise
    (``br``, ``bi``, ``mag``: scratch of the same length).

    Written as separate simple loops over the arrays.
    """
    n_items = x.shape[0]
    cap = 10.0 ** (POWER_WEIGHT_EXPONENT_CAP / power)
    cap2 = cap * cap
    for n in range(n_items):
        xr = np.float64(x[n].real)
        xi = np.float64(x[n].imag)
        p2 = xr * xr + xi * xi
        ok = p2 > 0.0 and p2 < np.inf          # false for NaN, Inf and zero
        valid[n] = ok
        r = np.sqrt(p2)
        if weighting == WEIGHT_POWER:
            scale = np.sqrt(cap2 / p2) if p2 > cap2 else 1.0
        else:
            scale = 1.0 / r                    # unit phasor
        br[n] = xr * scale if ok else 0.0
        bi[n] = xi * scale if ok else 0.0
        mag[n] = r if ok else 0.0
        tr[n] = 1.0 if ok else 0.0
        ti[n] = 0.0
    m = power
    while m > 0:                               # t = b^M by repeated squaring
        if m & 1:
            for n in range(n_items):
                a = tr[n] * br[n] - ti[n] * bi[n]
                ti[n] = tr[n] * bi[n] + ti[n] * br[n]
                tr[n] = a
        m >>= 1
        if m > 0:
            for n in range(n_items):
                a = br[n] * br[n] - bi[n] * bi[n]
                bi[n] = 2.0 * br[n] * bi[n]
                br[n] = a
    if weighting == WEIGHT_MAGNITUDE:
        for n in range(n_items):
            tr[n] *= mag[n]
            ti[n] *= mag[n]


@njit(cache=True, error_model="numpy")
def _principal_roots(sr, si, power, rr, ri):
    """Principal M-th root e^{j phi} (phi = arg(S)/M in (-pi/M, pi/M]) of every window sum
    S = sr + j si, as a unit phasor in rr, ri; (1, 0) where S = 0.

    M = 2^k: k half-angle steps on the unnormalised sum, h <- h + |h| (the bisector of h
    and the real axis; S on the negative real axis, arg pi, goes to +j), then one
    normalisation; no trigonometry. Other M: atan2/cos/sin.
    An S with max(|Re|, |Im|) outside [1e-150, 1e150] is divided in place by that
    maximum (a positive factor: signs and the signs of cross products, which is all the
    unwrapping looks at, are unchanged) so that no square or product overflows.
    """
    halvings = -1
    if power & (power - 1) == 0:
        halvings = 0
        m = power
        while m > 1:
            m >>= 1
            halvings += 1
    for n in range(sr.shape[0]):
        a = sr[n]
        b = si[n]
        big = max(abs(a), abs(b))
        if big == 0.0:
            rr[n] = 1.0
            ri[n] = 0.0
            continue
        if big > 1e150 or big < 1e-150:
            a /= big
            b /= big
            sr[n] = a
            si[n] = b
        if halvings < 0:
            ang = np.pi if (b == 0.0 and a < 0.0) else np.arctan2(b, a)
            ang /= power
            rr[n] = np.cos(ang)
            ri[n] = np.sin(ang)
            continue
        hr = a
        hi = b
        for _ in range(halvings):
            mag = np.sqrt(hr * hr + hi * hi)
            hr += mag
            if hr == 0.0 and hi == 0.0:      # exactly on the negative real axis: arg pi -> pi/2
                hi = mag
        inv = 1.0 / np.sqrt(hr * hr + hi * hi)
        rr[n] = hr * inv
        ri[n] = hi * inv


@njit(cache=True, error_model="numpy")
def _sliding_sums(tr, ti, resets, state, terms, suffix, window, rot_re, rot_im, sr, si):
    """S e^{-j M pa} over the window ending at each sample: the previous block's suffix
    sum plus the current block's prefix sum (blocks of ``window`` samples since the
    last reset); the window restarts empty at each reset."""
    n_items = tr.shape[0]
    n_resets = resets.shape[0]
    pos = np.int64(state[S_POS])
    pfr = state[S_PREFIX_RE]
    pfi = state[S_PREFIX_IM]
    next_reset = 0
    for n in range(n_items):
        if next_reset < n_resets and resets[next_reset] == n:
            for j in range(window + 1):
                suffix[j] = 0.0
            pos = 0
            pfr = 0.0
            pfi = 0.0
            while next_reset < n_resets and resets[next_reset] <= n:
                next_reset += 1
        t_r = tr[n]
        t_i = ti[n]
        terms[pos] = complex(t_r, t_i)
        pfr += t_r
        pfi += t_i
        sfx = suffix[pos + 1]
        ur = sfx.real + pfr
        ui = sfx.imag + pfi
        sr[n] = ur * rot_re - ui * rot_im
        si[n] = ur * rot_im + ui * rot_re
        if pos == window - 1:
            acc = 0.0 + 0.0j
            for j in range(window - 1, -1, -1):
                acc += terms[j]
                suffix[j] = acc
            pos = 0
            pfr = 0.0
            pfi = 0.0
        else:
            pos += 1
    state[S_POS] = pos
    state[S_PREFIX_RE] = pfr
    state[S_PREFIX_IM] = pfi


@njit(cache=True, error_model="numpy")
def _unwrap_and_output(x, valid, sr, si, rr, ri, out, ref, freq, phase, resets, state, delay_x,
                       delay_p, delay_f, history_p, power, window, roots_re, roots_im):
    """V&V unwrapping of each estimate (``sr``, ``si``: S up to a positive factor, 0 where S = 0),
    phase assignment to the sample at the window centre (or, at a reset, to the samples
    still in the delay), outputs."""
    n_items = x.shape[0]
    n_resets = resets.shape[0]
    delay = window // 2
    total = np.int64(state[S_TOTAL])
    since = np.int64(state[S_SINCE_RESET])
    have = state[S_HAVE] != 0.0
    wpr = state[S_W_RE]
    wpi = state[S_W_IM]
    k = np.int64(state[S_K])
    pr = state[S_P_RE]
    pi_ = state[S_P_IM]
    assigned = np.int64(state[S_ASSIGNED])
    gaps = np.int64(state[S_GAPS])
    fr = state[S_FREQ]
    want_ref = ref.shape[0] > 0
    want_freq = freq.shape[0] > 0
    want_phase = phase.shape[0] > 0
    next_reset = 0
    slot_i = total % window                  # ring slot of input sample i
    slot_c = (total - delay) % window        # ring slot of sample c = i - delay
    if slot_c < 0:
        slot_c += window
    for n in range(n_items):
        i = total + n                        # absolute input index
        if next_reset < n_resets and resets[next_reset] == n:
            # samples still in the delay get the last estimate of their own segment
            for c in range(max(i - delay, assigned), i):
                delay_p[c % window] = complex(pr, pi_)
                delay_f[c % window] = fr
            assigned = max(assigned, i)
            since = 0
            have = False
            fr = 0.0
            while next_reset < n_resets and resets[next_reset] <= n:
                next_reset += 1
        if valid[n]:
            delay_x[slot_i] = complex(np.float64(x[n].real), np.float64(x[n].imag))
        else:
            delay_x[slot_i] = 0.0
            gaps += 1
        s_r = sr[n]
        s_i = si[n]
        if s_r != 0.0 or s_i != 0.0:
            if have:
                # V&V rule theta_i = theta_{i-1} + wrap(phi_i - theta_{i-1}) as a test on
                # the half-planes of S_{i-1}, S_i and the sign of their cross product
                cross = s_i * wpr - s_r * wpi
                if wpi >= 0.0 and s_i < 0.0 and cross > 0.0:
                    k += 1
                    if k == power:
                        k = 0
                elif wpi < 0.0 and s_i >= 0.0 and cross <= 0.0:
                    k -= 1
                    if k < 0:
                        k += power
            else:
                k = 0
                have = True
            wpr = s_r
            wpi = s_i
            qr = roots_re[k]
            qi = roots_im[k]
            pr = rr[n] * qr - ri[n] * qi
            pi_ = rr[n] * qi + ri[n] * qr
        if want_freq:
            # phase advance over the last min(since, W) estimates
            lag = window if since >= window else since
            if lag > 0:
                h = history_p[(i - lag) % window]
                dr = pr * h.real + pi_ * h.imag
                di = pi_ * h.real - pr * h.imag
                fr = np.arctan2(di, dr) / lag
            else:
                fr = 0.0
            history_p[slot_i] = complex(pr, pi_)
        c = i - delay
        if c >= assigned:
            delay_p[slot_c] = complex(pr, pi_)
            delay_f[slot_c] = fr
            assigned = c + 1
        if c >= 0:
            pc = delay_p[slot_c]
            xc = delay_x[slot_c]
            out[n] = complex(xc.real * pc.real + xc.imag * pc.imag,
                             xc.imag * pc.real - xc.real * pc.imag)
            if want_ref:
                ref[n] = pc
            if want_freq:
                freq[n] = delay_f[slot_c]
            if want_phase:
                phase[n] = np.arctan2(pc.imag, pc.real)
        else:
            out[n] = 0.0
            if want_ref:
                ref[n] = 1.0
            if want_freq:
                freq[n] = 0.0
            if want_phase:
                phase[n] = 0.0
        since += 1
        slot_i += 1
        if slot_i == window:
            slot_i = 0
        slot_c += 1
        if slot_c == window:
            slot_c = 0

    state[S_TOTAL] = total + n_items
    state[S_SINCE_RESET] = min(since, SATURATE)
    state[S_HAVE] = 1.0 if have else 0.0
    state[S_W_RE] = wpr
    state[S_W_IM] = wpi
    state[S_K] = k
    state[S_P_RE] = pr
    state[S_P_IM] = pi_
    state[S_ASSIGNED] = assigned
    state[S_GAPS] = gaps
    state[S_FREQ] = fr


@njit(nogil=True, cache=True, error_model="numpy")
def feedforward(x, out, ref, freq, phase, resets, state, terms, suffix, delay_x, delay_p,
                delay_f, history_p, power, window, weighting, rot_re, rot_im, roots_re, roots_im):
    """Run the estimator over ``x`` (complex64), writing corrected samples to ``out``.

    ``ref`` (complex64), ``freq`` (float32, rad/sample), ``phase`` (float32, rad in
    (-pi, pi]) are the diagnostic outputs; pass zero-length arrays to skip them.
    ``resets``: increasing indices into ``x`` of samples that start a new segment.
    ``rot`` = e^{-j M point_angle}; ``roots`` = e^{j 2 pi k / M}, k = 0..M-1.
    Returns the number of samples processed.
    """
    n_items = x.shape[0]
    size = min(n_items, PIECE)
    scratch = np.empty((9, size))
    tr, ti, sr, si, rr, ri, br, bi, mag = (scratch[0], scratch[1], scratch[2], scratch[3], scratch[4],
                                           scratch[5], scratch[6], scratch[7], scratch[8])
    valid = np.empty(size, np.bool_)
    first_reset = 0
    for a in range(0, n_items, PIECE):
        b = min(a + PIECE, n_items)
        m = b - a
        last_reset = first_reset
        while last_reset < resets.shape[0] and resets[last_reset] < b:
            last_reset += 1
        local_resets = resets[first_reset:last_reset] - a
        first_reset = last_reset
        xs = x[a:b]
        # 1. terms (element-wise)
        _mth_power_terms(xs, power, weighting, tr[:m], ti[:m], valid[:m], br[:m], bi[:m], mag[:m])
        # 2. sliding sums (serial)
        _sliding_sums(tr[:m], ti[:m], local_resets, state, terms, suffix, window, rot_re, rot_im,
                      sr[:m], si[:m])
        # 3. principal roots (element-wise)
        _principal_roots(sr[:m], si[:m], power, rr[:m], ri[:m])
        # 4. unwrapping, delay line and outputs (serial)
        _unwrap_and_output(xs, valid[:m], sr[:m], si[:m], rr[:m], ri[:m], out[a:b], ref[a:b],
                           freq[a:b], phase[a:b], local_resets, state, delay_x, delay_p, delay_f,
                           history_p, power, window, roots_re, roots_im)
    return n_items
