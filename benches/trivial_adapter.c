/* The cheapest possible adapter, to measure the protocol's own cost: J(x) = 1/2 |x|^2, gradient x.
 * Usage: trivial_adapter N */
#include <stdlib.h>
#include <string.h>

#include "varpost_adapter.h"

static int cost_grad(void *ctx, const double *x, double *cost, double *grad, char *err, size_t errlen) {
    int n = *(int *)ctx;
    double j = 0;
    (void)err; (void)errlen;
    for (int i = 0; i < n; i++) j += 0.5 * x[i] * x[i];
    memcpy(grad, x, sizeof(double) * (size_t)n);
    *cost = j;
    return VP_OK;
}

int main(int argc, char **argv) {
    int n = argc > 1 ? atoi(argv[1]) : 40;
    vp_problem p = {0};
    p.dim = n;
    p.ctx = &n;
    p.label = "trivial benchmark adapter";
    p.cost_grad = cost_grad;
    return vp_serve(&p);
}
