"""Kernel declarations: strict checks at load (exit 2), and the outputs a declaration leaves unchecked.

A declaration is the kernel author's statement of what the harness may check. Two rules of the
project (common practice for a validating tool, and the first principle: a verdict is never
silently wrong): a declaration that cannot be honoured fails when it is loaded, before any case
runs; and an output that the declaration leaves unchecked is named in the verdict, the summary,
the results document and the report.
"""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import jsonschema
import numpy as np
import pytest

from conformance.report.markdown import md as md_escape

from conformance import Conventions, Kernel, KernelError, Precision
from conformance.cli import EXIT_USAGE, main
from conformance.kernel import unchecked_outputs
from conformance.report.content import coverage_gaps, gap_sentences
from conformance.run import RunOptions, run_check
from conformance.summary import verdict_lines

import harness_kernels as hk
import seeded_bugs as sb

ROOT = Path(__file__).resolve().parents[1]
LN = hk.good_layer_norm
BN = sb.correct_kernel("batch_norm")
BN_TRAIN_ID = "batch_norm/float32/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/train/contiguous"


def _bad(match: str):
    return pytest.raises(KernelError, match=match)


@pytest.mark.parametrize("value", ["2", True, 0, -1, 2.0, None])
def test_min_reduction_must_be_an_integer(value):
    """min_reduction="2" used to load and fail at run time with a TypeError in every case."""
    with _bad(r"min_reduction is \w+ .*, expected an integer >= 1"):
        replace(LN, min_reduction=value)


@pytest.mark.parametrize("field", ["strided", "optional_params", "momentum_none", "updates_running"])
@pytest.mark.parametrize("value", ["no", "False", 0, 1, None])
def test_flags_must_be_bools(field, value):
    """strided="no" used to count as True (a non-empty string is truthy)."""
    with _bad(rf"{field} is \w+ .*, expected True or False"):
        replace(LN, **{field: value})


def test_saved_statistics_must_be_in_outputs_when_forward_returns_them():
    """conventions.saved=("mean", "rstd") with outputs=("y",) used to load; every case then errored
    ("forward returned 3 values, declared 1"), or, for a forward returning y alone, backward got no
    saved statistics."""
    with _bad(r"conventions.saved names \['mean', 'rstd'\], which forward returns, but outputs \('y',\) does not "
              r"list them: give outputs=\('y', 'mean', 'rstd'\)"):
        replace(LN, outputs=("y",))
    with _bad(r"conventions.saved names \['rstd'\]"):
        replace(LN, outputs=("y", "mean"))


def test_backward_only_kernel_takes_the_oracles_saved_statistics():
    """Without a forward, outputs must be ('y',): the saved statistics backward needs are the
    oracle's (conformance.run.execute), and the kernel's own are reported as not checked."""
    k = Kernel(name="backward only", op="layer_norm", backward=hk.ln_backward,
               conventions=Conventions(saved=("mean", "rstd")))
    got = {(u["output"], tuple(u["modes"])) for u in unchecked_outputs(k)}
    assert got == {("y", ("train",)), ("mean", ("train",)), ("rstd", ("train",))}
    with _bad(r"outputs is \('y', 'mean', 'rstd'\), but there is no forward to return them"):
        Kernel(name="backward only", op="layer_norm", backward=hk.ln_backward, outputs=("y", "mean", "rstd"),
               conventions=Conventions(saved=("mean", "rstd")))


@pytest.mark.parametrize("field, value, what", [
    ("outputs", ("y", "mean", "mean", "rstd"), "outputs names 'mean' more than once"),
    ("grads", ("dx", "dx"), "grads names 'dx' more than once"),
    ("dtypes", ("float32", "float32"), "dtypes names 'float32' more than once"),
    ("layouts", ("channels_first", "channels_first"), "layouts names 'channels_first' more than once"),
])
def test_duplicate_names_are_refused(field, value, what):
    """Duplicates used to be accepted: a tuple return was then mapped onto fewer names than values."""
    with _bad(what):
        replace(LN, **{field: value})
    with _bad(r"conventions.saved names 'rstd' more than once"):
        replace(LN, conventions=Conventions(saved=("mean", "rstd", "rstd")))


@pytest.mark.parametrize("field, value, what", [
    ("outputs", "y", r"outputs is str 'y', expected a tuple of names"),
    ("grads", ("dx", 1), r"grads has int 1, expected names"),
    ("dtypes", (), r"dtypes is empty"),
    ("layouts", (), r"layouts is empty"),
    ("notes", None, r"notes is NoneType, expected a string"),
    ("conventions", {"saved": ("mean",)}, r"conventions is dict, expected a conformance.Conventions"),
    ("precision", Precision(lam=True), r"precision.lam is True, expected a finite positive number"),
    ("precision", Precision(lam=float("inf")), r"precision.lam is inf"),
    ("precision", Precision(summation=1), r"precision.summation is 1"),
    ("precision", Precision(output_accumulate={"dweigth": "bfloat16"}), r"names output 'dweigth'"),
    ("precision", {"float32": Precision(), "float31": Precision()}, r"entry for 'float31'"),
])
def test_other_fields_are_typed(field, value, what):
    with _bad(what):
        replace(LN, **{field: value})


def test_conventions_fields_are_typed():
    for f, v in (("momentum_convention", None), ("running_var_estimator", 1), ("eps_placement", ["inside"]),
                 ("running", "returned")):
        with _bad(rf"conventions.{f} is .*, expected"):
            replace(BN, conventions=replace(BN.conventions, **{f: v}))


def test_lists_are_accepted_and_stored_as_tuples():
    k = replace(LN, outputs=["y", "mean", "rstd"], dtypes=["float32"])
    assert k.outputs == ("y", "mean", "rstd") and k.dtypes == ("float32",)


def test_running_statistics_returned_but_not_declared_is_refused():
    """updates_running=True and running="return" with outputs=("y",) used to be CONFORMANT: the
    running statistics were never compared, and the report did not say so."""
    def forward(x, weight, bias, *, eps, axis, running_mean, running_var, momentum, batches_seen):
        return BN.forward(x=x, weight=weight, bias=bias, eps=eps, axis=axis, running_mean=running_mean,
                          running_var=running_var, momentum=momentum, batches_seen=batches_seen)[0]

    with _bad(r"updates_running=True with conventions.running='return' means forward returns \['running_mean', "
              r"'running_var'\], but outputs \('y',\) does not list \['running_mean', 'running_var'\]"):
        Kernel(name="bn", op="batch_norm", forward=forward, outputs=("y",))
    # The two honest declarations load: the running statistics listed, or declared unchecked.
    Kernel(name="bn", op="batch_norm", forward=BN.forward,
           outputs=("y", "mean", "rstd", "running_mean", "running_var"), conventions=BN.conventions)
    k = Kernel(name="bn", op="batch_norm", forward=forward, outputs=("y",), updates_running=False)
    assert [u["output"] for u in unchecked_outputs(k) if u["output"].startswith("running")] == ["running_mean",
                                                                                                  "running_var"]


BAD_SPEC = '''
from conformance import Kernel
import numpy as np

def forward(x, weight, bias, *, eps, normalized_shape):
    return x

kernel = Kernel(name="bad", op="layer_norm", forward=forward, {field})
'''


@pytest.mark.parametrize("field, words", [
    ('min_reduction="2"', "min_reduction is str '2'"),
    ('strided="no"', "strided is str 'no'"),
    ('outputs=("y", "y")', "outputs names 'y' more than once"),
])
def test_a_bad_declaration_exits_2_at_load(tmp_path, capsys, field, words):
    spec = tmp_path / "bad_kernel.py"
    spec.write_text(BAD_SPEC.format(field=field))
    rc = main(["check", f"{spec}:kernel", "--tier", "smoke", "--quiet"])
    err = capsys.readouterr().err
    assert rc == EXIT_USAGE == 2
    assert words in err and "refnorm: error:" in err


@pytest.mark.parametrize("make, expected", [
    (lambda: replace(BN, updates_running=False), {"running_mean": ["train"], "running_var": ["train"]}),
    (lambda: replace(BN, forward_eval=None), {"y": ["eval"]}),
    (lambda: replace(BN, backward_eval=None), {"dx": ["eval"], "dweight": ["eval"], "dbias": ["eval"]}),
    (lambda: replace(BN, grads=("dx",)), {"dweight": ["train", "eval"], "dbias": ["train", "eval"]}),
    (lambda: replace(LN, backward=None), {"dx": ["train"], "dweight": ["train"], "dbias": ["train"]}),
    (lambda: BN, {}),
    (lambda: LN, {}),
])
def test_unchecked_outputs_name_each_gap(make, expected):
    got = {}
    for u in unchecked_outputs(make()):
        got.setdefault(u["output"], []).extend(u["modes"])
        assert u["reason"]
    assert got == expected


def test_unchecked_running_statistics_reach_the_verdict_the_document_and_the_report(tmp_path):
    """updates_running=False: the run is CONFORMANT on what it checked, and every view says that the
    running statistics were not checked (before: the verdict line said nothing)."""
    from conformance.report import write_report

    k = replace(BN, updates_running=False)
    doc = run_check(k, RunOptions(case_ids=(BN_TRAIN_ID,)), quiet=True)
    assert doc["verdict"] == "conformant"
    names = [u["output"] for u in doc["kernel"]["unchecked"]]
    assert names == ["running_mean", "running_var"]
    jsonschema.Draft202012Validator(json.loads((ROOT / "docs" / "results-schema.json").read_text())).validate(doc)
    lines = verdict_lines(doc)
    assert lines[0].startswith("verdict: CONFORMANT")
    assert lines[0].endswith("outputs not checked by declaration: running_mean, running_var")
    assert "not checked: running_var (train): updates_running=False" in lines[2]
    gaps = coverage_gaps(doc)
    assert any("running_mean (train): updates_running=False" in g for g in gaps.outputs_unchecked)
    assert any("leaves unchecked: running_mean" in s for s in gap_sentences(gaps))
    paths = write_report(doc, tmp_path, peers=None, peers_note="disabled for this test")
    md = paths["markdown"].read_text()
    assert md_escape("running_var (train): updates_running=False") in md  # escaped as all Markdown text


# ------------------------------------------------------------------ declarations that say what kernels do
@pytest.mark.parametrize("value, what", [
    (Precision(statistics="float12"), r"precision.statistics is 'float12', expected one of"),
    (Precision(saved=32), r"precision.saved is 32, expected one of"),
    (Precision(subnormals="ftz"), r"precision.subnormals is 'ftz', expected one of 'keep', 'flush'"),
    (Precision(subnormals=True), r"precision.subnormals is True"),
    (Precision(overflow="clip"), r"precision.overflow is 'clip', expected one of 'nonsaturating', 'saturate'"),
    (Precision(output_summation="worst"), r"precision.output_summation is str, expected a mapping output -> "
                                          r"summation model"),
    (Precision(output_summation={"dweigth": "worst"}), r"precision.output_summation names output 'dweigth'"),
    (Precision(output_summation={"dweight": "atomic"}), r"precision.output_summation\['dweight'\] is 'atomic', "
                                                        r"expected one of probabilistic, pairwise, worst"),
    (Precision(output_accumulate={"dweight": "float12"}), r"precision.output_accumulate\['dweight'\] is 'float12'"),
])
def test_precision_fields_are_checked(value, what):
    """Each field of a Precision is checked at load (common practice for a validating tool: a bad
    declaration costs no run), with a message naming the field, the value and the choices."""
    with _bad(what):
        replace(LN, precision=value)


def test_y_form_is_checked():
    with _bad(r"conventions.y_form is 'fused', expected 'centred' or 'folded'"):
        replace(LN, conventions=replace(LN.conventions, y_form="fused"))


def test_new_precision_fields_are_recorded_resolved():
    """The results document records every field, with its effective value (statistics in the
    accumulation format and saved statistics in the params format unless declared)."""
    d = Precision(storage="float16", params="float16").as_dict()
    assert (d["statistics"], d["saved"], d["subnormals"], d["overflow"], d["output_summation"]) == \
        ("float32", "float16", "keep", "nonsaturating", {})
    d = Precision(storage="float16", params="float16", statistics="float16", saved="float32", subnormals="flush",
                  overflow="saturate", output_summation={"dweight": "worst"}).as_dict()
    assert (d["statistics"], d["saved"], d["subnormals"], d["overflow"], d["output_summation"]) == \
        ("float16", "float32", "flush", "saturate", {"dweight": "worst"})
    assert Precision(output_summation={"dbias": "worst"}).summation_for("dbias") == "worst"
    assert Precision(summation="pairwise").summation_for("dweight") == "pairwise"
    assert Conventions().as_dict()["y_form"] == "centred"


def _forward_only(rstd_scale):
    def forward(x, weight, bias, *, eps, normalized_shape):
        y, mean, rstd = hk.ln_forward(x, weight, bias, eps=eps, normalized_shape=normalized_shape)
        return y, mean, (rstd * np.float32(rstd_scale)).astype(np.float32)

    return Kernel(name="forward only", op="layer_norm", forward=forward, outputs=("y", "mean", "rstd"))


def test_outputs_alone_decide_which_statistics_are_checked():
    """A forward-only kernel lists mean and rstd in outputs without declaring them saved (it has no
    backward to give them to): they are checked. Before, outputs could name only the saved statistics."""
    ln_id = "layer_norm/float32/trailing/12x96/norm_ndim=1/normal/w=random/b=random/eps=1e-05/train/contiguous"
    good = run_check(_forward_only(1.0), RunOptions(case_ids=(ln_id,)), quiet=True)
    assert good["verdict"] == "conformant"
    assert [o["name"] for o in good["cases"][0]["outputs"]] == ["y", "mean", "rstd"]
    # An rstd off by 1e-3 relative (a few thousand float32 units, IEEE 754-2019 binary32 u = 2^-24)
    # fails on rstd, and only there.
    bad = run_check(_forward_only(1.001), RunOptions(case_ids=(ln_id,)), quiet=True)
    failing = [o["name"] for o in bad["cases"][0]["outputs"] if not o["passed"]]
    assert failing == ["rstd"]
    with _bad(r"outputs names \['mean'\], which the declaration does not produce"):
        Kernel(name="x", op="rms_norm", forward=hk.ln_forward, outputs=("y", "mean"))  # RMS norm has no mean


def test_the_report_states_the_declaration_fields():
    """What the bound is derived from is on the report (common practice for a tolerance report: every
    setting recorded), in words, where it differs from the default."""
    from conformance.report.content import kernel_facts

    k = replace(LN, dtypes=("float16",), precision=Precision(params="float16", statistics="float16", saved="float32",
                                                            subnormals="flush", overflow="saturate",
                                                            output_summation={"dweight": "worst"}))
    text = dict(kernel_facts({"kernel": k.declaration()}))["precision float16"]
    for words in ("statistics rounded to float16 before use", "saved statistics in float32",
                  "subnormals flushed to zero", "out-of-range results saturate", "summation per output: dweight worst"):
        assert words in text, text
    plain = dict(kernel_facts({"kernel": LN.declaration()}))["precision float32"]
    assert "flushed" not in plain and "saturate" not in plain and "rounded to" not in plain
