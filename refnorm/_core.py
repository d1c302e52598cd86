"""The shared core: normalize over canonical reduction axes, and its gradient.

Every public operation only chooses a view of x, the reduction axes of that
view and how its parameters broadcast; the arithmetic lives here once.

With r the inverse standard deviation, for one group of n elements

    forward:   xhat = (x - mean) * r,   y = xhat * weight + bias
    backward:  g = dy * weight,  gc = g - mean(g),  k = mean(gc * xhat)
               dx = r * gc - beta * xhat * k          (training: statistics depend on x)
               dx = r * g                             (eval: statistics are constants)
               dweight = sum(dy * xhat),  dbias = sum(dy)  over the parameter's broadcast axes

where beta = -2 (dr/dv) / r^2 with v the variance: beta = r when eps is inside
the square root (r = (v + eps)^-1/2) and beta = 1 / sqrt(v) when eps is added
to the standard deviation (r = 1 / (sqrt(v) + eps)). Without centering (RMS
norm) mean(g) is dropped and v is the mean square. Ioffe & Szegedy 2015,
"Batch Normalization", §3 gives the train-mode gradient for the standard form.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._moments import Moments, group_size, mean_square, moments


@dataclass(frozen=True)
class Stats:
    """Keepdims statistics used to normalize: mean (None without centering), var, rstd."""

    mean: np.ndarray | None
    var: np.ndarray
    rstd: np.ndarray
    moments: Moments | None = None


def inv_std(var: np.ndarray, eps: float, placement: str) -> np.ndarray:
    """r = 1/sqrt(var + eps) ("inside", the standard) or 1/(sqrt(var) + eps) ("outside")."""
    if placement == "inside":
        return 1.0 / np.sqrt(var + eps)
    return 1.0 / (np.sqrt(var) + eps)


def batch_stats(x: np.ndarray, red: tuple[int, ...], eps: float, placement: str, center: bool) -> Stats:
    """Statistics of x itself over ``red``: biased variance (or mean square without centering)."""
    if center:
        mom = moments(x, red)
        var = mom.var(0)
        return Stats(mean=mom.mean, var=var, rstd=inv_std(var, eps, placement), moments=mom)
    ms = mean_square(x, red)
    return Stats(mean=None, var=ms, rstd=inv_std(ms, eps, placement))


def fixed_stats(mean: np.ndarray | None, var: np.ndarray, eps: float, placement: str) -> Stats:
    """Statistics given from outside (running statistics in eval mode)."""
    return Stats(mean=mean, var=var, rstd=inv_std(var, eps, placement))


def normalized(x: np.ndarray, st: Stats) -> np.ndarray:
    """xhat = (x - mean) * r, with the double-float mean where the moments are known."""
    if st.moments is not None:
        return st.moments.centered() * st.rstd
    if st.mean is None:
        return x * st.rstd
    return (x - st.mean) * st.rstd


def affine(xhat: np.ndarray, w: np.ndarray | None, b: np.ndarray | None) -> np.ndarray:
    """y = xhat * weight + bias (each optional), weight and bias already broadcastable."""
    y = xhat if w is None else xhat * w
    if b is not None:
        y = y + b
    return y


def _centered_mean(a: np.ndarray, red: tuple[int, ...]) -> np.ndarray:
    """a - mean(a) over ``red`` with one correction pass (the same idea as the moments)."""
    n = group_size(a.shape, red)
    d = a - np.sum(a, axis=red, keepdims=True) / n
    d -= np.sum(d, axis=red, keepdims=True) / n
    return d


def backward(
    dy: np.ndarray,
    xhat: np.ndarray,
    st: Stats,
    red: tuple[int, ...],
    w: np.ndarray | None,
    param_red: tuple[int, ...],
    *,
    eps: float,
    placement: str,
    center: bool,
    training: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(dx, dweight, dbias) in the view; dweight/dbias keep the parameter's broadcast shape."""
    dweight = np.sum(dy * xhat, axis=param_red, keepdims=True)
    dbias = np.sum(dy, axis=param_red, keepdims=True)
    g = dy if w is None else dy * w
    if not training:
        return g * st.rstd, dweight, dbias
    n = group_size(g.shape, red)
    gc = _centered_mean(g, red) if center else g
    k = np.sum(gc * xhat, axis=red, keepdims=True) / n
    if placement == "inside":
        beta = st.rstd
    else:
        beta = 1.0 / np.sqrt(st.var)
    dx = st.rstd * gc - (beta * k) * xhat
    return dx, dweight, dbias


def stats_for_backward(
    x: np.ndarray,
    red: tuple[int, ...],
    mean: np.ndarray | None,
    rstd: np.ndarray | None,
    *,
    eps: float,
    placement: str,
    center: bool,
) -> Stats:
    """The batch statistics of x, or the saved ones (keepdims mean/rstd) when given."""
    if rstd is None:
        return batch_stats(x, red, eps, placement, center)
    if placement == "inside":
        var = 1.0 / (rstd * rstd) - eps
    else:
        var = (1.0 / rstd - eps) ** 2
    return Stats(mean=mean, var=var, rstd=rstd)
