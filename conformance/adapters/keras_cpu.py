"""keras.layers normalizations (TensorFlow backend, CPU) as kernels under test.

Spec form: ``conformance.adapters.keras_cpu:batch_norm`` (also layer_norm,
group_norm, instance_norm, rms_norm). Each name is a factory; TensorFlow and
Keras are imported when it is called (with TF_CPP_MIN_LOG_LEVEL=2 unless set).

Every call builds a fresh layer whose dtype policy is the case's dtype
(``dtype="bfloat16"`` etc.: variables and outputs in that format), sets its
weights from the inputs, and runs it with ``training=True`` or ``False``;
gradients come from tf.GradientTape, as in a custom training step.

Layers: BatchNormalization, LayerNormalization (axis = the trailing
normalized axes), GroupNormalization, GroupNormalization(groups=-1) as
instance normalization (Keras documents -1 as instance normalization; it has
no running statistics, so this kernel has no eval mode and does not update
running statistics), RMSNormalization (Keras 3: scale only, no bias, no way
to switch the scale off: weight=None is a scale of ones; a given bias is added
after the layer, in the output format, as user code would).

Conventions (Keras 3.15 source, keras/src/layers/normalization/):
momentum weights the old running value ("old":
moving = moving * momentum + batch * (1 - momentum)); the running variance is
the biased batch variance (tf.nn.moments); eps inside the square root
(rsqrt(var + eps)); running statistics are returned (layer.moving_mean and
layer.moving_variance after the call); no saved statistics (the layers keep
none). Keras has no cumulative moving average (momentum_none=False).

How ``momentum`` maps: the harness passes one number and computes the oracle
under this kernel's declared convention, so the number is Keras's own
momentum, used as it is: momentum=0.9 means moving = 0.9 * moving + 0.1 * batch.
A case written as torch's 0.1 ("new") corresponds to Keras 0.9; the harness,
not the adapter, decides which number a case carries.

Measured precision (docs/library-precision.md, tests/test_adapters.py): for
float16 and bfloat16 every layer casts x and its weights to float32
(``backend.result_type(dtype, "float32")``), computes statistics, output and
gradients in float32 and casts once to the layer's dtype: 99.9-100% of y, dx,
dweight and dbias are the correctly rounded values. TensorFlow's reductions
behave like recursive summation, not like the probabilistic model
(tf.reduce_mean of 2^21 float32 values 1e4 + N(0, 1) errs by 1.36%), so every
kernel declares summation="worst". The bias added after RMSNormalization is
differentiated by TensorFlow, whose float16 sums accumulate in float16
(declared for that dbias).

TensorFlow flushes subnormals to zero on the CPU (measured: 1e-39 * 1000 is 0
in float32): every kernel declares subnormals="flush". Keras forms y as
x * inv + (beta - mean * inv) with inv = rsqrt(var + eps) * gamma
(tf.nn.batch_normalization and Keras's layer norm), not (x - mean) * inv + beta:
declared y_form="folded" (batch, layer and group norm); when |mean| is large
against the spread the rounding error scales with |x| * inv instead of |y|.
What the harness reports against Keras/TensorFlow itself: the eval-mode
gradient of gamma, the autograd of that form, cancels between two large sums,
and the gradient through the variance is partly lost on data of spread about
1e18 (docs/library-precision.md).
"""

from __future__ import annotations

import os
from typing import Any

import numpy as np

from ..arrays import as_numpy, to_tensorflow
from ..kernel import Conventions, Kernel, KernelError, Precision
from . import missing_library

__all__ = ["batch_norm", "layer_norm", "group_norm", "instance_norm", "rms_norm", "add_layer_norm", "add_rms_norm"]

DTYPES = ("float64", "float32", "float16", "bfloat16")


def _libs():
    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
    try:
        import tensorflow as tf
    except ImportError as e:
        raise missing_library("TensorFlow (tensorflow-cpu)", "tensorflow", e) from e
    try:
        import keras
    except ImportError as e:
        raise missing_library("Keras 3 (keras)", "tensorflow", e) from e
    backend = keras.backend.backend()
    if backend != "tensorflow":
        raise KernelError(f"the keras_cpu adapter needs Keras's TensorFlow backend (gradients come from "
                          f"tf.GradientTape); Keras is using {backend!r}: set KERAS_BACKEND=tensorflow")
    return tf, keras


def _precision(extra_rounding: tuple[str, ...] = (), fp16_sums: tuple[str, ...] = ()) -> dict[str, Precision]:
    """float32 arithmetic for float16/bfloat16 (one rounding at the end).

    ``extra_rounding``: outputs rounded once more in the storage format (the bias added after
    RMSNormalization). ``fp16_sums``: outputs that TensorFlow sums in float16 itself (the gradient
    of that bias: tf.reduce_sum of a float16 dy accumulates in float16 on the CPU, measured: up to
    16 ulps off on 4 rows; bfloat16 sums are accumulated in float32).
    """
    out = {}
    for dt in DTYPES:
        low = dt in ("float16", "bfloat16")
        oa = {o: dt for o in extra_rounding} if low else {}
        if dt == "float16":
            oa.update({o: "float16" for o in fp16_sums})
        # "worst": TensorFlow's CPU reductions behave like recursive summation, not like the
        # probabilistic model: tf.reduce_mean of 2^21 float32 values 1e4 + N(0, 1) errs by 1.36%,
        # 20 times lambda sqrt(n) u (lambda = 8) and within n u = 12.5% (docs/library-precision.md).
        # "flush": TensorFlow flushes subnormal operands and results to zero on the CPU (measured:
        # 1e-39 * 1000 gives 0 in float32; docs/library-precision.md).
        out[dt] = Precision(storage=dt, params=dt, accumulate="float32" if low else dt, output_accumulate=oa,
                            summation="worst", subnormals="flush")
    return out


def _dtype_name(a: Any) -> str:
    from ..dtypes import name_of

    return name_of(np.asarray(a).dtype)


def _assign(var, value) -> None:
    from ..dtypes import dtype_of

    name = var.dtype if isinstance(var.dtype, str) else var.dtype.name
    var.assign(np.asarray(value).astype(dtype_of(name)))


class _Run:
    """One layer call, forward or with gradients."""

    def __init__(self, tf, layer, x):
        self.tf = tf
        self.layer = layer
        self.x = to_tensorflow(x)
        layer.build(tuple(self.x.shape))

    def forward(self, **call_kw):
        return self.layer(self.x, **call_kw)

    def grads(self, dy, leaves, post=None, **call_kw):
        """(dx, d leaf for each leaf) of sum(dy * y), y = post(layer(x)) (post: e.g. a bias added after)."""
        tf = self.tf
        with tf.GradientTape() as tape:
            tape.watch(self.x)
            y = self.layer(self.x, **call_kw)
            if post is not None:
                y = post(y)
        g = tape.gradient(y, [self.x] + list(leaves), output_gradients=to_tensorflow(dy))
        return tuple(as_numpy(v) for v in g)


def _weights(layer, weight, bias, c_shape) -> None:
    if getattr(layer, "gamma", None) is not None:
        _assign(layer.gamma, np.ones(c_shape) if weight is None else weight)
    if getattr(layer, "beta", None) is not None:
        _assign(layer.beta, np.zeros(c_shape) if bias is None else bias)


# --------------------------------------------------------------------------- batch norm

def batch_norm() -> Kernel:
    """keras.layers.BatchNormalization."""
    tf, keras = _libs()

    def _layer(x, weight, bias, eps, axis, momentum, running_mean, running_var, full):
        dt = _dtype_name(x)
        c = np.asarray(x).shape[axis]
        layer = keras.layers.BatchNormalization(axis=axis, momentum=momentum, epsilon=float(eps),
                                                center=full or bias is not None, scale=full or weight is not None,
                                                dtype=dt)
        run = _Run(tf, layer, x)
        _weights(layer, weight, bias, (c,))
        _assign(layer.moving_mean, np.zeros(c) if running_mean is None else running_mean)
        _assign(layer.moving_variance, np.ones(c) if running_var is None else running_var)
        return run

    def forward(x, weight=None, bias=None, *, eps, axis=-1, training=True, running_mean=None, running_var=None,
                momentum=0.99):
        if momentum is None and running_mean is not None:
            raise ValueError("momentum is None: Keras BatchNormalization has no cumulative moving average")
        ax = axis % np.ndim(x)
        run = _layer(x, weight, bias, eps, ax, 0.99 if momentum is None else float(momentum),
                     running_mean, running_var, full=False)
        y = run.forward(training=bool(training))
        # The layer always has moving statistics (zeros and ones when none were given): all three
        # declared outputs are returned; the harness checks the running ones only where a case has them.
        return {"y": as_numpy(y), "running_mean": as_numpy(run.layer.moving_mean.value),
                "running_var": as_numpy(run.layer.moving_variance.value)}

    def forward_eval(x, weight=None, bias=None, *, eps, axis=-1, running_mean, running_var):
        ax = axis % np.ndim(x)
        run = _layer(x, weight, bias, eps, ax, 0.99, running_mean, running_var, full=False)
        return as_numpy(run.forward(training=False))

    def backward(dy, x, weight=None, *, eps, axis=-1):
        ax = axis % np.ndim(x)
        run = _layer(x, weight, None, eps, ax, 0.99, None, None, full=True)
        return run.grads(dy, (run.layer.gamma, run.layer.beta), training=True)

    def backward_eval(dy, x, weight=None, *, eps, axis=-1, running_mean, running_var):
        ax = axis % np.ndim(x)
        run = _layer(x, weight, None, eps, ax, 0.99, running_mean, running_var, full=True)
        return run.grads(dy, (run.layer.gamma, run.layer.beta), training=False)

    return Kernel(
        name="keras-cpu batch_norm", op="batch_norm", forward=forward, forward_eval=forward_eval,
        backward=backward, backward_eval=backward_eval, outputs=("y", "running_mean", "running_var"),
        dtypes=DTYPES, conventions=Conventions(momentum_convention="old", running_var_estimator="biased",
                                               running="return", y_form="folded"),
        precision=_precision(), momentum_none=False,
        device="cpu",
        notes=_notes(keras, tf, "keras.layers.BatchNormalization; momentum is Keras's own (weights the old value)"),
    )


# --------------------------------------------------------------------------- layer norm

def layer_norm() -> Kernel:
    """keras.layers.LayerNormalization over the trailing normalized axes."""
    tf, keras = _libs()

    def _layer(x, weight, bias, eps, normalized_shape, full):
        nd = np.ndim(x)
        k = len(tuple(normalized_shape))
        axes = list(range(nd - k, nd))
        layer = keras.layers.LayerNormalization(axis=axes, epsilon=float(eps), center=full or bias is not None,
                                                scale=full or weight is not None, dtype=_dtype_name(x))
        run = _Run(tf, layer, x)
        _weights(layer, weight, bias, tuple(normalized_shape))
        return run

    def forward(x, weight=None, bias=None, *, eps, normalized_shape):
        return as_numpy(_layer(x, weight, bias, eps, normalized_shape, False).forward())

    def backward(dy, x, weight=None, *, eps, normalized_shape):
        run = _layer(x, weight, None, eps, normalized_shape, True)
        return run.grads(dy, (run.layer.gamma, run.layer.beta))

    return Kernel(name="keras-cpu layer_norm", op="layer_norm", forward=forward, backward=backward,
                  dtypes=DTYPES, precision=_precision(), conventions=Conventions(y_form="folded"),
                  device="cpu", notes=_notes(keras, tf, "keras.layers.LayerNormalization(axis=trailing axes)"))


# --------------------------------------------------------------------------- group and instance norm

def _group_kernel(name: str, op: str, groups_of) -> Kernel:
    tf, keras = _libs()

    def _layer(x, weight, bias, eps, groups, axis, full):
        c = np.asarray(x).shape[axis]
        layer = keras.layers.GroupNormalization(groups=groups, axis=axis, epsilon=float(eps),
                                                center=full or bias is not None, scale=full or weight is not None,
                                                dtype=_dtype_name(x))
        run = _Run(tf, layer, x)
        _weights(layer, weight, bias, (c,))
        return run

    def forward(x, weight=None, bias=None, *, eps, axis=1, num_groups=None):
        ax = axis % np.ndim(x)
        return as_numpy(_layer(x, weight, bias, eps, groups_of(num_groups), ax, False).forward())

    def backward(dy, x, weight=None, *, eps, axis=1, num_groups=None):
        ax = axis % np.ndim(x)
        run = _layer(x, weight, None, eps, groups_of(num_groups), ax, True)
        return run.grads(dy, (run.layer.gamma, run.layer.beta))

    return Kernel(name=name, op=op, forward=forward, backward=backward, dtypes=DTYPES, precision=_precision(),
                  updates_running=False, momentum_none=False, conventions=Conventions(y_form="folded"),
                  device="cpu", notes=_notes(keras, tf, "keras.layers.GroupNormalization"
                               + (" (groups=-1: instance normalization, no running statistics)"
                                  if op == "instance_norm" else "")))


def group_norm() -> Kernel:
    """keras.layers.GroupNormalization."""
    def groups(num_groups):
        if num_groups is None:
            raise ValueError("num_groups is None, expected the number of groups")
        return int(num_groups)

    return _group_kernel("keras-cpu group_norm", "group_norm", groups)


def instance_norm() -> Kernel:
    """keras.layers.GroupNormalization(groups=-1): instance normalization, training mode only."""
    return _group_kernel("keras-cpu instance_norm", "instance_norm", lambda _: -1)


# --------------------------------------------------------------------------- RMS norm

def rms_norm() -> Kernel:
    """keras.layers.RMSNormalization (Keras 3); scale only."""
    tf, keras = _libs()
    if not hasattr(keras.layers, "RMSNormalization"):
        raise KernelError(f"keras {keras.__version__} has no keras.layers.RMSNormalization (added in Keras 3.9)")

    def _layer(x, weight, eps, normalized_shape):
        nd = np.ndim(x)
        k = len(tuple(normalized_shape))
        layer = keras.layers.RMSNormalization(axis=list(range(nd - k, nd)), epsilon=float(eps),
                                              dtype=_dtype_name(x))
        run = _Run(tf, layer, x)
        _assign(layer.scale, np.ones(tuple(normalized_shape)) if weight is None else weight)
        return run

    def forward(x, weight=None, bias=None, *, eps, normalized_shape):
        run = _layer(x, weight, eps, normalized_shape)
        y = run.forward()
        if bias is not None:
            y = y + to_tensorflow(bias)
        return as_numpy(y)

    def backward(dy, x, weight=None, *, eps, normalized_shape):
        run = _layer(x, weight, eps, normalized_shape)
        b = tf.Variable(np.zeros(tuple(normalized_shape), dtype=np.asarray(x).dtype))
        return run.grads(dy, (run.layer.scale, b), post=lambda y: y + b)

    return Kernel(name="keras-cpu rms_norm", op="rms_norm", forward=forward, backward=backward, dtypes=DTYPES,
                  precision=_precision(extra_rounding=("y",), fp16_sums=("dbias",)),
                  device="cpu",
                  notes=_notes(keras, tf, "keras.layers.RMSNormalization; no bias in Keras (a given bias is "
                               "added after the layer, y + bias, and differentiated with it)"))


def _notes(keras, tf, text: str) -> str:
    return f"keras {keras.__version__} on tensorflow {tf.__version__}: {text}"


def _tf_add():
    """a + b (+ c) with TensorFlow's adds, in a's format (a residual bias in another format is added in
    float32 and the sum rounded once to a's)."""
    tf, _ = _libs()

    def add(a, b, c=None):
        out = tf.add(to_tensorflow(as_numpy(a)), to_tensorflow(as_numpy(b)))
        if c is not None:
            tc = to_tensorflow(as_numpy(c))
            out = tf.cast(tf.add(tf.cast(out, tf.float32), tf.cast(tc, tf.float32)), out.dtype) \
                if tc.dtype != out.dtype else tf.add(out, tc)
        return as_numpy(out)

    return add


def add_layer_norm() -> Kernel:
    """x + residual (+ residual_bias) with TensorFlow's adds, then keras.layers.LayerNormalization
    (conformance.adapters.residual)."""
    from .residual import compose

    return compose(layer_norm(), "add_layer_norm", _tf_add(), "TensorFlow")


def add_rms_norm() -> Kernel:
    """x + residual (+ residual_bias) with TensorFlow's adds, then keras.layers.RMSNormalization."""
    from .residual import compose

    return compose(rms_norm(), "add_rms_norm", _tf_add(), "TensorFlow")
