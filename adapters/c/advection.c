/* A linear-advection 4D-Var served to varpost: a minimal real example of wrapping a cost function and
 * its adjoint gradient in C.
 *
 * Model: periodic upwind advection on n points with Courant number c (0 < c <= 1),
 *     x_{k+1}[i] = (1 - c) x_k[i] + c x_k[i-1],
 * run for K steps from the initial state x (the control vector).
 * Background: xb[i] = sin(2 pi i / n), B = sigma_b^2 I with sigma_b = 0.5.
 * Truth: xt[i] = xb[i] + 0.3 cos(4 pi i / n).
 * Observations: every 4th point (i = 4j) at steps k = 1..K,
 *     y[k][j] = (M^k xt)[4j] + 0.05 sin(7 j + 3 k),  R = sigma_o^2 I with sigma_o = 0.1.
 * Cost: J(x) = 1/2 |x - xb|^2 / sigma_b^2 + 1/2 sum_k sum_j ((M^k x)[4j] - y[k][j])^2 / sigma_o^2.
 * The gradient comes from the adjoint model; as the model is linear, the Hessian-vector product is exact.
 *
 * Usage: advection [n [K [c]]]   (defaults 40 5 0.6)
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "varpost_adapter.h"

typedef struct {
    int n, steps;
    double c, sigma_b, sigma_o;
    double *xb, *var, *y; /* y: steps x (n/4) */
    double *traj, *lam;   /* work arrays: (steps + 1) x n and n */
} advection;

static int nobs(const advection *a) { return (a->n + 3) / 4; }

static void step(const advection *a, const double *in, double *out) {
    for (int i = 0; i < a->n; i++) out[i] = (1 - a->c) * in[i] + a->c * in[(i - 1 + a->n) % a->n];
}

static void step_adjoint(const advection *a, const double *in, double *out) {
    for (int i = 0; i < a->n; i++) out[i] = (1 - a->c) * in[i] + a->c * in[(i + 1) % a->n];
}

/* Runs the model from x, filling a->traj. */
static void forward(const advection *a, const double *x) {
    memcpy(a->traj, x, sizeof(double) * (size_t)a->n);
    for (int k = 0; k < a->steps; k++) step(a, a->traj + (size_t)k * a->n, a->traj + (size_t)(k + 1) * a->n);
}

/* Observation misfit of the stored trajectory; with `anomaly` the observations are taken as zero (for
 * the Hessian-vector product, which works on a perturbation). */
static double misfit(const advection *a, int anomaly) {
    double jo = 0;
    for (int k = 1; k <= a->steps; k++)
        for (int j = 0; j < nobs(a); j++) {
            double d = a->traj[(size_t)k * a->n + 4 * j] - (anomaly ? 0 : a->y[(k - 1) * nobs(a) + j]);
            jo += 0.5 * d * d / (a->sigma_o * a->sigma_o);
        }
    return jo;
}

/* Adjoint sweep: out = sum_k (M^k)^T H^T R^-1 d_k for the stored trajectory. */
static void adjoint(const advection *a, int anomaly, double *out) {
    double *lam = a->lam;
    memset(lam, 0, sizeof(double) * (size_t)a->n);
    for (int k = a->steps; k >= 1; k--) {
        for (int j = 0; j < nobs(a); j++) {
            double d = a->traj[(size_t)k * a->n + 4 * j] - (anomaly ? 0 : a->y[(k - 1) * nobs(a) + j]);
            lam[4 * j] += d / (a->sigma_o * a->sigma_o);
        }
        step_adjoint(a, lam, out);
        memcpy(lam, out, sizeof(double) * (size_t)a->n);
    }
    memcpy(out, lam, sizeof(double) * (size_t)a->n);
}

static double background(const advection *a, const double *x) {
    double jb = 0;
    for (int i = 0; i < a->n; i++) jb += 0.5 * (x[i] - a->xb[i]) * (x[i] - a->xb[i]) / a->var[i];
    return jb;
}

static int cost_grad(void *ctx, const double *x, double *cost, double *grad, char *err, size_t errlen) {
    advection *a = ctx;
    (void)err; (void)errlen;
    forward(a, x);
    *cost = background(a, x) + misfit(a, 0);
    adjoint(a, 0, grad);
    for (int i = 0; i < a->n; i++) grad[i] += (x[i] - a->xb[i]) / a->var[i];
    return VP_OK;
}

static int cost_only(void *ctx, const double *x, double *cost, char *err, size_t errlen) {
    advection *a = ctx;
    (void)err; (void)errlen;
    forward(a, x);
    *cost = background(a, x) + misfit(a, 0);
    return VP_OK;
}

static int hess_vec(void *ctx, const double *x, const double *v, double *hv, char *err, size_t errlen) {
    advection *a = ctx;
    (void)x; (void)err; (void)errlen;
    forward(a, v); /* linear model: the tangent-linear run of v is the model run of v */
    adjoint(a, 1, hv);
    for (int i = 0; i < a->n; i++) hv[i] += v[i] / a->var[i];
    return VP_OK;
}

static int split(void *ctx, const double *x, double *jb, double *jo, char *err, size_t errlen) {
    advection *a = ctx;
    (void)err; (void)errlen;
    forward(a, x);
    *jb = background(a, x);
    *jo = misfit(a, 0);
    return VP_OK;
}

static int prior_apply(void *ctx, enum vp_prior_op op, const double *v, double *out, char *err, size_t errlen) {
    advection *a = ctx;
    (void)err; (void)errlen;
    for (int i = 0; i < a->n; i++)
        out[i] = (op == VP_B_HALF || op == VP_B_HALF_T) ? a->sigma_b * v[i] : v[i] / a->sigma_b;
    return VP_OK;
}

int main(int argc, char **argv) {
    const double pi = 3.14159265358979323846;
    advection a = {0};
    a.n = argc > 1 ? atoi(argv[1]) : 40;
    a.steps = argc > 2 ? atoi(argv[2]) : 5;
    a.c = argc > 3 ? atof(argv[3]) : 0.6;
    a.sigma_b = 0.5;
    a.sigma_o = 0.1;
    if (a.n < 4 || a.steps < 1 || !(a.c > 0 && a.c <= 1)) {
        fprintf(stderr, "usage: advection [n >= 4 [steps >= 1 [0 < courant <= 1]]]\n");
        return 2;
    }
    size_t n = (size_t)a.n;
    a.xb = malloc(sizeof(double) * n);
    a.var = malloc(sizeof(double) * n);
    a.y = malloc(sizeof(double) * (size_t)(a.steps * nobs(&a)));
    a.traj = malloc(sizeof(double) * n * (size_t)(a.steps + 1));
    a.lam = malloc(sizeof(double) * n);
    double *xt = malloc(sizeof(double) * n);
    if (!a.xb || !a.var || !a.y || !a.traj || !a.lam || !xt) {
        fprintf(stderr, "advection: out of memory\n");
        return 2;
    }
    for (int i = 0; i < a.n; i++) {
        a.xb[i] = sin(2 * pi * i / a.n);
        a.var[i] = a.sigma_b * a.sigma_b;
        xt[i] = a.xb[i] + 0.3 * cos(4 * pi * i / a.n);
    }
    forward(&a, xt);
    for (int k = 1; k <= a.steps; k++)
        for (int j = 0; j < nobs(&a); j++)
            a.y[(k - 1) * nobs(&a) + j] = a.traj[(size_t)k * n + 4 * j] + 0.05 * sin(7.0 * j + 3.0 * k);
    free(xt);

    vp_problem p = {0};
    p.dim = a.n;
    p.label = "linear advection 4D-Var (C example)";
    p.ctx = &a;
    p.cost_grad = cost_grad;
    p.cost = cost_only;
    p.hess_vec = hess_vec;
    p.split = split;
    p.xb = a.xb;
    p.var = a.var;
    p.log_det = a.n * log(a.sigma_b * a.sigma_b);
    p.prior_apply = prior_apply;
    p.prior_solve = 1;
    return vp_serve(&p);
}
