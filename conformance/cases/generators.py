"""Inputs of a case, generated deterministically in float64 and rounded once to the kernel's dtypes."""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any

import numpy as np

from .. import dtypes, ops
from ..kernel import Precision
from ..ops.axes import statistic_index
from . import drawn
from .model import Case

__all__ = ["make_inputs", "group_index", "laid_out", "CANCELLATION", "LARGE_OFFSET"]

#: (mean, spread) of "cancellation" values per storage format: the mean is many
#: spreads away (condition number kappa = sqrt(1 + mean^2/var) of the variance,
#: Chan, Golub & LeVeque 1983), while the spread still covers several ULPs of the mean.
CANCELLATION = {
    "float64": (1e8, 1e-2),
    "float32": (1e4, 10.0),
    "float16": (2000.0, 8.0),
    "bfloat16": (1000.0, 16.0),
    "float8_e4m3fn": (64.0, 8.0),
    "float8_e5m2": (256.0, 64.0),
}


#: "large" values of centred ops: x = L (+-LARGE_OFFSET + z), z standard normal clipped to +-5, so the
#: mean is 64 spreads away and a one-pass sum of x^2 = n L^2 (64^2 + 1) overflows where the two-pass
#: sum of squared deviations n L^2 stays below 1/16 of the accumulation format's largest value.
LARGE_OFFSET = 64.0


def _large_scale(case: Case) -> float:
    """L of the "large" values: the largest spread whose second-pass sum n L^2 is 1/16 of the default
    accumulation format's largest value M_a (so max(S_1, S_2) <= M_a with room for a sample variance
    above L^2: ranges.py), within half the storage format's range for |x| <= L (64 + 5) (or 5 L for RMS
    norm, whose statistic is the sum of squares itself)."""
    acc = Precision(storage=case.dtype).resolved().accumulate
    m_a = float(dtypes.finfo(acc).max)
    m_s = float(dtypes.finfo(case.dtype).max)
    reach = (LARGE_OFFSET + 5.0) if ops.get(case.op).centered else 5.0
    return min(float(np.sqrt(m_a / (16.0 * case.group_length))), 0.5 * m_s / reach)


def group_index(case: Case) -> np.ndarray:
    """For every element of x (logical shape), the index of its normalization statistic."""
    return statistic_index(ops.get(case.op).axes.view(case), tuple(case.shape))


def _values(case: Case, rng: np.random.Generator) -> np.ndarray:
    shape, dt = case.shape, case.dtype
    kind = case.values
    if kind.startswith(drawn.PREFIX):  # the worst-case search's recipes (conformance.cases.drawn)
        return drawn.drawn_values(kind, shape, group_index(case), float(dtypes.finfo(dt).max), rng)
    if kind == "normal":
        return rng.standard_normal(shape)
    if kind == "cancellation":
        m, s = CANCELLATION[dt]
        return m + s * rng.standard_normal(shape)
    if kind == "constant":
        gi = group_index(case)
        per_group = rng.uniform(-3.0, 3.0, size=int(gi.max()) + 1)
        return per_group[gi].copy()
    if kind == "heavy_tail":
        cap = 0.25 * float(dtypes.finfo(dt).max) if dt in ("float16", "float8_e4m3fn", "float8_e5m2") else 1e6
        return np.clip(rng.standard_t(2.0, size=shape), -cap, cap)
    if kind == "near_overflow":
        big = float(dtypes.finfo(dt).max)
        return rng.choice([-1.0, 1.0], size=shape) * rng.uniform(0.5, 0.95, size=shape) * big
    if kind == "subnormal":
        tiny = float(dtypes.finfo(dt).smallest_normal)
        return rng.uniform(-1.0, 1.0, size=shape) * tiny
    if kind == "zeros":
        return np.zeros(shape)
    if kind == "large":
        scale = _large_scale(case)
        z = np.clip(rng.standard_normal(shape), -5.0, 5.0)
        if not ops.get(case.op).centered:
            return scale * z
        gi = group_index(case)
        sign = rng.choice([-1.0, 1.0], size=int(gi.max()) + 1)[gi]
        return scale * (LARGE_OFFSET * sign + z)
    if kind == "nonfinite":
        x = rng.standard_normal(shape)
        flat = x.reshape(-1)
        k = flat.size
        pos = rng.choice(k, size=min(3, k), replace=False)
        for p, v in zip(pos, (np.nan, np.inf, -np.inf)):
            flat[p] = v
        return x
    raise ValueError(f"unknown value kind {kind!r}")


def _param(kind: str, shape: tuple[int, ...], rng: np.random.Generator, role: str) -> np.ndarray | None:
    if kind == "none":
        return None
    if kind == "zero":
        return np.zeros(shape)
    if kind == "ones":
        return np.ones(shape)
    if kind == "negative":
        return -(0.5 + np.abs(rng.standard_normal(shape)))
    if kind == "random":
        return (1.0 + 0.5 * rng.standard_normal(shape)) if role == "weight" else 0.5 * rng.standard_normal(shape)
    raise ValueError(f"unknown parameter kind {kind!r}")


def laid_out(a: np.ndarray, strides: str) -> np.ndarray:
    """The same logical array, laid out in memory as the case asks."""
    if strides == "contiguous":
        return np.ascontiguousarray(a)
    if strides == "transposed":
        rev = tuple(reversed(range(a.ndim)))
        return np.ascontiguousarray(a.transpose(rev)).transpose(rev)
    if strides == "sliced":
        buf = np.zeros(a.shape[:-1] + (2 * a.shape[-1],), dtype=a.dtype)
        buf[..., ::2] = a
        return buf[..., ::2]
    if strides == "reversed":
        flip = (slice(None, None, -1),) * a.ndim
        return np.ascontiguousarray(a[flip])[flip]
    if strides == "channels_last_memory":
        perm = (0,) + tuple(range(2, a.ndim)) + (1,)
        inv = np.argsort(perm)
        return np.ascontiguousarray(a.transpose(perm)).transpose(inv)
    raise ValueError(f"unknown stride kind {strides!r}")


def _running(case: Case, x: np.ndarray, rng: np.random.Generator, params: str) -> tuple[np.ndarray, np.ndarray]:
    """Running statistics per channel, by ``case.running_values``:

    near     near the data's own (so eval-mode outputs stay O(1));
    far      the mean 32 spreads away, the variance 10^U(-1, 1) times the data's;
    wide     outside the storage format's range where the params format has it: |mean| in
             [R/2, R], R = min(4 M_s, M_p / 4, M_a / (16 m)), the variance near min((R/4)^2, M_p / 4),
             so that y = (x - mean) / sqrt(var) stays of order 4 (a kernel that converts them to the
             storage format overflows) and the backward's sums of dy (x - mean) over the m terms of a
             parameter stay inside the default accumulation format (M_a: ranges.py);
    at_mean  the mean +-1.5 2^(p-3) (p: the storage format's significand bits; at most M_s / 8),
             exactly representable, the variance 1: x is drawn by ``_at_mean`` on the grid of that
             mean's spacing, equal to it for about 10% of the elements (y = bias exactly there,
             where x * scale + (bias - mean * scale) cancels).
    """
    c = case.channels
    kind = case.running_values
    if kind == "wide":
        acc = Precision(storage=case.dtype).resolved().accumulate
        m_s, m_p, m_a = (float(dtypes.finfo(f).max) for f in (case.dtype, params, acc))
        reach = min(4.0 * m_s, 0.25 * m_p, m_a / (16.0 * case.param_length))
        rm = rng.choice([-1.0, 1.0], size=c) * rng.uniform(0.5, 1.0, size=c) * reach
        rv = min(reach / 4.0, float(np.sqrt(0.25 * m_p))) ** 2 * rng.uniform(0.5, 1.0, size=c)
        return rm, rv
    if kind == "at_mean":
        return _at_mean_stats(case, rng), np.ones(c)
    ax = case.channel_axis
    xm = np.moveaxis(np.where(np.isfinite(x), x, 0.0), ax, 0).reshape(c, -1)
    # correctly rounded sums (math.fsum): NumPy's reductions add in an order that follows the CPU's
    # vector width, and these values are part of each case's data, the same on every machine
    mean = np.array([math.fsum(r) for r in xm]) / xm.shape[1]
    var = np.array([math.fsum(d * d) for d in xm - mean[:, None]]) / xm.shape[1]
    scale = np.sqrt(var) + 1e-3
    if kind == "far":
        rm = mean + 32.0 * scale * rng.standard_normal(c)
        rv = (var + 0.05 * scale**2) * 10.0 ** rng.uniform(-1.0, 1.0, size=c)
        return rm, rv
    if kind != "near":
        raise ValueError(f"unknown running-statistic kind {kind!r}")
    rm = mean + 0.1 * scale * rng.standard_normal(c)
    rv = var * rng.uniform(0.8, 1.25, size=c) + 0.05 * scale**2
    return rm, rv


def _at_mean_exponent(dtype: str) -> int:
    fi = dtypes.finfo(dtype)
    p = int(fi.nmant) + 1
    return min(p - 3, int(np.floor(np.log2(float(fi.max) / 8.0))) - 1)


def _at_mean_stats(case: Case, rng: np.random.Generator) -> np.ndarray:
    """+-1.5 2^E per channel (E from _at_mean_exponent): 1.1 in binary, exact in every format here."""
    return rng.choice([-1.0, 1.0], size=case.channels) * 1.5 * 2.0 ** _at_mean_exponent(case.dtype)


def _at_mean(case: Case, rm: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """x around the running mean rm (per channel) on the grid of rm's spacing in the storage format,
    2^(E + 1 - p): rm + spacing round(4 z), z standard normal, so x = rm exactly where round(4 z) = 0."""
    fi = dtypes.finfo(case.dtype)
    step = 2.0 ** (_at_mean_exponent(case.dtype) + 1 - (int(fi.nmant) + 1))
    sh = [1] * len(case.shape)
    sh[case.channel_axis] = case.channels
    return rm.reshape(sh) + step * np.round(4.0 * rng.standard_normal(case.shape))


def make_inputs(case: Case, precision: Precision, seed: int) -> dict[str, Any]:
    """x, dy, weight, bias, running_mean, running_var for the case, in the kernel's dtypes (and residual,
    residual_bias, dh for a fused residual-add op: _residual).

    x and dy are in the storage dtype, laid out per ``case.strides``; parameters and
    running statistics in the params dtype. Values are drawn in float64 and rounded
    once (round to nearest even, via ml_dtypes/NumPy casts).
    """
    p = replace(precision, storage=case.dtype).resolved()
    rng = np.random.default_rng(case.seed_for(seed))
    x64 = _values(case, rng)
    dy64 = rng.standard_normal(case.shape)
    if case.dy == "ones":  # the gradient of a sum loss; the draw above keeps the stream of the other inputs
        dy64 = np.ones(case.shape)
    elif case.dy != "normal":
        raise ValueError(f"unknown upstream-gradient kind {case.dy!r}")
    spec = ops.get(case.op)
    ps = spec.axes.param_shape(case)
    w64 = _param(case.weight, ps, rng, "weight")
    b64 = _param(case.bias, ps, rng, "bias")
    st = dtypes.dtype_of(p.storage)
    pt = dtypes.dtype_of(p.params)
    x = laid_out(x64.astype(st), case.strides)
    dy = laid_out(dy64.astype(st), case.strides)
    out: dict[str, Any] = {
        "x": x,
        "dy": dy,
        "weight": None if w64 is None else w64.astype(pt),
        "bias": None if b64 is None else b64.astype(pt),
        "running_mean": None,
        "running_var": None,
    }
    if spec.has_eval and (case.mode == "eval" or case.running):
        rm, rv = _running(case, x.astype(np.float64), rng, p.params)
        out["running_mean"] = rm.astype(pt)
        out["running_var"] = rv.astype(pt)
        if case.running_values == "at_mean":
            out["x"] = laid_out(_at_mean(case, rm, rng).astype(st), case.strides)
    if spec.residual:
        out.update(_residual(case, x64, rng, st, pt, ps))
    return out


#: Value kinds whose structure a per-element split of h would break: h is split in a fixed ratio.
_SPLIT_FIXED = ("constant", "zeros", "nonfinite", "at_mean")


def _residual(case: Case, t64: np.ndarray, rng: np.random.Generator, st, pt, ps) -> dict[str, Any]:
    """x, residual, residual_bias and dh of a fused residual-add case, whose value kind describes h.

    The value kind's draw t is what h = x + residual (+ residual_bias) is meant to be: residual = f t
    with f ~ U(0.25, 0.75) per element (0.5 where the kind's structure must survive: constant rows,
    zeros, NaN and Inf, which the residual carries), x = t - residual - residual_bias, each rounded
    once to the storage format; so x and residual have varying exponent differences, and the add
    rounds where a kernel's would. residual_bias (cases with ``rbias``) is 0.5 N(0, 1) in the params
    format; dh is N(0, 1) in the storage format, laid out as dy. Drawn after every other input, so
    the other inputs are those of the same case without a residual.
    """
    fixed = case.values in _SPLIT_FIXED
    f = np.full(case.shape, 0.5) if fixed else rng.uniform(0.25, 0.75, size=case.shape)
    finite = np.isfinite(t64)
    r64 = np.where(finite, f * t64, t64).astype(st).astype(np.float64)
    rb = (0.5 * rng.standard_normal(ps)).astype(pt) if case.residual_bias else None
    with np.errstate(invalid="ignore", over="ignore"):
        x64 = np.where(finite, t64 - r64 - (0.0 if rb is None else rb.astype(np.float64)), 0.0)
    dh64 = rng.standard_normal(case.shape)
    return {"x": laid_out(x64.astype(st), case.strides), "residual": laid_out(r64.astype(st), case.strides),
            "residual_bias": rb, "dh": laid_out(dh64.astype(st), case.strides)}
