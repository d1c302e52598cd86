"""The registered ops, in the order the catalog, the CLI and reports list them."""

from __future__ import annotations

from . import (add_layer_norm, add_rms_norm, batch_norm, group_norm, instance_norm, layer_norm, replica_batch_norm,
               rms_norm)
from .spec import OpSpec

__all__ = ["OPS", "SPECS", "get", "find", "with_eval"]

#: name -> description. A new op is a module beside these and one entry here.
SPECS: dict[str, OpSpec] = {s.name: s for s in (
    batch_norm.SPEC,
    layer_norm.SPEC,
    group_norm.SPEC,
    instance_norm.SPEC,
    rms_norm.SPEC,
    add_layer_norm.SPEC,
    add_rms_norm.SPEC,
    replica_batch_norm.SPEC,
)}
OPS: tuple[str, ...] = tuple(SPECS)


def find(name: str) -> OpSpec | None:
    """The description of op ``name``, or None when no op has that name."""
    return SPECS.get(name)


def get(name: str) -> OpSpec:
    """The description of op ``name``; a ValueError names the registered ops."""
    spec = SPECS.get(name) if isinstance(name, str) else None
    if spec is None:
        raise ValueError(f"op is {name!r}, expected one of {', '.join(OPS)}")
    return spec


def with_eval() -> tuple[str, ...]:
    """The ops that have an eval mode with running statistics (a multi-replica op's is its base op's)."""
    return tuple(n for n, s in SPECS.items() if s.has_eval and not s.replicas)
