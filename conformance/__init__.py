"""The conformance harness: run a kernel under test over a case catalog, compare it with the
float64 oracle under derived tolerances, and answer with a verdict, a diagnosis and artefacts.

Passing is evidence on the cases run, not a proof of correctness; sign-off on
hardware remains the reviewer's responsibility.
"""

from .kernel import Conventions, Kernel, KernelError, Precision, load_kernel

__all__ = ["Kernel", "Precision", "Conventions", "KernelError", "load_kernel", "run_check", "RunOptions"]


def __getattr__(name):
    # The runner pulls in the tolerances and comparison modules: load them on first use.
    if name in ("run_check", "RunOptions"):
        from . import run

        return getattr(run, name)
    raise AttributeError(name)
