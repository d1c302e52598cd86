"""torch.nn.functional normalizations on any torch device as kernels under test.

Spec form: ``conformance.adapters.torch_device:layer_norm?device=cuda`` (also batch_norm,
group_norm, instance_norm, rms_norm and the ``*_mixed`` variants), or
``refnorm check conformance.adapters.torch_device:layer_norm --device cuda``. Each name is a
factory ``op(params="storage", device="cpu", register="", copy=False)``; torch is imported when it
is called. ``register`` names a module to import first, for a custom backend whose package
registers its device with torch on import (``?device=mydev,register=torch_mydev``). ``copy=true``
copies every input to a fresh tensor on the device and every output back even when the device is
the host: the path an accelerator takes, so that it can be tested on a machine without one.

One code path for every device: inputs are NumPy arrays that torch views without a copy
(conformance.arrays.to_torch), moved to the device with Tensor.to (torch.preserve_format: a
channels-last or transposed layout that is dense keeps its strides there; a layout with gaps
arrives contiguous), the same torch calls run there, and outputs come back to host NumPy arrays
(conformance.arrays.as_numpy). Running statistics are updated on the device and copied back
into the arrays the harness gave. On ``cpu`` nothing is copied at all, and the kernels are those
of conformance.adapters.torch_cpu, which calls this module with device="cpu".

Precision is declared per device type (DEVICES): on the CPU as measured against the oracle
(conformance.adapters.torch_cpu, docs/library-precision.md); on cuda from memory and not verified
(no GPU was available where this adapter was written), declared conservatively; on any other
device type conservatively and marked unverified. Which of these applies is in every kernel's
notes and hence in the results and the report. An unknown or unavailable device is a KernelError
(exit 2) that names the devices available.
"""

from __future__ import annotations

import importlib
import math
from dataclasses import dataclass, replace
from typing import Any, Callable

from ..arrays import as_numpy, to_torch, write_back
from ..kernel import Conventions, Kernel, KernelError, Precision
from . import missing_library

__all__ = [
    "batch_norm", "layer_norm", "group_norm", "instance_norm", "rms_norm",
    "batch_norm_mixed", "layer_norm_mixed", "group_norm_mixed", "instance_norm_mixed",
    "DEVICES", "DeviceKnowledge", "available_devices",
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


def _cpu_precision(op: str, params: str) -> dict[str, Precision]:
    """The precision torch 2.13 has on the CPU, per storage dtype, as measured (conformance.adapters.torch_cpu
    and docs/library-precision.md give the evidence)."""
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


def _unverified_precision(op: str, params: str) -> dict[str, Precision]:
    """A conservative declaration for a device whose arithmetic nobody measured here: the CPU's
    measured precision (float32 arithmetic for float16/bfloat16, and each output the CPU rounds to
    the storage format declared so) with every sum under the worst-case model n u / (1 - n u)
    (Higham 2002 §4.2) instead of the probabilistic one."""
    return {dt: replace(p, summation="worst") for dt, p in _cpu_precision(op, params).items()}


@dataclass(frozen=True)
class DeviceKnowledge:
    """What is known about torch's normalization arithmetic on one device type.

    kind : torch.device(...).type ("cpu", "cuda", ...).
    verified : the declaration was measured against the oracle (tests/test_adapters.py).
    source : where the declaration comes from, recorded in each kernel's notes.
    precision : (op, params) -> {storage dtype: Precision}.
    """

    kind: str
    verified: bool
    source: str
    precision: Callable[[str, str], dict[str, Precision]]


DEVICES: dict[str, DeviceKnowledge] = {
    "cpu": DeviceKnowledge(
        "cpu", True, "measured against the float64 oracle with torch 2.13 on x86-64 (docs/library-precision.md)",
        _cpu_precision),
    "cuda": DeviceKnowledge(
        "cuda", False,
        "NOT VERIFIED on a GPU: from memory, torch's CUDA normalization kernels accumulate float16/bfloat16 "
        "in float32 (at::acc_type in aten/src/ATen/AccumulateType.h) and reduce in parallel trees; declared "
        "conservatively as the CPU's measured roundings with worst-case summation bounds",
        _unverified_precision),
}


def knowledge_for(kind: str) -> DeviceKnowledge:
    """The entry for a device type; a type without one gets the conservative, unverified declaration."""
    if kind in DEVICES:
        return DEVICES[kind]
    return DeviceKnowledge(kind, False, f"NOT VERIFIED: nothing is known here about torch's arithmetic on "
                           f"{kind!r}; declared conservatively as the CPU's measured roundings with "
                           "worst-case summation bounds", _unverified_precision)


def available_devices(torch) -> list[str]:
    """The devices this torch can use here: cpu, then each cuda/xpu device, mps, a registered custom backend."""
    out = ["cpu"]
    for kind in ("cuda", "xpu"):
        mod = getattr(torch, kind, None)
        try:
            if mod is not None and mod.is_available():
                out += [f"{kind}:{i}" for i in range(mod.device_count())]
        except Exception:  # a backend that cannot even answer is not available
            pass
    try:
        if torch.backends.mps.is_available():
            out.append("mps")
    except Exception:
        pass
    try:
        custom = torch._C._get_privateuse1_backend_name()
    except Exception:
        custom = "privateuse1"
    if custom not in ("privateuse1", "privateuseone"):  # torch's placeholder names when none is registered
        out.append(custom)
    return out


def _device(torch, name: Any, register: str = ""):
    """torch.device(name), after checking that a tensor can be made there (KernelError otherwise).

    ``register``: a module to import first, for a custom backend whose Python package registers
    its device with torch when imported (worker processes import it again from the spec).
    """
    if not isinstance(name, str) or not name.strip():
        raise KernelError(f"device is {name!r}, expected a torch device name such as 'cpu', 'cuda', 'cuda:1', "
                          "'xpu', 'mps' or a custom backend's name")
    if register:
        try:
            importlib.import_module(register)
        except Exception as e:
            raise KernelError(f"register={register!r}: importing the module that registers the device failed: "
                              f"{type(e).__name__}: {e}") from e
    try:
        dev = torch.device(name.strip())
    except (RuntimeError, TypeError, ValueError) as e:
        raise KernelError(f"device {name!r} is not a torch device name ({str(e).splitlines()[0]}); expected cpu, "
                          f"cuda, cuda:N, xpu, mps or a registered backend's name (available here: "
                          f"{', '.join(available_devices(torch))})") from None
    try:
        torch.empty(1, device=dev)
    except Exception as e:  # AssertionError from a CPU-only build, RuntimeError from a missing driver
        msg = str(e).splitlines()[0] if str(e) else type(e).__name__
        raise KernelError(f"torch device {name!r} is not available here ({msg}); available: "
                          f"{', '.join(available_devices(torch))}") from None
    return dev


def _flag(name: str, value: Any) -> bool:
    """A boolean factory parameter, also as a spec's string ("true"/"false", "1"/"0", "yes"/"no")."""
    if isinstance(value, bool):
        return value
    text = str(value).strip().lower()
    if text in ("true", "1", "yes"):
        return True
    if text in ("false", "0", "no", ""):
        return False
    raise KernelError(f"{name} is {value!r}, expected true or false")


class _Torch:
    """Shared conversions for one kernel: the device, the parameter dtype, host <-> device moves."""

    def __init__(self, params: str, device: str = "cpu", register: str = "", copy: Any = False):
        if params not in _PARAM_MODES:
            raise KernelError(f"params is {params!r}, expected one of {', '.join(map(repr, _PARAM_MODES))}")
        self.torch = _torch()
        self.params = params
        self.device = _device(self.torch, device, register)
        self.copy = _flag("copy", copy)
        self.knowledge = knowledge_for(self.device.type)

    @property
    def device_name(self) -> str:
        return str(self.device)

    def precision(self, op: str) -> dict[str, Precision]:
        return self.knowledge.precision(op, self.params)

    def label(self, op: str) -> str:
        return f"torch-{self.device_name} {op}{'' if self.params == 'storage' else ' (float32 params)'}"

    def notes(self, text: str) -> str:
        torch = self.torch
        threads = f", {torch.get_num_threads()} threads at construction" if self.device.type == "cpu" else ""
        moved = ", inputs copied to the device and outputs back (copy=true)" if self.copy else ""
        return (f"torch {torch.__version__} on device {self.device_name}{threads}{moved}: {text}. "
                f"Precision: {self.knowledge.source}")

    def put(self, a: Any, *, requires_grad: bool = False):
        """A NumPy array as a tensor on the kernel's device (None stays None).

        On the CPU the tensor shares the array's memory (conformance.arrays.to_torch). Elsewhere,
        or on the CPU with copy=True, Tensor.to copies it with torch.preserve_format: a dense
        layout (channels-last memory, a transposed view) keeps its strides, a layout with gaps
        arrives contiguous.
        """
        if a is None:
            return None
        t = to_torch(a)
        if self.copy or t.device != self.device:
            t = t.to(self.device, copy=True)
        if requires_grad:
            t = t.detach().requires_grad_(True)
        return t

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
            t = torch.full(tuple(size), fill, dtype=dt, device=self.device)
        else:
            t = self.put(a)
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
    w = torch.ones(n * c, dtype=pdtype, device=xc.device)
    _, mean, rstd = torch.native_batch_norm(flat, w, None, None, None, True, 0.0, eps)
    return mean.reshape(n, c), rstd.reshape(n, c)


def _grads(torch, y, leaves, dy_t):
    g = torch.autograd.grad(y, leaves, dy_t)
    return tuple(as_numpy(v) for v in g)


# --------------------------------------------------------------------------- batch norm

def batch_norm(params: str = "storage", device: str = "cpu", register: str = "",
               copy: Any = False) -> Kernel:
    """torch batch normalization (torch.native_batch_norm / F.batch_norm); params "storage" or "float32"."""
    tt = _Torch(params, device, register, copy)
    torch = tt.torch
    F = torch.nn.functional

    def forward(x, weight=None, bias=None, *, eps, axis=1, training=True, running_mean=None, running_var=None,
                momentum=0.1, batches_seen=None):
        if not training:
            return forward_eval(x, weight, bias, eps=eps, axis=axis, running_mean=running_mean,
                                running_var=running_var)
        xt = tt.put(x)
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
        xt = tt.put(x)
        ax = axis % xt.dim()
        w, b = tt.affine(weight, bias, xt, (xt.shape[ax],))
        with torch.no_grad():
            y = F.batch_norm(_channels_first(xt, ax), tt.param(running_mean, xt), tt.param(running_var, xt),
                             w, b, training=False, eps=float(eps))
        return as_numpy(_from_channels_first(y, ax, xt.dim()))

    def _backward(dy, x, weight, eps, axis, training, running_mean=None, running_var=None):
        xt = tt.put(x, requires_grad=True)
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
        dyt = _channels_first(tt.put(dy), ax)
        return _grads(torch, y, (xt, w, b), dyt)

    def backward(dy, x, weight=None, *, eps, axis=1):
        return _backward(dy, x, weight, eps, axis, True)

    def backward_eval(dy, x, weight=None, *, eps, axis=1, running_mean, running_var):
        return _backward(dy, x, weight, eps, axis, False, running_mean, running_var)

    return Kernel(
        name=tt.label("batch_norm"),
        op="batch_norm", forward=forward, forward_eval=forward_eval, backward=backward, backward_eval=backward_eval,
        outputs=("y", "mean", "rstd"), dtypes=tuple(tt.precision("batch_norm")),
        conventions=Conventions(momentum_convention="new", running_var_estimator="unbiased",
                                saved=("mean", "rstd"), running="inplace", y_form="folded"),
        precision=tt.precision("batch_norm"), momentum_none=True, min_reduction=2,
        device=tt.device_name,
        notes=tt.notes("torch.native_batch_norm (train), F.batch_norm (eval); float16/bfloat16 with "
                     "parameters in the storage format normalize with the mean and rstd rounded to that format"),
    )


# --------------------------------------------------------------------------- layer norm

def layer_norm(params: str = "storage", device: str = "cpu", register: str = "",
               copy: Any = False) -> Kernel:
    """torch layer normalization (torch.native_layer_norm / F.layer_norm)."""
    tt = _Torch(params, device, register, copy)
    torch = tt.torch
    F = torch.nn.functional

    def forward(x, weight=None, bias=None, *, eps, normalized_shape):
        xt = tt.put(x)
        ns = [int(d) for d in normalized_shape]
        w, b = tt.affine(weight, bias, xt, ns)
        with torch.no_grad():
            y, mean, rstd = torch.native_layer_norm(xt, ns, w, b, float(eps))
        stat_shape = tuple(xt.shape[: xt.dim() - len(ns)])
        return {"y": as_numpy(y), "mean": as_numpy(mean.reshape(stat_shape)),
                "rstd": as_numpy(rstd.reshape(stat_shape))}

    def backward(dy, x, weight=None, *, eps, normalized_shape):
        xt = tt.put(x, requires_grad=True)
        ns = tuple(int(d) for d in normalized_shape)
        w = tt.param(weight, xt, grad=True, fill=1.0, size=ns)
        b = tt.param(None, xt, grad=True, fill=0.0, size=ns)
        y = F.layer_norm(xt, ns, w, b, float(eps))
        return _grads(torch, y, (xt, w, b), tt.put(dy))

    return Kernel(
        name=tt.label("layer_norm"),
        op="layer_norm", forward=forward, backward=backward, outputs=("y", "mean", "rstd"),
        dtypes=tuple(tt.precision("layer_norm")), conventions=Conventions(saved=("mean", "rstd"), y_form="folded"),
        precision=tt.precision("layer_norm"),
        device=tt.device_name,
        notes=tt.notes("torch.native_layer_norm (forward), F.layer_norm under autograd (backward); "
                     "float16/bfloat16 dweight/dbias are summed over rows in the storage format in blocks of "
                     "ceil(rows / torch.get_num_threads()), block sums added in float32"),
    )


# --------------------------------------------------------------------------- group norm

def group_norm(params: str = "storage", device: str = "cpu", register: str = "",
               copy: Any = False) -> Kernel:
    """torch group normalization (torch.native_group_norm / F.group_norm)."""
    tt = _Torch(params, device, register, copy)
    torch = tt.torch
    F = torch.nn.functional

    def forward(x, weight=None, bias=None, *, eps, num_groups, axis=1):
        xt = tt.put(x)
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
        xt = tt.put(x, requires_grad=True)
        ax = axis % xt.dim()
        c = xt.shape[ax]
        w = tt.param(weight, xt, grad=True, fill=1.0, size=(c,))
        b = tt.param(None, xt, grad=True, fill=0.0, size=(c,))
        y = F.group_norm(_channels_first(xt, ax), int(num_groups), w, b, float(eps))
        return _grads(torch, y, (xt, w, b), _channels_first(tt.put(dy), ax))

    return Kernel(
        name=tt.label("group_norm"),
        op="group_norm", forward=forward, backward=backward, outputs=("y", "mean", "rstd"),
        dtypes=tuple(tt.precision("group_norm")), conventions=Conventions(saved=("mean", "rstd"), y_form="folded"),
        min_reduction=2,
        precision=tt.precision("group_norm"),
        device=tt.device_name,
        notes=tt.notes("torch.native_group_norm (forward), F.group_norm under autograd (backward)"),
    )


# --------------------------------------------------------------------------- instance norm

def instance_norm(params: str = "storage", device: str = "cpu", register: str = "",
                  copy: Any = False) -> Kernel:
    """torch instance normalization (F.instance_norm), with optional running statistics."""
    tt = _Torch(params, device, register, copy)
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
        xt = tt.put(x)
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
        xt = tt.put(x)
        ax = axis % xt.dim()
        w, b = tt.affine(weight, bias, xt, (xt.shape[ax],))
        with torch.no_grad():
            y = F.instance_norm(_channels_first(xt, ax), tt.param(running_mean, xt), tt.param(running_var, xt),
                                w, b, use_input_stats=False, eps=float(eps))
        return as_numpy(_from_channels_first(y, ax, xt.dim()))

    def _backward(dy, x, weight, eps, axis, training, running_mean=None, running_var=None):
        xt = tt.put(x, requires_grad=True)
        ax = axis % xt.dim()
        c = xt.shape[ax]
        w = tt.param(weight, xt, grad=True, fill=1.0, size=(c,))
        b = tt.param(None, xt, grad=True, fill=0.0, size=(c,))
        rm = None if training else tt.param(running_mean, xt)
        rv = None if training else tt.param(running_var, xt)
        y = F.instance_norm(_channels_first(xt, ax), rm, rv, w, b, use_input_stats=training, eps=float(eps))
        return _grads(torch, y, (xt, w, b), _channels_first(tt.put(dy), ax))

    def backward(dy, x, weight=None, *, eps, axis=1):
        return _backward(dy, x, weight, eps, axis, True)

    def backward_eval(dy, x, weight=None, *, eps, axis=1, running_mean, running_var):
        return _backward(dy, x, weight, eps, axis, False, running_mean, running_var)

    return Kernel(
        name=tt.label("instance_norm"),
        op="instance_norm", forward=forward, forward_eval=forward_eval, backward=backward,
        backward_eval=backward_eval, outputs=("y", "mean", "rstd"),
        dtypes=tuple(tt.precision("instance_norm")),
        conventions=Conventions(momentum_convention="new", running_var_estimator="unbiased",
                                saved=("mean", "rstd"), running="inplace", y_form="folded"),
        precision=tt.precision("instance_norm"), momentum_none=False, min_reduction=2,
        device=tt.device_name,
        notes=tt.notes("F.instance_norm (torch reshapes to a batch norm of N*C channels); the saved "
                     "statistics are that batch norm's, from torch.native_batch_norm on the same view"),
    )


# --------------------------------------------------------------------------- RMS norm

def rms_norm(params: str = "storage", device: str = "cpu", register: str = "",
             copy: Any = False) -> Kernel:
    """torch RMS normalization (F.rms_norm); a bias, when given, is added as a separate op."""
    if params != "storage":
        raise KernelError("torch's F.rms_norm with a float32 weight and a float16/bfloat16 x returns a float32 y "
                          "(type promotion in its composite fallback), so there is no mixed-precision rms_norm "
                          "kernel with storage-format outputs; use rms_norm()")
    tt = _Torch(params, device, register, copy)
    torch = tt.torch
    F = torch.nn.functional

    def _apply(xt, ns, w, b, eps):
        y = F.rms_norm(xt, ns, w, float(eps))
        return y if b is None else y + b

    def forward(x, weight=None, bias=None, *, eps, normalized_shape):
        xt = tt.put(x)
        ns = [int(d) for d in normalized_shape]
        with torch.no_grad():
            y = _apply(xt, ns, tt.param(weight, xt), tt.param(bias, xt), eps)
        return as_numpy(y)

    def backward(dy, x, weight=None, *, eps, normalized_shape):
        xt = tt.put(x, requires_grad=True)
        ns = [int(d) for d in normalized_shape]
        w = tt.param(weight, xt, grad=True, fill=1.0, size=ns)
        b = tt.param(None, xt, grad=True, fill=0.0, size=ns)
        y = _apply(xt, ns, w, b, eps)
        return _grads(torch, y, (xt, w, b), tt.put(dy))

    return Kernel(
        name=tt.label("rms_norm"),
        op="rms_norm", forward=forward, backward=backward, outputs=("y",),
        dtypes=tuple(tt.precision("rms_norm")), conventions=Conventions(),
        precision=tt.precision("rms_norm"),
        device=tt.device_name,
        notes=tt.notes("F.rms_norm; no bias in torch (a given bias is added as y + bias)"),
    )


def batch_norm_mixed(device: str = "cpu", register: str = "",
                     copy: Any = False) -> Kernel:
    """batch_norm with float32 weight, bias and statistics for float16/bfloat16 x."""
    return batch_norm(params="float32", device=device, register=register, copy=copy)


def layer_norm_mixed(device: str = "cpu", register: str = "",
                     copy: Any = False) -> Kernel:
    """layer_norm with float32 weight and bias for float16/bfloat16 x."""
    return layer_norm(params="float32", device=device, register=register, copy=copy)


def group_norm_mixed(device: str = "cpu", register: str = "",
                     copy: Any = False) -> Kernel:
    """group_norm with float32 weight and bias for float16/bfloat16 x."""
    return group_norm(params="float32", device=device, register=register, copy=copy)


def instance_norm_mixed(device: str = "cpu", register: str = "",
                        copy: Any = False) -> Kernel:
    """instance_norm with float32 weight, bias and running statistics for float16/bfloat16 x."""
    return instance_norm(params="float32", device=device, register=register, copy=copy)
