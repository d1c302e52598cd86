"""The case catalog: small composable generators of shapes, values and parameters, in three tiers.

smoke      a handful of cases per op and dtype, seconds;
standard   the default and the CI gate: edge shapes, every value kind, layouts and
           strides, parameters, modes, long reductions (2^20 elements per group), and
           the range cases (large magnitudes, a tiny eps on zero-variance groups, a
           constant upstream gradient over 2^17-term parameter sums, running statistics
           far from the batch's, outside the storage range and equal to x);
exhaustive the cross product of the standard axes on more shapes.

What varies per op (shapes, layouts, stride, value and parameter kinds, modes) is read
from the op's description (conformance.ops); this module composes the tiers from it.
Everything is deterministic: the same tier, op and dtype give the same cases in
the same order, and a case's data depends only on the run's seed and the case id.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import replace
from typing import Iterable, Iterator

from .. import dtypes as _dtypes
from .. import ops as _ops
from ..ops import OpSpec
from ..ops.spec import TINY_EPS, TINY_EPS_VALUES
from .model import TIERS, Case

__all__ = ["catalog", "find_case"]


# ---------------------------------------------------------------- building blocks
def _base(spec: OpSpec, dtype: str, shape: tuple[int, ...], layout: str, k: int, tier: str) -> Case:
    """A case of ``shape`` (channels first for channel ops) in ``layout``; k per CatalogShapes."""
    if layout == "channels_last":
        shape = (shape[0],) + tuple(shape[2:]) + (shape[1],)
    return Case(op=spec.name, dtype=dtype, shape=shape, layout=layout, tier=tier, bias=spec.default_bias,
                **spec.axes.case_fields(k))


def _shape_cases(spec: OpSpec, dtype: str, tier: str) -> Iterator[Case]:
    for shape, k in spec.shapes.for_tier(tier):
        for layout in spec.axes.layouts:
            yield _base(spec, dtype, shape, layout, k, tier)


def _mid(spec: OpSpec, dtype: str, tier: str, layout: str | None = None) -> Case:
    """The workhorse shape on which value kinds and parameters vary."""
    shape, k = spec.shapes.mid
    return _base(spec, dtype, shape, layout or spec.axes.layouts[0], k, tier)


def _squares_fit(dtype: str) -> bool:
    """Whether the square of the storage format's largest value fits its default accumulation format
    (float32 for narrower formats) with room for sums: float16 and float8 (65504^2 = 4.3e9 in float32),
    not float32, bfloat16 or float64 (their near-overflow squares overflow; the "large" cases cover
    them up to where a correct kernel must still work, docs/tolerances.md "Ranges")."""
    from ..kernel import Precision

    acc = Precision(storage=dtype).resolved().accumulate
    return 2.0 * math.log2(float(_dtypes.finfo(dtype).max)) + 20.0 < math.log2(float(_dtypes.finfo(acc).max))


def _value_cases(spec: OpSpec, dtype: str, tier: str) -> Iterator[Case]:
    kinds = list(spec.value_kinds)
    if _squares_fit(dtype):
        kinds.append("near_overflow")  # only where the accumulation format has range to spare
    for k in kinds:
        yield replace(_mid(spec, dtype, tier), values=k)
    # cancellation on a longer reduction (channels last for channel ops)
    shape, k, layout = spec.shapes.long_cancellation
    yield replace(_base(spec, dtype, shape, layout, k, tier), values="cancellation")


def _param_cases(spec: OpSpec, dtype: str, tier: str) -> Iterator[Case]:
    m = _mid(spec, dtype, tier)
    for w, b in spec.param_kinds:
        yield replace(m, weight=w, bias=b)
    for eps in (0.0, 1e-3, 1e-1):
        yield replace(m, eps=eps)


def _stride_cases(spec: OpSpec, dtype: str, tier: str) -> Iterator[Case]:
    m = _mid(spec, dtype, tier)
    for s in ("transposed", "sliced", "reversed"):
        yield replace(m, strides=s)
    if "channels_last_memory" in spec.axes.strides:
        yield replace(m, strides="channels_last_memory")
    if "channels_last" in spec.axes.layouts:
        yield replace(_mid(spec, dtype, tier, "channels_last"), strides="reversed")


def _mode_cases(spec: OpSpec, dtype: str, tier: str) -> Iterator[Case]:
    if not spec.has_eval:
        return
    m = _mid(spec, dtype, tier)
    yield replace(m, mode="eval")
    yield replace(m, mode="eval", values="cancellation", layout="channels_first")
    yield replace(_mid(spec, dtype, tier, "channels_last"), mode="eval")
    for mom in (0.1, 0.01, 1.0, 0.0):
        yield replace(m, running=True, momentum=mom)
    yield replace(m, running=True, momentum=None, batches_seen=3)
    yield replace(m, running=True, values="cancellation")
    yield replace(_mid(spec, dtype, tier, "channels_last"), running=True, momentum=0.3)


def _long_cases(spec: OpSpec, dtype: str, tier: str) -> Iterator[Case]:
    shape, k = spec.shapes.long
    base = _base(spec, dtype, shape, spec.axes.layouts[0], k, tier)
    yield base
    yield replace(base, values="cancellation", running=spec.long_running)


def _range_cases(spec: OpSpec, dtype: str, tier: str) -> Iterator[Case]:
    """Where real bugs live at the ends of the ranges (docs/tolerances.md, "Ranges"): large magnitudes,
    an eps that the narrow formats cannot hold on zero-variance groups, dy = 1 over parameter sums
    longer than float16's largest value, and eval-mode running statistics unlike the batch's."""
    m = _mid(spec, dtype, tier)
    for k in spec.range_value_kinds:
        yield replace(m, values=k)
    for k in TINY_EPS_VALUES:
        yield replace(m, values=k, eps=TINY_EPS)
    shape, k = spec.shapes.long_params or spec.shapes.long
    base = _base(spec, dtype, shape, spec.axes.layouts[0], k, tier)
    for d in spec.dy_kinds:
        yield replace(base, dy=d)
    if spec.has_eval:
        for r in spec.running_value_kinds:
            yield replace(m, mode="eval", running_values=r)


def _residual_cases(spec: OpSpec, dtype: str, tier: str) -> Iterator[Case]:
    """A fused residual add's bias on the residual stream (h = x + residual + residual_bias: three terms,
    two roundings), with and without the layer's own weight and bias, and on a longer row."""
    if not spec.residual:
        return
    m = _mid(spec, dtype, tier)
    yield replace(m, residual_bias=True, weight="random", bias="random")
    yield replace(m, residual_bias=True, weight="none", bias="none")
    yield replace(m, residual_bias=True, values="cancellation")
    shape, k, layout = spec.shapes.long_cancellation
    yield replace(_base(spec, dtype, shape, layout, k, tier), residual_bias=True)


#: Multi-replica shard plans per tier: (shape (channels first), layout, shards, values, running).
#: R = 2..4, unequal shards, one-sample shards, both layouts, the standard tier's cancellation
#: values and its long reduction (2^20 elements per channel, batch norm's (16, 2, 256, 256)).
_REPLICA_PLANS = {
    "smoke": (((4, 3, 2, 2), "channels_first", (1, 3), "normal", False),
              ((5, 3, 4, 4), "channels_first", (2, 3), "normal", True),
              ((6, 3, 4, 4), "channels_last", (1, 4, 1), "normal", False)),
    "standard": (((10, 4, 3, 5), "channels_first", (1, 2, 3, 4), "cancellation", True),
                 ((4, 2, 3, 3), "channels_last", (1, 1, 1, 1), "normal", True),
                 ((16, 2, 256, 256), "channels_first", (5, 11), "normal", False)),
    "exhaustive": (((7, 5, 3, 3), "channels_last", (3, 1, 3), "cancellation", True),
                   ((9, 3, 2, 2), "channels_first", (1, 8), "normal", True),
                   ((3, 4, 5), "channels_first", (1, 2), "normal", False)),
}


def _replica_cases(spec: OpSpec, dtype: str, tier: str) -> Iterator[Case]:
    """A multi-replica op's tier: the plans of the tiers up to this one."""
    for t in TIERS[:TIERS.index(tier) + 1]:
        for shape, layout, shards, values, running in _REPLICA_PLANS[t]:
            yield replace(_base(spec, dtype, shape, layout, 1, tier), values=values, running=running,
                          shards=shards)


# ---------------------------------------------------------------- tiers
def _smoke(spec: OpSpec, dtype: str) -> Iterator[Case]:
    yield from _shape_cases(spec, dtype, "smoke")
    m = _mid(spec, dtype, "smoke")
    yield replace(m, values="cancellation")
    yield replace(m, weight="none", bias="none")
    if spec.has_eval:
        yield replace(m, mode="eval")
        yield replace(m, running=True)
    if spec.residual:
        yield replace(m, residual_bias=True)


def _standard(spec: OpSpec, dtype: str) -> Iterator[Case]:
    for gen in (_shape_cases, _value_cases, _param_cases, _stride_cases, _mode_cases, _long_cases, _range_cases,
                _residual_cases):
        yield from gen(spec, dtype, "standard")


def _exhaustive(spec: OpSpec, dtype: str) -> Iterator[Case]:
    yield from _standard(spec, dtype)
    tier = "exhaustive"
    yield from _shape_cases(spec, dtype, tier)
    values = ["normal", "cancellation", "heavy_tail", "nonfinite", "constant"]
    strides = ["contiguous", "transposed", "reversed"]
    for v, s, eps in itertools.product(values, strides, (1e-5, 1e-1)):
        for layout in spec.axes.layouts:
            yield replace(_mid(spec, dtype, tier, layout), values=v, strides=s, eps=eps)


def _valid(c: Case) -> bool:
    # eps = 0 on a zero-variance group is 0/0: the oracle is NaN there by IEEE arithmetic,
    # which says nothing about a kernel; keep eps > 0 for such data.
    if c.eps == 0.0 and c.values in ("constant", "zeros", "subnormal"):
        return False
    if c.strides == "channels_last_memory" and (c.layout != "channels_first" or len(c.shape) < 3):
        return False
    return True


def catalog(ops: Iterable[str], dtypes: Iterable[str], tier: str = "standard", quantized: bool = False) -> list[Case]:
    """The cases of a tier for the given ops and dtypes, deduplicated by id, in a stable order.
    ``quantized``: add the quantized-y cases (conformance.quantized) after each op and dtype's others."""
    if tier not in TIERS:
        raise ValueError(f"tier is {tier!r}, expected one of {', '.join(TIERS)}")
    gen = {"smoke": _smoke, "standard": _standard, "exhaustive": _exhaustive}[tier]
    specs = [_ops.get(op) for op in ops]
    dtypes = list(dtypes)
    seen: dict[str, Case] = {}
    for spec in specs:
        for dt in dtypes:
            for c in (_replica_cases(spec, dt, tier) if spec.replicas else gen(spec, dt)):
                if _valid(c) and c.id not in seen:
                    seen[c.id] = c
            if quantized and not spec.replicas:
                from ..quantized import quantized_cases

                shape, k = spec.shapes.long
                long = _base(spec, dt, shape, spec.axes.layouts[0], k, tier)
                for c in quantized_cases(spec, dt, tier, _mid(spec, dt, tier), long):
                    if _valid(c) and c.id not in seen:
                        seen[c.id] = c
    return list(seen.values())


def find_case(case_id: str, tiers: Iterable[str] = TIERS) -> Case:
    """The case with this id, searching the tiers; a KeyError names the nearest miss."""
    parts = case_id.split("/")
    if len(parts) < 2:
        raise KeyError(f"case id {case_id!r} is not of the form op/dtype/...")
    op, dt = parts[0], parts[1]
    if _ops.find(op) is None:
        raise KeyError(f"no case with id {case_id!r}: op {op!r} is not one of {', '.join(_ops.OPS)}")
    if dt not in _dtypes.FORMATS:
        raise KeyError(f"no case with id {case_id!r}: dtype {dt!r} is not one of {', '.join(_dtypes.FORMATS)}")
    for t in tiers:
        for c in catalog([op], [dt], t, quantized="/out=" in case_id):
            if c.id == case_id:
                return c
    raise KeyError(f"no case with id {case_id!r} in tiers {', '.join(tiers)} (list them with `refnorm cases`)")
