"""The runner: isolation of crashes and hangs, input-modification checks, declarations, determinism.

These test the harness machinery, whose facts are of the operating system and of Python:
a read of address 0 raises SIGSEGV and os.abort raises SIGABRT (POSIX.1-2017, signal.h).
"""

from __future__ import annotations

import numpy as np
import pytest

from conformance.cases import catalog
from conformance.run import RunOptions, run_check
from conformance.run.execute import execute_case

import harness_kernels as hk

SMOKE_IDS = tuple(c.id for c in catalog(["layer_norm"], ["float32"], "smoke"))
ONE = SMOKE_IDS[:1]


def _run(kernel, ids=ONE, **kw):
    return run_check(kernel, RunOptions(case_ids=ids, **kw), quiet=True)


def test_correct_kernel_passes_smoke_and_records_every_output():
    doc = _run(hk.good_layer_norm, ids=SMOKE_IDS, workers=2)
    assert doc["verdict"] == "conformant", [c["message"] for c in doc["cases"]]
    names = {o["name"] for c in doc["cases"] for o in c["outputs"]}
    assert names == {"y", "mean", "rstd", "dx", "dweight", "dbias"}
    assert doc["complete"] is True and doc["counts"]["passed"] == len(SMOKE_IDS)


@pytest.mark.parametrize("kernel, signal_name", [(hk.segfault_layer_norm, "SIGSEGV"), (hk.abort_layer_norm, "SIGABRT")])
def test_a_crash_costs_one_case_and_names_the_signal(kernel, signal_name):
    # POSIX.1-2017 <signal.h>: SIGSEGV for an invalid memory reference, SIGABRT from abort().
    doc = _run(kernel, ids=SMOKE_IDS[:2], workers=1)
    assert [c["status"] for c in doc["cases"]] == ["crashed", "crashed"]
    assert all(signal_name in c["message"] for c in doc["cases"])
    assert doc["verdict"] == "not conformant" and doc["complete"] is True


def test_crash_on_some_cases_leaves_the_others_checked():
    doc = _run(hk.crash_some_layer_norm, ids=SMOKE_IDS, workers=2)
    status = {c["id"]: c["status"] for c in doc["cases"]}
    crashed = [i for i, s in status.items() if s == "crashed"]
    assert crashed and all("/12x96/" in i for i in crashed)
    assert all(s == "passed" for i, s in status.items() if "/12x96/" not in i)


def test_a_hang_times_out_and_the_run_goes_on():
    doc = _run(hk.hang_layer_norm, ids=SMOKE_IDS[:2], workers=2, timeout=1.5)
    assert [c["status"] for c in doc["cases"]] == ["timed_out", "timed_out"]
    assert "1.5 s" in doc["cases"][0]["message"]


def test_a_kernel_exception_is_an_error_with_its_message():
    doc = _run(hk.raise_layer_norm)
    (c,) = doc["cases"]
    assert c["status"] == "error" and "RuntimeError: device queue full" in c["message"]


def test_in_place_modification_of_the_input_is_reported():
    doc = _run(hk.inplace_layer_norm)
    (c,) = doc["cases"]
    assert c["status"] == "failed" and c["modified_inputs"] == ["x"]
    assert "modified its input(s) in place: x" in c["message"]


def test_a_return_value_that_breaks_the_declaration_is_named():
    doc = _run(hk.wrong_count_layer_norm)
    (c,) = doc["cases"]
    assert c["status"] == "error" and "returned 2 values, declared 3" in c["message"]


def test_undeclared_dtypes_and_strides_are_skipped_with_a_reason():
    k = hk.good_layer_norm
    from dataclasses import replace

    nostride = replace(k, strided=False)
    ids = [c.id for c in catalog(["layer_norm"], ["float32"], "standard") if c.strides != "contiguous"][:2]
    doc = _run(nostride, ids=tuple(ids))
    assert [c["status"] for c in doc["cases"]] == ["skipped", "skipped"]
    assert "strided=False" in doc["cases"][0]["message"]


def test_same_seed_same_results_other_seed_other_data():
    case = catalog(["layer_norm"], ["float32"], "smoke")[2]
    a = execute_case(hk.good_layer_norm, case, seed=7).to_dict()
    b = execute_case(hk.good_layer_norm, case, seed=7).to_dict()
    c = execute_case(hk.good_layer_norm, case, seed=8).to_dict()
    pick = lambda d: [(o["name"], o["max_abs"]) for o in d["outputs"]]  # noqa: E731
    assert pick(a) == pick(b)
    assert pick(a) != pick(c)


def test_workers_do_not_change_results():
    one = _run(hk.good_layer_norm, ids=SMOKE_IDS, workers=1, seed=3)
    two = _run(hk.good_layer_norm, ids=SMOKE_IDS, workers=2, seed=3)
    strip = lambda d: [(c["id"], c["status"], [(o["name"], o["max_abs"], o["budget_used"]) for o in c["outputs"]])  # noqa: E731
                       for c in d["cases"]]
    assert strip(one) == strip(two)


def test_override_replaces_the_derived_bound():
    # A fixed atol of 0 with rtol 0 demands bit equality with the float64 oracle, which a
    # float32 kernel cannot meet (IEEE 754-2019 binary32 has 24 significand bits).
    doc = _run(hk.good_layer_norm, ids=SMOKE_IDS[:1], overrides={"y": (0.0, 0.0)})
    (c,) = doc["cases"]
    y = next(o for o in c["outputs"] if o["name"] == "y")
    assert not y["passed"] and y["bound"]["kind"] == "override"
    assert all(o["passed"] for o in c["outputs"] if o["name"] != "y")
