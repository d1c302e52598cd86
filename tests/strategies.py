"""Hypothesis strategies for the oracle's tests, and the tolerance they are judged by.

Small generators composed into cases: shapes of rank 2..5, a channel layout,
value distributions (seeded NumPy draws, so that every case is reproducible
and examples shrink through the seed and the distribution parameters), and
the layer parameters.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st

# ---------------------------------------------------------------------------
# Tolerances
# ---------------------------------------------------------------------------

U = 2.0**-53  # unit roundoff of IEEE 754-2019 binary64 (Higham 2002, §2.1, Table 2.1)
TARGET = 1e-12  # the project's agreement target for float64 references (relative to max |output|)


def gamma(n: int) -> float:
    """gamma_n = n u / (1 - n u) (Higham 2002, Accuracy and Stability of Numerical Algorithms, Lemma 3.1)."""
    return n * U / (1.0 - n * U)


def agreement_tol(n: int, cond: float = 8.0) -> float:
    """Relative tolerance for two independent float64 evaluations of one output.

    Each side's error is at most about gamma_{n+8} * cond * max|output|: a
    reduction of length n in any summation order errs by at most
    gamma_{n-1} sum|terms| (Higham 2002, §4.2 and §4.6; equation numbers from memory), and the
    elementwise formula adds a handful of roundings (the +8). ``cond`` is the
    ratio of the magnitudes entering the reductions and subtractions to the
    largest output; both sides err, hence the factor 2. For cond <= 8 and
    n <= 500 this is below TARGET = 1e-12.
    """
    return 2.0 * gamma(n + 8) * max(float(cond), 1.0)


def scales(x, dy, axes, weight=None, bias=None, *, eps: float, param_axes=None, center: bool = True,
           training: bool = True, mean=None, var=None, placement: str = "inside") -> dict[str, float]:
    """Error scales of a normalization's outputs: the largest magnitude entering their roundings.

    A float64 evaluation of output o errs by at most about gamma_{n+8} * scales[o]
    (see :func:`check_agreement`). For a well-conditioned output the scale is
    a few times max|o|; for one that nearly cancels (a gradient of a
    two-element group, a mean near 0) it is much larger than max|o|, and no
    float64 implementation can do better there.

    x, dy in a view where the statistic reduces over ``axes`` (keepdims
    broadcasting); weight, bias broadcastable (or None); ``param_axes`` are the
    axes dweight/dbias sum over. ``mean``/``var`` (keepdims) replace the batch
    statistics in eval mode; ``placement`` is the oracle's eps_placement
    ("outside": r = 1/(sqrt(v) + eps), and the gradient's second term carries
    1/sqrt(v) instead of r). Evaluated in plain float64: only the order of
    magnitude matters. The error of x - mean is about u (|x| + |mean|), which
    reaches every later quantity through x_hat.
    """
    kw = {"axis": axes, "keepdims": True}
    if mean is None:
        mu = np.mean(x, **kw) if center else np.zeros((1,) * x.ndim)
        v = np.mean((x - mu) ** 2, **kw)
    else:
        mu, v = mean, var
    sd = np.sqrt(v)
    inv_sd = np.divide(1.0, sd, out=np.zeros_like(sd), where=sd > 0)
    r = 1.0 / np.sqrt(v + eps) if placement == "inside" else 1.0 / (sd + eps)
    beta = r if placement == "inside" else inv_sd
    w = np.ones((1,) * x.ndim) if weight is None else weight
    b = np.zeros((1,) * x.ndim) if bias is None else bias
    xh = (x - mu) * r
    mag_xh = (np.abs(x) + np.abs(mu)) * r
    out = {"y": np.max(mag_xh * np.abs(w) + np.abs(b))}
    g = dy * w
    if training and mean is None:
        gbar = np.mean(g, **kw) if center else 0.0
        k = np.mean((g - gbar) * xh, **kw)
        out["dx"] = np.max(r * (np.abs(g) + np.abs(gbar)) + beta * np.abs(k) * mag_xh)
    else:
        out["dx"] = np.max(np.abs(r * g))
    pa = tuple(a for a in range(x.ndim) if w.shape[a] == 1) if param_axes is None else param_axes
    out["dweight"] = np.max(np.sum(np.abs(dy) * mag_xh, axis=pa))
    out["dbias"] = np.max(np.sum(np.abs(dy), axis=pa))
    out["mean"] = np.max(np.mean(np.abs(x), **kw))
    dev = np.abs(x - mu)
    sv = np.mean(2 * dev * (np.abs(x) + np.abs(mu)) + dev**2, **kw)
    out["var"] = np.max(sv)
    if placement == "inside":
        out["rstd"] = np.max(r * (1.0 + sv / (v + eps)))
    else:  # relative error of sqrt(v) is half that of v; it enters r damped by sqrt(v)/(sqrt(v) + eps)
        out["rstd"] = np.max(r * (1.0 + sv * inv_sd * inv_sd))
    return {k: float(v) for k, v in out.items()}


def rel_err(got, ref) -> float:
    """max |got - ref| / max |ref| (absolute when ref is all zeros)."""
    got = np.asarray(got, dtype=np.float64)
    ref = np.asarray(ref, dtype=np.float64)
    assert got.shape == ref.shape, f"shape {got.shape} != reference shape {ref.shape}"
    scale = np.max(np.abs(ref)) if ref.size else 0.0
    diff = np.max(np.abs(got - ref)) if ref.size else 0.0
    return float(diff / scale) if scale > 0 else float(diff)


# Largest errors seen per comparison (written out by conftest.py on request): the relative
# error over well-conditioned cases (error scale <= 8 max|ref|) and over all cases, and the
# largest fraction of the bound used.
WORST: dict[str, float] = {}


def _note(what: str, err: float, used: float | None = None, well: bool = True) -> None:
    key = what.split(":")[0]
    for k, v, keep in ((key, err, well), (key + " | all cases", err, used is not None),
                       (key + " | bound used", used, used is not None)):
        if keep:
            WORST[k] = max(WORST.get(k, 0.0), v)


def record(what: str, value: float) -> None:
    """Remember the largest ``value`` seen under ``what`` (for figures that are not rel_err)."""
    WORST[what] = max(WORST.get(what, 0.0), float(value))


def assert_close(got, ref, tol: float, what: str) -> float:
    """Assert rel_err(got, ref) <= tol (relative to max |ref|); remember the worst error per ``what``."""
    err = rel_err(got, ref)
    _note(what, err)
    assert err <= tol, f"{what}: relative error {err:.3e} > tolerance {tol:.3e}"
    return err


def check_agreement(got, ref, n: int, scale: float, what: str) -> float:
    """Assert max|got - ref| <= 2 gamma_{n+8} * scale: two float64 evaluations, each within
    gamma_{n+8} * scale of the exact value (Higham 2002, §4.2 for the reductions of length n,
    the +8 for the elementwise roundings). Returns (and records) the error relative to max|ref|.
    """
    got = np.asarray(got, dtype=np.float64)
    ref = np.asarray(ref, dtype=np.float64)
    assert got.shape == ref.shape, f"{what}: shape {got.shape} != reference shape {ref.shape}"
    diff = float(np.max(np.abs(got - ref)))
    bound = 2.0 * gamma(n + 8) * scale
    err = rel_err(got, ref)
    top = float(np.max(np.abs(ref)))
    _note(what, err, diff / bound if bound > 0 else 0.0, well=scale <= 8.0 * top)
    assert diff <= bound, (f"{what}: max abs difference {diff:.3e} > bound {bound:.3e} "
                           f"(relative error {err:.3e}, n={n}, scale={scale:.3e})")
    return err


# ---------------------------------------------------------------------------
# Settings
# ---------------------------------------------------------------------------

# Deterministic in CI (derandomize): a failure reproduces on every machine.
ORACLE_SETTINGS = settings(
    max_examples=25,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)


def oracle_settings(max_examples: int) -> settings:
    return settings(ORACLE_SETTINGS, max_examples=max_examples)


# ---------------------------------------------------------------------------
# Small generators
# ---------------------------------------------------------------------------

seeds = st.integers(min_value=0, max_value=2**32 - 1)
layouts = st.sampled_from(["first", "last"])  # channels at axis 1, or at the last axis
eps_values = st.sampled_from([1e-5, 1e-3, 0.1, 0.0])
affine_flags = st.booleans()
momenta = st.sampled_from([0.0, 0.1, 0.5, 0.9, 0.99, 1.0])
DISTRIBUTIONS = ("normal", "uniform", "laplace", "signed_lognormal", "channel_scales")


@st.composite
def shapes(draw, min_rank: int = 2, max_rank: int = 5, max_size: int = 240, max_side: int = 7,
           min_side: int = 1) -> tuple[int, ...]:
    """A shape of rank in [min_rank, max_rank], each side in [min_side, max_side], size <= max_size."""
    rank = draw(st.integers(min_rank, max_rank))
    dims = []
    budget = max_size
    for k in range(rank):
        rest = rank - k - 1
        hi = max(min_side, min(max_side, budget // (min_side**rest)))
        d = draw(st.integers(min_side, hi))
        dims.append(d)
        budget = max(1, budget // d)
    return tuple(dims)


@dataclass(frozen=True)
class Values:
    """How to draw an array: distribution, scale (10^k), location (in units of scale), seed."""

    dist: str
    scale: float
    loc: float
    seed: int

    def draw(self, shape: tuple[int, ...], channel_axis: int = 1) -> np.ndarray:
        rng = np.random.default_rng(self.seed)
        s, m = self.scale, self.loc * self.scale
        if self.dist == "normal":
            return rng.normal(m, s, shape)
        if self.dist == "uniform":
            return rng.uniform(m - s, m + s, shape)
        if self.dist == "laplace":
            return rng.laplace(m, s, shape)
        if self.dist == "signed_lognormal":
            return m + s * rng.choice([-1.0, 1.0], shape) * rng.lognormal(0.0, 0.75, shape)
        # channel_scales: every channel its own spread, 10^-2 .. 10^2 around the base scale
        per = 10.0 ** rng.uniform(-2, 2, shape[channel_axis])
        bshape = [1] * len(shape)
        bshape[channel_axis] = shape[channel_axis]
        return m + s * per.reshape(bshape) * rng.normal(0.0, 1.0, shape)


@st.composite
def values(draw, max_loc: float = 3.0) -> Values:
    """A value distribution: family, scale 10^-3..10^3, location within max_loc spreads, seed."""
    dist = draw(st.sampled_from(DISTRIBUTIONS))
    scale = 10.0 ** draw(st.integers(-3, 3))
    loc = draw(st.sampled_from(sorted({0.0, 0.5, -1.0, max_loc})))
    return Values(dist, scale, loc, draw(seeds))


def divisors(c: int) -> list[int]:
    return [g for g in range(1, c + 1) if c % g == 0]


# ---------------------------------------------------------------------------
# Cases
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class ChannelCase:
    """A channels-first case (N, C, *spatial) for batch/group/instance norm.

    ``layout`` says how the op under test sees it: "first" as is, "last" after
    moveaxis(x, 1, -1) with axis=-1. weight/bias are (C,) or None.
    """

    x: np.ndarray
    dy: np.ndarray
    weight: np.ndarray | None
    bias: np.ndarray | None
    eps: float
    layout: str
    groups: int

    @property
    def axis(self) -> int:
        return 1 if self.layout == "first" else -1

    def view(self, a: np.ndarray) -> np.ndarray:
        """``a`` (channels-first) in this case's layout."""
        return a if self.layout == "first" else np.moveaxis(a, 1, -1)

    def unview(self, a: np.ndarray) -> np.ndarray:
        return a if self.layout == "first" else np.moveaxis(a, -1, 1)


@st.composite
def channel_cases(draw, min_rank: int = 2, max_rank: int = 5, max_size: int = 240,
                  min_per_stat: int = 2, per_stat: str = "batch", with_groups: bool = False,
                  eps=eps_values, max_loc: float = 3.0) -> ChannelCase:
    """A channels-first case. ``per_stat``: which elements share a statistic ("batch": N*spatial,
    "instance": spatial, "group": group channels * spatial); each statistic covers >= min_per_stat."""
    shape = draw(shapes(min_rank, max_rank, max_size))
    n, c, spatial = shape[0], shape[1], math.prod(shape[2:])
    groups = draw(st.sampled_from(divisors(c))) if with_groups else 1
    length = {"batch": n * spatial, "instance": spatial, "group": (c // groups) * spatial}[per_stat]
    if length < min_per_stat:
        # Grow one axis that the statistic reduces over (keeps the rank and the grouping).
        if per_stat == "batch":
            shape = (math.ceil(min_per_stat / spatial),) + shape[1:]
        elif len(shape) >= 3:
            shape = shape[:-1] + (math.ceil(min_per_stat * shape[-1] / length),)
        else:  # rank-2 group norm: more channels per group
            shape = (n, groups * min_per_stat)
    vals = draw(values(max_loc))
    x = vals.draw(shape)
    rng = np.random.default_rng(vals.seed + 1)
    dy = rng.normal(0.0, 1.0, shape)
    affine = draw(affine_flags)
    weight = rng.normal(1.0, 0.5, shape[1]) if affine else None
    bias = rng.normal(0.0, 1.0, shape[1]) if affine else None
    return ChannelCase(x, dy, weight, bias, draw(eps), draw(layouts), groups)


@dataclass(frozen=True)
class FeatureCase:
    """A case for layer/RMS norm over the trailing ``k`` axes (torch's normalized_shape)."""

    x: np.ndarray
    dy: np.ndarray
    weight: np.ndarray | None
    bias: np.ndarray | None
    eps: float
    k: int

    @property
    def normalized_shape(self) -> tuple[int, ...]:
        return self.x.shape[self.x.ndim - self.k:]

    @property
    def axes(self) -> tuple[int, ...]:
        return tuple(range(self.x.ndim - self.k, self.x.ndim))


@st.composite
def feature_cases(draw, min_rank: int = 2, max_rank: int = 5, max_size: int = 240, eps=eps_values,
                  max_loc: float = 3.0) -> FeatureCase:
    shape = draw(shapes(min_rank, max_rank, max_size))
    k = draw(st.integers(1, len(shape) - 1))
    if math.prod(shape[-k:]) < 2:
        shape = shape[:-1] + (2,)
    vals = draw(values(max_loc))
    x = vals.draw(shape, channel_axis=len(shape) - 1)
    rng = np.random.default_rng(vals.seed + 1)
    dy = rng.normal(0.0, 1.0, shape)
    pshape = shape[len(shape) - k:]
    affine = draw(affine_flags)
    weight = rng.normal(1.0, 0.5, pshape) if affine else None
    bias = rng.normal(0.0, 1.0, pshape) if affine else None
    return FeatureCase(x, dy, weight, bias, draw(eps), k)
