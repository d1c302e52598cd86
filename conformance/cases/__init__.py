"""The case catalog: Case, the input generators and the tiers."""

from .catalog import catalog, find_case
from .generators import make_inputs
from .model import STRIDE_KINDS, TIERS, VALUE_KINDS, Case

__all__ = ["Case", "catalog", "find_case", "make_inputs", "TIERS", "VALUE_KINDS", "STRIDE_KINDS"]
