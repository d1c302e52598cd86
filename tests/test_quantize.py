"""The oracle's quantization (refnorm.quantize) against outside definitions.

Sources: the OCP 8-bit floating point specification v1.0 (2023) for the float8 encodings (the
formulas below are from memory: E4M3 bias 7, E5M2 bias 15, subnormals at exponent field 0, E4M3's
only NaN S.1111.111 and no infinity, E5M2's infinities and NaNs at exponent field 31, as IEEE 754);
IEEE 754-2019 §4.3.1 for round to nearest, ties to even; Python's round() (half to even, Python
documentation, built-in functions) for int8; torch 2.13's CPU casts, measured here.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from refnorm import RefnormError
from refnorm import quantize as rq


def _ocp_values(name: str) -> list[tuple[int, Fraction]]:
    """(bit pattern, exact value) of every finite non-negative encoding, from the OCP formulas (from memory)."""
    ebits, mbits, bias = (4, 3, 7) if name == "float8_e4m3fn" else (5, 2, 15)
    out = []
    for bits in range(128):
        e, m = bits >> mbits, bits & ((1 << mbits) - 1)
        if name == "float8_e4m3fn" and e == 15 and m == (1 << mbits) - 1:
            continue  # S.1111.111: NaN
        if name == "float8_e5m2" and e == 31:
            continue  # infinities and NaNs
        if e == 0:
            v = Fraction(m, 1 << mbits) * Fraction(2) ** (1 - bias)
        else:
            v = (1 + Fraction(m, 1 << mbits)) * Fraction(2) ** (e - bias)
        out.append((bits, v))
    return out


def _rne(t: float, table: list[tuple[int, Fraction]]) -> float:
    """Round |t| to nearest in the table, ties to the even bit pattern (IEEE 754-2019 §4.3.1), sign restored."""
    a = Fraction(abs(t))
    best = min(table, key=lambda bv: (abs(bv[1] - a), bv[0] & 1))
    return math.copysign(float(best[1]), t)


FLOAT8 = ("float8_e4m3fn", "float8_e5m2")


@pytest.mark.parametrize("name", FLOAT8)
def test_format_facts_match_ocp_and_ml_dtypes(name):
    # OCP 8-bit FP v1.0, Table 1 (from memory): E4M3 max 448, min normal 2^-6, min subnormal 2^-9;
    # E5M2 max 57344, min normal 2^-14, min subnormal 2^-16. ml_dtypes.finfo agrees.
    import ml_dtypes

    f = rq.qformat(name)
    table = _ocp_values(name)
    assert float(max(v for _, v in table)) == f.q_max == {"float8_e4m3fn": 448.0, "float8_e5m2": 57344.0}[name]
    fi = ml_dtypes.finfo(f.dtype)
    assert float(fi.max) == f.q_max and int(fi.nmant) == f.mant
    assert float(fi.smallest_normal) == 2.0 ** f.emin
    assert float(fi.smallest_subnormal) == {"float8_e4m3fn": 2.0 ** -9, "float8_e5m2": 2.0 ** -16}[name]


@pytest.mark.parametrize("name", FLOAT8)
def test_quantize_is_round_to_nearest_even_on_every_midpoint(name):
    # Every midpoint between consecutive values (the ties) and points just beside them, against a brute-force
    # RNE over the OCP encodings (IEEE 754-2019 §4.3.1).
    table = sorted(_ocp_values(name), key=lambda bv: bv[1])
    pts = []
    for (_, a), (_, b) in zip(table, table[1:]):
        mid = (a + b) / 2
        pts += [float(mid), float(mid) * (1 + 2 ** -20), float(mid) * (1 - 2 ** -20), float(a)]
    pts = np.array(pts + [-p for p in pts])
    want = np.array([_rne(p, table) for p in pts])
    got = rq.quantize(pts, name, overflow="saturate")
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("name", FLOAT8)
def test_quantize_random_values_match_brute_force(name):
    table = _ocp_values(name)
    rng = np.random.default_rng(7)
    f = rq.qformat(name)
    t = rng.uniform(-1, 1, 400) * np.exp2(rng.uniform(f.emin - f.mant - 2, math.log2(f.q_max), 400))
    want = np.array([_rne(v, table) for v in t])
    np.testing.assert_array_equal(rq.quantize(t, name), want)


def test_overflow_saturate_and_nonsaturating():
    # OCP 8-bit FP v1.0 (from memory): E4M3 has no infinity, its non-saturating overflow is NaN; E5M2's is +-Inf.
    # The midpoint 464 = 448 + 16 ties to 448 (even pattern 1111.110); above it overflows (IEEE 754-2019 §4.3.1).
    big = np.array([464.0, 465.0, -1000.0])
    np.testing.assert_array_equal(rq.quantize(big, "float8_e4m3fn", overflow="saturate"), [448.0, 448.0, -448.0])
    got = rq.quantize(big, "float8_e4m3fn", overflow="nonsaturating")
    assert got[0] == 448.0 and np.isnan(got[1:]).all()
    e5 = rq.quantize(np.array([61440.0, -1e6]), "float8_e5m2", overflow="nonsaturating")
    np.testing.assert_array_equal(e5, [np.inf, -np.inf])  # 61440 ties to the even 2^16: beyond the range
    assert rq.overflow_threshold(rq.qformat("float8_e4m3fn")) == 464.0
    assert rq.overflow_threshold(rq.qformat("float8_e5m2")) == 61440.0


def test_int8_is_round_half_even_and_symmetric():
    # Python's round() rounds half to even (Python documentation, built-in round); symmetric int8: +-127 (common
    # practice), saturating.
    t = np.array([0.5, 1.5, 2.5, -0.5, -2.5, 126.5, 127.4, 200.0, -200.0, 3.49])
    want = [max(-127, min(127, round(v))) for v in t]
    np.testing.assert_array_equal(rq.quantize(t, "int8"), want)
    with pytest.raises(RefnormError, match="int8 has no NaN"):
        rq.quantize(t, "int8", overflow="nonsaturating")


@pytest.mark.parametrize("name", FLOAT8)
def test_levels_count_encodings_and_steps_are_the_gaps(name):
    # Consecutive encodings are one level apart (IEEE 754-2019 §3.4: encodings of one sign ordered as values),
    # across zero too; step_at is the gap above each value of the binade (brute force over the OCP table).
    table = sorted(_ocp_values(name), key=lambda bv: bv[1])
    vals = np.array([float(v) for _, v in table])
    both = np.concatenate([-vals[::-1], vals[1:]])
    lv = rq.levels(both, name)
    np.testing.assert_array_equal(np.diff(lv), 1)
    f = rq.qformat(name)
    gaps = np.diff(vals)
    np.testing.assert_array_equal(rq.step_at(vals[1:-1], f), gaps[1:])


def test_levels_of_int8_and_nan():
    assert list(rq.levels(np.array([-127.0, 0.0, 5.0]), "int8")) == [-127, 0, 5]
    assert rq.levels(np.array([np.nan]), "float8_e4m3fn")[0] < -(1 << 60)


def test_dynamic_scale_maps_amax_onto_q_max():
    # Common practice (8-bit recipes, from memory): s = amax / q_max, amax clamped from below.
    y = np.array([[1.0, -3.0, 2.0], [0.0, 0.0, 0.0]])
    np.testing.assert_array_equal(rq.dynamic_scale(y, "float8_e4m3fn", "tensor"), 3.0 / 448.0)
    np.testing.assert_array_equal(rq.dynamic_scale(y, "int8", "row", floor=1e-12), [3.0 / 127.0, 1e-12 / 127.0])
    with pytest.raises(RefnormError, match="scale mode"):
        rq.dynamic_scale(y, "int8", "static")
    with pytest.raises(RefnormError, match="quantized format"):
        rq.qformat("float4_e2m1")


@settings(max_examples=200, deadline=None)
@given(st.sampled_from(("float8_e4m3fn", "float8_e5m2", "int8")),
       st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=1, max_size=40))
def test_quantize_then_dequantize_is_within_half_a_level(name, ys):
    # IEEE 754-2019 §4.3.1: round to nearest errs by at most half the spacing; with s = amax / q_max every
    # y / s is in range, so y_q s is within s step(y/s) / 2 of y.
    y = np.array(ys)
    f = rq.qformat(name)
    s = float(rq.dynamic_scale(y, f, "tensor"))
    t = y / s
    q = rq.quantize(t, f)
    assert np.all(np.abs(q - t) <= 0.5 * rq.step_at(t, f) * (1 + 1e-12))
    lv = rq.levels(q, f)
    order = np.argsort(t, kind="stable")
    assert np.all(np.diff(lv[order]) >= 0)  # rounding is monotone


def test_torch_cpu_float8_casts():
    # torch 2.13 CPU casts, measured: in range they round to nearest even as the oracle does; out of range
    # float8_e4m3fn saturates (1000 -> 448, where ml_dtypes gives NaN) and float8_e5m2 gives +-Inf.
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(3)
    for name in FLOAT8:
        f = rq.qformat(name)
        table = sorted(_ocp_values(name), key=lambda bv: bv[1])
        mids = [float((a + b) / 2) for (_, a), (_, b) in zip(table, table[1:])]
        t = np.concatenate([mids, rng.uniform(-f.q_max, f.q_max, 500)]).astype(np.float32)
        got = torch.from_numpy(t).to(getattr(torch, name)).to(torch.float64).numpy()
        np.testing.assert_array_equal(got, rq.quantize(t.astype(np.float64), f))
    e4 = torch.tensor([1000.0, -1000.0, 465.0]).to(torch.float8_e4m3fn).to(torch.float64).numpy()
    np.testing.assert_array_equal(e4, [448.0, -448.0, 448.0])
    e5 = torch.tensor([1e6, -1e6]).to(torch.float8_e5m2).to(torch.float64).numpy()
    np.testing.assert_array_equal(e5, [np.inf, -np.inf])
    # torch.round: half to even (torch.round documentation)
    np.testing.assert_array_equal(torch.tensor([0.5, 1.5, 2.5, -2.5]).round().numpy(), [0.0, 2.0, 2.0, -2.0])
