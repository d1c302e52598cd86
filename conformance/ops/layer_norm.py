"""Layer normalization (Ba, Kiros & Hinton 2016): one statistic per leading index over the
last norm_ndim axes, with weight and bias of the normalized shape."""

import refnorm

from .axes import TrailingAxes
from .shapes import feature_shapes
from .spec import OpSpec

SPEC = OpSpec(
    name="layer_norm",
    axes=TrailingAxes(),
    forward=refnorm.layer_norm_forward,
    backward=refnorm.layer_norm_backward,
    shapes=feature_shapes(),
)
