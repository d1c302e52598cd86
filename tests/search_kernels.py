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

from seeded_bugs import BUGS, correct_kernel  # noqa: E402

dweight_first_spatial_axis = BUGS["dweight_first_spatial_axis"].kernel
batch_norm_fp32 = BUGS["dweight_first_spatial_axis"].correct
layer_norm_fp32 = correct_kernel("layer_norm")
