"""The case catalog: ids, determinism, and coverage of what the catalog promises (docs/kernel-interface.md)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from conformance import dtypes, ops
from conformance.cases import Case, catalog, find_case, make_inputs
from conformance.cases.generators import group_index
from conformance.kernel import OPS, Precision

ALL = {op: catalog([op], ["float16"], "standard") for op in OPS}
#: The ops of one process: a multi-replica op's tier is its shard plans (tests/test_replicas.py checks
#: what they cover), not the value, stride, parameter and range axes of these.
SINGLE = tuple(op for op in OPS if not ops.get(op).replicas)


def test_ids_are_unique_and_round_trip():
    for op, cases in ALL.items():
        ids = [c.id for c in cases]
        assert len(ids) == len(set(ids))
        for c in cases[:: max(1, len(cases) // 7)]:
            assert find_case(c.id) == c
            assert Case.from_dict(c.as_dict()) == c


def test_catalog_is_deterministic():
    assert [c.id for c in catalog(["group_norm"], ["bfloat16"], "standard")] == \
        [c.id for c in catalog(["group_norm"], ["bfloat16"], "standard")]


@pytest.mark.parametrize("op", SINGLE)
def test_standard_covers_the_promised_axes(op):
    cases = ALL[op]
    kinds = {c.values for c in cases}
    # float16 gets the near-overflow kind: its range is far below float32 accumulation's.
    assert {"normal", "cancellation", "constant", "heavy_tail", "near_overflow", "subnormal", "zeros",
            "nonfinite"} <= kinds
    assert {"contiguous", "transposed", "sliced", "reversed"} <= {c.strides for c in cases}
    assert {len(c.shape) for c in cases} >= {2, 3, 4, 5} or op in ("layer_norm", "rms_norm")
    assert max(c.group_length for c in cases) >= 2**20
    assert min(c.group_length for c in cases) == 1
    assert any(c.shape[0] == 1 for c in cases)
    assert {c.eps for c in cases} >= {0.0, 1e-5, 1e-1}
    assert "none" in {c.weight for c in cases} and "zero" in {c.weight for c in cases}
    assert "negative" in {c.weight for c in cases}
    if op in ("batch_norm", "instance_norm"):
        assert {"train", "eval"} == {c.mode for c in cases}
        moms = {c.momentum for c in cases if c.running}
        assert None in moms and 0.1 in moms
        assert "channels_last_memory" in {c.strides for c in cases}
    if op in ("batch_norm", "group_norm", "instance_norm"):
        assert {"channels_first", "channels_last"} == {c.layout for c in cases}
        # odd and prime sizes
        assert any(any(d in (7, 11, 13) for d in c.shape) for c in cases)


def test_inputs_are_rounded_once_to_the_declared_dtypes():
    c = find_case("batch_norm/float16/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/train/momentum=0.1/contiguous")
    inp = make_inputs(c, Precision(params="float32"), seed=0)
    assert inp["x"].dtype == np.float16 and inp["dy"].dtype == np.float16
    assert inp["weight"].dtype == np.float32 and inp["running_var"].dtype == np.float32
    assert inp["x"].shape == c.shape and (inp["running_var"] > 0).all()


def test_strides_change_memory_not_values():
    base = find_case("layer_norm/float32/trailing/12x96/norm_ndim=1/normal/w=random/b=random/eps=1e-05/train/contiguous")
    ref = make_inputs(base, Precision(), 0)["x"]
    for s in ("transposed", "sliced", "reversed"):
        from dataclasses import replace

        c = replace(base, strides=s)
        x = make_inputs(c, Precision(), 0)["x"]
        assert not x.flags.c_contiguous
        # The data is drawn from the id's seed, which includes the stride kind; what must hold is
        # that the logical shape and dtype are the case's.
        assert x.shape == ref.shape and x.dtype == ref.dtype
    rev = make_inputs(replace(base, strides="reversed"), Precision(), 0)["x"]
    assert all(st < 0 for st in rev.strides)


def test_cancellation_values_are_ill_conditioned_for_the_variance():
    # Condition number of the variance kappa = sqrt(1 + mean^2/var): Chan, Golub & LeVeque 1983.
    for dt in ("float32", "float16", "bfloat16"):
        c = Case("layer_norm", dt, (4, 2048), "trailing", values="cancellation", norm_ndim=1)
        x = make_inputs(c, Precision(), 0)["x"].astype(np.float64)
        kappa = np.sqrt(1 + x.mean(1) ** 2 / x.var(1))
        assert kappa.min() > 50
        # and still spread over several ULPs of the mean (IEEE 754-2019 / bfloat16 unit roundoff)
        assert (x.std(1) > 4 * dtypes.unit_roundoff(dt) * np.abs(x.mean(1))).all()


def test_near_overflow_is_near_the_largest_float16():
    # IEEE 754-2019 binary16: the largest finite value is 65504.
    c = Case("rms_norm", "float16", (4, 64), "trailing", values="near_overflow", norm_ndim=1)
    x = make_inputs(c, Precision(), 0)["x"].astype(np.float64)
    assert np.abs(x).max() <= 65504 and np.abs(x).min() >= 0.5 * 65504 * 0.99


def test_subnormal_values_are_subnormal():
    # IEEE 754-2019 binary16: the smallest positive normal is 2^-14.
    c = Case("layer_norm", "float16", (4, 64), "trailing", values="subnormal", norm_ndim=1)
    x = make_inputs(c, Precision(), 0)["x"].astype(np.float64)
    # Values drawn below 2^-14 may round up to it, the smallest normal, and no further.
    assert (np.abs(x) <= 2.0**-14).all() and ((np.abs(x) < 2.0**-14) & (x != 0)).mean() > 0.9


def test_group_index_uses_contiguous_channel_groups():
    # Wu & He 2018, §3.1: group norm splits the C channels into contiguous groups of C/G.
    c = Case("group_norm", "float32", (2, 6, 3), "channels_first", groups=3)
    gi = group_index(c)
    assert gi[0, :, 0].tolist() == [0, 0, 1, 1, 2, 2] and gi[1, :, 0].tolist() == [3, 3, 4, 4, 5, 5]


def test_constant_values_have_zero_variance_per_group():
    c = Case("instance_norm", "float32", (2, 3, 4, 4), "channels_first", values="constant")
    x = make_inputs(c, Precision(), 0)["x"].astype(np.float64)
    assert np.allclose(x.var(axis=(2, 3)), 0.0, rtol=0, atol=0)


def test_case_lengths():
    c = Case("batch_norm", "float32", (16, 2, 256, 256), "channels_first")
    assert c.group_length == 2**20 and c.param_length == 2**20
    g = Case("group_norm", "float32", (2, 6, 5, 5), "channels_last".replace("last", "first"), groups=3)
    assert g.group_length == 2 * 25 and g.param_length == 2 * 25
    assert math.prod(Case("layer_norm", "float32", (3, 4, 5), "trailing", norm_ndim=2).normalized_shape) == 20


# ------------------------------------------------------------------ the range cases
def test_new_case_fields_keep_old_ids_and_name_themselves():
    """dy and running_values are part of an id only when they are not the default, so every id that existed
    before them means what it meant (common practice: ids are the interface of --case, waivers, baselines)."""
    base = Case("batch_norm", "float32", (4, 8, 6, 5), "channels_first")
    assert base.id == "batch_norm/float32/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/train/contiguous"
    from dataclasses import replace

    assert "/normal/dy=ones/w=random/" in replace(base, dy="ones").id
    assert "/eval/running=at_mean/contiguous" in replace(base, mode="eval", running_values="at_mean").id
    for c in (replace(base, dy="ones"), replace(base, mode="eval", running_values="wide")):
        assert Case.from_dict(c.as_dict()) == c
    c = next(c for c in catalog(["batch_norm"], ["float32"], "standard") if c.dy == "ones")
    assert find_case(c.id) == c
    old = {k: v for k, v in base.as_dict().items() if k not in ("dy", "running_values")}
    assert Case.from_dict(old) == base  # a results document written before the fields were added


@pytest.mark.parametrize("dt", dtypes.FORMATS)
def test_every_format_has_the_range_cases(dt):
    for op in SINGLE:
        cases = catalog([op], [dt], "standard")
        assert any(c.values == "large" for c in cases)
        assert {c.values for c in cases if c.eps == 1e-12} == {"constant", "zeros"}
        ones = [c for c in cases if c.dy == "ones"]
        # More dy = 1 terms per parameter sum than float16's largest value, 65504 (IEEE 754-2019 binary16).
        assert len(ones) == 1 and ones[0].param_length > 65504
        if op in ("batch_norm", "instance_norm"):
            assert {c.running_values for c in cases if c.mode == "eval"} == {"near", "far", "wide", "at_mean"}


@pytest.mark.parametrize("dt", dtypes.FORMATS)
@pytest.mark.parametrize("op", ["layer_norm", "rms_norm"])
def test_large_values_reach_the_end_of_what_a_correct_kernel_must_handle(op, dt):
    """The large data's two-pass sums stay inside the default accumulation format (float32 for narrower
    formats) with at most 1/4 of its range used (conformance/tolerances/ranges.py), yet the one-pass sum of
    x^2 of the centred ops overflows it (IEEE 754-2019 §7.4), and for float32 single squares do too
    (|x| above sqrt(3.4e38) ~ 1.8e19): the data separates the two algorithms."""
    from conformance.tolerances.grouping import grouping
    from conformance.tolerances.ranges import range_used

    c = Case(op, dt, (12, 96), "trailing", values="large", norm_ndim=1)
    x = make_inputs(c, Precision(), 0)["x"].astype(np.float64)
    acc = Precision(storage=dt).resolved().accumulate
    grp = grouping(c)
    used = range_used(grp.view(x), grp, op == "layer_norm", acc)
    assert np.all(used <= 0.25) and np.all(np.isfinite(x))
    big = float(dtypes.finfo(acc).max)
    if op == "layer_norm" and 2 * np.log2(float(dtypes.finfo(dt).max)) > np.log2(big):
        # the storage range is as wide as the accumulation's: the data goes where one pass fails
        with np.errstate(over="ignore"):
            assert np.all(np.sum(x * x, axis=1) > big)
        if dt == "float32":
            assert np.abs(x).max() > np.sqrt(big)


def test_running_statistics_kinds():
    """far: 32 spreads away; wide: beyond float16's 65504 in float32 parameters (IEEE 754-2019 binary16);
    at_mean: exactly representable, with x equal to it for a tenth or so of the elements."""
    base = Case("batch_norm", "float16", (4, 8, 6, 5), "channels_first", mode="eval")
    from dataclasses import replace

    prec = Precision(params="float32")
    near = make_inputs(base, prec, 0)
    far = make_inputs(replace(base, running_values="far"), prec, 0)
    x = near["x"].astype(np.float64)
    spread = x.std(axis=(0, 2, 3))
    assert np.median(np.abs(far["running_mean"] - x.mean(axis=(0, 2, 3))) / spread) > 5
    wide = make_inputs(replace(base, running_values="wide"), prec, 0)
    assert np.all(np.abs(wide["running_mean"]) > 65504) and np.all(np.isfinite(wide["running_var"]))
    at = make_inputs(replace(base, running_values="at_mean"), prec, 0)
    rm = at["running_mean"].astype(np.float64)
    assert np.all(rm.astype(np.float16).astype(np.float64) == rm)  # exact in the storage format too
    eq = at["x"].astype(np.float64) == rm[None, :, None, None]
    assert 0.03 < eq.mean() < 0.3 and np.all(at["running_var"] == 1.0)


def test_constant_gradient():
    c = Case("layer_norm", "float16", (1 << 17, 4), "trailing", norm_ndim=1, dy="ones")
    inp = make_inputs(c, Precision(params="float32"), 0)
    assert np.all(inp["dy"] == 1) and c.param_length == 1 << 17
    with pytest.raises(ValueError, match="unknown upstream-gradient kind 'twos'"):
        make_inputs(Case("layer_norm", "float16", (4, 4), "trailing", norm_ndim=1, dy="twos"), Precision(), 0)


def test_find_case_names_an_unknown_dtype():
    """A hostile id with a dtype no format has (the catalog reads each format's range): a KeyError naming
    the formats, as for an unknown op, never another exception type."""
    for bad in ("layer_norm/float24/x", "layer_norm//"):
        with pytest.raises(KeyError, match="is not one of float64, float32"):
            find_case(bad)
