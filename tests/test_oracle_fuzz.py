"""Fuzzing the oracle's public API: every call returns correct results or raises RefnormError naming the argument.

Hypothesis draws a public function of refnorm (every name in refnorm.__all__ that is a function),
a valid call of it on small random data, and then at most one argument replaced by a value from
a pool of hostile ones (wrong types, huge Python integers, NaN, strings, ragged lists, wrong
dtypes and shapes, wider-than-float64 formats) or of valid alternative spellings (NumPy scalars,
lists, narrower dtypes, data scaled by 2^+-800). The property, for each draw:

* a hostile value raises refnorm.RefnormError whose message names the replaced argument; no
  other exception type escapes (the project's rule: validate at the boundary, name the argument);
* a valid call returns finite outputs (finite inputs, eps > 0: every output is defined and in
  range), equal to the call with the canonical spelling of the same value: bit for bit for a
  NumPy scalar or a list, within 1e-13 of the output's magnitude for data scaled by a power of
  two (the normalization is invariant under it, Higham 2002, §2.1 for the exactness of the
  scaling; the accuracy of the canonical call itself is tested against exact arithmetic in
  test_oracle_accuracy.py and test_oracle_range.py).

Deterministic (derandomize), EXAMPLES = 1000 examples, about two seconds.
"""

from __future__ import annotations

import inspect
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

import refnorm
from refnorm import RefnormError
from strategies import oracle_settings

FUNCTIONS = {name: getattr(refnorm, name) for name in refnorm.__all__ if inspect.isfunction(getattr(refnorm, name))}

N, C, L = 3, 4, 5
SHAPE = (N, C, L)
#: Data scaled by 2^+-SHIFT: variances near 2^+-1000, outside the fast path's range, still in float64's.
SHIFT = 500
EXAMPLES = 1000


def _data(seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {"x": rng.standard_normal(SHAPE), "dy": rng.standard_normal(SHAPE),
            "wc": rng.normal(1.0, 0.5, C), "bc": rng.normal(0.0, 1.0, C),
            "wf": rng.normal(1.0, 0.5, L), "bf": rng.normal(0.0, 1.0, L),
            "rm": rng.normal(0.0, 1.0, C), "rv": rng.uniform(0.5, 2.0, C),
            "r": rng.standard_normal(SHAPE), "dh": rng.standard_normal(SHAPE), "rbf": rng.normal(0.0, 1.0, L)}


def _calls(d: dict[str, np.ndarray]) -> dict[str, tuple[dict[str, Any], dict[str, str]]]:
    """Per function: a valid call's arguments (all by keyword) and each argument's kind."""
    chan = {"axis": 1, "eps": 1e-5, "eps_placement": "inside"}
    feat = {"eps": 1e-5, "eps_placement": "inside"}
    run = {"running_mean": d["rm"], "running_var": d["rv"], "momentum": 0.1, "momentum_convention": "new",
           "running_var_estimator": "unbiased", "batches_seen": None, "training": True}
    saved_c = {"mean": np.zeros(C), "rstd": np.ones(C)}
    saved_rows = {"mean": np.zeros((N, C)), "rstd": np.ones((N, C))}
    calls = {
        "batch_norm_forward": {"x": d["x"], "weight": d["wc"], "bias": d["bc"], **chan, **run},
        "batch_norm_backward": {"dy": d["dy"], "x": d["x"], "weight": d["wc"], **chan, "training": True, **saved_c,
                                "running_mean": None, "running_var": None},
        "instance_norm_forward": {"x": d["x"], "weight": d["wc"], "bias": d["bc"], **chan, **run},
        "instance_norm_backward": {"dy": d["dy"], "x": d["x"], "weight": d["wc"], **chan, "training": False,
                                   "running_mean": d["rm"], "running_var": d["rv"], "mean": None, "rstd": None},
        "group_norm_forward": {"x": d["x"], "num_groups": 2, "weight": d["wc"], "bias": d["bc"], **chan},
        "group_norm_backward": {"dy": d["dy"], "x": d["x"], "num_groups": 2, "weight": d["wc"], **chan,
                                "mean": None, "rstd": None},
        "layer_norm_forward": {"x": d["x"], "normalized_shape": (L,), "weight": d["wf"], "bias": d["bf"], **feat},
        "layer_norm_backward": {"dy": d["dy"], "x": d["x"], "normalized_shape": L, "weight": d["wf"], **feat,
                                **saved_rows},
        "rms_norm_forward": {"x": d["x"], "normalized_shape": (L,), "weight": d["wf"], "bias": d["bf"], **feat,
                             "weight_offset": 0.0},
        "rms_norm_backward": {"dy": d["dy"], "x": d["x"], "normalized_shape": (L,), "weight": d["wf"], **feat,
                              "rstd": np.ones((N, C)), "weight_offset": 1.0},
        "add_layer_norm_forward": {"x": d["x"], "residual": d["r"], "normalized_shape": (L,), "weight": d["wf"],
                                   "bias": d["bf"], "residual_bias": d["rbf"], "h_format": "bfloat16", **feat},
        "add_layer_norm_backward": {"dy": d["dy"], "x": d["x"], "residual": d["r"], "normalized_shape": (L,),
                                    "weight": d["wf"], "dh": d["dh"], "residual_bias": d["rbf"], "h_format": None,
                                    **feat},
        "add_rms_norm_forward": {"x": d["x"], "residual": d["r"], "normalized_shape": (L,), "weight": d["wf"],
                                 "bias": d["bf"], "residual_bias": None, "h_format": "float16",
                                 "weight_offset": 1.0, **feat},
        "add_rms_norm_backward": {"dy": d["dy"], "x": d["x"], "residual": d["r"], "normalized_shape": (L,),
                                  "weight": d["wf"], "dh": d["dh"], "residual_bias": d["rbf"], "h_format": "bfloat16",
                                  "weight_offset": 1.0, **feat},
        "residual_stream": {"x": d["x"], "residual": d["r"], "residual_bias": d["rbf"], "h_format": "float8_e4m3fn"},
        "running_update": {"running": d["rm"], "batch_stat": d["rv"], "momentum": None,
                           "momentum_convention": "old", "batches_seen": 4},
    }
    kinds = {"x": "data", "dy": "data", "weight": "param", "bias": "param", "running_mean": "param",
             "running_var": "variance", "mean": "param", "rstd": "rstd", "running": "param", "batch_stat": "param",
             "axis": "axis", "num_groups": "count", "batches_seen": "count", "eps": "eps", "momentum": "momentum",
             "training": "bool", "eps_placement": "choice", "momentum_convention": "choice",
             "running_var_estimator": "choice", "normalized_shape": "sizes",
             "residual": "addend", "dh": "addend_opt", "residual_bias": "param", "h_format": "format",
             "weight_offset": "offset"}
    out = {f: (kw, {k: kinds[k] for k in kw}) for f, kw in calls.items()}
    for f in out:  # x of a residual add (and dy beside dh): scaling it alone is not an invariance
        if "residual" in out[f][0]:
            out[f][1].update({k: "addend" for k in ("x", "dy") if k in out[f][0]})
    return out


def test_every_public_function_is_fuzzed():
    """refnorm.__all__'s functions and the fuzz table are the same set, and every parameter is drawn."""
    table = _calls(_data(0))
    assert set(table) == set(FUNCTIONS)
    for name, fn in FUNCTIONS.items():
        params = set(inspect.signature(fn).parameters) - {"axes"}  # axes: the alternative to normalized_shape
        assert params == set(table[name][0]), name


class _Opaque:
    def __repr__(self) -> str:
        return "<opaque>"


class _BadArray:
    def __array__(self, dtype=None, copy=None):
        raise RuntimeError("no array here")


_ML = pytest.importorskip("ml_dtypes")
_WIDE = np.finfo(np.longdouble).nmant > 52

# Invalid for every argument of the kind (a RefnormError naming the argument is required).
_JUNK_COMMON = ["abc", b"abc", _Opaque(), {"a": 1}, 1j, [["a"]], _BadArray()]
INVALID = {
    "data": _JUNK_COMMON + [None, True, 3, 2.5, [[1.0, 2.0], [3.0]], np.ones(SHAPE, dtype=np.int64),
                            np.ones(SHAPE, dtype=bool), np.ones(SHAPE, dtype=complex), np.ones((2, 2)),
                            np.ones((0, 4, 5)), np.ones(SHAPE, dtype=object), np.ones(SHAPE).astype(_ML.bcomplex32)]
    + ([np.ones(SHAPE, dtype=np.longdouble)] if _WIDE else []),
    "param": _JUNK_COMMON + [True, 3, 2.5, [[1.0], [2.0, 3.0]], np.ones(7), np.ones((2, 2)),
                             np.ones(4, dtype=np.int32), np.ones(5, dtype=np.int32)]
    + ([np.ones(4, dtype=np.longdouble), np.ones(5, dtype=np.longdouble)] if _WIDE else []),
    "axis": _JUNK_COMMON + [None, "1", 1.0, True, np.float64(1), [1], 10**400, -10**400, 3, -4],
    "count": _JUNK_COMMON + ["2", 2.0, True, np.float64(2), [2], 10**400, -1, -10**400],
    "eps": _JUNK_COMMON + [None, "1e-5", True, 10**400, -10**400, float("nan"), float("inf"), -1e-5, [1e-5],
                           np.array([1e-5])] + ([np.longdouble(1) / 3] if _WIDE else []),
    "momentum": _JUNK_COMMON + ["0.1", True, 10**400, float("nan"), float("inf"), -0.1, 1.5, [0.1]],
    "bool": _JUNK_COMMON + ["False", "True", 0, 1, None, np.array(True), [True]],
    "choice": _JUNK_COMMON + ["Inside", "", None, 1, np.array(["inside"]), ["new"]],
    "sizes": _JUNK_COMMON + ["5", (5.5,), 5.0, (True,), [[5]], (-5,), (), (4,), (3, 4, 5, 5), None],
}
INVALID["addend"] = INVALID["data"]
INVALID["addend_opt"] = [v for v in INVALID["data"] if v is not None]  # dh=None: no gradient along the stream
INVALID["format"] = _JUNK_COMMON + ["float", "int8", "", 1, ["bfloat16"], "BFloat16"]
INVALID["offset"] = _JUNK_COMMON + [None, "1", True, 10**400, float("nan"), float("inf"), [1.0], np.array([1.0])]
INVALID["variance"] = INVALID["param"] + [-np.ones(4), np.array([1.0, -0.5, 1.0, 1.0])]
INVALID["rstd"] = INVALID["param"] + ["zero", "negative"]  # filled in per call (shape of the statistic)


def _valid_alternates(kind: str, value: Any) -> list[tuple[Any, Any, str]]:
    """(alternative spelling, canonical value, how to compare) for a valid value."""
    out: list[tuple[Any, Any, str]] = []
    if kind in ("data", "addend", "addend_opt", "param", "variance", "rstd") and isinstance(value, np.ndarray):
        out.append((value.tolist(), value, "equal"))
        out.append((value.astype(np.float32), value.astype(np.float32).astype(np.float64), "equal"))
        out.append((value.astype(_ML.bfloat16), value.astype(_ML.bfloat16).astype(np.float64), "equal"))
        if kind == "data":
            out.append((np.ldexp(value, SHIFT), value, "scaled"))
            out.append((np.ldexp(value, -SHIFT), value, "scaled"))
    elif kind == "axis":
        out += [(np.int32(value), value, "equal"), (value - 3, value, "equal")]
    elif kind == "count" and value is not None:
        out.append((np.int64(value), value, "equal"))
    elif kind == "offset":
        out += [(np.float32(value), value, "equal"), (int(value), value, "equal")]
    elif kind in ("eps", "momentum") and value is not None:
        out += [(np.float32(0.5), float(np.float32(0.5)), "equal"), (np.float64(value), value, "equal"),
                (0, 0.0, "equal")]
    elif kind == "bool":
        out.append((np.bool_(value), value, "equal"))
    elif kind == "sizes":
        out += [([L], (L,), "equal"), (np.array([L]), (L,), "equal"), (np.int64(L), (L,), "equal")]
    return out


def _hostile(kind: str, value: Any, bad: Any) -> Any:
    if isinstance(bad, str) and kind == "rstd" and bad in ("zero", "negative"):
        return np.zeros_like(value) if bad == "zero" else -np.ones_like(value)
    return bad


def _refused(fn_name: str, kw: dict[str, Any], args: list[str]) -> str | None:
    """None when the call raises a RefnormError naming one of ``args``; else what went wrong."""
    try:
        FUNCTIONS[fn_name](**kw)
    except RefnormError as e:
        return None if any(a in str(e) for a in args) else f"the message does not name {args}: {e}"
    except Exception as e:  # the defect these tests exist for
        return f"raised {type(e).__name__}: {e}"
    return "was accepted"


def test_every_hostile_value_is_refused():
    """Exhaustive: every public function, every argument, every value of its kind's hostile pool
    (about 1600 calls, well under a second)."""
    problems = []
    count = 0
    for fn_name, (kw, kinds) in _calls(_data(1)).items():
        for arg, kind in kinds.items():
            for bad in INVALID[kind]:
                bad = _hostile(kind, kw[arg], bad)
                why = _refused(fn_name, {**kw, arg: bad}, [arg])
                count += 1
                if why:
                    problems.append(f"{fn_name}({arg}={bad!r}) {why}")
    assert count > 1500
    assert not problems, "\n".join(problems)


@dataclass
class Draw:
    fn: str
    seed: int
    arg: int
    pick: int
    hostile: bool
    arg2: int
    pick2: int


# arg: which argument is replaced (index into the sorted names; one value past the end: none).
draws = st.builds(Draw, fn=st.sampled_from(sorted(FUNCTIONS)), seed=st.integers(0, 2**16),
                  arg=st.integers(0, 10**6), pick=st.integers(0, 10**6), hostile=st.booleans(),
                  arg2=st.integers(0, 10**6), pick2=st.integers(0, 10**6))


def _call(fn: Callable, kw: dict[str, Any]):
    return fn(**kw)


def _outputs(res) -> dict[str, np.ndarray]:
    return res.as_dict() if hasattr(res, "as_dict") else {"out": res}


@oracle_settings(EXAMPLES)
@given(d=draws)
def test_public_api_fuzz(d: Draw):
    fn = FUNCTIONS[d.fn]
    kw, kinds = _calls(_data(d.seed))[d.fn]
    names = sorted(kw)
    i = d.arg % (len(names) + 1)
    arg = names[i] if i < len(names) else None
    if arg is None:
        res = _call(fn, kw)
        for k, v in _outputs(res).items():
            assert np.all(np.isfinite(v)), f"{d.fn}: {k} not finite"
        return
    kind = kinds[arg]
    if d.hostile:
        # One hostile value, and a second one (or the same argument again) for interactions:
        # the error must name one of them.
        arg2 = names[d.arg2 % len(names)]
        for a, p in ((arg2, d.pick2), (arg, d.pick)):
            pool = INVALID[kinds[a]]
            kw[a] = _hostile(kinds[a], kw[a], pool[p % len(pool)])
        why = _refused(d.fn, kw, [arg, arg2])
        assert why is None, f"{d.fn}({arg}={kw[arg]!r}, {arg2}={kw[arg2]!r}) {why}"
        return
    alts = _valid_alternates(kind, kw[arg])
    if not alts:
        return
    alt, canon, how = alts[d.pick % len(alts)]
    kw_alt = {**kw, arg: alt}
    sh = 0
    if how == "scaled":
        sh = SHIFT if np.max(np.abs(alt)) > np.max(np.abs(canon)) else -SHIFT
        if arg == "x":  # what is in x's units scales with it: mean by 2^s, variance and eps by 4^s, rstd by 2^-s
            for key, e in (("mean", sh), ("running_mean", sh), ("running_var", 2 * sh), ("rstd", -sh)):
                if kw.get(key) is not None:
                    kw_alt[key] = np.ldexp(kw[key], e)
            if "eps" in kw:
                kw_alt["eps"] = float(np.ldexp(kw["eps"], 2 * sh))
    got = _outputs(_call(fn, kw_alt))
    want = _outputs(_call(fn, {**kw, arg: canon}))
    assert got.keys() == want.keys()
    for k in want:
        g, w = got[k], want[k]
        assert np.all(np.isfinite(g)), f"{d.fn}({arg}={alt!r}): {k} not finite: {g}"
        if how == "equal":
            np.testing.assert_array_equal(g, w, err_msg=f"{d.fn}({arg} as {type(alt).__name__}): {k}")
            continue
        # Scaling x by 2^s scales mean and running_mean by 2^s, var and running_var by 4^s, rstd and dx
        # by 2^-s, and leaves y, dweight, dbias; scaling dy by 2^s scales dx, dweight, dbias by 2^s.
        if arg == "x":
            e = {"mean": sh, "running_mean": sh, "var": 2 * sh, "running_var": 2 * sh, "rstd": -sh, "dx": -sh}
        else:
            e = {"dx": sh, "dweight": sh, "dbias": sh}
        back = np.ldexp(g, -e.get(k, 0))
        tol = 1e-13 * max(float(np.max(np.abs(w))), 1e-300)
        err = float(np.max(np.abs(back - w)))
        assert err <= tol, f"{d.fn}({arg} scaled by 2^{sh}): {k} differs by {err:.3e} (tolerance {tol:.3e})"
