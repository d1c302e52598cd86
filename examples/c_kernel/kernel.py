"""Kernel declarations of the hand-written C kernel in norm_kernel.c, through the C ABI adapter.

Build the library first (``make -C examples/c_kernel``), then for example

    refnorm check examples/c_kernel/kernel.py:layer_norm
    refnorm check examples/c_kernel/kernel.py:batch_norm

The names are factories, so that importing this file works before the
library is built; calling one without the library raises a KernelError that
says how to build it. REFNORM_C_KERNEL_LIB=<path> points at a library built
elsewhere (the tests build one into a temporary directory).
"""

from __future__ import annotations

import os
from pathlib import Path

from conformance.adapters.c_abi import c_kernel
from conformance.kernel import Kernel, KernelError, Precision

HERE = Path(__file__).resolve().parent
DEFAULT_LIB = HERE / "build" / "libnormkernel.so"

#: What norm_kernel.c does: float32 storage, every sum and every arithmetic step in double
#: (recursive summation, Higham 2002 §4.2: |error| <= gamma_n sum|x_i| with u = 2^-53), each
#: output rounded once to float32.
PRECISION = Precision(storage="float32", params="float32", accumulate="float64", summation="worst")


def library_path() -> Path:
    env = os.environ.get("REFNORM_C_KERNEL_LIB")
    return Path(env) if env else DEFAULT_LIB


def build_kernel(op: str, library: str | Path | None = None) -> Kernel:
    """The Kernel of ``op`` ("layer_norm" or "batch_norm") from the built library."""
    lib = Path(library) if library is not None else library_path()
    if not lib.is_file():
        raise KernelError(f"the C example kernel is not built ({lib} is missing): run make -C examples/c_kernel "
                          "(needs a C compiler)")
    return c_kernel(lib, op, prefix="refnorm", dtype="float32", name=f"example C {op} (norm_kernel.c)",
                    precision=PRECISION,
                    notes="examples/c_kernel/norm_kernel.c: double accumulation, corrected two-pass variance, "
                          "statistics recomputed in double in the backward pass")


def layer_norm() -> Kernel:
    """Layer norm over the trailing axes: forward and backward."""
    return build_kernel("layer_norm")


def batch_norm() -> Kernel:
    """Batch norm: training forward with in-place running statistics, eval forward, both backwards."""
    return build_kernel("batch_norm")
