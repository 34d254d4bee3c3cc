/* The native control step's context: sizes, layout, settings, state, inputs and outputs.
   The one definition of this layout: the C step includes it and the Python side hands the
   same text to cffi. Plain declarations only (no macros, no includes): cffi parses it. */

typedef struct linz_ctx {
    /* sizes and the law's form: 0 explicit (A, b), 1 mechanical (M, F, B, J, c), 2 computed torque */
    int n, m, chains, nq, form, law_size, ref_size, integral;
    int a_off, b_off, chain_off, mass_off, force_off, input_off, jacobian_off, bias_off;
    const int *chain_k, *chain_j, *chain_r, *gain_off, *output_off;
    const double *k_integral, *gains;
    double period;
    /* watchdog settings (WatchdogConfig) */
    double sigma_warn, sigma_act, sigma_stop, damping, stale_after, future_tolerance, max_dt, hold_time;
    double integral_limit;
    int envelope_action, divergence_action, safe_kind, anti_windup;
    const double *safe_value, *lower, *upper, *rate_limit;
    int n_widened, n_plain;
    const int *widened_index, *plain_index;
    const double *widened_lower, *widened_upper, *plain_lower, *plain_upper;
    int divergence_active;
    const double *divergence_scale;
    double divergence_span;
    /* state between steps */
    double *integrators, *last_command, *last_good_command, *last_errors, *stop_reference;
    int has_last_t, has_last_good_t, has_last_errors, integrate_next, diverged, stopping;
    double last_t, last_good_t;
    int above, below;
    double above_since, below_since, first_peak, last_high;
    /* the model's parameters */
    double *parameters;
    /* scratch: the law's values, then room for A, b, w, e, u and the solves */
    double *values, *work;
    /* outputs of a step, in one block read at once: the fields of LINZ_REPORT (-D macros from
       the Python layout), then u (m), saturated (m, 0 or 1) and y (chains); u, saturated and y
       point into it */
    double *report, *u, *saturated, *y;
} linz_ctx;

/* The plant dx/dt for the simulators: 0 f + G u, 1 mechanical (M, F, B, qdot), 2 elastic joints
   (M, F, stiffness, motor_inertia, motor_damping). */
typedef struct linz_plant {
    int n, m, nq, form, values_size;
    int f_off, g_off, mass_off, force_off, input_off, qdot_off, stiffness_off, inertia_off, damping_off;
    double *parameters, *values, *work;
} linz_plant;

int linz_step(linz_ctx *c, const double *x, const double *ref, double t, double now, int reference_ok);
void linz_refuse(linz_ctx *c, int reason, double now);
int linz_evaluate(linz_ctx *c, const double *x);
int linz_derivative(linz_plant *p, const double *x, const double *u, double *out);
int linz_rk4(linz_plant *p, const double *x, const double *u, double h, int steps, double *out);
