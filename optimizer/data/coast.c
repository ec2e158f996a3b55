/* The independent propagator's compiled engine: adaptive DOP853 steps of an Earth-centred coast.
 *
 * Written for slingback by hand (no generated code, nothing shared with the NLP): the right-hand
 * side is the numpy model's (optimizer/models/earth_centred.py: Earth point mass, the Moon and
 * optionally the Sun as third bodies with their indirect terms, optionally Earth's J2 about the
 * ICRF z axis), the Moon and Sun from a Chebyshev series (optimizer/ephemeris.py's fit) or a
 * circular Moon.  The step is the explicit Runge-Kutta method of order 8(5,3) of Dormand and
 * Prince (Hairer, Norsett & Wanner, Solving ODEs I, 2nd ed., section II.10) with its 7th-order
 * dense output; the tableau is given by the caller (optimizer/tableau.py's transcription of the
 * published coefficients, passed in by optimizer/native.py), and the step-size control follows
 * scipy's DOP853 (error norm from the 5th- and 3rd-order estimates, safety 0.9, factors 0.2-10,
 * exponent -1/8, its initial-step rule), so that both engines take comparable steps.  Events are
 * found by the caller on the dense output, as scipy does.
 *
 * Model numbers p[]: 0 GM Earth, 1 GM Moon, 2 GM Sun, 3 -1.5 J2 GM_E R_E^2, 4-5 valid epochs
 * [lo, hi]; Chebyshev (ip[0] = 0): 6 window middle, 7 1 / half-length, 8... n rows of
 * (Moon x y z, Sun x y z) coefficients, degree 0 first; circular Moon (ip[0] = 1): 6 radius,
 * 7 rate, 8 phase, 9 epoch, 10-12 P, 13-15 Q.  ip[]: 0 kind, 1 n, 2 Sun, 3 J2.
 */
#include <math.h>
#include <string.h>

#define NS 12   /* stages of a step */
#define NX 16   /* stages with the dense output's three */

static int rhs(const double *p, const int *ip, double t, const double *y, double *f)
{
    double x = y[0], yy = y[1], z = y[2], m[3], s[3] = {0.0, 0.0, 0.0};
    if (!(t >= p[4] && t <= p[5]))
        return 1;
    if (ip[0] == 0) {
        const double *c = p + 8;
        const int n = ip[1];
        double u = (t - p[6]) * p[7], u2 = u + u, b0 = 1.0, b1 = u, acc[6];
        for (int k = 0; k < 6; k++)
            acc[k] = c[k] + (n > 1 ? c[6 + k] * u : 0.0);
        for (int j = 2; j < n; j++) {
            double b2 = u2 * b1 - b0;
            b0 = b1;
            b1 = b2;
            for (int k = 0; k < 6; k++)
                acc[k] += c[6 * j + k] * b2;
        }
        memcpy(m, acc, sizeof m);
        memcpy(s, acc + 3, sizeof s);
    } else {
        double u = p[8] + p[7] * (t - p[9]), cu = cos(u), su = sin(u);
        for (int k = 0; k < 3; k++)
            m[k] = p[6] * (p[10 + k] * cu + p[13 + k] * su);
    }
    double r2 = x * x + yy * yy + z * z;
    double k = -p[0] / (r2 * sqrt(r2));
    double ax = k * x, ay = k * yy, az = k * z;
    for (int body = 0; body < (ip[2] ? 2 : 1); body++) {
        const double *b = body ? s : m;
        double gm = body ? p[2] : p[1];
        double dx = b[0] - x, dy = b[1] - yy, dz = b[2] - z;
        double d2 = dx * dx + dy * dy + dz * dz, b2 = b[0] * b[0] + b[1] * b[1] + b[2] * b[2];
        double kd = gm / (d2 * sqrt(d2)), kb = gm / (b2 * sqrt(b2));
        ax += kd * dx - kb * b[0];
        ay += kd * dy - kb * b[1];
        az += kd * dz - kb * b[2];
    }
    if (ip[3]) {
        double kj = p[3] / (r2 * r2 * sqrt(r2)), q = 5.0 * z * z / r2;
        ax += kj * x * (1.0 - q);
        ay += kj * yy * (1.0 - q);
        az += kj * z * (3.0 - q);
    }
    f[0] = y[3]; f[1] = y[4]; f[2] = y[5];
    f[3] = ax; f[4] = ay; f[5] = az;
    return 0;
}

static double rms(const double *v, const double *scale)
{
    double s = 0.0;
    for (int i = 0; i < 6; i++)
        s += (v[i] / scale[i]) * (v[i] / scale[i]);
    return sqrt(s / 6.0);
}

/* The state at stage s of a step of size h from y: y + h sum_j a_sj K_j (row s of A, NX wide). */
static void stage_state(const double *y, double K[][6], const double *A, int s, double h, double *yi)
{
    for (int i = 0; i < 6; i++) {
        double acc = 0.0;
        for (int j = 0; j < s; j++)
            acc += K[j][i] * A[NX * s + j];
        yi[i] = y[i] + acc * h;
    }
}

/* Right-hand side at one point (for tests and the benchmark); 0, or 1 outside the epochs. */
int coast_rhs(const double *p, const int *ip, double t, const double *y, double *f)
{
    return rhs(p, ip, t, y, f);
}

/* Up to max_steps accepted steps from (t, y) towards t_bound.  h_abs <= 0: choose the first step.
 * Writes ts[0..n], ys[6 (n+1)], dense coefficients F[42 n] (7 x 6 per step, scipy's layout), n,
 * the right-hand-side count, the next step size, the failing epoch.  Returns 0 at t_bound, 1 when
 * max_steps were taken, -1 step size too small, -2 epoch outside the model's range. */
int coast_dop853(const double *p, const int *ip, const double *A, const double *B, const double *C,
                 const double *E3, const double *E5, const double *D, double t, const double *y_in,
                 double t_bound, double rtol, double atol, double max_step, double h_abs, int max_steps,
                 double *ts, double *ys, double *F, int *n_out, int *nfev_out, double *h_out, double *t_fail)
{
    double y[6], f[6], K[NX][6], yi[6], ynew[6], fnew[6], scale[6];
    const double dir = t_bound >= t ? 1.0 : -1.0;
    int nfev = 0, n = 0, status = 1;
    memcpy(y, y_in, sizeof y);
    *n_out = 0;
    ts[0] = t;
    memcpy(ys, y, sizeof y);
    if (rhs(p, ip, t, y, f)) { *t_fail = t; *nfev_out = 0; return -2; }
    nfev++;
    if (h_abs <= 0.0) {  /* scipy's select_initial_step with order 7 */
        double len = fabs(t_bound - t), d0, d1, d2, h0, h1, f1[6], df[6];
        for (int i = 0; i < 6; i++)
            scale[i] = atol + fabs(y[i]) * rtol;
        d0 = rms(y, scale);
        d1 = rms(f, scale);
        h0 = (d0 < 1e-5 || d1 < 1e-5) ? 1e-6 : 0.01 * d0 / d1;
        if (h0 > len) h0 = len;
        for (int i = 0; i < 6; i++)
            yi[i] = y[i] + h0 * dir * f[i];
        if (rhs(p, ip, t + h0 * dir, yi, f1)) { *t_fail = t + h0 * dir; *nfev_out = nfev; return -2; }
        nfev++;
        for (int i = 0; i < 6; i++)
            df[i] = f1[i] - f[i];
        d2 = rms(df, scale) / h0;
        h1 = (d1 <= 1e-15 && d2 <= 1e-15) ? fmax(1e-6, h0 * 1e-3) : pow(0.01 / fmax(d1, d2), 1.0 / 8.0);
        h_abs = fmin(fmin(100.0 * h0, h1), fmin(len, max_step));
    }
    while (n < max_steps) {
        double min_step = 10.0 * fabs(nextafter(t, dir * INFINITY) - t), h = 0.0, t_new = t;
        int accepted = 0, rejected = 0;
        if (h_abs > max_step) h_abs = max_step;
        else if (h_abs < min_step) h_abs = min_step;
        while (!accepted) {
            double e5 = 0.0, e3 = 0.0, err;
            if (h_abs < min_step) { status = -1; goto done; }
            h = h_abs * dir;
            t_new = t + h;
            if (dir * (t_new - t_bound) > 0) t_new = t_bound;
            h = t_new - t;
            h_abs = fabs(h);
            memcpy(K[0], f, sizeof f);
            for (int s = 1; s < NS; s++) {
                stage_state(y, K, A, s, h, yi);
                if (rhs(p, ip, t + C[s] * h, yi, K[s])) { *t_fail = t + C[s] * h; status = -2; goto done; }
                nfev++;
            }
            for (int i = 0; i < 6; i++) {
                double acc = 0.0;
                for (int j = 0; j < NS; j++)
                    acc += K[j][i] * B[j];
                ynew[i] = y[i] + h * acc;
            }
            if (rhs(p, ip, t + h, ynew, fnew)) { *t_fail = t + h; status = -2; goto done; }
            nfev++;
            memcpy(K[NS], fnew, sizeof fnew);
            for (int i = 0; i < 6; i++) {
                double a5 = 0.0, a3 = 0.0, sc = atol + fmax(fabs(y[i]), fabs(ynew[i])) * rtol;
                for (int j = 0; j <= NS; j++) {
                    a5 += K[j][i] * E5[j];
                    a3 += K[j][i] * E3[j];
                }
                e5 += (a5 / sc) * (a5 / sc);
                e3 += (a3 / sc) * (a3 / sc);
            }
            err = (e5 == 0.0 && e3 == 0.0) ? 0.0 : h_abs * e5 / sqrt((e5 + 0.01 * e3) * 6.0);
            if (err < 1.0) {
                double factor = err == 0.0 ? 10.0 : fmin(10.0, 0.9 * pow(err, -1.0 / 8.0));
                if (rejected && factor > 1.0) factor = 1.0;
                h_abs *= factor;
                accepted = 1;
            } else {
                h_abs *= fmax(0.2, 0.9 * pow(err, -1.0 / 8.0));
                rejected = 1;
            }
        }
        /* dense output: three more stages, then scipy's seven coefficient rows */
        for (int s = NS + 1; s < NX; s++) {
            stage_state(y, K, A, s, h, yi);
            if (rhs(p, ip, t + C[s] * h, yi, K[s])) { *t_fail = t + C[s] * h; status = -2; goto done; }
            nfev++;
        }
        double *Fk = F + 42 * n;
        for (int i = 0; i < 6; i++) {
            double dy = ynew[i] - y[i];
            Fk[i] = dy;
            Fk[6 + i] = h * K[0][i] - dy;
            Fk[12 + i] = 2.0 * dy - h * (fnew[i] + K[0][i]);
            for (int r = 0; r < 4; r++) {
                double acc = 0.0;
                for (int j = 0; j < NX; j++)
                    acc += D[NX * r + j] * K[j][i];
                Fk[18 + 6 * r + i] = h * acc;
            }
        }
        t = t_new;
        memcpy(y, ynew, sizeof y);
        memcpy(f, fnew, sizeof f);
        n++;
        ts[n] = t;
        memcpy(ys + 6 * n, y, sizeof y);
        if (dir * (t - t_bound) >= 0) { status = 0; break; }
    }
done:
    *n_out = n;
    *nfev_out = nfev;
    *h_out = h_abs;
    return status;
}
