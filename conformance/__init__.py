"""The conformance harness: run a kernel under test over a case catalog, compare it with the
float64 oracle under derived tolerances, and answer with a verdict, a diagnosis and artefacts.

Passing is evidence on the cases run, not a proof of correctness; sign-off on
hardware remains the reviewer's responsibility.
"""

__all__ = ["Kernel", "Precision", "Conventions", "KernelError", "load_kernel", "run_check", "RunOptions",
           "Quantization"]


def __getattr__(name):
    # Nothing heavy at import: the `refnorm` command installs its signal handlers before NumPy loads
    # (conformance.__main__), and the runner pulls in the tolerances and comparison modules.
    if name in ("Kernel", "Precision", "Conventions", "KernelError", "load_kernel"):
        from . import kernel

        return getattr(kernel, name)
    if name in ("run_check", "RunOptions"):
        from . import run

        return getattr(run, name)
    if name == "Quantization":
        from .quantization import Quantization

        return Quantization
    raise AttributeError(f"module 'conformance' has no attribute {name!r}")
