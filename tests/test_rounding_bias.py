"""The rounding-bias test (conformance.rounding_bias): its tail probabilities, its per-element counts, a
correct kernel never flagged, directed rounding flagged where round to nearest is declared.

Sources: the binomial distribution's upper tail, checked against mpmath's exact rational sum;
Hoeffding 1963, Theorem 1 (P(S/n - p >= t) <= exp(-2 n t^2)); the rounding-direction attributes of
IEEE 754-2019 §4.3 (roundTiesToEven, roundTowardZero, roundTowardPositive, roundTowardNegative);
Higham 2002, §2.2 (a correctly rounded result errs by at most u |x|, half an ULP to one ULP).
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest

from conformance import dtypes, ops
from conformance.cases import catalog
from conformance.compare import compare_output
from conformance.kernel import Precision
from conformance.results import build_document, verdict
from conformance.rounding_bias import ALPHA, binomial_tail, element_statistics, flagged, run_bias
from conformance.run.execute import execute_case
from conformance.summary import verdict_lines
from conformance.tolerances.bound import Bound

from described_kernels import rounded_oracle
from numerics_kernels import directed_oracle, directed_round

mpmath = pytest.importorskip("mpmath")


def _run(kernel, op, dtype, tier="smoke"):
    cases = catalog([op], [dtype], tier)
    res = [execute_case(kernel, c, 0) for c in cases]
    return res, build_document(kernel.declaration(), {}, res, True, env={})


# ------------------------------------------------------------------------------ the tail probabilities
@pytest.mark.parametrize("k,n", [(0, 5), (3, 5), (5, 5), (6, 5), (30, 40), (24, 24), (600, 1000), (520, 1000)])
def test_binomial_tail_is_exact(k, n):
    """P(X >= k), X ~ Binomial(n, 1/2) = sum_{j>=k} C(n, j) / 2^n: mpmath's exact sum (the definition)."""
    with mpmath.workdps(60):
        want = mpmath.fsum(mpmath.binomial(n, j) for j in range(max(k, 0), n + 1)) / mpmath.mpf(2) ** n
    got = binomial_tail(k, n)
    assert got == pytest.approx(float(want), rel=1e-12, abs=1e-300)


def test_hoeffding_branch_is_conservative():
    """Above the exact limit the tail is Hoeffding's bound exp(-2 n t^2) (Hoeffding 1963, Theorem 1):
    never below the exact tail (the definition in Python's exact integers: C(n, j+1) = C(n, j) (n-j)/(j+1))."""
    n = 20001
    for k in (10001, 10150, 10400, 11000):
        c, total = math.comb(n, k), 0
        for j in range(k, n + 1):
            total += c
            c = c * (n - j) // (j + 1)
        exact = float(Fraction(total, 2 ** n))
        got = binomial_tail(k, n)
        assert got >= exact
        assert got == pytest.approx(math.exp(-2 * n * (k / n - 0.5) ** 2))


def test_level_is_alpha_over_the_tests():
    """Bonferroni: with m tests each at alpha / m, the run's false-alarm probability is <= alpha
    (Boole's inequality). Four directions per output with determined elements."""
    rng = np.random.default_rng(3)
    e = (1 + rng.random(4000)).astype(np.float64)
    a = dtypes.round_to(e, "bfloat16").astype(np.float64)
    st = element_statistics(a, e, 2.0 ** -8 * e, "bfloat16")
    cases = [{"id": f"c{i}", "status": "passed", "case": {"op": "layer_norm", "dtype": "bfloat16"},
              "outputs": [{"name": n, "dtype": "bfloat16", "rounding": st} for n in ("y", "dx", "dbias")]}
             for i in range(2)]
    rows = run_bias(cases)
    assert {r["tests"] for r in rows} == {12}
    assert all(r["level"] == pytest.approx(ALPHA / 12) for r in rows)
    assert all(r["verdict"] == "no evidence" and r["deviations"] == 0 for r in rows)


# ------------------------------------------------------------------------------ the per-element counts
def _upper_halves(n: int, seed: int = 0) -> np.ndarray:
    """float64 values in [1.5, 2) each lying 0.05-0.70 of the way through its bfloat16 ULP (2^-7 there)."""
    rng = np.random.default_rng(seed)
    base = dtypes.round_to(1.5 + 0.49 * rng.random(n), "bfloat16").astype(np.float64)
    base = np.minimum(base, 2.0 - 2.0 ** -7)
    return base + (0.05 + 0.65 * rng.random(n)) * 2.0 ** -7


def test_counts_of_a_truncating_kernel_within_its_half_ulp_bound():
    """Truncation toward zero errs by f ULP (f the fraction of the way through the ULP); on [1.5, 2) the
    bound u |e| is 0.75-1 ULP of bfloat16 (u = 2^-8; Higham 2002, §2.2), so with f <= 0.7 every element
    passes the bound, and the elements with f > 1/2 (where round to nearest goes up) deviate toward zero.
    The comparison passes the output; the bias test flags it."""
    e = _upper_halves(3000)
    frac = (e - np.floor(e * 2 ** 7) / 2 ** 7) / 2 ** -7
    a = directed_round(e, "bfloat16", "toward_zero")
    b = Bound(output="y", values=2.0 ** -8 * np.abs(e), formula="u |e|")
    res = compare_output("y", a, e, b, dtype="bfloat16")
    assert res.passed  # the half-ULP allowance does not see the truncation
    st = res.rounding
    assert st["determined"] == 3000  # the bound has nothing before the final rounding: every value determined
    assert st["deviations"] == st["toward_zero"] == int(np.count_nonzero(frac > 0.5)) > 500
    assert st["away"] == 0 and st["down"] == st["deviations"] and st["up"] == 0  # positive values: toward zero is down
    case = {"id": "c", "status": "passed", "case": {"op": "layer_norm", "dtype": "bfloat16"},
            "outputs": [res.to_dict()]}
    rows = run_bias([case])
    assert flagged(rows) and rows[0]["direction"] == "toward zero"


def test_round_to_nearest_gives_no_deviation():
    """RN(e) (IEEE 754-2019 §4.3.1, ties to even: NumPy's/ml_dtypes' cast) is the reference itself."""
    e = _upper_halves(2000, seed=1) * np.where(np.arange(2000) % 2, 1.0, -1.0)
    a = dtypes.round_to(e, "bfloat16").astype(np.float64)
    st = element_statistics(a, e, 2.0 ** -8 * np.abs(e), "bfloat16")
    assert st["correctly_rounded"] == st["elements"] == 2000 and st["deviations"] == 0


def test_midpoints_and_float64_are_not_tested():
    """A value on a rounding midpoint is not determined (either neighbour is a correct rounding under an
    error of any size); the float64 oracle is no correctly rounded reference for float64 outputs."""
    mid = np.array([1.0 + 2.0 ** -8, 3.0 + 2.0 ** -7])  # halfway between bfloat16 neighbours
    st = element_statistics(mid, mid, 2.0 ** -8 * mid, "bfloat16")
    assert st["determined"] == 0
    assert element_statistics(mid, mid, mid, "float64") == {}


@pytest.mark.parametrize("direction,counter", [("toward_zero", "toward_zero"), ("up", "up"), ("down", "down")])
def test_directed_rounding_counts_signs(direction, counter):
    """roundTowardZero / roundTowardPositive / roundTowardNegative (IEEE 754-2019 §4.3.2) on values of both
    signs: every deviation is in the rounding's direction."""
    rng = np.random.default_rng(5)
    e = rng.standard_normal(5000)
    a = directed_round(e, "bfloat16", direction).astype(np.float64)
    st = element_statistics(a, e, 2.0 ** -8 * np.abs(e), "bfloat16")
    assert st["deviations"] > 1000 and st[counter] == st["deviations"]


# ------------------------------------------------------------------------------ kernels over cases
@pytest.mark.parametrize("op", ["layer_norm", "batch_norm"])
@pytest.mark.parametrize("dtype,acc", [("bfloat16", None), ("float32", "float64")])
def test_correct_kernel_is_not_flagged(op, dtype, acc):
    """The oracle rounded to nearest once (a correctly rounded result: Higham 2002, §2.2): no deviation on
    a determined element, no flag, conformant. float32 declares float64 arithmetic (what it does), which
    leaves room to determine its values."""
    prec = {dtype: Precision(storage=dtype, accumulate=acc)} if acc else None
    _, doc = _run(rounded_oracle(ops.get(op), dtype, precision=prec), op, dtype)
    assert doc["verdict"] == "conformant"
    rows = doc["rounding_bias"]
    assert sum(r["determined"] for r in rows) > 1000  # the test had something to look at
    assert all(r["deviations"] == 0 and r["verdict"] == "no evidence" for r in rows), rows


@pytest.mark.parametrize("direction,label", [("toward_zero", "toward zero"), ("up", "up"), ("down", "down")])
def test_directed_rounding_fails_the_run(direction, label):
    """The oracle rounded in a fixed direction (IEEE 754-2019 §4.3.2) where round to nearest is declared
    (the default: Precision has no other rounding): y and dx flagged in that direction at alpha 1e-6, the
    verdict not conformant, and the terminal says so."""
    _, doc = _run(directed_oracle(ops.get("layer_norm"), "bfloat16", direction), "layer_norm", "bfloat16")
    bad = {r["output"]: r for r in flagged(doc)}
    assert {"y", "dx"} <= set(bad) and all(r["direction"] == label for r in bad.values())
    assert doc["verdict"] == "not conformant"
    text = "\n".join(verdict_lines(doc))
    assert f"directed rounding suspected ({label})" in text


def test_flagged_run_fails_even_when_every_case_passes():
    """A run whose every case passed its bounds is still not conformant when the bias test fails (the
    verdict reads the run-level finding: results.verdict), and the gate fails it (gate/decide.py)."""
    from conformance.gate.decide import apply_gate

    e = _upper_halves(3000)
    a = directed_round(e, "bfloat16", "toward_zero")
    res = compare_output("y", a, e, Bound(output="y", values=2.0 ** -8 * e, formula="u |e|"), dtype="bfloat16")
    from conformance.results import CaseResult

    case = CaseResult(id="layer_norm/bfloat16/x", case={"op": "layer_norm", "dtype": "bfloat16"}, status="passed",
                      outputs=[res.to_dict()])
    assert verdict([case], True) == "not conformant"
    doc = build_document({"name": "k"}, {}, [case], True, env={})
    gated, _ = apply_gate(doc)
    assert gated["gate"]["verdict"] == "fail"
    assert any("directed rounding suspected" in r for r in gated["gate"]["reasons"])


def test_float32_truncation_under_float32_arithmetic_is_not_tested():
    """Where the declared arithmetic's error before the final rounding exceeds half an ULP everywhere
    (float32 results of float32 sums), no value is determined: the test says "not tested" rather than
    "no evidence" (a verdict is never silently wrong), and the counts of all elements are reported."""
    _, doc = _run(directed_oracle(ops.get("layer_norm"), "float32", "toward_zero"), "layer_norm", "float32")
    rows = doc["rounding_bias"]
    assert rows and all(r["verdict"] == "not tested" for r in rows)
    assert all(r["off_toward_zero"] > 0 and r["off_away"] == 0 for r in rows)
    assert "rounding bias not tested" in "\n".join(verdict_lines(doc))


def test_torch_cpu_bfloat16_layer_norm_is_not_flagged():
    """torch CPU's bfloat16 layer norm rounds y, mean and rstd once from float32 arithmetic
    (docs/library-precision.md, "Layer norm"): no deviation on a determined element."""
    pytest.importorskip("torch")
    from conformance.adapters import torch_cpu

    _, doc = _run(torch_cpu.layer_norm(), "layer_norm", "bfloat16")
    rows = {r["output"]: r for r in doc["rounding_bias"]}
    assert rows["y"]["determined"] > 1000 and rows["y"]["deviations"] == 0
    assert not flagged(doc) and doc["verdict"] == "conformant"


def test_pytest_plugin_reports_the_run_level_finding(tmp_path):
    """Under the pytest plugin (CI) the run-level test runs over the kernel's items: a truncating kernel's
    session fails with a "FAILED (run level)" line naming the direction, and the effective precision of
    each output is printed; the correctly rounded kernel's session passes with its effective precision."""
    from pathlib import Path

    from test_pytest_plugin import run_pytest

    tests = Path(__file__).resolve().parent
    (tmp_path / "k.py").write_text(
        "import sys\nsys.path.insert(0, %r)\n" % str(tests)
        + "from conformance import ops\nfrom numerics_kernels import directed_oracle\n"
        "from described_kernels import rounded_oracle\n"
        "truncating = directed_oracle(ops.get('layer_norm'), 'bfloat16', 'toward_zero')\n"
        "rounded = rounded_oracle(ops.get('layer_norm'), 'bfloat16')\n")
    bad = run_pytest(tmp_path / "bad", "--refnorm-kernel", f"{tmp_path / 'k.py'}:truncating", "--refnorm-tier", "smoke")
    assert bad.returncode == 1, bad.stdout[-3000:]
    assert "FAILED (run level)" in bad.stdout and "directed rounding suspected (toward zero)" in bad.stdout
    good = run_pytest(tmp_path / "good", "--refnorm-kernel", f"{tmp_path / 'k.py'}:rounded", "--refnorm-tier", "smoke")
    assert good.returncode == 0, good.stdout[-3000:]
    assert "FAILED (run level)" not in good.stdout
    assert good.stdout.count("effective precision: layer_norm bfloat16") == 4  # y, dx, dweight, dbias


def test_hostile_statistics_in_a_document_are_refused(tmp_path):
    """A results document whose per-output rounding counts are not counts (a string, a negative number),
    or whose run-level section lacks a field the writers read, is refused by the one reader of documents
    with the field named (conformance.documents, docs/results-schema.json); the untouched document loads."""
    import copy
    import json

    from conformance.documents import DocumentError, loads
    from conformance.run import RunOptions, run_check

    doc = run_check(rounded_oracle(ops.get("layer_norm"), "bfloat16"), RunOptions(tier="smoke", workers=1))
    assert loads(json.dumps(doc))["rounding_bias"]
    for path, value in ((("cases", 0, "outputs", 0, "rounding", "deviations"), "many"),
                        (("cases", 0, "outputs", 0, "rounding", "toward_zero"), -3),
                        (("rounding_bias", 0, "verdict"), "fine"),
                        (("effective_precision", 0, "declared_bits"), None)):
        bad = copy.deepcopy(doc)
        node = bad
        for p in path[:-1]:
            node = node[p]
        if value is None:
            del node[path[-1]]
        else:
            node[path[-1]] = value
        with pytest.raises(DocumentError) as err:
            loads(json.dumps(bad), "hostile.json")
        assert path[-1] in str(err.value) or path[0] in str(err.value)
