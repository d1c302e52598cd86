"""Array conversion between a kernel's tensors and NumPy, without copies where the formats allow.

Kernels return whatever their library produces (NumPy arrays, torch tensors,
TensorFlow tensors, anything with ``__dlpack__`` or ``__array__``);
:func:`as_numpy` turns each into a NumPy array for comparison. Adapters go the
other way with :func:`to_torch` and :func:`to_tensorflow`.

bfloat16 and the float8 formats are ml_dtypes types on the NumPy side. NumPy's
DLPack import has no code for them (DLPack's kDLBfloat exists, NumPy does not
read it), so they cross as same-width integers and are reinterpreted on the
other side: a view, no copy.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

__all__ = ["ArrayConversionError", "as_numpy", "to_torch", "to_tensorflow", "torch_dtype", "write_back"]

# ml_dtypes name -> torch dtype attribute; the integer type of the same width carries the bits.
_BITCAST = {"bfloat16": ("bfloat16", np.int16), "float8_e4m3fn": ("float8_e4m3fn", np.uint8),
            "float8_e5m2": ("float8_e5m2", np.uint8)}


class ArrayConversionError(TypeError):
    """An object that cannot be read as an array (the message names what was received)."""


def _describe(obj: Any) -> str:
    t = type(obj)
    shape = getattr(obj, "shape", None)
    dtype = getattr(obj, "dtype", None)
    extra = "" if shape is None else f" of shape {tuple(shape)} and dtype {dtype}"
    return f"{t.__module__}.{t.__qualname__}{extra}"


def _is_torch_tensor(obj: Any) -> bool:
    # Checked by module name so that torch is never imported just to look.
    return type(obj).__module__.startswith("torch") and hasattr(obj, "detach") and hasattr(obj, "dtype")


def _torch_as_numpy(t: Any) -> np.ndarray:
    import torch

    t = t.detach()
    if t.device.type != "cpu":
        t = t.cpu()  # a copy: host memory is what NumPy can see
    if t.is_conj():
        t = t.resolve_conj()
    if t.is_neg():
        t = t.resolve_neg()
    name = str(t.dtype).replace("torch.", "")
    if name in _BITCAST:
        import ml_dtypes

        _, carrier = _BITCAST[name]
        carrier_t = torch.int16 if carrier is np.int16 else torch.uint8
        return np.from_dlpack(t.view(carrier_t)).view(getattr(ml_dtypes, name))
    try:
        return np.from_dlpack(t)
    except (TypeError, BufferError, RuntimeError, ValueError):
        return t.numpy()


def as_numpy(obj: Any, name: str = "output") -> np.ndarray | None:
    """A NumPy view (or, where unavoidable, a copy) of an array-like.

    Accepted: None (returned as None), NumPy arrays and scalars (as they are),
    torch tensors (detached; moved to the CPU; bfloat16/float8 reinterpreted
    through a same-width integer view, no copy), objects with ``__dlpack__``
    (``np.from_dlpack``, no copy), objects with ``__array__`` (``np.asarray``).

    Raises
    ------
    ArrayConversionError naming ``name`` and the type received.
    """
    if obj is None:
        return None
    if isinstance(obj, np.ndarray):
        return obj
    if isinstance(obj, (np.generic, float, int)) and not isinstance(obj, bool):
        return np.asarray(obj)
    if _is_torch_tensor(obj):
        return _torch_as_numpy(obj)
    if hasattr(obj, "__dlpack__"):
        try:
            return np.from_dlpack(obj)
        except (TypeError, BufferError, RuntimeError, ValueError):
            pass  # e.g. bfloat16 from another library: __array__ below knows it
    if hasattr(obj, "__array__"):
        try:
            return np.asarray(obj)
        except Exception as e:  # the object's own conversion failed
            raise ArrayConversionError(f"{name}: converting {_describe(obj)} with __array__ failed: "
                                       f"{type(e).__name__}: {e}") from e
    raise ArrayConversionError(
        f"{name} is {_describe(obj)}, expected a NumPy array, a torch tensor, or an object with "
        "__dlpack__ or __array__ (return arrays, a tuple of arrays, or a dict of arrays)")


def torch_dtype(np_dtype: Any):
    """The torch dtype of a NumPy (or ml_dtypes) dtype."""
    import torch

    dt = np.dtype(np_dtype)
    name = dt.name
    if hasattr(torch, name) and isinstance(getattr(torch, name), torch.dtype):
        return getattr(torch, name)
    raise ArrayConversionError(f"dtype {dt} has no torch counterpart")


def to_torch(a: Any, *, requires_grad: bool = False):
    """A torch tensor sharing memory with NumPy array ``a`` where torch allows it.

    Copies only for negative strides, non-native byte order or strides that are
    not whole elements (torch.from_numpy refuses those). bfloat16/float8 go
    through a same-width integer view. None stays None. The tensor is a new
    autograd leaf when ``requires_grad``.
    """
    if a is None:
        return None
    import torch

    arr = np.asarray(a)
    if not arr.dtype.isnative:
        arr = arr.astype(arr.dtype.newbyteorder("="))
    if any(s < 0 or s % arr.itemsize for s in arr.strides):
        arr = arr.copy()  # C order, positive strides
    name = arr.dtype.name
    with warnings.catch_warnings():
        # from_numpy warns on read-only arrays; adapters only write where they were asked to.
        warnings.simplefilter("ignore", UserWarning)
        if name in _BITCAST:
            tname, carrier = _BITCAST[name]
            t = torch.from_numpy(arr.view(carrier)).view(getattr(torch, tname))
        else:
            t = torch.from_numpy(arr)
    if requires_grad:
        t = t.detach().requires_grad_(True)
    return t


def write_back(dst: np.ndarray | None, src: Any) -> None:
    """Copy ``src`` into ``dst`` unless they already share memory (in-place results through a copy)."""
    if dst is None:
        return
    s = as_numpy(src, "updated array")
    if np.shares_memory(dst, s):
        return
    np.copyto(dst, s.astype(dst.dtype, copy=False))


def to_tensorflow(a: Any):
    """A TensorFlow tensor with the values of ``a`` (TensorFlow copies host arrays; bfloat16 is understood)."""
    if a is None:
        return None
    import tensorflow as tf

    return tf.convert_to_tensor(np.asarray(a))
