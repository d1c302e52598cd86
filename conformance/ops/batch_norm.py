"""Batch normalization (Ioffe & Szegedy 2015): one statistic per channel over the batch and
spatial axes; eval mode normalizes with running statistics that training updates."""

import refnorm

from .axes import PerChannel
from .shapes import channel_shapes
from .spec import RUNNING_MODES, OpSpec

SPEC = OpSpec(
    name="batch_norm",
    axes=PerChannel(),
    forward=refnorm.batch_norm_forward,
    backward=refnorm.batch_norm_backward,
    # one element per channel: the edge where the unbiased running variance is undefined
    shapes=channel_shapes(long=((16, 2, 256, 256), 1), extra=(((1, 5), 1),)),
    has_eval=True,
    long_running=True,
    modes=RUNNING_MODES,
)
