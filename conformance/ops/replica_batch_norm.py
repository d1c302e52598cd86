"""Multi-replica batch normalization: batch norm (conformance.ops.batch_norm) of a batch split
across R replicas. Not a registered op: its kernels take a rank, a world size and collectives
(conformance/run/replicas.py), so its cases are batch norm cases of the global batch plus a shard
plan, and their inputs and bounds are batch norm's."""

from . import batch_norm

NAME = "replica_batch_norm"
#: The single-process op whose description gives the global batch's cases, inputs and bounds.
BASE = batch_norm.SPEC
