"""The case catalog: small composable generators of shapes, values and parameters, in three tiers.

smoke      a handful of cases per op and dtype, seconds;
standard   the default and the CI gate: edge shapes, every value kind, layouts and
           strides, parameters, modes, and long reductions (2^20 elements per group);
exhaustive the cross product of the standard axes on more shapes.

Everything is deterministic: the same tier, op and dtype give the same cases in
the same order, and a case's data depends only on the run's seed and the case id.
"""

from __future__ import annotations

import itertools
from dataclasses import replace
from typing import Iterable, Iterator

from .model import TIERS, Case

__all__ = ["catalog", "OPS_WITH_CHANNELS", "find_case"]

OPS_WITH_CHANNELS = ("batch_norm", "group_norm", "instance_norm")
LONG = 1 << 20


# ---------------------------------------------------------------- shapes
def _channel_shapes(op: str, tier: str) -> list[tuple[tuple[int, ...], int]]:
    """(channels-first shape, groups) pairs: edge, odd/prime, typical, ranks 2..5."""
    if tier == "smoke":
        return [((4, 6, 5, 5), 3), ((3, 8), 2)]
    shapes = [
        ((1, 6, 7, 7), 3),        # batch of 1
        ((5, 6, 1, 1), 2),        # 1x1 spatial
        ((3, 7, 11), 7),          # odd and prime sizes, rank 3
        ((2, 10, 13, 3, 5), 5),   # rank 5
        ((16, 4), 2),             # rank 2
        ((8, 32, 14, 14), 8),     # typical convolution activation
        ((1, 6, 1, 1), 6),        # one element per group for group/instance norm
        ((33, 12, 9, 9), 4),
    ]
    if op == "batch_norm":
        shapes.append(((1, 5), 1))  # one element per channel
    if tier == "exhaustive":
        shapes += [((2, 64, 28, 28), 32), ((7, 3, 17, 19), 3), ((4, 16, 8, 8, 8), 4), ((64, 1024), 32)]
    return shapes


def _long_channel_shape(op: str) -> tuple[tuple[int, ...], int]:
    """A shape with 2^20 elements per statistic."""
    if op == "batch_norm":
        return (16, 2, 256, 256), 1
    if op == "group_norm":
        return (1, 4, 512, 1024), 2
    return (1, 2, 1024, 1024), 2


def _feature_shapes(tier: str) -> list[tuple[tuple[int, ...], int]]:
    """(shape, norm_ndim) for layer and RMS norm."""
    if tier == "smoke":
        return [((4, 64), 1), ((2, 3, 16), 1)]
    shapes = [
        ((6, 1), 1),              # one element per row
        ((1, 257), 1),            # batch of 1, prime length
        ((7, 13), 1),
        ((2, 5, 6), 2),           # two normalized axes
        ((2, 3, 4, 10), 1),       # rank 4
        ((2, 2, 3, 4, 5), 3),     # rank 5
        ((8, 128, 768), 1),       # transformer activation
        ((6, 4096), 1),
        ((3, 999), 1),            # length not a multiple of 8
    ]
    if tier == "exhaustive":
        shapes += [((32, 4096), 1), ((4, 7, 9, 11), 2), ((1, 50257), 1)]
    return shapes


# ---------------------------------------------------------------- building blocks
def _base(op: str, dtype: str, shape: tuple[int, ...], layout: str, groups: int, norm_ndim: int, tier: str) -> Case:
    if layout == "channels_last":
        shape = (shape[0],) + tuple(shape[2:]) + (shape[1],)
    # RMS norm has no bias in the libraries that define it (Zhang & Sennrich 2019, eq. 4; torch, Keras).
    return Case(op=op, dtype=dtype, shape=shape, layout=layout, groups=groups if op == "group_norm" else 0,
                norm_ndim=norm_ndim, tier=tier, bias="none" if op == "rms_norm" else "random")


def _shape_cases(op: str, dtype: str, tier: str) -> Iterator[Case]:
    if op in OPS_WITH_CHANNELS:
        for shape, g in _channel_shapes(op, tier):
            for layout in ("channels_first", "channels_last"):
                yield _base(op, dtype, shape, layout, g, 0, tier)
    else:
        for shape, nd in _feature_shapes(tier):
            yield _base(op, dtype, shape, "trailing", 0, nd, tier)


def _mid(op: str, dtype: str, tier: str, layout: str | None = None) -> Case:
    """The workhorse shape on which value kinds and parameters vary."""
    if op in OPS_WITH_CHANNELS:
        return _base(op, dtype, (4, 8, 6, 5), layout or "channels_first", 4, 0, tier)
    return _base(op, dtype, (12, 96), "trailing", 0, 1, tier)


def _value_cases(op: str, dtype: str, tier: str) -> Iterator[Case]:
    kinds = ["normal", "cancellation", "constant", "heavy_tail", "subnormal", "zeros", "nonfinite"]
    if dtype in ("float16", "float8_e4m3fn", "float8_e5m2"):
        kinds.append("near_overflow")  # only where the accumulation format has range to spare
    for k in kinds:
        yield replace(_mid(op, dtype, tier), values=k)
    # cancellation on a longer reduction, both layouts for channel ops
    if op in OPS_WITH_CHANNELS:
        yield replace(_base(op, dtype, (8, 16, 12, 12), "channels_last", 4, 0, tier), values="cancellation")
    else:
        yield replace(_base(op, dtype, (4, 2048), "trailing", 0, 1, tier), values="cancellation")


def _param_cases(op: str, dtype: str, tier: str) -> Iterator[Case]:
    m = _mid(op, dtype, tier)
    combos = [("none", "none"), ("random", "none"), ("zero", "random"), ("negative", "zero"), ("ones", "random")]
    if op == "rms_norm":
        combos = [("none", "none"), ("zero", "none"), ("negative", "none"), ("ones", "none"), ("random", "random")]
    for w, b in combos:
        yield replace(m, weight=w, bias=b)
    for eps in (0.0, 1e-3, 1e-1):
        yield replace(m, eps=eps)


def _stride_cases(op: str, dtype: str, tier: str) -> Iterator[Case]:
    kinds = ["transposed", "sliced", "reversed"]
    m = _mid(op, dtype, tier)
    for s in kinds:
        yield replace(m, strides=s)
    if op in OPS_WITH_CHANNELS:
        yield replace(m, strides="channels_last_memory")
        yield replace(_mid(op, dtype, tier, "channels_last"), strides="reversed")


def _mode_cases(op: str, dtype: str, tier: str) -> Iterator[Case]:
    if op not in ("batch_norm", "instance_norm"):
        return
    m = _mid(op, dtype, tier)
    yield replace(m, mode="eval")
    yield replace(m, mode="eval", values="cancellation", layout="channels_first")
    yield replace(_mid(op, dtype, tier, "channels_last"), mode="eval")
    for mom in (0.1, 0.01, 1.0, 0.0):
        yield replace(m, running=True, momentum=mom)
    yield replace(m, running=True, momentum=None, batches_seen=3)
    yield replace(m, running=True, values="cancellation")
    yield replace(_mid(op, dtype, tier, "channels_last"), running=True, momentum=0.3)


def _long_cases(op: str, dtype: str, tier: str) -> Iterator[Case]:
    if op in OPS_WITH_CHANNELS:
        shape, g = _long_channel_shape(op)
        base = _base(op, dtype, shape, "channels_first", g, 0, tier)
        yield base
        yield replace(base, values="cancellation", running=op == "batch_norm")
    else:
        base = _base(op, dtype, (2, LONG), "trailing", 0, 1, tier)
        yield base
        yield replace(base, values="cancellation")


# ---------------------------------------------------------------- tiers
def _smoke(op: str, dtype: str) -> Iterator[Case]:
    yield from _shape_cases(op, dtype, "smoke")
    m = _mid(op, dtype, "smoke")
    yield replace(m, values="cancellation")
    yield replace(m, weight="none", bias="none")
    if op in ("batch_norm", "instance_norm"):
        yield replace(m, mode="eval")
        yield replace(m, running=True)


def _standard(op: str, dtype: str) -> Iterator[Case]:
    for gen in (_shape_cases, _value_cases, _param_cases, _stride_cases, _mode_cases, _long_cases):
        yield from gen(op, dtype, "standard")


def _exhaustive(op: str, dtype: str) -> Iterator[Case]:
    yield from _standard(op, dtype)
    tier = "exhaustive"
    yield from _shape_cases(op, dtype, tier)
    values = ["normal", "cancellation", "heavy_tail", "nonfinite", "constant"]
    strides = ["contiguous", "transposed", "reversed"]
    for v, s, eps in itertools.product(values, strides, (1e-5, 1e-1)):
        for c in (_mid(op, dtype, tier),) + ((_mid(op, dtype, tier, "channels_last"),) if op in OPS_WITH_CHANNELS else ()):
            yield replace(c, values=v, strides=s, eps=eps)


def _valid(c: Case) -> bool:
    # eps = 0 on a zero-variance group is 0/0: the oracle is NaN there by IEEE arithmetic,
    # which says nothing about a kernel; keep eps > 0 for such data.
    if c.eps == 0.0 and c.values in ("constant", "zeros", "subnormal"):
        return False
    if c.strides == "channels_last_memory" and (c.layout != "channels_first" or len(c.shape) < 3):
        return False
    return True


def catalog(ops: Iterable[str], dtypes: Iterable[str], tier: str = "standard") -> list[Case]:
    """The cases of a tier for the given ops and dtypes, deduplicated by id, in a stable order."""
    if tier not in TIERS:
        raise ValueError(f"tier is {tier!r}, expected one of {', '.join(TIERS)}")
    gen = {"smoke": _smoke, "standard": _standard, "exhaustive": _exhaustive}[tier]
    seen: dict[str, Case] = {}
    for op in ops:
        for dt in dtypes:
            for c in gen(op, dt):
                if _valid(c) and c.id not in seen:
                    seen[c.id] = c
    return list(seen.values())


def find_case(case_id: str, tiers: Iterable[str] = TIERS) -> Case:
    """The case with this id, searching the tiers; a KeyError names the nearest miss."""
    parts = case_id.split("/")
    if len(parts) < 2:
        raise KeyError(f"case id {case_id!r} is not of the form op/dtype/...")
    op, dt = parts[0], parts[1]
    for t in tiers:
        for c in catalog([op], [dt], t):
            if c.id == case_id:
                return c
    raise KeyError(f"no case with id {case_id!r} in tiers {', '.join(tiers)} (list them with `refnorm cases`)")
