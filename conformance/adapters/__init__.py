"""Built-in adapters: library kernels and C shared libraries as :class:`~conformance.kernel.Kernel`.

Each module exposes one factory per op; a factory imports its library only
when called, so listing or importing this package costs nothing.

- :mod:`conformance.adapters.torch_cpu`: torch.nn.functional on the CPU
  (spec ``conformance.adapters.torch_cpu:layer_norm`` and so on).
- :mod:`conformance.adapters.torch_device`: the same on any torch device
  (``...torch_device:layer_norm?device=cuda``, or ``--device cuda``).
- :mod:`conformance.adapters.onnxruntime_ep`: the ONNX standard's operators in
  ONNX Runtime on a chosen execution provider (``?provider=...`` or ``--provider``).
- :mod:`conformance.adapters.keras_cpu`: keras.layers with the TensorFlow backend.
- :mod:`conformance.adapters.c_abi`: a shared library with the C signatures of
  docs/kernel-interface.md, through ctypes.
- :mod:`conformance.adapters.cli`: ``refnorm check --device/--provider``.

What each library really computes in float32, float16 and bfloat16 (measured,
not assumed) is in docs/library-precision.md and in each factory's declaration.
"""

from __future__ import annotations

from ..kernel import KernelError

__all__ = ["missing_library"]


def missing_library(library: str, extra: str, error: BaseException) -> KernelError:
    """The error an adapter raises when its library cannot be imported (with the install hint)."""
    return KernelError(
        f"this adapter needs {library}, which cannot be imported ({type(error).__name__}: {error}); "
        f"install it with: pip install 'refnorm[{extra}]'")
