"""The multi-replica batch norm oracle: the Chan, Golub & LeVeque merge, and equality with batch
norm of the concatenated batch (a synchronized batch norm is that, by definition)."""

from fractions import Fraction

import numpy as np
import pytest

import refnorm
from refnorm import RefnormError
from refnorm import replicas as rep

U64 = np.finfo(np.float64).eps / 2


def _shards(rng, sizes, tail=(3, 5), channels_last=False, offset=0.0):
    out = []
    for r, n in enumerate(sizes):
        a = rng.standard_normal((n,) + tail) + offset * r
        out.append(np.moveaxis(a, 1, -1).copy() if channels_last else a)
    return out


def test_merge_worked_example_exact():
    # Worked example, exact in binary: {1, 2, 3} and {10, 14} (small integers; mean and M2 of the
    # union by hand: mean 6, M2 = 25+16+9+16+64 = 130). Chan, Golub & LeVeque 1983, eq. 2.1.
    a = (3, 2.0, 2.0)       # mean 2, M2 = 1 + 0 + 1
    b = (2, 12.0, 8.0)      # mean 12, M2 = 4 + 4
    n, m, s = rep.merge_moments([a, b])
    assert (float(n), float(m), float(s)) == (5.0, 6.0, 130.0)


def test_merge_matches_exact_rationals_on_four_parts():
    # Exact rational arithmetic as the reference (Python's fractions: mean and sum of squared
    # deviations of the union by definition), four unequal parts, one a single value.
    rng = np.random.default_rng(3)
    parts_x = [rng.standard_normal(k) + 4.0 * i for i, k in enumerate((7, 1, 12, 3))]
    parts = [rep.shard_moments(p.reshape(-1, 1)) for p in parts_x]
    n, m, s = rep.merge_moments(parts)
    allx = [Fraction(float(v)) for p in parts_x for v in p]
    mean = sum(allx) / len(allx)
    m2 = sum((v - mean) ** 2 for v in allx)
    assert float(n[0]) == len(allx)
    # error: a few roundings per merge level on nonnegative terms (Chan et al. 1983, §3; Higham 2002, §3.1 gamma_k)
    assert abs(Fraction(float(m[0])) - mean) <= 16 * U64 * max(abs(float(v)) for v in allx)
    assert abs(Fraction(float(s[0])) - m2) <= 16 * U64 * m2


def test_merge_identity_and_validation():
    n, m, s = rep.merge_moments([(0, 0.0, 0.0), (4, 1.5, 2.0)])  # count 0 is the identity (definition)
    assert (float(n), float(m), float(s)) == (4.0, 1.5, 2.0)
    with pytest.raises(RefnormError, match="parts"):
        rep.merge_moments([])
    with pytest.raises(RefnormError, match="negative"):
        rep.merge_moments([(2, 0.0, -1.0)])


@pytest.mark.parametrize("sizes,channels_last", [((3, 5), False), ((1, 4, 2), True), ((2, 1, 6, 3), False)])
def test_global_result_is_batch_norm_of_the_concatenation(sizes, channels_last):
    # Definition of synchronized batch norm: statistics of the concatenated batch (Ioffe & Szegedy 2015, Alg. 1).
    rng = np.random.default_rng(len(sizes))
    xs = _shards(rng, sizes, channels_last=channels_last, offset=2.0)
    dys = _shards(rng, sizes, channels_last=channels_last)
    axis = -1 if channels_last else 1
    w, b = rng.standard_normal(3), rng.standard_normal(3)
    rm, rv = np.zeros(3), np.ones(3)
    f = rep.replica_batch_norm_forward(xs, w, b, axis=axis, running_mean=rm, running_var=rv)
    whole = np.concatenate(xs)
    ref = refnorm.batch_norm_forward(whole, w, b, axis=axis, running_mean=rm, running_var=rv)
    np.testing.assert_array_equal(np.concatenate(f.y), ref.y)
    np.testing.assert_array_equal(f.running_var, ref.running_var)
    # the merge of the shards' moments agrees with the two-pass moments of the whole to float64 accuracy
    n, m, s = rep.merge_moments([rep.shard_moments(x, axis=axis) for x in xs])
    assert float(n[0]) == f.count == sum(f.counts)
    np.testing.assert_allclose(m, f.mean, rtol=0, atol=64 * U64 * np.abs(whole).max())
    np.testing.assert_allclose(s / n, f.var, rtol=64 * U64)
    g = rep.replica_batch_norm_backward(dys, xs, w, axis=axis)
    gref = refnorm.batch_norm_backward(np.concatenate(dys), whole, w, axis=axis)
    np.testing.assert_array_equal(np.concatenate(g.dx), gref.dx)
    # local shares sum to the reduced gradients (definition of the reduction)
    scale = np.abs(np.concatenate(dys)).sum()
    np.testing.assert_allclose(sum(g.dweight_local), g.dweight, rtol=0, atol=64 * U64 * scale * 10)
    np.testing.assert_allclose(sum(g.dbias_local), g.dbias, rtol=0, atol=64 * U64 * scale)
    assert g.param_grads(0, "local")["dbias"] is g.dbias_local[0]


def test_against_torch_composition():
    # torch as the outside reference: batch norm (torch.nn.functional.batch_norm, float64) on the
    # concatenated shards, split back; autograd for dx, dweight, dbias.
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(11)
    sizes = (1, 3, 2)
    xs = _shards(rng, sizes, tail=(4, 3, 2), offset=5.0)
    dys = _shards(rng, sizes, tail=(4, 3, 2))
    w, b = rng.standard_normal(4), rng.standard_normal(4)
    f = rep.replica_batch_norm_forward(xs, w, b, running_mean=np.zeros(4), running_var=np.ones(4))
    g = rep.replica_batch_norm_backward(dys, xs, w)
    tx = torch.tensor(np.concatenate(xs), requires_grad=True)
    tw, tb = torch.tensor(w, requires_grad=True), torch.tensor(b, requires_grad=True)
    rm, rv = torch.zeros(4, dtype=torch.float64), torch.ones(4, dtype=torch.float64)
    ty = torch.nn.functional.batch_norm(tx, rm, rv, tw, tb, training=True, momentum=0.1, eps=1e-5)
    ty.backward(torch.tensor(np.concatenate(dys)))
    tol = 1e-12  # float64 with reductions of 48 terms: far above gamma_48(u64) ~ 5e-15 times the scales
    np.testing.assert_allclose(np.concatenate(f.y), ty.detach().numpy(), rtol=0, atol=tol)
    np.testing.assert_allclose(f.running_var, rv.numpy(), rtol=tol)
    np.testing.assert_allclose(np.concatenate(g.dx), tx.grad.numpy(), rtol=0, atol=tol)
    np.testing.assert_allclose(g.dweight, tw.grad.numpy(), rtol=0, atol=tol * 50)
    np.testing.assert_allclose(g.dbias, tb.grad.numpy(), rtol=0, atol=tol * 50)


def test_shards_that_differ_in_more_than_the_batch_are_refused():
    with pytest.raises(RefnormError, match=r"shards\[1\]"):
        rep.replica_batch_norm_forward([np.ones((2, 3, 4)), np.ones((2, 4, 4))])
    with pytest.raises(RefnormError, match="axis"):
        rep.shard_moments(np.ones((2, 3)), axis=5)
    with pytest.raises(RefnormError, match="no elements"):
        rep.shard_moments(np.ones((0, 3)))
    with pytest.raises(RefnormError, match="shards"):
        rep.replica_batch_norm_forward("abc")
    with pytest.raises(RefnormError, match="dys"):
        rep.replica_batch_norm_backward([np.ones((2, 3))], [np.ones((3, 3))])
