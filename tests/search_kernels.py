"""Kernels that tests/test_search.py loads by spec (worker processes and the command line load them by path).

- ``dweight_first_spatial_axis``  the seeded bug of tests/seeded_bugs.py (dweight sums only x.shape[2]
  spatial positions: wrong for rank > 3), declared as the correct float32 batch norm it claims to be.
- ``batch_norm_fp32``             the same NumPy port without the bug (seeded_bugs.NumpyNorm).
- ``layer_norm_fp32``             the correct float32 NumPy layer norm.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))  # for a spawned worker that loads this file by path

from seeded_bugs import BUGS, F32, NumpyNorm, correct_kernel  # noqa: E402

dweight_first_spatial_axis = BUGS["dweight_first_spatial_axis"].kernel
batch_norm_fp32 = BUGS["dweight_first_spatial_axis"].correct
layer_norm_fp32 = correct_kernel("layer_norm")


class FirstElementShift(NumpyNorm):
    """Bug: one pass over the data shifted by each group's first element K = x_0 (a shifted one-pass
    algorithm, Chan, Golub & LeVeque 1983, §3, section from memory, written to save the second pass):
    mean = K + S/n, var = Q/n - (S/n)^2 with S = sum(x - K), Q = sum((x - K)^2) in float32. Accurate while
    K is near the group's mean (every catalog value kind draws x_0 from the group's own distribution),
    catastrophic when it is far: Q/n ~ (K - mean)^2 cancels against (S/n)^2 and var loses
    (K - mean)^2 / var units of roundoff (Chan, Golub & LeVeque 1983, eq. 1.7's shifted form). A row that
    starts with a padding zero before values near 2^10 is such a group. Corrupts: rstd and y (dx through them)."""

    def _moments(self, xv, axes, n):
        k = xv[tuple(slice(0, 1) if i in axes else slice(None) for i in range(xv.ndim))]
        d = xv - k
        s = self._sum(d, axes) / F32(n)
        return k + s, self._sum(d * d, axes) / F32(n) - s * s


first_element_shift = FirstElementShift("layer_norm").kernel("seeded bug first_element_shift: layer_norm",
                                                           notes=" ".join(FirstElementShift.__doc__.split()))
first_element_shift_fixed = NumpyNorm("layer_norm").kernel("correct layer_norm (float32, NumpyNorm)")
