"""The fused, chunked core against the plain statement of the same formulas.

refnorm/_core.py states the forward and backward once in their plain form (normalized, affine,
backward: Ioffe & Szegedy 2015, §3 for the train-mode gradient) and evaluates them with a
rearranged, chunked, in-place core (fused_forward, fused_backward). Both are the same
mathematics, so they must agree to a few units of float64 roundoff (unit roundoff 2^-53,
IEEE 754-2019 binary64) scaled by the reduction length, on every view the ops use.
"""

from __future__ import annotations

import numpy as np
import pytest

from refnorm import _core

U = 2.0**-53

# (view shape, reduction axes, parameter broadcast shape, dweight axes, centered)
VIEWS = [
    ((8, 6, 300), (0, 2), (1, 6, 1), (0, 2), True),        # batch norm, channels first (pre, C, post)
    ((2400, 6, 1), (0, 2), (1, 6, 1), (0, 2), True),       # batch norm, channels last
    ((64, 1024), (1,), (1, 1024), (0,), True),             # layer norm rows
    ((64, 1000), (1,), (1, 1000), (0,), False),            # RMS norm rows, length not a power of 2
    ((4, 4, 2, 700), (2, 3), (1, 4, 2, 1), (0, 3), True),  # group norm, channels first (N, G, C/G, S)
    ((4, 700, 4, 2), (1, 3), (1, 1, 4, 2), (0, 1), True),  # group norm, channels last (N, S, G, C/G)
]


@pytest.mark.parametrize("shape, red, pshape, pred, center", VIEWS)
@pytest.mark.parametrize("placement", ["inside", "outside"])
@pytest.mark.parametrize("offset", [0.0, 1e4])
def test_fused_core_equals_the_plain_formulas(shape, red, pshape, pred, center, placement, offset):
    rng = np.random.default_rng(abs(hash((shape, placement, offset))) % 2**32)
    x = offset + rng.standard_normal(shape)
    dy = rng.standard_normal(shape)
    w = 1.0 + 0.5 * rng.standard_normal(pshape)
    b = 0.5 * rng.standard_normal(pshape)
    eps = 1e-5
    n = int(np.prod([shape[a] for a in red]))
    m = int(np.prod([shape[a] for a in pred]))

    st = _core.batch_stats(x, red, eps, placement, center)
    y_plain = _core.affine(_core.normalized(x, st), w, b)
    y_fused, st_f = _core.fused_forward(x, red, w, b, eps=eps, placement=placement, center=center)
    # Forward: a handful of roundings per element, and the statistics' own sums (Higham 2002 §4.2).
    tol_y = 64 * np.log2(n) * U * (np.abs(y_plain).max() + 1.0)
    np.testing.assert_allclose(y_fused, y_plain, rtol=0, atol=tol_y)
    np.testing.assert_allclose(st_f.rstd, st.rstd, rtol=64 * np.log2(n) * U, atol=0)

    xhat = _core.normalized(x, st)
    dx_p, dw_p, db_p = _core.backward(dy, xhat, st, red, w, pred, eps=eps, placement=placement,
                                      center=center, training=True)
    dx_f, dw_f, db_f = _core.fused_backward(dy, x, red, w, pred, eps=eps, placement=placement,
                                            center=center, training=True)
    scale_dx = (np.abs(dy * w).max() + 1.0) * float(np.max(st.rstd))
    np.testing.assert_allclose(dx_f, dx_p, rtol=0, atol=256 * np.log2(n) * U * scale_dx)
    # dweight and dbias: sums of m terms of size |dy xhat| and |dy|.
    np.testing.assert_allclose(dw_f, dw_p, rtol=0, atol=64 * np.log2(m) * U * np.abs(dy * xhat).sum(axis=pred).max())
    np.testing.assert_allclose(db_f, db_p, rtol=0, atol=64 * np.log2(m) * U * np.abs(dy).sum(axis=pred).max())


@pytest.mark.parametrize("shape, red, pshape, pred, center", VIEWS[:3])
def test_fused_eval_backward_equals_the_plain_formula(shape, red, pshape, pred, center):
    rng = np.random.default_rng(7)
    x, dy = rng.standard_normal(shape), rng.standard_normal(shape)
    w = 1.0 + 0.5 * rng.standard_normal(pshape)
    kshape = tuple(1 if i in red else d for i, d in enumerate(shape))
    st = _core.fixed_stats(0.1 * rng.standard_normal(kshape), rng.uniform(0.5, 2.0, kshape), 1e-5, "inside")
    dx_p, dw_p, db_p = _core.backward(dy, _core.normalized(x, st), st, red, w, pred, eps=1e-5,
                                      placement="inside", center=center, training=False)
    dx_f, dw_f, db_f = _core.fused_backward(dy, x, red, w, pred, eps=1e-5, placement="inside", center=center,
                                            training=False, stats=st)
    m = int(np.prod([shape[a] for a in pred]))
    # Eval mode: dx = dy w r elementwise, a few roundings (IEEE 754-2019 correctly rounded products).
    np.testing.assert_allclose(dx_f, dx_p, rtol=4 * U, atol=0)
    np.testing.assert_allclose(dw_f, dw_p, rtol=0, atol=64 * np.log2(m) * U * np.abs(dy).sum(axis=pred).max() * 4)
    np.testing.assert_allclose(db_f, db_p, rtol=0, atol=64 * np.log2(m) * U * np.abs(dy).sum(axis=pred).max())
