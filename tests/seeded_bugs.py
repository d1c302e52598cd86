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
                 saved: tuple[str, ...] | None = None):
        self.op = op
        self.storage = storage
        self.params = params or storage
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
        return np.asarray(a).astype(fmt.dtype_of(self.storage if kind == "storage" else self.params))

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
            outs["mean"] = self._out(mean.reshape(geo.stat_shape), "params")
        outs["rstd"] = self._out(rstd.reshape(geo.stat_shape), "params")
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
        y = self._center(xv, mean) * self._rstd(var, eps)
        w = self._weight(weight, geo)
        if w is not None:
            y = y * w
        if bias is not None:
            y = y + self._pview(bias, geo)
        return self._out(self._unview(y, geo), "storage")

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
    def kernel(self, name: str, notes: str = "") -> Kernel:
        """The kernel's honest declaration of what a correct kernel of this design does."""
        running = self.op in ("batch_norm", "instance_norm")
        outputs = ("y", *self.saved) + (("running_mean", "running_var") if running else ())
        prec = Precision(params=self.params, accumulate="float32")
        return Kernel(
            name=name, op=self.op,
            forward=self.forward, backward=self.backward,
            forward_eval=self.forward_eval if running else None,
            backward_eval=self.backward_eval if running else None,
            outputs=outputs, dtypes=(self.storage,),
            conventions=Conventions(momentum_convention="new", running_var_estimator="unbiased",
                                    eps_placement="inside", saved=self.saved, running="return"),
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


# ---------------------------------------------------------------- registry
@dataclass(frozen=True)
class SeededBug:
    """One seeded bug: the kernel with it, and the same code without it, declared alike."""

    key: str
    cls: type
    op: str
    storage: str = "float32"
    params: str | None = None

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
        impl = NumpyNorm(self.op, self.storage, self.params)
        return impl.kernel(f"correct {self.op} ({self.storage})")


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
)}


def correct_kernel(op: str, storage: str = "float32", params: str | None = None) -> Kernel:
    """The bug-free kernel of an op (what every SeededBug's ``correct`` returns)."""
    return NumpyNorm(op, storage, params).kernel(f"correct {op} ({storage})")
