"""A pass under a bound that is not informative is not evidence; invariants hold whatever the declaration.

Sources: the rounding-error model of docs/tolerances.md (Higham 2002, §4.2: recursive summation's
worst case n u, vacuous once n u >= 1); Samuelson 1968, "How deviant can you be?", JASA 63 (from
memory): max_i |x_i - mean| <= s sqrt(n - 1) with s the population deviation, which with a
kernel's own mean m' gives |x_i - m'| <= sqrt(n mean((x - m')^2)) (conformance/evidence.py derives
the step); Sterbenz 1974 (x - y is exact for y/2 <= x <= 2y, so x - x = 0 exactly).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import seeded_bugs as sb
from conformance.evidence import invariant_violations, uninformative
from conformance.results import load, write_json_atomic
from conformance.run import RunOptions, run_check

ROOT = Path(__file__).resolve().parents[1]
LONG = "layer_norm/bfloat16/trailing/2x1048576/norm_ndim=1/normal/w=random/b=random/eps=1e-05/train/contiguous"
MID = "layer_norm/float32/trailing/12x96/norm_ndim=1/normal/w=random/b=random/eps=1e-05/train/contiguous"


class _Scaled(sb.NumpyNorm):
    """y = b + 1e4 (y_correct - b): a wrong answer 1e4 times the deviation a correct kernel gives."""

    def forward(self, x, weight=None, bias=None, **kw):
        out = super().forward(x, weight, bias, **kw)
        y = out[0] if isinstance(out, tuple) else out
        b = 0.0 if bias is None else np.asarray(bias, np.float64)
        bad = (b + 1e4 * (np.asarray(y, np.float64) - b)).astype(y.dtype)
        return (bad, *out[1:]) if isinstance(out, tuple) else bad


def _loose(impl):
    # every format bfloat16 and the worst-case summation model: on 2^20-long rows n u = 4096 >> 1
    return impl.kernel("loose declaration", precision={"accumulate": "bfloat16", "summation": "worst"})


def test_a_vacuous_bound_makes_the_pass_inconclusive_not_conformant():
    doc = run_check(_loose(sb.NumpyNorm("layer_norm", "bfloat16")), RunOptions(case_ids=(LONG,)), quiet=True)
    (c,) = doc["cases"]
    assert c["status"] == "inconclusive" and doc["verdict"] == "inconclusive", c["message"]
    inc = [o for o in c["outputs"] if o["inconclusive"]]
    assert inc and all(o["passed"] for o in inc)
    assert "not evidence" in c["message"]
    assert doc["counts"]["inconclusive"] == 1 and doc["counts"]["passed"] == 0


def test_accepting_named_outputs_is_recorded_and_only_those_are_accepted():
    k = _loose(sb.NumpyNorm("layer_norm", "bfloat16"))
    doc = run_check(k, RunOptions(case_ids=(LONG,)), quiet=True)
    names = sorted({o["name"] for o in doc["cases"][0]["outputs"] if o["inconclusive"]})
    some = run_check(k, RunOptions(case_ids=(LONG,), accept_inconclusive=tuple(names[:1])), quiet=True)
    every = run_check(k, RunOptions(case_ids=(LONG,), accept_inconclusive=tuple(names)), quiet=True)
    if len(names) > 1:
        assert some["verdict"] == "inconclusive"
    assert every["verdict"] == "conformant" and every["run"]["accept_inconclusive"] == names
    assert all(o.get("accepted_inconclusive") for o in every["cases"][0]["outputs"] if o["inconclusive"])


def test_a_wrong_kernel_under_a_loose_declaration_breaks_the_invariant():
    # Samuelson 1968 (from memory): |y - b| <= |w| sqrt(n - 1) for any normalization; 1e4 times the
    # deviation breaks it whatever bound the declaration gives
    doc = run_check(_loose(_Scaled("layer_norm", "bfloat16")), RunOptions(case_ids=(LONG, LONG.replace(
        "2x1048576", "12x96"))), quiet=True)
    assert doc["verdict"] == "not conformant"
    ys = {c["id"]: next(o for o in c["outputs"] if o["name"] == "y") for c in doc["cases"]}
    assert not any(y["passed"] for y in ys.values())
    # on the long rows the loose bound admits it; the invariant does not
    assert ys[LONG]["budget_used"] < 1 and "invariant broken" in ys[LONG]["invariant"], ys[LONG]["message"]


def test_correct_kernels_break_no_invariant_on_the_standard_tier():
    # the invariants are stated for every correct kernel: none fires on the reference port in any format
    for dt in ("float32", "bfloat16", "float8_e4m3fn"):
        for op in ("layer_norm", "batch_norm", "rms_norm"):
            doc = run_check(sb.NumpyNorm(op, dt).kernel("ref"), RunOptions(dtypes=(dt,), workers=2), quiet=True)
            broken = [c["id"] for c in doc["cases"] for o in c["outputs"] if o.get("invariant")]
            assert not broken, broken


def test_uninformative_criterion():
    e = np.array([1.0, -2.0])
    assert uninformative(e, np.array([0.1, 0.1])) == ""
    assert "largest bound" in uninformative(e, np.array([2.0, 0.1]))
    assert uninformative(e, np.array([2.0, 0.1]), scale=100.0) == ""  # a sum whose terms are far larger
    assert "overflowed" in uninformative(e, np.array([0.1, 0.1]), nonfinite=1)
    z = np.zeros(3)
    assert uninformative(z, np.full(3, 1e-40), tiny=1e-38) == ""
    assert "exactly 0" in uninformative(z, np.full(3, 1e-3), tiny=1e-38)


def test_eval_centred_form_gives_the_bias_where_x_is_the_running_mean():
    # Sterbenz 1974: x - m = 0 exactly where x == m, so the centred form gives y = b there
    from conformance.cases import find_case

    case = find_case("batch_norm/float32/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/eval/"
                     "running=at_mean/contiguous")
    from conformance.cases.generators import make_inputs
    from conformance.kernel import Conventions, Precision

    inp = make_inputs(case, Precision(storage="float32"), 0)
    i64 = {k: (None if v is None else np.asarray(v, np.float64)) for k, v in inp.items()}
    c = case.channels
    sh = (1, c, 1, 1)
    w, b, rm, rv = (i64[k].reshape(sh) for k in ("weight", "bias", "running_mean", "running_var"))
    centred = ((i64["x"] - rm) / np.sqrt(rv + case.eps) * w + b).astype(np.float32)
    a = w / np.sqrt(rv + case.eps)
    folded = (i64["x"].astype(np.float32) * a.astype(np.float32) + (b - rm * a).astype(np.float32))
    assert invariant_violations(case, Conventions(), i64, centred, "float32") == ""
    msg = invariant_violations(case, Conventions(), i64, folded.astype(np.float32), "float32")
    assert "running mean" in msg
    assert invariant_violations(case, Conventions(y_form="folded"), i64, folded, "float32") == ""


def test_cli_exit_4_and_the_accept_option(tmp_path):
    spec = tmp_path / "loose.py"
    spec.write_text("import sys\nsys.path.insert(0, %r)\nimport seeded_bugs as sb\n"
                    "kernel = sb.NumpyNorm('layer_norm', 'bfloat16').kernel('loose', precision="
                    "{'accumulate': 'bfloat16', 'summation': 'worst'})\n" % str(ROOT / "tests"))
    base = [sys.executable, "-m", "conformance", "check", f"{spec}:kernel", "--case", LONG, "--quiet"]
    r = subprocess.run(base + ["--json", str(tmp_path / "a.json")], capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 4, r.stdout + r.stderr
    assert "verdict: INCONCLUSIVE" in r.stdout and "--accept-inconclusive" in r.stdout
    doc = load(tmp_path / "a.json")  # schema-valid
    names = sorted({o["name"] for o in doc["cases"][0]["outputs"] if o["inconclusive"]})
    acc = sum((["--accept-inconclusive", n] for n in names), [])
    r = subprocess.run(base + acc + ["--json", str(tmp_path / "b.json")], capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 0, r.stdout + r.stderr
    assert load(tmp_path / "b.json")["run"]["accept_inconclusive"] == names
    r = subprocess.run(base + ["--accept-inconclusive", "nonsense"], capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 2 and "nonsense" in r.stderr and "Traceback" not in r.stderr


def test_profile_key_accept_inconclusive_is_validated():
    from conformance.gate.profile import ProfileError, parse_profile

    assert parse_profile({"accept_inconclusive": ["y", "dx"]}).accept_inconclusive == ("y", "dx")
    for bad in (["why"], 3, [], [["y"]]):
        with pytest.raises(ProfileError, match="accept_inconclusive"):
            parse_profile({"accept_inconclusive": bad})


def test_a_document_with_inconclusive_cases_renders_and_reads_back(tmp_path):
    doc = run_check(_loose(sb.NumpyNorm("layer_norm", "bfloat16")), RunOptions(case_ids=(LONG, MID.replace(
        "float32", "bfloat16"))), quiet=True)
    write_json_atomic(tmp_path / "r.json", doc)
    back = load(tmp_path / "r.json")
    assert back["verdict"] == "inconclusive"
    from conformance.gate.junit import write_junit
    from conformance.report import write_report

    write_report(back, tmp_path / "rep")
    assert "inconclusive" in (tmp_path / "rep" / "report.md").read_text()
    write_junit(tmp_path / "j.xml", [back])
    assert 'type="inconclusive"' in (tmp_path / "j.xml").read_text()
    json.dumps(back)
