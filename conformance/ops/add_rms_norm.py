"""Fused residual add + RMS norm: h = x + residual (+ residual_bias), y = rms_norm(h) (the pre-norm
block of a transformer: refnorm.add_rms_norm_forward). Everything else is RMS norm's description:
the harness checks y and the saved rstd as RMS norm of the h the kernel normalized, h against the
exact sum, dx against dh + the norm's gradient (conformance.ops.residual)."""

from dataclasses import replace

from .rms_norm import SPEC as _RMS

SPEC = replace(_RMS, name="add_rms_norm", residual=True)
