"""The exact product of two float64 arrays as a pair, and g - mean(g) for g = a * b without rounding g first.

In binary floating point the rounding error of a product is itself a float: for finite a, b
whose product neither overflows nor comes within 2^53 of the underflow threshold,

    a * b = p + e   exactly,   p = fl(a * b),

and e can be computed with float64 operations alone (Dekker 1971, "A floating-point
technique for extending the available precision", Numer. Math. 18, the algorithm mul12,
with Veltkamp's splitting; restated as Split and TwoProduct, Ogita, Rump & Oishi 2005,
"Accurate sum and dot product", SIAM J. Sci. Comput. 26, Algorithms 3.2 and 3.3: from
memory). No fused multiply-add is needed, so the bits do not depend on the CPU.

The backward pass needs gc = g - mean(g) for g = dy * weight. When dy has a large common
offset (dy = 1e6 + N(0, 1)), rounding g to p first leaves an error of u |g| in every gc_i,
which is large against gc itself: 1e6 u = 1e-10 where |gc| is about 1. From the pair,
gc = (p - m0) + e - mean((p - m0) + e) with m0 = fl(mean(p)): p - m0 is exact by Sterbenz's
lemma where p is within a factor 2 of m0 (and otherwise rounded relative to its own small
value), so every rounding left is relative to the spread of g, not to its offset.

Range: the splitting multiplies by 2^27 + 1, so |a| must stay below about 2^996; the callers
use this on data in the fast window (refnorm._scaled: |values| <= 2^400) or on copies scaled
to magnitude 1, where it holds.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from ._moments import group_size, sum_keep

#: A group whose g = dy * weight has a mean above OFFSET times its spread (rms of g - mean(g)) is
#: centred from the exact product: below it, rounding g first leaves an error of at most about
#: 2 u (OFFSET + 1) = 2.3e-13 of max |g - mean(g)| (u = 2^-53), under the 1e-12 bar with room.
OFFSET = 2.0**10
#: Veltkamp's splitting constant 2^ceil(53/2) + 1: a = hi + lo with hi, lo of at most 26 bits each.
_SPLITTER = float(2**27 + 1)


def split(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(hi, lo) with a = hi + lo exactly and hi, lo of at most 26 significant bits (Veltkamp)."""
    c = _SPLITTER * a
    hi = c - (c - a)
    return hi, a - hi


def two_product(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(p, e) with p = fl(a * b) and a * b = p + e exactly (Dekker's product; broadcasting as a * b)."""
    p = a * b
    ah, al = split(a)
    bh, bl = split(b)
    e = ((ah * bh - p) + ah * bl + al * bh) + al * bl
    return p, e


Reducer = Callable[[np.ndarray, tuple[int, ...]], np.ndarray]


def centered_product(a: np.ndarray, b: np.ndarray | None, red: tuple[int, ...],
                     reduce: Reducer = sum_keep) -> np.ndarray:
    """a * b - mean(a * b) over ``red`` (keepdims mean), from the exact product.

    ``reduce(t, red)`` sums over ``red`` keepdims (the caller's summation, so that a group sums
    alike wherever it is). With b None the product is a itself and exact already. Every
    rounding is relative to the centred values (up to the sums' own log2(n) u): two passes of
    centring, the second the correction pass of the corrected two-pass mean (Higham 2002,
    Accuracy and Stability of Numerical Algorithms, §1.9).
    """
    n = group_size(a.shape, red)
    if b is None:
        d = a - reduce(a, red) / n
    else:
        p, e = two_product(a, b)
        d = p - reduce(p, red) / n
        d += e
        d -= reduce(d, red) / n
    d -= reduce(d, red) / n
    return d
