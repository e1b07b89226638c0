/* A small C helper that serves a cost function and its gradient to varpost over the adapter protocol,
 * version 1 (see ../PROTOCOL.md). It speaks both encodings (text and binary) and lets varpost choose.
 *
 * Fill in a vp_problem and call vp_serve() from main(). Every callback returns VP_OK on success; on
 * failure it writes a message into err (at most errlen bytes, NUL-terminated) and returns
 * VP_RECOVERABLE (another point may succeed, e.g. a model blow-up) or VP_FATAL (stop the run).
 * Write diagnostics to stderr only: stdout carries the protocol.
 */
#ifndef VARPOST_ADAPTER_H
#define VARPOST_ADAPTER_H

#include <stddef.h>

#define VP_OK 0
#define VP_RECOVERABLE 1
#define VP_FATAL 2

/* Which prior operator vp_problem.prior_apply is asked for, with B = S S^T. */
enum vp_prior_op { VP_B_HALF = 0, VP_B_HALF_T = 1, VP_B_HALF_SOLVE = 2, VP_B_HALF_T_SOLVE = 3 };

typedef struct vp_problem {
    int dim;           /* length of the control vector x */
    const char *label; /* optional description shown in varpost's messages, or NULL */
    void *ctx;         /* passed to every callback */

    /* Required: the cost J(x) and its gradient (dim values). */
    int (*cost_grad)(void *ctx, const double *x, double *cost, double *grad, char *err, size_t errlen);
    /* Optional (NULL: cost_grad is used): the cost alone. */
    int (*cost)(void *ctx, const double *x, double *cost, char *err, size_t errlen);
    /* Optional: the Hessian-vector product hv = (d2J/dx2)(x) v. */
    int (*hess_vec)(void *ctx, const double *x, const double *v, double *hv, char *err, size_t errlen);
    /* Optional: the cost split into background and observation terms. */
    int (*split)(void *ctx, const double *x, double *jb, double *jo, char *err, size_t errlen);

    /* Optional prior N(xb, B): set xb, var (diag B) and log_det, and prior_apply for S v, S^T v (and
     * S^-1 v, S^-T v when prior_solve is nonzero). */
    const double *xb;
    const double *var;
    double log_det;
    int (*prior_apply)(void *ctx, enum vp_prior_op op, const double *v, double *out, char *err, size_t errlen);
    int prior_solve;
} vp_problem;

/* Does the handshake and answers requests until varpost sends quit or closes stdin. Returns the
 * process exit status to use (0 on a normal end). */
int vp_serve(const vp_problem *p);

#endif
