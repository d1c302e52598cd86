"""Derived tolerances: how far a correct kernel may be from the float64 oracle, elementwise.

A bound scales with the unit roundoff of the formats the kernel declares
(storage u_s, params u_p, accumulation u_a), with the reduction lengths under
the declared summation model (gamma_n: summation.py) and with the conditioning
of the case's data, measured in float64 from the inputs and the oracle (mean|x|,
|x - mu|, kappa = sqrt(1 + mu^2/var), mean|dy w|, ...). The derivation is in
docs/tolerances.md; stats.py models the statistics, bounds.py the outputs.

A bound is evidence of what a correct kernel of the declared precision can
do on the case run; passing it is not a proof of a kernel's correctness.
"""

from .bound import Bound, override_bound
from .bounds import OUTPUTS, derive_bounds, output_dtype
from .summation import MODELS, gamma, probability

__all__ = ["Bound", "derive_bounds", "override_bound", "output_dtype", "gamma", "probability",
           "MODELS", "OUTPUTS"]
