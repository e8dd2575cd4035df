/* unf.c: a plain C build of sigmasim's generic U(N) heatbath and overrelaxation, for the
 * speed comparison in benchmarks/bench.py (N = 4, 5, 6 and any other N >= 2).
 *
 *   cc -O3 -march=native -fno-math-errno -std=gnu11 -fopenmp-simd -DNF=4 [-fopenmp] -o unf4 unf.c -lm
 *   ./unf4 [--algo hb|or|hbor] [--nor 3] [--L 16] [--sweeps N] [--therm N] [--seed S]
 *          [--beta 0.5] [--h 0.1] [--kappa 0.2] [--theta 3.0] [--layout chunk|site] [--impl NAME]
 *
 * Model (sigmasim.models.chiral, theta placed in the mass term):
 *   S = -beta sum_{x,mu} Re Tr(U_x^+ U_{x+mu}) - sum_x Re Tr(H U_x) - kappa sum_x 2 Re det U_x,
 *   H = e^{i theta / N} h 1,  on an L^3 periodic lattice, U(N) field, cold start.
 * Local action of site x: S_x(U) = -Re Tr(U A) - 2 kappa Re det U, A = beta N_x^+ + H with
 * N_x the sum of the 2 d neighbours.
 *
 * Updates, as sigmasim.kernels.unf does them (checkerboard: all sites of one colour, then the
 * other; one flavour permutation per colour update; subgroups (p0, p1), (p0, p2), ..., (p1, p2), ...):
 *   heatbath: Cabibbo-Marinari over the N(N-1)/2 SU(2) subgroups (x0 of the SU(2) heatbath by
 *     Creutz's method below 2k = 3, Kennedy-Pendleton above), then the U(1) phase step: e^{i psi}
 *     drawn from the Re Tr(e U A) weight (von Mises, Best-Fisher) and accepted with the Metropolis
 *     ratio of the determinant term;
 *   overrelaxation: the SU(2) reflections r = (v^+)^2 of every subgroup and the phase reflection
 *     e = (conj z / |z|)^2, z = Tr(U A), accepted with the determinant's Metropolis ratio;
 *   hbor: one heatbath and --nor overrelaxation colour sweeps of both colours per sweep
 *     (counted as 1 + nor site-hits per site).
 * The field is projected back onto U(N) (Gram-Schmidt of the rows) every 10 sweeps.
 * The field keeps the 2 N^2 doubles of a site contiguous (real parts, then imaginary parts).  Two
 * ways to update, with the same draws and the same arithmetic (the same chain up to rounding):
 *   --layout chunk (default): 64 sites of one colour at a time, every per-site quantity in scratch
 *     rows [component][site], so that the arithmetic runs as loops over the sites that the compiler
 *     vectorises (the layout of sigmasim.kernels.unf); the rejection loops and the determinant
 *     (LU with partial pivoting) site by site; the sines, cosines and logarithms are the scalar
 *     libm ones (no hand-written vector versions);
 *   --layout site: one site at a time, scalar code with the matrix size a compile-time constant.
 *
 * Random numbers: a counter-based generator (SplitMix64 finaliser of key + n * golden ratio,
 * common practice, no source); colour update t has its own key, site x its own counters from
 * x * 2^24, so the chain does not depend on the thread count.
 *
 * Prints one JSON line: site-hits per second (wall and CPU time of the sweeps only, as the
 * measurement after each sweep is not timed) and the physics check values <S>/V and
 * <Re Tr U>/N with errors from 20 blocks.
 */
#define _GNU_SOURCE
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#ifdef _OPENMP
#include <omp.h>
#endif

#ifndef NF
#define NF 4
#endif
#if NF < 2
#error "NF must be >= 2"
#endif
#define NC (NF * NF)
#define DIM 3
#define NNB (2 * DIM)

typedef uint64_t u64;

/* ------------------------------------------------------------------ random numbers */
static inline u64 mix64(u64 z)
{
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
}

/* uniform in the open interval (0, 1) for counter n under key */
static inline double unif(u64 key, u64 n)
{
    return ((double)(mix64(key + n * 0x9e3779b97f4a7c15ULL) >> 11) + 0.5) * 0x1.0p-53;
}

static u64 update_key(u64 seed, u64 t)
{
    return mix64(mix64(seed) ^ mix64(t * 0x632be59bd9b4e019ULL + 0x51ed27ULL));
}

/* x0 in [-1, 1] with density sqrt(1 - x0^2) exp(a x0), a >= 0.
 * a < 3: M. Creutz, Phys. Rev. D 21 (1980) 2308 (x = 1 - x0 from exp(-a x) on (0, 2),
 * accepted with probability sqrt(x (2 - x)));
 * a >= 3: A. D. Kennedy & B. J. Pendleton, Phys. Lett. B 156 (1985) 393. */
static inline double su2_x0(double a, u64 key, u64 *n)
{
    if (a >= 3.0) {
        for (;;) {
            const double r1 = unif(key, *n), r2 = unif(key, *n + 1), r3 = unif(key, *n + 2),
                         r4 = unif(key, *n + 3);
            *n += 4;
            const double c = cos(2.0 * M_PI * r2);
            const double x = -(log(r1) + c * c * log(r3)) / a;
            if (r4 * r4 <= 1.0 - 0.5 * x) return 1.0 - x;
        }
    }
    const double em = -expm1(-2.0 * a);
    for (;;) {
        const double u1 = unif(key, *n), u2 = unif(key, *n + 1);
        *n += 2;
        const double x = a > 1e-300 ? -log1p(-u1 * em) / a : 2.0 * u1;
        if (u2 * u2 < x * (2.0 - x)) return 1.0 - x;
    }
}

/* psi with density exp(k cos psi): D. J. Best & N. I. Fisher, J. R. Stat. Soc. C 28 (1979) 152 */
static inline void von_mises(double k, u64 key, u64 *n, double *c, double *s)
{
    if (k < 1e-12) {
        const double u = unif(key, *n);
        *n += 1;
        *c = cos(2.0 * M_PI * u);
        *s = sin(2.0 * M_PI * u);
        return;
    }
    const double tau = 1.0 + sqrt(1.0 + 4.0 * k * k);
    const double rho = (tau - sqrt(2.0 * tau)) / (2.0 * k);
    const double r = (1.0 + rho * rho) / (2.0 * rho);
    for (;;) {
        const double u1 = unif(key, *n), u2 = unif(key, *n + 1), u3 = unif(key, *n + 2);
        *n += 3;
        const double z = cos(M_PI * u1);
        const double f = (1.0 + r * z) / (r + z);
        const double cc = k * (r - f);
        if (cc * (2.0 - cc) > u2 || log(cc / u2) + 1.0 - cc >= 0.0) {
            *c = f;
            const double sn = sqrt(fmax(0.0, 1.0 - f * f));
            *s = u3 >= 0.5 ? sn : -sn;
            return;
        }
    }
}

/* ------------------------------------------------------------------ small matrices */
/* det of the N x N complex matrix (re, im), LU with partial pivoting on a copy */
static inline void det_n(const double *ur, const double *ui, double *dr, double *di)
{
    double ar[NC], ai[NC];
    memcpy(ar, ur, sizeof ar);
    memcpy(ai, ui, sizeof ai);
    double pr = 1.0, pi = 0.0;
    for (int k = 0; k < NF; k++) {
        int p = k;
        double best = ar[k * NF + k] * ar[k * NF + k] + ai[k * NF + k] * ai[k * NF + k];
        for (int i = k + 1; i < NF; i++) {
            const double m = ar[i * NF + k] * ar[i * NF + k] + ai[i * NF + k] * ai[i * NF + k];
            if (m > best) { best = m; p = i; }
        }
        if (best == 0.0) { *dr = 0.0; *di = 0.0; return; }
        if (p != k) {
            for (int j = 0; j < NF; j++) {
                double t = ar[k * NF + j]; ar[k * NF + j] = ar[p * NF + j]; ar[p * NF + j] = t;
                t = ai[k * NF + j]; ai[k * NF + j] = ai[p * NF + j]; ai[p * NF + j] = t;
            }
            pr = -pr; pi = -pi;
        }
        const double gr = ar[k * NF + k], gi = ai[k * NF + k];
        const double t = pr * gr - pi * gi;
        pi = pr * gi + pi * gr;
        pr = t;
        const double inr = gr / best, ini = -gi / best; /* 1 / pivot */
        for (int i = k + 1; i < NF; i++) {
            const double lr = ar[i * NF + k] * inr - ai[i * NF + k] * ini;
            const double li = ar[i * NF + k] * ini + ai[i * NF + k] * inr;
            for (int j = k + 1; j < NF; j++) {
                ar[i * NF + j] -= lr * ar[k * NF + j] - li * ai[k * NF + j];
                ai[i * NF + j] -= lr * ai[k * NF + j] + li * ar[k * NF + j];
            }
        }
    }
    *dr = pr;
    *di = pi;
}

/* rows i, j of X -> r rows (i, j), r = [[r00, r01], [r10, r11]] complex */
static inline void rot_rows(double *xr, double *xi, int i, int j, double r00r, double r00i, double r01r,
                            double r01i, double r10r, double r10i, double r11r, double r11i)
{
    for (int b = 0; b < NF; b++) {
        const double ar = xr[i * NF + b], ai = xi[i * NF + b], br = xr[j * NF + b], bi = xi[j * NF + b];
        xr[i * NF + b] = (r00r * ar - r00i * ai) + (r01r * br - r01i * bi);
        xi[i * NF + b] = (r00r * ai + r00i * ar) + (r01r * bi + r01i * br);
        xr[j * NF + b] = (r10r * ar - r10i * ai) + (r11r * br - r11i * bi);
        xi[j * NF + b] = (r10r * ai + r10i * ar) + (r11r * bi + r11i * br);
    }
}

/* ------------------------------------------------------------------ lattice */
typedef struct {
    int L, V;
    double *F;        /* V x 2 NC: real parts, then imaginary parts of site x's matrix */
    int *nbr;         /* V x 2 d: +mu, -mu for mu = 0..d-1 */
    int *sites[2];    /* the sites of each colour */
    int nsite[2];
    double beta, h, kappa, theta, hr, hi;
    u64 seed;
    int chunked; /* 1: chunk_update (sites innermost), 0: site_update (one site at a time) */
} lat_t;

/* one heatbath (hb) or overrelaxation update of site s; returns 1 if the phase step was accepted */
static inline int site_update(lat_t *lt, int s, u64 key, const int *perm, int hb)
{
    double *restrict f = lt->F + (size_t)s * 2 * NC;
    const int *nb = lt->nbr + (size_t)s * NNB;
    double nr[NC], ni[NC];
    {
        const double *q = lt->F + (size_t)nb[0] * 2 * NC;
        for (int c = 0; c < NC; c++) { nr[c] = q[c]; ni[c] = q[NC + c]; }
    }
    for (int k = 1; k < NNB; k++) {
        const double *q = lt->F + (size_t)nb[k] * 2 * NC;
        for (int c = 0; c < NC; c++) { nr[c] += q[c]; ni[c] += q[NC + c]; }
    }
    /* A = beta N^+ + H */
    double ar[NC], ai[NC];
    const double beta = lt->beta;
    for (int a = 0; a < NF; a++)
        for (int b = 0; b < NF; b++) {
            ar[a * NF + b] = beta * nr[b * NF + a];
            ai[a * NF + b] = -beta * ni[b * NF + a];
        }
    for (int a = 0; a < NF; a++) { ar[a * NF + a] += lt->hr; ai[a * NF + a] += lt->hi; }
    double ur[NC], ui[NC], wr[NC], wi[NC];
    for (int c = 0; c < NC; c++) { ur[c] = f[c]; ui[c] = f[NC + c]; }
    /* W = U A */
    for (int a = 0; a < NF; a++)
        for (int b = 0; b < NF; b++) {
            double sr = 0.0, si = 0.0;
            for (int c = 0; c < NF; c++) {
                const double xr = ur[a * NF + c], xi = ui[a * NF + c], yr = ar[c * NF + b], yi = ai[c * NF + b];
                sr += xr * yr - xi * yi;
                si += xr * yi + xi * yr;
            }
            wr[a * NF + b] = sr;
            wi[a * NF + b] = si;
        }
    u64 n = (u64)s << 24;
    for (int pa = 0; pa < NF; pa++)
        for (int pb = pa + 1; pb < NF; pb++) {
            const int i = perm[pa], j = perm[pb];
            /* the SU(2) part of the (i, j) block: k v, v = [[al, be], [-conj be, conj al]] / k */
            const double alr = 0.5 * (wr[i * NF + i] + wr[j * NF + j]);
            const double ali = 0.5 * (wi[i * NF + i] - wi[j * NF + j]);
            const double ber = 0.5 * (wr[i * NF + j] - wr[j * NF + i]);
            const double bei = 0.5 * (wi[i * NF + j] + wi[j * NF + i]);
            const double k2 = alr * alr + ali * ali + ber * ber + bei * bei;
            if (k2 < 1e-300) continue;
            const double k = sqrt(k2), ik = 1.0 / k;
            /* v^+ = [[conj al, -be], [conj be, al]] / k */
            const double ar_ = alr * ik, ai_ = -ali * ik, br_ = -ber * ik, bi_ = -bei * ik;
            const double cr_ = ber * ik, ci_ = -bei * ik, dr_ = alr * ik, di_ = ali * ik;
            double r00r, r00i, r01r, r01i, r10r, r10i, r11r, r11i;
            if (hb) {
                const double x0 = su2_x0(2.0 * k, key, &n);
                const double c3 = 2.0 * unif(key, n) - 1.0;
                const double ph = 2.0 * M_PI * unif(key, n + 1);
                n += 2;
                const double rr = sqrt(fmax(0.0, 1.0 - x0 * x0));
                const double st = rr * sqrt(fmax(0.0, 1.0 - c3 * c3));
                const double x1 = st * cos(ph), x2 = st * sin(ph), x3 = rr * c3;
                /* X = [[p, q], [-conj q, conj p]], p = x0 + i x3, q = x2 + i x1; r = X v^+ */
                const double pr = x0, pi = x3, qr = x2, qi = x1;
                r00r = (pr * ar_ - pi * ai_) + (qr * cr_ - qi * ci_);
                r00i = (pr * ai_ + pi * ar_) + (qr * ci_ + qi * cr_);
                r01r = (pr * br_ - pi * bi_) + (qr * dr_ - qi * di_);
                r01i = (pr * bi_ + pi * br_) + (qr * di_ + qi * dr_);
                r10r = (-qr * ar_ - qi * ai_) + (pr * cr_ + pi * ci_);
                r10i = (-qr * ai_ + qi * ar_) + (pr * ci_ - pi * cr_);
                r11r = (-qr * br_ - qi * bi_) + (pr * dr_ + pi * di_);
                r11i = (-qr * bi_ + qi * br_) + (pr * di_ - pi * dr_);
            } else {
                /* r = (v^+)^2 = t v^+ - 1, t = Tr v^+ = 2 Re al / k (Cayley-Hamilton, det v = 1) */
                const double t = 2.0 * alr * ik;
                r00r = t * ar_ - 1.0; r00i = t * ai_;
                r01r = t * br_; r01i = t * bi_;
                r10r = t * cr_; r10i = t * ci_;
                r11r = t * dr_ - 1.0; r11i = t * di_;
            }
            rot_rows(ur, ui, i, j, r00r, r00i, r01r, r01i, r10r, r10i, r11r, r11i);
            rot_rows(wr, wi, i, j, r00r, r00i, r01r, r01i, r10r, r10i, r11r, r11i);
        }
    /* the U(1) phase step U -> e U, accepted with the determinant's Metropolis ratio */
    double zr = 0.0, zi = 0.0;
    for (int a = 0; a < NF; a++) { zr += wr[a * NF + a]; zi += wi[a * NF + a]; }
    const double kz = sqrt(zr * zr + zi * zi);
    double er, ei;
    n = ((u64)s << 24) + ((u64)1 << 23); /* the phase step's own counters */
    if (hb) {
        double c, sn;
        von_mises(kz, key, &n, &c, &sn);
        if (kz > 1e-300) {
            const double cr = zr / kz, ci = -zi / kz;
            er = c * cr - sn * ci;
            ei = c * ci + sn * cr;
        } else {
            er = c;
            ei = sn;
        }
    } else {
        if (!(kz > 1e-300)) goto store;
        const double cr = zr / kz, ci = -zi / kz;
        er = cr * cr - ci * ci;
        ei = 2.0 * cr * ci;
    }
    int ok;
    {
        double pr = er, pi = ei; /* e^N */
        for (int t = 1; t < NF; t++) {
            const double x = pr * er - pi * ei;
            pi = pr * ei + pi * er;
            pr = x;
        }
        double dr, di;
        det_n(ur, ui, &dr, &di);
        const double ddr = (pr * dr - pi * di) - dr; /* Re(e^N d - d) */
        const double ds = -2.0 * lt->kappa * ddr;
        ok = ds <= 0.0 || unif(key, n) < exp(-ds);
        if (ok)
            for (int c = 0; c < NC; c++) {
                const double x = ur[c], y = ui[c];
                ur[c] = er * x - ei * y;
                ui[c] = er * y + ei * x;
            }
    }
    for (int c = 0; c < NC; c++) { f[c] = ur[c]; f[NC + c] = ui[c]; }
    return ok;
store:
    for (int c = 0; c < NC; c++) { f[c] = ur[c]; f[NC + c] = ui[c]; }
    return 0;
}

/* the flavour permutation of one colour update (Fisher-Yates on 53 random bits) */
static void flavour_perm(u64 key, int *perm)
{
    for (int a = 0; a < NF; a++) perm[a] = a;
    u64 r = mix64(key + 0x8000000000000000ULL * 0x9e3779b97f4a7c15ULL) >> 11;
    for (int a = NF - 1; a > 0; a--) {
        const int b = (int)(r % (u64)(a + 1));
        r /= (u64)(a + 1);
        const int t = perm[a]; perm[a] = perm[b]; perm[b] = t;
    }
}

/* ------------------------------------------------------------------ the chunked update
 * The same site update for CH sites of one colour at a time, with every per-site quantity in
 * scratch rows [component][site] (sites innermost), so that the arithmetic runs as loops over
 * the sites that the compiler vectorises (the layout of sigmasim.kernels.unf); the rejection
 * loops (x0, von Mises) and the determinant run site by site.  Same draws as site_update. */
#ifndef CH
#define CH 64
#endif
#define SIMD _Pragma("omp simd")

static long chunk_update(lat_t *lt, const int *sites, int m, u64 key, const int *perm, int hb)
{
    static _Thread_local double A[2 * NC][CH] __attribute__((aligned(64)));
    static _Thread_local double U[2 * NC][CH] __attribute__((aligned(64)));
    static _Thread_local double W[2 * NC][CH] __attribute__((aligned(64)));
    static _Thread_local double Q[8][CH] __attribute__((aligned(64)));
    static _Thread_local double P[6][CH] __attribute__((aligned(64)));
    const double beta = lt->beta;
    for (int s = 0; s < m; s++) {
        const int x = sites[s];
        const int *nb = lt->nbr + (size_t)x * NNB;
        double n[2 * NC];
        const double *q = lt->F + (size_t)nb[0] * 2 * NC;
        for (int c = 0; c < 2 * NC; c++) n[c] = q[c];
        for (int k = 1; k < NNB; k++) {
            q = lt->F + (size_t)nb[k] * 2 * NC;
            for (int c = 0; c < 2 * NC; c++) n[c] += q[c];
        }
        for (int a = 0; a < NF; a++)
            for (int b = 0; b < NF; b++) {
                A[a * NF + b][s] = beta * n[b * NF + a];
                A[NC + a * NF + b][s] = -beta * n[NC + b * NF + a];
            }
        for (int a = 0; a < NF; a++) { A[a * NF + a][s] += lt->hr; A[NC + a * NF + a][s] += lt->hi; }
        const double *f = lt->F + (size_t)x * 2 * NC;
        for (int c = 0; c < 2 * NC; c++) U[c][s] = f[c];
    }
    for (int a = 0; a < NF; a++)
        for (int b = 0; b < NF; b++) {
            double *wr = W[a * NF + b], *wi = W[NC + a * NF + b];
            SIMD for (int s = 0; s < m; s++) { wr[s] = 0.0; wi[s] = 0.0; }
            for (int c = 0; c < NF; c++) {
                const double *xr = U[a * NF + c], *xi = U[NC + a * NF + c], *yr = A[c * NF + b],
                             *yi = A[NC + c * NF + b];
                SIMD for (int s = 0; s < m; s++) {
                    wr[s] += xr[s] * yr[s] - xi[s] * yi[s];
                    wi[s] += xr[s] * yi[s] + xi[s] * yr[s];
                }
            }
        }
    u64 nctr[CH];
    for (int s = 0; s < m; s++) nctr[s] = (u64)sites[s] << 24;
    for (int pa = 0; pa < NF; pa++)
        for (int pb = pa + 1; pb < NF; pb++) {
            const int i = perm[pa], j = perm[pb];
            const int ii = i * NF + i, jj = j * NF + j, ij = i * NF + j, ji = j * NF + i;
            /* v^+ = [[conj al, -be], [conj be, al]] / k in P rows: ar ai br bi, k in P[4] */
            SIMD for (int s = 0; s < m; s++) {
                const double alr = 0.5 * (W[ii][s] + W[jj][s]), ali = 0.5 * (W[NC + ii][s] - W[NC + jj][s]);
                const double ber = 0.5 * (W[ij][s] - W[ji][s]), bei = 0.5 * (W[NC + ij][s] + W[NC + ji][s]);
                const double k2 = alr * alr + ali * ali + ber * ber + bei * bei;
                const int tiny = k2 < 1e-300;
                const double k = sqrt(k2), ik = tiny ? 0.0 : 1.0 / k;
                P[0][s] = alr * ik; P[1][s] = ali * ik; P[2][s] = ber * ik; P[3][s] = bei * ik;
                P[4][s] = tiny ? 0.0 : k;
            }
            if (hb) {
                for (int s = 0; s < m; s++) {
                    if (P[4][s] == 0.0) { P[5][s] = 2.0; continue; } /* identity below */
                    const double x0 = su2_x0(2.0 * P[4][s], key, &nctr[s]);
                    const double c3 = 2.0 * unif(key, nctr[s]) - 1.0;
                    const double ph = 2.0 * M_PI * unif(key, nctr[s] + 1);
                    nctr[s] += 2;
                    const double rr = sqrt(fmax(0.0, 1.0 - x0 * x0));
                    const double st = rr * sqrt(fmax(0.0, 1.0 - c3 * c3));
                    Q[0][s] = x0; Q[1][s] = rr * c3; Q[2][s] = st * sin(ph); Q[3][s] = st * cos(ph);
                    P[5][s] = x0;
                }
                SIMD for (int s = 0; s < m; s++) {
                    const int one = P[5][s] > 1.5;
                    const double ar_ = one ? 1.0 : P[0][s], ai_ = one ? 0.0 : -P[1][s];
                    const double br_ = one ? 0.0 : -P[2][s], bi_ = one ? 0.0 : -P[3][s];
                    const double cr_ = -br_, ci_ = bi_, dr_ = ar_, di_ = -ai_;
                    const double pr = one ? 1.0 : Q[0][s], pi = one ? 0.0 : Q[1][s];
                    const double qr = one ? 0.0 : Q[2][s], qi = one ? 0.0 : Q[3][s];
                    Q[0][s] = (pr * ar_ - pi * ai_) + (qr * cr_ - qi * ci_);
                    Q[1][s] = (pr * ai_ + pi * ar_) + (qr * ci_ + qi * cr_);
                    Q[2][s] = (pr * br_ - pi * bi_) + (qr * dr_ - qi * di_);
                    Q[3][s] = (pr * bi_ + pi * br_) + (qr * di_ + qi * dr_);
                    Q[4][s] = (-qr * ar_ - qi * ai_) + (pr * cr_ + pi * ci_);
                    Q[5][s] = (-qr * ai_ + qi * ar_) + (pr * ci_ - pi * cr_);
                    Q[6][s] = (-qr * br_ - qi * bi_) + (pr * dr_ + pi * di_);
                    Q[7][s] = (-qr * bi_ + qi * br_) + (pr * di_ - pi * dr_);
                }
            } else {
                SIMD for (int s = 0; s < m; s++) {
                    const int one = P[4][s] == 0.0;
                    const double ar_ = P[0][s], ai_ = -P[1][s], br_ = -P[2][s], bi_ = -P[3][s];
                    const double t = 2.0 * P[0][s];
                    Q[0][s] = one ? 1.0 : t * ar_ - 1.0; Q[1][s] = t * ai_;
                    Q[2][s] = t * br_; Q[3][s] = t * bi_;
                    Q[4][s] = -t * br_; Q[5][s] = t * bi_;
                    Q[6][s] = one ? 1.0 : t * ar_ - 1.0; Q[7][s] = -t * ai_;
                }
            }
            for (int X = 0; X < 2; X++) {
                double (*M)[CH] = X ? W : U;
                for (int b = 0; b < NF; b++) {
                    double *xr = M[i * NF + b], *xi = M[NC + i * NF + b], *yr = M[j * NF + b], *yi = M[NC + j * NF + b];
                    SIMD for (int s = 0; s < m; s++) {
                        const double ar = xr[s], ai = xi[s], br = yr[s], bi = yi[s];
                        xr[s] = (Q[0][s] * ar - Q[1][s] * ai) + (Q[2][s] * br - Q[3][s] * bi);
                        xi[s] = (Q[0][s] * ai + Q[1][s] * ar) + (Q[2][s] * bi + Q[3][s] * br);
                        yr[s] = (Q[4][s] * ar - Q[5][s] * ai) + (Q[6][s] * br - Q[7][s] * bi);
                        yi[s] = (Q[4][s] * ai + Q[5][s] * ar) + (Q[6][s] * bi + Q[7][s] * br);
                    }
                }
            }
        }
    /* the phase step: z = Tr W in P[0], P[1], |z| in P[2]; proposal e in Q[0], Q[1] */
    SIMD for (int s = 0; s < m; s++) {
        double zr = 0.0, zi = 0.0;
        for (int a = 0; a < NF; a++) { zr += W[a * NF + a][s]; zi += W[NC + a * NF + a][s]; }
        P[0][s] = zr; P[1][s] = zi; P[2][s] = sqrt(zr * zr + zi * zi);
    }
    if (hb)
        for (int s = 0; s < m; s++) {
            u64 n = ((u64)sites[s] << 24) + ((u64)1 << 23);
            von_mises(P[2][s], key, &n, &Q[2][s], &Q[3][s]);
            nctr[s] = n; /* the accept draw's counter */
        }
    SIMD for (int s = 0; s < m; s++) {
        const double kz = P[2][s];
        const int big = kz > 1e-300;
        const double ik = big ? 1.0 / kz : 0.0;
        const double cr = P[0][s] * ik, ci = -P[1][s] * ik;
        double er, ei;
        if (hb) {
            const double c = Q[2][s], sn = Q[3][s];
            er = big ? c * cr - sn * ci : c;
            ei = big ? c * ci + sn * cr : sn;
        } else {
            er = big ? cr * cr - ci * ci : 1.0;
            ei = big ? 2.0 * cr * ci : 0.0;
        }
        double pr = er, pi = ei;
        for (int t = 1; t < NF; t++) {
            const double x = pr * er - pi * ei;
            pi = pr * ei + pi * er;
            pr = x;
        }
        Q[0][s] = er; Q[1][s] = ei; Q[4][s] = pr; Q[5][s] = pi; P[3][s] = big;
    }
    long acc = 0;
    for (int s = 0; s < m; s++) {
        double ur[NC], ui[NC], dr, di;
        for (int c = 0; c < NC; c++) { ur[c] = U[c][s]; ui[c] = U[NC + c][s]; }
        det_n(ur, ui, &dr, &di);
        const double ds = -2.0 * lt->kappa * ((Q[4][s] * dr - Q[5][s] * di) - dr);
        int ok;
        if (hb)
            ok = ds <= 0.0 || unif(key, nctr[s]) < exp(-ds);
        else
            ok = P[3][s] != 0.0 && (ds <= 0.0 || unif(key, ((u64)sites[s] << 24) + ((u64)1 << 23)) < exp(-ds));
        P[4][s] = ok;
        acc += ok;
    }
    for (int c = 0; c < NC; c++)
        SIMD for (int s = 0; s < m; s++) {
            const int ok = P[4][s] != 0.0;
            const double er = ok ? Q[0][s] : 1.0, ei = ok ? Q[1][s] : 0.0;
            const double x = U[c][s], y = U[NC + c][s];
            U[c][s] = er * x - ei * y;
            U[NC + c][s] = er * y + ei * x;
        }
    for (int s = 0; s < m; s++) {
        double *f = lt->F + (size_t)sites[s] * 2 * NC;
        for (int c = 0; c < 2 * NC; c++) f[c] = U[c][s];
    }
    return acc;
}

static long colour_update(lat_t *lt, int colour, u64 t, int hb)
{
    const u64 key = update_key(lt->seed, t);
    int perm[NF];
    flavour_perm(key, perm);
    const int *sites = lt->sites[colour];
    const int ns = lt->nsite[colour];
    long acc = 0;
    if (lt->chunked) {
        const int nch = (ns + CH - 1) / CH;
#pragma omp parallel for schedule(static) reduction(+ : acc)
        for (int c = 0; c < nch; c++) {
            const int q0 = c * CH, m = ns - q0 < CH ? ns - q0 : CH;
            acc += chunk_update(lt, sites + q0, m, key, perm, hb);
        }
        return acc;
    }
#pragma omp parallel for schedule(static) reduction(+ : acc)
    for (int q = 0; q < ns; q++) acc += site_update(lt, sites[q], key, perm, hb);
    return acc;
}

/* Gram-Schmidt of the rows of every site */
static void unitarize_all(lat_t *lt)
{
#pragma omp parallel for schedule(static)
    for (int s = 0; s < lt->V; s++) {
        double *xr = lt->F + (size_t)s * 2 * NC, *xi = xr + NC;
        for (int a = 0; a < NF; a++) {
            for (int b = 0; b < a; b++) { /* row a -= <row b, row a> row b */
                double pr = 0.0, pi = 0.0;
                for (int c = 0; c < NF; c++) {
                    pr += xr[b * NF + c] * xr[a * NF + c] + xi[b * NF + c] * xi[a * NF + c];
                    pi += xr[b * NF + c] * xi[a * NF + c] - xi[b * NF + c] * xr[a * NF + c];
                }
                for (int c = 0; c < NF; c++) {
                    const double yr = xr[b * NF + c], yi = xi[b * NF + c];
                    xr[a * NF + c] -= pr * yr - pi * yi;
                    xi[a * NF + c] -= pr * yi + pi * yr;
                }
            }
            double nn = 0.0;
            for (int c = 0; c < NF; c++) nn += xr[a * NF + c] * xr[a * NF + c] + xi[a * NF + c] * xi[a * NF + c];
            const double in = 1.0 / sqrt(nn);
            for (int c = 0; c < NF; c++) { xr[a * NF + c] *= in; xi[a * NF + c] *= in; }
        }
    }
}

/* S / V and Re Tr U / (N V) of the current field */
static void measure(const lat_t *lt, double *act, double *retr)
{
    double link = 0.0, mass = 0.0, dsum = 0.0, tr = 0.0;
#pragma omp parallel for schedule(static) reduction(+ : link, mass, dsum, tr)
    for (int s = 0; s < lt->V; s++) {
        const double *x = lt->F + (size_t)s * 2 * NC;
        for (int mu = 0; mu < DIM; mu++) {
            const double *y = lt->F + (size_t)lt->nbr[s * NNB + 2 * mu] * 2 * NC;
            for (int c = 0; c < 2 * NC; c++) link += x[c] * y[c]; /* Re Tr(U_x^+ U_y) */
        }
        double t_r = 0.0, t_i = 0.0;
        for (int a = 0; a < NF; a++) { t_r += x[a * NF + a]; t_i += x[NC + a * NF + a]; }
        mass += lt->hr * t_r - lt->hi * t_i; /* Re Tr(H U) */
        tr += t_r;
        double dr, di;
        det_n(x, x + NC, &dr, &di);
        dsum += dr;
    }
    *act = (-lt->beta * link - mass - 2.0 * lt->kappa * dsum) / lt->V;
    *retr = tr / ((double)NF * lt->V);
}

static void block_stat(const double *x, int n, int nb, double *mean, double *err)
{
    double m = 0.0;
    for (int i = 0; i < n; i++) m += x[i];
    m /= n;
    *mean = m;
    if (nb > n) nb = n;
    if (nb < 2) { *err = NAN; return; }
    const int bl = n / nb;
    double s = 0.0, s2 = 0.0;
    for (int b = 0; b < nb; b++) {
        double a = 0.0;
        for (int i = 0; i < bl; i++) a += x[b * bl + i];
        a /= bl;
        s += a;
        s2 += a * a;
    }
    const double bm = s / nb;
    *err = sqrt(fmax(0.0, (s2 / nb - bm * bm) * nb / (nb - 1)) / nb);
}

static double now_s(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec + 1e-9 * t.tv_nsec;
}

static double cpu_s(void)
{
    struct timespec t;
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &t);
    return t.tv_sec + 1e-9 * t.tv_nsec;
}

static void usage(void)
{
    fprintf(stderr, "unf%d [--algo hb|or|hbor] [--nor 3] [--L 16] [--sweeps N] [--therm N] [--seed S]\n"
                    "      [--beta 0.5] [--h 0.1] [--kappa 0.2] [--theta 3.0] [--layout chunk|site] [--impl NAME]\n", NF);
    exit(2);
}

enum { HB, OR, HBOR };

int main(int argc, char **argv)
{
    int L = 16, sweeps = 200, therm = 50, nor = 3, algo = HBOR;
    u64 seed = 12345;
    double beta = 0.5, h = 0.1, kappa = 0.2, theta = 3.0;
    const char *impl = NULL;
    int chunked = 1;
    for (int i = 1; i < argc; i++) {
        if (i + 1 >= argc) usage();
        const char *o = argv[i], *v = argv[++i];
        if (!strcmp(o, "--algo")) {
            if (!strcmp(v, "hb")) algo = HB;
            else if (!strcmp(v, "or")) algo = OR;
            else if (!strcmp(v, "hbor")) algo = HBOR;
            else usage();
        }
        else if (!strcmp(o, "--nor")) nor = atoi(v);
        else if (!strcmp(o, "--L")) L = atoi(v);
        else if (!strcmp(o, "--sweeps")) sweeps = atoi(v);
        else if (!strcmp(o, "--therm")) therm = atoi(v);
        else if (!strcmp(o, "--seed")) seed = strtoull(v, 0, 10);
        else if (!strcmp(o, "--beta")) beta = atof(v);
        else if (!strcmp(o, "--h")) h = atof(v);
        else if (!strcmp(o, "--kappa")) kappa = atof(v);
        else if (!strcmp(o, "--theta")) theta = atof(v);
        else if (!strcmp(o, "--impl")) impl = v;
        else if (!strcmp(o, "--layout")) {
            if (!strcmp(v, "chunk")) chunked = 1;
            else if (!strcmp(v, "site")) chunked = 0;
            else usage();
        }
        else usage();
    }
    if (L < 2 || L % 2) { fprintf(stderr, "unf: --L must be even and >= 2\n"); return 2; }
    if (sweeps < 1 || therm < 0 || nor < 0 || kappa < 0) { fprintf(stderr, "unf: bad --sweeps/--therm/--nor/--kappa\n"); return 2; }

    lat_t lt;
    lt.L = L;
    lt.V = L * L * L;
    lt.beta = beta; lt.h = h; lt.kappa = kappa; lt.theta = theta; lt.seed = seed; lt.chunked = chunked;
    lt.hr = h * cos(theta / NF);
    lt.hi = h * sin(theta / NF);
    lt.F = malloc(sizeof(double) * 2 * NC * (size_t)lt.V);
    lt.nbr = malloc(sizeof(int) * NNB * (size_t)lt.V);
    lt.sites[0] = malloc(sizeof(int) * lt.V);
    lt.sites[1] = malloc(sizeof(int) * lt.V);
    lt.nsite[0] = lt.nsite[1] = 0;
    if (!lt.F || !lt.nbr || !lt.sites[0] || !lt.sites[1]) { fprintf(stderr, "unf: out of memory\n"); return 1; }
    for (int z = 0; z < L; z++)
        for (int y = 0; y < L; y++)
            for (int x = 0; x < L; x++) {
                const int s = x + L * (y + L * z);
                const int c[3] = {x, y, z};
                for (int mu = 0; mu < DIM; mu++) {
                    int cp[3] = {x, y, z}, cm[3] = {x, y, z};
                    cp[mu] = (c[mu] + 1) % L;
                    cm[mu] = (c[mu] + L - 1) % L;
                    lt.nbr[s * NNB + 2 * mu] = cp[0] + L * (cp[1] + L * cp[2]);
                    lt.nbr[s * NNB + 2 * mu + 1] = cm[0] + L * (cm[1] + L * cm[2]);
                }
                const int p = (x + y + z) & 1;
                lt.sites[p][lt.nsite[p]++] = s;
                double *f = lt.F + (size_t)s * 2 * NC; /* cold start */
                for (int k = 0; k < 2 * NC; k++) f[k] = 0.0;
                for (int a = 0; a < NF; a++) f[a * NF + a] = 1.0;
            }

    const int nhb = algo == OR ? 0 : 1, nov = algo == HB ? 0 : (algo == OR ? 1 : nor);
    u64 t = 0; /* colour updates so far */
    long acc = 0;
    for (int sw = 0; sw < therm; sw++) {
        for (int k = 0; k < nhb + nov; k++)
            for (int p = 0; p < 2; p++) colour_update(&lt, p, t++, k < nhb);
        if (sw % 10 == 9) unitarize_all(&lt);
    }
    double *act = malloc(sizeof(double) * sweeps), *rtr = malloc(sizeof(double) * sweeps);
    double tw = 0.0, tc = 0.0;
    for (int sw = 0; sw < sweeps; sw++) {
        const double w0 = now_s(), c0 = cpu_s();
        for (int k = 0; k < nhb + nov; k++)
            for (int p = 0; p < 2; p++) acc += colour_update(&lt, p, t++, k < nhb);
        if ((therm + sw) % 10 == 9) unitarize_all(&lt);
        tw += now_s() - w0;
        tc += cpu_s() - c0;
        measure(&lt, &act[sw], &rtr[sw]);
    }
    double am, ae, rm, re;
    block_stat(act, sweeps, 20, &am, &ae);
    block_stat(rtr, sweeps, 20, &rm, &re);
    const int hps = nhb + nov;
    const double hits = (double)hps * sweeps * lt.V;
    int nth = 1;
#ifdef _OPENMP
    nth = omp_get_max_threads();
#endif
    char implname[64], algname[64], aes[32], res[32];
    /* JSON has no nan: a missing error (fewer than 2 blocks) prints as NaN, which Python reads */
    if (isfinite(ae)) snprintf(aes, sizeof aes, "%.10f", ae); else snprintf(aes, sizeof aes, "NaN");
    if (isfinite(re)) snprintf(res, sizeof res, "%.10f", re); else snprintf(res, sizeof res, "NaN");
    if (impl) snprintf(implname, sizeof implname, "%s", impl);
    else if (nth > 1) snprintf(implname, sizeof implname, "c_unf_omp%d", nth);
    else snprintf(implname, sizeof implname, "c_unf");
    if (algo == HBOR) snprintf(algname, sizeof algname, "heatbath1_overrelax%d", nor);
    else snprintf(algname, sizeof algname, "%s", algo == HB ? "heatbath_cabibbo_marinari" : "overrelax");
    printf("{\"model\": \"U%d_d3\", \"algorithm\": \"%s\", \"implementation\": \"%s\", \"nf\": %d, "
           "\"lattice\": \"%dx%dx%d\", \"L\": %d, \"threads\": %d, \"sweeps\": %d, \"therm\": %d, "
           "\"hits_per_site\": %d, \"seconds\": %.6f, \"site_hits_per_second\": %.6e, \"cpu_seconds\": %.6f, "
           "\"site_hits_per_cpu_second\": %.6e, \"acceptance\": %.6f, "
           "\"action_per_site\": %.10f, \"action_per_site_err\": %s, "
           "\"retr_over_nf\": %.10f, \"retr_over_nf_err\": %s, \"layout\": \"%s\", "
           "\"beta\": %.16g, \"h\": %.16g, \"kappa\": %.16g, \"theta\": %.16g, \"seed\": %llu}\n",
           NF, algname, implname, NF, L, L, L, L, nth, sweeps, therm, hps, tw, hits / tw, tc, hits / tc,
           acc / hits, am, aes, rm, res, chunked ? "chunk" : "site", beta, h, kappa, theta,
           (unsigned long long)seed);
    free(act); free(rtr);
    free(lt.F); free(lt.nbr); free(lt.sites[0]); free(lt.sites[1]);
    return 0;
}
