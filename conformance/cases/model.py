"""One conformance case: a fully specified, reproducible call of a normalization op."""

from __future__ import annotations

import hashlib
import math
from dataclasses import asdict, dataclass, field

from .. import ops

__all__ = ["Case", "TIERS", "VALUE_KINDS", "STRIDE_KINDS", "DY_KINDS", "RUNNING_VALUE_KINDS"]

TIERS = ("smoke", "standard", "exhaustive")
VALUE_KINDS = (
    "normal",        # standard normal
    "cancellation",  # large mean, small spread (per dtype, see generators)
    "constant",      # every normalization group constant: zero variance
    "heavy_tail",    # Student t with 2 degrees of freedom
    "near_overflow", # magnitudes near the storage format's largest finite value
    "subnormal",     # magnitudes in the storage format's subnormal range
    "zeros",         # exact zeros
    "nonfinite",     # normal values with a few NaN and +-Inf
    "large",         # large magnitudes, up to what a correct kernel of the format must handle
)
DY_KINDS = ("normal", "ones")      # the upstream gradient: standard normal, or 1 everywhere
RUNNING_VALUE_KINDS = ("near", "far", "wide", "at_mean")  # eval's running statistics (generators)
STRIDE_KINDS = ("contiguous", "transposed", "sliced", "reversed", "channels_last_memory")


#: Case fields that results documents and catalogs written before them do not have, with their
#: defaults: ``as_dict`` leaves a field out at its default, so those documents' cases read the same.
_LATER_FIELDS = {"residual_bias": False, "out": "", "scale": "", "shards": ()}


@dataclass(frozen=True)
class Case:
    """A case of the catalog. Every field is part of the id, so the id reproduces the case.

    shape : the logical shape of x in its layout: (N, C, *spatial) for channels_first,
        (N, *spatial, C) for channels_last, (*batch, *normalized) for layer/RMS norm.
    layout : "channels_first" | "channels_last" (batch/group/instance norm); "trailing"
        (layer/RMS norm: the last ``norm_ndim`` axes are normalized).
    strides : how x (and dy) are laid out in memory: "contiguous", "transposed" (a
        C-contiguous buffer of another axis order, viewed back), "sliced" (every other
        element of a larger buffer along the last axis), "reversed" (negative strides on
        every axis), "channels_last_memory" (logical (N, C, *spatial) stored with C
        fastest, as torch's channels_last memory format).
    mode : "train" | "eval" (eval: batch/instance norm with running statistics).
    running : train mode also updates running statistics.
    dy : the upstream gradient's kind, "normal" or "ones" (part of the id only when not "normal").
    residual_bias : a fused residual-add op also adds a bias of the normalized shape to the residual
        stream, h = x + residual + residual_bias (part of the id, ``rbias``, only when True).
    running_values : the running statistics' kind, "near" (near the batch's own), "far", "wide"
        (outside the storage format's range) or "at_mean" (x equal to the running mean); part of
        the id only when not "near".
    out, scale : a quantized y (conformance.quantized): the 8-bit format ("" for y as is) and the
        scale mode ("tensor", "row", "static" chosen to fit, "static_overflow" chosen so that some
        values overflow); the id's last part ``out=<format>,scale=<mode>`` when set, and left out of
        as_dict when not (so that every unquantized case is as it was).
    shards : a multi-replica op (conformance.run.replicas): the samples each replica holds, in rank
        order, summing to shape[0]; the id's ``replicas=R,shards=n0+n1+...`` after the shape.
    """

    op: str
    dtype: str
    shape: tuple[int, ...]
    layout: str
    values: str = "normal"
    weight: str = "random"      # none | random | ones | zero | negative
    bias: str = "random"        # none | random | zero
    eps: float = 1e-5
    mode: str = "train"
    running: bool = False
    momentum: float | None = 0.1
    batches_seen: int = 0
    strides: str = "contiguous"
    groups: int = 0             # group norm only
    norm_ndim: int = 0          # layer/RMS norm only
    dy: str = "normal"
    running_values: str = "near"
    residual_bias: bool = False
    out: str = ""
    scale: str = ""
    shards: tuple[int, ...] = ()
    tier: str = field(default="standard", compare=False)  # where the catalog lists it; not part of the id

    @property
    def id(self) -> str:
        """Readable stable id: op/dtype/layout/shape/values[/dy=]/w=/b=/eps=/mode[/running=][/momentum]/strides."""
        parts = [self.op, self.dtype, self.layout, "x".join(map(str, self.shape))]
        if self.shards:
            parts.append(f"replicas={len(self.shards)},shards={'+'.join(map(str, self.shards))}")
        if ops.get(self.op).axes.takes_groups:
            parts.append(f"groups={self.groups}")
        if self.norm_ndim:
            parts.append(f"norm_ndim={self.norm_ndim}")
        parts.append(self.values)
        if self.residual_bias:
            parts.append("rbias")
        if self.dy != "normal":
            parts.append(f"dy={self.dy}")
        parts += [f"w={self.weight}", f"b={self.bias}", f"eps={self.eps:g}", self.mode]
        if self.running_values != "near":
            parts.append(f"running={self.running_values}")
        if self.running and self.mode == "train":
            m = "cumulative" if self.momentum is None else f"{self.momentum:g}"
            parts.append(f"momentum={m}" + (f",seen={self.batches_seen}" if self.momentum is None else ""))
        parts.append(self.strides)
        if self.out:
            parts.append(f"out={self.out},scale={self.scale}")
        return "/".join(parts)

    @property
    def channel_axis(self) -> int:
        return 1 if self.layout == "channels_first" else len(self.shape) - 1

    @property
    def channels(self) -> int:
        return self.shape[self.channel_axis]

    @property
    def normalized_shape(self) -> tuple[int, ...]:
        return tuple(self.shape[len(self.shape) - self.norm_ndim:])

    @property
    def numel(self) -> int:
        return math.prod(self.shape)

    @property
    def group_length(self) -> int:
        """Elements per normalization statistic (the reduction length n of the forward pass)."""
        return ops.get(self.op).axes.group_length(self)

    @property
    def param_length(self) -> int:
        """Terms in each dweight/dbias sum (the reduction length of the parameter gradients)."""
        return ops.get(self.op).axes.param_length(self)

    def seed_for(self, base_seed: int) -> int:
        """A 63-bit seed from the run's seed and the id: the same case gives the same data."""
        h = hashlib.sha256(f"{base_seed}:{self.id}".encode()).digest()
        return int.from_bytes(h[:8], "little") >> 1

    def as_dict(self) -> dict:
        d = asdict(self)
        for name, default in _LATER_FIELDS.items():
            if d[name] == default:  # fields added after results documents existed: written only when set
                del d[name]
        d["shape"] = list(self.shape)
        if "shards" in d:
            d["shards"] = list(self.shards)
        d["id"] = self.id
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "Case":
        fields = {k: v for k, v in d.items() if k in cls.__dataclass_fields__}
        fields["shape"] = tuple(fields["shape"])
        if "shards" in fields:
            fields["shards"] = tuple(fields["shards"])
        return cls(**fields)
