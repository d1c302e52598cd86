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

Two ways to evaluate the same formulas:

* the composable functions (:func:`batch_stats`, :func:`normalized`,
  :func:`affine`, :func:`backward`), each a whole-array NumPy expression;
* :func:`fused_forward` and :func:`fused_backward`, which the public
  operations use. The groups are cut into chunks of about 2 MiB along one
  non-reduced axis (:mod:`refnorm._parallel`); every step runs on a chunk
  while it is in cache, in y's or dx's own memory and one scratch buffer,
  on a few threads. Each group's reductions run on one thread in one fixed
  order, so the bits do not depend on the thread count. Sums along the
  contiguous inner axis are NumPy pairwise sums (``np.add.reduce``, of the
  product written to the chunk's scratch buffer) over blocks of at most 256
  elements, the block results summed pairwise: as accurate as one pairwise
  sum (within 2.4 units of roundoff times sum |terms| on normal data,
  measured here), and the same bits on every CPU. BLAS dots
  (``np.vecdot``) were 10-25% faster but not reproducible: OpenBLAS picks
  its dot kernel, and so the order of the additions, by CPU model, which
  moved the oracle's last bits between an Intel and an AMD machine.
  ``np.einsum``, which accumulates in one running sum, reached 80 units. Where the weight is constant along the inner
  axes (batch, group, instance norm) the formulas are rearranged, without
  changing them, to save passes (see the two functions).

Offsets. The mean is the double-float pair m0 + c (refnorm._moments), also
where a backward is given the forward's own float64 mean back: that mean is
recognised and its low word restored from x (:func:`fused_backward`). The
gradient's g - mean(g) is never taken of a g = dy * weight rounded with a
large offset of dy in it: dy is centred before the product where the weight
is constant over the group, and g is centred from the exact product
(:mod:`refnorm._twoproduct`) where its mean exceeds 2^10 times its spread.
Both keep dx within 1e-12 of exact arithmetic on mean 1e8 / spread 1e-2 data
(tests/test_oracle_exact_paths.py).

Range. The fused evaluation squares deviations and multiplies gradients by
them in plain float64; for finite data far from magnitude 1 (1e200, 1e-170)
that over- or underflows. The groups where it may have (told from the
statistics and sums it computes anyway, so ordinary data pays nothing) are
recomputed on copies scaled by powers of two, which is exact
(:mod:`refnorm._scaled`).

Floating-point exceptions. The fused functions compute under
``np.errstate(all="ignore")``: IEEE exceptional results are values in the
outputs (NaN, +-inf), never warnings or FloatingPointError, because an
intermediate overflow that the scaled evaluation then corrects would
otherwise be reported for a result that is right.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np

from . import _scaled
from ._moments import Moments, group_size, mean_square, moments, sum_keep
from ._parallel import chunk_bounds, run_chunks
from ._twoproduct import OFFSET, centered_product


@dataclass(frozen=True)
class Stats:
    """Keepdims statistics used to normalize: mean (None without centering), var, rstd.

    ``refine`` (saved statistics given to a backward pass): a given mean that is the float64
    mean of x rounded stands for the double-float mean m0 + c it came from, whose low word the
    backward recovers from x (see :func:`fused_backward`); running statistics are never refined.
    """

    mean: np.ndarray | None
    var: np.ndarray
    rstd: np.ndarray
    moments: Moments | None = None
    refine: bool = False


def inv_std(var: np.ndarray, eps: float, placement: str) -> np.ndarray:
    """r = 1/sqrt(var + eps) ("inside", the standard) or 1/(sqrt(var) + eps) ("outside")."""
    if placement == "inside":
        return 1.0 / np.sqrt(var + eps)
    return 1.0 / (np.sqrt(var) + eps)


def _beta_outside(var: np.ndarray) -> np.ndarray:
    """beta = 1/sqrt(var) for eps outside the root, 0 where var = 0.

    There x - mean = 0 for every element, so the term beta * k * xhat vanishes
    whatever beta is; 1/sqrt(0) = inf would turn it into inf * 0 = NaN.
    """
    with np.errstate(divide="ignore"):
        beta = 1.0 / np.sqrt(var)
    return np.where(var == 0, 0.0, beta)


def _correction(s1: np.ndarray, m0: np.ndarray, n: int) -> np.ndarray:
    """c = sum(x - m0) / n, and 0 where m0 is +-Inf or NaN.

    With an infinite m0, x - m0 is NaN for the infinite elements (Inf - Inf);
    the mean is m0 itself by IEEE 754 arithmetic (e.g. -Inf for a group holding
    -Inf and finite values), which c = 0 keeps.
    """
    c = s1 / n
    return np.where(np.isfinite(m0), c, 0.0)


def batch_stats(x: np.ndarray, red: tuple[int, ...], eps: float, placement: str, center: bool) -> Stats:
    """Statistics of x itself over ``red``: biased variance (or mean square without centering)."""
    if center:
        mom = moments(x, red)
        var = mom.var(0)
        return Stats(mean=mom.mean, var=var, rstd=inv_std(var, eps, placement), moments=mom)
    ms = mean_square(x, red)
    return Stats(mean=None, var=ms, rstd=inv_std(ms, eps, placement))


def fixed_stats(mean: np.ndarray | None, var: np.ndarray, eps: float, placement: str) -> Stats:
    """Statistics given from outside (running statistics in eval mode).

    Where var + eps (or sqrt(var) + eps) passes float64's largest value although both are
    finite, r is formed from var/4 and eps/4 (eps/2 outside the root) and halved: exact
    scalings, and r itself (about 2^-512) is in range.
    """
    with np.errstate(over="ignore"):
        r = inv_std(var, eps, placement)
        wide = (r == 0) & np.isfinite(var)
        if wide.any():
            half = inv_std(var / 4, eps / 4 if placement == "inside" else eps / 2, placement) / 2
            r = np.where(wide, half, r)
    return Stats(mean=mean, var=var, rstd=r)


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
    dweight = sum_keep(dy * xhat, param_red)
    dbias = sum_keep(dy, param_red)
    g = dy if w is None else dy * w
    if not training:
        return g * st.rstd, dweight, dbias
    n = group_size(g.shape, red)
    # g - mean(g) from the exact product dy * w, with a correction pass (refnorm._twoproduct)
    gc = centered_product(dy, w, red) if center else g
    k = sum_keep(gc * xhat, red) / n
    if placement == "inside":
        beta = st.rstd
    else:
        beta = _beta_outside(st.var)
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
    """The batch statistics of x, or the saved ones (keepdims mean/rstd) when given.

    A saved mean is marked ``refine``: where it is the float64 mean of x rounded, the backward
    uses the double-float mean it came from (:func:`fused_backward`).
    """
    if rstd is None:
        return batch_stats(x, red, eps, placement, center)
    with np.errstate(over="ignore", divide="ignore"):  # an rstd outside the fast window: see _scaled
        if placement == "inside":
            var = 1.0 / (rstd * rstd) - eps
        else:
            var = (1.0 / rstd - eps) ** 2
    return Stats(mean=mean, var=var, rstd=rstd, refine=mean is not None)


# --- fused, chunked evaluation -------------------------------------------------------------

# Sums along the contiguous inner axis run as BLAS dots (np.vecdot) over
# blocks of at most _DOT_BLOCK elements, whose results are then summed
# pairwise. Short blocks keep each dot's own accumulation short (accuracy),
# keep OpenBLAS's dot single-threaded (it splits vectors longer than 10000
# over its own threads, which would tie the bits to its thread count), and
# give NumPy enough outer iterations to release the GIL: a gufunc such as
# vecdot holds it unless its outer loop runs more than about 500 times
# (measured here, NumPy 2.4), which serialises the chunk threads.
_DOT_BLOCK = 256
# Inner axes shorter than this reduce with np.sum: a dot per few elements
# costs more in calls than it saves.
_DOT_MIN = 64
# NumPy runs a gufunc's loop without the GIL only above this many outer
# iterations (NPY_BEGIN_THREADS_THRESHOLDED, 500; measured: 448 rows held it).
_GIL_ROWS = 512
# Chunks whose contiguous runs would be shorter than this (e.g. channels-last
# batch norm cut along the channels) are not worth cutting: one chunk instead.
_MIN_RUN = 256


def _split_axis(shape: tuple[int, ...], red: tuple[int, ...]) -> int | None:
    """The non-reduced axis to cut into chunks: the longest one (outermost on ties), None if all are 1."""
    best = None
    for a, d in enumerate(shape):
        if a not in red and d > 1 and (best is None or d > shape[best]):
            best = a
    return best


def _chunking(shape: tuple[int, ...], red: tuple[int, ...]) -> tuple[int | None, list[tuple[int, int]]]:
    """(split axis, chunk bounds along it); (None, one chunk) when cutting does not pay."""
    s = _split_axis(shape, red)
    if s is None:
        return None, [(0, 1)]
    total = math.prod(shape)
    bounds = chunk_bounds(shape[s], total // shape[s])
    per = bounds[0][1] - bounds[0][0]
    if len(bounds) > 1 and per * math.prod(shape[s + 1:]) < _MIN_RUN:
        return None, [(0, 1)]
    return s, bounds


def _index(s: int | None, lo: int, hi: int) -> tuple:
    return (Ellipsis,) if s is None else (slice(None),) * s + (slice(lo, hi),)


def _take(a: np.ndarray | None, s: int | None, lo: int, hi: int) -> np.ndarray | None:
    """The chunk's part of a broadcastable operand (the whole operand where it does not vary along s)."""
    if a is None or s is None or a.shape[s] == 1:
        return a
    return a[_index(s, lo, hi)]


@functools.lru_cache(maxsize=256)
def _dot_block(length: int, rows: int) -> int | None:
    """The block length for dots along an inner axis of ``length``, over ``rows`` inner rows.

    The largest divisor of ``length`` in [_DOT_MIN, _DOT_BLOCK] that still
    gives more than _GIL_ROWS blocks in all (so NumPy releases the GIL), else
    the smallest divisor in that range; None if there is none (np.sum then).
    """
    divisors = [length // k for k in range(math.ceil(length / _DOT_BLOCK), length // _DOT_MIN + 1)
                if length % k == 0]
    if not divisors:
        return None
    for d in divisors:  # decreasing
        if rows * (length // d) > _GIL_ROWS:
            return d
    return divisors[-1]


def _inner_block(shape: tuple[int, ...], s: int | None, bounds: list[tuple[int, int]]) -> int | None:
    """One dot block length for every chunk of a call (so equal groups sum alike in any chunk)."""
    length = shape[-1]
    rows = math.prod(shape) // max(1, length)
    if s is not None:
        rows = rows // shape[s] * min(hi - lo for lo, hi in bounds)
    return _dot_block(length, rows)


def _reduce(a: np.ndarray, b: np.ndarray | None, axes: tuple[int, ...], block: int | None,
            tmp: np.ndarray | None = None) -> np.ndarray:
    """sum(a * b) (sum(a) for b None) over ``axes``, keepdims, without a full temporary where possible.

    a and b have the same shape. With the last axis reduced and a ``block``
    length (see :func:`_inner_block`): a pairwise sum per block of the inner
    rows (of the product, written to ``tmp`` where given), the block results
    summed pairwise, then a NumPy sum over the other axes. Otherwise
    np.sum, of the product written to ``tmp`` (or a new array).
    """
    last = a.ndim - 1
    if block is None or last not in axes:
        return sum_keep(a if b is None else np.multiply(a, b, out=tmp), axes)
    rest = tuple(ax for ax in axes if ax != last)
    split = a.shape[:last] + (a.shape[last] // block, block)
    if b is None:
        p = np.add.reduce(a.reshape(split), axis=-1)
    else:
        p = np.add.reduce(np.multiply(a.reshape(split), b.reshape(split),
                                      out=None if tmp is None else tmp.reshape(split)), axis=-1)
    p = np.add.reduce(p, axis=-1)
    if rest:
        p = _sum_last(p, rest)
    return p[..., np.newaxis]


@functools.lru_cache(maxsize=64)
def _ones(length: int) -> np.ndarray:
    """A read-only vector of ones (the second operand of a dot that is a plain sum)."""
    v = np.ones(length)
    v.flags.writeable = False
    return v


def _sum_last(p: np.ndarray, axes: tuple[int, ...]) -> np.ndarray:
    """np.sum over ``axes`` (keepdims) of a small array, each group's terms as one contiguous pairwise sum.

    The order of the terms then does not depend on how many groups share the
    array (NumPy picks pairwise or running sums by layout), so a group gives
    the same bits in whichever chunk it lands.
    """
    keep = [i for i in range(p.ndim) if i not in axes]
    q = np.ascontiguousarray(np.transpose(p, keep + list(axes)))
    q = np.add.reduce(q.reshape(q.shape[:len(keep)] + (-1,)), axis=-1)
    return q.reshape(tuple(1 if i in axes else d for i, d in enumerate(p.shape)))


def _chunk_dev(xc: np.ndarray, red: tuple[int, ...], n: int, eps: float, placement: str, center: bool,
               buf: np.ndarray, block: int | None) -> tuple:
    """Batch statistics of one chunk and the deviations they leave: (dev, m0, c, m2, var, rstd).

    With centering, the steps of :func:`moments` and :func:`inv_std`:
    dev = x - m0 is written to ``buf`` and x - mean = dev - c. Without,
    var is the mean square of :func:`mean_square`, dev is x itself (read
    only) and m0, c, m2 are None.
    """
    if center:
        m0 = _reduce(xc, None, red, block)
        m0 /= n
        dev = np.subtract(xc, m0, out=buf)
        s1 = _reduce(dev, None, red, block)
        c = _correction(s1, m0, n)
        s2 = _reduce(dev, dev, red, block)
        # s1 * c is tiny next to s2 unless m0 was poor; it is never clamped.
        m2 = s2 - s1 * c
        var = m2 / n
        return dev, m0, c, m2, var, inv_std(var, eps, placement)
    var = _reduce(xc, xc, red, block)
    var /= n
    return xc, None, None, None, var, inv_std(var, eps, placement)


def _given_dev(xc: np.ndarray, mean: np.ndarray | None, buf: np.ndarray) -> np.ndarray:
    """x - mean with a given mean (in ``buf``), or x itself (read only) without one."""
    return xc if mean is None else np.subtract(xc, mean, out=buf)


def _small(a: np.ndarray, b: np.ndarray, than: int) -> bool:
    """Whether a * b broadcasts to far fewer elements than ``than`` (then it is worth forming)."""
    return 16 * math.prod(np.broadcast_shapes(a.shape, b.shape)) <= than


def fused_forward(
    x: np.ndarray,
    red: tuple[int, ...],
    w: np.ndarray | None,
    b: np.ndarray | None,
    *,
    eps: float,
    placement: str,
    center: bool,
    stats: Stats | None = None,
) -> tuple[np.ndarray, Stats]:
    """(y, st): y = affine(normalized(x, st), w, b), computed chunk by chunk in y's own memory.

    st is ``stats`` when given (e.g. :func:`fixed_stats`), else the batch
    statistics of :func:`batch_stats` over ``red``; their ``moments`` carry
    m0, c, m2 and n but no ``dev`` (it is never held for the whole array).
    Where r * w is small (the weight constant along the inner axes: batch,
    group and instance norm, and no weight) y = ((dev - c) r) w + b is
    evaluated as dev (r w) + (b - c r w), two passes instead of four.
    Memory: y and the keepdims statistics.
    """
    shape = x.shape
    n = group_size(shape, red)
    y = np.empty(shape)
    s, bounds = _chunking(shape, red)
    block = _inner_block(shape, s, bounds)
    kshape = tuple(1 if i in red else d for i, d in enumerate(shape))
    if stats is None:
        var, rstd = np.empty(kshape), np.empty(kshape)
        m0, c, m2 = (np.empty(kshape), np.empty(kshape), np.empty(kshape)) if center else (None, None, None)

    def work(lo: int, hi: int) -> None:
        ix = _index(s, lo, hi)
        xc, yc = x[ix], y[ix]
        if stats is None:
            dev, m0c, cc, m2c, vc, rc = _chunk_dev(xc, red, n, eps, placement, center, yc, block)
            var[ix], rstd[ix] = vc, rc
            if center:
                m0[ix], c[ix], m2[ix] = m0c, cc, m2c
        else:
            rc, cc = _take(stats.rstd, s, lo, hi), None
            dev = _given_dev(xc, _take(stats.mean, s, lo, hi), yc)
        wc, bc = _take(w, s, lo, hi), _take(b, s, lo, hi)
        bad = ~np.isfinite(rc)
        if bad.any() and (wc is None or _small(rc, wc, yc.size)):
            # Groups with r = inf or NaN take the direct formula below (dev r - c r would give
            # inf - inf where (dev - c) r = +-inf); every other group keeps the two-pass form, so
            # its bits do not depend on what its neighbours in the chunk hold.
            direct = np.subtract(dev, cc) if cc is not None else np.array(dev, copy=True)
            direct *= rc
            if wc is not None:
                direct *= wc
            if bc is not None:
                direct += bc
            rc = np.where(bad, 0.0, rc)
        else:
            direct = None
        if wc is None or _small(rc, wc, yc.size):
            # ((dev - c) r) w + b = dev (r w) + (b - c r w), the per-group terms formed first.
            scale = rc if wc is None else rc * wc
            shift = None if cc is None else -cc * scale
            if bc is not None and (shift is None or _small(shift, bc, yc.size)):
                shift, bc = (bc if shift is None else shift + bc), None
            np.multiply(dev, scale, out=yc)
            if shift is not None:
                yc += shift
            if bc is not None:
                yc += bc
            if direct is not None:
                np.copyto(yc, direct, where=np.broadcast_to(bad, yc.shape))
            return
        if dev is yc:
            if cc is not None:
                yc -= cc  # (x - m0) - c
            yc *= rc
        else:
            np.multiply(dev, rc, out=yc)
        if wc is not None:
            yc *= wc
        if bc is not None:
            yc += bc

    with np.errstate(all="ignore"):  # see "Floating-point exceptions" in the module docstring
        run_chunks(work, bounds, x.size)
        if stats is not None:
            sus = _scaled.given_suspect(stats.rstd, stats.mean)
            if sus.any() or _scaled.weight_extreme(w):
                need = _scaled.need_scaling(sus, red, x, w=w, given=(stats.rstd, stats.mean))
                if need.any():
                    ys, _ = _scaled.scaled_forward(x, red, w, b, eps=eps, placement=placement, center=center,
                                                   mean=stats.mean, rstd=stats.rstd)
                    np.copyto(y, ys, where=np.broadcast_to(need, shape))
            return y, stats
        shift = None
        sus = _scaled.x_suspect(var, m0 if center else None)
        if sus.any() or _scaled.weight_extreme(w):
            need = _scaled.need_scaling(sus, red, x, w=w)
            if need.any():
                ys, sc = _scaled.scaled_forward(x, red, w, b, eps=eps, placement=placement, center=center)
                np.copyto(y, ys, where=np.broadcast_to(need, shape))
                var, rstd = np.where(need, sc.var, var), np.where(need, sc.rstd, rstd)
                if center:
                    m0, c = np.where(need, sc.moments.m0, m0), np.where(need, sc.moments.c, c)
                    m2, shift = np.where(need, sc.moments.m2, m2), np.where(need, sc.k, 0)
        if center:
            mom = Moments(m0=m0, c=c, dev=None, m2=m2, n=n, shift=shift)
            return y, Stats(mean=mom.mean, var=var, rstd=rstd, moments=mom)
        return y, Stats(mean=None, var=var, rstd=rstd)


def _first_along(w: np.ndarray, red: tuple[int, ...]) -> np.ndarray:
    """w's first element along each axis of ``red`` (keepdims there)."""
    return w[tuple(slice(0, 1) if a in red else slice(None) for a in range(w.ndim))]


def _constant_along(w: np.ndarray | None, red: tuple[int, ...]) -> bool:
    """Whether the weight is None or takes one value along ``red`` in every group."""
    if w is None or all(w.shape[a] == 1 for a in red):
        return True
    return bool(np.all(w == _first_along(w, red)))


def _saved_mean_low(dev: np.ndarray, mean: np.ndarray, red: tuple[int, ...], n: int,
                    block: int | None) -> tuple[np.ndarray, np.ndarray]:
    """(c, s): c = sum(x - mean) / n where a given mean is the float64 mean of x rounded, else 0;
    s = sum(x - mean) where it is not, else 0.

    dev = x - mean is exact where x is within a factor 2 of the mean (Sterbenz's lemma), so
    mean + c is the double-float mean of x. A mean that c does not move by more than one unit in
    its last place (|c| <= spacing(mean)) is that mean rounded: the oracle's own forward mean
    always is, wherever |mean| is large against the spread and the low word matters. Any other
    mean is used as given (c = 0): a kernel's statistic two units off is not corrected; s is then
    what sum(xhat) = r s is for it (no longer 0).
    """
    s1 = _reduce(dev, None, red, block)
    c = s1 / n
    own = np.abs(c) <= np.spacing(np.abs(mean))  # False for NaN or Inf
    return np.where(own, c, 0.0), np.where(own, 0.0, s1)


def _refine_offset(gc: np.ndarray, dyc: np.ndarray, wc: np.ndarray | None, scale: np.ndarray | None,
                   gmean: np.ndarray, k: np.ndarray | None, red: tuple[int, ...], n: int,
                   block: int | None) -> bool:
    """Re-centre, from the exact product, the groups whose g = dy * weight is offset far beyond its spread.

    gc holds s (g - mean(g)) formed from the rounded product (s = ``scale`` or 1), gmean =
    mean(g), and k = mean((g - mean(g)) xhat) in units of g, or None. A group is re-centred when
    |mean(g)| > OFFSET rms(g - mean(g)). With the batch statistics mean(xhat^2) = var r^2 <= 1, so
    |k| <= rms(g - mean(g)) (Cauchy-Schwarz) and a group with |mean(g)| <= OFFSET |k| never is:
    the sum of squares that measures the spread is only taken where some group is not ruled out
    so (k None, for given statistics: always). Each group's decision and bits depend on its own
    data alone. The re-centred groups get s * centered_product(dy, weight) in place; returns
    whether there were any.
    """
    m = np.abs(gmean)
    if k is None:
        maybe = True
    else:
        maybe = m > OFFSET * np.abs(k)  # False for NaN
        if not maybe.any():
            return False
    q = _reduce(gc, gc, red, block)
    flag = maybe & ((m if scale is None else np.abs(scale) * m) > OFFSET * np.sqrt(q / n))
    if not flag.any():
        return False
    acc = centered_product(dyc, wc, red, reduce=lambda t, ax: _reduce(t, None, ax, block))
    if scale is not None:
        acc *= scale
    np.copyto(gc, acc, where=np.broadcast_to(flag, gc.shape))
    return True


def fused_backward(
    dy: np.ndarray,
    x: np.ndarray,
    red: tuple[int, ...],
    w: np.ndarray | None,
    param_red: tuple[int, ...],
    *,
    eps: float,
    placement: str,
    center: bool,
    training: bool,
    stats: Stats | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(dx, dweight, dbias) = backward(dy, normalized(x, st), st, red, w, param_red, ...), chunk by chunk.

    st is ``stats`` when given (saved statistics, or :func:`fixed_stats` in
    eval mode), else the batch statistics of x, recomputed per chunk as
    :func:`batch_stats` does (double-float mean m0 + c). A saved mean
    (``st.refine``) that is the float64 mean of x rounded is replaced by the
    double-float mean it came from, mean + sum(x - mean)/n (one extra sum;
    see :func:`_saved_mean_low`), so that passing the forward's own
    statistics back loses nothing; any other saved mean is used as given.

    The gradient g is centred in dx's own memory without letting an offset
    in dy be rounded into it: where the weight is constant over each group
    (batch and instance norm, no weight, a constant one)
    g - mean(g) = w (dy - mean(dy)), and dy is centred first; otherwise g is
    formed and centred (with a correction pass) and a group whose mean(g)
    exceeds OFFSET times its spread is centred again from the exact product
    (:func:`_refine_offset`, refnorm._twoproduct; one sum of squares, taken
    only where a bound from k does not already rule the offset out). For
    batch and instance norm dweight = sum((dy - mean(dy)) xhat) too, as
    sum(xhat) = 0 over the group.

    Where dweight/dbias also reduce over some of the statistics' axes
    (``common``: all of them for batch norm, the spatial ones for group norm),
    r and c are constant there and xhat = (dev - c) r is never formed:

        sum(dy xhat) = r (sum(dy dev) - c sum(dy))    over common, then the rest
        sum(g)       = sum(weight * sum(dy))          sum(dy) shared with dbias
        k            = r mean(gc dev)                 (sum(gc) = 0)
        dx           = r (gc - beta k (dev - c))

    the formulas of :func:`backward` rearranged, with fewer passes over the
    data; with the batch statistics (the default) r is also scaled into g and
    the correction of mean(g) folded into the final constants instead of a
    pass of its own (see the comment there). Otherwise (layer and RMS norm,
    whose dweight sums across rows)
    xhat is formed as in :func:`normalized`. Partial dweight/dbias sums that
    cross chunks are added in chunk order. Memory: dx, plus one scratch
    buffer per chunk.
    """
    shape = x.shape
    n = group_size(shape, red)
    dx = np.empty(shape)
    s, bounds = _chunking(shape, red)
    block = _inner_block(shape, s, bounds)
    pshape = tuple(1 if i in param_red else d for i, d in enumerate(shape))
    cross = s is None or s in param_red
    if not cross:
        dweight, dbias = np.empty(pshape), np.empty(pshape)
    common = tuple(a for a in red if a in param_red)  # the weight is constant along these
    red_rest = tuple(a for a in red if a not in common)
    param_rest = tuple(a for a in param_red if a not in common)
    n_common = group_size(shape, common)
    w_flat = _constant_along(w, red)  # then g - mean(g) = w (dy - mean(dy))
    w_first = None if w is None else _first_along(w, red)
    refine = stats is not None and stats.refine and stats.mean is not None and center and training
    # The statistics and sums that tell which groups the fast evaluation may have got wrong by
    # over- or underflow (refnorm._scaled): each chunk writes its part, judged once at the end.
    kshape = tuple(1 if i in red else d for i, d in enumerate(shape))
    cshape = tuple(1 if i in common else d for i, d in enumerate(shape))
    branch_a = bool(common) and stats is None and center and training
    rec = {name: np.empty(cshape if name in ("sdy", "dwf") else kshape)
           for name, wanted in (("var", stats is None), ("m0", stats is None and center), ("r", stats is None),
                                ("sdy", bool(common)), ("dwf", bool(common)), ("k", training),
                                ("sgn", training and center), ("corr", branch_a), ("lo", refine)) if wanted}

    def work(lo: int, hi: int):
        ix = _index(s, lo, hi)
        xc, dyc, dxc = x[ix], dy[ix], dx[ix]
        wc = _take(w, s, lo, hi)
        buf = np.empty(xc.shape)
        if stats is None:
            dev, m0c, cc, _, vc, rc = _chunk_dev(xc, red, n, eps, placement, center, buf, block)
            rec["var"][ix], rec["r"][ix] = vc, rc
            if center:
                rec["m0"][ix] = m0c
        else:
            rc, vc, cc = _take(stats.rstd, s, lo, hi), _take(stats.var, s, lo, hi), None
            mc = _take(stats.mean, s, lo, hi)
            dev = _given_dev(xc, mc, buf)
            if refine:
                cc, s_given = _saved_mean_low(dev, mc, red, n, block)
                rec["lo"][ix] = cc

        xhat = None
        sg = None  # sum(g) over red, when it comes from the shared sum(dy)
        mdy = None  # mean(dy) over red, where the weight is constant there
        dy_centred = False  # dx's chunk holds dy - mdy
        if common:
            sdy = _reduce(dyc, None, common, block)
            if center and training and n_common == n:
                # Batch and instance norm: the group is one channel, so with the batch mean (or the
                # rounded one it came from) sum(xhat) = 0 there and dweight = sum(dy xhat) =
                # sum((dy - mean(dy)) xhat): no offset of dy multiplies the rounding of xhat.
                # sum(xhat) = r s_given for a given mean used as given.
                mdy = sum_keep(sdy, red_rest) / n if red_rest else sdy / n  # red_rest: axes of length 1
                np.subtract(dyc, mdy, out=dxc)
                dy_centred = True
                sdm = _reduce(dxc, None, common, block)  # sum(dy - mdy) of the stored differences
                dw = _reduce(dxc, dev, common, block)
                if cc is not None:
                    dw -= cc * sdm
                if refine:
                    dw += mdy * s_given
            else:
                dw = _reduce(dyc, dev, common, block, tmp=dxc)  # dx's chunk is free until g is formed
                if cc is not None:
                    dw -= cc * sdy
            dw *= rc
            rec["sdy"][ix], rec["dwf"][ix] = sdy, dw
            if param_rest:
                dw = sum_keep(dw, param_rest)
            db = sum_keep(sdy, param_rest) if param_rest else sdy
            if center and training:
                t = sdy if wc is None else sdy * wc
                sg = sum_keep(t, red_rest) if red_rest else t
                if w_flat and mdy is None:
                    mdy = sum_keep(sdy, red_rest) / n
        else:
            if dev is buf:
                if cc is not None:
                    buf -= cc
                buf *= rc
            else:
                np.multiply(xc, rc, out=buf)
            xhat = buf
            dw = _reduce(dyc, xhat, param_red, block, tmp=dxc)
            db = sum_keep(dyc, param_red)
        if not cross:
            dweight[ix], dbias[ix] = dw, db
        if not training:
            # dx = g * r, as dy (r w) where r w is a per-group constant: one rounding of the
            # product, whose intermediate cannot overflow or underflow where the result does not.
            if wc is None:
                np.multiply(dyc, rc, out=dxc)
            elif _small(rc, wc, dxc.size):
                np.multiply(dyc, rc * wc, out=dxc)
            else:
                np.multiply(dyc, wc, out=dxc)
                dxc *= rc
            return dw, db
        if xhat is None and stats is None and center:
            # Batch statistics, centering, weight constant along ``common`` (batch, group and
            # instance norm): r scaled into g and the correction of mean(g) folded into the
            # constants rather than applied in a pass of its own. With gr = r g - r mean(g),
            # corr = mean(gr) (its rounding error), gc r = gr - corr, xhat = (dev - c) r:
            #   k  = mean(gc xhat) = (sum(gr dev) - corr sum(dev)) / n     (sum(gc) = 0)
            #   dx = r gc - beta k xhat = gr - beta k r dev - (corr - beta k r c)
            # gr = (dy - mean(dy)) r w where the weight is constant over the group: an offset in dy
            # is removed before the product (exactly, by Sterbenz's lemma), never rounded into it.
            rw = rc if wc is None else rc * wc
            if dy_centred:  # batch and instance norm: corr = mean(dy - mdy) r w, from the sum taken above
                dxc *= rw
                corr = (sum_keep(sdm, red_rest) if red_rest else sdm) * rw / n
            else:
                if w_flat:
                    np.subtract(dyc, mdy, out=dxc)
                    dxc *= rw
                else:
                    np.multiply(dyc, rw, out=dxc)
                    dxc -= rc * (sg / n)
                corr = _reduce(dxc, None, red, block) / n
            k = (_reduce(dxc, dev, red, block) - corr * (cc * n)) / n
            if not w_flat and _refine_offset(dxc, dyc, wc, rc, sg / n, k, red, n, block):
                corr = _reduce(dxc, None, red, block) / n
                k = (_reduce(dxc, dev, red, block) - corr * (cc * n)) / n
            coef = (rc if placement == "inside" else _beta_outside(vc)) * k * rc
            buf *= coef
            dxc -= buf
            dxc -= corr - coef * cc
            rec["sgn"][ix], rec["k"][ix], rec["corr"][ix] = sg / n, k, corr
            return dw, db
        gc = dxc
        if center:
            # gc = g - mean(g) with one correction pass: as w (dy - mean(dy)) where the weight is
            # constant over the group, else from g, re-centred from the exact product where offset.
            if w_flat:
                if mdy is None:
                    mdy = _reduce(dyc, None, red, block) / n
                if not dy_centred:
                    np.subtract(dyc, mdy, out=gc)
                if wc is None:
                    gmean = mdy
                else:
                    gc *= wc
                    gmean = mdy * _take(w_first, s, lo, hi)
            else:
                np.multiply(dyc, wc, out=gc)
                if sg is None:
                    sg = _reduce(gc, None, red, block)
                gmean = sg / n
                gc -= gmean
            gc -= _reduce(gc, None, red, block) / n
            rec["sgn"][ix] = gmean
        elif wc is None:
            gc = dyc  # read only
        else:
            np.multiply(dyc, wc, out=gc)
        beta = rc if placement == "inside" else _beta_outside(vc)
        screen = stats is None  # xhat from the batch statistics: mean(xhat^2) <= 1 (see _refine_offset)
        if xhat is not None:
            k = _reduce(gc, xhat, red, block) / n
            if center and not w_flat and _refine_offset(gc, dyc, wc, None, gmean, k if screen else None,
                                                        red, n, block):
                k = _reduce(gc, xhat, red, block) / n
            rec["k"][ix] = k
            xhat *= beta * k  # (beta * k) * xhat
            if gc is dxc:
                dxc *= rc  # r * gc
            else:
                np.multiply(gc, rc, out=dxc)
            dxc -= xhat
            return dw, db
        k = _reduce(gc, dev, red, block)
        k *= rc / n
        if center and not w_flat and _refine_offset(gc, dyc, wc, None, gmean, k if screen else None,
                                                    red, n, block):
            k = _reduce(gc, dev, red, block)
            k *= rc / n
        rec["k"][ix] = k
        # dx = r (gc - beta k (dev - c))
        if dev is buf:
            if cc is not None:
                buf -= cc
            buf *= beta * k
        else:
            np.multiply(dev, beta * k, out=buf)
        if gc is dxc:
            dxc -= buf
        else:
            np.subtract(gc, buf, out=dxc)
        dxc *= rc
        return dw, db

    with np.errstate(all="ignore"):  # see "Floating-point exceptions" in the module docstring
        parts = run_chunks(work, bounds, x.size)
        if cross:
            dweight, dbias = parts[0][0].copy(), parts[0][1].copy()
            for dw, db in parts[1:]:
                dweight += dw
                dbias += db
        if stats is None:
            suspect = _scaled.x_suspect(rec["var"], rec["m0"] if center else None)
            r = rec["r"]
        else:
            suspect = _scaled.given_suspect(stats.rstd, stats.mean)
            r = stats.rstd
        suspect = suspect | _scaled.sums_suspect(
            red, r, [rec[k] for k in ("sgn", "k") if k in rec],
            [(rec["sdy"], n_common)] if common else [], [rec[k] for k in ("dwf", "corr") if k in rec])
        if suspect.any() or _scaled.weight_extreme(w):
            given = None if stats is None else (stats.rstd, stats.mean)
            need = _scaled.need_scaling(suspect, red, x, dy, w, given=given)
            if need.any():
                dxs, dweight, dbias = _scaled.scaled_backward(
                    dy, x, red, w, param_red, eps=eps, placement=placement, center=center, training=training,
                    mean=None if stats is None else stats.mean, rstd=None if stats is None else stats.rstd,
                    mean_lo=rec.get("lo"))
                np.copyto(dx, dxs, where=np.broadcast_to(need, shape))
    return dx, dweight, dbias
