"""The search space: hypothesis strategies for the cases a kernel's declaration admits.

A drawn case is a catalog Case (conformance.cases.model) whose fields vary freely within what the
op's description allows: shape (rank, extents, groups, normalized axes), layout, strides, weight
and bias kinds, eps, mode, running-statistic updates, momentum, batches seen, the running
statistics' kind, the upstream gradient; and whose value kind is a recipe of distribution
parameters (conformance.cases.drawn: mean against spread as powers of two, the tail, constant
runs, constant groups, special values). Only cases the declaration admits are drawn:
conformance.run.execute.skip_reason has the last word (a case it excludes is rejected with
``assume``). Every strategy shrinks towards the plainest case: small shapes, contiguous
strides, loc 0, spread 1, normal tails, nothing constant, nothing special, eps 1e-5, training.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from hypothesis import assume
from hypothesis import strategies as st

from .. import dtypes, ops
from ..cases.drawn import Recipe
from ..cases.model import Case
from ..kernel import Kernel
from ..run.execute import skip_reason

__all__ = ["Limits", "LIMITS", "recipes", "cases", "EPS_VALUES", "MOMENTA"]

#: eps values drawn (the first is where shrinking goes): the catalog's defaults and edges, BERT-style
#: 1e-12 and 1 (common practice values, from memory).
EPS_VALUES = (1e-5, 0.0, 1e-12, 1e-6, 1e-3, 1e-1, 1.0)
#: momenta drawn for running-statistic updates; None is the cumulative average.
MOMENTA = (0.1, 0.0, 0.01, 0.5, 1.0, None)


@dataclass(frozen=True)
class Limits:
    """How large drawn shapes get (extents per axis, spatial rank, elements per case) and the eps values drawn."""

    max_batch: int = 6
    max_channels_per_group: int = 6
    max_groups: int = 4
    max_spatial_rank: int = 2
    max_spatial: int = 9
    max_rows: int = 6
    max_features: int = 40
    max_elements: int = 4096
    eps: tuple[float, ...] = EPS_VALUES


LIMITS = Limits()


def recipes(dtype: str, accumulate: str | None = None) -> st.SearchStrategy[Recipe]:
    """Value recipes for ``dtype``. Exponents are mostly moderate (spread 2^-8..2^8, loc 2^-4..2^(p+6) with p
    the significand's bits: means up to 2^(p+14) spreads away, cancellation beyond the significand) and
    sometimes anywhere from 2^-3 below the smallest normal (subnormal data) to where |loc| + TAIL_CLIP spread
    stays below 2^-4 of the largest finite value (x finite unless a special value says otherwise) of the storage
    format and of the ``accumulate`` format (a group holding an Inf is not checked for range by
    conformance.tolerances.ranges, so float64 data beyond float32's range beside an Inf would fail a correct
    float32-accumulating kernel: the search found it)."""
    fi = dtypes.finfo(dtype)
    big = min(float(fi.max), float(dtypes.finfo(accumulate or dtype).max))
    top = int(math.floor(math.log2(big))) - 4
    low = int(math.floor(math.log2(float(fi.smallest_normal)))) - 3
    p = int(fi.nmant) + 1
    # mostly moderate exponents, sometimes the whole range (one_of shrinks towards the first)
    spread = st.one_of(st.integers(-8, 8), st.integers(min_value=low, max_value=top - 7))  # 64 spread <= 2^(top-1)
    loc = st.one_of(st.none(), st.integers(-4, min(p + 6, top)), st.integers(min_value=low, max_value=top))
    return st.builds(
        Recipe,
        loc_sign=st.sampled_from((1, -1)),
        loc_exp=loc,
        spread_exp=spread,
        tail=st.sampled_from(("normal", "uniform", "t2")),
        flat=st.sampled_from((0, 25, 50, 75)),
        run=st.integers(min_value=1, max_value=8),
        # not "max": x at the format's largest value overflows x - running_mean in eval mode for correct kernels,
        # beyond what conformance.tolerances.ranges promises (the search found it)
        special=st.sampled_from(("none", "nan", "inf", "ninf", "zero")),
        special_count=st.integers(min_value=0, max_value=3),
        at=st.sampled_from(("any", "first", "last")),
        stream=st.integers(min_value=0, max_value=255),
    )


@st.composite
def _shape(draw, spec, lim: Limits) -> tuple[tuple[int, ...], int]:
    """(channels-first shape, k) as CatalogShapes writes them: k groups (channel ops) or normalized axes."""
    if spec.axes.layouts == ("trailing",):
        lead = draw(st.lists(st.integers(1, lim.max_rows), min_size=1, max_size=2))
        k = draw(st.integers(1, 2))
        norm = draw(st.lists(st.integers(1, lim.max_features), min_size=k, max_size=k))
        return tuple(lead + norm), k
    n = draw(st.integers(1, lim.max_batch))
    groups = draw(st.integers(1, lim.max_groups)) if spec.axes.takes_groups else 1
    c = groups * draw(st.integers(1, lim.max_channels_per_group))
    spatial = draw(st.lists(st.integers(1, lim.max_spatial), min_size=0, max_size=lim.max_spatial_rank))
    return (n, c, *spatial), groups


def _kinds(spec) -> tuple[list[str], list[str]]:
    """The weight and bias kinds of the op's catalog; random weight and the op's default bias first (where
    shrinking goes)."""
    w = list(dict.fromkeys(["random"] + [a for a, _ in spec.param_kinds]))
    b = list(dict.fromkeys([spec.default_bias] + [b for _, b in spec.param_kinds]))
    return w, b


def _below_normal_range(acc: str, dtype: str, eps: float, recipe: Recipe) -> str:
    """Why drawn values leave the accumulation format's normal range downwards ("" when they do not): the
    derived bounds model rounding, not underflow, so such a case is outside what the declared precision
    promises (as conformance.tolerances.ranges says of overflow). Two ways, each found by the search on
    correct kernels before this rule:

    - var + eps below the accumulation format's smallest normal (x 16): spread^2 and eps both that small
      (float32 kernels at eps = 0 on x of spread 2^-74 return rstd = Inf: the variance 2^-148 is subnormal);
    - a spread below the accumulation format's smallest normal (x 16) where that is above the storage
      format's (float64 data of spread 2^-131 in a float32-accumulating kernel: its sums are subnormal).
      Where the two formats share the range the catalog's subnormal cases cover such data, and so may the search.
    ``acc`` is the kernel's accumulation format for ``dtype``.
    """
    tiny = float(dtypes.finfo(acc).smallest_normal) * 16.0
    if eps < tiny and 2 * recipe.spread_exp < math.log2(tiny):
        return "var + eps underflows"
    if float(dtypes.finfo(acc).smallest_normal) > float(dtypes.finfo(dtype).smallest_normal) and \
            recipe.spread_exp < math.log2(tiny):
        return "x underflows the accumulation format"
    return ""


@st.composite
def cases(draw, kernel: Kernel, dtype: str, lim: Limits = LIMITS) -> Case:
    """A Case of ``kernel.op`` and ``dtype`` that the kernel's declaration admits, with drawn values."""
    spec = ops.get(kernel.op)
    shape, k = draw(_shape(spec, lim))
    assume(math.prod(shape) <= lim.max_elements)
    layouts = [l for l in spec.axes.layouts if l == "trailing" or l in kernel.layouts]
    layout = draw(st.sampled_from(layouts))
    if layout == "channels_last":
        shape = (shape[0],) + tuple(shape[2:]) + (shape[1],)
    strides = draw(st.sampled_from(spec.axes.strides if kernel.strided else ("contiguous",)))
    if strides == "channels_last_memory" and (layout != "channels_first" or len(shape) < 3):
        strides = "contiguous"
    wk, bk = _kinds(spec)
    if not kernel.optional_params:
        wk, bk = [w for w in wk if w != "none"], [b for b in bk if b != "none"]
    weight, bias = draw(st.sampled_from(wk)), draw(st.sampled_from(bk))
    acc = kernel.precision_for(dtype).resolved().accumulate
    eps, recipe = draw(st.sampled_from(lim.eps)), draw(recipes(dtype, acc))
    assume(not _below_normal_range(acc, dtype, eps, recipe))
    fields = dict(op=kernel.op, dtype=dtype, shape=tuple(shape), layout=layout, strides=strides, weight=weight,
                  bias=bias, eps=eps, values=recipe.kind,
                  dy=draw(st.sampled_from(("normal", "ones"))), **spec.axes.case_fields(k))
    if spec.residual:
        fields["residual_bias"] = draw(st.booleans())
    if spec.has_eval:
        modes = [m for m, entry in (("train", "forward"), ("eval", "forward_eval"))
                 if getattr(kernel, entry) is not None or getattr(kernel, entry.replace("forward", "backward"))]
        mode = draw(st.sampled_from(modes or ["train"]))
        fields["mode"] = mode
        # running updates need two elements per statistic (the unbiased variance divides by n - 1)
        long_enough = Case(**fields).group_length > 1
        if mode == "train" and kernel.updates_running and long_enough and draw(st.booleans()):
            momenta = [m for m in MOMENTA if m is not None or kernel.momentum_none]
            fields.update(running=True, momentum=draw(st.sampled_from(momenta)))
            if fields["momentum"] is None:
                fields["batches_seen"] = draw(st.integers(0, 5))
        if mode == "eval":
            fields["running_values"] = draw(st.sampled_from(("near", *spec.running_value_kinds)))
    case = Case(**fields, tier="search")
    assume(skip_reason(kernel, case) is None)
    return case
