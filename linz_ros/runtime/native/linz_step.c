/* The native control step: ControllerCore.step (linz_ros/runtime/core.py) in C.

   The same decisions in the same order and the same arithmetic in the same order, so both
   backends give the same commands, modes and records (the tests hold them to 1e-12 and
   most steps agree to the last bit). Where the Python core uses LAPACK (matrices above
   3 x 3) linz_linalg.h has its own small routines.

   The law is a separate translation unit (emitted from the artifact's parse tree), so the
   compiler cannot move its arithmetic across the floating-point flag test below.
   The codes of modes, reasons and settings arrive as -D macros generated from the Python
   tables (linz_ros.runtime.steprecord), their one home. */

#include <fenv.h>
#include <math.h>
#include <string.h>

#include "linz_step.h"
#include "linz_linalg.h"

void linz_law(const double *x, const double *p, double *out);

#define LAW_FLAGS (FE_DIVBYZERO | FE_INVALID | FE_OVERFLOW)

/* ---- the machine's watchdogs (runtime/watchdogs.py) ------------------------------------ */

static int outside(const double *x, int count, const int *index, const double *lower, const double *upper) {
    for (int i = 0; i < count; i++) {
        double v = x[index[i]];
        if (!(lower[i] <= v && v <= upper[i])) return 1;
    }
    return 0;
}

/* DivergenceWatch.check: the episode, its first peak and the latest time the error reached it */
static int divergence_check(linz_ctx *c, const double *errors, double t) {
    double scaled = 0.0;
    int first = 1;
    for (int i = 0; i < c->chains; i++) {
        double k = c->divergence_scale[i];
        if (k == 0.0) continue;
        double v = fabs(errors[i]) * k;
        if (first || v > scaled) scaled = v;     /* Python's max keeps the first of equals and nan */
        first = 0;
    }
    double span = c->divergence_span;
    if (scaled > 1.0) {
        c->below = 0;
        if (!c->above) {
            c->above = 1;
            c->above_since = t;
            c->first_peak = scaled;
            c->last_high = -INFINITY;
        }
    } else if (!c->above) {
        return 0;
    } else if (!c->below) {
        c->below = 1;
        c->below_since = t;
    } else if (t - c->below_since >= span) {
        c->above = 0;
        return 0;
    }
    double elapsed = t - c->above_since;
    if (elapsed <= 0.5 * span && scaled > c->first_peak) c->first_peak = scaled;
    /* the latest time the first peak was reached (watchdogs.DivergenceWatch.check explains why it suffices) */
    if (elapsed > 0.5 * span && scaled >= c->first_peak) c->last_high = t;
    return elapsed >= span && c->last_high > t - 0.5 * span;
}

/* ---- the step ---------------------------------------------------------------------------- */

static void hold_reference_of(const linz_ctx *c, const double *values, double *ref) {
    int j = 0;
    for (int i = 0; i < c->chains; i++) {
        ref[j] = values[c->chain_off + c->output_off[i]];
        for (int d = 1; d <= c->chain_r[i]; d++) ref[j + d] = 0.0;
        j += c->chain_r[i] + 1;
    }
}

static void report(linz_ctx *c, int mode, int reason, double sigma_min, double condition, int warn,
                   double damping, int alarms, int outputs_valid) {
    double *r = c->report;
    r[LINZ_REPORT_mode] = mode;
    r[LINZ_REPORT_reason] = reason;
    r[LINZ_REPORT_sigma_min] = sigma_min;
    r[LINZ_REPORT_condition] = condition;
    r[LINZ_REPORT_warn] = warn;
    r[LINZ_REPORT_damping] = damping;
    r[LINZ_REPORT_alarms] = alarms;
    r[LINZ_REPORT_outputs_valid] = outputs_valid;
}

static void safe(linz_ctx *c, int reason, double sigma_min, double condition, int warn, double now, int alarms) {
    int m = c->m;
    if (!isfinite(now)) now = INFINITY;
    int mode = LINZ_MODE_safe;
    if (c->safe_kind == LINZ_SAFE_hold && c->has_last_good_t && 0.0 <= now - c->last_good_t
        && now - c->last_good_t <= c->hold_time) {
        memcpy(c->u, c->last_good_command, sizeof(double) * m);
        mode = LINZ_MODE_held;
    } else if (c->safe_kind == LINZ_SAFE_fixed) {
        memcpy(c->u, c->safe_value, sizeof(double) * m);
    } else {
        for (int i = 0; i < m; i++) c->u[i] = 0.0;
    }
    for (int i = 0; i < m; i++) {
        double v = c->u[i];
        v = (c->lower[i] > v) ? c->lower[i] : v;     /* min(max(v, lo), hi) as Python evaluates it */
        v = (c->upper[i] < v) ? c->upper[i] : v;
        c->u[i] = v;
        c->last_command[i] = v;
        c->saturated[i] = 0.0;
    }
    c->integrate_next = 0;
    report(c, mode, reason, sigma_min, condition, warn, 0.0, alarms, 0);
}

void linz_refuse(linz_ctx *c, int reason, double now) {
    safe(c, reason, NAN, NAN, 0, now, 0);
}

/* the alarm whose action is the safe command (ControllerCore._acted_alarm); -1 for none */
static int acted_alarm(linz_ctx *c, int alarms) {
    if ((alarms & 2) && c->divergence_action == LINZ_DIVERGENCE_safe) c->diverged = 1;
    if (c->diverged) return LINZ_REASON_diverging;
    if ((alarms & 1) && c->envelope_action == LINZ_ENVELOPE_safe) return LINZ_REASON_outside_envelope;
    return -1;
}

/* the law's values at x into c->values (hold references, outputs); -1 where the Python law raises */
int linz_evaluate(linz_ctx *c, const double *x) {
    feclearexcept(LAW_FLAGS);
    linz_law(x, c->parameters, c->values);
    return fetestexcept(LAW_FLAGS) ? -1 : 0;
}

int linz_step(linz_ctx *c, const double *x, const double *ref, double t, double now, int reference_ok) {
    int n = c->n, m = c->m, chains = c->chains;
    double *values = c->values;
    for (int i = 0; i < n; i++)
        if (!isfinite(x[i])) return linz_refuse(c, LINZ_REASON_non_finite_state, now), 0;
    int had_last_t = c->has_last_t;
    double last_t = c->last_t;
    if (had_last_t && t <= last_t) return linz_refuse(c, LINZ_REASON_out_of_order, now), 0;
    if (now - t > c->stale_after) return linz_refuse(c, LINZ_REASON_stale, now), 0;
    if (t - now > c->future_tolerance) return linz_refuse(c, LINZ_REASON_future_stamp, now), 0;
    if (!reference_ok) return linz_refuse(c, LINZ_REASON_bad_reference, now), 0;
    for (int i = 0; i < c->ref_size; i++)
        if (!isfinite(ref[i])) return linz_refuse(c, LINZ_REASON_bad_reference, now), 0;

    feclearexcept(LAW_FLAGS);
    linz_law(x, c->parameters, values);
    if (fetestexcept(LAW_FLAGS)) return linz_refuse(c, LINZ_REASON_model_not_finite, now), 0;
    for (int i = 0; i < c->law_size; i++)
        if (!isfinite(values[i])) return linz_refuse(c, LINZ_REASON_model_not_finite, now), 0;

    double *A = c->work, *b = A + m * m, *w = b + m, *errors = w + m, *u = errors + chains;
    double *scratch = u + m;
    int have_a = 0;
    double sigma_min, sigma_max;
    if (c->form == 2) {
        if (inverse_mass_singular_values(values + c->mass_off, m, scratch, &sigma_min, &sigma_max) != 0)
            return linz_refuse(c, LINZ_REASON_model_not_finite, now), 0;
    } else {
        if (c->form == 0) {
            memcpy(A, values + c->a_off, sizeof(double) * m * m);
            memcpy(b, values + c->b_off, sizeof(double) * m);
        } else if (task_space_terms(c, values, A, b, scratch) != 0) {
            return linz_refuse(c, LINZ_REASON_model_not_finite, now), 0;
        }
        have_a = 1;
        if (singular_values(A, m, scratch, &sigma_min, &sigma_max) != 0)
            return linz_refuse(c, LINZ_REASON_model_not_finite, now), 0;
    }
    double condition = sigma_min > 0.0 ? sigma_max / sigma_min : INFINITY;
    double accepted_t = t <= now ? t : now;
    double dt = 0.0;
    if (had_last_t) dt = (t - last_t) < c->max_dt ? (t - last_t) : c->max_dt;   /* min(t - last_t, max_dt) */
    if (c->integral && c->integrate_next && c->has_last_errors) {
        double limit = c->integral_limit;
        for (int i = 0; i < chains; i++) {
            double value = c->integrators[i] + c->last_errors[i] * dt;
            value = (value < limit) ? value : limit;     /* max(-limit, min(limit, value)) */
            c->integrators[i] = (value > -limit) ? value : -limit;
        }
    }
    int alarms = 0;
    if (outside(x, c->n_widened, c->widened_index, c->widened_lower, c->widened_upper)) {
        alarms = 1;
        if (c->envelope_action == LINZ_ENVELOPE_stop && !c->stopping) {
            hold_reference_of(c, values, c->stop_reference);
            c->stopping = 1;
        }
    } else if (c->stopping && !outside(x, c->n_plain, c->plain_index, c->plain_lower, c->plain_upper)) {
        c->stopping = 0;
    }
    if (c->stopping) {
        if (c->envelope_action != LINZ_ENVELOPE_stop)
            c->stopping = 0;
        else
            ref = c->stop_reference;
    }
    /* the outer loop: v_i = y_ref^(r) - K_I eta - sum_d K_d (y^(d) - y_ref^(d)), less b_i for explicit laws */
    for (int i = 0; i < chains; i++) {
        int k = c->chain_k[i], j = c->chain_j[i], r = c->chain_r[i];
        const double *gains = c->gains + c->gain_off[i];
        double v = ref[j + r];
        if (c->k_integral[i] != 0.0) v = v - c->k_integral[i] * c->integrators[i];
        for (int d = 0; d < r; d++) v = v - gains[d] * (values[k + d] - ref[j + d]);
        if (c->form == 0) v = v - values[c->b_off + i];
        w[i] = v;
        errors[i] = values[k] - ref[j];
    }
    int warn = !(sigma_min >= c->sigma_warn);
    double damping = 0.0;
    if (c->divergence_active && divergence_check(c, errors, t)) alarms |= 2;
    int acted = !(sigma_min >= c->sigma_stop) ? LINZ_REASON_singular : acted_alarm(c, alarms);
    if (acted >= 0) {
        if (acted != LINZ_REASON_diverging) c->above = 0;    /* DivergenceWatch.end_episode */
        c->has_last_t = 1;
        c->last_t = accepted_t;
        safe(c, acted, sigma_min, condition, warn, now, alarms);
        return 0;
    }
    int mode, reason, failed;                    /* mechanical laws: w = v here, b is subtracted below */
    if (sigma_min < c->sigma_act) {
        double ratio = sigma_min / c->sigma_act;
        damping = c->damping * sqrt(1.0 - ratio * ratio);
        failed = 0;
        if (!have_a) failed = task_space_terms(c, values, A, b, scratch);
        if (!failed) {
            if (c->form != 0)
                for (int i = 0; i < m; i++) w[i] = w[i] - b[i];
            failed = damped_solve(A, w, m, damping, scratch, u);
        }
        mode = LINZ_MODE_damped;
        reason = LINZ_REASON_near_singular;
    } else if (!have_a) {
        const double *M = values + c->mass_off, *F = values + c->force_off;
        for (int i = 0; i < m; i++) {
            double acc = -F[i];
            for (int k = 0; k < m; k++) acc += M[i * m + k] * w[k];
            u[i] = acc;
        }
        failed = 0;
        mode = LINZ_MODE_nominal;
        reason = LINZ_REASON_ok;
    } else {
        if (c->form != 0)
            for (int i = 0; i < m; i++) w[i] = w[i] - b[i];
        failed = solve(A, w, m, scratch, u);
        mode = LINZ_MODE_nominal;
        reason = LINZ_REASON_ok;
    }
    if (failed) {
        c->has_last_t = 1;
        c->last_t = accepted_t;
        safe(c, LINZ_REASON_singular, sigma_min, condition, warn, now, alarms);
        return 0;
    }
    /* the saturation watchdog (WatchdogConfig.limit); the first step after a reset is
       rate-limited from the resting command over one period */
    double limit_dt = had_last_t ? dt : c->period;
    int any_saturated = 0, finite = 1;
    for (int i = 0; i < m; i++) {
        double value = u[i];
        int cut = 0;
        double rate = c->rate_limit[i];
        if (rate != INFINITY) {
            double last = c->last_command[i], step = rate * limit_dt;
            if (value > last + step) {
                value = last + step;
                cut = 1;
            } else if (value < last - step) {
                value = last - step;
                cut = 1;
            }
        }
        if (value > c->upper[i]) {
            value = c->upper[i];
            cut = 1;
        } else if (value < c->lower[i]) {
            value = c->lower[i];
            cut = 1;
        }
        u[i] = value;
        c->saturated[i] = cut ? 1.0 : 0.0;
        any_saturated |= cut;
        if (!isfinite(value)) finite = 0;
    }
    if (!finite) {
        c->has_last_t = 1;
        c->last_t = accepted_t;
        safe(c, LINZ_REASON_non_finite_command, sigma_min, condition, warn, now, alarms);
        return 0;
    }
    if (c->stopping) {
        mode = LINZ_MODE_stopping;
        reason = LINZ_REASON_outside_envelope;
    } else if (alarms && reason == LINZ_REASON_ok) {
        reason = (alarms & 1) ? LINZ_REASON_outside_envelope : LINZ_REASON_diverging;
    }
    c->has_last_t = 1;
    c->last_t = accepted_t;
    c->has_last_good_t = 1;
    c->last_good_t = t;
    memcpy(c->u, u, sizeof(double) * m);
    memcpy(c->last_command, u, sizeof(double) * m);
    memcpy(c->last_good_command, u, sizeof(double) * m);
    memcpy(c->last_errors, errors, sizeof(double) * chains);
    c->has_last_errors = 1;
    int frozen = mode == LINZ_MODE_stopping
                 || (c->anti_windup && (mode != LINZ_MODE_nominal || any_saturated));
    c->integrate_next = !frozen;
    for (int i = 0; i < chains; i++) c->y[i] = values[c->chain_off + c->output_off[i]];
    report(c, mode, reason, sigma_min, condition, warn, damping, alarms, 1);
    return 0;
}
