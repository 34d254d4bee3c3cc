/* Small dense linear algebra of the native step and plant (runtime/_linalg.py in C).

   Closed forms for up to 3 x 3 exactly as the Python core writes them; above that one-sided
   Jacobi for singular values (Hestenes 1958; Demmel and Veselic, SIAM J. Matrix Anal. Appl.
   13(4), 1992), Householder tridiagonalisation and implicit QL for the eigenvalues of a mass
   matrix, Gaussian elimination with partial pivoting and Cholesky (Golub and Van Loan,
   Matrix Computations, alg. 3.4.1, 4.2.1 and 8.3.1). Included by each translation unit. */

#include <math.h>
#include <string.h>

static inline double max_abs(const double *a, int count) {
    double best = fabs(a[0]);
    for (int i = 1; i < count; i++) {
        double v = fabs(a[i]);
        if (v > best) best = v;
    }
    return best;
}

/* one-sided Jacobi: orthogonalise the columns of a copy; the singular values are their norms */
static inline void jacobi_singular_values(const double *a, int m, double *work, double *smin, double *smax) {
    double *u = work;
    memcpy(u, a, sizeof(double) * m * m);
    for (int sweep = 0; sweep < 60; sweep++) {
        int rotated = 0;
        for (int i = 0; i < m - 1; i++) {
            for (int j = i + 1; j < m; j++) {
                double alpha = 0.0, beta = 0.0, gamma = 0.0;
                for (int k = 0; k < m; k++) {
                    double ui = u[k * m + i], uj = u[k * m + j];
                    alpha += ui * ui;
                    beta += uj * uj;
                    gamma += ui * uj;
                }
                if (gamma == 0.0 || fabs(gamma) <= 1e-17 * sqrt(alpha * beta)) continue;
                rotated = 1;
                double zeta = (beta - alpha) / (2.0 * gamma);
                double tangent = copysign(1.0, zeta) / (fabs(zeta) + sqrt(1.0 + zeta * zeta));
                double cosine = 1.0 / sqrt(1.0 + tangent * tangent), sine = cosine * tangent;
                for (int k = 0; k < m; k++) {
                    double ui = u[k * m + i], uj = u[k * m + j];
                    u[k * m + i] = cosine * ui - sine * uj;
                    u[k * m + j] = sine * ui + cosine * uj;
                }
            }
        }
        if (!rotated) break;
    }
    double lo = INFINITY, hi = 0.0;
    for (int j = 0; j < m; j++) {
        double norm = 0.0;
        for (int k = 0; k < m; k++) norm += u[k * m + j] * u[k * m + j];
        norm = sqrt(norm);
        if (norm < lo) lo = norm;
        if (norm > hi) hi = norm;
    }
    *smin = lo;
    *smax = hi;
}

static inline void singular_values_3(const double *a, double *smin, double *smax) {
    double scale = max_abs(a, 9);
    if (!(scale > 0.0)) {
        *smin = *smax = (scale == 0.0) ? 0.0 : NAN;
        return;
    }
    if (scale == INFINITY) {
        *smin = NAN;
        *smax = INFINITY;
        return;
    }
    double a0 = a[0] / scale, a1 = a[1] / scale, a2 = a[2] / scale, a3 = a[3] / scale, a4 = a[4] / scale,
           a5 = a[5] / scale, a6 = a[6] / scale, a7 = a[7] / scale, a8 = a[8] / scale;
    double g11 = a0 * a0 + a3 * a3 + a6 * a6, g22 = a1 * a1 + a4 * a4 + a7 * a7, g33 = a2 * a2 + a5 * a5 + a8 * a8;
    double g12 = a0 * a1 + a3 * a4 + a6 * a7, g13 = a0 * a2 + a3 * a5 + a6 * a8, g23 = a1 * a2 + a4 * a5 + a7 * a8;
    double q = (g11 + g22 + g33) / 3.0;
    double off = g12 * g12 + g13 * g13 + g23 * g23;
    double d1 = g11 - q, d2 = g22 - q, d3 = g33 - q;
    double spread = sqrt((d1 * d1 + d2 * d2 + d3 * d3 + 2.0 * off) / 6.0);
    double largest, middle;
    if (spread > 0.0) {
        double b11 = d1 / spread, b22 = d2 / spread, b33 = d3 / spread;
        double b12 = g12 / spread, b13 = g13 / spread, b23 = g23 / spread;
        double half_det = 0.5 * (b11 * (b22 * b33 - b23 * b23) - b12 * (b12 * b33 - b23 * b13)
                                 + b13 * (b12 * b23 - b22 * b13));
        double clipped = half_det < 1.0 ? half_det : 1.0;     /* max(-1, min(1, h)) as Python evaluates it */
        clipped = clipped > -1.0 ? clipped : -1.0;
        double phi = acos(clipped) / 3.0;
        largest = q + 2.0 * spread * cos(phi);
        double smallest = q + 2.0 * spread * cos(phi + 2.0 * 3.141592653589793 / 3.0);
        middle = 3.0 * q - largest - smallest;
    } else {
        largest = middle = q;
    }
    double s_max = sqrt(largest);
    double s_mid = middle > 0.0 ? sqrt(middle) : 0.0;
    double det = fabs(a0 * (a4 * a8 - a5 * a7) - a1 * (a3 * a8 - a5 * a6) + a2 * (a3 * a7 - a4 * a6));
    double s_min = 0.0;
    if (s_mid > 0.0) {
        double ratio = det / (s_max * s_mid);
        s_min = s_mid < ratio ? s_mid : ratio;
    }
    *smin = s_min * scale;
    *smax = s_max * scale;
}

static inline void two_by_two(double p, double q, double r, double s, double *smin, double *smax) {
    double frob = p * p + q * q + r * r + s * s;
    double det = fabs(p * s - q * r);
    double disc = frob * frob - 4.0 * det * det;
    double big = sqrt(0.5 * (frob + sqrt(disc > 0.0 ? disc : 0.0)));
    *smin = det / big;
    *smax = big;
}

/* returns 0, or -1 where the Python core raises (a non-finite matrix above 3 x 3: LAPACK refuses it) */
static inline int singular_values(const double *a, int m, double *work, double *smin, double *smax) {
    if (m == 1) {
        *smin = *smax = fabs(a[0]);
        return 0;
    }
    if (m == 2) {
        double p = a[0], q = a[1], r = a[2], s = a[3];
        double frob = p * p + q * q + r * r + s * s;
        if (1e-140 < frob && frob < 1e140) {
            two_by_two(p, q, r, s, smin, smax);
            return 0;
        }
        double scale = max_abs(a, 4);
        if (!(scale > 0.0)) {
            *smin = *smax = (scale == 0.0) ? 0.0 : NAN;
            return 0;
        }
        if (scale == INFINITY) {
            *smin = NAN;
            *smax = INFINITY;
            return 0;
        }
        two_by_two(a[0] / scale, a[1] / scale, a[2] / scale, a[3] / scale, smin, smax);
        *smin = *smin * scale;
        *smax = *smax * scale;
        return 0;
    }
    if (m == 3) {
        singular_values_3(a, smin, smax);
        return 0;
    }
    for (int i = 0; i < m * m; i++)
        if (!isfinite(a[i])) return -1;
    jacobi_singular_values(a, m, work, smin, smax);
    return 0;
}

/* Householder reduction of a symmetric copy to tridiagonal form (Golub and Van Loan, alg. 8.3.1):
   d the diagonal, e[i] the entry between i and i + 1 (e[n - 1] = 0) */
static inline void tridiagonalize(const double *s, int n, double *work, double *d, double *e) {
    double *a = work, *v = work + n * n, *p = v + n;
    memcpy(a, s, sizeof(double) * n * n);
    for (int k = 0; k < n - 2; k++) {
        double norm2 = 0.0;
        for (int i = k + 1; i < n; i++) norm2 += a[i * n + k] * a[i * n + k];
        double x0 = a[(k + 1) * n + k];
        double norm = sqrt(norm2);
        double alpha = x0 >= 0.0 ? -norm : norm;
        e[k] = alpha;
        if (norm == 0.0) { e[k] = 0.0; continue; }
        v[k + 1] = x0 - alpha;
        for (int i = k + 2; i < n; i++) v[i] = a[i * n + k];
        double vv = 0.0;
        for (int i = k + 1; i < n; i++) vv += v[i] * v[i];
        if (vv == 0.0) continue;
        double tau = 2.0 / vv, vp = 0.0;
        for (int i = k + 1; i < n; i++) {
            double acc = 0.0;
            for (int j = k + 1; j < n; j++) acc += a[i * n + j] * v[j];
            p[i] = tau * acc;
            vp += p[i] * v[i];
        }
        double half = 0.5 * tau * vp;
        for (int i = k + 1; i < n; i++) p[i] -= half * v[i];      /* w = p - (tau p.v / 2) v */
        for (int i = k + 1; i < n; i++)
            for (int j = k + 1; j < n; j++) a[i * n + j] -= v[i] * p[j] + p[i] * v[j];
    }
    for (int i = 0; i < n; i++) d[i] = a[i * n + i];
    if (n >= 2) e[n - 2] = a[(n - 1) * n + n - 2];
    e[n - 1] = 0.0;
}

/* eigenvalues of a symmetric tridiagonal matrix in d, by the implicit QL method with
   shifts (Bowdler, Martin, Reinsch and Wilkinson, Numer. Math. 11, 1968: tql1); -1 if
   it does not converge */
static inline int tridiagonal_eigenvalues(double *d, double *e, int n) {
    for (int l = 0; l < n; l++) {
        int iterations = 0, m;
        do {
            for (m = l; m < n - 1; m++) {
                double dd = fabs(d[m]) + fabs(d[m + 1]);
                if (fabs(e[m]) <= 2.220446049250313e-16 * dd) break;
            }
            if (m != l) {
                if (iterations++ == 60) return -1;
                double g = (d[l + 1] - d[l]) / (2.0 * e[l]);
                double r = sqrt(g * g + 1.0);       /* mass matrices: no overflow to guard against */
                g = d[m] - d[l] + e[l] / (g + copysign(r, g));
                double s = 1.0, c = 1.0, p = 0.0;
                int i;
                for (i = m - 1; i >= l; i--) {
                    double f = s * e[i], b = c * e[i];
                    r = sqrt(f * f + g * g);
                    e[i + 1] = r;
                    if (r == 0.0) {
                        d[i + 1] -= p;
                        e[m] = 0.0;
                        break;
                    }
                    s = f / r;
                    c = g / r;
                    g = d[i + 1] - p;
                    r = (d[i] - g) * s + 2.0 * c * b;
                    p = s * r;
                    d[i + 1] = g + p;
                    g = c * r - b;
                }
                if (r == 0.0 && i >= l) continue;
                d[l] -= p;
                e[l] = g;
                e[m] = 0.0;
            }
        } while (m != l);
    }
    return 0;
}

static inline int eigenvalue_range(const double *s, int n, double *work, double *lo, double *hi) {
    double *d = work, *e = work + n, *scratch = work + 2 * n;
    tridiagonalize(s, n, scratch, d, e);
    if (tridiagonal_eigenvalues(d, e, n) != 0) return -1;
    double low = d[0], high = d[0];
    for (int i = 1; i < n; i++) {
        if (d[i] < low) low = d[i];
        if (d[i] > high) high = d[i];
    }
    *lo = low;
    *hi = high;
    return 0;
}

/* 1 / eig(M): returns -1 when M is not positive definite */
static inline int inverse_mass_singular_values(const double *M, int n, double *work, double *smin, double *smax) {
    double low, high;
    if (n == 1) {
        low = high = M[0];
    } else if (n == 2) {
        double p = M[0], q = M[1], s = M[3];
        double mean = 0.5 * (p + s), spread = hypot(0.5 * (p - s), q);
        high = mean + spread;
        low = high > 0.0 ? (p * s - q * q) / high : -1.0;
    } else if (eigenvalue_range(M, n, work, &low, &high) != 0) {
        return -1;
    }
    if (!(low > 0.0)) return -1;
    *smin = 1.0 / high;
    *smax = 1.0 / low;
    return 0;
}

/* Gaussian elimination with partial pivoting on a copy; -1 on a zero pivot */
static inline int lu_solve(const double *a, const double *rhs, int m, double *work, double *out) {
    double *A = work, *x = out;
    memcpy(A, a, sizeof(double) * m * m);
    memcpy(x, rhs, sizeof(double) * m);
    for (int k = 0; k < m; k++) {
        int pivot = k;
        for (int i = k + 1; i < m; i++)
            if (fabs(A[i * m + k]) > fabs(A[pivot * m + k])) pivot = i;
        if (A[pivot * m + k] == 0.0) return -1;
        if (pivot != k) {
            for (int j = 0; j < m; j++) {
                double tmp = A[k * m + j];
                A[k * m + j] = A[pivot * m + j];
                A[pivot * m + j] = tmp;
            }
            double tmp = x[k];
            x[k] = x[pivot];
            x[pivot] = tmp;
        }
        for (int i = k + 1; i < m; i++) {
            double factor = A[i * m + k] / A[k * m + k];
            for (int j = k; j < m; j++) A[i * m + j] -= factor * A[k * m + j];
            x[i] -= factor * x[k];
        }
    }
    for (int i = m - 1; i >= 0; i--) {
        double acc = x[i];
        for (int j = i + 1; j < m; j++) acc -= A[i * m + j] * x[j];
        x[i] = acc / A[i * m + i];
    }
    return 0;
}

/* A u = rhs (runtime/_linalg.solve); -1 where Python divides by zero */
static inline int solve(const double *a, const double *rhs, int m, double *work, double *u) {
    if (m == 1) {
        if (a[0] == 0.0) return -1;
        u[0] = rhs[0] / a[0];
        return 0;
    }
    if (m == 2) {
        double p = a[0], q = a[1], r = a[2], s = a[3];
        double det = p * s - q * r;
        if (det == 0.0) return -1;
        u[0] = (s * rhs[0] - q * rhs[1]) / det;
        u[1] = (p * rhs[1] - r * rhs[0]) / det;
        return 0;
    }
    if (m == 3) {
        double a0 = a[0], a1 = a[1], a2 = a[2], a3 = a[3], a4 = a[4], a5 = a[5], a6 = a[6], a7 = a[7], a8 = a[8];
        double c0 = a4 * a8 - a5 * a7, c3 = a5 * a6 - a3 * a8, c6 = a3 * a7 - a4 * a6;
        double det = a0 * c0 + a1 * c3 + a2 * c6;
        if (det == 0.0) return -1;
        double r0 = rhs[0], r1 = rhs[1], r2 = rhs[2];
        u[0] = (c0 * r0 + (a2 * a7 - a1 * a8) * r1 + (a1 * a5 - a2 * a4) * r2) / det;
        u[1] = (c3 * r0 + (a0 * a8 - a2 * a6) * r1 + (a2 * a3 - a0 * a5) * r2) / det;
        u[2] = (c6 * r0 + (a1 * a6 - a0 * a7) * r1 + (a0 * a4 - a1 * a3) * r2) / det;
        return 0;
    }
    return lu_solve(a, rhs, m, work, u);
}

/* u = A^T (A A^T + lambda^2 I)^-1 rhs (runtime/_linalg.damped_solve) */
static inline int damped_solve(const double *a, const double *rhs, int m, double damping, double *work, double *u) {
    double lam2 = damping * damping;
    if (m == 1) {
        double d = a[0] * a[0] + lam2;
        if (d == 0.0) return -1;
        u[0] = a[0] * rhs[0] / d;
        return 0;
    }
    if (m == 2) {
        double p = a[0], q = a[1], r = a[2], s = a[3];
        double m11 = p * p + q * q + lam2, m12 = p * r + q * s, m22 = r * r + s * s + lam2;
        double det = m11 * m22 - m12 * m12;
        if (det == 0.0) return -1;
        double w1 = (m22 * rhs[0] - m12 * rhs[1]) / det;
        double w2 = (m11 * rhs[1] - m12 * rhs[0]) / det;
        u[0] = p * w1 + r * w2;
        u[1] = q * w1 + s * w2;
        return 0;
    }
    /* above 2 x 2: min |[A; lambda I] u - [rhs; 0]| by Householder QR (Golub and Van Loan, alg. 5.2.1),
       conditioned as the square root of the normal equations, as runtime/_linalg.damped_solve */
    int rows = 2 * m;
    double *S = work, *y = work + rows * m;
    for (int i = 0; i < m; i++) {
        for (int j = 0; j < m; j++) {
            S[i * m + j] = a[i * m + j];
            S[(m + i) * m + j] = i == j ? damping : 0.0;
        }
        y[i] = rhs[i];
        y[m + i] = 0.0;
    }
    for (int k = 0; k < m; k++) {
        double norm2 = 0.0;
        for (int i = k; i < rows; i++) norm2 += S[i * m + k] * S[i * m + k];
        double norm = sqrt(norm2);
        if (norm == 0.0) return -1;
        double alpha = S[k * m + k] > 0.0 ? -norm : norm;
        double vk = S[k * m + k] - alpha;
        double vv = vk * vk;
        for (int i = k + 1; i < rows; i++) vv += S[i * m + k] * S[i * m + k];
        S[k * m + k] = alpha;
        if (vv == 0.0) continue;
        for (int j = k + 1; j < m; j++) {
            double dot = vk * S[k * m + j];
            for (int i = k + 1; i < rows; i++) dot += S[i * m + k] * S[i * m + j];
            double f = 2.0 * dot / vv;
            S[k * m + j] -= f * vk;
            for (int i = k + 1; i < rows; i++) S[i * m + j] -= f * S[i * m + k];
        }
        double dot = vk * y[k];
        for (int i = k + 1; i < rows; i++) dot += S[i * m + k] * y[i];
        double f = 2.0 * dot / vv;
        y[k] -= f * vk;
        for (int i = k + 1; i < rows; i++) y[i] -= f * S[i * m + k];
    }
    for (int i = m - 1; i >= 0; i--) {
        double acc = y[i];
        for (int j = i + 1; j < m; j++) acc -= S[i * m + j] * u[j];
        if (S[i * m + i] == 0.0) return -1;
        u[i] = acc / S[i * m + i];
    }
    return 0;
}

/* M X = columns (n x k, column-major in `columns`), in place; -1 if M is not positive definite */
static inline int cholesky_solve(const double *M, int n, double *columns, int k, double *L) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j <= i; j++) {
            double acc = M[i * n + j];
            for (int p = 0; p < j; p++) acc -= L[i * n + p] * L[j * n + p];
            if (i == j) {
                if (!(acc > 0.0)) return -1;
                L[i * n + i] = sqrt(acc);
            } else {
                L[i * n + j] = acc / L[j * n + j];
            }
        }
    for (int c = 0; c < k; c++) {
        double *x = columns + c * n;
        for (int i = 0; i < n; i++) {
            double acc = x[i];
            for (int p = 0; p < i; p++) acc -= L[i * n + p] * x[p];
            x[i] = acc / L[i * n + i];
        }
        for (int i = n - 1; i >= 0; i--) {
            double acc = x[i];
            for (int p = i + 1; p < n; p++) acc -= L[p * n + i] * x[p];
            x[i] = acc / L[i * n + i];
        }
    }
    return 0;
}

/* the 3 x 3 Cholesky solve written out as in runtime/_linalg._spd_solve_3 */
static inline int spd_solve_3(const double *a, double *columns, int k) {
    double d1 = a[0];
    if (!(d1 > 0.0)) return -1;
    double l11 = sqrt(d1);
    double l21 = a[3] / l11, l31 = a[6] / l11;
    double d2 = a[4] - l21 * l21;
    if (!(d2 > 0.0)) return -1;
    double l22 = sqrt(d2);
    double l32 = (a[7] - l31 * l21) / l22;
    double d3 = a[8] - l31 * l31 - l32 * l32;
    if (!(d3 > 0.0)) return -1;
    double l33 = sqrt(d3);
    for (int c = 0; c < k; c++) {
        double *x = columns + 3 * c;
        double y0 = x[0] / l11;
        double y1 = (x[1] - l21 * y0) / l22;
        double x2 = (x[2] - l31 * y0 - l32 * y1) / l33 / l33;
        double x1 = (y1 - l32 * x2) / l22;
        x[0] = (y0 - l21 * x1 - l31 * x2) / l11;
        x[1] = x1;
        x[2] = x2;
    }
    return 0;
}

/* A = J M^-1 B (m x m) and b = J M^-1 F + c (runtime/_linalg.task_space_terms); -1: M not positive definite */
static inline int task_space_terms(const linz_ctx *c, const double *values, double *A, double *b, double *work) {
    int nq = c->nq, m = c->m;
    const double *M = values + c->mass_off, *F = values + c->force_off, *B = values + c->input_off;
    const double *J = values + c->jacobian_off, *cc = values + c->bias_off;
    if (nq == 1) {
        if (!(M[0] > 0.0)) return -1;
        double inv = 1.0 / M[0];
        for (int r = 0; r < m; r++) {
            for (int j = 0; j < m; j++) A[r * m + j] = J[r] * B[j] * inv;
            b[r] = J[r] * F[0] * inv + cc[r];
        }
        return 0;
    }
    double *solved = work;                 /* m + 1 columns of length nq: B's columns, then F */
    for (int j = 0; j < m; j++)
        for (int i = 0; i < nq; i++) solved[j * nq + i] = B[i * m + j];
    for (int i = 0; i < nq; i++) solved[m * nq + i] = F[i];
    if (nq == 2) {
        double p = M[0], q = M[1], s = M[3];
        double det = p * s - q * q;
        if (!(p > 0.0 && det > 0.0)) return -1;
        for (int j = 0; j <= m; j++) {
            double b0 = solved[j * 2], b1 = solved[j * 2 + 1];
            solved[j * 2] = (s * b0 - q * b1) / det;
            solved[j * 2 + 1] = (p * b1 - q * b0) / det;
        }
    } else if (nq == 3) {
        if (spd_solve_3(M, solved, m + 1) != 0) return -1;
    } else if (cholesky_solve(M, nq, solved, m + 1, work + (m + 1) * nq) != 0) {
        return -1;
    }
    for (int r = 0; r < m; r++) {
        const double *row = J + r * nq;
        for (int j = 0; j <= m; j++) {
            const double *x = solved + j * nq;
            double value = 0.0;
            for (int k = 0; k < nq; k++) value += row[k] * x[k];
            if (j < m)
                A[r * m + j] = value;
            else
                b[r] = value + cc[r];
        }
    }
    return 0;
}

