"""Multi-replica batch normalization: batch norm (conformance.ops.batch_norm) of a batch split
across R replicas along axis 0 (Case.shards samples each). Its kernels take a rank, a world size
and collectives (conformance/run/replicas.py), so it runs in training mode only (eval mode is the
single-process op's), on contiguous shards; its inputs, global oracle and bounds are batch norm's,
the merge's own rounding added (conformance.run.replicas.merge_bound)."""

from dataclasses import dataclass, replace
from typing import ClassVar

from . import batch_norm
from .axes import PerChannel

NAME = "replica_batch_norm"
#: The single-process op whose description gives the global batch's inputs and bounds.
BASE = batch_norm.SPEC


@dataclass(frozen=True)
class ShardedPerChannel(PerChannel):
    """Batch norm's axes; each replica is handed a contiguous shard of the global batch."""

    strides: ClassVar[tuple[str, ...]] = ("contiguous",)


SPEC = replace(
    BASE,
    name=NAME,
    axes=ShardedPerChannel(),
    replicas=True,
    value_kinds=("normal", "cancellation"),
    range_value_kinds=(),
    param_kinds=(),
    dy_kinds=(),
    running_value_kinds=(),
    modes=(("train", False, "training without running statistics"),
           ("train", True, "training with running-statistic updates")),
)
