/* The elastic-joint law in C: artifact/elastic.py's ElasticLaw, the native step's linz_law.

   The law program's jet2 form (emitted from the parse tree as linz_law_jets) runs order by
   order; between two orders linz_next_order forms the link side's Taylor coefficients from
   the outputs so far (Spong, ASME J. Dyn. Sys. Meas. Control 109, 1987, sec. 4):
     after order 0: q'' = M^-1 (F + K (theta - q))             -> inputs (q', q'', 0, 0)
     after order 1: q''' = M^-1 (K (theta' - q') + F' - M' q'')  -> inputs (q''/2, q'''/2, 0, 0)
   and after order 2 (M'' = 2 c2(M), F'' = 2 c2(F))
     b = M^-1 (F'' - 2 M' q''' - M'' q'' - K q'' - K J^-1 (K (theta - q) + D theta')),
     A = M^-1 K J^-1,
   written after the law's values as A (nq x nq), b (nq) and the chains (q, q', q'', q''' per
   joint), as ElasticLaw lays them out. Sizes and offsets are -D macros of this artifact
   (LINZ_NQ, LINZ_JETS_SIZE, LINZ_OFF_M, LINZ_OFF_F, LINZ_OFF_K, LINZ_OFF_J, LINZ_OFF_D). A
   singular M raises the invalid flag, which the step reads as a model not finite here
   (Python's solve raises). */

#include <fenv.h>
#include <math.h>
#include <string.h>

#include "linz_step.h"
#include "linz_linalg.h"

#define NQ LINZ_NQ

void linz_law_jets(const double *x, const double *p, double *out0, double *out1, double *out2, void *between);

typedef struct {
    const double *x;
    double M[NQ * NQ], M1[NQ * NQ], F1[NQ], K[NQ], qdd[NQ], qddd[NQ], spring[NQ];
    double work[NQ * NQ + NQ];
    int failed;
} elastic_terms;

/* x = M^-1 rhs by Gaussian elimination with partial pivoting (numpy.linalg.solve's LU) */
static void solve_m(elastic_terms *e, const double *rhs, double *x) {
    if (lu_solve(e->M, rhs, NQ, e->work, x) != 0) e->failed = 1;
}

/* M v for a row-major n x n matrix */
static void times(const double *M, const double *v, double *out) {
    for (int i = 0; i < NQ; i++) {
        double acc = 0.0;
        for (int k = 0; k < NQ; k++) acc += M[i * NQ + k] * v[k];
        out[i] = acc;
    }
}

void linz_next_order(int order, const double *outputs, double *inputs, void *between) {
    elastic_terms *e = (elastic_terms *)between;
    const double *x = e->x;
    double rhs[NQ], product[NQ];
    memset(inputs, 0, sizeof(double) * 4 * NQ);          /* M and F depend on the link side only */
    if (order == 1) {
        memcpy(e->M, outputs + LINZ_OFF_M, sizeof(e->M));
        memcpy(e->K, outputs + LINZ_OFF_K, sizeof(e->K));
        for (int i = 0; i < NQ; i++) {
            e->spring[i] = e->K[i] * (x[2 * NQ + i] - x[i]);
            rhs[i] = outputs[LINZ_OFF_F + i] + e->spring[i];
        }
        solve_m(e, rhs, e->qdd);
        for (int i = 0; i < NQ; i++) {
            inputs[i] = x[NQ + i];
            inputs[NQ + i] = e->qdd[i];
        }
        return;
    }
    memcpy(e->M1, outputs + LINZ_OFF_M, sizeof(e->M1));
    memcpy(e->F1, outputs + LINZ_OFF_F, sizeof(e->F1));
    times(e->M1, e->qdd, product);
    for (int i = 0; i < NQ; i++) rhs[i] = e->K[i] * (x[3 * NQ + i] - x[NQ + i]) + e->F1[i] - product[i];
    solve_m(e, rhs, e->qddd);
    for (int i = 0; i < NQ; i++) {
        inputs[i] = 0.5 * e->qdd[i];
        inputs[NQ + i] = 0.5 * e->qddd[i];
    }
}

void linz_law(const double *x, const double *p, double *out) {
    elastic_terms e;
    double out1[LINZ_JETS_SIZE], out2[LINZ_JETS_SIZE], M2[NQ * NQ], drift[NQ], a[NQ], b[NQ], c[NQ], column[NQ];
    e.x = x;
    e.failed = 0;
    linz_law_jets(x, p, out, out1, out2, &e);
    const double *J = out + LINZ_OFF_J, *D = out + LINZ_OFF_D, *K = e.K;
    for (int i = 0; i < NQ * NQ; i++) M2[i] = 2.0 * out2[LINZ_OFF_M + i];
    times(e.M1, e.qddd, a);
    times(M2, e.qdd, b);
    for (int i = 0; i < NQ; i++) {
        double F2 = 2.0 * out2[LINZ_OFF_F + i];
        c[i] = K[i] / J[i];
        drift[i] = F2 - 2.0 * a[i] - b[i] - K[i] * e.qdd[i] - c[i] * (e.spring[i] + D[i] * x[3 * NQ + i]);
    }
    double *A = out + LINZ_JETS_SIZE, *bias = A + NQ * NQ, *chain = bias + NQ;
    double unit[NQ];
    for (int j = 0; j < NQ; j++) {                        /* A = M^-1 diag(K / J), column by column */
        memset(unit, 0, sizeof(unit));
        unit[j] = c[j];
        solve_m(&e, unit, column);
        for (int i = 0; i < NQ; i++) A[i * NQ + j] = column[i];
    }
    solve_m(&e, drift, bias);
    for (int i = 0; i < NQ; i++) {
        chain[4 * i] = x[i];
        chain[4 * i + 1] = x[NQ + i];
        chain[4 * i + 2] = e.qdd[i];
        chain[4 * i + 3] = e.qddd[i];
    }
    if (e.failed) feraiseexcept(FE_INVALID);
}
