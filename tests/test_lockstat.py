# SPDX-License-Identifier: GPL-3.0-or-later
"""Lock statistic, thresholds, detection prediction and M2M4 estimator
(coherer.lockstat) against REFERENCES.md sections 7 and 8 and independent
numerics. Kernels are checked against plain numpy reference implementations."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, special, stats

from gnuradio.coherer import lockstat as L


def db(x):
    return 10.0 ** (x / 10.0)


# --- c_M (REFERENCES 7.1) -----------------------------------------------------------

# REFERENCES 7.1 table; closed form [MEM there], values [NUM]; given to 5 decimals.
C_M_TABLE = {
    1: (0.71027, 0.92798, 0.97390, 0.99749),
    2: (0.36788, 0.75350, 0.90000, 0.99000),
    4: (0.05696, 0.35738, 0.65999, 0.96060),
    8: (0.00039, 0.03075, 0.20393, 0.85153),
}


@pytest.mark.parametrize("power", [1, 2, 4, 8])
def test_c_m_table(power):
    # REFERENCES.md 7.1 table of c_M at 0/6/10/20 dB (closed form from memory, checked numerically there).
    got = [L.c_m(power, db(d)) for d in (0.0, 6.0, 10.0, 20.0)]
    np.testing.assert_allclose(got, C_M_TABLE[power], atol=5e-6)   # table rounding: half a unit in the 5th decimal


def _phase_pdf(theta, rho):
    """Phase pdf of a unit tone in complex Gaussian noise at SNR rho (from memory:
    the classical result, e.g. Proakis & Salehi, Digital Communications, ch. 4)."""
    c = np.cos(theta)
    return np.exp(-rho) / (2 * np.pi) * (
        1 + np.sqrt(4 * np.pi * rho) * c * np.exp(rho * c * c) * stats.norm.cdf(np.sqrt(2 * rho) * c))


@pytest.mark.parametrize("rho", [0.5, 2.0, 10.0, 60.0])
@pytest.mark.parametrize("power", [1, 2, 3, 4, 8])
def test_c_m_equals_fourier_coefficient_of_phase_pdf(power, rho):
    # c_M is the M-th Fourier coefficient of the phase pdf (REFERENCES 7.1 [NUM]); independent numerical
    # integration of the pdf (formula from memory, see _phase_pdf). quad accuracy ~1e-12.
    total = integrate.quad(_phase_pdf, -np.pi, np.pi, args=(rho,), epsabs=1e-13, limit=400)[0]
    coef = integrate.quad(lambda t: np.cos(power * t) * _phase_pdf(t, rho), -np.pi, np.pi,
                          epsabs=1e-13, limit=400)[0]
    assert total == pytest.approx(1.0, abs=1e-10)
    assert L.c_m(power, rho) == pytest.approx(coef, abs=1e-10)


@pytest.mark.parametrize("rho", [0.1, 1.0, 3.0, 30.0])
def test_c_2_closed_form(rho):
    # REFERENCES 7.1: c_2(rho) = 1 - (1 - e^-rho)/rho [DER, NUM]; pure arithmetic -> rel 1e-9.
    assert L.c_m(2, rho) == pytest.approx(1 - (1 - np.exp(-rho)) / rho, rel=1e-9)


def test_projection_variance_noise_only():
    # Noise only: variance of cos(M * uniform) is 1/2 for every M (REFERENCES 7.2).
    for power in (1, 2, 4, 8):
        assert L.projection_variance(power, 0.0) == pytest.approx(0.5, abs=1e-12)


# --- thresholds (REFERENCES 7.2) ----------------------------------------------------

@pytest.mark.parametrize("window,values", [
    (100, (0.16450, 0.21851, 0.33612)),
    (1000, (0.05202, 0.06910, 0.10629)),
    (10000, (0.01645, 0.02185, 0.03361)),
])
def test_false_lock_threshold(window, values):
    # REFERENCES.md 7.2: gamma = Qinv(P_FA)/sqrt(2N) [DER] at P_FA 1e-2, 1e-3, 1e-6; given to 5 decimals.
    got = [L.false_lock_threshold(window, p) for p in (1e-2, 1e-3, 1e-6)]
    np.testing.assert_allclose(got, values, atol=5e-6)
    for g, p in zip(got, (1e-2, 1e-3, 1e-6)):
        assert L.false_lock_probability(window, g) == pytest.approx(p, rel=1e-9)


def test_default_thresholds():
    # Documented rule: lock at P_FA 1e-6, unlock at 1e-2 per window (REFERENCES 7.2 formula);
    # Qinv from scipy.stats.norm.isf as the external oracle.
    for window in (32, 1024, 4096):
        lock, unlock = L.default_thresholds(window)
        assert lock == pytest.approx(stats.norm.isf(1e-6) / np.sqrt(2 * window), rel=1e-12)
        assert unlock == pytest.approx(stats.norm.isf(1e-2) / np.sqrt(2 * window), rel=1e-12)
        assert 0 < unlock < lock


def test_threshold_validation():
    with pytest.raises(ValueError, match="p_fa"):
        L.false_lock_threshold(100, 0.0)
    with pytest.raises(ValueError, match="p_fa"):
        L.false_lock_threshold(100, 0.7)


def test_detection_probability_reference_cases():
    # REFERENCES.md 7.2 [DER/NUM]: N=1000, P_FA 1e-3: M=4 0 dB mean 0.05696, std 0.02229, P_D 0.293;
    # M=4 2 dB P_D 0.984; M=8 6 dB P_D 0.043 (values given to 3 digits).
    gamma = L.false_lock_threshold(1000, 1e-3)
    assert L.c_m(4, 1.0) == pytest.approx(0.05696, abs=5e-6)
    assert np.sqrt(L.projection_variance(4, 1.0) / 1000) == pytest.approx(0.02229, abs=5e-6)
    assert L.detection_probability(4, 1.0, 1000, gamma) == pytest.approx(0.293, abs=5e-4)
    assert L.detection_probability(4, db(2.0), 1000, gamma) == pytest.approx(0.984, abs=5e-4)
    assert L.detection_probability(8, db(6.0), 1000, gamma) == pytest.approx(0.043, abs=5e-4)


def test_detection_probability_with_phase_error_mean():
    # Mean of P is cos(M phi) c_M (REFERENCES 7.1); the Gaussian prediction is centred on it,
    # so a threshold equal to that mean is exceeded with probability exactly 1/2.
    rho, power, window, phi = db(6.0), 2, 500, 0.2
    mean = np.cos(power * phi) * L.c_m(power, rho)
    assert L.detection_probability(power, rho, window, mean, phi) == pytest.approx(0.5, abs=1e-12)


# --- M2M4 (REFERENCES 8) ---------------------------------------------------------

def test_m2m4_exact_moments():
    # REFERENCES.md 8 exactness check (Pauluzzi & Beaulieu 2000 estimator, true moments):
    # 0 dB: M2=2, M4=7 -> 1; 10 dB: M2=1.1, M4=1.42 -> 10 (rel 1e-9);
    # -5 dB: M2=4.16228, M4=33.64911 -> 0.316228 (inputs rounded to 6 digits, which the
    # estimator amplifies about 10x -> rel 1e-4); with unrounded moments M2 = 1 + 1/rho,
    # M4 = 1 + 4/rho + 2/rho^2 (REFERENCES 8 [DER]) it is exact to rel 1e-9.
    assert L.m2m4_esn0(2.0, 7.0) == pytest.approx(1.0, rel=1e-9)
    assert L.m2m4_esn0(1.1, 1.42) == pytest.approx(10.0, rel=1e-9)
    assert L.m2m4_esn0(4.16228, 33.64911) == pytest.approx(0.316228, rel=1e-4)
    for rho in (db(-5.0), db(3.0), db(20.0)):
        n0 = 1.0 / rho
        assert L.m2m4_esn0(1 + n0, 1 + 4 * n0 + 2 * n0 * n0) == pytest.approx(rho, rel=1e-9)


def test_m2m4_edges():
    # 2 M2^2 - M4 < 0 is clipped to 0 (REFERENCES 8) -> Es/N0 = 0; no noise -> inf; no power -> NaN.
    assert L.m2m4_esn0(1.0, 3.0) == 0.0
    assert L.m2m4_esn0(1.0, 1.0) == np.inf
    assert np.isnan(L.m2m4_esn0(0.0, 0.0))
    assert L.esn0_db(0.0) == L.ESN0_DB_MIN
    assert L.esn0_db(np.inf) == L.ESN0_DB_MAX
    assert np.isnan(L.esn0_db(np.nan))
    np.testing.assert_allclose(L.esn0_db(np.array([1.0, 10.0])), [0.0, 10.0])


# --- kernels ------------------------------------------------------------------------

def _reference_windows(x, power, point_angle, window, sps=1):
    """Obvious numpy implementation of the per-window, per-phase sums (complete windows only):
    arrays (windows, sps) of in-phase and quadrature projection, |y|^2, |y|^4, valid count,
    and the in-phase sums of the four quarters (position i of a window is in quarter
    floor(4 i / window))."""
    k = len(x) // window
    z = x[:k * window].astype(np.complex128).reshape(k, window // sps, sps)
    p = np.abs(z) ** 2
    ok = np.isfinite(p) & (p > 0)
    with np.errstate(invalid="ignore"):
        ang = power * (np.angle(z) - point_angle)
        proj = np.where(ok, np.cos(ang), 0.0)
        quad = np.where(ok, np.sin(ang), 0.0)
    position = np.arange(window).reshape(window // sps, sps)
    quarters = [np.where((4 * position // window == j)[None], proj, 0.0).sum(1) for j in range(4)]
    return (proj.sum(1), quad.sum(1), np.where(ok, p, 0).sum(1), np.where(ok, p * p, 0).sum(1),
            ok.sum(1), *quarters)


def _kernel_windows(x, power, point_angle, window, splits=(), sps=1):
    """window_sums over ``x`` split at the given sample offsets (window boundaries);
    returns the five fields as (windows, sps) arrays."""
    rot = np.exp(-1j * power * point_angle)
    rows = []
    for chunk in np.split(x, list(splits)):
        sums = np.empty((len(chunk) // window + 1, sps, L.SUM_FIELDS))
        k = L.window_sums(chunk, power, rot.real, rot.imag, window, sps, sums)
        assert k == len(chunk) // window
        rows.append(sums[:k])
    sums = np.concatenate(rows)
    return [sums[:, :, f] for f in range(L.SUM_FIELDS)]


@pytest.mark.parametrize("sps", [1, 4])
@pytest.mark.parametrize("power,point_angle", [(1, 0.3), (2, 0.0), (4, np.pi / 4), (8, 0.0), (5, -1.0)])
def test_window_sums_match_reference(power, point_angle, sps):
    rng = np.random.default_rng(power)
    x = (rng.standard_normal(5000) + 1j * rng.standard_normal(5000)).astype(np.complex64) * 3.0
    x[[10, 200, 4000]] = [np.nan, np.inf, 0.0]
    got = _kernel_windows(x, power, point_angle, 64, sps=sps)
    ref = _reference_windows(x, power, point_angle, 64, sps)
    assert got[0].shape == (5000 // 64, sps)      # the trailing partial window is not used
    for g, r in zip(got, ref):
        np.testing.assert_allclose(g, r, rtol=1e-9, atol=1e-9)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(0, 30), max_size=6), st.integers(0, 7), st.sampled_from([1, 2, 4, 8, 3]),
       st.sampled_from([1, 4]))
def test_window_sums_depend_only_on_the_window(cuts, shift, power, sps):
    # The SIMD sums must be bit-identical whatever the split into calls (cuts at window
    # boundaries) and the memory alignment of the buffer (shift by 0..7 samples), so
    # decisions never depend on chunking.
    rng = np.random.default_rng(7)
    window = 100
    x = (rng.standard_normal(3000) + 1j * rng.standard_normal(3000)).astype(np.complex64)
    x[[5, 1234]] = [np.nan, 0.0]
    whole = _kernel_windows(x, power, np.pi / 4, window, sps=sps)
    buffer = np.empty(len(x) + 8, np.complex64)
    moved = buffer[shift:shift + len(x)]
    moved[:] = x
    split = _kernel_windows(moved, power, np.pi / 4, window, sorted(window * c for c in cuts), sps=sps)
    for a, b in zip(whole, split):
        np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("power", [1, 2, 4, 8])
def test_noise_only_statistic_variance(power):
    # REFERENCES 7.2: on white noise the window mean P has mean 0 and variance exactly 1/(2N),
    # any M; the quadrature mean Q the same. 20000 windows: the sample variance has relative
    # standard error sqrt(2/K) = 1 %; 4 s.e. -> 4 %. The mean's standard error is
    # sqrt(1/(2N)/K); 4 s.e. bound.
    rng = np.random.default_rng(100 + power)
    window, k = 64, 20000
    x = rng.standard_normal(2 * window * k, dtype=np.float32).view(np.complex64)
    proj, quad, *_ = _kernel_windows(x, power, 0.0, window)
    for s in (proj[:, 0] / window, quad[:, 0] / window):
        assert len(s) == k
        assert abs(s.mean()) < 4 * np.sqrt(1 / (2 * window) / k)
        assert s.var() * 2 * window == pytest.approx(1.0, abs=4 * np.sqrt(2 / k))


def test_unit_projection():
    rot = np.exp(-1j * 4 * np.pi / 4)
    v, ok = L.unit_projection(complex(3.0, 3.0), 4, rot)
    assert ok and v == pytest.approx(1.0, abs=1e-12)   # a QPSK point on the diagonal
    v, ok = L.unit_projection(complex(np.nan, 0.0), 4, rot)
    assert not ok and v == 0.0
    v, ok = L.unit_projection(0j, 2, 1.0 + 0j)
    assert not ok and v == 0.0


# --- the shared lock rule -----------------------------------------------------------

def _median_rule_exceedance(c, k):
    """P(I >= c sqrt(m)), I ~ N(0,1), m the ((k+1)//2)-th smallest of k chi-square(1) values:
    by Monte Carlo-free numerical integration over the order statistic in its own variable
    x (density k!/((j-1)!(k-j)!) F^(j-1) (1-F)^(k-j) f), a different route from the table's
    integral over u = F(x) (scipy.stats and scipy.integrate as the oracles)."""
    j = (k + 1) // 2
    coef = np.exp(special.gammaln(k + 1) - special.gammaln(j) - special.gammaln(k - j + 1))
    def f(x):
        F = stats.chi2.cdf(x, 1)
        return (stats.norm.sf(c * np.sqrt(x)) * coef * F ** (j - 1) * (1 - F) ** (k - j)
                * stats.chi2.pdf(x, 1))
    # chi-square(1) mass beyond x = 80 is 2e-19, far below the 1e-4 relative check
    return integrate.quad(f, 0, 80.0, limit=400, epsabs=0, epsrel=1e-9, points=[1e-9, 1e-4, 1.0])[0]


def test_threshold_table():
    # t[0] = Qinv(P_FA)/sqrt(2N) (REFERENCES 7.2); t[1] = tan(pi (1/2 - P_FA)): I/|Q| is then a
    # ratio of two standard normals, Cauchy distributed (a textbook result, from memory);
    # other entries re-derived by integration over the order statistic (see above).
    t = L.threshold_table(256, 1e-6)
    assert len(t) == L.REFERENCE_VALUES + 1
    assert t[0] == pytest.approx(stats.norm.isf(1e-6) / np.sqrt(512), rel=1e-12)
    for p in L.NOISE_REFERENCED_P_FA:
        assert L.threshold_table(256, p)[1] == pytest.approx(np.tan(np.pi * (0.5 - p)), rel=1e-8)
    for p, k in ((1e-6, 9), (1e-2, 40), (1e-1, L.REFERENCE_VALUES)):
        c = L.threshold_table(256, p)[k]
        assert _median_rule_exceedance(c, k) == pytest.approx(p, rel=1e-4)
    fixed = L.threshold_table(256, 1e-6, 0.3)
    assert fixed[0] == 0.3 and not fixed[1:].any()
    with pytest.raises(ValueError, match="p_fa"):
        L.threshold_table(256, 1e-3)


def test_median_rule_false_alarm_monte_carlo():
    # Independent check of one tabulated factor by simulation: k = 16 windows, P_FA 1e-2;
    # 400000 trials, binomial standard error 1.6e-4, band 4 s.e.
    rng = np.random.default_rng(17)
    k, n = 16, 400_000
    c = L.threshold_table(64, 1e-2)[k]
    m = np.sort(rng.standard_normal((n, k)) ** 2, axis=1)[:, (k + 1) // 2 - 1]
    rate = np.mean(rng.standard_normal(n) >= c * np.sqrt(m))
    assert rate == pytest.approx(1e-2, abs=4 * np.sqrt(1e-2 * 0.99 / n))


def _reference_rule(metrics, contrasts, lock_table, unlock_table, state):
    """Plain-Python form of the documented rule: threshold max(t[0], t[k] sqrt(lower median of
    the last k <= K squared null contrasts of the EARLIER windows, non-finite ones skipped));
    no lock from a noise-referenced table before one contrast has been seen."""
    out, history = [], []
    for m, ds in zip(metrics, contrasts):
        k = len(history)
        scale = np.sqrt(sorted(history)[(k + 1) // 2 - 1]) if k else 0.0
        if state:
            state = m >= (max(unlock_table[0], unlock_table[k] * scale) if k else unlock_table[0])
        elif k:
            state = m >= max(lock_table[0], lock_table[k] * scale)
        else:
            state = lock_table[1] == 0 and m >= lock_table[0]
        history = (history + [d * d for d in ds if np.isfinite(d)])[-L.REFERENCE_VALUES:]
        out.append(bool(state))
    return out


_contrast = st.one_of(st.floats(-0.3, 0.3), st.just(float("nan")))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(-0.2, 1.0), st.tuples(_contrast, _contrast, _contrast)),
                max_size=120),
       st.booleans(), st.booleans())
def test_update_lock_matches_reference(windows, start, fixed):
    lock = L.threshold_table(64, 1e-2, 0.4 if fixed else None)
    unlock = L.threshold_table(64, 1e-1, 0.2 if fixed else None)
    ref = L.new_noise_reference()
    state, got = start, []
    for m, ds in windows:
        state = L.update_lock(state, m, *ds, ref, lock, unlock)
        got.append(bool(state))
    assert got == _reference_rule([m for m, _ in windows], [ds for _, ds in windows], lock, unlock,
                                  start)


def _numpy_contrasts(quarter_i, quarter_q, counts):
    """The three null contrasts from quarter sums and the number of positions in each quarter,
    written out plainly: complex differences of means scaled by 1/sqrt(N (1/n_a + 1/n_b)),
    projected on the unit phasor of the window sum (the real axis if that is zero)."""
    z = np.asarray(quarter_i, float) + 1j * np.asarray(quarter_q, float)
    n = np.asarray(counts, float)
    total = n.sum()
    w = z.sum()
    u = w / abs(w) if w != 0 else 1.0
    def diff(sa, na, sb, nb):
        return ((sa / na - sb / nb) / np.sqrt(total * (1 / na + 1 / nb)) * np.conj(u)).real
    return (diff(z[0], n[0], z[1], n[1]), diff(z[2], n[2], z[3], n[3]),
            diff(z[0] + z[1], n[0] + n[1], z[2] + z[3], n[2] + n[3]))


def _quarters(fields, i):
    """Quarter in-phase and quadrature sums of window i (timing phase 0) from _kernel_windows."""
    return (np.array([f[i, 0] for f in fields[L.SUM_I0:L.SUM_I0 + 4]]),
            np.array([f[i, 0] for f in fields[L.SUM_Q0:L.SUM_Q0 + 4]]))


@pytest.mark.parametrize("window, sps, phase", [(64, 1, 0), (100, 1, 0), (96, 4, 3), (90, 3, 1),
                                                 (1022, 2, 0)])
def test_null_contrasts_match_reference(window, sps, phase):
    rng = np.random.default_rng(window + phase)
    qi, qq = rng.standard_normal(4), rng.standard_normal(4)
    position = np.arange(window)
    counts = [np.sum((4 * position // window == j) & (position % sps == phase)) for j in range(4)]
    got = L.null_contrasts(qi, qq, window, phase, sps)
    np.testing.assert_allclose(got, _numpy_contrasts(qi, qq, counts), rtol=1e-12)
    # a window that stands still (equal quarter means, any phase) has no contrast
    still = L.null_contrasts(0.7 * np.array(counts, float), -0.2 * np.array(counts, float),
                             window, phase, sps)
    np.testing.assert_allclose(still, 0.0, atol=1e-15)


@pytest.mark.parametrize("power", [1, 2, 8])
def test_null_contrasts_have_the_metric_variance_on_white_noise(power):
    # REFERENCES 7.2: on white noise P has variance 1/(2N); each contrast is a difference of
    # independent quarter means scaled to the same variance, projected on a direction
    # uncorrelated with it (exact for Gaussian sums; quarters of 64 samples here, where the
    # unit-modulus samples are close to that). 8000 windows, 24000 contrasts: relative s.e. of
    # the variance sqrt(2/24000) = 0.9 %, 4 s.e.
    rng = np.random.default_rng(500 + power)
    window, k = 256, 8000
    x = rng.standard_normal(2 * window * k, dtype=np.float32).view(np.complex64)
    fields = _kernel_windows(x, power, 0.0, window)
    d = np.array([L.null_contrasts(*_quarters(fields, i), window, 0, 1) for i in range(k)])
    assert d.var() * 2 * window == pytest.approx(1.0, abs=4 * np.sqrt(2 / d.size))
    assert abs(np.corrcoef(d[:, 0], d[:, 2])[0, 1]) < 4 / np.sqrt(k)    # orthogonal contrasts


def test_update_lock_nan_unlocks():
    t_on, t_off = L.threshold_table(64, 1e-3, 0.5), L.threshold_table(64, 1e-3, 0.2)
    ref = L.new_noise_reference()
    states = [L.update_lock(s, m, 0.0, 0.0, 0.0, ref, t_on, t_off) for s, m in ((False, 0.9), (True, np.nan))]
    assert states == [True, False]


def _band_limited_noise(rng, n, taps):
    w = (rng.standard_normal(n + len(taps)) + 1j * rng.standard_normal(n + len(taps)))
    return np.convolve(w, taps, mode="valid")[:n].astype(np.complex64)


@pytest.mark.parametrize("power", [2, 4])
def test_noise_reference_scales_with_the_noise_spectrum(power):
    # REFERENCES 11.3-11.4: on band-limited noise the window mean of cos(M arg y) has a
    # variance (1/(2N)) sum_tau rho_M(tau) > 1/(2N) [derived]; the null contrasts of the
    # quarter sums have the same variance up to the documented bias of order L / (N/4) for a
    # correlation length L. Low-pass noise (scipy.signal.firwin, cut-off 1/16 of the rate, so
    # L of about 16 samples) in windows of 1024: var(P) is well above 1/(2N), and the contrasts'
    # variance matches it within sampling error (3000 windows: relative s.e. of var(P)
    # sqrt(2/3000) = 2.6 %, of the contrasts' 1.5 %; together 3 %; 4 s.e.) plus a 16/256 bias
    # allowance on the low side.
    from scipy import signal
    rng = np.random.default_rng(300 + power)
    window, k = 1024, 3000
    x = _band_limited_noise(rng, window * k, signal.firwin(129, 1 / 16))
    fields = _kernel_windows(x, power, 0.0, window)
    vp = np.var(fields[L.SUM_I][:, 0] / window)
    d = np.array([L.null_contrasts(*_quarters(fields, i), window, 0, 1) for i in range(k)])
    assert vp * 2 * window > 3.0                    # the white-noise variance would be badly wrong
    sigma = 4 * np.sqrt(2 / k + 2 / d.size)
    assert 1.0 - sigma - 16 / 256 < d.var() / vp < 1.0 + sigma



@pytest.mark.parametrize("seed", [0, 1, 2])
def test_noise_scale_is_the_lower_median_of_the_last_values(seed):
    # Definition (the module docstring): the square root of the lower median of the last
    # REFERENCE_VALUES finite squared contrasts; checked after every push against numpy's
    # sort of them, over a ring that wraps about ten times, with NaNs (skipped) and with
    # values that repeat exactly (so equal entries must leave the ordered copy correctly).
    rng = np.random.default_rng(seed)
    contrasts = rng.standard_normal(1200)
    contrasts[rng.random(1200) < 0.1] = np.nan
    repeat = rng.random(1200) < 0.2
    contrasts[repeat] = rng.choice([0.5, -0.5, 1.25], repeat.sum())
    ref = L.new_noise_reference()
    history = []
    for d in contrasts:
        L.push_contrast(ref, d)
        if np.isfinite(d):
            history = (history + [d * d])[-L.REFERENCE_VALUES:]
        scale, count = L.noise_scale(ref)
        assert count == len(history)
        want = np.sqrt(np.sort(history)[(len(history) + 1) // 2 - 1]) if history else 0.0
        assert scale == want
