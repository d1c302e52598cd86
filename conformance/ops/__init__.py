"""The operations: one description per op (OpSpec), the registry, and the calls built from them.

    spec.py       OpSpec, CatalogShapes and the shared vocabularies (statistics, modes, kinds)
    axes.py       how statistics group the axes: PerChannel, PerSampleGroups, TrailingAxes
    shapes.py     catalog shapes shared by an op family
    <op>.py       one module per op: its SPEC
    registry.py   OPS, get(name), find(name)
    calls.py      oracle calls, forward outputs and kernel keyword arguments for a case
    residual.py   the oracle's view of a fused residual add's and a weight offset's inputs

Consumers look an op up (``get(case.op)``) and read its fields; docs/adding-an-operation.md
walks through the module a new op needs.
"""

from .calls import forward_outputs, kernel_kwargs, oracle_backward, oracle_forward, saved_form
from .registry import OPS, SPECS, find, get, with_eval
from .residual import base_inputs, oracle_view, stored_h
from .spec import GRADS, RUNNING_OUTPUTS, SAVED_FORMS, STATISTICS, CatalogShapes, OpSpec

__all__ = ["OpSpec", "CatalogShapes", "OPS", "SPECS", "get", "find", "with_eval", "SAVED_FORMS",
           "STATISTICS", "GRADS", "RUNNING_OUTPUTS", "forward_outputs", "oracle_forward", "oracle_backward",
           "kernel_kwargs", "saved_form", "oracle_view", "base_inputs", "stored_h"]
