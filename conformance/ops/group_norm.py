"""Group normalization (Wu & He 2018): one statistic per sample and group of consecutive
channels, over the group's channels and the spatial axes."""

import refnorm

from .axes import PerSampleGroups
from .shapes import channel_shapes
from .spec import OpSpec

SPEC = OpSpec(
    name="group_norm",
    axes=PerSampleGroups(from_case=True),
    forward=refnorm.group_norm_forward,
    backward=refnorm.group_norm_backward,
    shapes=channel_shapes(long=((1, 4, 512, 1024), 2)),
)
