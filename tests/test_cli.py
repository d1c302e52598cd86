"""`refnorm check` / `refnorm cases`: exit codes, messages, the results file and its schema.

The results document is validated against docs/results-schema.json with the jsonschema package
(JSON Schema draft 2020-12).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from conformance.cli import main
from conformance.cases import catalog

ROOT = Path(__file__).resolve().parents[1]
KERNELS = Path(__file__).resolve().parent / "harness_kernels.py"
IDS = [c.id for c in catalog(["layer_norm"], ["float32"], "smoke")]


def _check(*args: str) -> int:
    return main(["check", *args])


def test_conformant_kernel_exits_0_and_writes_valid_json(tmp_path, capsys):
    jsonschema = pytest.importorskip("jsonschema")
    out = tmp_path / "r.json"
    rc = _check(f"{KERNELS}:good_layer_norm", "--tier", "smoke", "--json", str(out), "--quiet")
    text = capsys.readouterr().out
    assert rc == 0
    assert "verdict: CONFORMANT" in text and "not a proof of correctness" in text
    doc = json.loads(out.read_text())
    schema = json.loads((ROOT / "docs" / "results-schema.json").read_text())
    jsonschema.Draft202012Validator(schema).validate(doc)
    assert doc["verdict"] == "conformant" and doc["run"]["spec"].endswith(":good_layer_norm")
    assert not list(tmp_path.glob(".r.json.*"))  # the temporary file of the atomic write is gone


def test_failing_kernel_exits_1(capsys):
    rc = _check(f"{KERNELS}:segfault_layer_norm", "--case", IDS[0], "--quiet")
    assert rc == 1
    assert "NOT CONFORMANT" in capsys.readouterr().out


@pytest.mark.parametrize("args, words", [
    (["nonexistent_module_xyz:k"], "importing module 'nonexistent_module_xyz' failed"),
    ([f"{KERNELS}:no_such_attr"], "has no attribute 'no_such_attr'"),
    (["no_colon_here"], "expected module:attr or path/to/file.py:attr"),
    ([f"{KERNELS}:good_layer_norm", "--op", "batch_norm"], "declares op layer_norm"),
    ([f"{KERNELS}:good_layer_norm", "--dtype", "bfloat16"], "declares only float32"),
    ([f"{KERNELS}:good_layer_norm", "--case", "layer_norm/float32/nope"], "no case with id"),
    ([f"{KERNELS}:good_layer_norm", "--workers", "0"], "--workers is 0"),
])
def test_bad_usage_exits_2_with_a_message_naming_the_problem(args, words, capsys):
    assert _check(*args) == 2
    assert words in capsys.readouterr().err


def test_argparse_errors_exit_2(capsys):
    assert _check("--tier", "nope") == 2


def test_cases_lists_ids(capsys):
    assert main(["cases", "--op", "layer_norm", "--tier", "smoke"]) == 0
    assert capsys.readouterr().out.split() == IDS


def test_interrupt_exits_3_and_writes_a_partial_file(tmp_path):
    out = tmp_path / "partial.json"
    import tempfile

    flag = Path(tempfile.gettempdir()) / "refnorm-hang-started"
    flag.unlink(missing_ok=True)
    env = dict(os.environ, PYTHONPATH=f"{ROOT}{os.pathsep}{KERNELS.parent}")
    # The first case passes, the second hangs: interrupting then leaves one finished case.
    p = subprocess.Popen([sys.executable, "-m", "conformance", "check", f"{KERNELS}:hang_after_first",
                          "--tier", "smoke", "--json", str(out), "--timeout", "600"],
                         cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not flag.exists():
        time.sleep(0.2)
    time.sleep(0.5)
    p.send_signal(signal.SIGINT)
    stdout, stderr = p.communicate(timeout=60)
    assert p.returncode == 3, stderr
    doc = json.loads(out.read_text())
    assert doc["complete"] is False and doc["verdict"] == "incomplete"
    assert [c["status"] for c in doc["cases"]] == ["passed"]
