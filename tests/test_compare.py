"""The comparison driver: strict shapes and dtypes, NaN/Inf classes, metrics, ULPs, messages."""

from __future__ import annotations

import json

import numpy as np
import pytest

from conformance import dtypes
from conformance.compare import OutputResult, compare_output, ulp_histogram
from conformance.tolerances import Bound, override_bound


def _bound(values, shape=None) -> Bound:
    v = np.asarray(values, dtype=np.float64)
    return Bound(output="y", values=v if shape is None else np.broadcast_to(v, shape), formula="test bound",
                 terms={"u_s": 2.0**-24})


# =============================================================================== ULP facts
def test_ulp_distance_matches_ieee_754_facts():
    # IEEE 754-2019 binary16: p = 11, so the successor of 1 is 1 + 2^-10.
    assert dtypes.ulp_distance(np.float16(1.0), np.float16(1.0 + 2.0**-10), "float16") == 1
    # binary32: p = 24, successor of 1 is 1 + 2^-23; the predecessor of 1 is 1 - 2^-24 (binade below).
    assert dtypes.ulp_distance(np.float32(1.0), np.float32(1.0 + 2.0**-23), "float32") == 1
    assert dtypes.ulp_distance(np.float32(1.0), np.float32(1.0 - 2.0**-24), "float32") == 1
    # bfloat16: 8 significand bits, successor of 1 is 1 + 2^-7 (Google's bfloat16 definition).
    bf = dtypes.dtype_of("bfloat16")
    assert dtypes.ulp_distance(np.array(1.0, bf), np.array(1.0 + 2.0**-7, bf), "bfloat16") == 1
    # Across zero: the two smallest subnormals of opposite sign are two steps apart (+-0 are one value).
    t = np.finfo(np.float32).smallest_subnormal
    assert dtypes.ulp_distance(np.float32(t), np.float32(-t), "float32") == 2
    assert dtypes.ulp_distance(np.float32(0.0), np.float32(-0.0), "float32") == 0
    # np.nextafter (C99 nextafter) is one ULP by definition.
    a = np.float32(3.7)
    assert dtypes.ulp_distance(a, np.nextafter(a, np.float32(10)), "float32") == 1
    # Unit roundoff u = 2^-p: IEEE 754-2019 binary16/binary32, bfloat16.
    assert dtypes.unit_roundoff("float16") == 2.0**-11
    assert dtypes.unit_roundoff("float32") == 2.0**-24
    assert dtypes.unit_roundoff("bfloat16") == 2.0**-8


def test_max_ulp_is_counted_in_the_declared_format():
    e = np.array([1.0, 2.0, 4.0])
    a = np.array([1.0, 2.0, 4.0 + 3 * 2.0**-8], dtype=np.float16)  # 4 has ULP 2^-8 in binary16
    r = compare_output("y", a, e, _bound(1.0, e.shape), dtype="float16")
    assert r.max_ulp == 3
    assert r.ulp_hist == {"0": 2, "2-3": 1}


def test_ulp_histogram_bins_are_powers_of_two():
    h = ulp_histogram(np.array([0, 0, 1, 2, 3, 4, 7, 8, 1023, 1024, -1]))
    assert h == {"0": 2, "1": 1, "2-3": 2, "4-7": 2, "8-15": 1, "512-1023": 1, "1024-2047": 1}
    big = np.array([2**62 - 1, 2**62])
    assert ulp_histogram(big) == {f"{2**61}-{2**62 - 1}": 1, f"{2**62}-{2**63 - 1}": 1}


def test_ulp_histogram_with_a_known_top_bins_like_bit_length():
    # Python's int.bit_length() is floor(log2 |x|) + 1 for x != 0 (Python Language Reference, int
    # methods): the bin of a distance u >= 1 is [2^(b-1), 2^b - 1] with b = u.bit_length().
    rng = np.random.default_rng(7)
    for _ in range(50):
        u = rng.integers(0, 2 ** int(rng.integers(1, 53)), size=int(rng.integers(1, 3000)))
        u[rng.random(u.size) < 0.3] = 0
        want: dict[str, int] = {}
        for v in map(int, u):
            lo, hi = (0, 0) if v == 0 else (1 << (v.bit_length() - 1), (1 << v.bit_length()) - 1)
            key = str(lo) if lo == hi else f"{lo}-{hi}"
            want[key] = want.get(key, 0) + 1
        assert ulp_histogram(u, int(u.max())) == want
        assert ulp_histogram(u) == want


# =============================================================================== strictness
def test_shape_mismatch_fails_without_broadcasting():
    e = np.zeros((2, 3))
    r = compare_output("y", np.zeros((3,), np.float32), e, _bound(1.0, e.shape), dtype="float32")
    assert not r.passed and "shape mismatch" in r.message and "(3,)" in r.message and "(2, 3)" in r.message
    r = compare_output("y", np.zeros((1, 3), np.float32), e, _bound(1.0, e.shape), dtype="float32")
    assert not r.passed and r.mismatched == e.size


def test_dtype_mismatch_fails_without_casting():
    e = np.ones(4)
    r = compare_output("y", np.ones(4, np.float64), e, _bound(1.0, e.shape), dtype="float32")
    assert not r.passed and "dtype mismatch" in r.message and "float64" in r.message
    r = compare_output("y", np.ones(4, np.float32), e, _bound(1.0, e.shape), dtype="bfloat16")
    assert not r.passed and "bfloat16" in r.message


# =============================================================================== non-finite classes
def test_nan_and_inf_positions_and_signs_must_match():
    e = np.array([np.nan, np.inf, -np.inf, 1.0, 2.0, 3.0])
    ok = np.array([np.nan, np.inf, -np.inf, 1.0, 2.0, 3.0], np.float32)
    r = compare_output("y", ok, e, _bound(0.0, e.shape), dtype="float32")
    assert r.passed and r.budget_used == 0.0 and r.max_abs == 0.0 and r.n == 6
    bad = np.array([1.0, -np.inf, np.inf, np.nan, np.inf, 3.0], np.float32)
    r = compare_output("y", bad, e, _bound(1.0, e.shape), dtype="float32")
    assert not r.passed
    assert r.nan_mismatch == 2      # expected NaN got 1.0; expected 1.0 got NaN
    assert r.inf_mismatch == 3      # two sign flips, one Inf where 2.0 was expected
    assert r.mismatched == 5
    assert np.isinf(r.budget_used)
    assert "NaN position mismatches: 2" in r.message and "Inf position/sign mismatches: 3" in r.message
    # The metrics cover only the elements finite in both: here just the last one, exact.
    assert r.max_abs == 0.0


# =============================================================================== metrics and verdict
def test_metrics_budget_and_worst_element():
    e = np.array([[1.0, -2.0], [0.0, 4.0]])
    a = np.array([[1.0 + 1e-3, -2.0], [1e-6, 4.0 - 4e-3]], np.float32)
    b = _bound([[2e-3, 1e-3], [1e-6, 1e-3]])
    r = compare_output("y", a, e, b, dtype="float32")
    a64 = a.astype(np.float64)
    err = np.abs(a64 - e)
    assert r.max_abs == pytest.approx(err.max())
    # Relative difference |a - e| / |e| over e != 0 only (the 1e-6 at e = 0 is left out).
    assert r.max_rel == pytest.approx(np.max(err[e != 0] / np.abs(e[e != 0])))
    ratio = err / b.values
    assert r.budget_used == pytest.approx(ratio.max())
    assert r.worst_index == (1, 1)
    assert r.worst_expected == 4.0 and r.worst_bound == 1e-3
    assert r.worst_actual == pytest.approx(float(a[1, 1]))
    assert r.mismatched == int(np.count_nonzero(ratio > 1)) == 1
    assert not r.passed


def test_zero_bound_accepts_only_exact_values():
    e = np.array([1.0, 2.0])
    r = compare_output("y", np.array([1.0, 2.0], np.float32), e, _bound(0.0, e.shape), dtype="float32")
    assert r.passed and r.budget_used == 0.0
    r = compare_output("y", np.array([1.0, np.nextafter(np.float32(2), np.float32(3))], np.float32), e,
                       _bound(0.0, e.shape), dtype="float32")
    assert not r.passed and np.isinf(r.budget_used) and r.max_ulp == 1


def test_message_follows_numpy_testing_wording():
    e = np.array([1.0, 2.0, 3.0, 4.0])
    a = np.array([1.0, 2.0, 3.5, 4.0], np.float32)
    b = override_bound("y", e, atol=0.1, rtol=0.0)
    r = compare_output("y", a, e, b, dtype="float32")
    # numpy.testing.assert_allclose on the same data and criterion reports the same count line.
    with pytest.raises(AssertionError) as info:
        np.testing.assert_allclose(a.astype(np.float64), e, rtol=0.0, atol=0.1)
    numpy_line = next(s for s in str(info.value).splitlines() if s.startswith("Mismatched elements"))
    assert numpy_line == "Mismatched elements: 1 / 4 (25%)"
    assert numpy_line in r.message.splitlines()
    assert "Max absolute difference: 0.5" in r.message
    assert "Max relative difference: 0.166667" in r.message
    assert "Max ULP distance (float32): 2097152" in r.message  # 0.5 / ULP(3) = 0.5 / 2^-22 = 2^21
    assert "bound 0.1" in r.message and "Budget used: 5" in r.message
    assert "Bound: atol + rtol |expected|" in r.message and "override" in r.message


def test_passing_message_and_summary():
    e = np.linspace(-1, 1, 5)
    r = compare_output("dx", e.astype(np.float32), e, _bound(1e-6, e.shape), dtype="float32")
    assert r.passed and r.mismatched == 0
    assert r.budget_used < 1 and "within the derived bound" in r.message
    assert r.bound["formula"] == "test bound" and r.bound["kind"] == "derived"


def test_to_dict_round_trips_and_is_strict_json():
    e = np.array([np.nan, 1.0, 2.0])
    a = np.array([0.0, 1.0, 2.5], np.float32)
    r = compare_output("y", a, e, _bound(0.1, e.shape), dtype="float32")
    d = r.to_dict()
    text = json.dumps(d, allow_nan=False)  # inf/nan are written as strings
    back = OutputResult.from_dict(json.loads(text))
    assert back.passed == r.passed and back.mismatched == r.mismatched
    assert back.shape == r.shape and back.worst_index == r.worst_index
    assert np.isinf(back.budget_used) and back.ulp_hist == r.ulp_hist
    assert back.bound == json.loads(json.dumps(r.bound))


def test_scalar_and_empty_outputs():
    r = compare_output("mean", np.float32(1.0), np.float64(1.0), _bound(0.0), dtype="float32")
    assert r.passed and r.shape == () and r.n == 1
    e = np.zeros((0, 3))
    r = compare_output("y", np.zeros((0, 3), np.float32), e, _bound(0.0, e.shape), dtype="float32")
    assert r.passed and r.n == 0 and r.budget_used == 0.0


# =============================================================================== accepted alternatives
def test_accepted_alternatives_stand_in_for_the_oracle():
    """A Bound's Accept entries (tolerances.bound.Accept): where the kernel's value is the accepted one it
    counts as agreement and is counted per reason; where the alternative is required (``must``), any other
    value fails with a zero bound; None accepts any non-finite value; an element settled by one entry is not
    judged again by a later one."""
    from conformance.tolerances.bound import Accept

    exp = np.array([1.0, 70000.0, -np.inf, 5.0])
    must = np.array([False, True, False, False])
    acc = (Accept(np.array([False, False, True, False]), np.full(4, np.nan), "inf group"),
           Accept(must, np.array([0.0, np.inf, 0.0, 0.0]), "out of range", must=True),
           Accept(np.array([False, False, False, True]), None, "any non-finite"))
    b = Bound(output="y", values=np.full(4, 1e-3), formula="test", accept=acc)
    good = np.array([1.0, np.inf, np.nan, np.nan], dtype=np.float16)
    r = compare_output("y", good, exp, b, dtype="float16")
    assert r.passed and r.accepted == {"inf group": 1, "out of range": 1, "any non-finite": 1}, r.message
    assert "accepted" in r.message and "inf group" in r.message
    # The required alternative is not met by a finite value, even the largest finite float16 (65504).
    r = compare_output("y", np.array([1.0, 65504.0, np.nan, 5.0], dtype=np.float16), exp, b, dtype="float16")
    assert not r.passed and r.mismatched == 1 and r.inf_mismatch == 1
    # NaN where the oracle is finite and nothing accepts it still fails.
    r = compare_output("y", np.array([np.nan, np.inf, np.nan, 5.0], dtype=np.float16), exp, b, dtype="float16")
    assert not r.passed and r.nan_mismatch == 1
    d = r.to_dict()
    assert OutputResult.from_dict(json.loads(json.dumps(d))).accepted == r.accepted


def test_format_range_facts():
    """Overflow thresholds under round to nearest (IEEE 754-2019 §4.3.1, §7.4): max + ulp(max)/2, with the
    tie going beyond max in IEEE formats (65520 -> Inf in binary16) and to max in float8_e4m3fn (464 -> 448,
    NaN above: OCP 8-bit FP specification v1.0, E4M3 has no infinity; from memory, and ml_dtypes' casts)."""
    assert dtypes.overflow_threshold("float16") == (65520.0, True)
    assert dtypes.overflow_threshold("float8_e4m3fn") == (464.0, False)
    assert dtypes.overflow_threshold("float8_e5m2") == (61440.0, True)
    assert dtypes.overflow_threshold("float32")[0] == float(np.float32(3.4028234663852886e38)) + 2.0 ** 103
    assert not dtypes.has_infinity("float8_e4m3fn")
    assert all(dtypes.has_infinity(f) for f in ("float64", "float32", "float16", "bfloat16", "float8_e5m2"))
    from conformance.tolerances.ranges import overflow_accepts

    # 452 + 10 stays below 464; 460 and 470 are within 10 of it (either answer); 480 - 10 is beyond it.
    e = np.array([452.0, 460.0, 470.0, -480.0])
    sat = overflow_accepts(e, np.full(4, 10.0), "float8_e4m3fn", "saturate")
    non = overflow_accepts(e, np.full(4, 10.0), "float8_e4m3fn", "nonsaturating")
    assert sat[0].must and sat[0].mask.tolist() == [False, False, False, True]
    assert sat[1].mask.tolist() == [False, True, True, False]
    assert sat[0].value[3] == -448.0 and sat[1].value[1] == 448.0 and np.isnan(non[1].value[1])
    must = overflow_accepts(np.array([1e4]), np.array([1.0]), "float16", "nonsaturating")
    assert not must or not must[0].mask.any()
    must = overflow_accepts(np.array([7e4]), np.array([1.0]), "float16", "nonsaturating")
    assert must[0].mask.tolist() == [True] and must[0].value[0] == np.inf and must[0].must
