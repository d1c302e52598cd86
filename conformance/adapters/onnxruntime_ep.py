"""ONNX Runtime with a chosen execution provider: the ONNX standard's normalization operators as kernels.

Spec form: ``conformance.adapters.onnxruntime_ep:layer_norm`` (also group_norm, batch_norm,
batch_norm_mixed, instance_norm, rms_norm), with the provider by name:
``...:layer_norm?provider=CPUExecutionProvider`` or ``refnorm check SPEC --provider NAME``
(default CPUExecutionProvider). Each name is a factory ``op(provider=..., threads=0)``; onnx and
onnxruntime are imported when it is called. ``threads`` sets the session's intra-op threads
(0: ONNX Runtime's default, one per physical core).

Every call runs a one-operator model built in memory with ``onnx.helper``, at the operator's
newest version in the installed onnx that the op's semantics here need:

    layer_norm     LayerNormalization-17 (X, Scale, B) -> (Y, Mean, InvStdDev), axis = ndim - k
    group_norm     GroupNormalization-21 (X, scale, bias), scale and bias per channel
                   (GroupNormalization-18 had them per group, which cannot hold a per-channel weight)
    batch_norm     BatchNormalization-15, training_mode=1 -> (Y, running_mean, running_var) in
                   forward, training_mode=0 in forward_eval
    instance_norm  InstanceNormalization (no running statistics: training only)
    rms_norm       RMSNormalization-23 (X, scale); a bias, when given, is a following Add node

ONNX operators are channels first: for a channel axis other than 1 the model is wrapped in
Transpose nodes, as a converter from a channels-last framework writes it. Missing weight, bias or
running statistics (required inputs of most operators) are passed as ones and zeros. Inputs are
made contiguous with NumPy (an exact copy) because ONNX Runtime takes dense tensors; inputs and
outputs cross through an IOBinding onto NumPy buffers allocated here (bfloat16 as ml_dtypes
arrays reinterpreted as 16-bit integers), so no dtype is converted on the way. One
InferenceSession per (op, dtypes, shape, attributes) is cached in the worker process.

ONNX has no gradient operators that ONNX Runtime's inference build runs, so the kernels are
forward only: the report names the gradients as not checked. The dtypes a kernel declares are
the ones its provider accepts: each factory builds a small session per dtype and keeps those
that load (the others are listed, with ONNX Runtime's reason, in the kernel's notes).

What ONNX Runtime 1.32's CPUExecutionProvider computes, measured against the float64 oracle
(figures and method in docs/library-precision.md; checks in tests/test_adapters_onnxruntime.py):

- ONNX attributes are 32-bit floats: ``epsilon`` and ``momentum`` run as float32(eps) and
  float32(momentum) (1e-5 becomes 9.99999974738e-06, 0.1 becomes 0.100000001490). In float32 and
  narrower formats that is below the output's rounding; in float64 it shifts rstd by 1.3e-13
  relatively at var = 1 and up to 1.3e-8 when var << eps, beyond float64 bounds, so float64 cases
  fail on y (and the running statistics on momentum). A finding, not an adapter error: a float64
  ONNX model cannot state eps = 1e-5. With float32(eps) and float32(momentum) given to the oracle,
  float64 passes but for the findings below.
- Sums. LayerNormalization sums the mean in float64 (bit for bit a sequential float64 sum, float32
  x). ReduceMean (inside GroupNormalization), BatchNormalization's batch mean (bit for bit) and,
  as far as y shows, InstanceNormalization's mean and RMSNormalization's mean square add float32
  values in 8 interleaved running sums: recursive summation, which on same-sign data exceeds the
  probabilistic model (mean of 2^20 values 1e4 + N(0, 1): relative error 9.4e-4, twice
  lambda sqrt(n) u). Those ops declare summation="worst". BatchNormalization and
  InstanceNormalization then form the variance about that mean, so an error d in the mean adds
  d^2 to the variance (89 for that data, whose variance is 1).
- LayerNormalization: Mean and InvStdDev come back in float32 whatever X's type (the standard's
  U; the CPU kernel accepts no other). For float64 x they are declared as computed in float32;
  for float16/bfloat16 the adapter rounds them once to the parameter format. In float64 a
  subnormal mean underflows to 0 in float32, and the mean of a row holding +-Inf is NaN (float32
  x gives the IEEE +-Inf).
- GroupNormalization-21 has no CPU kernel: ONNX Runtime inlines the standard's function body,
  which computes the variance in one pass as ReduceMean(X^2) - Mean^2 in the stash type (float32,
  also for float64 X; declared accumulate float32). Cancellation cases and two-element groups of
  close values lose the variance; a negative one gives NaN (findings the harness reports).
- BatchNormalization training mode follows the standard: momentum weights the old running value
  (running = running * momentum + batch * (1 - momentum)), the running variance takes the biased
  batch variance, eps inside the square root, no saved statistics (opset 14 removed them). The
  float16 x with float32 scale/bias/statistics form is accepted (batch_norm_mixed).
- InstanceNormalization refuses rank-2 input (the adapter runs (N, C) as (N, C, 1)) and has no
  float64 kernel; bfloat16 is implemented for LayerNormalization only. For float16 the batch,
  instance and group norm graphs run in float32 between inserted Cast nodes: each output
  (running statistics included) is rounded to float16 once.

For a provider other than the CPU's the declaration is the CPU's with worst-case summation
bounds, marked NOT VERIFIED in the notes, and the CPU fallback is disabled
(session.disable_cpu_ep_fallback), so that every node runs on the provider named or the session
fails to load.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, replace
from typing import Any, Callable

import numpy as np

from ..kernel import Conventions, Kernel, KernelError, Precision
from . import missing_library

__all__ = ["layer_norm", "group_norm", "batch_norm", "batch_norm_mixed", "instance_norm", "rms_norm",
           "DEFAULT_PROVIDER", "OPERATORS", "available_providers"]

DEFAULT_PROVIDER = "CPUExecutionProvider"
DTYPES = ("float64", "float32", "float16", "bfloat16")
_LOW = ("float16", "bfloat16")
_CACHE_SIZE = 64
#: the IR version written into each model (ONNX 1.16 and later read it; ONNX Runtime 1.20 and later)
_IR_VERSION = 10


@dataclass(frozen=True)
class Operator:
    """An ONNX operator as this adapter uses it: its name and the oldest version whose semantics it needs."""

    name: str
    min_version: int
    why: str


OPERATORS = {
    "layer_norm": Operator("LayerNormalization", 17, "LayerNormalization was added in opset 17"),
    "group_norm": Operator("GroupNormalization", 21, "GroupNormalization-18 takes scale and bias per group; "
                           "a per-channel weight needs GroupNormalization-21"),
    "batch_norm": Operator("BatchNormalization", 15, "BatchNormalization-15 has training_mode with "
                           "running-statistic outputs and separate types for scale and statistics"),
    "instance_norm": Operator("InstanceNormalization", 6, "InstanceNormalization-6"),
    "rms_norm": Operator("RMSNormalization", 23, "RMSNormalization was added in opset 23"),
}


def _libs():
    try:
        import onnx
        import onnxruntime as ort
    except ImportError as e:
        raise missing_library("ONNX and ONNX Runtime (onnx, onnxruntime)", "onnx", e) from e
    return onnx, ort


def available_providers() -> list[str]:
    """The execution providers this onnxruntime can run here."""
    _, ort = _libs()
    return list(ort.get_available_providers())


# --------------------------------------------------------------------------- precision

def _cpu_precision(op: str, dt: str, params: str | None) -> Precision:
    """What ONNX Runtime's CPU provider computes, as measured (module docstring, docs/library-precision.md)."""
    p = params or dt
    low = dt in _LOW
    acc = "float32" if low else dt
    oa: dict[str, str] = {}
    if op == "layer_norm":
        # The mean is summed in float64 (bit for bit, float32 x): the probabilistic model holds. Mean and
        # InvStdDev are float32 tensors (the standard's U): a float64 statistic passes through float32; a
        # float16/bfloat16 one is that float32 rounded once more by the adapter (its final rounding).
        if dt == "float64":
            oa = {"mean": "float32", "rstd": "float32"}
        return Precision(storage=dt, params=p, accumulate=acc, output_accumulate=oa)
    if op == "group_norm":
        # the inlined function body computes in its stash type, float32, for every X type
        acc = "float32"
    if op == "rms_norm" and low:
        # a given bias is a following Add node in the storage format: y is rounded twice
        oa = {"y": dt}
    # ReduceMean, BatchNormalization's and InstanceNormalization's means and RMSNormalization's mean
    # square add float32 values in 8 interleaved running sums, then add the 8 (bit for bit for
    # ReduceMean and BatchNormalization): recursive summation, whose error on same-sign data exceeds
    # the probabilistic model (2x its bound on 2^20 values 1e4 + N(0, 1)): the worst-case model.
    return Precision(storage=dt, params=p, accumulate=acc, summation="worst", output_accumulate=oa)


# --------------------------------------------------------------------------- sessions

class _Runtime:
    """One kernel's ONNX Runtime: provider, session options, model building, cached sessions, runs."""

    def __init__(self, op: str, provider: str, threads: Any):
        self.onnx, self.ort = _libs()
        from onnx import TensorProto

        self.op = op
        self.operator = OPERATORS[op]
        self.provider = _provider(self.ort, provider)
        self.threads = _threads(threads)
        self.version = self._operator_version()
        self.elem = {"float64": TensorProto.DOUBLE, "float32": TensorProto.FLOAT,
                     "float16": TensorProto.FLOAT16, "bfloat16": TensorProto.BFLOAT16}
        self.verified = self.provider == DEFAULT_PROVIDER
        self._sessions: OrderedDict[tuple, Any] = OrderedDict()

    def _operator_version(self) -> int:
        defs = self.onnx.defs
        try:
            schema = defs.get_schema(self.operator.name, defs.onnx_opset_version())
        except Exception:
            raise KernelError(f"onnx {self.onnx.__version__} has no {self.operator.name} operator "
                              f"({self.operator.why})") from None
        if schema.since_version < self.operator.min_version:
            raise KernelError(f"onnx {self.onnx.__version__} has {self.operator.name}-{schema.since_version}; "
                              f"this adapter needs version {self.operator.min_version} or later ({self.operator.why})")
        return int(schema.since_version)

    def options(self):
        so = self.ort.SessionOptions()
        # fatal only: a session that fails raises, and the message is in the exception; ONNX Runtime's own
        # log lines would reach refnorm's output
        so.log_severity_level = 4
        if self.threads:
            so.intra_op_num_threads = self.threads
        if self.provider != DEFAULT_PROVIDER:
            # every node on the provider named, or the session fails: no silent CPU fallback
            so.add_session_config_entry("session.disable_cpu_ep_fallback", "1")
        return so

    def model(self, nodes: list, inputs: list[tuple[str, str, tuple]], outputs: list[tuple[str, str, tuple]]):
        """A model of ``nodes`` with typed inputs and outputs [(name, dtype, shape)]."""
        h = self.onnx.helper
        graph = h.make_graph(nodes, f"refnorm_{self.op}",
                             [h.make_tensor_value_info(n, self.elem[d], list(s)) for n, d, s in inputs],
                             [h.make_tensor_value_info(n, self.elem[d], list(s)) for n, d, s in outputs])
        m = h.make_model(graph, opset_imports=[h.make_opsetid("", self.version)],
                         producer_name="refnorm")
        m.ir_version = _IR_VERSION
        return m

    def session(self, key: tuple, build: Callable[[], Any]):
        """The cached InferenceSession for ``key``, built from ``build()`` (a ModelProto) when missing."""
        s = self._sessions.get(key)
        if s is not None:
            self._sessions.move_to_end(key)
            return s
        model = build()
        s = self.ort.InferenceSession(model.SerializeToString(), self.options(), providers=[self.provider])
        self._sessions[key] = s
        while len(self._sessions) > _CACHE_SIZE:
            self._sessions.popitem(last=False)
        return s

    def _value(self, a: np.ndarray):
        from ..dtypes import name_of

        name = name_of(a.dtype)
        if name == "bfloat16":  # NumPy has no bfloat16: its bits cross as uint16, typed by ONNX's enum
            return self.ort.OrtValue.ortvalue_from_numpy_with_onnx_type(a.view(np.uint16), self.elem[name])
        return self.ort.OrtValue.ortvalue_from_numpy(a)

    def run(self, session, inputs: dict[str, np.ndarray], outputs: list[tuple[str, tuple, Any]]) -> list[np.ndarray]:
        """Run with inputs bound from NumPy arrays and outputs written into new NumPy arrays
        [(name, shape, numpy dtype)]; returns those arrays."""
        binding = session.io_binding()
        keep = []  # the OrtValues must outlive the run
        for name, a in inputs.items():
            a = np.ascontiguousarray(a)
            keep.append(a)
            binding.bind_ortvalue_input(name, self._value(a))
        results = []
        for name, shape, dtype in outputs:
            buf = np.empty(shape, dtype=dtype)
            results.append(buf)
            binding.bind_ortvalue_output(name, self._value(buf))
        session.run_with_iobinding(binding)
        return results

    def notes(self, text: str, dropped: dict[str, str]) -> str:
        ort = self.ort
        lines = [f"onnxruntime {ort.__version__}, onnx {self.onnx.__version__}, {self.provider}, "
                 f"{self.operator.name}-{self.version}, intra-op threads "
                 f"{self.threads or 'default'}: {text}"]
        if dropped:
            lines.append("not declared (the provider refuses them): "
                         + "; ".join(f"{dt}: {why}" for dt, why in dropped.items()))
        lines.append("precision: measured against the float64 oracle (docs/library-precision.md)" if self.verified
                     else f"precision: NOT VERIFIED for {self.provider}: the CPU provider's measured declaration "
                          "with worst-case summation bounds")
        lines.append("forward only: ONNX Runtime's inference build has no gradient operators")
        return "; ".join(lines)

    def precision(self, dt: str, params: str | None = None) -> Precision:
        p = _cpu_precision(self.op, dt, params)
        return p if self.verified else replace(p, summation="worst")

    def declared(self, probe: Callable[[str], None], dtypes: tuple[str, ...] = DTYPES
                 ) -> tuple[tuple[str, ...], dict[str, str]]:
        """The dtypes whose probe session loads on the provider, and why each other one does not."""
        ok, dropped = [], {}
        for dt in dtypes:
            try:
                probe(dt)
            except Exception as e:  # ONNX Runtime's NOT_IMPLEMENTED / type errors
                dropped[dt] = _first_line(e)
            else:
                ok.append(dt)
        if not ok:
            by_reason: dict[str, list[str]] = {}
            for d, why in dropped.items():
                by_reason.setdefault(why, []).append(d)
            raise KernelError(f"{self.provider} runs {self.operator.name} in none of {', '.join(dtypes)}: "
                              + "; ".join(f"{', '.join(ds)}: {why}" for why, ds in by_reason.items()))
        return tuple(ok), dropped


def _first_line(e: BaseException) -> str:
    text = str(e).strip().splitlines()
    msg = text[0] if text else type(e).__name__
    return msg if len(msg) <= 200 else msg[:197] + "..."


def _provider(ort, provider: Any) -> str:
    have = list(ort.get_available_providers())
    if not isinstance(provider, str) or provider not in have:
        known = set(ort.get_all_providers())
        what = "is not an ONNX Runtime execution provider" if provider not in known else \
            "is not available in this onnxruntime build"
        raise KernelError(f"provider {provider!r} {what}; available here: {', '.join(have)}")
    return provider


def _threads(threads: Any) -> int:
    try:
        n = int(str(threads).strip())
    except ValueError:
        n = -1
    if n < 0 or n > 1024 or isinstance(threads, bool) or (isinstance(threads, float) and not threads.is_integer()):
        raise KernelError(f"threads is {threads!r}, expected a whole number from 0 (ONNX Runtime's default) to 1024")
    return n


def _np_dtype(name: str):
    from ..dtypes import dtype_of

    return dtype_of(name)


def _name(a: Any) -> str:
    from ..dtypes import name_of

    return name_of(np.asarray(a).dtype)


def _filled(a: Any, fill: float, shape: tuple[int, ...], dtype) -> np.ndarray:
    return np.full(shape, fill, dtype=dtype) if a is None else np.asarray(a)


def _trailing_feeds(x: Any, weight: Any, bias: Any, eps: float, normalized_shape: Any, scale: str):
    """For an op over the trailing axes: (x, session key (dtype, shape, k, eps, has bias), feeds), with a
    missing weight as a scale of ones and a missing bias left out."""
    x = np.asarray(x)
    dt, shape, k = _name(x), tuple(x.shape), len(tuple(normalized_shape))
    feeds = {"X": x, scale: _filled(weight, 1.0, shape[len(shape) - k:], x.dtype)}
    if bias is not None:
        feeds["B"] = bias
    return x, (dt, shape, k, float(eps), bias is not None), feeds


def _to_channels_first(rt: _Runtime, ndim: int, axis: int) -> tuple[list, list, str, str]:
    """Transpose nodes moving ``axis`` to 1 and back: (nodes before, nodes after, inner input, inner output)."""
    if axis == 1:
        return [], [], "X", "Y"
    h = rt.onnx.helper
    perm = [0, axis] + [i for i in range(1, ndim) if i != axis]
    inv = [perm.index(i) for i in range(ndim)]
    return ([h.make_node("Transpose", ["X"], ["X_nc"], perm=perm)],
            [h.make_node("Transpose", ["Y_nc"], ["Y"], perm=inv)], "X_nc", "Y_nc")


# --------------------------------------------------------------------------- layer norm

def layer_norm(provider: str = DEFAULT_PROVIDER, threads: Any = 0) -> Kernel:
    """ONNX LayerNormalization over the trailing ``normalized_shape`` axes."""
    rt = _Runtime("layer_norm", provider, threads)
    h = rt.onnx.helper

    def build(dt: str, shape: tuple[int, ...], k: int, eps: float, has_bias: bool):
        axis = len(shape) - k
        ns = shape[axis:]
        stat = shape[:axis] + (1,) * k
        ins = ["X", "Scale"] + (["B"] if has_bias else [])
        node = h.make_node("LayerNormalization", ins, ["Y", "Mean", "InvStdDev"], axis=axis, epsilon=eps)
        inputs = [("X", dt, shape), ("Scale", dt, ns)] + ([("B", dt, ns)] if has_bias else [])
        return rt.model([node], inputs, [("Y", dt, shape), ("Mean", "float32", stat), ("InvStdDev", "float32", stat)])

    def forward(x, weight=None, bias=None, *, eps, normalized_shape):
        x, key, feeds = _trailing_feeds(x, weight, bias, eps, normalized_shape, "Scale")
        dt, shape, k = key[:3]
        s = rt.session(key, lambda: build(dt, shape, k, float(eps), bias is not None))
        stat = shape[: len(shape) - k]
        y, mean, rstd = rt.run(s, feeds, [("Y", shape, x.dtype), ("Mean", stat + (1,) * k, np.float32),
                                          ("InvStdDev", stat + (1,) * k, np.float32)])
        pd = x.dtype if weight is None else np.asarray(weight).dtype
        # Mean/InvStdDev are float32: widened exactly to float64, rounded once to float16/bfloat16
        return {"y": y, "mean": mean.reshape(stat).astype(pd), "rstd": rstd.reshape(stat).astype(pd)}

    def probe(dt: str):
        d = _np_dtype(dt)
        forward(np.zeros((2, 4), d), np.ones(4, d), np.zeros(4, d), eps=1e-5, normalized_shape=(4,))

    dts, dropped = rt.declared(probe)
    return Kernel(
        name=f"onnxruntime {rt.provider} layer_norm", op="layer_norm", forward=forward,
        outputs=("y", "mean", "rstd"), dtypes=dts, conventions=Conventions(saved=("mean", "rstd")),
        precision={dt: rt.precision(dt) for dt in dts}, device=rt.provider,
        notes=rt.notes("LayerNormalization(X, Scale, B) -> Y, Mean, InvStdDev (float32); a missing Scale is "
                       "ones, a missing B is left out", dropped),
    )


# --------------------------------------------------------------------------- group norm

def group_norm(provider: str = DEFAULT_PROVIDER, threads: Any = 0) -> Kernel:
    """ONNX GroupNormalization-21 (scale and bias per channel)."""
    rt = _Runtime("group_norm", provider, threads)
    h = rt.onnx.helper

    def build(dt: str, shape: tuple[int, ...], axis: int, groups: int, eps: float):
        pre, post, xi, yo = _to_channels_first(rt, len(shape), axis)
        c = shape[axis]
        node = h.make_node("GroupNormalization", [xi, "scale", "bias"], [yo], num_groups=groups, epsilon=eps)
        return rt.model(pre + [node] + post, [("X", dt, shape), ("scale", dt, (c,)), ("bias", dt, (c,))],
                        [("Y", dt, shape)])

    def forward(x, weight=None, bias=None, *, eps, num_groups, axis=1):
        x = np.asarray(x)
        dt, shape = _name(x), tuple(x.shape)
        ax = axis % x.ndim
        c = shape[ax]
        key = (dt, shape, ax, int(num_groups), float(eps))
        s = rt.session(key, lambda: build(dt, shape, ax, int(num_groups), float(eps)))
        (y,) = rt.run(s, {"X": x, "scale": _filled(weight, 1.0, (c,), x.dtype),
                          "bias": _filled(bias, 0.0, (c,), x.dtype)}, [("Y", shape, x.dtype)])
        return y

    def probe(dt: str):
        d = _np_dtype(dt)
        forward(np.zeros((2, 4, 3), d), eps=1e-5, num_groups=2)

    dts, dropped = rt.declared(probe)
    return Kernel(
        name=f"onnxruntime {rt.provider} group_norm", op="group_norm", forward=forward, dtypes=dts,
        precision={dt: rt.precision(dt) for dt in dts}, device=rt.provider,
        notes=rt.notes("GroupNormalization-21(X, scale, bias), per-channel scale and bias (ones and zeros when "
                       "missing); channels-last x through Transpose nodes; ONNX Runtime inlines the standard's "
                       "function body, whose variance is ReduceMean(X^2) - Mean^2 in float32", dropped),
    )


# --------------------------------------------------------------------------- batch norm

def batch_norm(provider: str = DEFAULT_PROVIDER, threads: Any = 0, params: str = "storage") -> Kernel:
    """ONNX BatchNormalization-15: training_mode=1 in forward, 0 in forward_eval; params "storage" or "float32"."""
    if params not in ("storage", "float32"):
        raise KernelError(f"params is {params!r}, expected 'storage' or 'float32'")
    rt = _Runtime("batch_norm", provider, threads)
    h = rt.onnx.helper

    def pdt(dt: str) -> str:
        return dt if params == "storage" else "float32"

    def build(dt: str, shape: tuple[int, ...], axis: int, eps: float, momentum: float, training: bool):
        pre, post, xi, yo = _to_channels_first(rt, len(shape), axis)
        c, p = shape[axis], pdt(dt)
        outs = [yo] + (["running_mean", "running_var"] if training else [])
        node = h.make_node("BatchNormalization", [xi, "scale", "B", "input_mean", "input_var"], outs,
                           epsilon=eps, momentum=momentum, training_mode=int(training))
        inputs = [("X", dt, shape)] + [(n, p, (c,)) for n in ("scale", "B", "input_mean", "input_var")]
        outputs = [("Y", dt, shape)] + ([("running_mean", p, (c,)), ("running_var", p, (c,))] if training else [])
        return rt.model(pre + [node] + post, inputs, outputs)

    def _run(x, weight, bias, eps, axis, training, running_mean, running_var, momentum):
        x = np.asarray(x)
        dt, shape = _name(x), tuple(x.shape)
        ax = axis % x.ndim
        c = shape[ax]
        p = _np_dtype(pdt(dt))
        key = (dt, shape, ax, float(eps), float(momentum), training)
        s = rt.session(key, lambda: build(dt, shape, ax, float(eps), float(momentum), training))
        feeds = {"X": x, "scale": _filled(weight, 1.0, (c,), p), "B": _filled(bias, 0.0, (c,), p),
                 "input_mean": _filled(running_mean, 0.0, (c,), p), "input_var": _filled(running_var, 1.0, (c,), p)}
        outs = [("Y", shape, x.dtype)] + ([("running_mean", (c,), p), ("running_var", (c,), p)] if training else [])
        return rt.run(s, feeds, outs)

    def forward(x, weight=None, bias=None, *, eps, axis=1, training=True, running_mean=None, running_var=None,
                momentum=0.9):
        if not training:
            return forward_eval(x, weight, bias, eps=eps, axis=axis, running_mean=running_mean,
                                running_var=running_var)
        if momentum is None and running_mean is not None:
            raise ValueError("momentum is None: ONNX BatchNormalization has no cumulative moving average "
                             "(this kernel declares momentum_none=False)")
        y, rm, rv = _run(x, weight, bias, eps, axis, True, running_mean, running_var,
                         0.9 if momentum is None else momentum)
        return {"y": y, "running_mean": rm, "running_var": rv}

    def forward_eval(x, weight=None, bias=None, *, eps, axis=1, running_mean, running_var):
        return _run(x, weight, bias, eps, axis, False, running_mean, running_var, 0.9)[0]

    def probe(dt: str):
        d, p = _np_dtype(dt), _np_dtype(pdt(dt))
        x = np.zeros((2, 3, 2), d)
        forward(x, eps=1e-5, running_mean=np.zeros(3, p), running_var=np.ones(3, p))
        forward_eval(x, eps=1e-5, running_mean=np.zeros(3, p), running_var=np.ones(3, p))

    dts, dropped = rt.declared(probe, DTYPES if params == "storage" else _LOW)
    return Kernel(
        name=f"onnxruntime {rt.provider} batch_norm{'' if params == 'storage' else ' (float32 params)'}",
        op="batch_norm", forward=forward, forward_eval=forward_eval,
        outputs=("y", "running_mean", "running_var"), dtypes=dts,
        conventions=Conventions(momentum_convention="old", running_var_estimator="biased", running="return",
                                y_form="folded"),
        precision={dt: rt.precision(dt, pdt(dt)) for dt in dts}, momentum_none=False, device=rt.provider,
        notes=rt.notes("BatchNormalization-15(X, scale, B, input_mean, input_var), training_mode=1 -> Y, "
                       "running_mean, running_var (forward), training_mode=0 (forward_eval); momentum is the "
                       "standard's own (weights the old value); missing inputs are ones and zeros; channels-last "
                       "x through Transpose nodes", dropped),
    )


def batch_norm_mixed(provider: str = DEFAULT_PROVIDER, threads: Any = 0) -> Kernel:
    """batch_norm with float32 scale, bias and statistics for float16/bfloat16 x (T1 = T2 = float)."""
    return batch_norm(provider=provider, threads=threads, params="float32")


# --------------------------------------------------------------------------- instance norm

def instance_norm(provider: str = DEFAULT_PROVIDER, threads: Any = 0) -> Kernel:
    """ONNX InstanceNormalization: the instance's own statistics, no running statistics."""
    rt = _Runtime("instance_norm", provider, threads)
    h = rt.onnx.helper

    def build(dt: str, shape: tuple[int, ...], axis: int, eps: float):
        pre, post, xi, yo = _to_channels_first(rt, len(shape), axis)
        c = shape[axis]
        if len(shape) == 2:
            # ONNX Runtime's kernel refuses rank 2 ("number of dimensions is less than 3"; the standard
            # writes (N, C, D1, ...)): (N, C) runs as (N, C, 1), one element per instance
            axes = rt.onnx.helper.make_tensor("one_axis", rt.onnx.TensorProto.INT64, [1], [2])
            pre = pre + [h.make_node("Constant", [], ["one_axis"], value=axes),
                         h.make_node("Unsqueeze", [xi, "one_axis"], ["X_3d"])]
            post = [h.make_node("Squeeze", ["Y_3d", "one_axis"], [yo])] + post
            xi, inner = "X_3d", "Y_3d"
        else:
            inner = yo
        node = h.make_node("InstanceNormalization", [xi, "scale", "B"], [inner], epsilon=eps)
        return rt.model(pre + [node] + post, [("X", dt, shape), ("scale", dt, (c,)), ("B", dt, (c,))],
                        [("Y", dt, shape)])

    def forward(x, weight=None, bias=None, *, eps, axis=1):
        x = np.asarray(x)
        dt, shape = _name(x), tuple(x.shape)
        ax = axis % x.ndim
        c = shape[ax]
        s = rt.session((dt, shape, ax, float(eps)), lambda: build(dt, shape, ax, float(eps)))
        (y,) = rt.run(s, {"X": x, "scale": _filled(weight, 1.0, (c,), x.dtype),
                          "B": _filled(bias, 0.0, (c,), x.dtype)}, [("Y", shape, x.dtype)])
        return y

    def probe(dt: str):
        forward(np.zeros((2, 3, 4), _np_dtype(dt)), eps=1e-5)

    dts, dropped = rt.declared(probe)
    return Kernel(
        name=f"onnxruntime {rt.provider} instance_norm", op="instance_norm", forward=forward, dtypes=dts,
        precision={dt: rt.precision(dt) for dt in dts}, updates_running=False, momentum_none=False,
        device=rt.provider,
        notes=rt.notes("InstanceNormalization(input, scale, B) (ones and zeros when missing); no running "
                       "statistics, so no eval mode; channels-last x through Transpose nodes; rank-2 x through "
                       "Unsqueeze/Squeeze to (N, C, 1), which ONNX Runtime's kernel requires", dropped),
    )


# --------------------------------------------------------------------------- RMS norm

def rms_norm(provider: str = DEFAULT_PROVIDER, threads: Any = 0) -> Kernel:
    """ONNX RMSNormalization-23 over the trailing ``normalized_shape`` axes; a bias is a following Add."""
    rt = _Runtime("rms_norm", provider, threads)
    h = rt.onnx.helper

    def build(dt: str, shape: tuple[int, ...], k: int, eps: float, has_bias: bool):
        axis = len(shape) - k
        ns = shape[axis:]
        nodes = [h.make_node("RMSNormalization", ["X", "scale"], ["Y_n" if has_bias else "Y"], axis=axis,
                             epsilon=eps)]
        inputs = [("X", dt, shape), ("scale", dt, ns)]
        if has_bias:
            nodes.append(h.make_node("Add", ["Y_n", "B"], ["Y"]))
            inputs.append(("B", dt, ns))
        return rt.model(nodes, inputs, [("Y", dt, shape)])

    def forward(x, weight=None, bias=None, *, eps, normalized_shape):
        x, key, feeds = _trailing_feeds(x, weight, bias, eps, normalized_shape, "scale")
        dt, shape, k = key[:3]
        s = rt.session(key, lambda: build(dt, shape, k, float(eps), bias is not None))
        (y,) = rt.run(s, feeds, [("Y", shape, x.dtype)])
        return y

    def probe(dt: str):
        d = _np_dtype(dt)
        forward(np.zeros((2, 4), d), bias=np.zeros(4, d), eps=1e-5, normalized_shape=(4,))

    dts, dropped = rt.declared(probe)
    return Kernel(
        name=f"onnxruntime {rt.provider} rms_norm", op="rms_norm", forward=forward, dtypes=dts,
        precision={dt: rt.precision(dt) for dt in dts}, device=rt.provider,
        notes=rt.notes("RMSNormalization-23(X, scale) (scale of ones when missing); no bias in the standard: a "
                       "given bias is a following Add node", dropped),
    )

