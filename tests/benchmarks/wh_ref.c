/* Plain C reference of the Wisdom-Holman step, written for the benchmark.
 *
 * The same formulation as integrators/: Jacobi coordinates, mu_i = G m0
 * eta_i / eta_(i-1), universal-variable Kepler drift with Stumpff series,
 * Halley iteration from a third-order guess and a Taylor shift in the cubic
 * regime, kick = Jacobi transform of the inertial accelerations plus
 * mu_i x_i / r_i^3. Compile with gcc -O2 -ffp-contract=off.
 *
 * MODE 0: drift(dt/2) kick(dt) drift(dt/2) every step (unmerged).
 * MODE 1: merged drifts, as the numba kernel does.
 *
 * Input on stdin: n, then gm[n], then x[n][3], v[n][3] (Jacobi), then dt,
 * steps, mode. Output: ns/step, then the state after the run.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

#define NMAX 64
static double gm[NMAX], mu[NMAX], eta[NMAX], xj[NMAX][3], vj[NMAX][3], xi[NMAX][3], acc[NMAX][3];
static int n;

#define A0 (1.0 / 2.0)
#define A1 (-1.0 / 24.0)
#define A2 (1.0 / 720.0)
#define A3 (-1.0 / 40320.0)
#define A4 (1.0 / 3628800.0)
#define A5 (-1.0 / 479001600.0)
#define A6 (1.0 / 87178291200.0)
#define A7 (-1.0 / 20922789888000.0)
#define B0 (1.0 / 6.0)
#define B1 (-1.0 / 120.0)
#define B2 (1.0 / 5040.0)
#define B3 (-1.0 / 362880.0)
#define B4 (1.0 / 39916800.0)
#define B5 (-1.0 / 6227020800.0)
#define B6 (1.0 / 1307674368000.0)
#define B7 (-1.0 / 355687428096000.0)

static void stumpff(double x, double *c0, double *c1, double *c2, double *c3) {
    int k = 0;
    while ((x > 0.1 || x < -0.1) && k < 64) { x *= 0.25; k++; }
    if (x > 0.1 || x < -0.1) { *c0 = *c1 = *c2 = *c3 = NAN; return; }
    /* Estrin's scheme over the series coefficients, as kepler.py */
    double x2 = x * x, x4 = x2 * x2;
    double s2 = ((A0 + A1 * x) + x2 * (A2 + A3 * x)) + x4 * ((A4 + A5 * x) + x2 * (A6 + A7 * x));
    double s3 = ((B0 + B1 * x) + x2 * (B2 + B3 * x)) + x4 * ((B4 + B5 * x) + x2 * (B6 + B7 * x));
    double s1 = 1.0 - x * s3, s0 = 1.0 - x * s2;
    for (; k > 0; k--) {
        s3 = (s2 + s0 * s3) * 0.25; s2 = s1 * s1 * 0.5; s1 = s0 * s1; s0 = 2.0 * s0 * s0 - 1.0;
    }
    *c0 = s0; *c1 = s1; *c2 = s2; *c3 = s3;
}

static void drift1(int i, double dt) {
    const double TWO_PI = 6.283185307179586;
    double *x = xj[i], *v = vj[i], m = mu[i];
    double r0 = sqrt(x[0]*x[0] + x[1]*x[1] + x[2]*x[2]);
    double ir0 = 1.0 / r0;
    double vsq = v[0]*v[0] + v[1]*v[1] + v[2]*v[2];
    double eta0 = x[0]*v[0] + x[1]*v[1] + x[2]*v[2];
    double beta = 2.0 * m * ir0 - vsq, zeta0 = m - beta * r0;
    if (beta > 0.0 && dt*dt*beta*beta*beta > TWO_PI*TWO_PI*m*m) {
        double P = TWO_PI * m / (beta * sqrt(beta));
        dt = dt - trunc(dt / P) * P;
    }
    double s = dt * ir0 * (1.0 + dt * ir0 * ir0 * (-0.5 * eta0 + dt * ir0 * ir0
                                                   * (0.5 * eta0 * eta0 * ir0 - zeta0 * (1.0 / 6.0))));
    if (beta > 0.0 && s * s * beta > 0.99 * TWO_PI * TWO_PI) { double smax = TWO_PI / sqrt(beta); if (s > smax) s = smax; if (s < -smax) s = -smax; }
    double lo, hi;  /* the root's bracket, as in kepler.py */
    if (dt >= 0.0) { lo = 0.0; hi = beta > 0.0 ? TWO_PI / sqrt(beta) : INFINITY; }
    else { lo = beta > 0.0 ? -TWO_PI / sqrt(beta) : -INFINITY; hi = 0.0; }
    if (!(lo <= s && s <= hi)) { s = dt * ir0; if (s < lo) s = lo; if (s > hi) s = hi; }
    double c0, c1, c2, c3, g0 = 1, g1 = 0, g2 = 0, r = r0, dsp = INFINITY;
    int ok = 0;
    for (int it = 0; it < 12; it++) {
        stumpff(beta * s * s, &c0, &c1, &c2, &c3);
        g1 = s * c1; g2 = s * s * c2; double g3 = s * s * s * c3; g0 = c0;
        double ta = r0 * s, tb = eta0 * g2, tc = zeta0 * g3;
        double t = ta + tb + tc;
        r = r0 * c0 + eta0 * g1 + m * g2;
        double rp = eta0 * c0 + zeta0 * g1, f = t - dt;
        if (!(fabs(f) < INFINITY)) break;
        if (f == 0.0 || fabs(f) <= 4.0 * 0x1p-52 * (fabs(ta) + fabs(tb) + fabs(tc))) { ok = 1; break; }
        if (f > 0.0) hi = s; else lo = s;
        double ds = -f * r / (r * r - 0.5 * f * rp);
        double sn = s + ds;
        if (!(lo <= sn && sn <= hi) || !(r > 0.0)) break;
        if (fabs(ds) <= 1e-7 * fabs(sn) && fabs(ds) <= 1e-3 * fabs(dsp)) {
            double hh = 0.5 * ds * ds;
            double n0 = g0 - beta * (g1 * ds + g0 * hh), n1 = g1 + g0 * ds - beta * g1 * hh;
            double n2 = g2 + g1 * ds + g0 * hh;
            g0 = n0; g1 = n1; g2 = n2; r = r0 * g0 + eta0 * g1 + m * g2; s = sn; ok = 1; break;
        }
        dsp = ds; s = sn;
    }
    if (!ok) { fprintf(stderr, "no convergence\n"); exit(1); }
    double fm1 = -m * g2 * ir0, g = r0 * g1 + eta0 * g2, fd, gdm1;
    double f1 = 1.0 + fm1;  /* g' - 1 as in kepler.py: f g' - f' g = 1 unless |f| < 0.5 */
    if (f1 >= 0.5 || f1 <= -0.5) {
        double w = 1.0 / (r * f1);
        fd = -m * g1 * ir0 * (f1 * w);
        gdm1 = (fd * g - fm1) * (r * w);
    } else {
        double ir = 1.0 / r;
        fd = -m * g1 * ir0 * ir;
        gdm1 = -m * g2 * ir;
    }
    double x0 = x[0], x1 = x[1], x2 = x[2];
    x[0] = x0 + (fm1 * x0 + g * v[0]); x[1] = x1 + (fm1 * x1 + g * v[1]); x[2] = x2 + (fm1 * x2 + g * v[2]);
    v[0] = v[0] + (fd * x0 + gdm1 * v[0]); v[1] = v[1] + (fd * x1 + gdm1 * v[1]); v[2] = v[2] + (fd * x2 + gdm1 * v[2]);
}

static void drift(double h) {
    for (int d = 0; d < 3; d++) xj[0][d] += vj[0][d] * h;
    for (int i = 1; i < n; i++) drift1(i, h);
}

static void kick(double h) {
    double c[3] = {xj[0][0], xj[0][1], xj[0][2]};
    for (int i = n - 1; i > 0; i--) {
        double q = gm[i] / eta[i];
        for (int d = 0; d < 3; d++) { c[d] -= q * xj[i][d]; xi[i][d] = c[d] + xj[i][d]; }
    }
    for (int d = 0; d < 3; d++) xi[0][d] = c[d];
    for (int i = 0; i < n; i++) acc[i][0] = acc[i][1] = acc[i][2] = 0.0;
    for (int i = 0; i < n; i++)
        for (int j = i + 1; j < n; j++) {
            double dx = xi[j][0] - xi[i][0], dy = xi[j][1] - xi[i][1], dz = xi[j][2] - xi[i][2];
            double r2 = dx*dx + dy*dy + dz*dz, ir3 = 1.0 / (r2 * sqrt(r2));
            double fi = gm[j] * ir3, fj = gm[i] * ir3;
            acc[i][0] += fi * dx; acc[i][1] += fi * dy; acc[i][2] += fi * dz;
            acc[j][0] -= fj * dx; acc[j][1] -= fj * dy; acc[j][2] -= fj * dz;
        }
    double a[3] = {acc[0][0], acc[0][1], acc[0][2]};
    for (int i = 1; i < n; i++) {
        double *x = xj[i], r2 = x[0]*x[0] + x[1]*x[1] + x[2]*x[2], k = mu[i] / (r2 * sqrt(r2));
        double q = gm[i] / eta[i];
        for (int d = 0; d < 3; d++) {
            double aj = acc[i][d] - a[d];
            vj[i][d] += h * (aj + k * x[d]);
            a[d] = a[d] + q * aj;
        }
    }
}

int main(void) {
    double dt; long steps; int mode;
    if (scanf("%d", &n) != 1 || n > NMAX) return 2;
    for (int i = 0; i < n; i++) if (scanf("%lf", &gm[i]) != 1) return 2;
    for (int i = 0; i < n; i++) for (int d = 0; d < 3; d++) if (scanf("%lf", &xj[i][d]) != 1) return 2;
    for (int i = 0; i < n; i++) for (int d = 0; d < 3; d++) if (scanf("%lf", &vj[i][d]) != 1) return 2;
    if (scanf("%lf %ld %d", &dt, &steps, &mode) != 3) return 2;
    eta[0] = gm[0];
    for (int i = 1; i < n; i++) { eta[i] = eta[i-1] + gm[i]; mu[i] = gm[0] * eta[i] / eta[i-1]; }
    struct timespec t0, t1;
    clock_gettime(CLOCK_MONOTONIC, &t0);
    if (mode == 0) {
        for (long k = 0; k < steps; k++) { drift(0.5 * dt); kick(dt); drift(0.5 * dt); }
    } else {
        drift(0.5 * dt);
        for (long k = 0; k < steps; k++) { kick(dt); drift(k + 1 < steps ? dt : 0.5 * dt); }
    }
    clock_gettime(CLOCK_MONOTONIC, &t1);
    double ns = ((t1.tv_sec - t0.tv_sec) * 1e9 + (t1.tv_nsec - t0.tv_nsec)) / steps;
    printf("%.3f\n", ns);
    for (int i = 0; i < n; i++) printf("%.17g %.17g %.17g %.17g %.17g %.17g\n",
                                       xj[i][0], xj[i][1], xj[i][2], vj[i][0], vj[i][1], vj[i][2]);
    return 0;
}
