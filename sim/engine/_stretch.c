/* Plain ticks in C: the fast-mode tick of an LTI plant under built-in PID loops, with
 * nothing active that needs Python in every tick (sim/engine/_stretch.py decides that):
 * faults that are one arithmetic operation on a sensor or actuator value, disturbances,
 * parameter steps and interlocks that force safe inputs are done here too.
 *
 * Each tick does what sim/engine/_engine.py's stages do, in the same order and with the
 * same floating-point operations, so the record is bit for bit the one the Python tick
 * writes:
 *   - the PID law of sim/model/_controllers.py, one IEEE operation per Python one (built
 *     with -ffp-contract=off so no multiply-add is fused);
 *   - the plant product through the very BLAS routine numpy's np.dot calls, handed in as
 *     a function pointer (the loader checks the two agree bit for bit before use).
 * A tick this code cannot finish as the Python tick would (a non-finite or huge command
 * or state, a value outside a limit's warn band) is left untouched for the Python tick,
 * which records why.
 *
 * Plain C with no Python headers: loaded with ctypes.
 */
#include <math.h>
#include <stdint.h>
#include <string.h>

#ifdef __FAST_MATH__
#error "_stretch.c must keep IEEE arithmetic: build it without -ffast-math"
#endif

typedef void (*gemv_fn)(int order, int trans, int64_t m, int64_t n, double alpha,
                        const double *a, int64_t lda, const double *x, int64_t incx,
                        double beta, double *y, int64_t incy);
typedef void (*gemv32_fn)(int order, int trans, int m, int n, double alpha,
                          const double *a, int lda, const double *x, int incx,
                          double beta, double *y, int incy);

enum { ROW_MAJOR = 101, NO_TRANS = 111 };
enum { WINDUP_UNWIND = 0, WINDUP_FREEZE = 1, WINDUP_OFF = 2 };
/* larger magnitudes go to the Python tick, whose finiteness test squares them */
#define HUGE_VALUE 1e150

/* A sensor or actuator fault as one operation on one value (sim/faults/_faults.py):
 * v = a, v += a, v *= a, v = min(max(v, a), b), v += a * (t - b). */
enum { OP_SET = 0, OP_ADD = 1, OP_MUL = 2, OP_CLAMP = 3, OP_DRIFT = 4 };
enum { ON_INPUT = 0, ON_SENT = 1 };
typedef struct {
    int64_t place, kind, at;
    double a, b;
} fault_op;

/* One PID loop: settings, then the state the Python object holds between ticks. */
typedef struct {
    int64_t measure, drive, reference, windup;
    double kp, ki, kd, dt, d_pole, d_gain, unwind_gain, lo, hi;
    double integral, derivative, y_prev;
    int64_t has_prev;
} pid_loop;

/* What the engine's tick reads and writes: pointers into its own arrays. */
typedef struct {
    void *gemv;
    int64_t gemv_int64;          /* 1: the routine takes 64-bit integers (ILP64) */
    int64_t n, m, p, n_refs, n_columns;
    double *block;               /* [[Ad, Bd], [C, D]], (n + p) x (n + m), row-major */
    double *row;                 /* the engine's tick record */
    int64_t at_r, at_cmd, at_sent, at_y, at_xu;   /* where r, cmd, sent, y, [x; u] start */
    double *next;                /* [x_{k+1}; y_k] */
    double *ed_d;                /* Ed d, added to x_{k+1} while disturbed */
    int64_t disturbed;
    pid_loop *loops;
    int64_t n_loops;
    double tick;
    /* the limits' screen (sim/safety/_limits.py): per limit, its column in the record,
     * its warn band and rate_warn * tick; the values it saw last tick */
    int64_t n_limits, rates, primed;
    int64_t *limit_at;
    double *warn_low, *warn_high, *rate_warn_tick, *seen;
    /* scratch for one tick, sized by the caller: the loops' next state and drive
     * values, the limits' values, kept until the tick is done */
    pid_loop *loops_next;
    double *drive, *seen_now;
    /* the active faults' operations, in the order they were injected */
    int64_t n_ops;
    fault_op *ops;
    /* interlocks that force safe inputs: which inputs, their safe values; the demanded
     * inputs (scratch), which the limits judge */
    int64_t forcing;
    const uint8_t *force_mask;
    const double *safe_u;
    double *demand;
} stretch;

static void plant_product(const stretch *s) {
    int64_t rows = s->n + s->p, cols = s->n + s->m;
    const double *xu = s->row + s->at_xu;
    if (s->gemv_int64)
        ((gemv_fn)s->gemv)(ROW_MAJOR, NO_TRANS, rows, cols, 1.0, s->block, cols, xu, 1,
                           0.0, s->next, 1);
    else
        ((gemv32_fn)s->gemv)(ROW_MAJOR, NO_TRANS, (int)rows, (int)cols, 1.0, s->block,
                             (int)cols, xu, 1, 0.0, s->next, 1);
}

/* The faults' operations on the values at ``place``, as the Python tick applies them
 * (Python's min(max(v, a), b) keeps v unless a > v, then the result unless b < it). */
static void apply_faults(const stretch *s, int64_t place, double *v, double t) {
    for (int64_t i = 0; i < s->n_ops; i++) {
        const fault_op *op = &s->ops[i];
        if (op->place != place)
            continue;
        double *x = &v[op->at];
        switch (op->kind) {
        case OP_SET: *x = op->a; break;
        case OP_ADD: *x += op->a; break;
        case OP_MUL: *x *= op->a; break;
        case OP_CLAMP:
            if (op->a > *x) *x = op->a;
            if (op->b < *x) *x = op->b;
            break;
        default: *x += op->a * (t - op->b); break;
        }
    }
}

/* Safety.force: the safe value of every input a tripped interlock forces. */
static void force_safe(const stretch *s, double *u) {
    for (int64_t i = 0; i < s->m; i++)
        if (s->force_mask[i])
            u[i] = s->safe_u[i];
}

static int plain(const double *v, int64_t count) {
    for (int64_t i = 0; i < count; i++)
        if (!(fabs(v[i]) <= HUGE_VALUE))   /* NaN fails this too */
            return 0;
    return 1;
}

/* LimitBank's screen on the record: every value inside its warn band and every change
 * since last tick inside rate_warn * tick (NaN never is). The values into now. */
static int inside_warn_bands(const stretch *s, const double *row, double *now) {
    for (int64_t j = 0; j < s->n_limits; j++) {
        double v = row[s->limit_at[j]];
        double d = s->primed ? fabs(v - s->seen[j]) : 0.0;
        if (s->rates && !(d <= s->rate_warn_tick[j]))
            return 0;
        if (!(s->warn_low[j] <= v && v <= s->warn_high[j]))
            return 0;
        now[j] = v;
    }
    return 1;
}

/* Pid.compute on (sent, r): the drive value and the loop's next state, nothing written. */
static double pid_step(const pid_loop *c, const double *sent, const double *r,
                       pid_loop *next) {
    double yk = sent[c->measure];
    double e = r[c->reference] - yk;
    double y_prev = c->has_prev ? c->y_prev : yk;
    *next = *c;
    next->y_prev = yk;
    next->has_prev = 1;
    if (c->kd != 0.0)
        next->derivative = c->d_pole * c->derivative - c->d_gain * (yk - y_prev);
    double v = c->kp * e + c->integral + next->derivative;
    double out = v < c->lo ? c->lo : (v > c->hi ? c->hi : v);
    double ki_e_dt = c->ki * e * c->dt;
    if (c->windup == WINDUP_UNWIND)
        next->integral = c->integral + (ki_e_dt + (out - v) * c->unwind_gain);
    else if (c->windup == WINDUP_FREEZE) {
        if (!((v > c->hi && e > 0) || (v < c->lo && e < 0)))
            next->integral = c->integral + ki_e_dt;
    } else
        next->integral = c->integral + ki_e_dt;
    return out;
}

/* Ticks k0 .. k0 + count - 1, references for each in refs (count x n_refs), each
 * tick's record into out (count x n_columns). Returns how many ticks were done: fewer
 * than count when a tick must be left to the Python tick (which writes again what of it
 * was written here: its state, PID loops and limits' memory are left as they were). */
int64_t run_stretch(stretch *s, int64_t k0, int64_t count, const double *refs,
                    double *out) {
    pid_loop *next = s->loops_next;
    double *drive = s->drive, *seen_now = s->seen_now;
    double *row = s->row, *r = row + s->at_r, *cmd = row + s->at_cmd;
    double *sent = row + s->at_sent, *y_rec = row + s->at_y;
    double *x = row + s->at_xu, *u = x + s->n;
    double *x_next = s->next, *y = s->next + s->n;
    int64_t j;
    for (j = 0; j < count; j++) {
        int64_t k = k0 + j;
        memcpy(r, refs + j * s->n_refs, (size_t)s->n_refs * sizeof(double));
        for (int64_t i = 0; i < s->n_loops; i++) {
            drive[i] = pid_step(&s->loops[i], sent, r, &next[i]);
            if (!(fabs(drive[i]) <= HUGE_VALUE))
                return j;
        }
        for (int64_t i = 0; i < s->n_loops; i++)
            cmd[s->loops[i].drive] = drive[i];
        if (!plain(cmd, s->m))
            return j;
        double t = (double)k * s->tick;
        memcpy(u, cmd, (size_t)s->m * sizeof(double));
        apply_faults(s, ON_INPUT, u, t);
        if (s->forcing) {
            memcpy(s->demand, u, (size_t)s->m * sizeof(double));
            force_safe(s, u);
        }
        plant_product(s);
        if (s->disturbed)
            for (int64_t i = 0; i < s->n; i++)
                x_next[i] += s->ed_d[i];
        if (!plain(x_next, s->n) || !plain(y, s->p))
            return j;
        memcpy(y_rec, y, (size_t)s->p * sizeof(double));
        if (s->n_limits) {
            if (s->forcing)        /* the limits judge the demanded inputs */
                memcpy(u, s->demand, (size_t)s->m * sizeof(double));
            if (!inside_warn_bands(s, row, seen_now))
                return j;
            if (s->forcing)
                force_safe(s, u);
        }
        memcpy(sent, y, (size_t)s->p * sizeof(double));
        apply_faults(s, ON_SENT, sent, t);
        row[1] = t;
        row[4] = 1.0;
        memcpy(out + j * s->n_columns, row, (size_t)s->n_columns * sizeof(double));
        memcpy(x, x_next, (size_t)s->n * sizeof(double));
        memcpy(s->loops, next, (size_t)s->n_loops * sizeof(pid_loop));
        if (s->n_limits) {
            memcpy(s->seen, seen_now, (size_t)s->n_limits * sizeof(double));
            s->primed = 1;
        }
    }
    return j;
}
