/*
 * refnorm C ABI, version 1: layer and batch normalization on float32 arrays.
 *
 * Conventions shared by every function (docs/kernel-interface.md, "C ABI"):
 *   - Input arrays are passed as a pointer to their element at index (0, ..., 0), their shape
 *     and their strides counted in elements (not bytes); strides may be negative or zero.
 *     Inputs are never written, except running_mean/running_var in refnorm_batch_norm_forward.
 *   - Outputs are C-contiguous buffers allocated by the caller: y and dx have the shape of x,
 *     mean and rstd the shape of the statistics, dweight and dbias the shape of the weight.
 *   - weight, bias: NULL means weight 1, bias 0. dweight and dbias are always written.
 *   - Return value 0 on success, otherwise one of the REFNORM_E* codes; on an error no output
 *     is written. refnorm_strerror(code) describes a code.
 *   - eps is added inside the square root: rstd = 1 / sqrt(var + eps), var the biased variance.
 */
#ifndef REFNORM_NORM_KERNEL_H
#define REFNORM_NORM_KERNEL_H

#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

#define REFNORM_ABI_VERSION 1
#define REFNORM_MAX_NDIM 32

enum {
    REFNORM_OK = 0,
    REFNORM_EINVAL = 1,  /* a required pointer is NULL, or a scalar argument is out of range */
    REFNORM_ESHAPE = 2,  /* ndim, norm_ndim, channel_axis or a dimension is out of range */
    REFNORM_ENOMEM = 3,  /* a work buffer could not be allocated */
    REFNORM_EDOMAIN = 4  /* the unbiased running variance needs at least 2 elements per channel */
};

int32_t refnorm_abi_version(void);
const char *refnorm_strerror(int32_t code);

/* Layer norm over the trailing norm_ndim axes of x. mean, rstd: shape x.shape[:ndim - norm_ndim]
 * (either may be NULL: not stored). weight, bias: shape x.shape[ndim - norm_ndim:]. */
int32_t refnorm_layer_norm_forward(const float *x, const int64_t *shape, const int64_t *x_strides,
                                   int32_t ndim, int32_t norm_ndim, const float *weight, const float *bias,
                                   double eps, float *y, float *mean, float *rstd);

/* mean, rstd: the forward's saved statistics, or NULL. This implementation recomputes the
 * statistics from x in double either way (see norm_kernel.c). */
int32_t refnorm_layer_norm_backward(const float *dy, const int64_t *dy_strides, const float *x,
                                    const int64_t *shape, const int64_t *x_strides, int32_t ndim,
                                    int32_t norm_ndim, const float *weight, const float *mean,
                                    const float *rstd, double eps, float *dx, float *dweight, float *dbias);

/* Batch norm, training mode: statistics per channel (axis channel_axis) over every other axis.
 * running_mean, running_var (shape (C,), or both NULL) are updated in place:
 *   r = (1 - f) r + f s,  f = momentum, or f = 1 / (batches_seen + 1) when momentum is NaN
 * with s the batch mean and the unbiased batch variance M2 / (n - 1). */
int32_t refnorm_batch_norm_forward(const float *x, const int64_t *shape, const int64_t *x_strides,
                                   int32_t ndim, int32_t channel_axis, const float *weight, const float *bias,
                                   double eps, float *running_mean, float *running_var, double momentum,
                                   int64_t batches_seen, float *y, float *mean, float *rstd);

/* Batch norm, eval mode: normalizes with running_mean and running_var (required). */
int32_t refnorm_batch_norm_forward_eval(const float *x, const int64_t *shape, const int64_t *x_strides,
                                        int32_t ndim, int32_t channel_axis, const float *weight,
                                        const float *bias, const float *running_mean,
                                        const float *running_var, double eps, float *y);

int32_t refnorm_batch_norm_backward(const float *dy, const int64_t *dy_strides, const float *x,
                                    const int64_t *shape, const int64_t *x_strides, int32_t ndim,
                                    int32_t channel_axis, const float *weight, const float *mean,
                                    const float *rstd, double eps, float *dx, float *dweight, float *dbias);

int32_t refnorm_batch_norm_backward_eval(const float *dy, const int64_t *dy_strides, const float *x,
                                         const int64_t *shape, const int64_t *x_strides, int32_t ndim,
                                         int32_t channel_axis, const float *weight,
                                         const float *running_mean, const float *running_var, double eps,
                                         float *dx, float *dweight, float *dbias);

#ifdef __cplusplus
}
#endif

#endif /* REFNORM_NORM_KERNEL_H */
