/*
 * tracker._kernel: the loops of tracker.solve over the bins, compiled.
 *
 * Why C: at N = 78 one Newton iteration of the interior-point method is a few thousand flops;
 * written with numpy it was about 60 small array calls, each costing more in interpreter and
 * dispatch overhead than in arithmetic (about 100 us per iteration, 2-8 ms per solve). Here an
 * iteration takes a few microseconds. What is here:
 *
 *   interior_point()  the general path: scaling, starting point, the iteration, back to shares;
 *   riccati()         the recursion of the exact (linear-quadratic) path;
 *   costs()           the objective of a final schedule, term by term.
 *
 * What stays in Python (tracker/core/solve.py, whose docstring gives the theory): choosing the path,
 * the closed forms, the convexity check, taking out bins that cannot trade, the Schedule.
 *
 * The problem, in the method's scaled units (inventories as fractions of the quantity, costs over
 * a yardstick cost), with x_j the inventory after bin j (j = 0 .. n-1), x_{-1} = 1 and
 * v_j = x_{j-1} - x_j:
 *
 *   minimise   sum_j [ h_j v_j + k_j v_j^(1+beta) - (b/2) v_j^2 + c_j x_j^p ]
 *              + A x_{n-1}^p + (b/2) (1 - x_{n-1})^2
 *   subject to 0 <= v_j <= u_j (u_j infinite where no cap can bind), x_{n-1} >= 0,
 *              or x_{n-1} = 0 when A is infinite (forced completion).
 *
 * A primal-dual interior-point method: multipliers lo_j (v_j >= 0), hi_j (v_j <= u_j, zero
 * where uncapped) and end (x_{n-1} >= 0, absent when forced). Each iteration solves one
 * symmetric tridiagonal Newton system in x, takes the largest step keeping slacks and
 * multipliers positive (times 0.995) and backtracks until the step reduces the norm of the
 * perturbed KKT residual or satisfies Armijo's condition on the log-barrier function.
 *
 * Entry points are called from tracker/core/solve.py only; tracker/core/_kernel.pyi types them. The first
 * solves a batch of problems laid end to end, each on its own (so an answer never depends on the
 * problems beside it), in one call:
 *
 *   interior_point(h, k, c, caps, out, sizes, iterations,
 *                  quantity, beta, b, p, terminal, tolerance, max_iterations) -> None
 *
 * h, k, c, caps: the problems' fixed cost, temporary impact, risk weight and caps (shares, inf
 * where none) per bin, in their own units, only bins that can trade (every cap > 0), problem
 * after problem: contiguous float64 buffers of sum(sizes) values. out: a writable buffer of the
 * same length that receives the optimal trades in shares. sizes: int64, the bins of each problem
 * (ValueError when one is below 1, OverflowError when they add up to more than a Py_ssize_t or a
 * problem's scratch space would). quantity, beta, b, p, terminal: float64, one per problem. iterations (int64, out): per problem
 * the Newton iterations taken (>= 0), or -1 when the method did not converge within
 * max_iterations, -2 when a Newton system was singular, -3 when the iterate became non-finite.
 * Each problem is scaled (see starting_point()), solved and converted back to shares.
 *
 * tracker/core/kernel_numpy.py is this file's twin in numpy, step for step (same stopping rules,
 * same codes, same errors); a change here is made there too, and tests/test_kernel_parity.py
 * holds the two together.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <math.h>
#include <stdlib.h>
#include <string.h>

#define BOUNDARY_FRACTION 0.995
#define BACKTRACKS 60

/* x^e, with the exponents the desk uses most taken by cheaper routes than pow(). */
static inline double power(double x, double e)
{
    if (e == 1.0) {
        return x;
    }
    if (e == 0.5) {
        return sqrt(x);
    }
    if (e == 2.0) {
        return x * x;
    }
    if (e == 1.5) {
        return x * sqrt(x);
    }
    if (e == 0.0) {
        return 1.0;
    }
    return pow(x, e);
}

/* The data of one problem and the scratch space of one run. */
typedef struct {
    Py_ssize_t n;
    int forced;
    double beta, b, p, terminal;
    const double *h, *k, *c;
    double *k1, *k2, *c1, *c2; /* derivative coefficients */
    double *cap_f;             /* 1 where a cap can bind, else 0 */
    double *caps_safe;         /* the cap, or 2 (more than any trade) where none can bind */
    double m;                  /* number of inequality constraints */
} Problem;

/* Everything evaluate() derives from an iterate x. */
typedef struct {
    double *v, *gap_hi, *d_bin, *dd_bin, *d_point, *dd_point;
    double x_end, value;
} State;

/* Per-iterate sums the merit function needs: sum r^2, sum (lambda g)^2 and the gap sum lambda g. */
typedef struct {
    double dual_sq, centre, gap, dual_inf;
} Sums;

static void evaluate(const Problem *P, const double *x, State *S)
{
    const Py_ssize_t n = P->n;
    const double beta = P->beta, b = P->b, p = P->p;
    double value = 0.0;
    for (Py_ssize_t j = 0; j < n; j++) {
        const double previous = j == 0 ? 1.0 : x[j - 1];
        const double v = previous - x[j];
        const double v_beta = power(v, beta);
        S->v[j] = v;
        S->d_bin[j] = P->h[j] + P->k1[j] * v_beta - b * v;
        S->dd_bin[j] = P->k2[j] * v_beta / v - b;
        S->gap_hi[j] = P->caps_safe[j] - v;
        const double x_safe = (P->forced && j == n - 1) ? 1.0 : x[j];
        const double x_pow = power(x_safe, p - 1.0);
        S->d_point[j] = P->c1[j] * x_pow;
        S->dd_point[j] = P->c2[j] * x_pow / x_safe;
        value += v * (P->h[j] + P->k[j] * v_beta - 0.5 * b * v) + P->c[j] * x_pow * x_safe;
    }
    S->x_end = x[n - 1];
    if (!P->forced) {
        const double x_end = S->x_end;
        const double end_pow = P->terminal * power(x_end, p - 1.0);
        S->d_point[n - 1] += p * end_pow - b * (1.0 - x_end);
        S->dd_point[n - 1] += p * (p - 1.0) * end_pow / x_end + b;
        value += end_pow * x_end + 0.5 * b * (1.0 - x_end) * (1.0 - x_end);
    }
    S->value = value;
}

/* Gradient in x from derivatives per bin (in v, d_bin_j - shift_j), per point and at the end. */
static void gradient(const Problem *P, const double *d_bin, const double *shift,
                     const double *d_point, double d_end, double *grad)
{
    const Py_ssize_t n = P->n;
    for (Py_ssize_t j = 0; j < n; j++) {
        grad[j] = d_point[j] - (d_bin[j] - shift[j]);
        if (j + 1 < n) {
            grad[j] += d_bin[j + 1] - shift[j + 1];
        }
    }
    if (P->forced) {
        grad[n - 1] = 0.0;
    } else {
        grad[n - 1] -= d_end;
    }
}

/* The dual residual r and the sums of assess(); shift = lo - hi is scratch space. */
static void assess(const Problem *P, const State *S, const double *lo, const double *hi,
                   double end, double *shift, double *r, Sums *out)
{
    const Py_ssize_t n = P->n;
    double gap = 0.0, centre = 0.0, dual_sq = 0.0, dual_inf = 0.0;
    for (Py_ssize_t j = 0; j < n; j++) {
        shift[j] = lo[j] - hi[j];
    }
    gradient(P, S->d_bin, shift, S->d_point, end, r);
    for (Py_ssize_t j = 0; j < n; j++) {
        const double comp_lo = lo[j] * S->v[j];
        const double comp_hi = hi[j] * S->gap_hi[j]; /* hi is 0 where no cap can bind */
        gap += comp_lo + comp_hi;
        centre += comp_lo * comp_lo + comp_hi * comp_hi;
        dual_sq += r[j] * r[j];
        const double a = fabs(r[j]);
        if (a > dual_inf || isnan(a)) {
            dual_inf = a;
        }
    }
    if (!P->forced) {
        const double comp_end = end * S->x_end;
        gap += comp_end;
        centre += comp_end * comp_end;
    }
    out->dual_sq = dual_sq;
    out->centre = centre;
    out->gap = gap;
    out->dual_inf = dual_inf;
}

/* Squared norm of the residual of the KKT conditions perturbed by mu. */
static double merit(const Problem *P, const Sums *s, double mu)
{
    return s->dual_sq + s->centre - 2.0 * mu * s->gap + P->m * mu * mu;
}

/* The log-barrier function: objective - mu * sum(log(slack)). */
static double barrier(const Problem *P, const State *S, double mu)
{
    double logs = 0.0;
    for (Py_ssize_t j = 0; j < P->n; j++) {
        logs += log(S->v[j]) + P->cap_f[j] * log(S->gap_hi[j]);
    }
    if (!P->forced) {
        logs += log(S->x_end);
    }
    return S->value - mu * logs;
}

/*
 * Solve the symmetric tridiagonal system (diagonal d, off-diagonal e) for rhs b in place.
 * First as positive definite (L D L^T, no pivoting, like LAPACK's dptsv); if a pivot is not
 * positive, Gaussian elimination with partial pivoting (like dgtsv); if that meets a zero pivot,
 * again with the diagonal shifted by 1e-12 of itself. Returns 0, or -1 when singular (for
 * n = 1: when the one pivot is zero).
 * b receives the solution; d and e are kept; work needs 4n doubles.
 */
static int solve_tridiagonal(Py_ssize_t n, const double *d, const double *e, double *b,
                             double *work)
{
    double *dd = work, *l = work + n, *rhs = work + 2 * n;
    if (n == 1) {
        if (d[0] == 0.0) {
            return -1;
        }
        b[0] /= d[0];
        return 0;
    }
    memcpy(dd, d, (size_t)n * sizeof(double));
    int positive = 1;
    for (Py_ssize_t i = 0; i < n - 1; i++) {
        if (!(dd[i] > 0.0)) {
            positive = 0;
            break;
        }
        l[i] = e[i] / dd[i];
        dd[i + 1] -= l[i] * e[i];
    }
    if (positive && dd[n - 1] > 0.0) {
        for (Py_ssize_t i = 1; i < n; i++) {
            b[i] -= l[i - 1] * b[i - 1];
        }
        b[n - 1] /= dd[n - 1];
        for (Py_ssize_t i = n - 2; i >= 0; i--) {
            b[i] = b[i] / dd[i] - l[i] * b[i + 1];
        }
        return 0;
    }
    /* Pivoting fallback: dd diagonal, l subdiagonal, up superdiagonal, up2 second one. */
    double *up = work + 3 * n;
    double *up2 = l; /* the failed factorisation's multipliers are not needed any more */
    memcpy(rhs, b, (size_t)n * sizeof(double));
    for (int attempt = 0; attempt < 2; attempt++) {
        for (Py_ssize_t i = 0; i < n; i++) {
            dd[i] = attempt == 0 ? d[i] : d[i] + 1e-12 * fabs(d[i]) + 1e-300;
            b[i] = rhs[i];
        }
        memcpy(up, e, (size_t)(n - 1) * sizeof(double));
        int singular = 0;
        for (Py_ssize_t i = 0; i < n - 1; i++) {
            const double sub_i = e[i]; /* symmetric: the subdiagonal is e too */
            if (fabs(dd[i]) >= fabs(sub_i)) {
                if (dd[i] == 0.0) {
                    singular = 1;
                    break;
                }
                const double fact = sub_i / dd[i];
                dd[i + 1] -= fact * up[i];
                b[i + 1] -= fact * b[i];
                up2[i] = 0.0;
            } else {
                const double fact = dd[i] / sub_i;
                dd[i] = sub_i;
                const double temp = dd[i + 1];
                dd[i + 1] = up[i] - fact * temp;
                if (i < n - 2) {
                    up2[i] = up[i + 1];
                    up[i + 1] = -fact * up[i + 1];
                } else {
                    up2[i] = 0.0;
                }
                up[i] = temp;
                const double tb = b[i];
                b[i] = b[i + 1];
                b[i + 1] = tb - fact * b[i + 1];
            }
        }
        if (singular || dd[n - 1] == 0.0) {
            continue;
        }
        b[n - 1] /= dd[n - 1];
        b[n - 2] = (b[n - 2] - up[n - 2] * b[n - 1]) / dd[n - 2];
        for (Py_ssize_t i = n - 3; i >= 0; i--) {
            b[i] = (b[i] - up[i] * b[i + 1] - up2[i] * b[i + 2]) / dd[i];
        }
        return 0;
    }
    return -1;
}

/* The largest t >= 0 with value + t * change >= 0 (value >= 0): infinite unless change < 0. */
static inline double ratio_limit(double value, double change)
{
    return change < 0.0 ? -value / change : INFINITY;
}

/* Hands out consecutive vectors of n doubles from one allocation. */
static double *take(double **cursor, Py_ssize_t count)
{
    double *vector = *cursor;
    *cursor += count;
    return vector;
}

/* Vectors of n doubles run() needs: 14 of its own, 4 for the tridiagonal solve, 2 states of 6. */
#define RUN_VECTORS (14 + 4 + 2 * 6)

/* The method itself; returns iterations, or a negative code (see the header comment). */
static int run(Problem *P, const double *start, double *x, double tolerance, int max_iterations,
               double *mem)
{
    const Py_ssize_t n = P->n;
    double *lo = take(&mem, n), *hi = take(&mem, n), *lo_new = take(&mem, n);
    double *hi_new = take(&mem, n), *x_new = take(&mem, n), *r = take(&mem, n);
    double *shift = take(&mem, n), *w = take(&mem, n), *diag = take(&mem, n);
    double *off = take(&mem, n), *dx = take(&mem, n), *dv = take(&mem, n);
    double *d_lo = take(&mem, n), *d_hi = take(&mem, n), *work = take(&mem, 4 * n);
    State states[2];
    for (int s = 0; s < 2; s++) {
        states[s].v = take(&mem, n);
        states[s].gap_hi = take(&mem, n);
        states[s].d_bin = take(&mem, n);
        states[s].dd_bin = take(&mem, n);
        states[s].d_point = take(&mem, n);
        states[s].dd_point = take(&mem, n);
    }
    State *S = &states[0], *S_new = &states[1];

    /* Start: the strictly feasible schedule, multipliers on the central path for mu = 1/m. */
    double executed = 0.0;
    for (Py_ssize_t j = 0; j < n; j++) {
        executed += start[j];
        x[j] = 1.0 - executed;
    }
    if (P->forced) {
        x[n - 1] = 0.0;
    }
    const double mu0 = 1.0 / P->m;
    for (Py_ssize_t j = 0; j < n; j++) {
        lo[j] = mu0 / start[j];
        hi[j] = P->cap_f[j] * mu0 / (P->caps_safe[j] - start[j]);
    }
    double end = P->forced ? 0.0 : mu0 / x[n - 1];

    /* Costs are in units of a completing schedule's cost, so these are relative; see solve.py
     * for why a stalled dual residual with a small gap also ends the run. */
    const double gap_tolerance = 1e-2 * tolerance;
    const double dual_tolerance = 1e-3 * sqrt(tolerance);
    Sums sums, sums_new;
    evaluate(P, x, S);
    assess(P, S, lo, hi, end, shift, r, &sums);
    double best_dual = INFINITY;
    int flat = 0;
    int stalled = 0;
    for (int iteration = 0; iteration <= max_iterations; iteration++) {
        const double gap = sums.gap;
        const double dual_inf = sums.dual_inf;
        const int improved = dual_inf < 0.5 * best_dual;
        if (improved) {
            best_dual = dual_inf;
        }
        flat = (improved || gap > gap_tolerance) ? 0 : flat + 1;
        stalled = stalled || flat >= 5;
        if ((gap <= gap_tolerance && dual_inf <= dual_tolerance) ||
            (stalled && gap <= tolerance)) {
            if (P->forced) {
                x[n - 1] = 0.0;
            }
            return iteration;
        }
        if (iteration == max_iterations) {
            break;
        }
        const double mu = fmax(0.1 * gap, 0.1 * gap_tolerance) / P->m;
        const double x_end = S->x_end;

        /* Newton system, tridiagonal in x. */
        for (Py_ssize_t j = 0; j < n; j++) {
            const double v = S->v[j], g = S->gap_hi[j];
            w[j] = S->dd_bin[j] + lo[j] / v + hi[j] / g;
            shift[j] = mu / v - P->cap_f[j] * mu / g;
        }
        gradient(P, S->d_bin, shift, S->d_point, P->forced ? 0.0 : mu / x_end, dx);
        for (Py_ssize_t j = 0; j < n; j++) {
            dx[j] = -dx[j]; /* the right-hand side; solved in place below */
            diag[j] = w[j] + S->dd_point[j];
            if (j + 1 < n) {
                diag[j] += w[j + 1];
                off[j] = -w[j + 1];
            }
        }
        if (P->forced) {
            diag[n - 1] = 1.0;
            if (n > 1) {
                off[n - 2] = 0.0;
            }
        } else {
            diag[n - 1] += end / x_end;
        }
        memcpy(r, dx, (size_t)n * sizeof(double)); /* keep the rhs for the slope below */
        if (solve_tridiagonal(n, diag, off, dx, work) != 0) {
            return -2;
        }
        if (P->forced) {
            dx[n - 1] = 0.0;
        }
        double slope = 0.0; /* of the barrier function along dx: -rhs . dx */
        for (Py_ssize_t j = 0; j < n; j++) {
            slope -= r[j] * dx[j];
        }
        const double dx_end = dx[n - 1];
        const double d_end = P->forced ? 0.0 : mu / x_end - end - end * dx_end / x_end;
        double limit = INFINITY;
        for (Py_ssize_t j = 0; j < n; j++) {
            const double v = S->v[j], g = S->gap_hi[j];
            dv[j] = (j == 0 ? 0.0 : dx[j - 1]) - dx[j];
            d_lo[j] = mu / v - lo[j] - lo[j] * dv[j] / v;
            d_hi[j] = P->cap_f[j] * (mu / g - hi[j]) + hi[j] * dv[j] / g;
            limit = fmin(limit, ratio_limit(v, dv[j]));
            limit = fmin(limit, ratio_limit(lo[j], d_lo[j]));
            if (P->cap_f[j] != 0.0) {
                limit = fmin(limit, ratio_limit(g, -dv[j]));
                limit = fmin(limit, ratio_limit(hi[j], d_hi[j]));
            }
        }
        if (!P->forced) {
            limit = fmin(limit, ratio_limit(x_end, dx_end));
            limit = fmin(limit, ratio_limit(end, d_end));
        }
        double step = fmin(1.0, BOUNDARY_FRACTION * limit);
        const double old = merit(P, &sums, mu);
        int armijo_ready = 0;
        double armijo_level = 0.0, armijo_slope = 0.0;
        double end_new = end;
        /* Backtrack until the step reduces the residual norm or satisfies Armijo's condition
         * on the barrier function (either is progress for a convex problem; the second keeps
         * going where the residual norm is a poor guide). */
        for (int attempt = 0; attempt < BACKTRACKS; attempt++) {
            for (Py_ssize_t j = 0; j < n; j++) {
                x_new[j] = x[j] + step * dx[j];
                lo_new[j] = lo[j] + step * d_lo[j];
                hi_new[j] = hi[j] + step * d_hi[j];
            }
            end_new = end + step * d_end;
            evaluate(P, x_new, S_new);
            assess(P, S_new, lo_new, hi_new, end_new, shift, r, &sums_new);
            const double reduced = (1.0 - 0.01 * step) * (1.0 - 0.01 * step) * old;
            if (merit(P, &sums_new, mu) <= reduced) {
                break;
            }
            if (!armijo_ready) {
                const double old_barrier = barrier(P, S, mu);
                armijo_level = old_barrier + 1e-13 * fabs(old_barrier);
                armijo_slope = 1e-4 * slope;
                armijo_ready = 1;
            }
            if (barrier(P, S_new, mu) <= armijo_level + step * armijo_slope) {
                break;
            }
            step *= 0.5;
        }
        double moved = 0.0;
        for (Py_ssize_t j = 0; j < n; j++) {
            const double a = fabs(x_new[j] - x[j]);
            if (a > moved || isnan(a)) {
                moved = a;
            }
        }
        stalled = moved <= 1e-14 || step < 1e-6;
        memcpy(x, x_new, (size_t)n * sizeof(double));
        memcpy(lo, lo_new, (size_t)n * sizeof(double));
        memcpy(hi, hi_new, (size_t)n * sizeof(double));
        end = end_new;
        State *swap = S;
        S = S_new;
        S_new = swap;
        sums = sums_new;
        if (!isfinite(moved)) {
            return -3;
        }
    }
    return -1;
}

static int get_vector(PyObject *object, Py_buffer *view, Py_ssize_t n, int writable,
                      const char *name)
{
    int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0);
    if (PyObject_GetBuffer(object, view, flags) != 0) {
        return -1;
    }
    if (view->ndim != 1 || view->itemsize != sizeof(double) || view->format == NULL ||
        strcmp(view->format, "d") != 0 || (n >= 0 && view->shape[0] != n)) {
        PyErr_Format(PyExc_ValueError, "%s must be a contiguous float64 vector of the same length",
                     name);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

/* The objective of trades v (fractions of Q) with coefficients in units of Q, before scaling. */
static double unscaled_objective(Py_ssize_t n, const double *v, const double *h, const double *k,
                                 const double *c, double beta, double b, double p,
                                 double terminal)
{
    double value = 0.0, executed = 0.0, squares = 0.0;
    for (Py_ssize_t j = 0; j < n; j++) {
        executed += v[j];
        const double x = fmax(1.0 - executed, 0.0);
        value += h[j] * v[j] + k[j] * power(v[j], 1.0 + beta) + c[j] * power(x, p);
        squares += v[j] * v[j];
    }
    const double x_end = fmax(1.0 - executed, 0.0);
    value += 0.5 * b * ((1.0 - x_end) * (1.0 - x_end) - squares);
    if (isfinite(terminal)) {
        value += terminal * power(x_end, p);
    }
    return value;
}

/* A cost usable as the unit of costs: itself when positive and finite, else 1. */
static double yardstick(double cost)
{
    return cost > 0.0 && isfinite(cost) ? cost : 1.0;
}

/*
 * A strictly feasible starting schedule (fractions of Q, into start) and the cost scale.
 *
 * The start trades in proportion to the caps (evenly without caps). The scale is the cost of
 * that schedule when it completes the order: a yardstick that does not depend on how large the
 * terminal penalty is. Under a finite terminal penalty the start keeps a small remainder, small
 * enough that its terminal cost does not dwarf the yardstick. When the caps cannot complete the
 * order, the start trades 90 % of every cap.
 */
static double starting_point(Py_ssize_t n, const double *caps, const double *h, const double *k,
                             const double *c, double beta, double b, double p, double terminal,
                             double *start)
{
    double total = 0.0, cap_sum = 0.0;
    for (Py_ssize_t j = 0; j < n; j++) {
        start[j] = fmin(caps[j], 1.0);
        total += start[j];
        cap_sum += caps[j];
    }
    if (!(cap_sum > 1.0)) { /* the caps cannot complete the order */
        for (Py_ssize_t j = 0; j < n; j++) {
            start[j] *= 0.9;
        }
        return yardstick(unscaled_objective(n, start, h, k, c, beta, b, p, terminal));
    }
    for (Py_ssize_t j = 0; j < n; j++) {
        start[j] /= total;
    }
    const double scale = yardstick(unscaled_objective(n, start, h, k, c, beta, b, p, INFINITY));
    if (isfinite(terminal)) {
        const double left = terminal == 0.0 ? 0.1 : fmin(0.1, pow(0.5 * scale / terminal, 1.0 / p));
        const double keep = 1.0 - fmax(left, 1e-9);
        for (Py_ssize_t j = 0; j < n; j++) {
            start[j] *= keep;
        }
    }
    return scale;
}

/* Vectors of n doubles solve_one() needs besides run()'s: 6 coefficient vectors, the scaled
 * h, k, c and caps, the start and the iterate. */
#define OWN_VECTORS (6 + 4 + 2)

/* Vectors of n doubles one problem of n bins needs in all. */
#define VECTORS (OWN_VECTORS + RUN_VECTORS)

/*
 * One problem of n bins, in its own units (see the header comment): scale it, start, run the
 * method and write the optimal trades in shares. mem holds (OWN_VECTORS + RUN_VECTORS) n doubles.
 * Returns the iterations or a negative code.
 */
static int solve_one(Py_ssize_t n, const double *h_in, const double *k_in, const double *c_in,
                     const double *caps_in, double *trades, double quantity, double beta, double b,
                     double p, double terminal, double tolerance, int max_iterations, double *mem)
{
    double *h = take(&mem, n), *k = take(&mem, n), *c = take(&mem, n);
    double *caps = take(&mem, n), *start = take(&mem, n), *x = take(&mem, n);
    Problem P;
    P.k1 = take(&mem, n);
    P.k2 = take(&mem, n);
    P.c1 = take(&mem, n);
    P.c2 = take(&mem, n);
    P.cap_f = take(&mem, n);
    P.caps_safe = take(&mem, n);
    /* Units: inventories as fractions of Q; a cap of Q or more never binds. */
    const double k_unit = pow(quantity, 1.0 + beta), c_unit = pow(quantity, p);
    for (Py_ssize_t j = 0; j < n; j++) {
        h[j] = h_in[j] * quantity;
        k[j] = k_in[j] * k_unit;
        c[j] = c_in[j] * c_unit;
        caps[j] = caps_in[j] / quantity;
        if (caps[j] >= 1.0) {
            caps[j] = INFINITY;
        }
    }
    b *= quantity * quantity;
    terminal *= c_unit;
    /* Costs in units of the starting schedule's cost. */
    const double scale = starting_point(n, caps, h, k, c, beta, b, p, terminal, start);
    P.n = n;
    P.forced = isinf(terminal);
    P.beta = beta;
    P.b = b / scale;
    P.p = p;
    P.terminal = terminal / scale;
    P.h = h;
    P.k = k;
    P.c = c;
    double m = (double)n + (P.forced ? 0.0 : 1.0);
    for (Py_ssize_t j = 0; j < n; j++) {
        h[j] /= scale;
        k[j] /= scale;
        c[j] /= scale;
        P.k1[j] = k[j] * (1.0 + beta);
        P.k2[j] = P.k1[j] * beta;
        P.c1[j] = c[j] * p;
        P.c2[j] = P.c1[j] * (p - 1.0);
        const int capped = isfinite(caps[j]);
        P.cap_f[j] = capped ? 1.0 : 0.0;
        P.caps_safe[j] = capped ? caps[j] : 2.0;
        m += P.cap_f[j];
    }
    P.m = m;
    const int code = run(&P, start, x, tolerance, max_iterations, mem);
    if (code >= 0) { /* trades in shares from the inventories */
        for (Py_ssize_t j = 0; j < n; j++) {
            const double previous = j == 0 ? 1.0 : x[j - 1];
            trades[j] = fmax(previous - x[j], 0.0) * quantity;
        }
    }
    return code;
}

/* An int64 vector of length n (any length when n < 0). */
static int get_counts(PyObject *object, Py_buffer *view, Py_ssize_t n, int writable,
                      const char *name)
{
    int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0);
    if (PyObject_GetBuffer(object, view, flags) != 0) {
        return -1;
    }
    if (view->ndim != 1 || view->itemsize != sizeof(long long) || view->format == NULL ||
        (strcmp(view->format, "l") != 0 && strcmp(view->format, "q") != 0) ||
        (n >= 0 && view->shape[0] != n)) {
        PyErr_Format(PyExc_ValueError, "%s must be a contiguous int64 vector of one per problem",
                     name);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

static PyObject *interior_point(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *objects[10], *sizes_object, *iterations_object;
    double tolerance;
    int max_iterations;
    if (!PyArg_ParseTuple(args, "OOOOOOOOOOOOdi:interior_point", &objects[0], &objects[1],
                          &objects[2], &objects[3], &objects[4], &sizes_object,
                          &iterations_object, &objects[5], &objects[6], &objects[7],
                          &objects[8], &objects[9], &tolerance, &max_iterations)) {
        return NULL;
    }
    static const char *names[10] = {"h", "k", "c", "caps", "out",
                                    "quantity", "beta", "b", "p", "terminal"};
    Py_buffer views[10], sizes, iterations;
    if (get_counts(sizes_object, &sizes, -1, 0, "sizes") != 0) {
        return NULL;
    }
    const Py_ssize_t count = sizes.shape[0];
    if (get_counts(iterations_object, &iterations, count, 1, "iterations") != 0) {
        PyBuffer_Release(&sizes);
        return NULL;
    }
    /* Sizes come from the caller: every sum and product below is checked before it is made, so
     * that no crafted size can wrap around to match the vectors' length or shrink the scratch
     * allocation (each problem needs VECTORS doubles per bin). */
    const long long *size = sizes.buf;
    Py_ssize_t total = 0, largest = 0;
    int valid = 1;
    for (Py_ssize_t i = 0; i < count && valid; i++) {
        if (size[i] < 1) {
            PyErr_SetString(PyExc_ValueError, "every problem needs at least one bin");
            valid = 0;
        } else if (size[i] > PY_SSIZE_T_MAX - total) {
            PyErr_SetString(PyExc_OverflowError, "sizes add up to more bins than memory can hold");
            valid = 0;
        } else {
            total += (Py_ssize_t)size[i];
            largest = size[i] > largest ? (Py_ssize_t)size[i] : largest;
        }
    }
    if (valid && largest > PY_SSIZE_T_MAX / (Py_ssize_t)(VECTORS * sizeof(double))) {
        PyErr_SetString(PyExc_OverflowError, "a problem has more bins than memory can hold");
        valid = 0;
    }
    int got = 0;
    if (valid) {
        for (; got < 10; got++) {
            if (get_vector(objects[got], &views[got], got < 5 ? total : count, got == 4,
                           names[got]) != 0) {
                break;
            }
        }
    }
    PyObject *result = NULL;
    if (got == 10) {
        double *mem = malloc((size_t)largest * VECTORS * sizeof(double));
        if (mem == NULL) {
            PyErr_NoMemory();
        } else {
            const double *h = views[0].buf, *k = views[1].buf, *c = views[2].buf;
            const double *caps = views[3].buf, *quantity = views[5].buf, *beta = views[6].buf;
            const double *b = views[7].buf, *p = views[8].buf, *terminal = views[9].buf;
            double *out = views[4].buf;
            long long *done = iterations.buf;
            Py_BEGIN_ALLOW_THREADS
            Py_ssize_t at = 0;
            for (Py_ssize_t i = 0; i < count; i++) {
                const Py_ssize_t n = (Py_ssize_t)size[i];
                done[i] = solve_one(n, h + at, k + at, c + at, caps + at, out + at, quantity[i],
                                    beta[i], b[i], p[i], terminal[i], tolerance, max_iterations,
                                    mem);
                at += n;
            }
            Py_END_ALLOW_THREADS
            free(mem);
            result = Py_NewRef(Py_None);
        }
    }
    for (int i = 0; i < got; i++) {
        PyBuffer_Release(&views[i]);
    }
    PyBuffer_Release(&sizes);
    PyBuffer_Release(&iterations);
    return result;
}

/*
 * riccati(h, kappa, c, out, a, d, forced, quantity) -> final inventory
 *
 * The linear-quadratic recursion of tracker.solve._riccati (its docstring derives it): stage n
 * costs h_n v + kappa_n v^2 + c_n q_{n+1}^2, the cost-to-go after the last free stage is
 * a q^2 + d q. Writes the N trades into out and returns q_N (0 when forced: the last bin then
 * takes what is left). Returns NaN when some kappa_n <= 0 (not strictly convex: the caller
 * hands the problem to the general path).
 */
static PyObject *riccati(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *objects[4];
    double a, d, quantity;
    int forced;
    if (!PyArg_ParseTuple(args, "OOOOddpd:riccati", &objects[0], &objects[1], &objects[2],
                          &objects[3], &a, &d, &forced, &quantity)) {
        return NULL;
    }
    static const char *names[4] = {"h", "kappa", "c", "out"};
    Py_buffer views[4];
    int got = 0;
    Py_ssize_t n = -1;
    for (; got < 4; got++) {
        if (get_vector(objects[got], &views[got], n, got == 3, names[got]) != 0) {
            break;
        }
        n = views[got].shape[0];
    }
    PyObject *result = NULL;
    if (got == 4 && n < 1) {
        PyErr_SetString(PyExc_ValueError, "need at least one bin");
    } else if (got == 4) {
        const double *h = views[0].buf, *kappa = views[1].buf, *c = views[2].buf;
        double *trades = views[3].buf; /* holds the gains until the forward pass */
        double *offset = malloc((size_t)n * sizeof(double));
        if (offset == NULL) {
            PyErr_NoMemory();
        } else {
            double q = NAN;
            int convex = 1;
            for (Py_ssize_t j = 0; j < n; j++) {
                convex = convex && kappa[j] > 0.0;
            }
            if (convex) {
                const Py_ssize_t last = forced ? n - 1 : n;
                /* Backward pass: q_{n+1} = gain_n q_n + offset_n. */
                for (Py_ssize_t j = last - 1; j >= 0; j--) {
                    const double s = kappa[j] + c[j] + a;
                    const double r = h[j] - d;
                    trades[j] = kappa[j] / s;
                    offset[j] = 0.5 * r / s;
                    a = kappa[j] - kappa[j] * kappa[j] / s;
                    d = h[j] - kappa[j] * r / s;
                }
                q = quantity;
                for (Py_ssize_t j = 0; j < last; j++) {
                    const double q_next = trades[j] * q + offset[j];
                    trades[j] = q - q_next;
                    q = q_next;
                }
                if (forced) {
                    trades[n - 1] = q;
                    q = 0.0;
                }
            }
            free(offset);
            result = PyFloat_FromDouble(q);
        }
    }
    for (int i = 0; i < got; i++) {
        PyBuffer_Release(&views[i]);
    }
    return result;
}

/*
 * costs(h, k, c, trades, trajectory, quantity, beta, b, p, terminal, settle) -> 5 cost terms
 *
 * The canonical objective of a schedule, term by term (tracker.solve.COST_TERMS order: fixed cost,
 * temporary impact, permanent impact, inventory penalty, terminal penalty), in currency:
 *
 *   sum h_n v_n,  sum k_n v_n^(1+beta),  (b/2) [(Q - q_N)^2 - sum v_n^2],  sum c_n q_n^p,
 *   A q_N^p (forced, A infinite: 0 when q_N <= 1e-9 max(Q, 1), else infinite),
 *
 * with v_n the trades and q_n = max(Q - v_1 - ... - v_n, 0) the inventory after bin n.
 * trades (in/out) are clipped at 0; a trade that is not a finite number (NaN, infinite) raises
 * ValueError and leaves every buffer as it was. With settle set, a schedule that completes the order up to
 * rounding (|Q - sum v| <= 1e-9 Q, and forced or overshooting) has its last trade take the
 * rounding, so that the trajectory ends at exactly 0 and never below. trajectory (out, N + 1
 * values) receives Q, q_1, ..., q_N.
 */
static PyObject *costs(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *objects[5];
    double quantity, beta, b, p, terminal;
    int settle;
    if (!PyArg_ParseTuple(args, "OOOOOdddddp:costs", &objects[0], &objects[1], &objects[2],
                          &objects[3], &objects[4], &quantity, &beta, &b, &p, &terminal,
                          &settle)) {
        return NULL;
    }
    static const char *names[5] = {"h", "k", "c", "trades", "trajectory"};
    Py_buffer views[5];
    int got = 0;
    Py_ssize_t n = -1;
    for (; got < 5; got++) {
        /* the trajectory has one value more than the others */
        if (get_vector(objects[got], &views[got], got == 4 ? n + 1 : n, got >= 3, names[got]) !=
            0) {
            break;
        }
        if (got < 4) {
            n = views[got].shape[0];
        }
    }
    PyObject *result = NULL;
    Py_ssize_t bad = -1; /* the first bin whose trade is not a finite number */
    for (Py_ssize_t j = 0; got == 5 && j < n && bad < 0; j++) {
        bad = isfinite(((const double *)views[3].buf)[j]) ? -1 : j;
    }
    if (got == 5 && n < 1) {
        PyErr_SetString(PyExc_ValueError, "need at least one bin");
    } else if (got == 5 && bad >= 0) {
        PyErr_Format(PyExc_ValueError, "trades must be finite numbers (bin %zd is not)", bad);
    } else if (got == 5) {
        const double *h = views[0].buf, *k = views[1].buf, *c = views[2].buf;
        double *v = views[3].buf, *q = views[4].buf;
        /* q[j + 1] holds the shares executed up to bin j until the last loop. */
        double executed = 0.0;
        for (Py_ssize_t j = 0; j < n; j++) {
            v[j] = fmax(v[j], 0.0);
            executed += v[j];
            q[j + 1] = executed;
        }
        const int forced = isinf(terminal);
        const double left = quantity - executed;
        if (settle && quantity > 0.0 && fabs(left) <= 1e-9 * quantity && (forced || left < 0.0)) {
            Py_ssize_t last = n - 1;
            while (last > 0 && v[last] == 0.0) {
                last--;
            }
            v[last] = fmax(v[last] + left, 0.0);
            for (Py_ssize_t j = last; j < n; j++) {
                q[j + 1] = quantity; /* the bins before it are unchanged */
            }
        }
        double fixed = 0.0, temporary = 0.0, squares = 0.0, inventory = 0.0;
        q[0] = quantity;
        for (Py_ssize_t j = 0; j < n; j++) {
            q[j + 1] = fmax(quantity - q[j + 1], 0.0);
            fixed += h[j] * v[j];
            temporary += k[j] * power(v[j], 1.0 + beta);
            squares += v[j] * v[j];
            inventory += c[j] * power(q[j + 1], p);
        }
        const double q_end = q[n];
        const double done = quantity - q_end;
        double terminal_cost;
        if (forced) {
            terminal_cost = q_end <= 1e-9 * fmax(quantity, 1.0) ? 0.0 : INFINITY;
        } else {
            terminal_cost = terminal * power(q_end, p);
        }
        result = Py_BuildValue("(ddddd)", fixed, temporary, 0.5 * b * (done * done - squares),
                               inventory, terminal_cost);
    }
    for (int i = 0; i < got; i++) {
        PyBuffer_Release(&views[i]);
    }
    return result;
}

/*
 * tridiagonal(d, e, b) -> None: solve the symmetric tridiagonal system of solve_tridiagonal()
 * for b in place; raises ValueError when it is singular. Exposed for the tests, which check it
 * (positive definite or not) against SciPy.
 */
static PyObject *tridiagonal(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *objects[3];
    if (!PyArg_ParseTuple(args, "OOO:tridiagonal", &objects[0], &objects[1], &objects[2])) {
        return NULL;
    }
    static const char *names[3] = {"d", "e", "b"};
    Py_buffer views[3];
    int got = 0;
    Py_ssize_t n = -1;
    for (; got < 3; got++) {
        Py_ssize_t want = got == 0 ? -1 : (got == 1 ? n - 1 : n);
        if (get_vector(objects[got], &views[got], want, got == 2, names[got]) != 0) {
            break;
        }
        if (got == 0) {
            n = views[0].shape[0];
        }
    }
    PyObject *result = NULL;
    if (got == 3 && n < 1) {
        PyErr_SetString(PyExc_ValueError, "need at least one row");
    } else if (got == 3) {
        double *work = malloc((size_t)n * 4 * sizeof(double));
        if (work == NULL) {
            PyErr_NoMemory();
        } else {
            const int code = solve_tridiagonal(n, views[0].buf, views[1].buf, views[2].buf, work);
            free(work);
            if (code != 0) {
                PyErr_SetString(PyExc_ValueError, "singular tridiagonal system");
            } else {
                result = Py_NewRef(Py_None);
            }
        }
    }
    for (int i = 0; i < got; i++) {
        PyBuffer_Release(&views[i]);
    }
    return result;
}

static PyMethodDef methods[] = {
    {"interior_point", interior_point, METH_VARARGS,
     "Run the interior-point method on one scaled problem (see tracker/core/solve.py)."},
    {"riccati", riccati, METH_VARARGS,
     "The linear-quadratic recursion of tracker.solve._riccati; returns the final inventory."},
    {"costs", costs, METH_VARARGS, "The canonical objective of a schedule, term by term."},
    {"tridiagonal", tridiagonal, METH_VARARGS,
     "Solve a symmetric tridiagonal system in place (the Newton solve; for tests)."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT,
    .m_name = "_kernel",
    .m_doc = "Compiled inner loop of tracker.solve.",
    .m_size = -1,
    .m_methods = methods,
};

PyMODINIT_FUNC PyInit__kernel(void)
{
    return PyModule_Create(&module);
}
