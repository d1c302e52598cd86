"""Correct library kernels pass the `standard` tier under the derived bounds: no false alarms.

torch (conformance.adapters.torch_cpu), Keras with the TensorFlow backend
(conformance.adapters.keras_cpu) and ONNX Runtime's CPU execution provider
(conformance.adapters.onnxruntime_ep, forward only) run every standard case of every op in
float32, float16 and bfloat16 (those of them each library implements), declared as their
adapters declare them (the conventions and precision the adapters' author measured:
docs/library-precision.md).
Each run prints the worst fraction of the bound used per op, dtype and output.

A handful of cases fail, and each was traced to its cause (below, and in the
report that came with this file): a bug or a less accurate algorithm in the
library, or a convention of the oracle. They are listed in KNOWN, not loosened:
a listed case must fail on exactly its listed outputs (strict entries), and
every other case must pass, so a new failure, or a listed one that starts to
pass, makes this test fail. Passing is evidence on these cases, not a proof
that the libraries are correct; sign-off on hardware remains the reviewer's.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import pytest

from conformance.kernel import load_kernel
from conformance.run import RunOptions, run_check

OPS = ("batch_norm", "layer_norm", "group_norm", "instance_norm", "rms_norm")
DTYPES = ("float32", "float16", "bfloat16")
LIBS = {"torch": "conformance.adapters.torch_cpu", "keras": "conformance.adapters.keras_cpu",
        "onnxruntime": "conformance.adapters.onnxruntime_ep"}

_TAIL = "w=random/b=random/eps=1e-05"


@dataclass(frozen=True)
class Known:
    """A case that fails for a traced cause: the ``outputs`` fail, the ``may`` outputs may fail too;
    ``strict`` False for a marginal one (it may also pass)."""

    lib: str
    case_id: str
    outputs: frozenset[str]
    cause: str
    strict: bool = True
    may: frozenset[str] = frozenset()

    def matches(self, failing: set[str]) -> bool:
        if not failing <= self.outputs | self.may:
            return False
        return self.outputs <= failing if self.strict else True


def _known() -> list[Known]:
    k: list[Known] = []
    for dt in DTYPES:
        # torch bug (2.13, CPU): F.instance_norm backward with N = 1 and a channels_last-strided
        # grad_output; dx differs by 6.9 from the same call with a contiguous grad_output, in float64
        # too (reproduction in the report). batch_norm and N = 2 are unaffected.
        k.append(Known("torch", f"instance_norm/{dt}/channels_last/1x7x7x6/normal/{_TAIL}/train/contiguous",
                       frozenset({"dx", "dweight", "dbias"}), "torch bug: N=1 channels_last grad_output"))
    for dt in ("float32", "float16"):
        # torch library accuracy: the channels_last CPU path of native_group_norm loses the variance
        # to cancellation (|mean|/std = 1e5 here): max |y - oracle| 184 against 0.024 for the same data
        # made contiguous, and 6.9e-5 even in float64 (one-pass E[x^2] - E[x]^2 behaviour, Chan, Golub &
        # LeVeque 1983). bfloat16 passes: its bound is wider than the loss. How far dweight is off
        # varied between runs here (within or 14x over its bound), so it may fail too.
        k.append(Known("torch", f"group_norm/{dt}/channels_last/8x12x12x16/groups=4/cancellation/{_TAIL}/train/"
                                "contiguous", frozenset({"y", "rstd", "dx"}),
                       "torch accuracy: channels_last group norm variance", may=frozenset({"dweight"})))
    # Marginal (budget 1.07 on one element of 64, seed 0): a two-element-group float16 dx; not traced to a
    # cause, left to the tolerances' author (see the report). Tolerated either way.
    k.append(Known("torch", f"group_norm/float16/channels_last/16x4/groups=2/normal/{_TAIL}/train/contiguous",
                   frozenset({"dx"}), "marginal float16 dx, untraced", strict=False))
    # Keras accuracy: y = x * inv + (beta - mean * inv) (the adapter's docstring), so in eval mode
    # dweight = sum(dy x r) - sum(dy mean r) cancels when |mean| >> std: 1.9% relative error in float32.
    k.append(Known("keras", f"batch_norm/float32/channels_first/4x8x6x5/cancellation/{_TAIL}/eval/contiguous",
                   frozenset({"dweight"}), "Keras accuracy: eval dweight from x*inv - mean*inv"))
    # ONNX Runtime 1.32 (CPU): GroupNormalization-21 has no kernel, and the standard's function body it
    # inlines computes Var = ReduceMean(X^2) - Mean^2 in float32 (onnx.defs; reproduced from that model in
    # tests/test_adapters_onnxruntime.py::test_group_norm_variance_is_the_one_pass_formula). It loses the
    # variance where |mean| >> std (Chan, Golub & LeVeque 1983): the cancellation cases, a two-element
    # group of close values (16x4, groups=2: kappa 212 in one group for seed 0), and on 2^20 float16
    # values a negative variance, so y is NaN throughout.
    gn = f"{_TAIL}/train/contiguous"
    for cid in ("float32/channels_last/16x4/groups=2/normal", "float32/channels_first/4x8x6x5/groups=4/cancellation",
                "float32/channels_last/8x12x12x16/groups=4/cancellation",
                "float16/channels_first/4x8x6x5/groups=4/cancellation",
                "float16/channels_first/1x4x512x1024/groups=2/cancellation"):
        k.append(Known("onnxruntime", f"group_norm/{cid}/{gn}", frozenset({"y"}),
                       "ONNX GroupNormalization-21 function body: one-pass variance in float32"))
    # The same one-pass variance on the range cases: on float32 "large" data X^2 overflows float32 and
    # Inf - Inf makes y NaN throughout; on float16 "large" data (squared in float32, in range) the
    # cancellation costs 76 ulp on two elements; on constant groups with eps = 1e-12 the rounding of
    # ReduceMean(X^2) - Mean^2 is a negative "variance" larger than eps, so y is NaN where the answer
    # is the bias (measured here, ONNX Runtime 1.32).
    for dt in ("float32", "float16"):
        for v, e in (("large", _TAIL), ("constant", _TAIL.replace("eps=1e-05", "eps=1e-12"))):
            k.append(Known("onnxruntime", f"group_norm/{dt}/channels_first/4x8x6x5/groups=4/{v}/{e}/{gn[len(_TAIL) + 1:]}",
                           frozenset({"y"}), "ONNX GroupNormalization-21 function body: one-pass variance in float32"))
    # The same on x equal to the running mean (|mean| = 1.5 2^21 against a spread of 1): 2e4 times the bound.
    k.append(Known("keras", f"batch_norm/float32/channels_first/4x8x6x5/normal/{_TAIL}/eval/running=at_mean/contiguous",
                   frozenset({"dweight"}), "Keras accuracy: eval dweight from x*inv - mean*inv"))
    k += _range_findings()
    return k


def _range_findings() -> list[Known]:
    """Library behaviour the range cases expose (docs/library-precision.md, "Range findings")."""
    ln, gn = "layer_norm/{}/trailing/12x96/norm_ndim=1", "group_norm/{}/channels_first/4x8x6x5/groups=4"
    inn, bn, rms = ("instance_norm/{}/channels_first/4x8x6x5", "batch_norm/{}/channels_first/4x8x6x5",
                    "rms_norm/{}/trailing/12x96/norm_ndim=1")
    tail_rms = _TAIL.replace("b=random", "b=none")
    tiny = _TAIL.replace("eps=1e-05", "eps=1e-12")
    k: list[Known] = []
    for dt in ("float32", "bfloat16"):
        # torch 2.13 CPU native_layer_norm: rstd is NaN once |x| passes about 1.8e19, where x^2 overflows
        # float32 (measured: |x| ~ 1e19 right, 2e19 NaN, for n = 8 to 1024), though the two-pass sum of
        # squared deviations is far inside float32's range (ranges.py: this data is within what a correct
        # float32 kernel must handle). bfloat16 is computed in float32 and fails alike.
        k.append(Known("torch", f"{ln.format(dt)}/large/{_TAIL}/train/contiguous",
                       frozenset({"y", "rstd", "dx", "dweight"}), "torch: layer norm squares overflow float32"))
        # torch's RMS norm backward loses the term through the statistic once the RMS passes about 1e14
        # (relative error 2e-5 at 1e14, 0.7% at 1e15, and from 1e16 on exactly that of dropping the term:
        # consistent with rstd^3 underflowing float32, an inference from the scaling).
        k.append(Known("torch", f"{rms.format(dt)}/large/{tail_rms}/train/contiguous", frozenset({"dx"}),
                       "torch: RMS norm backward rstd^3 underflows"))
    for op in (bn, inn):
        for v in ("constant", "zeros"):
            # torch float16 batch norm (parameters in float16) rounds rstd = 1/sqrt(var + eps) to float16
            # before use (docs/library-precision.md): 1/sqrt(1e-12) = 1e6 overflows to Inf and y = 0 * Inf
            # is NaN on every constant channel, where the answer is the bias.
            k.append(Known("torch", f"{op.format('float16')}/{v}/{tiny}/train/contiguous",
                           frozenset({"y", "dx", "dweight"}), "torch: float16 rstd overflows at eps=1e-12"))
    for op in (ln, gn):
        for v in ("constant", "zeros"):
            # torch float16 layer and group norm compute y from a float32 rstd (right: y is the bias) but
            # save rstd in float16, where 1e6 is Inf; the backward then forms 0 * Inf = NaN in dx and
            # dweight (checked here: native_layer_norm on a constant float16 row saves rstd inf and
            # autograd gives dx NaN).
            k.append(Known("torch", f"{op.format('float16')}/{v}/{tiny}/train/contiguous",
                           frozenset({"dx", "dweight"}), "torch: float16 saved rstd overflows at eps=1e-12"))
    # Keras (TensorFlow backend) dx on large data: the gradient through the variance errs from spreads of
    # about 1e18 on (layer norm: 1e-7 at 3e17, 1.5% at 1e18; RMS norm 0.9% at 1e18), consistent with an
    # intermediate of order rstd^2 / n below float32's smallest normal value, which TF flushes (an
    # inference from the scaling, not from the source).
    for case, dts in ((ln, ("float32",)), (gn, ("float32", "bfloat16")), (inn, ("float32", "bfloat16")),
                      (rms, ("float32",))):
        for dt in dts:
            tail = tail_rms if case is rms else _TAIL
            k.append(Known("keras", f"{case.format(dt)}/large/{tail}/train/contiguous", frozenset({"dx"}),
                           "Keras: gradient through the variance underflows on large data"))
    return k


KNOWN = {(k.lib, k.case_id): k for k in _known()}
_RUNS: dict[tuple[str, str], dict] = {}


def _library(lib: str) -> None:
    if lib == "torch":
        pytest.importorskip("torch")
    elif lib == "onnxruntime":
        pytest.importorskip("onnx")
        pytest.importorskip("onnxruntime")
    else:
        os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
        os.environ.setdefault("KERAS_BACKEND", "tensorflow")
        pytest.importorskip("tensorflow")
        pytest.importorskip("keras")


def _run(lib: str, op: str) -> dict:
    """The standard tier of one library op in the three dtypes, in worker processes started fresh
    (spawn, from the adapter's spec: no torch/TF state inherited across a fork)."""
    if (lib, op) not in _RUNS:
        _library(lib)
        spec = f"{LIBS[lib]}:{op}"
        kernel = load_kernel(spec)
        dts = tuple(d for d in DTYPES if d in kernel.dtypes)
        _RUNS[lib, op] = run_check(kernel, RunOptions(tier="standard", dtypes=dts, workers=2, timeout=300),
                                   spec=spec, quiet=True)
    return _RUNS[lib, op]


def _worst_table(lib: str, doc: dict) -> list[str]:
    """Worst budget used per dtype and output over the cases not in KNOWN."""
    worst: dict[tuple[str, str], tuple[float, str]] = {}
    for c in doc["cases"]:
        if (lib, c["id"]) in KNOWN:
            continue
        for o in c["outputs"]:
            key = (c["case"]["dtype"], o["name"])
            b = float(o["budget_used"])
            if b >= worst.get(key, (-1.0, ""))[0]:
                worst[key] = (b, c["id"])
    return [f"{lib:5s} {dt:8s} {name:12s} worst budget {b:.3g}  ({cid})"
            for (dt, name), (b, cid) in sorted(worst.items())]


@pytest.mark.parametrize("op", OPS)
@pytest.mark.parametrize("lib", sorted(LIBS))
def test_library_passes_standard_tier(lib: str, op: str):
    doc = _run(lib, op)
    assert doc["complete"]
    ran = [c for c in doc["cases"] if c["status"] != "skipped"]
    assert ran, f"{lib} {op}: no case ran"
    declared = set(DTYPES) & set(doc["kernel"]["dtypes"])  # ONNX Runtime implements bfloat16 for layer norm only
    assert {c["case"]["dtype"] for c in ran} == declared, f"{lib} {op}: a dtype did not run"
    unexpected, gone = [], []
    for c in ran:
        k = KNOWN.get((lib, c["id"]))
        failing = {o["name"] for o in c["outputs"] if not o["passed"]}
        if k is None:
            # inconclusive is not an alarm: the verdict says that the pass is not evidence (a bound that is
            # not informative under the library's honest declaration), never that the kernel is wrong
            if c["status"] not in ("passed", "inconclusive"):
                unexpected.append(f"{c['id']}: {c['status']} {sorted(failing)} {c['message'][:300]}")
        elif c["status"] in ("passed", "inconclusive"):
            if k.strict:
                gone.append(f"{c['id']} now passes (KNOWN: {k.cause}); remove it from KNOWN")
        elif c["status"] != "failed" or not k.matches(failing):
            unexpected.append(f"{c['id']}: {c['status']} on {sorted(failing)}, KNOWN {sorted(k.outputs)} "
                              f"({k.cause}) {c['message'][:300]}")
    print("\n" + "\n".join(_worst_table(lib, doc)))
    print(f"{lib} {op}: {sum(c['status'] == 'inconclusive' for c in ran)} of {len(ran)} cases inconclusive")
    assert not unexpected, f"{lib} {op}: false alarms or new failures:\n" + "\n".join(unexpected)
    assert not gone, "\n".join(gone)


def test_known_entries_name_real_cases():
    from conformance.cases import catalog

    ids = {c.id for c in catalog(OPS, DTYPES, "standard")}
    missing = [cid for (_, cid) in KNOWN if cid not in ids]
    assert not missing, f"KNOWN names cases the standard tier does not have: {missing}"
