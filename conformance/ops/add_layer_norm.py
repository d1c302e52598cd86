"""Fused residual add + layer norm: h = x + residual (+ residual_bias), y = layer_norm(h)
(refnorm.add_layer_norm_forward). Everything else is layer norm's description; the harness side
of the add is conformance.ops.residual."""

from dataclasses import replace

from .layer_norm import SPEC as _LAYER

SPEC = replace(_LAYER, name="add_layer_norm", residual=True)
