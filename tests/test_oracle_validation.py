"""Boundary validation of the oracle, and IEEE 754 propagation of NaN and Inf.

Every bad argument raises refnorm.RefnormError with a message that names the
argument, what was expected and what was received (the project's rule); the
tests assert on the message text. NaN and Inf are not errors: they propagate
by IEEE 754-2019 arithmetic (§7.2: inf - inf and 0 * inf are invalid and give
NaN; §6.2: NaN operands give NaN), which confines them to the statistic group
they are in.
"""

from __future__ import annotations

import numpy as np
import pytest

import refnorm
from refnorm import RefnormError

RNG = np.random.default_rng(7)
X = RNG.normal(size=(4, 3, 5))  # (N, C, L)
DY = RNG.normal(size=X.shape)
RM, RV = np.zeros(3), np.ones(3)


def _raises(match):
    return pytest.raises(RefnormError, match=match)


# --------------------------------------------------------------------------- shapes


@pytest.mark.parametrize("name", ["weight", "bias", "running_mean", "running_var"])
def test_batch_norm_parameter_shapes(name):
    kw = {"running_mean": RM, "running_var": RV, name: np.ones(4)}
    with _raises(rf"^{name} has shape \(4,\), expected \(3,\): one value per channel along axis 1"):
        refnorm.batch_norm_forward(X, **kw)


def test_batch_norm_channels_last_parameter_shape():
    with _raises(r"^weight has shape \(3,\), expected \(5,\): one value per channel along axis 2"):
        refnorm.batch_norm_forward(X, np.ones(3), axis=-1)


def test_backward_parameter_and_saved_statistic_shapes():
    with _raises(r"^weight has shape \(2,\), expected \(3,\)"):
        refnorm.batch_norm_backward(DY, X, np.ones(2))
    with _raises(r"^rstd has shape \(4,\), expected \(3,\)"):
        refnorm.batch_norm_backward(DY, X, mean=np.zeros(3), rstd=np.ones(4))
    with _raises(r"^mean has shape \(4, 3\), expected \(4, 1\)"):
        refnorm.group_norm_backward(DY, X, 1, mean=np.zeros((4, 3)), rstd=np.ones((4, 1)))
    with _raises(r"^dy has shape \(4, 3\), expected \(4, 3, 5\) \(the shape of x\)"):
        refnorm.layer_norm_backward(DY[..., 0], X, 5)


@pytest.mark.parametrize("op", ["layer", "rms"])
def test_feature_parameter_shapes(op):
    fwd = refnorm.layer_norm_forward if op == "layer" else refnorm.rms_norm_forward
    with _raises(r"^weight has shape \(3,\), expected \(5,\): one value per element of the normalized axes"):
        fwd(X, 5, np.ones(3))
    with _raises(r"^bias has shape \(5,\), expected \(3, 5\)"):
        fwd(X, (3, 5), None, np.ones(5))
    with _raises(r"^normalized_shape is \(4,\), expected the trailing dims of x"):
        fwd(X, 4)


def test_group_and_instance_parameter_shapes():
    with _raises(r"^bias has shape \(6,\), expected \(3,\)"):
        refnorm.group_norm_forward(X, 3, None, np.ones(6))
    with _raises(r"^running_var has shape \(1,\), expected \(3,\)"):
        refnorm.instance_norm_forward(X, running_mean=RM, running_var=np.ones(1))


def test_channels_not_divisible_by_num_groups():
    x = RNG.normal(size=(2, 6, 3))
    with _raises(r"^num_groups is 4, expected a divisor of the 6 channels along axis 1 of x"):
        refnorm.group_norm_forward(x, 4)
    with _raises(r"^num_groups is 4, expected a divisor of the 6 channels"):
        refnorm.group_norm_backward(x, x, 4)
    with _raises(r"^num_groups is int 0, expected a positive integer"):
        refnorm.group_norm_forward(x, 0)


# --------------------------------------------------------------------------- ranges


@pytest.mark.parametrize("call", [
    lambda e: refnorm.batch_norm_forward(X, eps=e),
    lambda e: refnorm.batch_norm_backward(DY, X, eps=e),
    lambda e: refnorm.layer_norm_forward(X, 5, eps=e),
    lambda e: refnorm.group_norm_forward(X, 3, eps=e),
    lambda e: refnorm.instance_norm_forward(X, eps=e),
    lambda e: refnorm.rms_norm_backward(DY, X, 5, eps=e),
])
def test_negative_eps(call):
    with _raises(r"^eps is -1e-05, expected a finite real number >= 0"):
        call(-1e-5)
    with _raises(r"^eps is nan, expected a finite real number >= 0"):
        call(float("nan"))


@pytest.mark.parametrize("momentum", [1.5, -0.1])
def test_momentum_outside_unit_interval(momentum):
    msg = rf"^momentum is {momentum!r}, expected a number in \[0, 1\]"
    with _raises(msg):
        refnorm.batch_norm_forward(X, running_mean=RM, running_var=RV, momentum=momentum)
    with _raises(msg):
        refnorm.instance_norm_forward(X, running_mean=RM, running_var=RV, momentum=momentum)
    with _raises(msg):
        refnorm.running_update(RM, RV, momentum=momentum)


def test_momentum_none_needs_batches_seen():
    msg = r"^batches_seen is NoneType None, expected an integer >= 0 when momentum=None"
    with _raises(msg):
        refnorm.batch_norm_forward(X, running_mean=RM, running_var=RV, momentum=None)
    with _raises(msg):
        refnorm.running_update(RM, RV, momentum=None)
    with _raises(r"^batches_seen is -1, expected an integer >= 0"):
        refnorm.running_update(RM, RV, momentum=None, batches_seen=-1)


def test_one_element_reduction_with_unbiased_estimator():
    """n = 1 per statistic: M2/(n - 1) is 0/0; the message names the estimator that is defined."""
    x = RNG.normal(size=(1, 3))
    msg = (r"reduces over 1 element per statistic: the unbiased variance estimate \(division by n - 1\) "
           r"is undefined there; running_var_estimator='biased' is defined")
    with _raises(r"^batch_norm_forward " + msg):
        refnorm.batch_norm_forward(x, running_mean=RM, running_var=RV)
    with _raises(r"^instance_norm_forward " + msg):
        refnorm.instance_norm_forward(x[..., None], running_mean=RM, running_var=RV)
    # The biased estimator is defined there: the batch variance is 0.
    out = refnorm.batch_norm_forward(x, running_mean=RM, running_var=RV, running_var_estimator="biased")
    np.testing.assert_array_equal(out.running_var, 0.9 * RV)


@pytest.mark.parametrize("dtype", [np.int32, np.int64, np.bool_, np.complex128])
def test_non_float_inputs(dtype):
    xi = np.ones((4, 3, 5), dtype=dtype)
    dt = np.dtype(dtype)
    with _raises(rf"^x has dtype {dt}, expected a floating-point dtype"):
        refnorm.batch_norm_forward(xi)
    with _raises(rf"^x has dtype {dt}, expected a floating-point dtype"):
        refnorm.layer_norm_forward(xi, 5)
    with _raises(rf"^weight has dtype {dt}, expected a floating-point dtype"):
        refnorm.group_norm_forward(X, 3, np.ones(3, dtype=dtype))
    with _raises(rf"^dy has dtype {dt}, expected a floating-point dtype"):
        refnorm.rms_norm_backward(xi, X, 5)


def test_other_boundary_errors():
    with _raises(r"^x has rank 1 \(shape \(5,\)\), expected rank >= 2"):
        refnorm.batch_norm_forward(np.ones(5))
    with _raises(r"^running_mean and running_var are None, expected arrays of shape \(3,\) in eval mode"):
        refnorm.batch_norm_forward(X, training=False)
    with _raises(r"^running_mean and running_var must be given together"):
        refnorm.batch_norm_forward(X, running_mean=RM)
    with _raises(r"^axis is 3, expected an integer in \[-3, 3\)"):
        refnorm.batch_norm_forward(X, axis=3)
    with _raises(r"^eps_placement is 'between', expected one of 'inside', 'outside'"):
        refnorm.layer_norm_forward(X, 5, eps_placement="between")
    with _raises(r"^momentum_convention is 'newest', expected one of 'new', 'old'"):
        refnorm.running_update(RM, RV, momentum_convention="newest")
    with _raises(r"^running_var_estimator is 'sample', expected one of 'unbiased', 'biased'"):
        refnorm.batch_norm_forward(X, running_var_estimator="sample")
    with _raises(r"^x has shape \(0, 3, 5\) with no elements"):
        refnorm.batch_norm_forward(np.ones((0, 3, 5)))


def test_inputs_are_not_modified():
    """Pure functions: the caller's arrays, running statistics included, are left as they were."""
    x, dy, w, b, rm, rv = (a.copy() for a in (X, DY, np.ones(3) * 1.5, np.ones(3) * 0.5, RM + 0.25, RV * 2))
    refnorm.batch_norm_forward(x, w, b, running_mean=rm, running_var=rv)
    refnorm.batch_norm_backward(dy, x, w)
    refnorm.instance_norm_forward(x, w, b, running_mean=rm, running_var=rv)
    for got, want in ((x, X), (dy, DY), (w, np.ones(3) * 1.5), (b, np.ones(3) * 0.5), (rm, RM + 0.25), (rv, RV * 2)):
        np.testing.assert_array_equal(got, want)


# --------------------------------------------------------------------------- NaN and Inf


@pytest.mark.filterwarnings("ignore::RuntimeWarning")  # NumPy reports the IEEE invalid operations
@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_nan_inf_confined_to_batch_norm_channel(bad):
    """Documented (refnorm.batch_norm_forward): a NaN or Inf in a channel makes that channel's
    statistics and whole output NaN (the mean is +-inf or NaN, then x - mean gives NaN:
    IEEE 754-2019 §7.2); the other channels are the same as without it, bit for bit."""
    x = X.copy()
    x[2, 1, 3] = bad
    clean = refnorm.batch_norm_forward(X, eps=1e-5)
    out = refnorm.batch_norm_forward(x, eps=1e-5)
    assert np.all(np.isnan(out.y[:, 1])) and np.isnan(out.var[1])
    np.testing.assert_array_equal(out.y[:, [0, 2]], clean.y[:, [0, 2]])
    np.testing.assert_array_equal(out.mean[[0, 2]], clean.mean[[0, 2]])
    bw = refnorm.batch_norm_backward(DY, x, eps=1e-5)
    assert np.all(np.isnan(bw.dx[:, 1]))
    np.testing.assert_array_equal(bw.dx[:, [0, 2]], refnorm.batch_norm_backward(DY, X, eps=1e-5).dx[:, [0, 2]])


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_nan_inf_confined_to_layer_and_group_norm_rows(bad):
    """Documented (refnorm.layer_norm_forward): NaN/Inf in a row make that row's variance and
    output NaN; its mean is NaN for a NaN and +Inf for a +Inf (sum(x)/n, IEEE 754-2019 §6.1).
    The same holds per (sample, group) for group norm. Other rows are unchanged."""
    x = X.copy()
    x[1, 2, 0] = bad
    ln, ln0 = refnorm.layer_norm_forward(x, 5), refnorm.layer_norm_forward(X, 5)
    assert np.all(np.isnan(ln.y[1, 2])) and np.isnan(ln.rstd[1, 2])
    mask = np.ones((4, 3), bool)
    mask[1, 2] = False
    np.testing.assert_array_equal(ln.y[mask], ln0.y[mask])
    gn, gn0 = refnorm.group_norm_forward(x, 3), refnorm.group_norm_forward(X, 3)
    assert np.all(np.isnan(gn.y[1, 2])) and np.isnan(gn.var[1, 2])
    assert (np.isnan(gn.mean[1, 2]) if np.isnan(bad) else gn.mean[1, 2] == bad)
    np.testing.assert_array_equal(gn.y[mask], gn0.y[mask])
    # A NaN in dy reaches its group's dx through mean(g) and mean(g x_hat), and no other group.
    dy = DY.copy()
    dy[0, 1, 4] = np.nan
    bw, bw0 = refnorm.layer_norm_backward(dy, X, 5), refnorm.layer_norm_backward(DY, X, 5)
    assert np.all(np.isnan(bw.dx[0, 1]))
    mask = np.ones((4, 3), bool)
    mask[0, 1] = False
    np.testing.assert_array_equal(bw.dx[mask], bw0.dx[mask])


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
def test_constant_group_with_zero_eps():
    """eps = 0 and a constant group: var = 0, rstd = 1/sqrt(0) = +inf (IEEE 754-2019 §7.3, division
    by zero) and y = 0 * inf = NaN (§7.2). With eps > 0 the same group normalizes to 0."""
    x = X.copy()
    x[:, 0, :] = 3.25
    out = refnorm.batch_norm_forward(x, eps=0.0)
    assert out.var[0] == 0.0 and np.isposinf(out.rstd[0])
    assert np.all(np.isnan(out.y[:, 0]))
    assert np.all(np.isfinite(out.y[:, 1:]))
    np.testing.assert_array_equal(refnorm.batch_norm_forward(x, eps=1e-5).y[:, 0], 0.0)


# --------------------------------------------------------------------------- strict types (issue 7)
# Each of these was accepted, or escaped as another exception type, before the boundary checks
# were made strict. Common practice: a validating API refuses what it cannot interpret rather
# than guessing (the project's rule: an error names the argument, the expectation and the value).


@pytest.mark.parametrize("fn", [refnorm.instance_norm_forward,
                                lambda x, **kw: refnorm.instance_norm_backward(x, x, **kw)])
def test_instance_norm_checks_axis_before_using_it(fn):
    """x.shape[axis] used to be read before axis was checked: IndexError, TypeError."""
    with _raises(r"^axis is 3, expected an integer in \[-3, 3\)"):
        fn(X, axis=3)
    with _raises(r"^axis is str '1', expected an integer"):
        fn(X, axis="1")
    with _raises(r"^axis is float 1.0, expected an integer"):
        fn(X, axis=1.0)
    with _raises(r"^x has rank 1"):
        fn(np.ones(4))


def test_huge_python_integers_are_refnorm_errors():
    """float(10**400) raises OverflowError; the boundary turns it into a RefnormError naming the argument."""
    huge = 10**400
    with _raises(r"^eps is an integer of 401 digits, beyond float64's range"):
        refnorm.layer_norm_forward(X, 5, eps=huge)
    with _raises(r"^momentum is an integer of 401 digits"):
        refnorm.batch_norm_forward(X, running_mean=RM, running_var=RV, momentum=huge)
    with _raises(r"^momentum is an integer of 401 digits"):
        refnorm.running_update(RM, RV, momentum=huge)
    with _raises(r"^batches_seen is an integer of 401 digits, expected an integer >= 0"):
        refnorm.running_update(RM, RV, momentum=None, batches_seen=huge)
    with _raises(r"^batches_seen is an integer of 401 digits"):
        refnorm.instance_norm_forward(X, running_mean=RM, running_var=RV, momentum=None, batches_seen=huge)
    with _raises(r"^axis is an integer of 401 digits"):
        refnorm.batch_norm_forward(X, axis=huge)
    with _raises(r"^num_groups is an integer of 401 digits, expected a divisor of the 3 channels"):
        refnorm.group_norm_forward(X, huge)


def test_ragged_nested_list_names_the_argument():
    """np.asarray of a ragged list raises NumPy's ValueError, which named no argument."""
    ragged = [[1.0, 2.0], [3.0]]
    with _raises(r"^x is list \[\[1.0, 2.0\], \[3.0\]\], which NumPy cannot read as one rectangular array"):
        refnorm.layer_norm_forward(ragged, 2)
    with _raises(r"^weight is list .* cannot read as one rectangular array"):
        refnorm.batch_norm_forward(X, [[1.0], [1.0, 2.0], [3.0]])
    with _raises(r"^dy is list .* cannot read as one rectangular array"):
        refnorm.rms_norm_backward([[1.0], [2.0, 3.0]], X, 5)


@pytest.mark.parametrize("bad, shown", [((5.5,), r"tuple \(5.5,\)"), ("5", "str '5'"), ((True,), r"tuple \(True,\)"),
                                        (5.0, "float 5.0"), ((3, "5"), r"tuple \(3, '5'\)"), (None, None)])
def test_normalized_shape_must_be_integers(bad, shown):
    """normalized_shape=(5.5,) and "5" used to be accepted (int(5.5) == 5, tuple("5") == ("5",))."""
    if bad is None:  # neither normalized_shape nor axes
        with _raises(r"^give exactly one of normalized_shape"):
            refnorm.layer_norm_forward(X)
        return
    for fn in (refnorm.layer_norm_forward, refnorm.rms_norm_forward):
        with _raises(rf"^normalized_shape is {shown}, expected"):
            fn(X, bad)
    with _raises(rf"^normalized_shape is {shown}, expected"):
        refnorm.layer_norm_backward(DY, X, bad)
    # numpy integers and lists are sizes too
    np.testing.assert_array_equal(refnorm.layer_norm_forward(X, [np.int64(3), 5]).y,
                                  refnorm.layer_norm_forward(X, (3, 5)).y)


@pytest.mark.parametrize("value", ["False", "True", 0, 1, None, np.array(False)])
def test_training_must_be_a_bool(value):
    """training="False" is truthy and used to run training mode."""
    for call in (lambda: refnorm.batch_norm_forward(X, training=value, running_mean=RM, running_var=RV),
                 lambda: refnorm.batch_norm_backward(DY, X, training=value, running_mean=RM, running_var=RV),
                 lambda: refnorm.instance_norm_forward(X, training=value, running_mean=RM, running_var=RV),
                 lambda: refnorm.instance_norm_backward(DY, X, training=value, running_mean=RM, running_var=RV)):
        with _raises(r"^training is .*, expected True or False"):
            call()
    # NumPy's bool scalar is a bool
    out = refnorm.batch_norm_forward(X, training=np.bool_(False), running_mean=RM, running_var=RV)
    np.testing.assert_array_equal(out.y, refnorm.batch_norm_forward(X, training=False, running_mean=RM,
                                                                    running_var=RV).y)


@pytest.mark.parametrize("value", [np.array(["inside"]), b"inside", 1])
def test_choice_arguments_must_be_strings(value):
    """An array holding the right string used to pass `value in choices` by elementwise comparison."""
    with _raises(r"^eps_placement is .*, expected one of 'inside', 'outside'"):
        refnorm.layer_norm_forward(X, 5, eps_placement=value)


def test_bool_is_not_a_number():
    with _raises(r"^eps is bool True, expected a finite real number >= 0"):
        refnorm.batch_norm_forward(X, eps=True)
    with _raises(r"^momentum is bool False, expected a number in \[0, 1\]"):
        refnorm.running_update(RM, RV, momentum=False)
    with _raises(r"^batches_seen is bool True, expected an integer >= 0"):
        refnorm.running_update(RM, RV, momentum=None, batches_seen=True)
    with _raises(r"^num_groups is bool True, expected a positive integer"):
        refnorm.group_norm_forward(X, True)
    with _raises(r"^axes is bool True, expected an integer"):
        refnorm.layer_norm_forward(X, axes=True)


def test_momentum_and_batches_seen_are_checked_even_when_unused():
    """A bad value is an error even where it would not be read (no running statistics): strict by default."""
    with _raises(r"^momentum is str '0.1'"):
        refnorm.batch_norm_forward(X, momentum="0.1")
    with _raises(r"^batches_seen is float 2.0"):
        refnorm.instance_norm_forward(X, momentum=None, batches_seen=2.0)


def test_negative_running_var_and_nonpositive_saved_rstd():
    """A negative running variance made 1/sqrt(var + eps) NaN; a saved rstd <= 0 made the implied
    variance 1/rstd^2 - eps meaningless. Both are refused (NaN still propagates by IEEE 754)."""
    rv = RV.copy()
    rv[1] = -0.5
    for call in (lambda: refnorm.batch_norm_forward(X, training=False, running_mean=RM, running_var=rv),
                 lambda: refnorm.batch_norm_forward(X, running_mean=RM, running_var=rv),
                 lambda: refnorm.batch_norm_backward(DY, X, training=False, running_mean=RM, running_var=rv),
                 lambda: refnorm.instance_norm_forward(X, training=False, running_mean=RM, running_var=rv),
                 lambda: refnorm.instance_norm_backward(DY, X, training=False, running_mean=RM, running_var=rv)):
        with _raises(r"^running_var has -0.5 at flat index 1, expected values >= 0: a variance"):
            call()
    for rstd in (0.0, -1.0, -np.inf):
        r = np.ones(3)
        r[2] = rstd
        with _raises(rf"^rstd has {rstd!r} at flat index 2, expected values > 0"):
            refnorm.batch_norm_backward(DY, X, mean=np.zeros(3), rstd=r)
        with _raises(r"^rstd has .* expected values > 0"):
            refnorm.layer_norm_backward(DY, X, 5, mean=np.zeros((4, 3)), rstd=np.full((4, 3), rstd))
        with _raises(r"^rstd has .* expected values > 0"):
            refnorm.rms_norm_backward(DY, X, 5, rstd=np.full((4, 3), rstd))
        with _raises(r"^rstd has .* expected values > 0"):
            refnorm.group_norm_backward(DY, X, 3, mean=np.zeros((4, 3)), rstd=np.full((4, 3), rstd))
        with _raises(r"^rstd has .* expected values > 0"):
            refnorm.instance_norm_backward(DY, X, mean=np.zeros((4, 3)), rstd=np.full((4, 3), rstd))


@pytest.mark.skipif(np.finfo(np.longdouble).nmant <= 52, reason="long double is binary64 on this platform")
def test_longdouble_is_refused_not_rounded():
    """np.longdouble (x87 80-bit here: 64-bit significand) does not embed in binary64 (IEEE 754-2019
    §3.6: p = 53): the upcast would round, against the docstring's promise of an exact upcast."""
    xl = X.astype(np.longdouble) + np.longdouble(2) ** -60  # bits float64 cannot hold
    with _raises(r"^x has dtype float128 \(64-bit significand.*wider than float64"):
        refnorm.layer_norm_forward(xl, 5)
    with _raises(r"^weight has dtype float128"):
        refnorm.batch_norm_forward(X, np.ones(3, dtype=np.longdouble))
    with _raises(r"^eps is .* of dtype float128, which float64 cannot hold exactly"):
        refnorm.layer_norm_forward(X, 5, eps=np.longdouble(1) / 3)


def test_complex_ml_dtypes_format_is_refused():
    """ml_dtypes.bcomplex32 answers finfo like a real format; the float64 cast drops the imaginary part."""
    ml_dtypes = pytest.importorskip("ml_dtypes")
    if not hasattr(ml_dtypes, "bcomplex32"):
        pytest.skip("this ml_dtypes has no bcomplex32")
    with _raises(r"^x has dtype bcomplex32, expected a floating-point dtype"):
        refnorm.layer_norm_forward(X.astype(ml_dtypes.bcomplex32), 5)


def test_narrow_formats_still_upcast_exactly():
    """float16, bfloat16 and float8 embed in binary64 (ml_dtypes docs: every format's values are
    binary64 values): accepted, and equal to the float64 call on the same values."""
    ml_dtypes = pytest.importorskip("ml_dtypes")
    for dt in (np.float16, ml_dtypes.bfloat16, ml_dtypes.float8_e4m3fn, ml_dtypes.float8_e5m2):
        xn = X.astype(dt)
        np.testing.assert_array_equal(refnorm.layer_norm_forward(xn, 5).y,
                                      refnorm.layer_norm_forward(xn.astype(np.float64), 5).y)
