"""torch.nn.functional normalizations on the CPU as kernels under test.

Spec form: ``conformance.adapters.torch_cpu:batch_norm`` (also layer_norm,
group_norm, instance_norm, rms_norm). Each name is a factory; torch is imported
when it is called. The ``*_mixed`` factories keep weight, bias and the
statistics in float32 while x, y, dy and dx are float16/bfloat16.

Forward passes call the library's own entry points (torch.native_batch_norm,
native_layer_norm, native_group_norm: the kernels F.batch_norm/F.layer_norm/
F.group_norm reach on the CPU, which also return the saved statistics;
F.instance_norm; F.rms_norm). Backward passes run the forward under autograd
and call torch.autograd.grad, as training code does. Channels-last inputs are
moved to (N, C, ...) with a view (Tensor.movedim), the form torch's
channels_last memory format uses.

What torch 2.13 computes on the CPU, measured against the float64 oracle
(figures and method in docs/library-precision.md; checks in tests/test_adapters.py):

- float32/float64: accumulation in the storage format.
- float16/bfloat16 with parameters in the same format (``module.to(dtype)``):
  statistics are accumulated in float32, but torch keeps them in the
  parameter format and computes with the rounded values.
  batch_norm/instance_norm: ATen's statistics pass rounds the mean, the sum of
  squared deviations, the variance, the momentum (0.1 -> 0.10009765625 in
  bfloat16) and each running-update product to that format, and y is computed
  from the rounded mean and rstd (reproduced bit for bit; only 65% of
  bfloat16 y values are the correctly rounded ones). Declared as
  statistics = storage (sums in float32, the statistics rounded before use)
  and output_accumulate = storage for y, running_mean, running_var and dx.
  layer_norm/group_norm: y from float32 statistics, rounded once (100%
  correctly rounded); the backward uses the saved statistics rounded to the
  parameter format (declared through conventions.saved).
- layer_norm dweight/dbias, float16/bfloat16 (either parameter format): with
  T = torch.get_num_threads(), the M rows are cut into blocks of ceil(M/T);
  each thread adds its block's rows one by one, rounding to the storage format
  after every addition; the T block sums are added in float32 and rounded once.
  The model reproduces torch's dbias bit for bit (T = 1...16); on (6, 4096) at
  T = 2 only 56% of bfloat16 dbias values equal the correctly rounded sum and
  the worst error is 867 times a float32-accumulation bound. Declared as
  output_accumulate = storage for dweight and dbias.
- batch_norm backward on non-contiguous inputs (either parameter format):
  k = dotp * rstd^2 / n, the mean of dy and dx are formed in the storage format,
  and dbias comes from a sum returned in that format: output_accumulate dx,
  dbias = storage; with parameters in the storage format the terms
  (x - mean) * dy of dweight too (output_accumulate dweight = storage).
- instance_norm dweight/dbias: torch repeats weight N times and sums the N
  per-instance gradients, each rounded to the parameter format first:
  declared as storage-format accumulation (conservative).
- rms_norm with the weight in the storage format: a fused kernel, float32
  throughout, every output rounded once. With a float32 weight torch returns a
  float32 y, so there is no mixed rms_norm variant.

Findings the harness reports against torch itself (docs/library-precision.md):
group_norm in channels-last memory loses the variance to cancellation;
instance_norm's backward with N = 1 on a channels-last view returns a wrong dx.
The adapter keeps torch's behaviour (it passes channels-last views as they are).

Conventions: momentum weights the batch value ("new"), the running variance
is unbiased, eps inside the square root, running statistics updated in place
(the arrays passed in are the ones torch updates), saved statistics mean and
rstd (for instance norm those of the batch norm torch runs on the (1, N*C, ...)
view, from native_batch_norm on the same view). momentum=None
for batch_norm reproduces torch.nn.BatchNorm's cumulative average (factor
1/(num_batches_tracked + 1), torch/nn/modules/batchnorm.py); torch's
InstanceNorm turns momentum=None into factor 0.0 (no update,
torch/nn/modules/instancenorm.py), so instance_norm declares momentum_none=False.
F.rms_norm has no bias; given one, the adapter adds it as a separate torch
op in the output format (one more rounding, declared), as user code would.
Training mode needs two elements per statistic in F.batch_norm, F.group_norm
and F.instance_norm (declared min_reduction=2). The training backward of
batch_norm runs native_batch_norm under autograd, the kernel F.batch_norm
reaches, because F.batch_norm refuses eps=0 in training mode.

The adapter never calls torch.set_num_threads: results depend on the thread
count of the calling process, which the layer-norm model above makes visible.
- y is formed as x * scale + shift (scale = weight * rstd, shift = bias -
  mean * scale): declared Conventions(y_form="folded"). Batch and instance
  norm: measured, eval-mode y on x equal to a running mean of 1.5 2^21 errs
  4e6 times the centred form's bound and within the folded form's; layer and
  group norm: ATen's CPU kernels (read from memory of the source), where the
  training-mode bound is the same for both forms.
"""

from __future__ import annotations

import math
from typing import Any

from ..arrays import as_numpy, to_torch, write_back
from ..kernel import Conventions, Kernel, KernelError, Precision
from . import missing_library

__all__ = [
    "batch_norm", "layer_norm", "group_norm", "instance_norm", "rms_norm",
    "batch_norm_mixed", "layer_norm_mixed", "group_norm_mixed", "instance_norm_mixed",
]

DTYPES = ("float64", "float32", "float16", "bfloat16")
_LOW = ("float16", "bfloat16")
_PARAM_MODES = ("storage", "float32")


def _torch():
    try:
        import torch
    except ImportError as e:
        raise missing_library("PyTorch (torch)", "torch", e) from e
    return torch


def _precision(op: str, params: str) -> dict[str, Precision]:
    """The declared precision per storage dtype (see the module docstring for the evidence)."""
    out: dict[str, Precision] = {}
    dts = DTYPES if params == "storage" else _LOW
    for dt in dts:
        if dt not in _LOW:
            out[dt] = Precision(storage=dt)
            continue
        p = dt if params == "storage" else "float32"
        oa: dict[str, str] = {}
        stats = None
        if params == "storage" and op in ("batch_norm", "instance_norm"):
            # ATen's batch-norm statistics pass (param_t = the storage format) sums in float32 and rounds
            # the mean, the sum of squared deviations, the variance and rstd to that format, and y and
            # dx are computed from the rounded mean and rstd (statistics=dt); the momentum and each
            # running-update product are rounded to that format too (running_* arithmetic in dt), and
            # on non-contiguous inputs y's arithmetic is too (measured: bfloat16 transposed y exceeds a
            # float32-arithmetic bound 1.25 times).
            stats = dt
            oa = {"y": dt, "running_mean": dt, "running_var": dt, "dx": dt}
        if op == "batch_norm":
            # Its backward on non-contiguous inputs forms k = dotp * invstd^2 / n, the mean of dy and
            # dx itself in the storage format (scalar_t arithmetic), and takes dbias from at::sum of
            # dy, a tensor in the storage format: so with either parameter format. With parameters in
            # the storage format, each term (x - mean) * dy of dweight's sum is also formed in it.
            oa.update({"dx": dt, "dbias": dt})
            if params == "storage":
                oa["dweight"] = dt
        if op in ("layer_norm", "instance_norm"):
            oa.update({"dweight": dt, "dbias": dt})
        elif op == "rms_norm":
            # F.rms_norm has no bias: the adapter's y + bias rounds y once more in the storage format.
            oa = {"y": dt}
        out[dt] = Precision(storage=dt, params=p, accumulate="float32", output_accumulate=oa, statistics=stats)
    return out


class _Torch:
    """Shared conversions for one kernel: the parameter dtype and channel moves."""

    def __init__(self, params: str):
        if params not in _PARAM_MODES:
            raise KernelError(f"params is {params!r}, expected one of {', '.join(map(repr, _PARAM_MODES))}")
        self.torch = _torch()
        self.params = params

    def pdtype(self, x_t):
        return x_t.dtype if self.params == "storage" else self.torch.float32

    def affine(self, weight: Any, bias: Any, x_t, size: Any):
        """Forward weight and bias tensors (None stays None in the storage-format variant).

        With float32 parameters and a float16/bfloat16 x, a missing weight or bias is passed as ones
        or zeros in float32: torch picks its mixed-type kernels from the weight's dtype, and without
        one it would fall back to the storage-format kernels this variant is meant to avoid.
        """
        mixed = self.pdtype(x_t) != x_t.dtype
        w = self.param(weight, x_t, fill=1.0 if mixed else None, size=size)
        b = self.param(bias, x_t, fill=0.0 if mixed else None, size=size)
        return w, b

    def param(self, a: Any, x_t, *, grad: bool = False, fill: float | None = None, size: Any = None):
        """A parameter tensor in the kernel's parameter dtype; ``fill`` makes one when ``a`` is None."""
        torch = self.torch
        dt = self.pdtype(x_t)
        if a is None:
            if fill is None:
                return None
            t = torch.full(tuple(size), fill, dtype=dt)
        else:
            t = to_torch(a)
            if t.dtype != dt:
                t = t.to(dt)
        if grad:
            t = t.detach().requires_grad_(True)
        return t

    def running(self, a: Any, x_t):
        """A running statistic torch can update in place; a converted copy is written back by :meth:`finish`."""
        if a is None:
            return None
        return self.param(a, x_t)


def _channels_first(t, axis: int):
    return t if axis == 1 else t.movedim(axis, 1)


def _from_channels_first(t, axis: int, ndim: int):
    return t if axis % ndim == 1 else t.movedim(1, axis)


def _group_layout(torch, t):
    """t in the memory format torch.group_norm passes to native_group_norm (contiguous or channels-last)."""
    fmt = {4: torch.channels_last, 5: torch.channels_last_3d}.get(t.dim())
    if fmt is not None and t.is_contiguous(memory_format=fmt):
        return t
    return t.contiguous()


def _instance_stats(torch, xc, pdtype, eps: float):
    """The statistics torch's instance norm normalizes with, shape (N, C).

    ATen's instance_norm views x as a batch norm of one sample with N*C channels
    and calls batch_norm on it (aten/src/ATen/native/Normalization.cpp); the same
    call through native_batch_norm returns the save_mean/save_invstd it uses.
    With parameters in the storage format they come back in that format, as in
    the batch-norm kernel.
    """
    n, c = xc.shape[0], xc.shape[1]
    flat = xc.contiguous().reshape(1, n * c, -1)
    w = torch.ones(n * c, dtype=pdtype)
    _, mean, rstd = torch.native_batch_norm(flat, w, None, None, None, True, 0.0, eps)
    return mean.reshape(n, c), rstd.reshape(n, c)


def _grads(torch, y, leaves, dy_t):
    g = torch.autograd.grad(y, leaves, dy_t)
    return tuple(as_numpy(v) for v in g)


# --------------------------------------------------------------------------- batch norm

def batch_norm(params: str = "storage") -> Kernel:
    """torch batch normalization (torch.native_batch_norm / F.batch_norm); params "storage" or "float32"."""
    tt = _Torch(params)
    torch = tt.torch
    F = torch.nn.functional

    def forward(x, weight=None, bias=None, *, eps, axis=1, training=True, running_mean=None, running_var=None,
                momentum=0.1, batches_seen=None):
        if not training:
            return forward_eval(x, weight, bias, eps=eps, axis=axis, running_mean=running_mean,
                                running_var=running_var)
        xt = to_torch(x)
        ax = axis % xt.dim()
        xc = _channels_first(xt, ax)
        rm, rv = tt.running(running_mean, xt), tt.running(running_var, xt)
        if momentum is None:
            if batches_seen is None and rm is not None:
                raise ValueError("momentum is None (cumulative average) but batches_seen is None")
            # nn.BatchNorm: 1 / num_batches_tracked after its increment
            factor = 0.0 if rm is None else 1.0 / (int(batches_seen) + 1)
        else:
            factor = float(momentum)
        w, b = tt.affine(weight, bias, xt, (xt.shape[ax],))
        with torch.no_grad():
            y, mean, rstd = torch.native_batch_norm(xc, w, b, rm, rv, True, factor, float(eps))
        write_back(running_mean, rm)
        write_back(running_var, rv)
        return {"y": as_numpy(_from_channels_first(y, ax, xt.dim())), "mean": as_numpy(mean), "rstd": as_numpy(rstd)}

    def forward_eval(x, weight=None, bias=None, *, eps, axis=1, running_mean, running_var):
        xt = to_torch(x)
        ax = axis % xt.dim()
        w, b = tt.affine(weight, bias, xt, (xt.shape[ax],))
        with torch.no_grad():
            y = F.batch_norm(_channels_first(xt, ax), tt.param(running_mean, xt), tt.param(running_var, xt),
                             w, b, training=False, eps=float(eps))
        return as_numpy(_from_channels_first(y, ax, xt.dim()))

    def _backward(dy, x, weight, eps, axis, training, running_mean=None, running_var=None):
        xt = to_torch(x, requires_grad=True)
        ax = axis % xt.dim()
        c = xt.shape[ax]
        w = tt.param(weight, xt, grad=True, fill=1.0, size=(c,))
        b = tt.param(None, xt, grad=True, fill=0.0, size=(c,))
        if training:
            # The kernel the forward used, under autograd (NativeBatchNormBackward0). F.batch_norm reaches
            # the same kernel but first refuses eps=0 in training mode (torch 2.13).
            y = torch.native_batch_norm(_channels_first(xt, ax), w, b, None, None, True, 0.0, float(eps))[0]
        else:
            y = F.batch_norm(_channels_first(xt, ax), tt.param(running_mean, xt), tt.param(running_var, xt),
                             w, b, training=False, eps=float(eps))
        dyt = _channels_first(to_torch(dy), ax)
        return _grads(torch, y, (xt, w, b), dyt)

    def backward(dy, x, weight=None, *, eps, axis=1):
        return _backward(dy, x, weight, eps, axis, True)

    def backward_eval(dy, x, weight=None, *, eps, axis=1, running_mean, running_var):
        return _backward(dy, x, weight, eps, axis, False, running_mean, running_var)

    return Kernel(
        name=f"torch-cpu batch_norm{'' if params == 'storage' else ' (float32 params)'}",
        op="batch_norm", forward=forward, forward_eval=forward_eval, backward=backward, backward_eval=backward_eval,
        outputs=("y", "mean", "rstd"), dtypes=tuple(_precision("batch_norm", params)),
        conventions=Conventions(momentum_convention="new", running_var_estimator="unbiased",
                                saved=("mean", "rstd"), running="inplace", y_form="folded"),
        precision=_precision("batch_norm", params), momentum_none=True, min_reduction=2,
        notes=_notes(torch, "torch.native_batch_norm (train), F.batch_norm (eval); float16/bfloat16 with "
                     "parameters in the storage format normalize with the mean and rstd rounded to that format"),
    )


# --------------------------------------------------------------------------- layer norm

def layer_norm(params: str = "storage") -> Kernel:
    """torch layer normalization (torch.native_layer_norm / F.layer_norm)."""
    tt = _Torch(params)
    torch = tt.torch
    F = torch.nn.functional

    def forward(x, weight=None, bias=None, *, eps, normalized_shape):
        xt = to_torch(x)
        ns = [int(d) for d in normalized_shape]
        w, b = tt.affine(weight, bias, xt, ns)
        with torch.no_grad():
            y, mean, rstd = torch.native_layer_norm(xt, ns, w, b, float(eps))
        stat_shape = tuple(xt.shape[: xt.dim() - len(ns)])
        return {"y": as_numpy(y), "mean": as_numpy(mean.reshape(stat_shape)),
                "rstd": as_numpy(rstd.reshape(stat_shape))}

    def backward(dy, x, weight=None, *, eps, normalized_shape):
        xt = to_torch(x, requires_grad=True)
        ns = tuple(int(d) for d in normalized_shape)
        w = tt.param(weight, xt, grad=True, fill=1.0, size=ns)
        b = tt.param(None, xt, grad=True, fill=0.0, size=ns)
        y = F.layer_norm(xt, ns, w, b, float(eps))
        return _grads(torch, y, (xt, w, b), to_torch(dy))

    return Kernel(
        name=f"torch-cpu layer_norm{'' if params == 'storage' else ' (float32 params)'}",
        op="layer_norm", forward=forward, backward=backward, outputs=("y", "mean", "rstd"),
        dtypes=tuple(_precision("layer_norm", params)),
        conventions=Conventions(saved=("mean", "rstd"), y_form="folded"),
        precision=_precision("layer_norm", params),
        notes=_notes(torch, "torch.native_layer_norm (forward), F.layer_norm under autograd (backward); "
                     "float16/bfloat16 dweight/dbias are summed over rows in the storage format in blocks of "
                     "ceil(rows / torch.get_num_threads()), block sums added in float32"),
    )


# --------------------------------------------------------------------------- group norm

def group_norm(params: str = "storage") -> Kernel:
    """torch group normalization (torch.native_group_norm / F.group_norm)."""
    tt = _Torch(params)
    torch = tt.torch
    F = torch.nn.functional

    def forward(x, weight=None, bias=None, *, eps, num_groups, axis=1):
        xt = to_torch(x)
        ax = axis % xt.dim()
        xc = _group_layout(torch, _channels_first(xt, ax))
        n, c = xc.shape[0], xc.shape[1]
        hxw = math.prod(xc.shape[2:])
        w, b = tt.affine(weight, bias, xt, (c,))
        with torch.no_grad():
            y, mean, rstd = torch.native_group_norm(xc, w, b, n, c, hxw, int(num_groups), float(eps))
        return {"y": as_numpy(_from_channels_first(y, ax, xt.dim())), "mean": as_numpy(mean),
                "rstd": as_numpy(rstd)}

    def backward(dy, x, weight=None, *, eps, num_groups, axis=1):
        xt = to_torch(x, requires_grad=True)
        ax = axis % xt.dim()
        c = xt.shape[ax]
        w = tt.param(weight, xt, grad=True, fill=1.0, size=(c,))
        b = tt.param(None, xt, grad=True, fill=0.0, size=(c,))
        y = F.group_norm(_channels_first(xt, ax), int(num_groups), w, b, float(eps))
        return _grads(torch, y, (xt, w, b), _channels_first(to_torch(dy), ax))

    return Kernel(
        name=f"torch-cpu group_norm{'' if params == 'storage' else ' (float32 params)'}",
        op="group_norm", forward=forward, backward=backward, outputs=("y", "mean", "rstd"),
        dtypes=tuple(_precision("group_norm", params)),
        conventions=Conventions(saved=("mean", "rstd"), y_form="folded"),
        min_reduction=2,
        precision=_precision("group_norm", params),
        notes=_notes(torch, "torch.native_group_norm (forward), F.group_norm under autograd (backward)"),
    )


# --------------------------------------------------------------------------- instance norm

def instance_norm(params: str = "storage") -> Kernel:
    """torch instance normalization (F.instance_norm), with optional running statistics."""
    tt = _Torch(params)
    torch = tt.torch
    F = torch.nn.functional

    def forward(x, weight=None, bias=None, *, eps, axis=1, training=True, running_mean=None, running_var=None,
                momentum=0.1, batches_seen=None):
        if not training:
            return forward_eval(x, weight, bias, eps=eps, axis=axis, running_mean=running_mean,
                                running_var=running_var)
        if momentum is None and running_mean is not None:
            raise ValueError("momentum is None: torch's InstanceNorm has no cumulative average "
                             "(nn.InstanceNorm passes 0.0, no update); this kernel declares momentum_none=False")
        xt = to_torch(x)
        ax = axis % xt.dim()
        xc = _channels_first(xt, ax)
        rm, rv = tt.running(running_mean, xt), tt.running(running_var, xt)
        w, b = tt.affine(weight, bias, xt, (xt.shape[ax],))
        with torch.no_grad():
            y = F.instance_norm(xc, rm, rv, w, b, use_input_stats=True, momentum=0.0 if momentum is None else float(momentum),
                                eps=float(eps))
            mean, rstd = _instance_stats(torch, xc, tt.pdtype(xt), float(eps))
        write_back(running_mean, rm)
        write_back(running_var, rv)
        return {"y": as_numpy(_from_channels_first(y, ax, xt.dim())), "mean": as_numpy(mean),
                "rstd": as_numpy(rstd)}

    def forward_eval(x, weight=None, bias=None, *, eps, axis=1, running_mean, running_var):
        xt = to_torch(x)
        ax = axis % xt.dim()
        w, b = tt.affine(weight, bias, xt, (xt.shape[ax],))
        with torch.no_grad():
            y = F.instance_norm(_channels_first(xt, ax), tt.param(running_mean, xt), tt.param(running_var, xt),
                                w, b, use_input_stats=False, eps=float(eps))
        return as_numpy(_from_channels_first(y, ax, xt.dim()))

    def _backward(dy, x, weight, eps, axis, training, running_mean=None, running_var=None):
        xt = to_torch(x, requires_grad=True)
        ax = axis % xt.dim()
        c = xt.shape[ax]
        w = tt.param(weight, xt, grad=True, fill=1.0, size=(c,))
        b = tt.param(None, xt, grad=True, fill=0.0, size=(c,))
        rm = None if training else tt.param(running_mean, xt)
        rv = None if training else tt.param(running_var, xt)
        y = F.instance_norm(_channels_first(xt, ax), rm, rv, w, b, use_input_stats=training, eps=float(eps))
        return _grads(torch, y, (xt, w, b), _channels_first(to_torch(dy), ax))

    def backward(dy, x, weight=None, *, eps, axis=1):
        return _backward(dy, x, weight, eps, axis, True)

    def backward_eval(dy, x, weight=None, *, eps, axis=1, running_mean, running_var):
        return _backward(dy, x, weight, eps, axis, False, running_mean, running_var)

    return Kernel(
        name=f"torch-cpu instance_norm{'' if params == 'storage' else ' (float32 params)'}",
        op="instance_norm", forward=forward, forward_eval=forward_eval, backward=backward,
        backward_eval=backward_eval, outputs=("y", "mean", "rstd"),
        dtypes=tuple(_precision("instance_norm", params)),
        conventions=Conventions(momentum_convention="new", running_var_estimator="unbiased",
                                saved=("mean", "rstd"), running="inplace", y_form="folded"),
        precision=_precision("instance_norm", params), momentum_none=False, min_reduction=2,
        notes=_notes(torch, "F.instance_norm (torch reshapes to a batch norm of N*C channels); the saved "
                     "statistics are that batch norm's, from torch.native_batch_norm on the same view"),
    )


# --------------------------------------------------------------------------- RMS norm

def rms_norm(params: str = "storage") -> Kernel:
    """torch RMS normalization (F.rms_norm); a bias, when given, is added as a separate op."""
    if params != "storage":
        raise KernelError("torch's F.rms_norm with a float32 weight and a float16/bfloat16 x returns a float32 y "
                          "(type promotion in its composite fallback), so there is no mixed-precision rms_norm "
                          "kernel with storage-format outputs; use rms_norm()")
    tt = _Torch(params)
    torch = tt.torch
    F = torch.nn.functional

    def _apply(xt, ns, w, b, eps):
        y = F.rms_norm(xt, ns, w, float(eps))
        return y if b is None else y + b

    def forward(x, weight=None, bias=None, *, eps, normalized_shape):
        xt = to_torch(x)
        ns = [int(d) for d in normalized_shape]
        with torch.no_grad():
            y = _apply(xt, ns, tt.param(weight, xt), tt.param(bias, xt), eps)
        return as_numpy(y)

    def backward(dy, x, weight=None, *, eps, normalized_shape):
        xt = to_torch(x, requires_grad=True)
        ns = [int(d) for d in normalized_shape]
        w = tt.param(weight, xt, grad=True, fill=1.0, size=ns)
        b = tt.param(None, xt, grad=True, fill=0.0, size=ns)
        y = _apply(xt, ns, w, b, eps)
        return _grads(torch, y, (xt, w, b), to_torch(dy))

    return Kernel(
        name=f"torch-cpu rms_norm{'' if params == 'storage' else ' (float32 params)'}",
        op="rms_norm", forward=forward, backward=backward, outputs=("y",),
        dtypes=tuple(_precision("rms_norm", params)), conventions=Conventions(),
        precision=_precision("rms_norm", params),
        notes=_notes(torch, "F.rms_norm; no bias in torch (a given bias is added as y + bias)"),
    )


def _notes(torch, text: str) -> str:
    return f"torch {torch.__version__}, {torch.get_num_threads()} threads at construction: {text}"


def batch_norm_mixed() -> Kernel:
    """batch_norm with float32 weight, bias and statistics for float16/bfloat16 x."""
    return batch_norm(params="float32")


def layer_norm_mixed() -> Kernel:
    """layer_norm with float32 weight and bias for float16/bfloat16 x."""
    return layer_norm(params="float32")


def group_norm_mixed() -> Kernel:
    """group_norm with float32 weight and bias for float16/bfloat16 x."""
    return group_norm(params="float32")


def instance_norm_mixed() -> Kernel:
    """instance_norm with float32 weight, bias and running statistics for float16/bfloat16 x."""
    return instance_norm(params="float32")
