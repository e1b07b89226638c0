/* Implementation of varpost_adapter.h: the protocol's handshake and its two encodings. */
#define _POSIX_C_SOURCE 200809L
#include "varpost_adapter.h"

#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

enum { OP_COST_GRAD = 1, OP_COST = 2, OP_HESS_VEC = 3, OP_SPLIT = 4, OP_BACKGROUND = 5, OP_B_HALF = 6,
       OP_B_HALF_T = 7, OP_B_HALF_SOLVE = 8, OP_B_HALF_T_SOLVE = 9, OP_QUIT = 15 };
#define TAG_REPLY 0x80
#define TAG_ERROR 0xFF
#define HEADER 16
#define ERRLEN 1024

static const struct { const char *name; int op; } OPS[] = {
    {"cost_grad", OP_COST_GRAD}, {"cost", OP_COST}, {"hess_vec", OP_HESS_VEC}, {"split", OP_SPLIT},
    {"background", OP_BACKGROUND}, {"b_half", OP_B_HALF}, {"b_half_t", OP_B_HALF_T},
    {"b_half_solve", OP_B_HALF_SOLVE}, {"b_half_t_solve", OP_B_HALF_T_SOLVE}, {"quit", OP_QUIT}};

/* ---- text encoding ---------------------------------------------------------------------------- */

static void put_num(FILE *f, double v) {
    if (isnan(v)) fputs("\"nan\"", f);
    else if (isinf(v)) fputs(v > 0 ? "\"inf\"" : "\"-inf\"", f);
    else fprintf(f, "%.17g", v); /* 17 significant digits always round-trip a double */
}

static void put_array(FILE *f, const char *name, const double *v, int n) {
    fprintf(f, ",\"%s\":[", name);
    for (int i = 0; i < n; i++) {
        if (i) fputc(',', f);
        put_num(f, v[i]);
    }
    fputc(']', f);
}

static void put_string(FILE *f, const char *s) {
    fputc('"', f);
    for (; *s; s++) {
        unsigned char c = (unsigned char)*s;
        if (c == '"' || c == '\\') fprintf(f, "\\%c", c);
        else if (c < 0x20) fprintf(f, "\\u%04x", c);
        else fputc(c, f);
    }
    fputc('"', f);
}

/* Reads one number (or "nan"/"inf"/"-inf" in quotes) at *s; returns 0 on failure. */
static int get_num(const char **s, double *out) {
    const char *p = *s;
    while (*p == ' ') p++;
    int quoted = (*p == '"');
    if (quoted) p++;
    char *end;
    *out = strtod(p, &end); /* strtod also reads nan and inf */
    if (end == p) return 0;
    p = end;
    if (quoted) {
        if (*p != '"') return 0;
        p++;
    }
    *s = p;
    return 1;
}

/* Finds "name":[ ... ] in a line and reads exactly n numbers; returns 0 on failure. */
static int get_array(const char *line, const char *name, double *v, int n) {
    char key[32];
    snprintf(key, sizeof key, "\"%s\":", name);
    const char *p = strstr(line, key);
    if (!p) return 0;
    p += strlen(key);
    while (*p == ' ') p++;
    if (*p++ != '[') return 0;
    for (int i = 0; i < n; i++) {
        if (!get_num(&p, &v[i])) return 0;
        while (*p == ' ') p++;
        if (*p == ',') p++;
    }
    while (*p == ' ') p++;
    return *p == ']';
}

static int text_op(const char *line, unsigned long long *id) {
    const char *p = strstr(line, "\"id\":");
    const char *q = strstr(line, "\"op\":\"");
    if (!p || !q) return -1;
    *id = strtoull(p + 5, NULL, 10);
    q += 6;
    for (size_t k = 0; k < sizeof OPS / sizeof OPS[0]; k++) {
        size_t len = strlen(OPS[k].name);
        if (strncmp(q, OPS[k].name, len) == 0 && q[len] == '"') return OPS[k].op;
    }
    return -1;
}

/* ---- binary encoding -------------------------------------------------------------------------- */

static void put_u32(unsigned char *b, uint32_t v) { for (int i = 0; i < 4; i++) b[i] = (unsigned char)(v >> (8 * i)); }
static void put_u64(unsigned char *b, uint64_t v) { for (int i = 0; i < 8; i++) b[i] = (unsigned char)(v >> (8 * i)); }
static uint32_t get_u32(const unsigned char *b) { uint32_t v = 0; for (int i = 3; i >= 0; i--) v = (v << 8) | b[i]; return v; }
static uint64_t get_u64(const unsigned char *b) { uint64_t v = 0; for (int i = 7; i >= 0; i--) v = (v << 8) | b[i]; return v; }

static void frame(int tag, int flags, uint64_t id, const double *const *parts, const int *lens, int nparts,
                  const char *text) {
    size_t payload = 0;
    for (int k = 0; k < nparts; k++) payload += 8 * (size_t)lens[k];
    if (text) payload = strlen(text);
    unsigned char h[HEADER];
    put_u32(h, (uint32_t)(HEADER - 4 + payload));
    h[4] = (unsigned char)tag;
    h[5] = (unsigned char)flags;
    h[6] = h[7] = 0;
    put_u64(h + 8, id);
    fwrite(h, 1, HEADER, stdout);
    if (text) fwrite(text, 1, payload, stdout);
    for (int k = 0; k < nparts; k++) fwrite(parts[k], 8, (size_t)lens[k], stdout); /* little-endian host */
    fflush(stdout);
}

/* ---- serving ---------------------------------------------------------------------------------- */

static int little_endian(void) {
    uint16_t one = 1;
    unsigned char b;
    memcpy(&b, &one, 1);
    return b == 1;
}

int vp_serve(const vp_problem *p) {
    const int n = p->dim;
    if (!little_endian()) {
        fprintf(stderr, "varpost_adapter: this helper assumes a little-endian machine\n");
        return 2;
    }
    /* Hello. */
    printf("{\"hello\":\"varpost-adapter\",\"protocol\":1,\"dim\":%d,\"encodings\":[\"text\",\"binary\"],\"offers\":[", n);
    int first = 1;
    if (p->hess_vec) { printf("%s\"hess_vec\"", first ? "" : ","); first = 0; }
    if (p->split) { printf("%s\"split\"", first ? "" : ","); first = 0; }
    if (p->prior_apply && p->xb && p->var) {
        printf("%s\"prior\"", first ? "" : ",");
        first = 0;
        if (p->prior_solve) printf(",\"prior_solve\"");
    }
    printf("]");
    if (p->label) { printf(",\"label\":"); put_string(stdout, p->label); }
    printf("}\n");
    fflush(stdout);

    char *line = NULL;
    size_t cap = 0;
    if (getline(&line, &cap, stdin) < 0) { free(line); return 0; }
    const int binary = strstr(line, "\"binary\"") != NULL;

    double *x = malloc(sizeof(double) * (size_t)(2 * n + 2));
    double *v = x + n;
    double *out = malloc(sizeof(double) * (size_t)(n + 1));
    unsigned char *buf = binary ? malloc(HEADER + 16 * (size_t)n) : NULL;
    if (!x || !out || (binary && !buf)) { fprintf(stderr, "varpost_adapter: out of memory\n"); return 2; }
    char err[ERRLEN];
    int status = 0;

    for (;;) {
        unsigned long long id = 0;
        int op;
        if (binary) {
            if (fread(buf, 1, HEADER, stdin) != HEADER) break;
            uint32_t body = get_u32(buf);
            op = buf[4];
            id = get_u64(buf + 8);
            size_t payload = body - (HEADER - 4);
            if (body < HEADER - 4 || payload > 16 * (size_t)n) { fprintf(stderr, "varpost_adapter: bad frame\n"); status = 2; break; }
            if (payload && fread(x, 1, payload, stdin) != payload) break;
            /* b_half* requests carry only v: move it into place. */
            if (op >= OP_B_HALF && op <= OP_B_HALF_T_SOLVE) memmove(v, x, payload);
        } else {
            ssize_t got = getline(&line, &cap, stdin);
            if (got < 0) break;
            op = text_op(line, &id);
            int ok = 1;
            if (op == OP_COST_GRAD || op == OP_COST || op == OP_SPLIT || op == OP_HESS_VEC) ok = get_array(line, "x", x, n);
            if (ok && (op == OP_HESS_VEC || (op >= OP_B_HALF && op <= OP_B_HALF_T_SOLVE))) ok = get_array(line, "v", v, n);
            if (op < 0 || !ok) { fprintf(stderr, "varpost_adapter: cannot read request: %s", line); status = 2; break; }
        }
        if (op == OP_QUIT) break;

        err[0] = 0;
        int rc = VP_FATAL;
        double cost = 0, jb = 0, jo = 0;
        switch (op) {
        case OP_COST_GRAD: rc = p->cost_grad(p->ctx, x, &cost, out, err, ERRLEN); break;
        case OP_COST:
            rc = p->cost ? p->cost(p->ctx, x, &cost, err, ERRLEN) : p->cost_grad(p->ctx, x, &cost, out, err, ERRLEN);
            break;
        case OP_HESS_VEC:
            if (p->hess_vec) rc = p->hess_vec(p->ctx, x, v, out, err, ERRLEN);
            else snprintf(err, ERRLEN, "this adapter offers no Hessian-vector product");
            break;
        case OP_SPLIT:
            if (p->split) rc = p->split(p->ctx, x, &jb, &jo, err, ERRLEN);
            else snprintf(err, ERRLEN, "this adapter offers no cost split");
            break;
        case OP_BACKGROUND: rc = (p->xb && p->var) ? VP_OK : VP_FATAL; if (rc) snprintf(err, ERRLEN, "no prior"); break;
        case OP_B_HALF: case OP_B_HALF_T: case OP_B_HALF_SOLVE: case OP_B_HALF_T_SOLVE:
            if (p->prior_apply) rc = p->prior_apply(p->ctx, (enum vp_prior_op)(op - OP_B_HALF), v, out, err, ERRLEN);
            else snprintf(err, ERRLEN, "this adapter offers no prior");
            break;
        default: snprintf(err, ERRLEN, "unknown request %d", op);
        }

        if (rc != VP_OK) {
            if (!err[0]) snprintf(err, ERRLEN, "evaluation failed");
            if (binary) frame(TAG_ERROR, rc == VP_RECOVERABLE, id, NULL, NULL, 0, err);
            else {
                printf("{\"id\":%llu,\"error\":", id);
                put_string(stdout, err);
                printf(",\"recoverable\":%s}\n", rc == VP_RECOVERABLE ? "true" : "false");
                fflush(stdout);
            }
            continue;
        }
        if (binary) {
            const double *parts[3];
            int lens[3];
            double s[2] = {jb, jo};
            int k = 0;
            switch (op) {
            case OP_COST_GRAD: parts[k] = &cost; lens[k++] = 1; parts[k] = out; lens[k++] = n; break;
            case OP_COST: parts[k] = &cost; lens[k++] = 1; break;
            case OP_SPLIT: parts[k] = s; lens[k++] = 2; break;
            case OP_BACKGROUND: parts[k] = p->xb; lens[k++] = n; parts[k] = p->var; lens[k++] = n; parts[k] = &p->log_det; lens[k++] = 1; break;
            default: parts[k] = out; lens[k++] = n;
            }
            frame(TAG_REPLY | op, 0, id, parts, lens, k, NULL);
        } else {
            printf("{\"id\":%llu", id);
            switch (op) {
            case OP_COST_GRAD: printf(",\"cost\":"); put_num(stdout, cost); put_array(stdout, "grad", out, n); break;
            case OP_COST: printf(",\"cost\":"); put_num(stdout, cost); break;
            case OP_HESS_VEC: put_array(stdout, "hv", out, n); break;
            case OP_SPLIT: printf(",\"jb\":"); put_num(stdout, jb); printf(",\"jo\":"); put_num(stdout, jo); break;
            case OP_BACKGROUND:
                put_array(stdout, "xb", p->xb, n); put_array(stdout, "var", p->var, n);
                printf(",\"log_det\":"); put_num(stdout, p->log_det); break;
            default: put_array(stdout, "out", out, n);
            }
            printf("}\n");
            fflush(stdout);
        }
    }
    free(line);
    free(x);
    free(out);
    free(buf);
    return status;
}
