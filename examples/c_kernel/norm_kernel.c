/*
 * A hand-written reference kernel for the refnorm C ABI (norm_kernel.h): float32 storage,
 * double accumulation, corrected two-pass variance, every output rounded once to float32.
 *
 * Per group of n elements (a row for layer norm, a channel for batch norm):
 *   m0 = sum(x) / n,  d_i = x_i - m0,  c = sum(d) / n,  M2 = sum(d^2) - sum(d) c
 *   mean = m0 + c,  var = M2 / n,  rstd = 1 / sqrt(var + eps),  xhat_i = (d_i - c) rstd
 * (the corrected two-pass algorithm: Chan, Golub & LeVeque 1983; Higham 2002, §1.9), and
 *   y = xhat w + b
 *   dx = rstd (g - mean(g) - xhat mean(g xhat)),  g = dy w      (training: Ioffe & Szegedy 2015, §3)
 *   dx = dy w rstd                                              (eval: running statistics)
 *   dweight = sum(dy xhat),  dbias = sum(dy)                    over the weight's broadcast axes.
 *
 * The backward recomputes the statistics from x in double instead of reading the saved float32
 * mean and rstd: a mean rounded to float32 is off by up to 2^-24 |mean|, which becomes an error
 * of 2^-24 |mean| rstd in every xhat, large when |mean| is much larger than the spread.
 */
#include "norm_kernel.h"

#include <math.h>
#include <stdlib.h>

int32_t refnorm_abi_version(void) { return REFNORM_ABI_VERSION; }

const char *refnorm_strerror(int32_t code) {
    switch (code) {
    case REFNORM_OK: return "success";
    case REFNORM_EINVAL: return "invalid argument (a required pointer is NULL or a scalar is out of range)";
    case REFNORM_ESHAPE: return "invalid shape (ndim, norm_ndim, channel_axis or a dimension out of range)";
    case REFNORM_ENOMEM: return "out of memory";
    case REFNORM_EDOMAIN: return "the unbiased running variance needs at least 2 elements per channel";
    default: return "unknown error code";
    }
}

/* Element offsets of every index of the sub-array made of the dims d with keep[d] != 0, in C
 * order of those dims (an odometer over the kept dims). *count receives the number of indices. */
static int64_t *offsets_of(const int64_t *shape, const int64_t *strides, int32_t ndim,
                           const unsigned char *keep, int64_t *count) {
    int64_t idx[REFNORM_MAX_NDIM] = {0};
    int64_t n = 1, cur = 0;
    for (int32_t d = 0; d < ndim; ++d)
        if (keep[d]) n *= shape[d];
    int64_t *off = malloc((size_t)n * sizeof *off);
    if (off == NULL) return NULL;
    for (int64_t i = 0; i < n; ++i) {
        off[i] = cur;
        for (int32_t d = ndim - 1; d >= 0; --d) {
            if (!keep[d]) continue;
            if (++idx[d] < shape[d]) {
                cur += strides[d];
                break;
            }
            cur -= strides[d] * (shape[d] - 1);
            idx[d] = 0;
        }
    }
    *count = n;
    return off;
}

static int32_t check_shape(const int64_t *shape, const int64_t *strides, int32_t ndim, int32_t min_ndim) {
    if (shape == NULL || strides == NULL) return REFNORM_EINVAL;
    if (ndim < min_ndim || ndim > REFNORM_MAX_NDIM) return REFNORM_ESHAPE;
    for (int32_t d = 0; d < ndim; ++d)
        if (shape[d] < 1) return REFNORM_ESHAPE;
    return REFNORM_OK;
}

/* Corrected two-pass statistics of the n values base[off[i]]. */
typedef struct {
    double m0, c, var, rstd;
} stats_t;

static stats_t group_stats(const float *base, const int64_t *off, int64_t n, double eps) {
    stats_t s;
    double sum = 0.0;
    for (int64_t i = 0; i < n; ++i) sum += (double)base[off[i]];
    s.m0 = sum / (double)n;
    double s1 = 0.0, s2 = 0.0;
    for (int64_t i = 0; i < n; ++i) {
        double d = (double)base[off[i]] - s.m0;
        s1 += d;
        s2 += d * d;
    }
    /* With an infinite m0 the deviations are Inf - Inf = NaN: the mean is m0 itself (IEEE 754). */
    s.c = isfinite(s.m0) ? s1 / (double)n : 0.0;
    double m2 = s2 - s1 * s.c;
    if (m2 < 0.0) m2 = 0.0; /* rounding only: M2 >= 0 in exact arithmetic; NaN stays NaN */
    s.var = m2 / (double)n;
    s.rstd = 1.0 / sqrt(s.var + eps);
    return s;
}

/* ---------------------------------------------------------------- layer norm */

typedef struct {
    int64_t rows, cols;
    int64_t *row_x, *col_x, *row_dy, *col_dy;
} ln_plan;

static void ln_free(ln_plan *p) {
    free(p->row_x);
    free(p->col_x);
    free(p->row_dy);
    free(p->col_dy);
}

static int32_t ln_setup(ln_plan *p, const int64_t *shape, const int64_t *x_strides, const int64_t *dy_strides,
                        int32_t ndim, int32_t norm_ndim) {
    unsigned char lead[REFNORM_MAX_NDIM], tail[REFNORM_MAX_NDIM];
    p->row_x = p->col_x = p->row_dy = p->col_dy = NULL;
    if (norm_ndim < 1 || norm_ndim > ndim) return REFNORM_ESHAPE;
    for (int32_t d = 0; d < ndim; ++d) {
        lead[d] = d < ndim - norm_ndim;
        tail[d] = !lead[d];
    }
    p->row_x = offsets_of(shape, x_strides, ndim, lead, &p->rows);
    p->col_x = offsets_of(shape, x_strides, ndim, tail, &p->cols);
    if (dy_strides != NULL) {
        p->row_dy = offsets_of(shape, dy_strides, ndim, lead, &p->rows);
        p->col_dy = offsets_of(shape, dy_strides, ndim, tail, &p->cols);
    }
    if (p->row_x == NULL || p->col_x == NULL || (dy_strides != NULL && (p->row_dy == NULL || p->col_dy == NULL))) {
        ln_free(p);
        return REFNORM_ENOMEM;
    }
    return REFNORM_OK;
}

int32_t refnorm_layer_norm_forward(const float *x, const int64_t *shape, const int64_t *x_strides,
                                   int32_t ndim, int32_t norm_ndim, const float *weight, const float *bias,
                                   double eps, float *y, float *mean, float *rstd) {
    if (x == NULL || y == NULL || !(eps >= 0.0)) return REFNORM_EINVAL;
    int32_t rc = check_shape(shape, x_strides, ndim, 1);
    if (rc != REFNORM_OK) return rc;
    ln_plan p;
    if ((rc = ln_setup(&p, shape, x_strides, NULL, ndim, norm_ndim)) != REFNORM_OK) return rc;
    for (int64_t r = 0; r < p.rows; ++r) {
        const float *row = x + p.row_x[r];
        stats_t s = group_stats(row, p.col_x, p.cols, eps);
        for (int64_t j = 0; j < p.cols; ++j) {
            double xhat = (((double)row[p.col_x[j]] - s.m0) - s.c) * s.rstd;
            double w = weight ? (double)weight[j] : 1.0;
            double b = bias ? (double)bias[j] : 0.0;
            y[r * p.cols + j] = (float)(xhat * w + b);
        }
        if (mean) mean[r] = (float)(s.m0 + s.c);
        if (rstd) rstd[r] = (float)s.rstd;
    }
    ln_free(&p);
    return REFNORM_OK;
}

int32_t refnorm_layer_norm_backward(const float *dy, const int64_t *dy_strides, const float *x,
                                    const int64_t *shape, const int64_t *x_strides, int32_t ndim,
                                    int32_t norm_ndim, const float *weight, const float *mean,
                                    const float *rstd, double eps, float *dx, float *dweight, float *dbias) {
    (void)mean; /* accepted for the ABI; recomputed in double (see the file comment) */
    (void)rstd;
    if (dy == NULL || dy_strides == NULL || x == NULL || dx == NULL || dweight == NULL || dbias == NULL ||
        !(eps >= 0.0))
        return REFNORM_EINVAL;
    int32_t rc = check_shape(shape, x_strides, ndim, 1);
    if (rc != REFNORM_OK) return rc;
    ln_plan p;
    if ((rc = ln_setup(&p, shape, x_strides, dy_strides, ndim, norm_ndim)) != REFNORM_OK) return rc;
    double *dw = calloc((size_t)p.cols, sizeof *dw);
    double *db = calloc((size_t)p.cols, sizeof *db);
    double *xh = malloc((size_t)p.cols * sizeof *xh);
    if (dw == NULL || db == NULL || xh == NULL) {
        free(dw);
        free(db);
        free(xh);
        ln_free(&p);
        return REFNORM_ENOMEM;
    }
    const double n = (double)p.cols;
    for (int64_t r = 0; r < p.rows; ++r) {
        const float *xrow = x + p.row_x[r];
        const float *grow = dy + p.row_dy[r];
        stats_t s = group_stats(xrow, p.col_x, p.cols, eps);
        double sg = 0.0, sgx = 0.0;
        for (int64_t j = 0; j < p.cols; ++j) {
            double g = (double)grow[p.col_dy[j]];
            double xhat = (((double)xrow[p.col_x[j]] - s.m0) - s.c) * s.rstd;
            double w = weight ? (double)weight[j] : 1.0;
            xh[j] = xhat;
            dw[j] += g * xhat;
            db[j] += g;
            sg += g * w;
            sgx += g * w * xhat;
        }
        const double mg = sg / n, mgx = sgx / n;
        for (int64_t j = 0; j < p.cols; ++j) {
            double w = weight ? (double)weight[j] : 1.0;
            double g = (double)grow[p.col_dy[j]] * w;
            dx[r * p.cols + j] = (float)(s.rstd * ((g - mg) - xh[j] * mgx));
        }
    }
    for (int64_t j = 0; j < p.cols; ++j) {
        dweight[j] = (float)dw[j];
        dbias[j] = (float)db[j];
    }
    free(dw);
    free(db);
    free(xh);
    ln_free(&p);
    return REFNORM_OK;
}

/* ---------------------------------------------------------------- batch norm */

typedef struct {
    int64_t channels, n, post;
    int64_t cstride_x, cstride_dy;
    int64_t *other_x, *other_dy; /* offsets of the non-channel indices, C order */
} bn_plan;

static void bn_free(bn_plan *p) {
    free(p->other_x);
    free(p->other_dy);
}

static int32_t bn_setup(bn_plan *p, const int64_t *shape, const int64_t *x_strides, const int64_t *dy_strides,
                        int32_t ndim, int32_t axis) {
    unsigned char other[REFNORM_MAX_NDIM];
    p->other_x = p->other_dy = NULL;
    if (axis < 0 || axis >= ndim) return REFNORM_ESHAPE;
    p->post = 1;
    for (int32_t d = 0; d < ndim; ++d) {
        other[d] = d != axis;
        if (d > axis) p->post *= shape[d];
    }
    p->channels = shape[axis];
    p->cstride_x = x_strides[axis];
    p->cstride_dy = dy_strides ? dy_strides[axis] : 0;
    p->other_x = offsets_of(shape, x_strides, ndim, other, &p->n);
    if (dy_strides != NULL) p->other_dy = offsets_of(shape, dy_strides, ndim, other, &p->n);
    if (p->other_x == NULL || (dy_strides != NULL && p->other_dy == NULL)) {
        bn_free(p);
        return REFNORM_ENOMEM;
    }
    return REFNORM_OK;
}

/* Index in the C-contiguous output of channel c and non-channel index i. */
static int64_t bn_out(const bn_plan *p, int64_t c, int64_t i) {
    return ((i / p->post) * p->channels + c) * p->post + i % p->post;
}

int32_t refnorm_batch_norm_forward(const float *x, const int64_t *shape, const int64_t *x_strides,
                                   int32_t ndim, int32_t channel_axis, const float *weight, const float *bias,
                                   double eps, float *running_mean, float *running_var, double momentum,
                                   int64_t batches_seen, float *y, float *mean, float *rstd) {
    if (x == NULL || y == NULL || !(eps >= 0.0)) return REFNORM_EINVAL;
    if ((running_mean == NULL) != (running_var == NULL)) return REFNORM_EINVAL;
    const int cumulative = isnan(momentum);
    if (running_mean != NULL && (cumulative ? batches_seen < 0 : !(momentum >= 0.0 && momentum <= 1.0)))
        return REFNORM_EINVAL;
    int32_t rc = check_shape(shape, x_strides, ndim, 2);
    if (rc != REFNORM_OK) return rc;
    bn_plan p;
    if ((rc = bn_setup(&p, shape, x_strides, NULL, ndim, channel_axis)) != REFNORM_OK) return rc;
    if (running_mean != NULL && p.n < 2) {
        bn_free(&p);
        return REFNORM_EDOMAIN;
    }
    const double f = cumulative ? 1.0 / ((double)batches_seen + 1.0) : momentum;
    for (int64_t c = 0; c < p.channels; ++c) {
        const float *base = x + c * p.cstride_x;
        stats_t s = group_stats(base, p.other_x, p.n, eps);
        double w = weight ? (double)weight[c] : 1.0;
        double b = bias ? (double)bias[c] : 0.0;
        for (int64_t i = 0; i < p.n; ++i) {
            double xhat = (((double)base[p.other_x[i]] - s.m0) - s.c) * s.rstd;
            y[bn_out(&p, c, i)] = (float)(xhat * w + b);
        }
        if (mean) mean[c] = (float)(s.m0 + s.c);
        if (rstd) rstd[c] = (float)s.rstd;
        if (running_mean != NULL) {
            double unbiased = s.var * (double)p.n / (double)(p.n - 1);
            running_mean[c] = (float)((1.0 - f) * (double)running_mean[c] + f * (s.m0 + s.c));
            running_var[c] = (float)((1.0 - f) * (double)running_var[c] + f * unbiased);
        }
    }
    bn_free(&p);
    return REFNORM_OK;
}

int32_t refnorm_batch_norm_forward_eval(const float *x, const int64_t *shape, const int64_t *x_strides,
                                        int32_t ndim, int32_t channel_axis, const float *weight,
                                        const float *bias, const float *running_mean,
                                        const float *running_var, double eps, float *y) {
    if (x == NULL || y == NULL || running_mean == NULL || running_var == NULL || !(eps >= 0.0))
        return REFNORM_EINVAL;
    int32_t rc = check_shape(shape, x_strides, ndim, 2);
    if (rc != REFNORM_OK) return rc;
    bn_plan p;
    if ((rc = bn_setup(&p, shape, x_strides, NULL, ndim, channel_axis)) != REFNORM_OK) return rc;
    for (int64_t c = 0; c < p.channels; ++c) {
        const float *base = x + c * p.cstride_x;
        double m = (double)running_mean[c];
        double r = 1.0 / sqrt((double)running_var[c] + eps);
        double w = weight ? (double)weight[c] : 1.0;
        double b = bias ? (double)bias[c] : 0.0;
        for (int64_t i = 0; i < p.n; ++i)
            y[bn_out(&p, c, i)] = (float)(((double)base[p.other_x[i]] - m) * r * w + b);
    }
    bn_free(&p);
    return REFNORM_OK;
}

static int32_t bn_backward(const float *dy, const int64_t *dy_strides, const float *x, const int64_t *shape,
                           const int64_t *x_strides, int32_t ndim, int32_t axis, const float *weight,
                           const float *running_mean, const float *running_var, int training, double eps,
                           float *dx, float *dweight, float *dbias) {
    if (dy == NULL || dy_strides == NULL || x == NULL || dx == NULL || dweight == NULL || dbias == NULL ||
        !(eps >= 0.0))
        return REFNORM_EINVAL;
    if (!training && (running_mean == NULL || running_var == NULL)) return REFNORM_EINVAL;
    int32_t rc = check_shape(shape, x_strides, ndim, 2);
    if (rc != REFNORM_OK) return rc;
    bn_plan p;
    if ((rc = bn_setup(&p, shape, x_strides, dy_strides, ndim, axis)) != REFNORM_OK) return rc;
    const double n = (double)p.n;
    for (int64_t c = 0; c < p.channels; ++c) {
        const float *xb = x + c * p.cstride_x;
        const float *gb = dy + c * p.cstride_dy;
        double m0, mc, r;
        if (training) {
            stats_t s = group_stats(xb, p.other_x, p.n, eps);
            m0 = s.m0;
            mc = s.c;
            r = s.rstd;
        } else {
            m0 = (double)running_mean[c];
            mc = 0.0;
            r = 1.0 / sqrt((double)running_var[c] + eps);
        }
        double sdy = 0.0, sdyx = 0.0;
        for (int64_t i = 0; i < p.n; ++i) {
            double g = (double)gb[p.other_dy[i]];
            sdy += g;
            sdyx += g * ((((double)xb[p.other_x[i]] - m0) - mc) * r);
        }
        double w = weight ? (double)weight[c] : 1.0;
        for (int64_t i = 0; i < p.n; ++i) {
            double g = (double)gb[p.other_dy[i]];
            double v;
            if (training) {
                double xhat = (((double)xb[p.other_x[i]] - m0) - mc) * r;
                v = w * r * ((g - sdy / n) - xhat * (sdyx / n));
            } else {
                v = g * w * r;
            }
            dx[bn_out(&p, c, i)] = (float)v;
        }
        dweight[c] = (float)sdyx;
        dbias[c] = (float)sdy;
    }
    bn_free(&p);
    return REFNORM_OK;
}

int32_t refnorm_batch_norm_backward(const float *dy, const int64_t *dy_strides, const float *x,
                                    const int64_t *shape, const int64_t *x_strides, int32_t ndim,
                                    int32_t channel_axis, const float *weight, const float *mean,
                                    const float *rstd, double eps, float *dx, float *dweight, float *dbias) {
    (void)mean; /* accepted for the ABI; recomputed in double (see the file comment) */
    (void)rstd;
    return bn_backward(dy, dy_strides, x, shape, x_strides, ndim, channel_axis, weight, NULL, NULL, 1, eps,
                       dx, dweight, dbias);
}

int32_t refnorm_batch_norm_backward_eval(const float *dy, const int64_t *dy_strides, const float *x,
                                         const int64_t *shape, const int64_t *x_strides, int32_t ndim,
                                         int32_t channel_axis, const float *weight,
                                         const float *running_mean, const float *running_var, double eps,
                                         float *dx, float *dweight, float *dbias) {
    return bn_backward(dy, dy_strides, x, shape, x_strides, ndim, channel_axis, weight, running_mean,
                       running_var, 0, eps, dx, dweight, dbias);
}
