"""Block-by-block evaluation gives the whole-array values bit for bit, and every element once.

IEEE 754-2019 §5.1 (and §4.3, the rounding of each operation's result): every arithmetic operation
is correctly rounded on its own, so an elementwise formula's value at one element cannot depend on
which other elements were evaluated with it. The checks compare against NumPy on whole arrays, and
the ULP distances against np.nextafter (NumPy's implementation of IEEE 754's nextUp/nextDown).
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from conformance import blockwise, dtypes
from conformance.effective_precision import case_statistics

SHAPES = st.lists(st.integers(0, 9), min_size=0, max_size=4).map(tuple)


@settings(max_examples=200, deadline=None)
@given(shape=SHAPES, block=st.integers(1, 40))
def test_blocks_cover_every_element_once(shape, block):
    # An index count: the defining property of a partition (common practice).
    seen = np.zeros(shape, dtype=np.int64)
    for idx in blockwise.block_slices(shape, block):
        assert len(idx) == len(shape)
        piece = seen[idx] if idx else seen[...]
        assert piece.size <= block
        piece += 1
    assert (seen == 1).all()


def _formula(out, x, w, s):
    # A bound-like chain with per-group (extent-1 axes) and right-aligned operands.
    return np.add(np.abs(x - s) * w * 3.0 + np.sqrt(np.abs(x)) / (1.0 + w), 2.0**-1074, out=out)


@settings(max_examples=150, deadline=None)
@given(shape=st.lists(st.integers(1, 7), min_size=1, max_size=4).map(tuple), block=st.integers(1, 50),
       seed=st.integers(0, 2**32 - 1))
def test_evaluate_is_bit_identical_to_whole_arrays(shape, block, seed):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(shape) * 10.0 ** rng.integers(-300, 300, shape)
    keep = rng.integers(0, 2, len(shape)).astype(bool)  # a per-group operand: extent 1 where not kept
    w = rng.standard_normal(tuple(d if k else 1 for d, k in zip(shape, keep)))
    s = rng.standard_normal(shape[-1:])  # fewer axes: broadcast from the right (NumPy's rule)
    with np.errstate(all="ignore"):
        want = _formula(None, x, w, s)
        got, extras = blockwise.evaluate(shape, _formula, block=block, x=x, w=w, s=s)
    assert extras == []
    assert got.shape == want.shape
    assert np.array_equal(got.view(np.int64), want.view(np.int64))  # the bits, NaNs included


def test_evaluate_collects_extras_in_block_order_and_handles_0d():
    x = np.arange(10.0).reshape(2, 5)
    vals, extras = blockwise.evaluate(x.shape, lambda out, x: (np.multiply(x, 2.0, out=out), float(x.max())),
                                      block=5, x=x)
    assert extras == [4.0, 9.0] and np.array_equal(vals, 2 * x)
    zero_d, _ = blockwise.evaluate((), lambda out, x: np.add(x, 1.0, out=out), x=np.array(2.0))
    assert zero_d.shape == () and float(zero_d) == 3.0


@settings(max_examples=60, deadline=None)
@given(n=st.integers(1, 70000), seed=st.integers(0, 2**32 - 1), fmt=st.sampled_from(["float16", "bfloat16",
                                                                                       "float32", "float64"]))
def test_ulp_distance_counts_nextafter_steps(n, seed, fmt):
    # k applications of np.nextafter toward +inf are k ULPs (IEEE 754-2019 §2.1, §5.3.1 nextUp), across
    # blocks of the blockwise evaluation (n up to 4 blocks of 2^14).
    dt = dtypes.dtype_of(fmt)
    rng = np.random.default_rng(seed)
    a = rng.standard_normal(n).astype(dt)
    k = rng.integers(0, 4, n)
    b = a.copy()
    for step in range(3):
        m = k > step
        if fmt in ("float16", "float32", "float64"):
            b[m] = np.nextafter(b[m], dt.type(np.inf))
        else:  # ml_dtypes' bfloat16: the next value up from the float32 bit pattern (sign-magnitude order)
            bits = b[m].view(np.uint16).astype(np.int32)
            bits = np.where(bits & 0x8000, np.where(bits == 0x8000, 1, bits - 1), bits + 1)
            b[m] = bits.astype(np.uint16).view(dt)
    got = dtypes.ulp_distance(a, b, fmt)
    assert got.shape == (n,)
    assert np.array_equal(got, k)


def test_case_statistics_same_on_blocks_as_whole():
    # The maximum and the count do not depend on the blocks: compare with the definition evaluated on
    # the whole arrays (docs/tolerances.md, effective precision: r = (err - u|e|) / (bound - u|e|)).
    rng = np.random.default_rng(7)
    e = rng.standard_normal((3, 40000))
    err = np.abs(rng.standard_normal(e.shape)) * 1e-7
    b = np.full(e.shape, 3e-7)
    e[0, 5], err[1, 7] = np.inf, np.nan
    got = case_statistics(err, e, b, "float32", 2.0**-24)
    u = 2.0**-24
    ae = np.abs(e)
    with np.errstate(all="ignore"):
        fin = np.isfinite(ae) & np.isfinite(b) & np.isfinite(err)
        over, room = err - u * ae, b - u * ae
        beyond = fin & (over > 0)
        r = np.where(fin & (room > 0) & (over > 0), over / np.where(room > 0, room, 1.0), 0.0)
    assert got["beyond"] == int(np.count_nonzero(beyond))
    assert got["ratio"] == float(r.max())


def test_ordinal_is_the_sign_magnitude_order_on_every_width():
    # IEEE 754-2019 §3.4: a binary format's encoding is sign, exponent, significand, so for one sign
    # the bit patterns read as integers are in the order of the values (§5.10, totalOrder); negative
    # patterns MIN + m map to -m. Compared with that definition written with np.where, on random
    # patterns and the extremes of every integer width (int8 for float8, ... int64 for float64).
    import ml_dtypes

    for fmt, it in ((np.float64, np.int64), (np.float32, np.int32), (np.float16, np.int16),
                    (ml_dtypes.bfloat16, np.int16), (ml_dtypes.float8_e4m3fn, np.int8)):
        ii = np.iinfo(it)
        rng = np.random.default_rng(3)
        raw = np.concatenate([rng.integers(ii.min, ii.max, 20000, dtype=it, endpoint=True),
                              np.array([ii.min, ii.min + 1, -1, 0, 1, ii.max], dtype=it)])
        want = np.where(raw < 0, it(ii.min) - raw, raw)
        got = dtypes._ordinal(raw.view(fmt))
        assert got.dtype == it and np.array_equal(got, want), fmt
        assert dtypes._ordinal(np.array(-0.0, dtype=fmt)) == 0  # -0 and +0 are one value


def _compare_many_blocks(a32: np.ndarray, e: np.ndarray, bound: np.ndarray):
    from conformance.compare import compare_output
    from conformance.tolerances import Bound

    return compare_output("y", a32, e, Bound(output="y", values=bound, formula="test bound", kind="fixed"),
                          dtype="float32")


def test_comparison_over_many_blocks_matches_the_definitions():
    # max |a - e|, max |a - e| / |e|, the count of |a - e| > bound and the largest ULP distance, from their
    # definitions on whole arrays (common practice), over an output of 5 blocks.
    rng = np.random.default_rng(11)
    e = rng.standard_normal((5, blockwise.BLOCK))
    a32 = (e * (1 + rng.standard_normal(e.shape) * 1e-7)).astype(np.float32)
    bound = np.full(e.shape, 2e-7)
    r = _compare_many_blocks(a32, e, bound)
    err = np.abs(a32.astype(np.float64) - e)
    assert r.max_abs == float(err.max()) and r.max_rel == float((err / np.abs(e)).max())
    assert r.mismatched == int(np.count_nonzero(err > bound))
    assert r.max_ulp == int(dtypes.ulp_distance(a32, e, "float32").max())
    assert r.budget_used == float((err / bound).max())
    assert r.worst_index == tuple(int(i) for i in np.unravel_index(np.argmax(err / bound), e.shape))


def test_a_nan_in_the_last_block_is_still_judged_by_its_class():
    # Hostile kernel output: finite everywhere but one element of the last block (NaN where the oracle
    # has a number). The blockwise pass gives way to the class-aware comparison: one NaN mismatch,
    # an infinite budget, nothing lost from the other elements' metrics.
    e = np.linspace(1.0, 2.0, 3 * blockwise.BLOCK).reshape(3, -1)
    a32 = e.astype(np.float32)
    a32[2, -1] = np.nan
    r = _compare_many_blocks(a32, e, np.full(e.shape, 1e-3))
    assert r.nan_mismatch == 1 and r.mismatched == 1 and r.budget_used == float("inf")
    assert r.worst_index == (2, e.shape[1] - 1) and not r.passed
    err = np.abs(a32[:2].astype(np.float64) - e[:2])
    assert r.max_abs == float(err.max())


def test_a_strided_read_only_kernel_output_is_compared_like_its_contiguous_copy():
    # Hostile kernel return: a reversed, transposed, read-only view over many blocks (what a kernel that
    # returns a layout view hands back). The blockwise comparison reads it through its strides: the same
    # result as for a contiguous copy of the same values (common practice: layout must not change a verdict).
    rng = np.random.default_rng(5)
    e = rng.standard_normal((3 * blockwise.BLOCK // 64, 64))
    base = (e * (1 + rng.standard_normal(e.shape) * 1e-7)).astype(np.float32)
    view = np.ascontiguousarray(base.T[::-1]).T[:, ::-1]  # same values as base, strides (4, -4 * rows)
    view.flags.writeable = False
    assert np.array_equal(view, base) and not view.flags.c_contiguous
    bound = np.full(e.shape, 2e-7)
    got, want = _compare_many_blocks(view, e, bound), _compare_many_blocks(base.copy(), e, bound)
    assert got.to_dict() == want.to_dict()
