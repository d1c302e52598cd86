"""A normalization written out on the op's canonical view, with the steps a bug may change as arguments.

Used only by the diagnosis: the oracle (refnorm) stays the one reference; this model reproduces a
kernel that made one specific mistake, so that the kernel's outputs can be compared with what that
mistake gives. On the view of conformance.ops.axes (statistics over ``view.red``, parameters over
``view.param_red``), for the canonical arguments (nothing changed) it computes the oracle's formulas:

    mean = S(x)/n,  var = S((x - mean)^2)/n  (two passes; RMS norm: var = S(x^2)/n, no mean)
    rstd = 1/sqrt(var + eps)  (eps_placement "outside": 1/(sqrt(var) + eps))
    y = (x - mean) rstd w + b
    dx = rstd (g - S(g)/n - xhat S(g xhat)/n),  g = dy w,  xhat = (x - mean) rstd
    dweight = S_p(dy xhat),  dbias = S_p(dy)

(Ioffe & Szegedy 2015, Alg. 1 and §3; Ba, Kiros & Hinton 2016, eq. 4; Zhang & Sennrich 2019 for RMS
norm: sections from memory). Sums are float64 (NumPy's pairwise summation) unless ``fmt`` names a
format whose arithmetic the model then emulates (every partial result rounded to it).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .. import dtypes

__all__ = ["Steps", "model_outputs"]


@dataclass(frozen=True)
class Steps:
    """The steps of a kernel that a bug may change (each default is the correct step).

    one_pass : var = E[x^2] - E[x]^2 in ``fmt`` (Chan, Golub & LeVeque 1983, §1: the textbook formula).
    fmt : the format of the one-pass arithmetic (None: float64).
    order : "pairwise" (NumPy's sum) or "reversed" (the elements summed in the other direction, as a
        second summation order whose spread measures how well the model pins a rounded result down).
    unbiased_norm : normalize with M2/(n - 1) instead of M2/n.
    tail : sums over the view's last axis drop its last (length % tail) elements (a vector loop
        without its remainder loop); the divisor stays n.
    const_stats : the training backward treats mean and variance as constants: dx = rstd g.
    squares_overflow : the squares of x overflow ``fmt`` in the variance's sum: var is NaN in every
        group holding an element with fl(x^2) = Inf (IEEE 754-2019 §7.4; Inf - Inf is NaN, §7.2).
    param_part : dweight and dbias sum over part of the parameter's axes only: "first_spatial" (the
        positions of the first spatial axis only: a length taken as x.shape[2]) or "first_sample".
    """

    one_pass: bool = False
    fmt: str | None = None
    order: str = "pairwise"
    unbiased_norm: bool = False
    tail: int = 0
    const_stats: bool = False
    squares_overflow: bool = False
    param_part: str = ""


def _sum(t: np.ndarray, axes: tuple[int, ...], steps: Steps, fmt: str | None = None) -> np.ndarray:
    last = t.ndim - 1
    if steps.tail and last in axes and t.shape[last] % steps.tail:
        t = t[..., : t.shape[last] - t.shape[last] % steps.tail]
    if steps.order == "reversed":
        t = np.flip(t, axis=axes)
    if fmt is None:
        return np.sum(t, axis=axes, keepdims=True)
    dt = dtypes.dtype_of(fmt)
    return np.sum(t.astype(dt), axis=axes, keepdims=True, dtype=dt)


def _param_terms(t: np.ndarray, case: Any, view: Any, steps: Steps) -> np.ndarray:
    """The terms of dweight/dbias with the positions a partial reduction leaves out set to zero."""
    if not steps.param_part:
        return t
    keep = np.zeros(case.shape, dtype=bool)
    if steps.param_part == "first_sample":
        keep[:1] = True
    else:  # first_spatial: of the flattened spatial positions (channels first), only the first axis's length
        cf = np.moveaxis(keep, case.channel_axis, 1)
        flat = cf.reshape(cf.shape[0], cf.shape[1], -1)
        flat[:, :, : case.shape[2 if case.channel_axis == 1 else 1]] = True
        keep = np.moveaxis(flat.reshape(cf.shape), 1, case.channel_axis)
    return np.where(keep.reshape(view.view_shape), t, 0.0)


def model_outputs(case: Any, view: Any, inp: dict[str, Any], *, eps: float, placement: str, center: bool,
                  steps: Steps, names: tuple[str, ...], running: tuple[str, str, bool] = ("new", "unbiased", False)
                  ) -> dict[str, np.ndarray]:
    """The outputs ``names`` of a kernel that computes with ``steps``, in the harness's shapes (float64).

    ``inp`` is the oracle's float64 view of the inputs (x the normalized values, weight with any offset
    added); ``view`` the op's View (conformance.ops.axes). Training mode, or eval mode with the running
    statistics (mean, var) as constants. ``running`` = (momentum convention, running-variance estimator,
    whether the running statistics are the batch mean of per-sample ones) for the running outputs."""
    red, n = view.red, view.n
    xv = np.asarray(inp["x"], np.float64).reshape(view.view_shape)
    w = inp.get("weight")
    b = inp.get("bias")
    wv = None if w is None else np.asarray(w, np.float64).reshape(view.param_kd)
    bv = None if b is None else np.asarray(b, np.float64).reshape(view.param_kd)
    train = case.mode == "train"
    with np.errstate(all="ignore"):
        if not train:
            mean = np.asarray(inp["running_mean"], np.float64).reshape(view.param_kd)
            var = np.asarray(inp["running_var"], np.float64).reshape(view.param_kd)
        elif not center:
            mean, var = None, _sum(xv * xv, red, steps) / n
        elif steps.one_pass:
            f = steps.fmt
            dt = np.float64 if f is None else dtypes.dtype_of(f)
            xf = xv.astype(dt)
            mean = np.asarray(_sum(xf, red, steps, f) / dt.type(n), dtype=dt)
            var = (np.asarray(_sum(xf * xf, red, steps, f) / dt.type(n), dtype=dt) - mean * mean).astype(np.float64)
            mean = mean.astype(np.float64)
        else:
            m0 = _sum(xv, red, steps) / n
            d = xv - m0
            mean = m0 + _sum(d, red, steps) / n
            var = _sum((xv - mean) ** 2, red, steps) / n
        if steps.squares_overflow and steps.fmt:
            big = np.abs(xv).astype(dtypes.dtype_of(steps.fmt))
            over = ~np.isfinite(big * big)
            var = np.where(np.any(over, axis=red, keepdims=True), np.nan, var)
        v = var * (n / (n - 1)) if (steps.unbiased_norm and train and n > 1) else var
        rstd = 1.0 / (np.sqrt(v) + eps) if placement == "outside" else 1.0 / np.sqrt(v + eps)
        xhat = (xv - mean) * rstd if mean is not None else xv * rstd
        out: dict[str, np.ndarray] = {}
        y = xhat if wv is None else xhat * wv
        out["y"] = (y if bv is None else y + bv).reshape(case.shape)
        if mean is not None:
            out["mean"] = np.broadcast_to(mean, _kd(view)).reshape(view.stat_shape)
        out["rstd"] = np.broadcast_to(rstd, _kd(view)).reshape(view.stat_shape)
        out["var"] = np.broadcast_to(var, _kd(view)).reshape(view.stat_shape)
        out["std"] = 1.0 / out["rstd"]
        if train and mean is not None and ("running_mean" in names or "running_var" in names):
            out.update(_running(case, view, inp, mean, var, running))
        if any(k in names for k in ("dx", "dweight", "dbias")):
            dyv = np.asarray(inp["dy"], np.float64).reshape(view.view_shape)
            g = dyv if wv is None else dyv * wv
            if not train or steps.const_stats:
                dx = rstd * g
            else:
                gc = g - _sum(g, red, steps) / n if center else g
                dx = rstd * (gc - xhat * (_sum(g * xhat, red, steps) / n))
            dx = dx.reshape(case.shape)
            if inp.get("dh") is not None:
                dx = dx + np.asarray(inp["dh"], np.float64)
            out["dx"] = dx
            pr = view.param_red
            out["dweight"] = np.sum(_param_terms(dyv * xhat, case, view, steps), axis=pr).reshape(view.param_shape)
            out["dbias"] = np.sum(_param_terms(dyv, case, view, steps), axis=pr).reshape(view.param_shape)
    return {k: v for k, v in out.items() if k in names}


def _running(case: Any, view: Any, inp: dict[str, Any], mean: np.ndarray, var: np.ndarray,
             running: tuple[str, str, bool]) -> dict[str, np.ndarray]:
    """r' = (1 - m) r + m s ("new") or m r + (1 - m) s ("old"); r + (s - r)/(k + 1) for momentum None;
    s the batch mean and the (unbiased or biased) batch variance (docs/conventions.md, Running statistics)."""
    if inp.get("running_mean") is None:
        return {}
    convention, estimator, from_samples = running
    n = view.n
    c = np.asarray(inp["running_mean"]).shape
    m = np.broadcast_to(mean, _kd(view)).reshape(view.stat_shape)
    v = np.broadcast_to(var, _kd(view)).reshape(view.stat_shape)
    if estimator == "unbiased":
        v = v * (n / (n - 1)) if n > 1 else np.full_like(v, np.nan)
    if from_samples:
        m, v = m.mean(axis=0), v.mean(axis=0)
    out = {}
    for name, s in (("running_mean", m.reshape(c)), ("running_var", v.reshape(c))):
        r = np.asarray(inp[name], np.float64)
        if case.momentum is None:
            out[name] = r + (s - r) / (case.batches_seen + 1)
        else:
            k = float(case.momentum)
            out[name] = (1 - k) * r + k * s if convention == "new" else k * r + (1 - k) * s
    return out


def _kd(view: Any) -> tuple[int, ...]:
    return tuple(1 if i in view.red else d for i, d in enumerate(view.view_shape))
