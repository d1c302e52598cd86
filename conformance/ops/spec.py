"""OpSpec: everything the harness knows about one operation, in one frozen record.

Every consumer (the catalog, the input generators, the kernel declaration's checks, the oracle
calls, the bounds, the report) looks an op up with ``conformance.ops.get(name)`` and reads its
fields; none of them branches on an op's name. A field a consumer lacks is added here, not as a
name test in the consumer (docs/adding-an-operation.md).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Protocol

from .axes import View

__all__ = ["OpSpec", "RESIDUAL_OUTPUTS", "H_FORMATS", "CatalogShapes", "Axes", "STATISTICS", "SAVED_FORMS", "GRADS", "RUNNING_OUTPUTS",
           "RUNNING_MODES", "VALUE_KINDS", "PARAM_KINDS", "RANGE_VALUE_KINDS", "TINY_EPS", "TINY_EPS_VALUES",
           "DY_KINDS", "RUNNING_VALUE_KINDS"]

#: Forms of the saved dispersion statistic: rstd = 1/sqrt(var+eps), var (biased),
#: var_unbiased (M2/(n-1), what TF's fused_batch_norm returns), std = sqrt(var+eps).
SAVED_FORMS = ("rstd", "var", "var_unbiased", "std")
#: Every statistic a forward pass may save: the mean, then the dispersion forms.
STATISTICS = ("mean",) + SAVED_FORMS
GRADS = ("dx", "dweight", "dbias")
RUNNING_OUTPUTS = ("running_mean", "running_var")
#: What a fused residual-add op returns besides y and its statistics: h = x + residual (+ residual
#: bias), the residual stream passed on to the next layer.
RESIDUAL_OUTPUTS = ("h",)
#: Where a fused residual-add op's h is when it is normalized: rounded to the storage format first
#: ("storage": most fused kernels, which store h anyway: common practice) or as the accumulation
#: format holds the sum ("accumulate").
H_FORMATS = ("storage", "accumulate")

#: (mode, running, words): the kinds of call of an op with running statistics, as the report names
#: a kind that no case ran.
RUNNING_MODES = (("train", False, "training without running statistics"),
                 ("train", True, "training with running-statistic updates"),
                 ("eval", False, "eval mode (running statistics)"))

#: The value kinds every op's catalog draws x from, in catalog order (near_overflow is added per
#: dtype by the catalog: it applies where the accumulation format has range to spare).
VALUE_KINDS = ("normal", "cancellation", "constant", "heavy_tail", "subnormal", "zeros", "nonfinite")
#: (weight, bias) kinds of the catalog's parameter cases, in catalog order.
PARAM_KINDS = (("none", "none"), ("random", "none"), ("zero", "random"), ("negative", "zero"), ("ones", "random"))
#: The range cases (catalog order, after every other standard case; docs/tolerances.md, "Ranges"):
#: x of large magnitude up to what a correct kernel must handle ...
RANGE_VALUE_KINDS = ("large",)
#: ... an eps below the smallest subnormal of float16 and float8 (BERT-style layer norm's 1e-12,
#: from memory) on the zero-variance value kinds ...
TINY_EPS = 1e-12
TINY_EPS_VALUES = ("constant", "zeros")
#: ... a constant upstream gradient (dy = 1, the gradient of a sum loss) over the long parameter
#: reduction ("normal" is every other case's dy) ...
DY_KINDS = ("normal", "ones")
#: ... and, for ops with an eval mode, running statistics other than near the batch's own ("near",
#: every other case's): far from them, outside the storage format's range, and equal to x.
RUNNING_VALUE_KINDS = ("near", "far", "wide", "at_mean")

Shape = tuple[int, ...]


class Axes(Protocol):
    """How an op's statistics group the axes of x (conformance.ops.axes has the three rules)."""

    layouts: tuple[str, ...]
    strides: tuple[str, ...]
    takes_groups: bool

    def case_fields(self, k: int) -> dict[str, int]: ...
    def kwargs(self, case: Any) -> dict[str, Any]: ...
    def group_length(self, case: Any) -> int: ...
    def param_length(self, case: Any) -> int: ...
    def param_shape(self, case: Any) -> tuple[int, ...]: ...
    def view(self, case: Any) -> View: ...


@dataclass(frozen=True)
class CatalogShapes:
    """The shapes of an op's catalog, each as (shape, k), in catalog order.

    k is what the op's Axes rule makes of it (``Axes.case_fields``): the number of groups for
    channel ops, whose shapes are written channels first (the catalog moves C last for the
    channels_last layout), or the number of normalized trailing axes for layer and RMS norm.

    smoke, standard : the shape cases of those tiers (each in every layout of the op).
    exhaustive : shapes the exhaustive tier adds to the standard ones.
    mid : the workhorse shape on which value kinds, parameters, strides and modes vary.
    long_cancellation : (shape, k, layout): the cancellation case on a longer reduction.
    long : a shape with 2^20 elements per statistic (the standard tier's long reductions).
    long_params : a shape with more than 65504 (float16's largest value) terms per dweight/dbias sum,
        for the constant-gradient case; None: ``long``.
    """

    smoke: tuple[tuple[Shape, int], ...]
    standard: tuple[tuple[Shape, int], ...]
    exhaustive: tuple[tuple[Shape, int], ...]
    mid: tuple[Shape, int]
    long_cancellation: tuple[Shape, int, str]
    long: tuple[Shape, int]
    long_params: tuple[Shape, int] | None = None

    def for_tier(self, tier: str) -> tuple[tuple[Shape, int], ...]:
        if tier == "smoke":
            return self.smoke
        return self.standard + (self.exhaustive if tier == "exhaustive" else ())


@dataclass(frozen=True)
class OpSpec:
    """One normalization operation as the harness sees it.

    name : the op's name in kernels, case ids and reports.
    axes : how its statistics group the axes (lengths, statistic and parameter shapes, layouts,
        stride kinds, the structural keyword arguments: conformance.ops.axes).
    forward, backward : the oracle's functions, called as forward(x, weight=, bias=, **kw) and
        backward(dy, x, weight=, **kw) with kw = axes.kwargs(case) and the conventions.
    has_eval : an eval mode with running statistics (forward_eval/backward_eval entry points,
        running_mean/running_var arguments and outputs, momentum and batches_seen in training).
    centered : subtracts a mean (False: RMS norm, whose statistic is the mean square; no "mean"
        to save, and the bounds drop the mean's error terms).
    running_from_samples : the running statistics are the batch mean of per-sample statistics
        (instance norm: (N, C) statistics, (C,) running statistics); the bound adds that mean's error.
    shapes : the catalog's shapes.
    value_kinds : the value kinds of its value cases.
    param_kinds : the (weight, bias) kinds of its parameter cases.
    default_bias : the bias kind of its other cases ("none" where the libraries define no bias).
    long_running : the long cancellation case also updates running statistics.
    modes : (mode, running, words) kinds of call the report checks that some case ran.
    range_value_kinds : the value kinds of its range cases (x of large magnitude).
    dy_kinds : the upstream-gradient kinds of its long parameter-reduction cases, besides "normal".
    running_value_kinds : the running-statistic kinds of its eval range cases, besides "near"
        (read only where has_eval).
    residual : a fused residual add before the norm: forward takes ``residual`` (and, in the cases
        that have one, ``residual_bias``) besides x and returns h = x + residual (+ residual_bias);
        backward takes dh, the gradient along the residual stream, and dx (= dresidual) includes
        it. ``forward``/``backward`` are then the normalization of h (conformance.ops.residual).
    weight_offsets : the op admits Conventions.weight_offset (scale by offset + weight, the weight
        stored centred at zero: RMS norm's variant in some models).
    replicas : the batch is split across R replicas (conformance.run.replicas): a case is the op's
        case of the global batch plus a shard plan (Case.shards); its kernel runs as R processes
        with collectives, training mode only (``forward``/``backward`` are the global batch's oracle).
    """

    name: str
    axes: Axes
    forward: Callable
    backward: Callable
    shapes: CatalogShapes
    has_eval: bool = False
    centered: bool = True
    running_from_samples: bool = False
    value_kinds: tuple[str, ...] = VALUE_KINDS
    param_kinds: tuple[tuple[str, str], ...] = PARAM_KINDS
    default_bias: str = "random"
    long_running: bool = False
    modes: tuple[tuple[str, bool, str], ...] = ()
    range_value_kinds: tuple[str, ...] = RANGE_VALUE_KINDS
    dy_kinds: tuple[str, ...] = DY_KINDS[1:]
    running_value_kinds: tuple[str, ...] = RUNNING_VALUE_KINDS[1:]
    residual: bool = False
    weight_offsets: bool = False
    replicas: bool = False

    @property
    def saved(self) -> tuple[str, ...]:
        """The statistics its forward may save (conventions.saved names from these)."""
        return STATISTICS if self.centered else SAVED_FORMS

    @property
    def running_outputs(self) -> tuple[str, ...]:
        return RUNNING_OUTPUTS if self.has_eval else ()

    @property
    def grads(self) -> tuple[str, ...]:
        return GRADS

    @property
    def outputs(self) -> tuple[str, ...]:
        """Every output a kernel of this op may be checked on."""
        return ("y",) + self.residual_outputs + self.saved + self.running_outputs + self.grads

    @property
    def residual_outputs(self) -> tuple[str, ...]:
        return RESIDUAL_OUTPUTS if self.residual else ()

    @property
    def entry_points(self) -> tuple[str, ...]:
        if self.has_eval and not self.replicas:
            return ("forward", "forward_eval", "backward", "backward_eval")
        return ("forward", "backward")

    def kwargs(self, case: Any) -> dict[str, Any]:
        """The structural keyword arguments of its entry points and oracle calls (axis, num_groups,
        normalized_shape) for the case."""
        return self.axes.kwargs(case)
