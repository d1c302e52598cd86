"""RMS normalization (Zhang & Sennrich 2019): like layer norm, but the statistic is the mean
square, with no centering; no bias in the libraries that define it (eq. 4; torch, Keras), so
the catalog's cases have none except where a parameter case adds one."""

import refnorm

from .axes import TrailingAxes
from .shapes import feature_shapes
from .spec import OpSpec

SPEC = OpSpec(
    name="rms_norm",
    axes=TrailingAxes(),
    forward=refnorm.rms_norm_forward,
    backward=refnorm.rms_norm_backward,
    shapes=feature_shapes(),
    centered=False,
    default_bias="none",
    param_kinds=(("none", "none"), ("zero", "none"), ("negative", "none"), ("ones", "none"), ("random", "random")),
    weight_offsets=True,
)
