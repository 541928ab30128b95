# SPDX-License-Identifier: GPL-3.0-or-later
"""Per-sample kernel of the feed-forward M-th power (Viterbi & Viterbi) phase estimator.

numba, releases the GIL. A plain function of arrays: the input samples, the
output arrays, a float64 ``state`` array of scalars and the arrays of
:class:`FeedforwardBuffers` (everything the estimator remembers between
calls, plus preallocated scratch). Calling it on one long array or on any
split of it gives bit-identical results: every operation depends only on the
sample's position since the last reset, never on where a call starts.

Per input sample i (W = window, D = W // 2, M = power, pa = point_angle)::

    t_i    = F(|x_i|) e^{j M arg x_i}                 0 for a gap (NaN, Inf, 0)
    S_i    = e^{-j M pa} sum of t over [max(r, i - W + 1), i]   r = last reset (or stream start)
    phi_i  = arg(S_i) / M in (-pi/M, pi/M]
    theta_i = theta_{i-1} + wrap(phi_i - theta_{i-1})  wrap into [-pi/M, pi/M): V&V unwrapping
    y      = x_{i-D} e^{-j theta_i}                   output i (delay D samples)

so output i is the input sample at the centre of the window that estimated
its phase (exactly for odd W; for even W the window's centre lies half a
sample after it).

Weightings F: ``WEIGHT_POWER`` |x|^M (F(|x|) e^{jM arg x} = x^M), ``WEIGHT_MAGNITUDE``
|x|, ``WEIGHT_PHASE`` 1 (phase only).

Implementation notes
    * Each call is processed in pieces of up to PIECE samples. Only two passes
      over a piece are serial: the window sums and the unwrapping index; every
      other pass is element-wise and written so that numba vectorises it
      (float32 views of the complex64 arrays, selects instead of branches, no
      fastmath: vector and scalar iterations round identically).
    * Terms in float64 (|x|^M spans far more than float32's range); for the
      phase weighting and even M the unit phasor e^{j2 arg x} = x^2 / |x|^2
      needs one division and no square root.
    * Sliding sum without cancellation: the stream since the reset is cut
      into blocks of W samples. The window sum is the suffix sum of the
      previous block (reverse cumulative sum, formed when the block
      completed) plus the running prefix sum of the current block, both in
      float64 in a fixed order. Nothing is ever subtracted, so one huge
      sample cannot leave a residue behind once it is out of the window, and
      rounding cannot drift. The suffix sums of a block are read from the
      piece's terms, and from a ring for the part of the block that arrived
      in earlier pieces: only the terms of a block still incomplete at the end
      of a piece are copied to the ring (the summation order is the same
      whichever array holds a term).
    * Each S is rotated by e^{-jM pa} and scaled by a power of two (exact)
      so that its larger component lies in [1, 2): signs and the unwrapping
      decision are unchanged and the principal root can be taken in float32.
      The root and the unwrapping decision of each sample come out of one
      element-wise pass (roots stored with re and im interleaved, so that the
      loop writes few arrays and vectorises).
    * Principal M-th root, M = 2^k: k half-angle steps, each the bisector of
      h and the positive real axis, (Re h + |h|, Im h) or, for Re h < 0, the
      same direction without cancellation, (|Im h|, +-(|h| - Re h)); one
      normalisation; no trigonometry. Other M: atan2/cos/sin (float64).
      S on the negative real axis (arg pi) gives +pi/M.
    * The unwrapping decision uses only the signs of Im S_{i-1}, Im S_i and of
      their cross product (exactly the rule above); it is an increment of -1,
      0 or +1 of the index k (mod M), computed element-wise. The serial pass
      only accumulates k (for M = 2^j, eight int8 codes per uint64 word, summed
      byte-wise by one multiplication); the phasor e^{j theta} is the
      principal root times e^{j 2 pi k / M}, float32.
    * When S_i = 0 (only gaps in the window, or terms that cancel) theta is
      held and the decision for the next nonzero S uses the last nonzero one.
    * A reset at sample r: input samples r-D .. r-1 not yet output are
      corrected with the last estimate of their own segment (window ending
      at r-1); the window then restarts empty and the first estimate after
      the reset takes the principal value (k = 0).
    * Corrected output x_{i-D} e^{-j theta_i} in float32 (complex64 in and out).
"""

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic

from ._numeric import unit_pair_power

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
S_W_RE = 6         # last nonzero S (rotated and scaled), for the unwrapping decision
S_W_IM = 7
S_K = 8            # unwrapping index k mod M
S_P_RE = 9         # current phasor e^{j theta}
S_P_IM = 10
S_LAST_RESET = 11  # absolute index of the latest reset (NO_RESET before the first)
S_GAPS = 12        # number of gap samples (NaN, Inf or zero)
S_FREQ = 13        # latest frequency estimate, rad/sample
STATE_SIZE = 14

#: Amplitude above which |x|^M is evaluated at this amplitude instead (power
#: weighting): |x|^M <= 1e294, so a sum of up to 65536 terms stays finite.
POWER_WEIGHT_EXPONENT_CAP = 294.0
SATURATE = 2 ** 52
#: S_LAST_RESET before any reset: far enough back that no output is held.
NO_RESET = -float(2 ** 52)
#: Samples per pass: a call is processed in pieces of at most this many samples,
#: so the scratch arrays stay small and in cache whatever the call size.
PIECE = 4096
#: Decision code of a sample whose window sum is 0 (theta held).
ZERO_SUM = 2


class FeedforwardBuffers:
    """Arrays of one estimator instance: what it remembers between calls and scratch.

    ``ring_re``/``ring_im``: terms of the current block that arrived in earlier
    pieces (``window``);
    ``suffix_re``/``suffix_im``: suffix sums of the previous block (``window + 1``,
    last entry 0); ``delay_x``: the last ``window // 2`` input samples (complex64);
    ``delay_p``/``delay_f``: phasor and frequency (rad/sample) assigned at a reset
    to each sample still in the delay; ``hist_re``/``hist_im``: the phasor of the
    last ``window`` estimates (frequency diagnostic). The rest is scratch for one
    piece of PIECE samples, overwritten by every call: ``scratch`` (float64 terms,
    window sums, scale), ``scratch32`` (row 0: principal roots, re and im
    interleaved; row 1: phasor re, then im), ``codes`` (int8 decisions, index k).
    """

    def __init__(self, window):
        self.ring_re = np.zeros(window)
        self.ring_im = np.zeros(window)
        self.suffix_re = np.zeros(window + 1)
        self.suffix_im = np.zeros(window + 1)
        self.delay_x = np.zeros(window // 2, np.complex64)
        self.delay_p = np.ones(window, np.complex128)
        self.delay_f = np.zeros(window)
        self.hist_re = np.ones(window)
        self.hist_im = np.zeros(window)
        self.scratch = np.zeros((5, PIECE))              # t re/im, S re/im, scale (float64)
        self.scratch32 = np.zeros((2, 2 * PIECE), np.float32)  # roots (re, im interleaved); phasor re | im
        self.codes = np.zeros((2, PIECE), np.int8)       # decision, index k

    def arrays(self):
        return (self.ring_re, self.ring_im, self.suffix_re, self.suffix_im, self.delay_x,
                self.delay_p, self.delay_f, self.hist_re, self.hist_im, self.scratch,
                self.scratch32, self.codes)


def new_state():
    """A fresh state array: nothing seen, phase 0."""
    st = np.zeros(STATE_SIZE, dtype=np.float64)
    st[S_P_RE] = 1.0
    st[S_LAST_RESET] = NO_RESET
    return st


# --- 1. terms (element-wise) ------------------------------------------------------------

@njit(cache=True, inline="always", error_model="numpy")
def _unit_phase_terms(xf, power, tr, ti):
    """Phase-only terms ``(x/|x|)^M`` (0 for a gap) of the float32 view ``xf`` into
    ``tr``, ``ti``; returns the number of gaps."""
    gaps = 0
    for n in range(tr.shape[0]):
        xr = np.float64(xf[2 * n])
        xi = np.float64(xf[2 * n + 1])
        p2 = xr * xr + xi * xi
        ok = (p2 > 0.0) & (p2 < np.inf)
        vr, vi = unit_pair_power(xr, xi, p2 if ok else 1.0, power)
        tr[n] = vr if ok else 0.0
        ti[n] = vi if ok else 0.0
        gaps += 0 if ok else 1
    return gaps


@njit(cache=True, error_model="numpy")
def _mth_power_terms(xf, power, weighting, tr, ti, scale):
    """Terms t = F(|x|) e^{j M arg x} (0 for a gap) of the samples in the float32 view
    ``xf`` (I at 2n, Q at 2n+1) into ``tr``, ``ti``; ``scale``: scratch. Returns the
    number of gaps."""
    n_items = tr.shape[0]
    gaps = 0
    even = power % 2 == 0
    cap = 10.0 ** (POWER_WEIGHT_EXPONENT_CAP / power)
    cap2 = cap * cap
    if weighting == WEIGHT_PHASE and even and power <= 4:
        # e^{jM arg x} from x^2 / |x|^2 (no square root); M as a literal: straight-line SIMD
        if power == 2:
            return _unit_phase_terms(xf, 2, tr, ti)
        return _unit_phase_terms(xf, 4, tr, ti)
    # general: base b and exponent e with t = mag * b^e
    #   phase, even M: b = x^2/|x|^2, e = M/2        phase, odd M: b = x/|x|, e = M
    #   power, even M: b = x^2 c^2, e = M/2           power, odd M: b = x c, e = M
    #   magnitude: as phase, times mag = |x| (in ``scale``)
    # (c = 1, or cap/|x| above the cap)
    half = even
    expo = power // 2 if half else power
    for n in range(n_items):
        xr = np.float64(xf[2 * n])
        xi = np.float64(xf[2 * n + 1])
        p2 = xr * xr + xi * xi
        ok = (p2 > 0.0) & (p2 < np.inf)
        ps = p2 if ok else 1.0
        if weighting == WEIGHT_POWER:
            g2 = cap2 / ps if ps > cap2 else 1.0
        else:
            g2 = 1.0 / ps
        if half:
            br = (xr * xr - xi * xi) * g2
            bi = 2.0 * xr * xi * g2
        else:
            g = np.sqrt(g2)
            br = xr * g
            bi = xi * g
        tr[n] = br if ok else 0.0
        ti[n] = bi if ok else 0.0
        scale[n] = np.sqrt(ps) if ok else 0.0
        gaps += 0 if ok else 1
    # b^e by repeated squaring: result kept in (tr, ti), base squared in place
    # in the upper bits; with e = 2^j only squarings are needed
    if expo & (expo - 1) == 0:
        m = expo
        while m > 1:
            for n in range(n_items):
                a = tr[n] * tr[n] - ti[n] * ti[n]
                ti[n] = 2.0 * tr[n] * ti[n]
                tr[n] = a
            m >>= 1
    else:
        _general_power(tr, ti, expo)
    if weighting == WEIGHT_MAGNITUDE:
        for n in range(n_items):
            tr[n] *= scale[n]
            ti[n] *= scale[n]
    return gaps


@njit(cache=True, error_model="numpy")
def _general_power(tr, ti, expo):
    """(tr + j ti) <- (tr + j ti)^expo element-wise, any positive integer ``expo``
    (the base is kept in a copy; small exponents only, so a per-element loop)."""
    for n in range(tr.shape[0]):
        br = tr[n]
        bi = ti[n]
        rr = 1.0
        ri = 0.0
        m = expo
        while m > 0:
            if m & 1:
                a = rr * br - ri * bi
                ri = rr * bi + ri * br
                rr = a
            m >>= 1
            if m > 0:
                a = br * br - bi * bi
                bi = 2.0 * br * bi
                br = a
        tr[n] = rr
        ti[n] = ri


# --- 2. window sums (serial) ------------------------------------------------------------

@njit(cache=True, inline="always", error_model="numpy")
def _prefix_run(tr, ti, sfx_re, sfx_im, pfr, pfi, sr, si):
    """Part of one block: running prefix sum plus the previous block's suffix sums
    (all arrays start at the run's first sample: indices from 0, no wraparound)."""
    for q in range(tr.shape[0]):
        pfr += tr[q]
        pfi += ti[q]
        sr[q] = sfx_re[q] + pfr
        si[q] = sfx_im[q] + pfi
    return pfr, pfi


@njit(cache=True, inline="always", error_model="numpy")
def _suffix_sums(tr, ti, ring_re, ring_im, suffix_re, suffix_im, pos, window):
    """Reverse cumulative sums of a completed block (suffix[window] stays 0): block
    positions ``pos`` .. ``window - 1`` are the terms ``tr``, ``ti`` of this run,
    positions 0 .. ``pos - 1`` were kept in the ring (earlier pieces); summed from the
    last position down, whichever array holds the term."""
    acc_r = 0.0
    acc_i = 0.0
    for q in range(window - pos):
        p = np.uint64(window - 1 - q)
        u = np.uint64(window - pos - 1 - q)
        acc_r += tr[u]
        acc_i += ti[u]
        suffix_re[p] = acc_r
        suffix_im[p] = acc_i
    for q in range(pos):
        p = np.uint64(pos - 1 - q)
        acc_r += ring_re[p]
        acc_i += ring_im[p]
        suffix_re[p] = acc_r
        suffix_im[p] = acc_i


@njit(cache=True, error_model="numpy")
def _sliding_sums(tr, ti, resets, state, ring_re, ring_im, suffix_re, suffix_im, window, sr, si):
    """Sum of t over the window ending at each sample: the previous block's suffix
    sum plus the current block's prefix sum (blocks of ``window`` samples since the
    last reset); the window restarts empty at each reset. Only the terms of a block
    still incomplete at the end of the piece are copied to the ring."""
    n_items = tr.shape[0]
    n_resets = resets.shape[0]
    pos = np.int64(state[S_POS])
    pfr = state[S_PREFIX_RE]
    pfi = state[S_PREFIX_IM]
    next_reset = 0
    n = 0
    while n < n_items:
        if next_reset < n_resets and resets[next_reset] <= n:
            for j in range(window + 1):
                suffix_re[j] = 0.0
                suffix_im[j] = 0.0
            pos = 0
            pfr = 0.0
            pfi = 0.0
            while next_reset < n_resets and resets[next_reset] <= n:
                next_reset += 1
        end = min(n_items, n + window - pos)
        if next_reset < n_resets:
            end = min(end, resets[next_reset])
        pfr, pfi = _prefix_run(tr[n:end], ti[n:end], suffix_re[pos + 1:], suffix_im[pos + 1:],
                               pfr, pfi, sr[n:end], si[n:end])
        if pos + end - n == window:
            _suffix_sums(tr[n:end], ti[n:end], ring_re, ring_im, suffix_re, suffix_im, pos, window)
            pos = 0
            pfr = 0.0
            pfi = 0.0
        else:
            if end == n_items:      # the block continues in the next piece: keep its terms
                for j in range(end - n):
                    ring_re[pos + j] = tr[n + j]
                    ring_im[pos + j] = ti[n + j]
            pos += end - n
        n = end
    state[S_POS] = pos
    state[S_PREFIX_RE] = pfr
    state[S_PREFIX_IM] = pfi


# --- 3. rotation and scaling; principal roots and decisions (element-wise) -------------

@intrinsic
def _float_bits(typingctx, v):
    """The IEEE bits of a float64 as an int64 (a register move; vectorisable)."""
    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.IntType(64))
    return types.int64(types.float64), codegen


@intrinsic
def _bits_float(typingctx, v):
    """The float64 whose IEEE bits are the int64 ``v``."""
    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.DoubleType())
    return types.float64(types.int64), codegen


@njit(cache=True, inline="always", error_model="numpy")
def _rotated_scaled(sr, si, rot_re, rot_im):
    """S e^{-jM pa} times 2^-e, e the exponent of its larger component (which then lies
    in [1, 2)); the power of two, clamped to 2^-1022 .. 2^1023, is applied exactly."""
    a = sr * rot_re - si * rot_im
    b = sr * rot_im + si * rot_re
    aa = abs(a)
    bb = abs(b)
    big = aa if aa > bb else bb
    e = 2046 - (_float_bits(big) >> 52)
    e = 1 if e < 1 else e
    scale = _bits_float(e << 52)
    return a * scale, b * scale


@njit(cache=True, inline="always", error_model="numpy")
def _first_half(hr, hi):
    """Direction of e^{j arg(h)/2} (not normalised), float32, no cancellation."""
    m = np.sqrt(hr * hr + hi * hi)
    right = hr >= np.float32(0.0)
    up = hi >= np.float32(0.0)
    d = m - hr
    return (hr + m if right else abs(hi)), (hi if right else (d if up else -d))


@njit(cache=True, inline="always", error_model="numpy")
def _right_half(hr, hi):
    """Same as _first_half for Re h >= 0."""
    return hr + np.sqrt(hr * hr + hi * hi), hi


@njit(cache=True, inline="always", error_model="numpy")
def _principal_root(a, b, halvings):
    """e^{j arg(S)/M}, M = 2^halvings, of the scaled S = (a, b): float32 unit phasor,
    (1, 0) for S = 0. ``halvings`` is a constant wherever this is inlined."""
    hr = np.float32(a)
    hi = np.float32(b)
    zero = (a == 0.0) & (b == 0.0)
    if halvings >= 1:
        hr, hi = _first_half(hr, hi)
    if halvings >= 2:
        hr, hi = _right_half(hr, hi)
    if halvings >= 3:
        hr, hi = _right_half(hr, hi)
    if halvings >= 4:
        hr, hi = _right_half(hr, hi)
    inv = np.float32(1.0) / np.sqrt(hr * hr + hi * hi)
    return (np.float32(1.0) if zero else hr * inv), (np.float32(0.0) if zero else hi * inv)


@njit(cache=True, inline="always")
def _decision(pr, pi_, sr, si):
    """Unwrapping increment (-1, 0, +1) from the previous nonzero S (pr, pi_) to S."""
    cross = si * pr - sr * pi_
    up = (pi_ >= 0.0) & (si < 0.0) & (cross > 0.0)
    down = (pi_ < 0.0) & (si >= 0.0) & (cross <= 0.0)
    return 1 if up else (-1 if down else 0)


@njit(cache=True, error_model="numpy")
def _rotate_scale(sr, si, rot_re, rot_im):
    """S <- S e^{-jM pa}, scaled by a power of two (see _rotated_scaled), in place."""
    for n in range(sr.shape[0]):
        sr[n], si[n] = _rotated_scaled(sr[n], si[n], rot_re, rot_im)


@njit(cache=True, inline="always", error_model="numpy")
def _root_runs(sr, si, halvings, rf, code):
    """The element-wise loop of _roots_and_decisions from the second sample on (the
    previous S is at n, the current at n + 1; ``rf``, ``code`` start at the second
    sample, so every index runs from 0)."""
    zeros = 0
    for n in range(sr.shape[0] - 1):
        a0 = sr[n]
        b0 = si[n]
        a = sr[n + 1]
        b = si[n + 1]
        rf[2 * n], rf[2 * n + 1] = _principal_root(a, b, halvings)
        z = (a == 0.0) & (b == 0.0)
        code[n] = ZERO_SUM if z else _decision(a0, b0, a, b)
        zeros += 1 if z else 0
    return zeros


@njit(cache=True, error_model="numpy")
def _roots_and_decisions(sr, si, w_re, w_im, power, rf, code):
    """For every rotated and scaled window sum S (``sr``, ``si``): its principal M-th
    root e^{j phi}, phi = arg(S)/M in (-pi/M, pi/M], as a float32 unit phasor
    (interleaved re, im in ``rf``; (1, 0) where S = 0) and its decision code: the
    increment against the previous S (``w`` for the first) or ZERO_SUM where S = 0.
    Returns the number of zero sums."""
    n_items = sr.shape[0]
    if n_items == 0:
        return 0
    if power & (power - 1) != 0:
        return _roots_and_decisions_any(sr, si, w_re, w_im, power, rf, code)
    a = sr[0]
    b = si[0]
    z = (a == 0.0) & (b == 0.0)
    code[0] = ZERO_SUM if z else _decision(w_re, w_im, a, b)
    zeros = 1 if z else 0
    # one loop per M (half-angle steps unrolled), so that each vectorises
    if power == 1:
        rf[0], rf[1] = _principal_root(a, b, 0)
        zeros += _root_runs(sr, si, 0, rf[2:], code[1:])
    elif power == 2:
        rf[0], rf[1] = _principal_root(a, b, 1)
        zeros += _root_runs(sr, si, 1, rf[2:], code[1:])
    elif power == 4:
        rf[0], rf[1] = _principal_root(a, b, 2)
        zeros += _root_runs(sr, si, 2, rf[2:], code[1:])
    elif power == 8:
        rf[0], rf[1] = _principal_root(a, b, 3)
        zeros += _root_runs(sr, si, 3, rf[2:], code[1:])
    else:
        rf[0], rf[1] = _principal_root(a, b, 4)
        zeros += _root_runs(sr, si, 4, rf[2:], code[1:])
    return zeros


@njit(cache=True, error_model="numpy")
def _roots_and_decisions_any(sr, si, w_re, w_im, power, rf, code):
    """_roots_and_decisions for M not a power of two: the root by atan2/cos/sin
    (float64); S on the negative real axis gives +pi/M."""
    zeros = 0
    pr = w_re
    pi_ = w_im
    for n in range(sr.shape[0]):
        a = sr[n]
        b = si[n]
        z = (a == 0.0) & (b == 0.0)
        code[n] = ZERO_SUM if z else _decision(pr, pi_, a, b)
        zeros += 1 if z else 0
        pr = a
        pi_ = b
        if z:
            rf[2 * n] = 1.0
            rf[2 * n + 1] = 0.0
        else:
            ang = np.pi if (b == 0.0 and a < 0.0) else np.arctan2(b, a)
            ang /= power
            rf[2 * n] = np.cos(ang)
            rf[2 * n + 1] = np.sin(ang)
    return zeros


# --- 4. unwrapping index (serial) --------------------------------------------------------

@njit(cache=True, error_model="numpy")
def _running_index(code, code64, kk, kk64, n, end, k, mask):
    """kk[j] = (k + code[n] + ... + code[j]) & mask for j in [n, end), codes -1, 0, +1,
    mask = 2^j - 1 <= 15; returns the last value. Eight codes at a time (one uint64
    word, ``code64``/``kk64`` view the same rows): bytes c + 1 in {0, 1, 2} summed
    byte-wise by one multiplication (sums <= 16, so no carries cross bytes); adding
    15 - i to byte i turns sum - (i + 1) into a nonnegative number, 16 = 0 mod 2^j."""
    ones = np.uint64(0x0101010101010101)
    low7 = np.uint64(0x7F7F7F7F7F7F7F7F)
    high = np.uint64(0x8080808080808080)
    offsets = np.uint64(0x08090A0B0C0D0E0F)     # byte i: 15 - i
    masks = np.uint64(mask) * ones
    k &= mask
    j = n
    while j < end and (j & 7) != 0:
        k = (k + code[j]) & mask
        kk[j] = k
        j += 1
    while j + 8 <= end:
        c = code64[j >> 3]
        u = ((c & low7) + ones) ^ (c & high)   # c + 1 per byte
        v = u * ones + offsets + np.uint64(k) * ones
        kk64[j >> 3] = v & masks
        k = np.int64((v >> np.uint64(56)) & np.uint64(mask))
        j += 8
    while j < end:
        k = (k + code[j]) & mask
        kk[j] = k
        j += 1
    return k


@njit(cache=True, error_model="numpy")
def _unwrap_index(code, sr, si, resets, zeros, state, power, kk, code64, kk64):
    """k of every sample (the sum of the increments mod M; 0 at the first nonzero S of
    a segment; held where S = 0) into ``kk``; updates k, have, w in ``state``.
    ``code64``, ``kk64``: the whole rows of ``code`` and ``kk`` as uint64 words."""
    n_items = code.shape[0]
    n_resets = resets.shape[0]
    k = np.int64(state[S_K])
    have = state[S_HAVE] != 0.0
    wr = state[S_W_RE]
    wi = state[S_W_IM]
    last_nz = -1
    next_reset = 0
    n = 0
    while n < n_items:
        if next_reset < n_resets and resets[next_reset] <= n:
            have = False
            while next_reset < n_resets and resets[next_reset] <= n:
                next_reset += 1
        end = n_items if next_reset >= n_resets else resets[next_reset]
        if zeros == 0 and have and power & (power - 1) == 0:
            k = _running_index(code, code64, kk, kk64, n, end, k, power - 1)
            if end > n:
                last_nz = end - 1
        elif zeros == 0 and have:
            for j in range(n, end):            # a plain running sum mod M
                k += code[j]
                k = k + power if k < 0 else k
                k = k - power if k >= power else k
                kk[j] = k
            if end > n:
                last_nz = end - 1
        else:
            prev_zero = False
            for j in range(n, end):
                c = np.int64(code[j])
                if c == ZERO_SUM:
                    prev_zero = True
                else:
                    if not have:
                        k = 0
                        have = True
                    else:
                        if prev_zero:              # decide against the last nonzero S
                            if last_nz >= 0:
                                c = _decision(sr[last_nz], si[last_nz], sr[j], si[j])
                            else:
                                c = _decision(wr, wi, sr[j], si[j])
                        k += c
                        k = k + power if k < 0 else k
                        k = k - power if k >= power else k
                    prev_zero = False
                    last_nz = j
                kk[j] = k
        n = end
    if last_nz >= 0:
        wr = sr[last_nz]
        wi = si[last_nz]
    state[S_K] = k
    state[S_HAVE] = 1.0 if have else 0.0
    state[S_W_RE] = wr
    state[S_W_IM] = wi


# --- 5. phasors and outputs (element-wise, holds and resets patched serially) ------------

@njit(cache=True, error_model="numpy")
def _phasors(rf, kk, power, roots_re, roots_im, pr, pi_):
    """e^{j theta} = principal root times e^{j 2 pi k / M}, float32. M = 2^j: by selects
    (quarter turns, and turns of 2 pi / M and 4 pi / M for M = 8, 16), so that the loop
    vectorises; other M: from the table ``roots``."""
    n_items = pr.shape[0]
    if power & (power - 1) != 0:
        for n in range(n_items):
            k = np.uint64(kk[n])
            qr = roots_re[k]
            qi = roots_im[k]
            a = np.float64(rf[2 * n])
            b = np.float64(rf[2 * n + 1])
            pr[n] = np.float32(a * qr - b * qi)
            pi_[n] = np.float32(a * qi + b * qr)
        return
    # k = quarter * (M / 4) + fine for M >= 4
    qshl = 1 if power == 2 else 0
    qshr = 2 if power == 16 else (1 if power == 8 else 0)
    fmask = (1 << qshr) - 1
    c1 = np.float32(np.cos(2.0 * np.pi / power))
    s1 = np.float32(np.sin(2.0 * np.pi / power))
    c2 = np.float32(np.cos(4.0 * np.pi / power))
    s2 = np.float32(np.sin(4.0 * np.pi / power))
    for n in range(n_items):
        k = np.int32(kk[n])
        quarter = ((k << qshl) >> qshr) & 3
        fine = k & fmask
        a = rf[2 * n]
        b = rf[2 * n + 1]
        f0 = (fine & 1) != 0
        a, b = (a * c1 - b * s1 if f0 else a), (a * s1 + b * c1 if f0 else b)
        f1 = (fine & 2) != 0
        a, b = (a * c2 - b * s2 if f1 else a), (a * s2 + b * c2 if f1 else b)
        q1 = (quarter & 1) != 0
        a, b = (-b if q1 else a), (a if q1 else b)
        q2 = (quarter & 2) != 0
        pr[n] = -a if q2 else a
        pi_[n] = -b if q2 else b


@njit(cache=True, error_model="numpy")
def _hold(code, pr, pi_, p0r, p0i):
    """Where S = 0 the phasor of the previous sample (``p0`` before the first)."""
    hr = np.float32(p0r)
    hi = np.float32(p0i)
    for n in range(code.shape[0]):
        if code[n] == ZERO_SUM:
            pr[n] = hr
            pi_[n] = hi
        else:
            hr = pr[n]
            hi = pi_[n]


@njit(cache=True, inline="always", error_model="numpy")
def _derotate(xr, xi, cr, ci):
    """x e^{-j theta} for a valid x (finite, not 0), else 0; float32."""
    ok = (abs(xr) < np.inf) & (abs(xi) < np.inf) & ((xr != 0) | (xi != 0))
    yr = xr * cr + xi * ci
    yi = xi * cr - xr * ci
    zero = np.float32(0.0)
    return (yr if ok else zero), (yi if ok else zero)


@njit(cache=True, error_model="numpy")
def _correct(xf, pr, pi_, of):
    """of = xf e^{-j theta} element-wise (float32 views, I at 2n, Q at 2n + 1; all
    arrays start at the first sample, so no index can be negative)."""
    for n in range(pr.shape[0]):
        yr, yi = _derotate(xf[2 * n], xf[2 * n + 1], pr[n], pi_[n])
        of[2 * n] = yr
        of[2 * n + 1] = yi


@njit(cache=True, error_model="numpy")
def _held_outputs(xf, dxf, a, m, i0, n_c0, lres, last, delay, window, p0r, p0i, pr, pi_,
                  fr_at_reset, delay_p, delay_f, of, ref, freq, phase, want_ref, want_freq,
                  want_phase):
    """Resets of the piece (call offset ``a``) in order: the samples still in the delay
    get the phasor and frequency of the sample before the reset (delay_p, delay_f), then
    every output n whose sample c = i - D precedes the latest reset at or before i is
    recomputed with them. Returns the latest reset (absolute index)."""
    j = 0
    n = 0
    while n < m:
        if j < lres.shape[0] and lres[j] <= n:
            i = i0 + n
            if i > last:
                hr = p0r if n == 0 else np.float64(pr[n - 1])
                hi = p0i if n == 0 else np.float64(pi_[n - 1])
                for c in range(max(i - delay, last, 0), i):
                    delay_p[c % window] = complex(hr, hi)
                    if want_freq:
                        delay_f[c % window] = fr_at_reset[j]
                last = i
            while j < lres.shape[0] and lres[j] <= n:
                j += 1
        seg_end = m if j >= lres.shape[0] else lres[j]
        lo = max(n, n_c0)
        hi_ = min(seg_end, last + delay - i0)
        for h in range(lo, hi_):
            c = i0 + h - delay
            p = delay_p[c % window]
            cr = np.float32(p.real)
            ci = np.float32(p.imag)
            k = a + h - delay                  # index of sample c in this call's x
            if k >= 0:
                yr, yi = _derotate(xf[2 * k], xf[2 * k + 1], cr, ci)
            else:
                yr, yi = _derotate(dxf[2 * (a + h)], dxf[2 * (a + h) + 1], cr, ci)
            of[2 * (a + h)] = yr
            of[2 * (a + h) + 1] = yi
            if want_ref:
                ref[a + h] = complex(cr, ci)
            if want_phase:
                phase[a + h] = np.arctan2(np.float64(ci), np.float64(cr))
            if want_freq:
                freq[a + h] = delay_f[c % window]
        n = seg_end
    return last


# --- the kernel --------------------------------------------------------------------------

@njit(nogil=True, cache=True, error_model="numpy")
def feedforward(x, out, ref, freq, phase, resets, state, ring_re, ring_im, suffix_re, suffix_im,
                delay_x, delay_p, delay_f, hist_re, hist_im, scratch, scratch32, codes,
                power, window, weighting, rot_re, rot_im, roots_re, roots_im):
    """Run the estimator over ``x`` (complex64, contiguous), writing corrected samples to
    ``out`` (complex64).

    ``ref`` (complex64), ``freq`` (float32, rad/sample), ``phase`` (float32, rad in
    (-pi, pi]) are the diagnostic outputs; pass zero-length arrays to skip them.
    ``resets``: increasing indices into ``x`` of samples that start a new segment
    (overwritten: made relative to each piece of PIECE samples).
    ``rot`` = e^{-j M point_angle}; ``roots`` = e^{j 2 pi k / M}, k = 0..M-1.
    The arrays between ``state`` and ``power`` are those of FeedforwardBuffers.arrays().
    Returns the number of samples processed.
    """
    n_items = x.shape[0]
    delay = window // 2
    want_ref = ref.shape[0] > 0
    want_freq = freq.shape[0] > 0
    want_phase = phase.shape[0] > 0
    xf = x.view(np.float32)
    of = out.view(np.float32)
    dxf = delay_x.view(np.float32)
    reff = ref.view(np.float32)
    first_reset = 0
    for a in range(0, n_items, PIECE):
        b = min(a + PIECE, n_items)
        m = b - a
        last_reset = first_reset
        while last_reset < resets.shape[0] and resets[last_reset] < b:
            last_reset += 1
        for r in range(first_reset, last_reset):   # piece-relative, in place: no allocation
            resets[r] -= a
        lres = resets[first_reset:last_reset]
        first_reset = last_reset
        tr = scratch[0, :m]
        ti = scratch[1, :m]
        sr = scratch[2, :m]
        si = scratch[3, :m]
        sc = scratch[4, :m]
        rf = scratch32[0, :2 * m]           # principal roots, re and im interleaved
        pr = scratch32[1, :m]
        pi_ = scratch32[1, PIECE:PIECE + m]
        code = codes[0, :m]
        kk = codes[1, :m]
        i0 = np.int64(state[S_TOTAL])       # absolute index of the piece's first sample
        p0r = state[S_P_RE]
        p0i = state[S_P_IM]
        # 1. terms
        gaps = _mth_power_terms(xf[2 * a:2 * b], power, weighting, tr, ti, sc)
        # 2. window sums (serial)
        _sliding_sums(tr, ti, lres, state, ring_re, ring_im, suffix_re, suffix_im, window, sr, si)
        # 3. rotation, exact scaling, principal roots, decisions
        _rotate_scale(sr, si, rot_re, rot_im)
        zeros = _roots_and_decisions(sr, si, state[S_W_RE], state[S_W_IM], power, rf, code)
        # 4. unwrapping index (serial)
        _unwrap_index(code, sr, si, lres, zeros, state, power, kk, codes[0].view(np.uint64),
                      codes[1].view(np.uint64))
        # 5. phasors
        _phasors(rf, kk, power, roots_re, roots_im, pr, pi_)
        if zeros > 0:
            _hold(code, pr, pi_, p0r, p0i)
        # outputs: n < n_c0 have no input sample yet (c < 0); n < n_x take it from delay_x
        n_c0 = min(max(delay - i0, 0), m)
        n_x = min(max(delay - a, n_c0), m)
        opf = of[2 * a:2 * b]
        for n in range(2 * n_c0):
            opf[n] = 0.0
        _correct(dxf[2 * (a + n_c0):2 * (a + n_x)], pr[n_c0:n_x], pi_[n_c0:n_x], opf[2 * n_c0:2 * n_x])
        _correct(xf[2 * (a + n_x - delay):2 * (b - delay)], pr[n_x:], pi_[n_x:], opf[2 * n_x:])
        if want_ref:
            for n in range(n_c0):
                ref[a + n] = 1.0
            for n in range(n_c0, m):
                reff[2 * (a + n)] = pr[n]
                reff[2 * (a + n) + 1] = pi_[n]
        if want_phase:
            for n in range(n_c0):
                phase[a + n] = 0.0
            for n in range(n_c0, m):
                phase[a + n] = np.arctan2(np.float64(pi_[n]), np.float64(pr[n]))
        # frequency diagnostic (serial): phase advance over the last min(since, W) estimates
        since = np.int64(state[S_SINCE_RESET])
        fr = state[S_FREQ]
        fr_at_reset = sc                    # (scratch) fr before each reset of the piece
        if want_freq:
            j = 0
            for n in range(m):
                i = i0 + n
                if j < lres.shape[0] and lres[j] <= n:
                    fr_at_reset[j] = fr               # for the samples still in the delay
                    while j < lres.shape[0] and lres[j] <= n:
                        j += 1
                    since = 0
                    fr = 0.0
                lag = window if since >= window else since
                cr = np.float64(pr[n])
                ci = np.float64(pi_[n])
                if lag > 0:
                    slot = (i - lag) % window
                    hr = hist_re[slot]
                    hi = hist_im[slot]
                    fr = np.arctan2(ci * hr - cr * hi, cr * hr + ci * hi) / lag
                else:
                    fr = 0.0
                hist_re[i % window] = cr
                hist_im[i % window] = ci
                freq[a + n] = fr if n >= n_c0 else 0.0
                since += 1
        elif lres.shape[0] > 0:
            since = m - lres[lres.shape[0] - 1]
            fr = 0.0
        else:
            since += m
        # resets: the samples still in the delay get the last estimate of their own segment
        last = _held_outputs(xf, dxf, a, m, i0, n_c0, lres, np.int64(state[S_LAST_RESET]), delay,
                             window, p0r, p0i, pr, pi_, fr_at_reset, delay_p, delay_f, of, ref, freq,
                             phase, want_ref, want_freq, want_phase)
        state[S_LAST_RESET] = last
        state[S_SINCE_RESET] = min(since, SATURATE)
        state[S_FREQ] = fr
        state[S_GAPS] += gaps
        state[S_TOTAL] = i0 + m
        if m > 0:
            state[S_P_RE] = pr[m - 1]
            state[S_P_IM] = pi_[m - 1]
    # the last ``delay`` input samples for the next call
    if delay > 0:
        if n_items >= delay:
            for j in range(delay):
                delay_x[j] = x[n_items - delay + j]
        else:
            for j in range(delay - n_items):
                delay_x[j] = delay_x[j + n_items]
            for j in range(n_items):
                delay_x[delay - n_items + j] = x[j]
    return n_items
