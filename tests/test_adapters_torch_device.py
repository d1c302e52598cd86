"""torch on any device (conformance.adapters.torch_device) and the spec parameters that choose one.

On this machine the device is the cpu: the accelerator's path (inputs copied to the device with
Tensor.to, outputs and in-place running statistics copied back) is taken with copy=true, and must
give the same bits as the shared-memory path on the same layout (a copy moves values exactly:
common practice; a layout with gaps arrives contiguous, as on an accelerator). On a
machine with a CUDA GPU, the smoke tier also runs there (skipped here, with the reason).
Declarations: cpu as measured (tests/test_adapters.py); cuda and other device types marked NOT
VERIFIED and declared conservatively: the CPU's roundings with worst-case summation bounds
(Higham 2002 §4.2), which are never tighter than the CPU's.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

torch = pytest.importorskip("torch", reason="the torch device adapter needs torch (pip install 'refnorm[torch]')")

from conformance import cli  # noqa: E402
from conformance.adapters import torch_device  # noqa: E402
from conformance.cases import catalog  # noqa: E402
from conformance.cases.generators import make_inputs  # noqa: E402
from conformance.gate.profile import loadable_spec  # noqa: E402
from conformance.kernel import KernelError, load_kernel, split_spec, with_spec_params  # noqa: E402
from conformance.ops import kernel_kwargs  # noqa: E402
from conformance.kernel import call_with  # noqa: E402
from conformance.run.execute import skip_reason  # noqa: E402

SPEC = "conformance.adapters.torch_device"
OPS = ("batch_norm", "layer_norm", "group_norm", "instance_norm", "rms_norm")


# =========================================================================== the copy path on the cpu

def _outputs(kernel, case, seed=0, dense=False):
    """Every entry point's outputs for one case (the running statistics as the kernel left them);
    ``dense``: x and dy made contiguous first."""
    inp = make_inputs(case, kernel.precision_for(case.dtype), seed)
    if dense:
        inp["x"], inp["dy"] = np.ascontiguousarray(inp["x"]), np.ascontiguousarray(inp["dy"])
    train = case.mode == "train"
    out = {}
    fwd, bwd = ("forward", "backward") if train else ("forward_eval", "backward_eval")
    if case.running:
        inp["running_mean"], inp["running_var"] = inp["running_mean"].copy(), inp["running_var"].copy()
    res = call_with(getattr(kernel, fwd), kernel_kwargs(case, fwd, inp))
    out.update(res if isinstance(res, dict) else {"y": res})
    if case.running:
        out["running_mean*"], out["running_var*"] = inp["running_mean"], inp["running_var"]
    saved = {s: out[s] for s in kernel.conventions.saved if s in out} if train else {}
    grads = call_with(getattr(kernel, bwd), kernel_kwargs(case, bwd, inp, saved=saved))
    out.update(zip(kernel.grads, grads))
    return {k: np.asarray(v) for k, v in out.items()}


@pytest.mark.parametrize("op", OPS)
def test_copy_path_gives_the_shared_path_bits(op):
    shared = getattr(torch_device, op)()
    copied = getattr(torch_device, op)(copy="true")
    assert "copy=true" in copied.notes and copied.device == "cpu"
    cases = [c for c in catalog([op], ["float32", "bfloat16"], "standard")
             if c.values == "normal" and c.numel <= 20000 and skip_reason(shared, c) is None]
    # one case of each (strides, mode, running, layout, dtype) kind
    chosen = list({(c.strides, c.mode, c.running, c.layout, c.dtype): c for c in cases}.values())
    assert len({c.strides for c in chosen}) >= 3, chosen  # contiguous and strided inputs among them
    for case in chosen:
        # A layout with gaps arrives contiguous on the device (test_put_keeps_a_dense_layout...), and torch
        # picks its kernel by layout (a contiguous batch norm is not bit for bit a strided one): compare
        # it with the shared path on the same values made contiguous.
        a, b = _outputs(shared, case, dense=case.strides == "sliced"), _outputs(copied, case)
        assert a.keys() == b.keys()
        for name in a:
            assert a[name].dtype == b[name].dtype and a[name].shape == b[name].shape, (case.id, name)
            bits = [np.ascontiguousarray(v).view(np.uint8) for v in (a[name], b[name])]
            assert np.array_equal(*bits), (case.id, name)


def test_put_keeps_a_dense_layout_and_copies_a_gapped_one():
    """Tensor.to with torch.preserve_format keeps the strides of a non-overlapping dense tensor and
    makes any other contiguous (torch documentation, torch.preserve_format)."""
    tt = torch_device._Torch("storage", "cpu", copy=True)
    x = np.random.default_rng(0).standard_normal((2, 5, 4, 3)).astype(np.float32)
    nhwc = np.moveaxis(np.ascontiguousarray(np.moveaxis(x, 1, -1)), -1, 1)  # channels-last memory
    t = tt.put(nhwc)
    assert t.stride() == tuple(s // 4 for s in nhwc.strides)
    assert t.data_ptr() != nhwc.ctypes.data  # a copy, as on an accelerator
    gapped = np.random.default_rng(1).standard_normal((4, 10)).astype(np.float32)[:, ::2]
    assert tt.put(gapped).is_contiguous()
    assert np.array_equal(tt.put(gapped).numpy(), gapped)
    shared = torch_device._Torch("storage", "cpu")
    assert shared.put(nhwc).data_ptr() == nhwc.ctypes.data  # no copy on the host without copy=true


def test_copy_path_passes_the_smoke_tier(tmp_path):
    """Running statistics updated on the device copy must reach the harness's arrays (write_back)."""
    for op in ("batch_norm", "instance_norm"):
        out = tmp_path / f"{op}.json"
        code = cli.main(["check", f"{SPEC}:{op}?copy=true", "--tier", "smoke", "--dtype", "float32",
                         "--json", str(out), "--quiet"])
        doc = json.loads(out.read_text())
        assert code == 0, [c["id"] for c in doc["cases"] if c["status"] != "passed"]
        assert any(o["name"] == "running_var" for c in doc["cases"] for o in c["outputs"])
        assert doc["kernel"]["device"] == "cpu" and doc["run"]["spec"] == f"{SPEC}:{op}?copy=true"


# =========================================================================== declarations per device

def test_cpu_declaration_is_torch_cpus():
    from conformance.adapters import torch_cpu

    for op in OPS:
        a, b = getattr(torch_cpu, op)().declaration(), getattr(torch_device, op)(device="cpu").declaration()
        assert a == b
        assert a["device"] == "cpu" and "measured against the float64 oracle" in a["notes"]


def test_unverified_devices_are_declared_conservatively():
    cuda = torch_device.knowledge_for("cuda")
    other = torch_device.knowledge_for("some_npu")
    assert not cuda.verified and not other.verified and torch_device.knowledge_for("cpu").verified
    assert "NOT VERIFIED" in cuda.source and "from memory" in cuda.source and "some_npu" in other.source
    for op in OPS:
        for params in ("storage", "float32"):
            if op == "rms_norm" and params == "float32":
                continue
            cpu = torch_device._cpu_precision(op, params)
            for know in (cuda, other):
                dec = know.precision(op, params)
                assert dec.keys() == cpu.keys()
                for dt, p in dec.items():
                    assert p.summation == "worst"  # never tighter than any summation model
                    assert p.resolved().accumulate == cpu[dt].resolved().accumulate
                    assert dict(p.output_accumulate) == dict(cpu[dt].output_accumulate)


def test_device_in_results_and_report_header(tmp_path):
    from conformance.report import write_report

    out = tmp_path / "r.json"
    case = "layer_norm/float32/trailing/4x64/norm_ndim=1/normal/w=random/b=random/eps=1e-05/train/contiguous"
    assert cli.main(["check", f"{SPEC}:layer_norm", "--device", "cpu", "--case", case, "--json", str(out),
                     "--quiet"]) == 0
    doc = json.loads(out.read_text())
    assert doc["kernel"]["device"] == "cpu" and doc["run"]["spec"] == f"{SPEC}:layer_norm?device=cpu"
    paths = write_report(doc, tmp_path / "rep", peers=None)
    assert "device cpu" in paths["markdown"].read_text(encoding="utf-8").splitlines()[2]
    jsonschema = pytest.importorskip("jsonschema")
    from pathlib import Path

    schema = json.loads((Path(__file__).resolve().parents[1] / "docs" / "results-schema.json").read_text())
    jsonschema.validate(doc, schema)


@pytest.mark.skipif(not torch.cuda.is_available(), reason="no CUDA GPU here: the cuda path is tested through "
                    "copy=true on the cpu (test_copy_path_*)")
def test_cuda_smoke_tier(tmp_path):  # pragma: no cover - needs a GPU
    for op in OPS:
        out = tmp_path / f"{op}.json"
        code = cli.main(["check", f"{SPEC}:{op}", "--device", "cuda", "--tier", "smoke", "--json", str(out),
                         "--quiet"])
        doc = json.loads(out.read_text())
        assert doc["kernel"]["device"] == "cuda" and doc["counts"]["error"] == 0
        assert code in (0, 1)  # the declaration is unverified there: failures are findings to trace


# =========================================================================== hostile devices and specs

@pytest.mark.parametrize("argv, words", [
    (["--device", "bogus"], ["'bogus' is not a torch device name", "available here: cpu"]),
    (["--device", "cuda:7"] if not torch.cuda.is_available() else ["--device", "cuda:999"],
     ["is not available here", "available: cpu"]),
    (["--device", "xpu"] if not (hasattr(torch, "xpu") and torch.xpu.is_available()) else ["--device", "bogus2"],
     ["xpu", "not"]),
    (["--device", "cpu,copy=true"], ["--device", "expected a name without"]),
    (["--device", " cpu"], ["--device", "expected a name without"]),
])
def test_bad_device_is_a_usage_error(argv, words, capsys):
    assert cli.main(["check", f"{SPEC}:layer_norm", *argv, "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and all(w in err for w in words), err


@pytest.mark.parametrize("spec, words", [
    (f"{SPEC}:layer_norm?copy=maybe", ["copy is 'maybe'", "true or false"]),
    (f"{SPEC}:layer_norm?register=refnorm_no_such_backend_module", ["register=", "refnorm_no_such_backend_module"]),
    (f"{SPEC}:layer_norm?device=cpu,device=cuda", ["given twice"]),
    (f"{SPEC}:layer_norm?", ["nothing after '?'"]),
    (f"{SPEC}:layer_norm?=cpu", ["is not key=value"]),
    (f"{SPEC}:layer_norm?device=cpu?x=1", ["is not key=value"]),
    (f"{SPEC}:layer_norm?colour=red", ["takes no parameter colour", "params, device, register, copy"]),
    (f"{SPEC}:DTYPES?device=cpu", ["not a factory"]),
    ("conformance.adapters.keras_cpu:layer_norm?device=cuda", ["takes no parameter device"]),
])
def test_bad_spec_parameters(spec, words, capsys):
    assert cli.main(["check", spec, "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and all(w in err for w in words), err


def test_device_option_conflicts(tmp_path, capsys):
    assert cli.main(["check", f"{SPEC}:layer_norm?device=cpu", "--device", "meta", "--quiet"]) == 2
    assert "sets device=cpu, and device=meta" in capsys.readouterr().err
    prof = tmp_path / "refnorm.toml"
    prof.write_text('kernels = [{spec = "conformance.adapters.torch_device:layer_norm"}]\n')
    assert cli.main(["check", f"{SPEC}:layer_norm", "--device", "cpu", "--profile", str(prof), "--quiet"]) == 2
    assert "cannot be combined with --profile" in capsys.readouterr().err


def test_spec_parameters_are_split_before_the_target():
    assert split_spec("pkg.mod:layer_norm?device=cuda:1,copy=true") == ("pkg.mod", "layer_norm",
                                                                        {"device": "cuda:1", "copy": "true"})
    assert split_spec("C:/kernels/k.py:ln?device=cuda:0") == ("C:/kernels/k.py", "ln", {"device": "cuda:0"})
    assert with_spec_params("m:f", device="cuda:0") == "m:f?device=cuda:0"
    assert with_spec_params("m:f?copy=1", device="cpu") == "m:f?copy=1,device=cpu"
    assert with_spec_params("m:f?device=cpu", device="cpu") == "m:f?device=cpu"
    assert cli.check_spec("pkg.mod?device=cuda:0", "layer_norm") == "pkg.mod:layer_norm?device=cuda:0"
    assert loadable_spec("kernels/k.py:ln?device=cuda:0").endswith("kernels/k.py:ln?device=cuda:0")
    assert loadable_spec("kernels/k.py:ln?device=cuda:0").startswith("/")
    with pytest.raises(KernelError, match="no ':'"):
        split_spec("pkg.mod?device=cpu")


def test_spec_parameters_reach_the_factory():
    k = load_kernel(f"{SPEC}:group_norm_mixed?device=cpu,copy=yes")
    assert k.device == "cpu" and "copy=true" in k.notes and "float32 params" in k.name
