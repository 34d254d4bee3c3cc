/* The plant's dx/dt and the classical Runge-Kutta step: NumericPlant (linz_ros/runtime/plant.py) in C.

   The same arithmetic in the same order as the Python plant, so a simulated run is the same
   with either backend. The dynamics program is a separate translation unit emitted from the
   artifact's parse tree; a domain error there (the Python plant raises) sets a floating-point
   flag, and a mass matrix that is not positive definite is refused: both return -1. */

#include <fenv.h>
#include <math.h>
#include <string.h>

#include "linz_step.h"
#include "linz_linalg.h"

void linz_dynamics(const double *x, const double *p, double *out);

#define MODEL_FLAGS (FE_DIVBYZERO | FE_INVALID | FE_OVERFLOW)

static int mechanical(linz_plant *p, const double *x, const double *u, double *out) {
    int nq = p->nq, m = p->m, n = p->n;
    const double *v = p->values, *M = v + p->mass_off, *F = v + p->force_off;
    double *rhs = p->work, *L = p->work + nq;
    if (p->form == 1) {
        const double *B = v + p->input_off;
        for (int i = 0; i < nq; i++) {
            double s = 0.0;                              /* F_i + sum(B_ij u_j): Python's sum starts at 0 */
            for (int j = 0; j < m; j++) s += B[i * m + j] * u[j];
            rhs[i] = F[i] + s;
        }
        memcpy(out, v + p->qdot_off, sizeof(double) * (n - nq));
    } else {
        const double *K = v + p->stiffness_off, *J = v + p->inertia_off, *D = v + p->damping_off;
        for (int i = 0; i < nq; i++) {
            double spring = K[i] * (x[2 * nq + i] - x[i]);
            rhs[i] = F[i] + spring;
            out[nq + i] = 0.0;
            out[2 * nq + i] = x[3 * nq + i];
            out[3 * nq + i] = (u[i] - spring - D[i] * x[3 * nq + i]) / J[i];
        }
        memcpy(out, x + nq, sizeof(double) * nq);
    }
    int failed = nq == 3 ? spd_solve_3(M, rhs, 1) : cholesky_solve(M, nq, rhs, 1, L);
    if (failed) return -1;
    memcpy(out + (p->form == 1 ? n - nq : nq), rhs, sizeof(double) * nq);
    return 0;
}

int linz_derivative(linz_plant *p, const double *x, const double *u, double *out) {
    feclearexcept(MODEL_FLAGS);
    linz_dynamics(x, p->parameters, p->values);
    int failed = 0;
    if (p->form == 0) {
        const double *f = p->values + p->f_off, *G = p->values + p->g_off;
        for (int i = 0; i < p->n; i++) {
            double acc = f[i];
            for (int j = 0; j < p->m; j++) acc += G[i * p->m + j] * u[j];
            out[i] = acc;
        }
    } else {
        failed = mechanical(p, x, u, out);
    }
    return (failed || fetestexcept(MODEL_FLAGS)) ? -1 : 0;
}

/* RK4 with u held, `steps` steps of size h (NumericPlant.rk4) */
int linz_rk4(linz_plant *p, const double *x0, const double *u, double h, int steps, double *out) {
    int n = p->n;
    double *k1 = p->work + 2 * (p->nq + 1) * (p->nq + 1), *k2 = k1 + n, *k3 = k2 + n, *k4 = k3 + n, *y = k4 + n;
    memcpy(out, x0, sizeof(double) * n);
    for (int s = 0; s < steps; s++) {
        if (linz_derivative(p, out, u, k1)) return -1;
        for (int i = 0; i < n; i++) y[i] = out[i] + 0.5 * h * k1[i];
        if (linz_derivative(p, y, u, k2)) return -1;
        for (int i = 0; i < n; i++) y[i] = out[i] + 0.5 * h * k2[i];
        if (linz_derivative(p, y, u, k3)) return -1;
        for (int i = 0; i < n; i++) y[i] = out[i] + h * k3[i];
        if (linz_derivative(p, y, u, k4)) return -1;
        for (int i = 0; i < n; i++) out[i] = out[i] + h / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]);
    }
    return 0;
}
