/*
 * Runs the example C kernel (norm_kernel.c) over a folder written by `refnorm export` and writes
 * its outputs where `refnorm score` reads them (docs/vectors.md):
 *
 *   vectors_driver VECTORS OUTPUTS      read VECTORS/index.txt; per case, write OUTPUTS/<dir>/<output>.npy,
 *                                       or OUTPUTS/<dir>/error.txt when the kernel returns an error code
 *   vectors_driver --check FILE...      read each .npy file with npy_reader and print what it holds or why
 *                                       it is refused (one line per file)
 *
 * Each case is run as `refnorm check` runs a kernel through conformance.adapters.c_abi: x and dy
 * are laid out in memory as the index says (strides in elements, the offset of element (0, ..., 0)
 * in a buffer of the given length, the gaps zero), so that the kernel sees the memory layout of
 * the case; the running statistics are copies that the forward updates in place (written back
 * as running_mean.npy and running_var.npy); the backward gets the forward's own mean and rstd.
 *
 * Exit status: 0 every case ran (a kernel's error code is that case's error.txt), 1 a case could
 * not be prepared or its outputs not written (said on stderr; the other cases still run), 2 bad
 * usage or an index that cannot be read. C99 and POSIX mkdir; no other dependency.
 */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

#include "norm_kernel.h"
#include "npy_reader.h"

#define MAX_LINE 8192
#define MAX_TOKENS (3 * NPY_MAX_NDIM + 16)
#define MAX_PATH 4096
#define MAX_ARRAYS 16

typedef struct {
    char name[32], format[24], descr[4], file[MAX_PATH], entry[16];
    int32_t ndim;
    int64_t shape[NPY_MAX_NDIM], strides[NPY_MAX_NDIM], offset, buffer_elements;
} array_t;

typedef struct {
    char dir[80], id[1024], mode[8];
    int running, has_momentum, n_entries, n_inputs, n_outputs;
    double eps, momentum;
    int64_t batches_seen, axis;
    int32_t norm_ndim;
    char entries[4][16];
    array_t inputs[MAX_ARRAYS], outputs[MAX_ARRAYS];
} case_t;

static int split(char *line, char **tok, int max) {
    int n = 0;
    char *s = line;
    while (*s) {
        while (*s == ' ' || *s == '\t' || *s == '\n' || *s == '\r') *s++ = '\0';
        if (!*s) break;
        if (n == max) return -1;
        tok[n++] = s;
        while (*s && *s != ' ' && *s != '\t' && *s != '\n' && *s != '\r') s++;
    }
    return n;
}

static int to_i64(const char *s, int64_t *v) {
    char *end;
    errno = 0;
    long long x = strtoll(s, &end, 10);
    if (errno || end == s || *end) return 0;
    *v = (int64_t)x;
    return 1;
}

static int copy_str(char *dst, size_t cap, const char *src) {
    size_t n = strlen(src);
    if (n >= cap) return 0;
    memcpy(dst, src, n + 1);
    return 1;
}

/* A path of the index: relative, no "." or ".." part (the manifest's rule). */
static int safe_rel(const char *p) {
    if (*p == '\0' || *p == '/') return 0;
    const char *s = p;
    while (*s) {
        const char *e = strchr(s, '/');
        size_t n = e ? (size_t)(e - s) : strlen(s);
        if (n == 0 || (n == 1 && s[0] == '.') || (n == 2 && s[0] == '.' && s[1] == '.')) return 0;
        s += n + (e ? 1 : 0);
        if (e && !*s) return 0;
    }
    return 1;
}

/* "input NAME FORMAT DESCR FILE NDIM shape... strides... OFFSET BUFFER" or
 * "output NAME FORMAT DESCR ENTRY NDIM shape..." */
static int parse_array(char **t, int n, array_t *a, int is_input) {
    const int base = 6; /* the fields before the shape */
    if (n < base) return 0;
    int64_t nd;
    if (!copy_str(a->name, sizeof a->name, t[1]) || !copy_str(a->format, sizeof a->format, t[2]) ||
        !copy_str(a->descr, sizeof a->descr, t[3]) || !to_i64(t[5], &nd) || nd < 0 || nd > NPY_MAX_NDIM)
        return 0;
    a->ndim = (int32_t)nd;
    if (is_input) {
        if (!copy_str(a->file, sizeof a->file, t[4]) || !safe_rel(a->file)) return 0;
        if (n != base + 2 * a->ndim + 2) return 0;
    } else {
        if (!copy_str(a->entry, sizeof a->entry, t[4])) return 0;
        if (n != base + a->ndim) return 0;
    }
    for (int32_t d = 0; d < a->ndim; ++d) {
        if (!to_i64(t[base + d], &a->shape[d]) || a->shape[d] < 0) return 0;
        if (is_input && !to_i64(t[base + a->ndim + d], &a->strides[d])) return 0;
    }
    /* the limits of the .npy reader: no shape beyond NPY_MAX_ELEMENTS elements, no buffer beyond four
     * times that, no stride longer than the buffer (so no offset arithmetic below can overflow) */
    int64_t count = 1;
    for (int32_t d = 0; d < a->ndim; ++d) {
        if (a->shape[d] > 0 && count > NPY_MAX_ELEMENTS / a->shape[d]) return 0;
        count *= a->shape[d];
    }
    if (!is_input) return 1;
    if (!to_i64(t[base + 2 * a->ndim], &a->offset) || !to_i64(t[base + 2 * a->ndim + 1], &a->buffer_elements) ||
        a->offset < 0 || a->buffer_elements < 0 || a->buffer_elements > 4 * NPY_MAX_ELEMENTS ||
        a->offset > a->buffer_elements)
        return 0;
    for (int32_t d = 0; d < a->ndim; ++d)
        if (a->strides[d] > a->buffer_elements || a->strides[d] < -a->buffer_elements) return 0;
    return 1;
}

/* ---------------------------------------------------------------- one case */
typedef struct {
    npy_array file;
    float *buf;      /* the array as the kernel sees it (a strided buffer, or the file's data) */
    float *origin;   /* pointer to element (0, ..., 0) */
} loaded_t;

static int64_t count_of(const int64_t *shape, int32_t ndim) {
    int64_t c = 1;
    for (int32_t d = 0; d < ndim; ++d) c *= shape[d];
    return c;
}

/* Lay the C-order values out in a buffer as the index says; check every position is inside it. */
static int lay_out(const array_t *a, loaded_t *l, char *why, size_t wn) {
    int64_t lo = a->offset, hi = a->offset, count = count_of(a->shape, a->ndim);
    for (int32_t d = 0; d < a->ndim; ++d) {
        if (a->shape[d] == 0) continue;
        int64_t ext = (a->shape[d] - 1) * a->strides[d];
        if (ext < 0) lo += ext; else hi += ext;
    }
    if (count > 0 && (lo < 0 || hi >= a->buffer_elements)) {
        snprintf(why, wn, "input %s: its strides reach outside its buffer of %lld elements", a->name,
                 (long long)a->buffer_elements);
        return 0;
    }
    l->buf = calloc((size_t)(a->buffer_elements ? a->buffer_elements : 1), sizeof(float));
    if (l->buf == NULL) {
        snprintf(why, wn, "input %s: out of memory", a->name);
        return 0;
    }
    l->origin = l->buf + a->offset;
    const float *src = l->file.data;
    int64_t idx[NPY_MAX_NDIM] = {0}, pos = 0;
    for (int64_t i = 0; i < count; ++i) {
        l->origin[pos] = src[i];
        for (int32_t d = a->ndim - 1; d >= 0; --d) {
            if (++idx[d] < a->shape[d]) {
                pos += a->strides[d];
                break;
            }
            pos -= a->strides[d] * (a->shape[d] - 1);
            idx[d] = 0;
        }
    }
    return 1;
}

static const array_t *find(const array_t *list, int n, const char *name) {
    for (int i = 0; i < n; ++i)
        if (strcmp(list[i].name, name) == 0) return &list[i];
    return NULL;
}

static int has_entry(const case_t *c, const char *e) {
    for (int i = 0; i < c->n_entries; ++i)
        if (strcmp(c->entries[i], e) == 0) return 1;
    return 0;
}

static int write_text(const char *path, const char *text) {
    FILE *f = fopen(path, "w");
    if (f == NULL) return 0;
    int ok = fputs(text, f) >= 0;
    return (fclose(f) == 0) && ok;
}

static int make_dir(const char *p) { return mkdir(p, 0777) == 0 || errno == EEXIST; }

typedef struct {
    const char *name;
    float *data;
    int64_t count;
} result_t;

/* Returns 0 when the case ran (its outputs or error.txt written), 1 when it could not. */
static int run_case(const char *op, const char *vectors, const char *outputs, const case_t *c) {
    char path[MAX_PATH + 256], why[600] = "", dir[MAX_PATH + 128];
    snprintf(dir, sizeof dir, "%s/%s", outputs, c->dir);
    if (!make_dir(dir)) {
        fprintf(stderr, "vectors_driver: case %s: cannot create %s: %s\n", c->id, dir, strerror(errno));
        return 1;
    }
    loaded_t in[MAX_ARRAYS];
    memset(in, 0, sizeof in);
    int status = 0;
    float *y = NULL, *mean = NULL, *rstd = NULL, *dx = NULL, *dw = NULL, *db = NULL;
    const char *kernel_error = NULL;
    int32_t code = 0;

    for (int i = 0; i < c->n_inputs; ++i) {
        const array_t *a = &c->inputs[i];
        if (strcmp(a->descr, "<f4") != 0) {
            snprintf(why, sizeof why, "this driver's kernel takes float32 (<f4); input %s is %s (%s)", a->name,
                     a->format, a->descr);
            goto refuse;
        }
        snprintf(path, sizeof path, "%s/%s", vectors, a->file);
        char detail[512];
        if (npy_read_expect(path, "<f4", a->ndim, a->shape, &in[i].file, detail, sizeof detail) != NPY_OK) {
            fprintf(stderr, "vectors_driver: case %s: %s\n", c->id, detail);
            status = 1;
            snprintf(why, sizeof why, "input %s could not be read: %s", a->name, detail);
            goto refuse;
        }
        if (!lay_out(a, &in[i], why, sizeof why)) {
            status = 1;
            goto refuse;
        }
    }
    {
        const array_t *xa = find(c->inputs, c->n_inputs, "x");
        if (xa == NULL) {
            snprintf(why, sizeof why, "the case has no input x");
            status = 1;
            goto refuse;
        }
        float *x = NULL, *dy = NULL, *w = NULL, *b = NULL, *rm = NULL, *rv = NULL, *smean = NULL, *srstd = NULL;
        const int64_t *xs = NULL, *dys = NULL;
        for (int i = 0; i < c->n_inputs; ++i) {
            const char *nm = c->inputs[i].name;
            float *p = in[i].origin;
            if (!strcmp(nm, "x")) { x = p; xs = c->inputs[i].strides; }
            else if (!strcmp(nm, "dy")) { dy = p; dys = c->inputs[i].strides; }
            else if (!strcmp(nm, "weight")) w = p;
            else if (!strcmp(nm, "bias")) b = p;
            else if (!strcmp(nm, "running_mean")) rm = p;
            else if (!strcmp(nm, "running_var")) rv = p;
            else if (!strcmp(nm, "mean")) smean = p;
            else if (!strcmp(nm, "rstd")) srstd = p;
        }
        int32_t ndim = xa->ndim;
        const int64_t *shape = xa->shape;
        int64_t n = count_of(shape, ndim), nstat, nparam;
        int layer = strcmp(op, "layer_norm") == 0;
        if (layer) {
            if (c->norm_ndim < 1 || c->norm_ndim > ndim) { snprintf(why, sizeof why, "bad normalized_shape"); status = 1; goto refuse; }
            nstat = count_of(shape, ndim - c->norm_ndim);
            nparam = n / (nstat ? nstat : 1);
        } else if (strcmp(op, "batch_norm") == 0) {
            if (c->axis < 0 || c->axis >= ndim) { snprintf(why, sizeof why, "bad channel axis"); status = 1; goto refuse; }
            nstat = nparam = shape[c->axis];
        } else {
            snprintf(why, sizeof why, "the example C kernel has no %s", op);
            goto refuse;
        }
        y = malloc((size_t)(n ? n : 1) * sizeof *y);
        dx = malloc((size_t)(n ? n : 1) * sizeof *dx);
        mean = malloc((size_t)(nstat ? nstat : 1) * sizeof *mean);
        rstd = malloc((size_t)(nstat ? nstat : 1) * sizeof *rstd);
        dw = malloc((size_t)(nparam ? nparam : 1) * sizeof *dw);
        db = malloc((size_t)(nparam ? nparam : 1) * sizeof *db);
        if (!y || !dx || !mean || !rstd || !dw || !db) { snprintf(why, sizeof why, "out of memory"); status = 1; goto refuse; }
        int train = strcmp(c->mode, "train") == 0;
        double mom = c->has_momentum ? c->momentum : NAN;
        int did_forward = 0;
        if (train && has_entry(c, "forward")) {
            float *urm = c->running ? rm : NULL, *urv = c->running ? rv : NULL;
            code = layer ? refnorm_layer_norm_forward(x, shape, xs, ndim, c->norm_ndim, w, b, c->eps, y, mean, rstd)
                         : refnorm_batch_norm_forward(x, shape, xs, ndim, (int32_t)c->axis, w, b, c->eps, urm, urv, mom,
                                                      c->batches_seen, y, mean, rstd);
            if (code) { kernel_error = layer ? "refnorm_layer_norm_forward" : "refnorm_batch_norm_forward"; goto refuse; }
            did_forward = 1;
        }
        if (!train && has_entry(c, "forward_eval") && !layer) {
            code = refnorm_batch_norm_forward_eval(x, shape, xs, ndim, (int32_t)c->axis, w, b, rm, rv, c->eps, y);
            if (code) { kernel_error = "refnorm_batch_norm_forward_eval"; goto refuse; }
        }
        if (train && has_entry(c, "backward")) {
            const float *m = did_forward ? mean : smean, *r = did_forward ? rstd : srstd;
            code = layer ? refnorm_layer_norm_backward(dy, dys, x, shape, xs, ndim, c->norm_ndim, w, m, r, c->eps, dx, dw, db)
                         : refnorm_batch_norm_backward(dy, dys, x, shape, xs, ndim, (int32_t)c->axis, w, m, r, c->eps,
                                                       dx, dw, db);
            if (code) { kernel_error = layer ? "refnorm_layer_norm_backward" : "refnorm_batch_norm_backward"; goto refuse; }
        }
        if (!train && has_entry(c, "backward_eval") && !layer) {
            code = refnorm_batch_norm_backward_eval(dy, dys, x, shape, xs, ndim, (int32_t)c->axis, w, rm, rv, c->eps,
                                                    dx, dw, db);
            if (code) { kernel_error = "refnorm_batch_norm_backward_eval"; goto refuse; }
        }
        const array_t *rma = find(c->inputs, c->n_inputs, "running_mean");
        const array_t *rva = find(c->inputs, c->n_inputs, "running_var");
        result_t res[] = {{"y", y, n}, {"mean", mean, nstat}, {"rstd", rstd, nstat},
                          {"running_mean", rm, rma ? count_of(rma->shape, rma->ndim) : 0},
                          {"running_var", rv, rva ? count_of(rva->shape, rva->ndim) : 0},
                          {"dx", dx, n}, {"dweight", dw, nparam}, {"dbias", db, nparam}};
        for (int i = 0; i < c->n_outputs; ++i) {
            const array_t *o = &c->outputs[i];
            const result_t *r = NULL;
            for (size_t k = 0; k < sizeof res / sizeof res[0]; ++k)
                if (!strcmp(res[k].name, o->name)) r = &res[k];
            if (r == NULL || r->data == NULL || r->count != count_of(o->shape, o->ndim) || strcmp(o->descr, "<f4")) {
                fprintf(stderr, "vectors_driver: case %s: this kernel gives no %s of %s with %lld elements\n", c->id,
                        o->descr, o->name, (long long)count_of(o->shape, o->ndim));
                status = 1;
                continue;  /* the file is missing: score fails the case, naming the output */
            }
            snprintf(path, sizeof path, "%s/%s.npy", dir, o->name);
            if (npy_write(path, "<f4", o->ndim, o->shape, r->data) != NPY_OK) {
                fprintf(stderr, "vectors_driver: case %s: cannot write %s\n", c->id, path);
                status = 1;
            }
        }
        goto done;
    }
refuse:
    snprintf(path, sizeof path, "%s/error.txt", dir);
    {
        char text[800];
        if (kernel_error)
            snprintf(text, sizeof text, "%s returned %d (%s)\n", kernel_error, (int)code, refnorm_strerror(code));
        else
            snprintf(text, sizeof text, "%s\n", why);
        if (!write_text(path, text)) {
            fprintf(stderr, "vectors_driver: case %s: cannot write %s\n", c->id, path);
            status = 1;
        }
    }
done:
    for (int i = 0; i < c->n_inputs; ++i) {
        free(in[i].buf);
        npy_free(&in[i].file);
    }
    free(y); free(mean); free(rstd); free(dx); free(dw); free(db);
    return status;
}

/* ---------------------------------------------------------------- the index */
static int run_index(const char *vectors, const char *outputs) {
    char path[MAX_PATH + 32], line[MAX_LINE], op[32] = "";
    snprintf(path, sizeof path, "%s/index.txt", vectors);
    FILE *f = fopen(path, "r");
    if (f == NULL) {
        fprintf(stderr, "vectors_driver: cannot open %s: %s\n", path, strerror(errno));
        return 2;
    }
    if (!make_dir(outputs)) {
        fprintf(stderr, "vectors_driver: cannot create %s: %s\n", outputs, strerror(errno));
        fclose(f);
        return 2;
    }
    case_t *c = calloc(1, sizeof *c);
    if (c == NULL) { fclose(f); return 2; }
    int in_case = 0, failed = 0, lineno = 0, cases = 0, bad = 0;
    char *tok[MAX_TOKENS];
    while (fgets(line, sizeof line, f)) {
        lineno++;
        if (!strchr(line, '\n') && !feof(f)) { bad = 1; break; }
        int n = split(line, tok, MAX_TOKENS);
        if (n < 0) { bad = 1; break; }
        if (n == 0) continue;
        const char *k = tok[0];
        if (lineno == 1) {
            if (n != 2 || strcmp(k, "refnorm-vectors") || strcmp(tok[1], "1")) { bad = 1; break; }
            continue;
        }
        if (!strcmp(k, "op") && n == 2 && !in_case) { if (!copy_str(op, sizeof op, tok[1])) { bad = 1; break; } }
        else if (!strcmp(k, "case") && n == 3 && !in_case) {
            memset(c, 0, sizeof *c);
            in_case = 1;
            if (!copy_str(c->dir, sizeof c->dir, tok[1]) || !safe_rel(c->dir) || strchr(c->dir, '/') ||
                !copy_str(c->id, sizeof c->id, tok[2])) { bad = 1; break; }
        } else if (!in_case) { bad = 1; break; }
        else if (!strcmp(k, "mode") && n == 2) { if (!copy_str(c->mode, sizeof c->mode, tok[1])) { bad = 1; break; } }
        else if (!strcmp(k, "running") && n == 2) c->running = !strcmp(tok[1], "1");
        else if (!strcmp(k, "eps") && n == 2) {
            char *end;
            c->eps = strtod(tok[1], &end);
            if (*end) { bad = 1; break; }
        } else if (!strcmp(k, "momentum") && n == 2) {
            char *end;
            c->has_momentum = strcmp(tok[1], "none") != 0;
            c->momentum = c->has_momentum ? strtod(tok[1], &end) : NAN;
            if (c->has_momentum && *end) { bad = 1; break; }
        } else if (!strcmp(k, "batches_seen") && n == 2) { if (!to_i64(tok[1], &c->batches_seen)) { bad = 1; break; } }
        else if (!strcmp(k, "kwarg") && n >= 3) {
            int64_t cnt;
            if (!to_i64(tok[2], &cnt) || cnt != n - 3) { bad = 1; break; }
            if (!strcmp(tok[1], "normalized_shape")) c->norm_ndim = (int32_t)cnt;
            else if (!strcmp(tok[1], "axis") && cnt == 1) { if (!to_i64(tok[3], &c->axis)) { bad = 1; break; } }
        } else if (!strcmp(k, "entry") && n == 2) {
            if (c->n_entries == 4 || !copy_str(c->entries[c->n_entries++], 16, tok[1])) { bad = 1; break; }
        } else if (!strcmp(k, "input")) {
            if (c->n_inputs == MAX_ARRAYS || !parse_array(tok, n, &c->inputs[c->n_inputs++], 1)) { bad = 1; break; }
        } else if (!strcmp(k, "output")) {
            if (c->n_outputs == MAX_ARRAYS || !parse_array(tok, n, &c->outputs[c->n_outputs++], 0)) { bad = 1; break; }
        } else if (!strcmp(k, "end") && n == 1) {
            in_case = 0;
            cases++;
            failed |= run_case(op, vectors, outputs, c);
        }
        /* other fields (dtype, convention, ...) describe the case; this kernel's ABI fixes them */
    }
    fclose(f);
    free(c);
    if (bad || in_case) {
        fprintf(stderr, "vectors_driver: %s line %d: not the index format (docs/vectors.md)\n", path, lineno);
        return 2;
    }
    fprintf(stderr, "vectors_driver: %d case(s) run into %s\n", cases, outputs);
    return failed ? 1 : 0;
}

static int check_files(int argc, char **argv) {
    int bad = 0;
    for (int i = 0; i < argc; ++i) {
        npy_array a;
        char detail[512];
        int rc = npy_read(argv[i], &a, detail, sizeof detail);
        if (rc == NPY_OK) {
            printf("ok %s %d", a.descr, (int)a.ndim);
            for (int32_t d = 0; d < a.ndim; ++d) printf(" %lld", (long long)a.shape[d]);
            printf("\n");
            npy_free(&a);
        } else {
            printf("refused %d %s\n", rc, detail);
            bad = 1;
        }
    }
    return bad;
}

int main(int argc, char **argv) {
    if (argc >= 2 && strcmp(argv[1], "--check") == 0) return check_files(argc - 2, argv + 2);
    if (argc != 3) {
        fprintf(stderr, "usage: vectors_driver VECTORS OUTPUTS\n       vectors_driver --check FILE...\n");
        return 2;
    }
    return run_index(argv[1], argv[2]);
}
