/*
 * The strict .npy v1.0 reader and writer of npy_reader.h. The header grammar accepted is the dict
 * literal NumPy writes, with any key order, any spaces, and an optional trailing comma:
 *
 *   { 'descr': '<f4', 'fortran_order': False, 'shape': (4, 64), }   padded with spaces, ending in \n
 *
 * Strings may be quoted with ' or "; shape is () for a 0-d array and (n,) for one dimension.
 */
#include "npy_reader.h"

#include <limits.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static const char *const DESCRS[] = {"<f8", "<f4", "<f2", "<u2", "|u1"};
static const size_t SIZES[] = {8, 4, 2, 2, 1};

const char *npy_strerror(int code) {
    switch (code) {
    case NPY_OK: return "success";
    case NPY_EOPEN: return "cannot open or read the file";
    case NPY_EMAGIC: return "not a .npy file (no \\x93NUMPY magic string)";
    case NPY_EVERSION: return "not .npy version 1.0";
    case NPY_EHEADER: return "malformed header";
    case NPY_EDTYPE: return "element type not one of <f8 <f4 <f2 <u2 |u1 (pickles, big-endian and structured types are refused)";
    case NPY_EORDER: return "fortran_order is not False";
    case NPY_ESHAPE: return "bad shape";
    case NPY_ESIZE: return "the file size does not match the header (truncated, or trailing bytes)";
    case NPY_ENOMEM: return "out of memory";
    case NPY_EMISMATCH: return "not the element type or shape expected";
    default: return "unknown error code";
    }
}

static int fail(int code, char *detail, size_t n, const char *path, const char *why) {
    if (detail != NULL && n > 0) snprintf(detail, n, "%s: %s: %s", path, npy_strerror(code), why);
    return code;
}

/* ---------------------------------------------------------------- the header's dict literal */
typedef struct {
    const char *s, *end;
} cursor;

static void skip_space(cursor *c) {
    while (c->s < c->end && (*c->s == ' ' || *c->s == '\t' || *c->s == '\n' || *c->s == '\r')) c->s++;
}

static int take(cursor *c, char ch) {
    skip_space(c);
    if (c->s < c->end && *c->s == ch) {
        c->s++;
        return 1;
    }
    return 0;
}

/* A quoted string of at most cap - 1 characters into buf. */
static int take_string(cursor *c, char *buf, size_t cap) {
    skip_space(c);
    if (c->s >= c->end || (*c->s != '\'' && *c->s != '"')) return 0;
    char q = *c->s++;
    size_t n = 0;
    while (c->s < c->end && *c->s != q) {
        if (*c->s == '\\' || n + 1 >= cap) return 0;  /* no escapes in the keys and values we accept */
        buf[n++] = *c->s++;
    }
    if (c->s >= c->end) return 0;
    c->s++;
    buf[n] = '\0';
    return 1;
}

static int take_word(cursor *c, const char *w) {
    skip_space(c);
    size_t n = strlen(w);
    if ((size_t)(c->end - c->s) < n || memcmp(c->s, w, n) != 0) return 0;
    const char *after = c->s + n;
    if (after < c->end && ((*after >= 'A' && *after <= 'Z') || (*after >= 'a' && *after <= 'z') ||
                           (*after >= '0' && *after <= '9') || *after == '_'))
        return 0;
    c->s = after;
    return 1;
}

/* A non-negative decimal integer that fits in int64 (Python ints; a leading + or - is refused). */
static int take_int(cursor *c, int64_t *v) {
    skip_space(c);
    if (c->s >= c->end || *c->s < '0' || *c->s > '9') return 0;
    int64_t x = 0;
    while (c->s < c->end && *c->s >= '0' && *c->s <= '9') {
        int d = *c->s - '0';
        if (x > (INT64_MAX - d) / 10) return -1;  /* too large */
        x = x * 10 + d;
        c->s++;
    }
    *v = x;
    return 1;
}

static int parse_header(const char *h, size_t len, npy_array *a, char *detail, size_t n, const char *path) {
    for (size_t i = 0; i < len; ++i) {
        unsigned char ch = (unsigned char)h[i];
        if (ch > 126 || (ch < 32 && ch != '\n' && ch != '\t'))
            return fail(NPY_EHEADER, detail, n, path, "the header is not printable ASCII");
    }
    cursor c = {h, h + len};
    int seen_descr = 0, seen_order = 0, seen_shape = 0;
    if (!take(&c, '{')) return fail(NPY_EHEADER, detail, n, path, "the header does not start with '{'");
    for (;;) {
        char key[32];
        if (take(&c, '}')) break;
        if (!take_string(&c, key, sizeof key) || !take(&c, ':'))
            return fail(NPY_EHEADER, detail, n, path, "expected a quoted key and ':'");
        if (strcmp(key, "descr") == 0 && !seen_descr) {
            char d[16];
            seen_descr = 1;
            if (!take_string(&c, d, sizeof d))
                return fail(NPY_EDTYPE, detail, n, path, "descr is not a short string (a structured type?)");
            size_t k = 0;
            while (k < 5 && strcmp(d, DESCRS[k]) != 0) k++;
            if (k == 5) return fail(NPY_EDTYPE, detail, n, path, d);
            memcpy(a->descr, DESCRS[k], 4);
            a->itemsize = SIZES[k];
        } else if (strcmp(key, "fortran_order") == 0 && !seen_order) {
            seen_order = 1;
            if (take_word(&c, "True")) return fail(NPY_EORDER, detail, n, path, "fortran_order is True");
            if (!take_word(&c, "False")) return fail(NPY_EORDER, detail, n, path, "fortran_order is not a bool");
        } else if (strcmp(key, "shape") == 0 && !seen_shape) {
            seen_shape = 1;
            if (!take(&c, '(')) return fail(NPY_ESHAPE, detail, n, path, "shape is not a tuple");
            a->ndim = 0;
            a->count = 1;
            if (!take(&c, ')')) {
                for (;;) {
                    int64_t v = 0;
                    int r = take_int(&c, &v);
                    if (r <= 0) return fail(NPY_ESHAPE, detail, n, path, "a dimension is not an integer >= 0");
                    if (a->ndim >= NPY_MAX_NDIM) return fail(NPY_ESHAPE, detail, n, path, "more than 32 dimensions");
                    a->shape[a->ndim++] = v;
                    if (v > 0 && a->count > NPY_MAX_ELEMENTS / v)
                        return fail(NPY_ESHAPE, detail, n, path, "more elements than the limit of 2^28");
                    a->count *= v;
                    int comma = take(&c, ',');
                    if (take(&c, ')')) {
                        if (a->ndim == 1 && !comma)  /* (n) is an int in Python, not a tuple */
                            return fail(NPY_ESHAPE, detail, n, path, "one dimension needs a trailing comma: (n,)");
                        break;
                    }
                    if (!comma) return fail(NPY_ESHAPE, detail, n, path, "expected ',' or ')' in shape");
                }
            }
        } else {
            return fail(NPY_EHEADER, detail, n, path, "an unknown or repeated key");
        }
        if (take(&c, ',')) continue;
        if (take(&c, '}')) break;
        return fail(NPY_EHEADER, detail, n, path, "expected ',' or '}'");
    }
    skip_space(&c);
    if (c.s != c.end) return fail(NPY_EHEADER, detail, n, path, "text after the dict");
    if (!(seen_descr && seen_order && seen_shape))
        return fail(NPY_EHEADER, detail, n, path, "missing one of 'descr', 'fortran_order', 'shape'");
    return NPY_OK;
}

/* ---------------------------------------------------------------- reading */
int npy_read(const char *path, npy_array *out, char *detail, size_t n) {
    memset(out, 0, sizeof *out);
    if (detail != NULL && n > 0) detail[0] = '\0';
    FILE *f = fopen(path, "rb");
    if (f == NULL) return fail(NPY_EOPEN, detail, n, path, "cannot open");
    unsigned char head[10];
    int rc = NPY_OK;
    char *hdr = NULL;
    npy_array a;
    memset(&a, 0, sizeof a);
    long size = -1;
    if (fseek(f, 0, SEEK_END) == 0) size = ftell(f);
    if (size < 0 || fseek(f, 0, SEEK_SET) != 0) {
        rc = fail(NPY_EOPEN, detail, n, path, "cannot determine its size (not a regular file?)");
        goto done;
    }
    if (fread(head, 1, 10, f) != 10 || memcmp(head, "\x93NUMPY", 6) != 0) {
        rc = fail(NPY_EMAGIC, detail, n, path, "the first bytes are not \\x93NUMPY");
        goto done;
    }
    if (head[6] != 1 || head[7] != 0) {
        rc = fail(NPY_EVERSION, detail, n, path, "version bytes are not 1, 0");
        goto done;
    }
    size_t hlen = (size_t)head[8] | ((size_t)head[9] << 8);
    if (hlen > NPY_MAX_HEADER) {
        rc = fail(NPY_EHEADER, detail, n, path, "the header is longer than 10000 bytes");
        goto done;
    }
    hdr = malloc(hlen + 1);
    if (hdr == NULL) {
        rc = fail(NPY_ENOMEM, detail, n, path, "header");
        goto done;
    }
    if (fread(hdr, 1, hlen, f) != hlen) {
        rc = fail(NPY_ESIZE, detail, n, path, "truncated in the header");
        goto done;
    }
    hdr[hlen] = '\0';
    rc = parse_header(hdr, hlen, &a, detail, n, path);
    if (rc != NPY_OK) goto done;
    {
        uint64_t nbytes = (uint64_t)a.count * a.itemsize;
        if ((uint64_t)size != 10u + hlen + nbytes) {
            rc = fail(NPY_ESIZE, detail, n, path, (uint64_t)size < 10u + hlen + nbytes ? "truncated" : "trailing bytes");
            goto done;
        }
        a.data = malloc(nbytes ? (size_t)nbytes : 1);
        if (a.data == NULL) {
            rc = fail(NPY_ENOMEM, detail, n, path, "data");
            goto done;
        }
        if (fread(a.data, 1, (size_t)nbytes, f) != (size_t)nbytes) {
            free(a.data);
            a.data = NULL;
            rc = fail(NPY_ESIZE, detail, n, path, "truncated while reading");
            goto done;
        }
    }
    *out = a;
done:
    free(hdr);
    fclose(f);
    return rc;
}

int npy_read_expect(const char *path, const char *descr, int32_t ndim, const int64_t *shape, npy_array *out,
                    char *detail, size_t n) {
    int rc = npy_read(path, out, detail, n);
    if (rc != NPY_OK) return rc;
    int same = strcmp(out->descr, descr) == 0;
    if (same && ndim >= 0) {
        same = out->ndim == ndim;
        for (int32_t d = 0; same && d < ndim; ++d) same = out->shape[d] == shape[d];
    }
    if (!same) {
        char why[96];
        snprintf(why, sizeof why, "holds %s with %d dimension(s), expected %s%s", out->descr, (int)out->ndim, descr,
                 ndim >= 0 ? " of the manifest's shape" : "");
        npy_free(out);
        return fail(NPY_EMISMATCH, detail, n, path, why);
    }
    return NPY_OK;
}

void npy_free(npy_array *a) {
    if (a == NULL) return;
    free(a->data);
    memset(a, 0, sizeof *a);
}

/* ---------------------------------------------------------------- writing */
int npy_write(const char *path, const char *descr, int32_t ndim, const int64_t *shape, const void *data) {
    size_t k = 0;
    while (k < 5 && strcmp(descr, DESCRS[k]) != 0) k++;
    if (k == 5) return NPY_EDTYPE;
    if (ndim < 0 || ndim > NPY_MAX_NDIM) return NPY_ESHAPE;
    char dict[1024];
    int len = snprintf(dict, sizeof dict, "{'descr': '%s', 'fortran_order': False, 'shape': (", descr);
    int64_t count = 1;
    for (int32_t d = 0; d < ndim; ++d) {
        if (shape[d] < 0) return NPY_ESHAPE;
        /* NumPy's form: () for 0-d, (n,) for one dimension, (a, b) for more */
        len += snprintf(dict + len, sizeof dict - (size_t)len, "%s%lld%s", d ? ", " : "", (long long)shape[d],
                        ndim == 1 ? "," : "");
        count *= shape[d];
    }
    len += snprintf(dict + len, sizeof dict - (size_t)len, "), }");
    /* pad with spaces so that 10 + header is a multiple of 64, the header ending in '\n' */
    size_t hlen = (size_t)len + 1;
    hlen += (64 - (10 + hlen) % 64) % 64;
    FILE *f = fopen(path, "wb");
    if (f == NULL) return NPY_EOPEN;
    unsigned char head[10] = {0x93, 'N', 'U', 'M', 'P', 'Y', 1, 0, (unsigned char)(hlen & 0xff),
                              (unsigned char)(hlen >> 8)};
    int ok = fwrite(head, 1, 10, f) == 10 && fwrite(dict, 1, (size_t)len, f) == (size_t)len;
    for (size_t i = (size_t)len; ok && i + 1 < hlen; ++i) ok = fputc(' ', f) != EOF;
    ok = ok && fputc('\n', f) != EOF;
    size_t nbytes = (size_t)count * SIZES[k];
    ok = ok && (nbytes == 0 || fwrite(data, 1, nbytes, f) == nbytes);
    ok = (fclose(f) == 0) && ok;
    return ok ? NPY_OK : NPY_EOPEN;
}
