"""Demo scenario (invented): the Kestrel NPU team ports layer norm and batch norm.

Their accelerator stores activations in float16 and accumulates in float32;
weights, biases and statistics are float32 (mixed precision). These NumPy
drafts stand in for the team's kernels, emulating that precision exactly:
every array is read from float16, every sum and product is done in float32,
and outputs are written back to float16.

Draft 1 computes the variance in one pass, var = E[x^2] - E[x]^2, the classic
shortcut that cancels catastrophically when the mean is large against the
spread. Draft 2 computes it in two passes, var = E[(x - mean)^2].
"""

from __future__ import annotations

import numpy as np

from conformance import Conventions, Kernel, Precision

F32 = np.float32
F16 = np.float16


def _var(x32: np.ndarray, axes: tuple[int, ...], one_pass: bool) -> tuple[np.ndarray, np.ndarray]:
    n = F32(np.prod([x32.shape[a] for a in axes]))
    mean = np.sum(x32, axis=axes, keepdims=True, dtype=F32) / n
    if one_pass:
        var = np.sum(x32 * x32, axis=axes, keepdims=True, dtype=F32) / n - mean * mean
    else:
        d = x32 - mean
        var = np.sum(d * d, axis=axes, keepdims=True, dtype=F32) / n
    return mean, var


def _grad_x(dy32, xhat, rstd, w, axes):
    g = dy32 if w is None else dy32 * w
    n = F32(np.prod([g.shape[a] for a in axes]))
    gm = np.sum(g, axis=axes, keepdims=True, dtype=F32) / n
    gx = np.sum(g * xhat, axis=axes, keepdims=True, dtype=F32) / n
    return rstd * (g - gm - xhat * gx)


# ------------------------------------------------------------------ layer norm
def _ln_axes(x, normalized_shape):
    return tuple(range(x.ndim - len(normalized_shape), x.ndim))


def _ln_forward(one_pass):
    def forward(x, weight, bias, *, eps, normalized_shape):
        axes = _ln_axes(x, normalized_shape)
        x32 = x.astype(F32)
        mean, var = _var(x32, axes, one_pass)
        rstd = F32(1) / np.sqrt(var + F32(eps))
        y = (x32 - mean) * rstd
        if weight is not None:
            y = y * weight
        if bias is not None:
            y = y + bias
        lead = x.shape[: x.ndim - len(axes)]
        return y.astype(F16), mean.reshape(lead), rstd.reshape(lead)

    return forward


def _ln_backward(dy, x, weight, *, eps, normalized_shape, mean, rstd):
    axes = _ln_axes(x, normalized_shape)
    kd = mean.shape + (1,) * len(axes)
    x32, dy32 = x.astype(F32), dy.astype(F32)
    xhat = (x32 - mean.reshape(kd)) * rstd.reshape(kd)
    dx = _grad_x(dy32, xhat, rstd.reshape(kd), weight, axes)
    lead = tuple(range(x.ndim - len(axes)))
    dweight = np.sum(dy32 * xhat, axis=lead, dtype=F32)
    dbias = np.sum(dy32, axis=lead, dtype=F32)
    return dx.astype(F16), dweight, dbias


# ------------------------------------------------------------------ batch norm
def _bn_axes(x, axis):
    axis %= x.ndim
    return tuple(a for a in range(x.ndim) if a != axis), axis


def _bshape(x, axis):
    return tuple(x.shape[axis] if a == axis else 1 for a in range(x.ndim))


def _bn_forward(one_pass):
    def forward(x, weight, bias, *, eps, axis, running_mean, running_var, momentum):
        axes, axis = _bn_axes(x, axis)
        bs = _bshape(x, axis)
        x32 = x.astype(F32)
        mean, var = _var(x32, axes, one_pass)
        rstd = F32(1) / np.sqrt(var + F32(eps))
        y = (x32 - mean) * rstd
        if weight is not None:
            y = y * weight.reshape(bs)
        if bias is not None:
            y = y + bias.reshape(bs)
        c = x.shape[axis]
        mean, var, rstd = mean.reshape(c), var.reshape(c), rstd.reshape(c)
        if running_mean is None:
            return y.astype(F16), mean, rstd, None, None
        n = x.size // c
        m = F32(momentum)
        new_rm = (F32(1) - m) * running_mean + m * mean
        new_rv = (F32(1) - m) * running_var + m * var * F32(n / (n - 1))  # unbiased, as declared
        return y.astype(F16), mean, rstd, new_rm, new_rv

    return forward


def _bn_forward_eval(x, weight, bias, *, eps, axis, running_mean, running_var):
    axes, axis = _bn_axes(x, axis)
    bs = _bshape(x, axis)
    rstd = F32(1) / np.sqrt(running_var.reshape(bs) + F32(eps))
    y = (x.astype(F32) - running_mean.reshape(bs)) * rstd
    if weight is not None:
        y = y * weight.reshape(bs)
    if bias is not None:
        y = y + bias.reshape(bs)
    return y.astype(F16)


def _bn_backward(dy, x, weight, *, eps, axis, mean, rstd):
    axes, axis = _bn_axes(x, axis)
    bs = _bshape(x, axis)
    x32, dy32 = x.astype(F32), dy.astype(F32)
    xhat = (x32 - mean.reshape(bs)) * rstd.reshape(bs)
    dx = _grad_x(dy32, xhat, rstd.reshape(bs), None if weight is None else weight.reshape(bs), axes)
    return dx.astype(F16), np.sum(dy32 * xhat, axis=axes, dtype=F32), np.sum(dy32, axis=axes, dtype=F32)


def _bn_backward_eval(dy, x, weight, *, eps, axis, running_mean, running_var):
    axes, axis = _bn_axes(x, axis)
    bs = _bshape(x, axis)
    x32, dy32 = x.astype(F32), dy.astype(F32)
    rstd = F32(1) / np.sqrt(running_var.reshape(bs) + F32(eps))
    xhat = (x32 - running_mean.reshape(bs)) * rstd
    g = dy32 if weight is None else dy32 * weight.reshape(bs)
    return (g * rstd).astype(F16), np.sum(dy32 * xhat, axis=axes, dtype=F32), np.sum(dy32, axis=axes, dtype=F32)


# ------------------------------------------------------------------ declarations
PRECISION = {"float16": Precision(params="float32", accumulate="float32", summation="pairwise")}
CONV_LN = Conventions(saved=("mean", "rstd"))
CONV_BN = Conventions(momentum_convention="new", running_var_estimator="unbiased", saved=("mean", "rstd"),
                      running="return")


def _layer_norm(version: int) -> Kernel:
    return Kernel(name=f"kestrel layer_norm draft {version}", op="layer_norm",
                  forward=_ln_forward(one_pass=version == 1), backward=_ln_backward,
                  outputs=("y", "mean", "rstd"), dtypes=("float16",), conventions=CONV_LN,
                  precision=PRECISION, momentum_none=False,
                  notes="float16 storage, float32 params/statistics/accumulation; "
                        + ("one-pass variance" if version == 1 else "two-pass variance"))


def _batch_norm(version: int) -> Kernel:
    return Kernel(name=f"kestrel batch_norm draft {version}", op="batch_norm",
                  forward=_bn_forward(one_pass=version == 1), forward_eval=_bn_forward_eval,
                  backward=_bn_backward, backward_eval=_bn_backward_eval,
                  outputs=("y", "mean", "rstd", "running_mean", "running_var"), dtypes=("float16",),
                  conventions=CONV_BN, precision=PRECISION, momentum_none=False, min_reduction=2,
                  notes="float16 storage, float32 params/statistics/accumulation; "
                        + ("one-pass variance" if version == 1 else "two-pass variance"))


layer_norm_draft1 = _layer_norm(1)
layer_norm_draft2 = _layer_norm(2)
batch_norm_draft1 = _batch_norm(1)
batch_norm_draft2 = _batch_norm(2)
