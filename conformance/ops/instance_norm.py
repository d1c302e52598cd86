"""Instance normalization: one statistic per sample and channel over the spatial axes (group
norm with one channel per group). Running statistics, as torch's InstanceNorm keeps them: per
channel, the batch mean of the per-sample statistics."""

import refnorm

from .axes import PerSampleGroups
from .shapes import channel_shapes
from .spec import RUNNING_MODES, OpSpec

SPEC = OpSpec(
    name="instance_norm",
    axes=PerSampleGroups(from_case=False),
    forward=refnorm.instance_norm_forward,
    backward=refnorm.instance_norm_backward,
    shapes=channel_shapes(long=((1, 2, 1024, 1024), 2)),
    has_eval=True,
    running_from_samples=True,
    modes=RUNNING_MODES,
)
