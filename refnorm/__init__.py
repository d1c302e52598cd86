"""refnorm: a float64 oracle of normalization layers.

Forward and backward passes and running-statistic updates of batch, layer,
group, instance and RMS normalization, computed in float64 from inputs upcast
exactly, with every convention that libraries disagree on as an explicit
keyword argument. Pure functions; no hidden state.
"""

from .batch_norm import batch_norm_backward, batch_norm_forward
from .errors import RefnormError
from .group_norm import group_norm_backward, group_norm_forward
from .instance_norm import instance_norm_backward, instance_norm_forward
from .layer_norm import layer_norm_backward, layer_norm_forward
from .results import NormBackward, NormForward
from .rms_norm import rms_norm_backward, rms_norm_forward
from .running import running_update

__version__ = "0.1.0"

__all__ = [
    "RefnormError",
    "NormForward",
    "NormBackward",
    "batch_norm_forward",
    "batch_norm_backward",
    "layer_norm_forward",
    "layer_norm_backward",
    "group_norm_forward",
    "group_norm_backward",
    "instance_norm_forward",
    "instance_norm_backward",
    "rms_norm_forward",
    "rms_norm_backward",
    "running_update",
]
