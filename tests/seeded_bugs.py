"""Seeded-bug kernels: small NumPy normalization kernels, each with exactly one realistic bug.

:class:`NumpyNorm` is a correct kernel for every op of the catalog. It reads
x and dy in their storage dtype, computes in float32 (two-pass moments,
float32 sums: the common practice for float32 and narrower storage), and
writes outputs back to the storage dtype (y, dx) or the params dtype (saved
statistics, running statistics, dweight, dbias). Each seeded bug is a
subclass that overrides exactly one step of it; its docstring names the bug
and the output it corrupts. :data:`BUGS` declares every buggy kernel as the
correct kernel it claims to be (the declaration states what it SHOULD do:
float32 accumulation, torch's conventions, eps inside the root) beside the
same code without the bug (:attr:`SeededBug.correct`), so that a test can
show that the bug, not the harness, makes the difference.

The scenario is invented: a team porting normalization kernels to a device
of their own keeps these NumPy ports as executable specifications, and each
bug below is one they might plausibly have written.
"""

from __future__ import annotations

import ctypes
import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.lib.array_utils import byte_bounds

from conformance import Conventions, Kernel, Precision
from conformance import dtypes as fmt

F32 = np.float32


# ---------------------------------------------------------------- geometry
@dataclass(frozen=True)
class _Geometry:
    """How a kernel views x: a canonical view, its reduction axes, parameter broadcast and shapes.

    Channel ops view x as (N, C, S) (batch and instance norm) or (N, G, C/G, S)
    (group norm) with the channel axis moved to position 1 and the spatial
    axes flattened into S; layer and RMS norm view x as (R, K) with the
    normalized axes flattened into K.
    """

    op: str
    shape: tuple[int, ...]
    axis: int                 # channel axis of x (channel ops); -1 for layer/RMS norm
    groups: int               # group norm only
    norm_ndim: int            # layer/RMS norm only

    @property
    def channels(self) -> int:
        return self.shape[self.axis]

    @property
    def cf_shape(self) -> tuple[int, ...]:
        """x's shape with the channel axis at position 1 (channels first)."""
        s = list(self.shape)
        c = s.pop(self.axis)
        return (s[0], c, *s[1:])

    @property
    def red(self) -> tuple[int, ...]:
        return {"batch_norm": (0, 2), "instance_norm": (2,), "group_norm": (2, 3)}.get(self.op, (1,))

    @property
    def param_red(self) -> tuple[int, ...]:
        return {"batch_norm": (0, 2), "instance_norm": (0, 2), "group_norm": (0, 3)}.get(self.op, (0,))

    @property
    def param_shape(self) -> tuple[int, ...]:
        if self.op in ("layer_norm", "rms_norm"):
            return self.shape[len(self.shape) - self.norm_ndim:]
        return (self.channels,)

    @property
    def stat_shape(self) -> tuple[int, ...]:
        """The public shape of a saved statistic."""
        if self.op == "batch_norm":
            return (self.channels,)
        if self.op == "instance_norm":
            return (self.shape[0], self.channels)
        if self.op == "group_norm":
            return (self.shape[0], self.groups)
        return self.shape[: len(self.shape) - self.norm_ndim]


class NumpyNorm:
    """A correct NumPy kernel of one op: storage-dtype I/O, float32 arithmetic.

    Forward:  mean = sum(x)/n, var = sum((x - mean)^2)/n (two passes),
              rstd = 1/sqrt(var + eps), y = (x - mean) * rstd * weight + bias.
    Backward: g = dy * weight, dx = rstd (g - mean(g) - xhat mean(g xhat)),
              dweight = sum(dy xhat), dbias = sum(dy) over the parameter's broadcast axes
              (Ioffe & Szegedy 2015, §3; Wu & He 2018, eq. 1-3 for the groups).
    Running statistics (batch and instance norm): r' = (1 - m) r + m s with the
    unbiased batch variance (torch's convention), or the cumulative average
    r + (s - r)/(seen + 1) with momentum None.
    """

    def __init__(self, op: str, storage: str = "float32", params: str | None = None,
                 saved: tuple[str, ...] | None = None, saved_format: str | None = None):
        self.op = op
        self.storage = storage
        self.params = params or storage
        self.saved_format = saved_format or self.params
        if saved is None:
            saved = ("rstd",) if op == "rms_norm" else ("mean", "rstd")
        self.saved = saved
        self.center = op != "rms_norm"

    # ---- the steps a bug may replace -------------------------------------------------
    def _read(self, a: np.ndarray) -> np.ndarray:
        """The input as the logical array it is (NumPy honours its strides)."""
        return np.asarray(a)

    def _split_groups(self, v: np.ndarray, groups: int) -> np.ndarray:
        """(N', C, S') -> (N', G, C/G, S'): contiguous groups, channel c in group c // (C/G) (Wu & He 2018, §3)."""
        n, c, s = v.shape
        return v.reshape(n, groups, c // groups, s)

    def _merge_groups(self, v: np.ndarray) -> np.ndarray:
        """The inverse of :meth:`_split_groups`."""
        n, g, cg, s = v.shape
        return v.reshape(n, g * cg, s)

    def _sum(self, t: np.ndarray, axes: tuple[int, ...]) -> np.ndarray:
        """A float32 sum over ``axes`` (keepdims): NumPy's pairwise summation along the inner axis."""
        return np.sum(t, axis=axes, keepdims=True, dtype=F32)

    def _moments(self, xv: np.ndarray, axes: tuple[int, ...], n: int) -> tuple[np.ndarray, np.ndarray]:
        """Two-pass mean and biased variance with a correction pass (Chan, Golub & LeVeque 1983, eq. 1.7).

        mean = m0 + sum(x - m0)/n with m0 = sum(x)/n; var = (sum(d^2) - (sum d)^2/n)/n with d = x - m0.
        Where m0 is +-Inf the correction (inf - inf = NaN) is dropped: the mean is m0, as IEEE 754
        arithmetic gives for sum(x)/n (IEEE 754-2019 §6.1) and as the oracle returns.
        """
        m0 = self._sum(xv, axes) / F32(n)
        d = xv - m0
        s1 = self._sum(d, axes)
        var = (self._sum(d * d, axes) - s1 * (s1 / F32(n))) / F32(n)
        return np.where(np.isfinite(m0), m0 + s1 / F32(n), m0), var

    def _mean_square(self, xv: np.ndarray, axes: tuple[int, ...], n: int) -> np.ndarray:
        return self._sum(xv * xv, axes) / F32(n)

    def _rstd(self, var: np.ndarray, eps: float) -> np.ndarray:
        """1/sqrt(var + eps): eps inside the square root."""
        return F32(1) / np.sqrt(var + F32(eps))

    def _center(self, xv: np.ndarray, mean: np.ndarray) -> np.ndarray:
        """x - mean into a new buffer."""
        return xv - mean

    def _running_var_stat(self, var: np.ndarray, n: int) -> np.ndarray:
        """The batch variance that enters running_var: unbiased, M2/(n - 1) (Bessel's correction)."""
        return var * F32(n / (n - 1)) if n > 1 else np.full_like(var, np.nan)

    def _ema(self, r: np.ndarray, s: np.ndarray, momentum: float | None, seen: int | None) -> np.ndarray:
        """r' = (1 - m) r + m s: momentum weights the new batch value."""
        if momentum is None:
            return r + (s - r) / F32(seen + 1)
        m = F32(momentum)
        return (F32(1) - m) * r + m * s

    def _param_sum(self, t: np.ndarray, axes: tuple[int, ...], geo: _Geometry, which: str) -> np.ndarray:
        """dweight or dbias (``which``): a float32 sum of the terms over the parameter's broadcast axes."""
        return self._sum(t, axes)

    def _dx_train(self, g: np.ndarray, xhat: np.ndarray, rstd: np.ndarray, axes: tuple[int, ...],
                  n: int) -> np.ndarray:
        """dx = rstd (g - mean(g) - xhat mean(g xhat)): the statistics depend on x (Ioffe & Szegedy 2015, §3)."""
        gc = g - self._sum(g, axes) / F32(n) if self.center else g
        k = self._sum(g * xhat, axes) / F32(n)
        return rstd * (gc - xhat * k)

    def _eval_stats(self, xv: np.ndarray, geo: _Geometry, running_mean: np.ndarray,
                    running_var: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Eval mode normalizes with the running statistics (constants)."""
        return self._pview(running_mean, geo), self._pview(running_var, geo)

    def _weight(self, w: Any, geo: _Geometry) -> np.ndarray | None:
        """The weight broadcast to the view, or None for a layer without one."""
        return None if w is None else self._pview(w, geo)

    def _await_tiles(self, rows: int) -> None:
        """The emulated device computes the row tiles in order: nothing to wait for."""

    # ---- views ----------------------------------------------------------------------
    def _geometry(self, x: np.ndarray, kw: dict[str, Any]) -> _Geometry:
        if self.op in ("layer_norm", "rms_norm"):
            ns = kw["normalized_shape"]
            ns = (ns,) if isinstance(ns, int) else tuple(ns)
            return _Geometry(self.op, x.shape, -1, 0, len(ns))
        axis = kw.get("axis", 1) % x.ndim
        return _Geometry(self.op, x.shape, axis, kw.get("num_groups", 0) or 0, 0)

    def _view(self, a: np.ndarray, geo: _Geometry) -> np.ndarray:
        """The logical array ``a`` (x's shape) in the canonical view."""
        if self.op in ("layer_norm", "rms_norm"):
            k = math.prod(geo.param_shape)
            return a.reshape(-1, k)
        cf = np.moveaxis(a, geo.axis, 1)
        v = cf.reshape(cf.shape[0], cf.shape[1], -1)
        return self._split_groups(v, geo.groups) if self.op == "group_norm" else v

    def _unview(self, v: np.ndarray, geo: _Geometry) -> np.ndarray:
        if self.op in ("layer_norm", "rms_norm"):
            return v.reshape(geo.shape)
        if self.op == "group_norm":
            v = self._merge_groups(v)
        return np.moveaxis(v.reshape(geo.cf_shape), 1, geo.axis)

    def _pview(self, p: Any, geo: _Geometry) -> np.ndarray:
        """A parameter or per-channel statistic, float32, broadcastable against the view."""
        a = np.asarray(p).astype(F32)
        if self.op in ("layer_norm", "rms_norm"):
            return a.reshape(1, -1)
        v = a.reshape(1, -1, 1)
        return self._split_groups(v, geo.groups) if self.op == "group_norm" else v

    def _kd(self, geo: _Geometry, view_shape: tuple[int, ...]) -> tuple[int, ...]:
        return tuple(1 if i in geo.red else d for i, d in enumerate(view_shape))

    def _out(self, a: np.ndarray, kind: str) -> np.ndarray:
        """An output in its format: kind "storage" (y, dx), "saved" (saved statistics) or "params"."""
        name = {"storage": self.storage, "saved": self.saved_format}.get(kind, self.params)
        return np.asarray(a).astype(fmt.dtype_of(name))

    # ---- entry points ---------------------------------------------------------------
    def forward(self, x, weight=None, bias=None, *, eps, running_mean=None, running_var=None,
                momentum=0.1, batches_seen=0, **kw):
        x = self._read(x)
        geo = self._geometry(x, kw)
        xv = self._view(x, geo).astype(F32, copy=False)
        n = math.prod(xv.shape[a] for a in geo.red)
        if self.op in ("layer_norm", "rms_norm"):
            self._await_tiles(xv.shape[0])
        if self.center:
            mean, var = self._moments(xv, geo.red, n)
            rstd = self._rstd(var, eps)
            y = self._center(xv, mean) * rstd
        else:
            mean, var = None, self._mean_square(xv, geo.red, n)
            rstd = self._rstd(var, eps)
            y = xv * rstd
        w = self._weight(weight, geo)
        if w is not None:
            y = y * w
        if bias is not None:
            y = y + self._pview(bias, geo)
        outs: dict[str, Any] = {"y": self._out(self._unview(y, geo), "storage")}
        if mean is not None:
            outs["mean"] = self._out(mean.reshape(geo.stat_shape), "saved")
        outs["rstd"] = self._out(rstd.reshape(geo.stat_shape), "saved")
        names = ["y", *self.saved]
        if self.op in ("batch_norm", "instance_norm"):
            rm = rv = None
            if running_mean is not None:
                sv = self._running_var_stat(var, n)
                bm, bv = mean.reshape(-1, geo.channels), sv.reshape(-1, geo.channels)
                if self.op == "instance_norm":  # average of the per-instance statistics
                    bm = np.mean(bm, axis=0, dtype=F32)
                    bv = np.mean(bv, axis=0, dtype=F32)
                rm = self._out(self._ema(np.asarray(running_mean).astype(F32), bm.reshape(-1), momentum,
                                         batches_seen), "params")
                rv = self._out(self._ema(np.asarray(running_var).astype(F32), bv.reshape(-1), momentum,
                                         batches_seen), "params")
            outs["running_mean"], outs["running_var"] = rm, rv
            names += ["running_mean", "running_var"]
        return tuple(outs[k] for k in names)

    def forward_eval(self, x, weight=None, bias=None, *, eps, running_mean, running_var, **kw):
        x = self._read(x)
        geo = self._geometry(x, kw)
        xv = self._view(x, geo).astype(F32, copy=False)
        mean, var = self._eval_stats(xv, geo, running_mean, running_var)
        w = self._weight(weight, geo)
        b = None if bias is None else self._pview(bias, geo)
        y = self._eval_y(xv, mean, self._rstd(var, eps), w, b)
        return self._out(self._unview(y, geo), "storage")

    def _eval_y(self, xv, mean, rstd, w, b):
        """The centred form (x - mean) * rstd * weight + bias."""
        y = self._center(xv, mean) * rstd
        if w is not None:
            y = y * w
        return y if b is None else y + b

    def backward(self, dy, x, weight=None, *, eps, mean=None, rstd=None, **kw):
        x, dy = self._read(x), self._read(dy)
        geo = self._geometry(x, kw)
        xv = self._view(x, geo).astype(F32)
        dyv = self._view(dy, geo).astype(F32)
        n = math.prod(xv.shape[a] for a in geo.red)
        kd = self._kd(geo, xv.shape)
        if rstd is None:  # no saved statistics: recompute them
            if self.center:
                m, var = self._moments(xv, geo.red, n)
            else:
                m, var = None, self._mean_square(xv, geo.red, n)
            r = self._rstd(var, eps)
        else:
            r = np.asarray(rstd).astype(F32).reshape(kd)
            m = None if mean is None else np.asarray(mean).astype(F32).reshape(kd)
        xhat = (xv - m) * r if self.center else xv * r
        w = self._weight(weight, geo)
        g = dyv if w is None else dyv * w
        dx = self._dx_train(g, xhat, r, geo.red, n)
        return self._grads(dx, dyv, xhat, geo)

    def backward_eval(self, dy, x, weight=None, *, eps, running_mean, running_var, **kw):
        x, dy = self._read(x), self._read(dy)
        geo = self._geometry(x, kw)
        xv = self._view(x, geo).astype(F32)
        dyv = self._view(dy, geo).astype(F32)
        m, var = self._pview(running_mean, geo), self._pview(running_var, geo)
        r = self._rstd(var, eps)
        xhat = (xv - m) * r
        w = self._weight(weight, geo)
        g = dyv if w is None else dyv * w
        return self._grads(g * r, dyv, xhat, geo)

    def _grads(self, dx, dyv, xhat, geo):
        dw = self._param_sum(dyv * xhat, geo.param_red, geo, "dweight")
        db = self._param_sum(dyv, geo.param_red, geo, "dbias")
        ps = geo.param_shape
        if self.op == "group_norm":  # (1, G, C/G, 1) back to channel order
            dw, db = self._merge_groups(dw), self._merge_groups(db)
        return (self._out(self._unview(dx, geo), "storage"), self._out(dw.reshape(ps), "params"),
                self._out(db.reshape(ps), "params"))

    # ---- declaration ----------------------------------------------------------------
    def kernel(self, name: str, notes: str = "", precision: dict | None = None,
               conventions: dict | None = None) -> Kernel:
        """The kernel's declaration of what a correct kernel of this design does; ``precision`` and
        ``conventions`` add fields to it (the honest declaration of a design that needs them)."""
        running = self.op in ("batch_norm", "instance_norm")
        outputs = ("y", *self.saved) + (("running_mean", "running_var") if running else ())
        extra = {"params": self.params, "accumulate": "float32", **(precision or {})}
        if self.saved_format != self.params:
            extra.setdefault("saved", self.saved_format)
        prec = Precision(**extra)
        return Kernel(
            name=name, op=self.op,
            forward=self.forward, backward=self.backward,
            forward_eval=self.forward_eval if running else None,
            backward_eval=self.backward_eval if running else None,
            outputs=outputs, dtypes=(self.storage,),
            conventions=Conventions(momentum_convention="new", running_var_estimator="unbiased",
                                    eps_placement="inside", saved=self.saved, running="return",
                                    **(conventions or {})),
            precision={self.storage: prec},
            notes=notes or f"NumPy port: {self.storage} storage, {self.params} params, float32 arithmetic",
        )


# ---------------------------------------------------------------- the seeded bugs
class BiasedRunningVar(NumpyNorm):
    """Bug: running_var is updated with the biased batch variance M2/n, while the declaration
    says unbiased M2/(n - 1) (Bessel's correction; torch.nn.BatchNorm2d docs: the moving average
    of the variance uses the unbiased estimator, torch.var(input, unbiased=True)).
    Corrupts: running_var."""

    def _running_var_stat(self, var, n):
        return var


class FlippedMomentum(NumpyNorm):
    """Bug: r' = m r + (1 - m) s (momentum weights the old value, the Keras convention) while the
    declaration says momentum weights the new value (torch.nn.BatchNorm2d docs, the update rule
    of the running statistics: new = (1 - momentum) old + momentum observed).
    Corrupts: running_mean, running_var."""

    def _ema(self, r, s, momentum, seen):
        if momentum is None:
            return r + (s - r) / F32(seen + 1)
        m = F32(momentum)
        return m * r + (F32(1) - m) * s


class EpsOutsideSqrt(NumpyNorm):
    """Bug: rstd = 1/(sqrt(var) + eps) instead of the declared 1/sqrt(var + eps)
    (Ioffe & Szegedy 2015, Alg. 1; Ba, Kiros & Hinton 2016, eq. 4: numbers from memory).
    Corrupts: y, rstd, dx;
    visibly only where eps is not negligible next to var (eps = 0.1, zero-variance groups)."""

    def _rstd(self, var, eps):
        return F32(1) / (np.sqrt(var) + F32(eps))


class OnePassVariance(NumpyNorm):
    """Bug: var = E[x^2] - E[x]^2 in float32, which cancels catastrophically when |mean| >> std
    (Chan, Golub & LeVeque 1983, §1, the textbook one-pass formula; Higham 2002, §1.9: sections
    from memory).
    Corrupts: rstd and y (and dx through the saved rstd) on the cancellation cases."""

    def _moments(self, xv, axes, n):
        mean = self._sum(xv, axes) / F32(n)
        return mean, self._sum(xv * xv, axes) / F32(n) - mean * mean


class LowPrecisionParamGrads(NumpyNorm):
    """Bug: dweight and dbias are accumulated in bfloat16 (the storage format: each partial sum
    rounded to 8 significand bits, recursive order) while the declaration says float32
    accumulation. Long sums stagnate once the partial sum outgrows the terms by 2^8
    (Higham 2002, §4.2: error of recursive summation ~ n u). Corrupts: dweight, dbias."""

    def _param_sum(self, t, axes, geo, which):
        low = fmt.dtype_of(self.storage)
        return np.sum(t.astype(low), axis=axes, keepdims=True).astype(F32)


class InterleavedGroups(NumpyNorm):
    """Bug: group norm puts channel c in group c % G (interleaved) instead of the contiguous
    group c // (C/G) of Wu & He 2018, §3 (groups of consecutive channels; section from memory;
    torch.nn.GroupNorm and Keras GroupNormalization split the same way). Corrupts: y, mean,
    rstd, dx wherever 1 < G < C."""

    def _split_groups(self, v, groups):
        n, c, s = v.shape
        return v.reshape(n, c // groups, groups, s).transpose(0, 2, 1, 3)

    def _merge_groups(self, v):
        n, g, cg, s = v.shape
        return v.transpose(0, 2, 1, 3).reshape(n, g * cg, s)


class ConstantStatsBackward(NumpyNorm):
    """Bug: the train-mode backward treats mean and variance as constants, dx = rstd * dy * weight
    (the eval-mode gradient), dropping the terms from d mean/dx and d var/dx
    (Ioffe & Szegedy 2015, §3, the chain rule through mu_B and sigma_B^2; section from memory).
    Corrupts: dx."""

    def _dx_train(self, g, xhat, rstd, axes, n):
        return rstd * g


class FirstSpatialAxisOnly(NumpyNorm):
    """Bug: dweight sums over the batch axis and only as many spatial positions as the FIRST
    spatial axis has (the length taken as x.shape[2], written for rank-3 inputs, instead of
    prod(x.shape[2:])). Right for rank <= 3, wrong for rank > 3. dweight_c must sum
    dy * xhat over every axis but the channel (Ioffe & Szegedy 2015, Alg. 1 and §3).
    Corrupts: dweight on rank-4 and rank-5 cases."""

    def _param_sum(self, t, axes, geo, which):
        if which == "dweight" and len(geo.cf_shape) > 2:
            t = t[:, :, : geo.cf_shape[2]]
        return self._sum(t, axes)


class StridesIgnored(NumpyNorm):
    """Bug: x and dy are read as raw memory: x.size elements from the lowest address of the
    array's buffer, in address order, as if every input were C-contiguous in its logical order
    (the NumPy analogue of taking a tensor's data pointer without making it contiguous first).
    Right for C-contiguous inputs only; wrong for channels_last memory, transposed, reversed
    (negative) and sliced strides (NumPy reference: ndarray.strides, the byte offset of element
    (i0, i1, ...) is sum(i_k * strides[k])). Corrupts: y, mean, rstd, dx, dweight, dbias."""

    def _read(self, a):
        a = np.asarray(a)
        if a.flags.c_contiguous:
            return a
        lo, _ = byte_bounds(a)
        raw = (ctypes.c_char * (a.size * a.itemsize)).from_address(lo)  # inside a's buffer
        return np.frombuffer(raw, dtype=a.dtype).reshape(a.shape).copy()


class DroppedTail(NumpyNorm):
    """Bug: every reduction runs over 8-wide blocks (as an 8-lane SIMD loop would) and drops the
    remaining n % 8 elements, while still dividing by n. Corrupts: y, rstd, dx (and dweight)
    whenever the normalized length is not a multiple of 8 (common practice: a vector loop
    needs a scalar remainder loop)."""

    def _sum(self, t, axes):
        last = t.ndim - 1
        if last in axes:
            k = t.shape[last] - t.shape[last] % 8
            t = t[..., :k]
        return np.sum(t, axis=axes, keepdims=True, dtype=F32)


class EvalUsesBatchStats(NumpyNorm):
    """Bug: eval mode (training=False) normalizes with the batch's own mean and variance instead
    of running_mean and running_var (Ioffe & Szegedy 2015, Alg. 2, from memory: inference uses
    the population statistics; torch.nn.BatchNorm2d docs: the running estimates are used for
    normalization during evaluation). Corrupts: y in eval mode."""

    def _eval_stats(self, xv, geo, running_mean, running_var):
        n = math.prod(xv.shape[a] for a in geo.red)
        return self._moments(xv, geo.red, n)


class InPlaceCentering(NumpyNorm):
    """Bug: forward subtracts the mean from x in place, in the caller's buffer, to save a
    temporary: np.subtract(x, mean, out=x) on the float32 input itself (astype(copy=False)
    aliases it). The outputs of that forward call are right; the caller's x is destroyed
    (a kernel must not write its inputs: common practice). Shows as: modified input x."""

    def _center(self, xv, mean):
        np.subtract(xv, mean, out=xv)
        return xv


class NullWeightCrash(NumpyNorm):
    """Bug: the weight pointer is dereferenced without a check for a layer without weight
    (weight=None): a read of address 0, a segfault that kills the process. Shows as: crashed,
    on the cases with w=none only."""

    def _weight(self, w, geo):
        if w is None:
            ctypes.string_at(0)  # what reading a null weight pointer does on the device
        return super()._weight(w, geo)


class SingleRowHang(NumpyNorm):
    """Bug: the forward waits at a barrier until both of its two row tiles report done; with a
    single row the second tile is empty, never reports, and the kernel waits forever.
    Shows as: timed out, on the cases with one row only."""

    def _await_tiles(self, rows):
        tiles = (math.ceil(rows / 2), rows - math.ceil(rows / 2))
        reported = sum(1 for t in tiles if t > 0)  # a tile reports once it has computed its rows
        while reported < 2:
            time.sleep(0.05)


# ---------------------------------------------------------------- range and declaration bugs
def _tree_sum(t: np.ndarray, axes: tuple[int, ...], dtype) -> np.ndarray:
    """A balanced binary tree sum over ``axes`` (keepdims), every partial sum rounded to ``dtype``
    (Higham 2002, §4.2, pairwise summation)."""
    t = np.asarray(t)
    keep = [a for a in range(t.ndim) if a not in axes]
    moved = np.transpose(t, keep + list(axes))
    a = moved.reshape(moved.shape[: len(keep)] + (-1,)).astype(dtype)
    while a.shape[-1] > 1:
        if a.shape[-1] % 2:
            a = np.concatenate([a, np.zeros(a.shape[:-1] + (1,), dtype)], axis=-1)
        a = (a[..., 0::2] + a[..., 1::2]).astype(dtype)
    kd = tuple(1 if i in axes else d for i, d in enumerate(t.shape))
    return a[..., 0].reshape(kd).astype(F32)


class HalfParamSums(NumpyNorm):
    """Bug: dweight and dbias are summed in float16 by a balanced tree (every partial sum rounded to
    binary16), while the declaration says float32 accumulation. On a constant upstream gradient (dy = 1,
    a sum loss) over 2^17 terms the tree's top partial sums pass 65504, float16's largest value
    (IEEE 754-2019 binary16), and dbias overflows to +Inf (§7.4) where the answer, 131072, fits the
    float32 parameters. Corrupts: dbias (Inf on dy=ones), dweight."""

    def _param_sum(self, t, axes, geo, which):
        return _tree_sum(t, axes, np.float16)


class EpsInStorageFormat(NumpyNorm):
    """Bug: eps is converted to the storage format before it is added (eps = x.dtype.type(eps), a kernel
    that types its eps argument like its input): 1e-12 is 0 in float16, whose smallest subnormal is
    2^-24 ~ 6e-8 (IEEE 754-2019 binary16), so a zero-variance group gets rstd = 1/sqrt(0) = Inf and
    y = 0 * Inf = NaN where the answer is the bias. Corrupts: rstd, y, dx, dweight on zero-variance
    groups (and, by eps's own rounding, wherever eps is not negligible next to the variance)."""

    def _rstd(self, var, eps):
        return F32(1) / np.sqrt(var + F32(fmt.dtype_of(self.storage).type(eps)))


class FoldedEval(NumpyNorm):
    """Eval mode folds the normalization into y = x * scale + shift, scale = weight * rstd, shift =
    bias - running_mean * scale, in float32: shift's rounding, u |running_mean scale| (Higham 2002,
    §2.1), cancels against x * scale where |running_mean| is large against the spread. Declared centred
    (the default) it is a bug: on x equal to the running mean (1.5 2^21 in float32) y errs by about
    0.2 where the answer is the bias. Declared Conventions(y_form="folded") it is a correct kernel of
    that form. Corrupts (declared centred): y in eval mode."""

    def _eval_y(self, xv, mean, rstd, w, b):
        scale = rstd if w is None else rstd * w
        shift = -(mean * scale) if b is None else b - mean * scale
        return xv * scale + shift


class RunningStatsInStorage(NumpyNorm):
    """Bug: eval mode converts running_mean and running_var to the storage format (float16) before use,
    though they arrive in the float32 parameter format: values beyond 65504 (float16's largest, IEEE
    754-2019 binary16) become Inf and y becomes NaN or Inf (running statistics outside the storage
    range, running=wide). Corrupts: y in eval mode."""

    def _eval_stats(self, xv, geo, running_mean, running_var):
        st = fmt.dtype_of(self.storage)
        with np.errstate(over="ignore"):
            return (self._pview(np.asarray(running_mean).astype(st), geo),
                    self._pview(np.asarray(running_var).astype(st), geo))


class SaturatingCast(NumpyNorm):
    """Outputs are converted with saturation: values beyond the format's largest finite value become
    +-that value (448 in float8_e4m3fn; the OCP 8-bit floating point specification v1.0's saturating
    conversion, from memory). Declared with the default overflow="nonsaturating" (out of range is NaN in
    float8_e4m3fn, ml_dtypes' cast) it is a bug; declared Precision(overflow="saturate") it is correct.
    Corrupts (declared nonsaturating): dx where the oracle's value is beyond 448 (constant and
    all-zero groups, whose dx is r (g - mean(g)) with r = 1/sqrt(eps))."""

    def _out(self, a, kind):
        name = {"storage": self.storage, "saved": self.saved_format}.get(kind, self.params)
        big = float(fmt.finfo(name).max)
        a = np.asarray(a, dtype=np.float64)
        return np.where(np.isnan(a), a, np.clip(a, -big, big)).astype(fmt.dtype_of(name))


class StatsRoundedToStorage(NumpyNorm):
    """The mean and rstd are rounded to the storage format (bfloat16) before y is computed and before
    they are saved, with the sums in float32: what ATen's bfloat16 batch-norm statistics pass does
    (docs/library-precision.md). Declared with the statistics in float32 (the default) it is a bug: the
    mean's rounding, u_bf16 |mean| = 2^-9 |mean|, moves y by |mean| r 2^-9. Declared
    Precision(statistics="bfloat16") it is correct. Corrupts (undeclared): y, mean, rstd, dx."""

    def _moments(self, xv, axes, n):
        mean, var = super()._moments(xv, axes, n)
        return mean.astype(fmt.dtype_of(self.storage)).astype(F32), var

    def _rstd(self, var, eps):
        return super()._rstd(var, eps).astype(fmt.dtype_of(self.storage)).astype(F32)


LANES = 256


class WelfordNorm(NumpyNorm):
    """A correct kernel of another design: Welford's update per lane (element i of a group in lane
    i % 256, as a GPU block strides), m_k = m + (x - m)/k, M2_k = M2 + (x - m)(x - m_k) (Welford 1962),
    then a pairwise merge of the lanes with Chan, Golub & LeVeque's update for two parts: delta =
    mean_b - mean_a, mean = mean_a + delta n_b/n, M2 = M2_a + M2_b + delta (delta n_a n_b/n) (their
    eq. 1.5b, from memory). A lane left empty (groups of fewer than 256 elements) has n = 0 and is
    skipped by the merge. On a group holding +-Inf the updates form Inf - Inf, so its mean is NaN where
    two passes give +-Inf: the harness accepts that difference, the group's y being NaN either way."""

    def _merge(self, na, ma, qa, nb, mb, qb):
        n = na + nb
        safe = np.where(n > 0, n, F32(1))
        delta = mb - ma
        mean = np.where(nb == 0, ma, np.where(na == 0, mb, ma + delta * (nb / safe)))
        m2 = np.where(nb == 0, qa, np.where(na == 0, qb, qa + qb + delta * (delta * (na * nb / safe))))
        return n, mean, m2

    def _moments(self, xv, axes, n):
        keep = [a for a in range(xv.ndim) if a not in axes]
        moved = np.transpose(xv, keep + list(axes))
        X = moved.reshape(-1, n).astype(F32)
        steps = -(-n // LANES)
        pad = steps * LANES - n
        Xp = np.concatenate([X, np.zeros((X.shape[0], pad), F32)], axis=1).reshape(X.shape[0], steps, LANES)
        valid = (np.arange(steps * LANES) < n).reshape(steps, LANES)
        mean = np.zeros((X.shape[0], LANES), F32)
        m2 = np.zeros((X.shape[0], LANES), F32)
        cnt = np.zeros(LANES, F32)
        with np.errstate(invalid="ignore", over="ignore"):
            for k in range(steps):
                v = valid[k]
                cnt = cnt + v
                xk = Xp[:, k, :]
                d = xk - mean
                new = np.where(v, mean + d / np.where(cnt > 0, cnt, F32(1)), mean)
                m2 = np.where(v, m2 + d * (xk - new), m2)
                mean = new
            cnt = np.broadcast_to(cnt, mean.shape).astype(F32)
            while mean.shape[1] > 1:
                cnt, mean, m2 = self._merge(cnt[:, 0::2], mean[:, 0::2], m2[:, 0::2],
                                            cnt[:, 1::2], mean[:, 1::2], m2[:, 1::2])
        kd = tuple(1 if i in axes else d for i, d in enumerate(xv.shape))
        out_shape = tuple(xv.shape[a] for a in keep)
        # keepdims arrays in xv's axis order (the moved order keeps the other axes in order)
        return (np.reshape(mean[:, 0], out_shape).reshape(kd), np.reshape(m2[:, 0] / F32(n), out_shape).reshape(kd))


class MergeSquaresOverflow(WelfordNorm):
    """Bug: the merge forms delta^2 before scaling it, M2 = M2_a + M2_b + delta^2 (n_a n_b/n), and merges
    empty lanes like full ones (their mean is 0): delta is then a whole mean, and delta^2 overflows
    float32 once |mean| passes sqrt(3.4e38) ~ 1.8e19 (IEEE 754-2019 binary32), giving Inf * 0 = NaN,
    though every sum of the two-pass algorithm stays far inside float32's range there. Corrupts:
    rstd, y, dx, dweight on large data (|x| ~ 3e19) only."""

    def _merge(self, na, ma, qa, nb, mb, qb):
        n = na + nb
        safe = np.where(n > 0, n, F32(1))
        delta = mb - ma
        return n, ma + delta * (nb / safe), qa + qb + (delta * delta) * (na * nb / safe)


class EmptyMergeNaN(WelfordNorm):
    """Bug: the merge divides by the merged count without a guard, so two empty lanes (n_a = n_b = 0,
    every group of fewer than 255 elements has them) give n_b/n = 0/0 = NaN (IEEE 754-2019 §7.2), and
    the NaN spreads up the merge tree: the mean is NaN where the answer is finite. (Unlike the NaN mean
    of a group holding +-Inf, this is a wrong answer.) Corrupts: mean and everything computed from it."""

    def _merge(self, na, ma, qa, nb, mb, qb):
        n = na + nb
        delta = mb - ma
        return n, ma + delta * (nb / n), qa + qb + delta * (delta * (na * nb / n))


class FlushSubnormals(NumpyNorm):
    """Subnormals are flushed to zero: inputs below float32's smallest normal value 2^-126 are read as
    0 and outputs below their format's smallest normal value are written as 0 (FTZ/DAZ; IEEE 754-2019
    §3.3 defines the subnormals it drops; common practice on accelerators and with fast-math flags).
    Declared Precision(subnormals="flush") it is a correct kernel of that arithmetic; declared with the
    default "keep" it fails the subnormal cases. Corrupts (undeclared): mean, dweight, y, dx on
    subnormal data."""

    def _read(self, a):
        a = np.asarray(a)
        with np.errstate(invalid="ignore"):
            tiny = np.finfo(F32).tiny
            return np.where(np.abs(a.astype(F32)) < tiny, np.zeros((), a.dtype), a)

    def _weight(self, w, geo):
        return None if w is None else self._pview(self._read(w), geo)

    def _out(self, a, kind):
        out = super()._out(a, kind)
        tiny = float(fmt.finfo(fmt.name_of(out.dtype)).smallest_normal)
        with np.errstate(invalid="ignore"):
            return np.where(np.abs(out.astype(np.float64)) < tiny, np.zeros((), out.dtype), out)


# ---------------------------------------------------------------- registry
@dataclass(frozen=True)
class SeededBug:
    """One seeded bug: the kernel with it, and the same code without it, declared alike."""

    key: str
    cls: type
    op: str
    storage: str = "float32"
    params: str | None = None
    base: type = NumpyNorm      # the same design without the bug (another correct design for some bugs)

    @property
    def doc(self) -> str:
        return " ".join((self.cls.__doc__ or "").split())

    @property
    def kernel(self) -> Kernel:
        """The buggy kernel, declared as the correct kernel it claims to be."""
        impl = self.cls(self.op, self.storage, self.params)
        return impl.kernel(f"seeded bug {self.key}: {self.op}", notes=self.doc)

    @property
    def correct(self) -> Kernel:
        """The same code without the bug (the base class), with the same declaration."""
        impl = self.base(self.op, self.storage, self.params)
        return impl.kernel(f"correct {self.op} ({self.storage}, {self.base.__name__})")


BUGS: dict[str, SeededBug] = {b.key: b for b in (
    SeededBug("biased_running_var", BiasedRunningVar, "batch_norm"),
    SeededBug("flipped_momentum", FlippedMomentum, "instance_norm"),
    SeededBug("eps_outside_sqrt", EpsOutsideSqrt, "layer_norm"),
    SeededBug("one_pass_variance", OnePassVariance, "layer_norm"),
    SeededBug("bf16_param_grads", LowPrecisionParamGrads, "batch_norm", "bfloat16", "float32"),
    SeededBug("interleaved_groups", InterleavedGroups, "group_norm"),
    SeededBug("constant_stats_backward", ConstantStatsBackward, "group_norm"),
    SeededBug("dweight_first_spatial_axis", FirstSpatialAxisOnly, "batch_norm"),
    SeededBug("strides_ignored", StridesIgnored, "batch_norm"),
    SeededBug("dropped_tail", DroppedTail, "rms_norm"),
    SeededBug("eval_batch_stats", EvalUsesBatchStats, "batch_norm"),
    SeededBug("inplace_input", InPlaceCentering, "layer_norm"),
    SeededBug("null_weight_crash", NullWeightCrash, "group_norm"),
    SeededBug("single_row_hang", SingleRowHang, "rms_norm"),
    # The range and declaration bugs (issue: value ranges and inputs real bugs live in).
    SeededBug("half_param_sums", HalfParamSums, "layer_norm", "float16", "float32"),
    SeededBug("eps_in_storage_format", EpsInStorageFormat, "layer_norm", "float16", "float32"),
    SeededBug("folded_eval", FoldedEval, "batch_norm"),
    SeededBug("running_stats_in_storage", RunningStatsInStorage, "batch_norm", "float16", "float32"),
    SeededBug("saturating_cast", SaturatingCast, "layer_norm", "float8_e4m3fn", "float32"),
    SeededBug("stats_rounded_to_storage", StatsRoundedToStorage, "layer_norm", "bfloat16", "float32"),
    SeededBug("merge_squares_overflow", MergeSquaresOverflow, "layer_norm", base=WelfordNorm),
    SeededBug("empty_merge_nan", EmptyMergeNaN, "layer_norm", base=WelfordNorm),
    SeededBug("flush_undeclared", FlushSubnormals, "layer_norm"),
)}


def correct_kernel(op: str, storage: str = "float32", params: str | None = None) -> Kernel:
    """The bug-free kernel of an op (what every SeededBug's ``correct`` returns)."""
    return NumpyNorm(op, storage, params).kernel(f"correct {op} ({storage})")
