"""torch.nn.functional normalizations on the CPU as kernels under test.

Spec form: ``conformance.adapters.torch_cpu:batch_norm`` (also layer_norm,
group_norm, instance_norm, rms_norm). Each name is a factory; torch is imported
when it is called. The ``*_mixed`` factories keep weight, bias and the
statistics in float32 while x, y, dy and dx are float16/bfloat16.

These are conformance.adapters.torch_device's kernels with device="cpu" (one code
path for every device); this module states what they do on the CPU.

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

from ..kernel import Kernel
from . import torch_device as _dev

__all__ = [
    "batch_norm", "layer_norm", "group_norm", "instance_norm", "rms_norm", "add_layer_norm", "add_rms_norm",
    "batch_norm_mixed", "layer_norm_mixed", "group_norm_mixed", "instance_norm_mixed",
]

DTYPES = _dev.DTYPES


def batch_norm(params: str = "storage") -> Kernel:
    """torch batch normalization (torch.native_batch_norm / F.batch_norm); params "storage" or "float32"."""
    return _dev.batch_norm(params=params, device="cpu")


def layer_norm(params: str = "storage") -> Kernel:
    """torch layer normalization (torch.native_layer_norm / F.layer_norm)."""
    return _dev.layer_norm(params=params, device="cpu")


def group_norm(params: str = "storage") -> Kernel:
    """torch group normalization (torch.native_group_norm / F.group_norm)."""
    return _dev.group_norm(params=params, device="cpu")


def instance_norm(params: str = "storage") -> Kernel:
    """torch instance normalization (F.instance_norm), with optional running statistics."""
    return _dev.instance_norm(params=params, device="cpu")


def rms_norm(params: str = "storage") -> Kernel:
    """torch RMS normalization (F.rms_norm); a bias, when given, is added as a separate op."""
    return _dev.rms_norm(params=params, device="cpu")


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


def add_layer_norm(params: str = "storage") -> Kernel:
    """x + residual (+ residual_bias) with torch's adds, then torch's layer norm (conformance.adapters.torch_fused)."""
    from .torch_fused import add_layer_norm as make

    return make(params=params)


def add_rms_norm(params: str = "storage") -> Kernel:
    """x + residual (+ residual_bias) with torch's adds, then F.rms_norm (conformance.adapters.torch_fused)."""
    from .torch_fused import add_rms_norm as make

    return make(params=params)
