/* SPDX-License-Identifier: GPL-3.0-or-later
 *
 * Plain C reference of the gr-coherer M-th power carrier loop, used by
 * `coherer bench` as the compiled-code yardstick. It runs the same recursion as
 * python/coherer/_loop_kernel.py in float64, written the straightforward way:
 * one sin/cos of the NCO phase per sample, one loop-filter update per block of
 * BLOCK samples.
 *
 *   y   = x e^{-j theta}                          derotate (theta += acc1 within a block)
 *   d   = (y_lim / sqrt(M2))^M e^{-j M point_angle}  M-th power detector (repeated squaring)
 *   e   = mean over the block of Im(d) / (S/M2)^(M/2)  normalised by the M2M4 signal estimate
 *   acc2 += L K3 e; acc1 += L K2 e + L acc2        at the block end (L = BLOCK; clamped)
 *   theta += L K1 e + acc1                         the block's last step
 *
 * The moments are exponential averages per sample (weights within a block
 * precomputed); the normalisation (1/sqrt(M2), (S/M2)^(M/2), limiter level) is
 * recomputed from them at a block end every NORM_BLOCK samples once the moment
 * weight reaches MW_SETTLED, every block before, as in the kernel.
 *
 * Gaps (non-finite or zero samples) add nothing to the sums and output 0; a sample
 * whose power exceeds LIMIT * M2 is limited to that power before the detector; a
 * lasting level step (LEVEL_STEP in power, 64-sample average, checked at block ends)
 * restarts the moments; the loop stays open in a block that starts before the moment
 * weight reaches START_MW; e is clipped to +-E_MAX per sample and its block mean to
 * +-E_MAX / BLOCK. The lock indicator and slip tracker of the block are not part of
 * this reference.
 *
 * Usage:
 *   reference_loop IN.cf32 M K1 K2 K3 ROT_RE ROT_IM FMIN FMAX ALPHA SIG2_FLOOR START_MW E_MAX
 *                  BLOCK FREQ0 REPS [OUT.cf32]
 * IN/OUT are interleaved little-endian float32 I/Q. The loop runs REPS times over the
 * whole input, each time from the same initial state (phase 0, frequency FREQ0 rad/sample).
 * Prints one line per repetition: "rep <i> seconds <wall> cpu_seconds <cpu> msps <r>", then
 * "final phase <rad> freq <rad/sample>". File I/O is outside the timed region.
 */
#define _GNU_SOURCE
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

/* The kernel's constants; creference.py passes the kernel's values with -D. */
#ifndef LIMIT
#define LIMIT 100.0
#endif
#ifndef FAST_ALPHA
#define FAST_ALPHA (1.0 / 64.0)
#endif
#ifndef LEVEL_STEP
#define LEVEL_STEP 4.0
#endif
#ifndef NORM_BLOCK
#define NORM_BLOCK 16
#endif
#ifndef MW_SETTLED
#define MW_SETTLED 0.5
#endif

typedef struct { double re, im; } cplx;

static double clock_s(clockid_t clock)
{
    struct timespec ts;
    clock_gettime(clock, &ts);
    return ts.tv_sec + 1e-9 * ts.tv_nsec;
}

static cplx cmul(cplx a, cplx b)
{
    cplx r = { a.re * b.re - a.im * b.im, a.re * b.im + a.im * b.re };
    return r;
}

static cplx cpow_int(cplx z, int m)
{
    cplx result = { 1.0, 0.0 }, base = z;
    while (m > 0) {
        if (m & 1)
            result = cmul(result, base);
        base = cmul(base, base);
        m >>= 1;
    }
    return result;
}

typedef struct {
    int power, block;
    double k1, k2, k3, fmin, fmax, alpha, sig2_floor, start_mw, e_max;
    cplx rot;
} params_t;

typedef struct { double phase, acc1, acc2, m2, m4, mw, fast_m2, norm_left, inv_rms, inv_norm, cap; } state_t;

static double half_power(double u, int m)
{
    double result = 1.0, base = u;
    for (int k = m >> 1; k > 0; k >>= 1) {
        if (k & 1)
            result *= base;
        base *= base;
    }
    return (m & 1) ? result * sqrt(u) : result;
}

static void run_loop(const float *x, float *out, long n, const params_t *p, state_t *s)
{
    double phase = s->phase, acc1 = s->acc1, acc2 = s->acc2;
    double m2 = s->m2, m4 = s->m4, mw = s->mw, fast_m2 = s->fast_m2;
    double norm_left = s->norm_left, inv_rms = s->inv_rms, inv_norm = s->inv_norm, cap = s->cap;
    const int L = p->block;
    const double decay_m = pow(1.0 - p->alpha, L), decay_f = pow(1.0 - FAST_ALPHA, L);
    double *w = malloc(L * sizeof(double)), *wf = malloc(L * sizeof(double));
    for (int t = 0; t < L; t++) {       /* the exponential averages' weights within a block */
        w[t] = p->alpha * pow(1.0 - p->alpha, L - 1 - t);
        wf[t] = FAST_ALPHA * pow(1.0 - FAST_ALPHA, L - 1 - t);
    }
    for (long b0 = 0; b0 < n; b0 += L) {
        /* one update block: every sample at the NCO frequency acc1, one sin/cos each */
        double e_gain = mw >= p->start_mw ? inv_norm : 0.0, cap_now = cap > 0.0 ? cap : INFINITY;
        double s_e = 0.0, s_valid = 0.0, s_p = 0.0, s_m2 = 0.0, s_m4 = 0.0, s_mw = 0.0, s_fast = 0.0;
        long end = b0 + L < n ? b0 + L : n;
        for (long i = b0; i < end; i++) {
            double c = cos(phase), sn = sin(phase);
            double xr = x[2 * i], xi = x[2 * i + 1];
            double pw = xr * xr + xi * xi;
            if (!isfinite(pw) || pw == 0.0) {
                out[2 * i] = 0.0f;
                out[2 * i + 1] = 0.0f;
            } else {
                cplx y = { xr * c + xi * sn, xi * c - xr * sn };
                out[2 * i] = (float)y.re;
                out[2 * i + 1] = (float)y.im;
                if (pw > cap_now) {
                    double scale = sqrt(cap_now / pw);
                    y.re *= scale;
                    y.im *= scale;
                    pw = cap_now;
                }
                s_valid += 1.0;
                s_p += pw;
                s_m2 += w[i - b0] * pw;
                s_m4 += w[i - b0] * pw * pw;
                s_mw += w[i - b0];
                s_fast += wf[i - b0] * pw;
                cplx yn = { y.re * inv_rms, y.im * inv_rms };
                cplx d = cmul(cpow_int(yn, p->power), p->rot);
                double e = d.im * e_gain;
                s_e += e > p->e_max ? p->e_max : (e < -p->e_max ? -p->e_max : e);
            }
            if (i < b0 + L - 1)
                phase += acc1;
        }
        if (end < b0 + L)
            break;                              /* the stream ends inside a block */
        /* block end: loop filter on the mean error (one kick never exceeds pi / M) */
        double kick = 0.0;
        if (s_valid > 0.0) {
            double e = s_e / L, e_clip = p->e_max / L;
            e = e > e_clip ? e_clip : (e < -e_clip ? -e_clip : e);
            acc2 += L * p->k3 * e;
            acc1 += L * p->k2 * e + L * acc2;
            if (acc1 > p->fmax) {
                acc1 = p->fmax;
                if (acc2 > 0.0)
                    acc2 = 0.0;
            } else if (acc1 < p->fmin) {
                acc1 = p->fmin;
                if (acc2 < 0.0)
                    acc2 = 0.0;
            }
            kick = L * p->k1 * e;
        }
        phase += kick + acc1;
        if (phase >= M_PI || phase < -M_PI)
            phase -= 2.0 * M_PI * floor((phase + M_PI) / (2.0 * M_PI));
        /* moments, level-step restart, normalisation */
        norm_left -= L;
        if (s_valid > 0.0) {
            if (mw > 0.0) {
                fast_m2 = decay_f * fast_m2 + s_fast;
                double fw = fast_m2 * mw;
                if (fw > LEVEL_STEP * m2 || fw * LEVEL_STEP < m2) {
                    m2 = 0.0;
                    m4 = 0.0;
                    mw = 0.0;
                    cap = 0.0;
                    norm_left = 0.0;
                }
            } else {
                fast_m2 = s_p / s_valid;
            }
            m2 = decay_m * m2 + s_m2;
            m4 = decay_m * m4 + s_m4;
            mw = decay_m * mw + s_mw;
            if (norm_left <= 0.0 || mw < MW_SETTLED) {
                double mm2 = m2 / mw;
                double sig2 = 2.0 - (m4 / mw) / (mm2 * mm2);
                if (sig2 < p->sig2_floor)
                    sig2 = p->sig2_floor;
                inv_rms = 1.0 / sqrt(mm2);
                inv_norm = 1.0 / half_power(sqrt(sig2), p->power);
                cap = LIMIT * mm2;
                norm_left = NORM_BLOCK;
            }
        }
    }
    free(w);
    free(wf);
    s->phase = phase; s->acc1 = acc1; s->acc2 = acc2;
    s->m2 = m2; s->m4 = m4; s->mw = mw; s->fast_m2 = fast_m2;
    s->norm_left = norm_left; s->inv_rms = inv_rms; s->inv_norm = inv_norm; s->cap = cap;
}

int main(int argc, char **argv)
{
    if (argc != 17 && argc != 18) {
        fprintf(stderr, "usage: %s IN.cf32 M K1 K2 K3 ROT_RE ROT_IM FMIN FMAX ALPHA SIG2_FLOOR START_MW "
                "E_MAX BLOCK FREQ0 REPS [OUT.cf32]\n", argv[0]);
        return 2;
    }
    params_t p;
    p.power = atoi(argv[2]);
    p.k1 = atof(argv[3]); p.k2 = atof(argv[4]); p.k3 = atof(argv[5]);
    p.rot.re = atof(argv[6]); p.rot.im = atof(argv[7]);
    p.fmin = atof(argv[8]); p.fmax = atof(argv[9]); p.alpha = atof(argv[10]);
    p.sig2_floor = atof(argv[11]); p.start_mw = atof(argv[12]); p.e_max = atof(argv[13]);
    p.block = atoi(argv[14]);
    double freq0 = atof(argv[15]);
    int reps = atoi(argv[16]);
    if (p.power < 1 || reps < 1 || p.block < 1) {
        fprintf(stderr, "M, BLOCK and REPS must be >= 1\n");
        return 2;
    }

    FILE *f = fopen(argv[1], "rb");
    if (!f) { perror(argv[1]); return 2; }
    fseek(f, 0, SEEK_END);
    long n = ftell(f) / (2 * (long)sizeof(float));
    fseek(f, 0, SEEK_SET);
    float *x = malloc(n * 2 * sizeof(float)), *out = malloc(n * 2 * sizeof(float));
    if (!x || !out || (long)fread(x, 2 * sizeof(float), n, f) != n) {
        fprintf(stderr, "cannot read %s\n", argv[1]);
        return 2;
    }
    fclose(f);

    state_t s;
    for (int r = 0; r < reps; r++) {
        state_t fresh = { 0.0, freq0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0 };
        s = fresh;
        double t0 = clock_s(CLOCK_MONOTONIC), c0 = clock_s(CLOCK_PROCESS_CPUTIME_ID);
        run_loop(x, out, n, &p, &s);
        double dt = clock_s(CLOCK_MONOTONIC) - t0, dc = clock_s(CLOCK_PROCESS_CPUTIME_ID) - c0;
        printf("rep %d seconds %.9f cpu_seconds %.9f msps %.6f\n", r, dt, dc, n / dt / 1e6);
    }
    printf("final phase %.17g freq %.17g\n", s.phase, s.acc1);

    if (argc == 18) {
        FILE *g = fopen(argv[17], "wb");
        if (!g || (long)fwrite(out, 2 * sizeof(float), n, g) != n) {
            fprintf(stderr, "cannot write %s\n", argv[17]);
            return 2;
        }
        fclose(g);
    }
    free(x);
    free(out);
    return 0;
}
