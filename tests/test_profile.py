"""The gate profile ([tool.refnorm] / refnorm.toml): parsing, validation, tolerance overrides and waivers.

The kernels are tests/gate_kernels.py: ``fp32`` (correct) and ``eps_outside`` (a seeded bug, declared
correct: 1/(sqrt(var)+eps) where layer norm has 1/sqrt(var+eps), Ba, Kiros & Hinton 2016, eq. 4).
"""

from __future__ import annotations

import fnmatch
import os
import json
import sys
from datetime import date, timedelta
from pathlib import Path

import pytest

from conformance.cli import main
from conformance.gate.profile import ProfileError, find_profile, load_profile, parse_profile
from conformance.gate.waivers import gate_outcome, judge_case

KERNELS = Path(__file__).with_name("gate_kernels.py")


def spec(name: str) -> str:
    return f"{KERNELS}:{name}"


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def check(tmp_path: Path, name: str, *extra: str) -> tuple[int, dict, str]:
    out = tmp_path / f"{name}-{len(list(tmp_path.glob('*.json')))}.json"
    rc = main(["check", spec(name), "--tier", "smoke", "--quiet", "--json", str(out), *extra])
    return rc, json.loads(out.read_text()), str(out)


@pytest.fixture(scope="module")
def bug_run(tmp_path_factory):
    """The seeded-bug kernel on the smoke tier, without a profile: the failures every waiver test starts from."""
    d = tmp_path_factory.mktemp("bug")
    out = d / "bug.json"
    rc = main(["check", spec("eps_outside"), "--tier", "smoke", "--quiet", "--json", str(out)])
    doc = json.loads(out.read_text())
    failed = [c["id"] for c in doc["cases"] if c["status"] == "failed"]
    passed = [c["id"] for c in doc["cases"] if c["status"] == "passed"]
    # The bug must show: eps outside the root differs from the declared formula by about eps/sqrt(var)
    # relative, some 40 float32 ULPs at var = 1 (IEEE 754-2019 binary32, u = 2^-24), above the bounds.
    assert rc == 1 and failed and passed
    return doc, failed, passed


# ---------------------------------------------------------------- reading and validation
def test_pyproject_table_is_read_with_paths_relative_to_the_profile(tmp_path):
    (tmp_path / "port").mkdir()
    p = write(tmp_path / "port" / "pyproject.toml", """
[project]
name = "kestrel-port"

[tool.refnorm]
kernels = ["kernels/ln.py:layer_norm", { spec = "kestrel_ops.bn:batch_norm", dtypes = ["float16"], baseline = "base/bn.json" }]
tier = "smoke"
dtypes = ["float16", "bfloat16"]
seed = 7
workers = 2
timeout = 30

[tool.refnorm.tolerances]
dweight = { atol = 1e-3, rtol = 1e-2 }

[tool.refnorm.tolerances.batch_norm]
dweight = [2e-3, 2e-2]

[[tool.refnorm.waivers]]
case = "batch_norm/float16/*/cancellation/*"
output = "dx"
reason = "fp16 dx on cancellation data, tracked in the port's issue tracker"
expires = 2031-06-30
""")
    prof = load_profile(p)
    assert [k.spec for k in prof.kernels] == [f"{tmp_path / 'port' / 'kernels' / 'ln.py'}:layer_norm",
                                             "kestrel_ops.bn:batch_norm"]
    assert prof.kernels[1].dtypes == ("float16",)
    assert prof.kernels[1].baseline == tmp_path / "port" / "base" / "bn.json"
    assert (prof.tier, prof.dtypes, prof.seed, prof.workers, prof.timeout) == ("smoke", ("float16", "bfloat16"),
                                                                             7, 2, 30.0)
    # op-specific overrides win over the general ones
    assert prof.overrides_for("layer_norm") == {"dweight": (1e-3, 1e-2)}
    assert prof.overrides_for("batch_norm") == {"dweight": (2e-3, 2e-2)}
    (w,) = prof.waivers
    # TOML v1.0.0 "Local Date": a bare 2031-06-30 is a date
    assert (w.case, w.output, w.expires) == ("batch_norm/float16/*/cancellation/*", "dx", date(2031, 6, 30))


def test_a_module_alone_expands_to_one_kernel_per_op():
    prof = parse_profile({"kernels": ["kestrel_ops"], "ops": ["layer_norm", "rms_norm"]})
    assert [k.spec for k in prof.kernels] == ["kestrel_ops:layer_norm", "kestrel_ops:rms_norm"]
    with pytest.raises(ProfileError, match="needs the ops key"):
        parse_profile({"kernels": ["kestrel_ops"]})


def test_find_profile_prefers_refnorm_toml_and_needs_the_tool_table(tmp_path):
    write(tmp_path / "pyproject.toml", "[project]\nname = 'x'\n")
    assert find_profile(tmp_path) is None  # a pyproject without [tool.refnorm] is not a profile
    write(tmp_path / "pyproject.toml", "[tool.refnorm]\ntier = 'smoke'\n")
    assert find_profile(tmp_path) == tmp_path / "pyproject.toml"
    write(tmp_path / "refnorm.toml", "tier = 'standard'\n")
    assert find_profile(tmp_path) == tmp_path / "refnorm.toml"
    (tmp_path / "other").mkdir()
    plain = write(tmp_path / "other" / "pyproject.toml", "[project]\nname = 'x'\n")
    with pytest.raises(ProfileError, match=r"pyproject.toml: has no \[tool.refnorm\] table"):
        load_profile(plain)


@pytest.mark.parametrize("text, key", [
    ("tier2 = 'smoke'", "tier2"),
    ("tier = 'fast'", "tier"),
    ("seed = -1", "seed"),
    ("seed = 1.5", "seed"),
    ("workers = 0", "workers"),
    ("growth = 1.0", "growth"),
    ("dtypes = ['float24']", "dtypes"),
    ("ops = ['softmax']", "ops"),
    ("kernels = ['just_a_module']", "kernels[0]"),
    ("[tolerances]\ndz = { atol = 1, rtol = 1 }", "tolerances.dz"),
    ("[tolerances]\ndx = { atol = -1, rtol = 0 }", "tolerances.dx.atol"),
    ("[tolerances]\ndx = { atol = 1, rtol = 0, btol = 2 }", "tolerances.dx.btol"),
    ("[[waivers]]\ncase = '*'\nreason = 'r'", "expires"),
    ("[[waivers]]\ncase = '*'\nreason = 'r'\nexpires = '2026-13-01'", "waivers[0].expires"),
    ("[[waivers]]\ncase = '*'\nreason = 'r'\nexpires = 2026-01-01T10:00:00", "waivers[0].expires"),
    ("[[waivers]]\ncase = '*'\nreason = ''\nexpires = 2026-01-01", "waivers[0].reason"),
    ("[[waivers]]\ncase = '*'\noutput = 'dz'\nreason = 'r'\nexpires = 2026-01-01", "waivers[0].output"),
    ("[[waivers]]\ncase = '*'\nreason = 'r'\nexpires = 2026-01-01\nowner = 'me'", "waivers[0].owner"),
])
def test_unknown_keys_and_bad_values_name_the_key_and_the_file(tmp_path, text, key):
    p = write(tmp_path / "refnorm.toml", text + "\n")
    with pytest.raises(ProfileError) as e:
        load_profile(p)
    assert key in str(e.value) and str(p) in str(e.value)


def test_invalid_toml_is_a_profile_error(tmp_path):
    with pytest.raises(ProfileError, match="not valid TOML"):
        load_profile(write(tmp_path / "refnorm.toml", "tier = \n"))


def test_python_310_without_tomli_gets_a_clear_error(tmp_path, monkeypatch):
    p = write(tmp_path / "refnorm.toml", "tier = 'smoke'\n")
    monkeypatch.setattr(sys, "version_info", (3, 10, 0, "final", 0))
    monkeypatch.setitem(sys.modules, "tomli", None)  # None in sys.modules makes the import fail
    with pytest.raises(ProfileError, match="tomli"):
        load_profile(p)


# ---------------------------------------------------------------- tolerance overrides
def test_profile_tolerance_overrides_replace_the_derived_bound(tmp_path, bug_run):
    _, failed, _ = bug_run
    # Too tight for any float32 kernel: atol = rtol = 0 asks for the float64 oracle's exact value, which a
    # float32 result can only hit where the oracle is itself a float32 number (IEEE 754-2019 binary32).
    tight = write(tmp_path / "tight.toml", "[tolerances]\ny = { atol = 0, rtol = 0 }\n")
    rc, doc, _ = check(tmp_path, "fp32", "--profile", str(tight))
    assert rc == 1
    assert all(c["status"] == "failed" for c in doc["cases"])
    for c in doc["cases"]:
        bad = {o["name"] for o in c["outputs"] if not o["passed"]}
        assert bad == {"y"}
    assert doc["run"]["overrides"] == {"y": [0.0, 0.0]}
    # Loose enough for the seeded bug on the cases it fails (normal data, var near 1): its relative error
    # is about eps/sqrt(var) (first order in eps), ~1e-5, far inside atol = rtol = 1e-3 on values of order
    # one. (Not on cancellation data: there a fixed 1e-3 is below what float32 itself must lose, about
    # u |mean| / sqrt(var) relative, Chan, Golub & LeVeque 1983, which is why bounds are derived.)
    loose = write(tmp_path / "loose.toml", "[tolerances]\n" + "".join(
        f"{o} = {{ atol = 1e-3, rtol = 1e-3 }}\n" for o in ("y", "dx", "dweight")))
    only = [a for cid in failed for a in ("--case", cid)]
    rc, doc, _ = check(tmp_path, "eps_outside", "--profile", str(loose), *only)
    assert rc == 0 and doc["verdict"] == "conformant" and doc["gate"]["verdict"] == "pass"
    assert sorted(c["id"] for c in doc["cases"]) == sorted(failed)
    # the command line wins over the profile
    rc, doc, _ = check(tmp_path, "eps_outside", "--profile", str(loose), "--tolerance", "y=0,0", *only)
    assert rc == 1 and doc["run"]["overrides"]["y"] == [0.0, 0.0]


# ---------------------------------------------------------------- waivers
def waiver(case: str, expires: date, output: str | None = None, reason: str = "tracked") -> str:
    out = f"output = '{output}'\n" if output else ""
    return f"[[waivers]]\ncase = '{case}'\n{out}reason = '{reason}'\nexpires = {expires.isoformat()}\n"


FUTURE, PAST = date(2999, 12, 31), date(2000, 1, 1)


def test_active_waivers_turn_the_gate_green_but_not_the_verdict(tmp_path, bug_run, capsys):
    _, failed, passed = bug_run
    text = "".join(waiver(cid, FUTURE) for cid in failed)
    rc, doc, _ = check(tmp_path, "eps_outside", "--profile", str(write(tmp_path / "w.toml", text)))
    assert rc == 0
    assert doc["verdict"] == "not conformant"  # waivers never make a kernel conformant
    g = doc["gate"]
    assert g["verdict"] == "pass" and sorted(g["waived"]) == sorted(failed)
    assert g["outcomes"]["waived"] == len(failed) and g["outcomes"]["passed"] == len(passed)
    for c in doc["cases"]:
        assert c["status"] in ("passed", "failed")  # statuses keep the schema
        assert ("waiver" in c) == (c["id"] in failed)
    assert "gate: PASS" in capsys.readouterr().out


def test_globs_match_case_ids_as_fnmatch_does(tmp_path, bug_run):
    doc0, failed, _ = bug_run
    pattern = "layer_norm/float32/*/normal/*"
    covered = [c["id"] for c in doc0["cases"] if fnmatch.fnmatchcase(c["id"], pattern)]  # Python stdlib fnmatch
    rc, doc, _ = check(tmp_path, "eps_outside", "--profile", str(write(tmp_path / "g.toml", waiver(pattern, FUTURE))))
    assert sorted(doc["gate"]["waived"]) == sorted(set(covered) & set(failed))
    assert rc == (0 if set(failed) <= set(covered) else 1)


def test_output_waivers_cover_a_case_only_when_every_failed_output_is_waived(tmp_path, bug_run):
    doc0, failed, _ = bug_run
    cid = failed[0]
    bad = [o["name"] for o in next(c for c in doc0["cases"] if c["id"] == cid)["outputs"] if not o["passed"]]
    assert len(bad) >= 2  # the bug touches y and the gradients alike
    one = waiver(cid, FUTURE, output=bad[0])
    rc, doc, _ = check(tmp_path, "eps_outside", "--profile", str(write(tmp_path / "one.toml", one)))
    assert cid not in doc["gate"]["waived"] and rc == 1
    assert not doc["gate"]["stale_waivers"]  # it matched a failure, so it is not stale
    every = "".join(waiver(cid, FUTURE, output=o) for o in bad)
    rc, doc, _ = check(tmp_path, "eps_outside", "--profile", str(write(tmp_path / "all.toml", every)))
    assert cid in doc["gate"]["waived"]


def test_an_expired_waiver_fails_the_gate_even_on_a_passing_case(tmp_path, bug_run, capsys):
    _, failed, passed = bug_run
    text = "".join(waiver(cid, FUTURE) for cid in failed) + waiver(passed[0], PAST, reason="old exemption")
    j = tmp_path / "e.xml"
    rc, doc, _ = check(tmp_path, "eps_outside", "--profile", str(write(tmp_path / "e.toml", text)),
                       "--junit", str(j))
    assert rc == 1 and doc["gate"]["verdict"] == "fail"
    (exp,) = doc["gate"]["expired_waivers"]
    assert exp["case"] == passed[0] and exp["expires"] == "2000-01-01"
    assert "expired" in capsys.readouterr().out
    import xml.etree.ElementTree as ET

    tc = {t.get("name"): t for t in ET.parse(j).getroot().iter("testcase")}
    f = tc[passed[0]].find("failure")
    assert f is not None and "expired on 2000-01-01" in f.get("message")


def test_a_waiver_that_matches_no_failure_is_reported_stale(tmp_path, bug_run, capsys):
    _, failed, passed = bug_run
    text = "".join(waiver(cid, FUTURE) for cid in failed) + waiver(passed[0], FUTURE, reason="fixed long ago")
    rc, doc, _ = check(tmp_path, "eps_outside", "--profile", str(write(tmp_path / "s.toml", text)))
    assert rc == 0  # stale is a warning, not a failure
    (st,) = doc["gate"]["stale_waivers"]
    assert st["case"] == passed[0]
    assert f"stale waiver #{len(failed)}" in capsys.readouterr().out


def test_expiry_date_is_inclusive():
    # ISO 8601 calendar dates; the documented rule: a waiver holds through its expiry day.
    w = parse_profile({"waivers": [{"case": "a/*", "reason": "r", "expires": "2030-05-01"}]}).waivers
    case = {"id": "a/b", "status": "crashed", "message": "killed", "outputs": []}
    judge_case(case, "k", w, today=date(2030, 5, 1))
    assert gate_outcome(case)[0] == "waived"  # a case waiver also covers a crash
    judge_case(case, "k", w, today=date(2030, 5, 1) + timedelta(days=1))
    out, msg = gate_outcome(case)
    assert out == "failed" and "expired on 2030-05-01" in msg


def test_profile_dtypes_the_kernel_does_not_declare_are_a_usage_error(tmp_path, capsys):
    p = write(tmp_path / "d.toml", "dtypes = ['float16']\n")
    rc = main(["check", spec("fp32"), "--tier", "smoke", "--quiet", "--profile", str(p)])
    assert rc == 2
    err = capsys.readouterr().err
    assert "float16" in err and str(p) in err


def test_the_command_line_wins_over_the_profile_even_with_a_default_value(tmp_path):
    p = write(tmp_path / "seed.toml", "seed = 5\ntimeout = 60\n")
    one = ["--case", "layer_norm/float32/trailing/4x64/norm_ndim=1/normal/w=random/b=random/eps=1e-05/train/contiguous"]
    _, doc, _ = check(tmp_path, "fp32", "--profile", str(p), *one)
    assert (doc["run"]["seed"], doc["run"]["timeout_s"]) == (5, 60.0)
    _, doc, _ = check(tmp_path, "fp32", "--profile", str(p), "--seed", "0", *one)  # 0 is also the default
    assert (doc["run"]["seed"], doc["run"]["timeout_s"]) == (0, 60.0)
    _, doc, _ = check(tmp_path, "fp32", *one)  # no profile: the command's own defaults
    assert (doc["run"]["seed"], doc["run"]["timeout_s"]) == (0, 120.0)


# ---------------------------------------------------------------- hostile profile files
@pytest.mark.parametrize("raw, words", [
    # TOML v1.0.0: "A TOML file must be a valid UTF-8 encoded Unicode document."
    (b"tier = 'sm\xffoke'\n", "not valid UTF-8"),
    (b"\xff\xfet\x00i\x00e\x00r\x00", "not valid UTF-8"),  # UTF-16 with its byte-order mark
    ("x = " + "[" * 3000 + "]" * 3000 + "\n", "nested too deeply"),
    # CPython's int(str) limit (sys.get_int_max_str_digits(), 4300 digits by default) from inside tomllib
    ("seed = " + "9" * 5000 + "\n", "4300 digits"),
    ("tier = \n", "not valid TOML"),
])
def test_unreadable_profiles_are_profile_errors_naming_the_file(tmp_path, raw, words):
    p = tmp_path / "refnorm.toml"
    p.write_bytes(raw if isinstance(raw, bytes) else raw.encode())
    with pytest.raises(ProfileError) as e:
        load_profile(p)
    assert str(p) in str(e.value) and words in str(e.value)


@pytest.mark.parametrize("text, key, limit", [
    ("timeout = " + "9" * 400, "timeout", "86400"),
    ("timeout = 99999999999999999999", "timeout", "86400"),
    ("timeout = 1e7", "timeout", "86400"),  # about 116 days: the worker pool's wait overflowed
    ("timeout = nan", "timeout", "86400"),
    ("growth = 1" + "0" * 400, "growth", "1e+06"),
    ("growth_floor = 1", "growth_floor", "< 1"),
    ("seed = 9223372036854775808", "seed", "2**63"),
    ("workers = 100000", "workers", "256"),
    ("[tolerances]\ny = [1" + "0" * 400 + ", 0]", "tolerances.y.atol", "1e+100"),
    ("[tolerances]\ndx = { atol = 0, rtol = inf }", "tolerances.dx.rtol", "1e+100"),
])
def test_huge_numbers_are_refused_with_the_limit_in_the_message(tmp_path, text, key, limit):
    # Before: these passed validation and raised OverflowError later (float() of a 400-digit integer,
    # or a timeout beyond what poll(2) can wait, POSIX.1-2017 poll(): a C int of milliseconds).
    p = write(tmp_path / "refnorm.toml", text + "\n")
    with pytest.raises(ProfileError) as e:
        load_profile(p)
    msg = str(e.value)
    assert str(p) in msg and f"{key}:" in msg and limit in msg, msg


def test_the_profile_and_the_command_line_share_their_limits(tmp_path, capsys):
    # The same value is refused by both routes, and the same boundary value accepted by both.
    for key, value in (("seed", -1), ("timeout", 86401), ("workers", 257)):
        with pytest.raises(ProfileError, match=key):
            parse_profile({key: value})
        assert main(["check", spec("fp32"), f"--{key}", str(value)]) == 2
    assert parse_profile({"seed": 2 ** 63 - 1, "timeout": 86400, "workers": 256}).timeout == 86400.0
    capsys.readouterr()


def test_a_profile_that_is_not_utf8_is_exit_2_naming_the_file(tmp_path, capsys):
    p = tmp_path / "refnorm.toml"
    p.write_bytes(b"tier = 'sm\xe9oke'\n")  # Latin-1 e-acute, not UTF-8
    assert main(["check", spec("fp32"), "--quiet", "--profile", str(p)]) == 2
    out, err = capsys.readouterr()
    assert str(p) in err and "UTF-8" in err and "Traceback" not in err and out == ""


@pytest.mark.parametrize("raw", [b"[project\nname = 'x'\n", b"[project]\nname = '\xff'\n"])
def test_gate_ignores_an_unreadable_pyproject_with_a_note(tmp_path, monkeypatch, capsys, raw):
    # Before: `refnorm gate --kernel ...` crashed on a pyproject.toml of the folder that is not TOML or not
    # UTF-8, even with no [tool.refnorm] in it. Now it is "no profile here", with a note.
    (tmp_path / "pyproject.toml").write_bytes(raw)
    monkeypatch.chdir(tmp_path)
    notes: list[str] = []
    assert find_profile(tmp_path, notes) is None and "not used as a profile" in notes[0]
    one = "layer_norm/float32/trailing/4x64/norm_ndim=1/normal/w=random/b=random/eps=1e-05/train/contiguous"
    prof = write(tmp_path / "one.toml", "tier = 'smoke'\n")
    assert main(["check", spec("fp32"), "--case", one, "--quiet", "--profile", str(prof)]) == 0
    assert main(["gate", "--kernel", spec("fp32"), "--tier", "smoke", "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "note:" in out and "pyproject.toml" in out and "gate: PASS" in out
    assert main(["gate", "--quiet"]) == 2  # no kernel and no usable profile: a usage error that says why
    err = capsys.readouterr().err
    assert "no profile" in err and "pyproject.toml" in err


def test_an_unreadable_refnorm_toml_asked_for_by_its_place_is_exit_2(tmp_path, monkeypatch, capsys):
    write(tmp_path / "refnorm.toml", "tier = \n")
    monkeypatch.chdir(tmp_path)
    assert main(["gate", "--kernel", spec("fp32"), "--quiet"]) == 2
    assert "refnorm.toml: not valid TOML" in capsys.readouterr().err


def test_gate_baseline_dir_with_a_name_over_255_bytes_is_exit_2(tmp_path, capsys):
    # Before: OSError (File name too long) from Path.is_file.
    assert main(["gate", "--kernel", spec("fp32"), "--quiet", "--baseline-dir", str(tmp_path / ("b" * 300))]) == 2
    out, err = capsys.readouterr()
    assert "--baseline-dir" in err and "255" in err and out == ""


def test_gate_baseline_dir_that_is_a_file_is_exit_2_and_a_missing_one_a_warning(tmp_path, capsys):
    f = write(tmp_path / "f", "x")
    assert main(["gate", "--kernel", spec("fp32"), "--quiet", "--baseline-dir", str(f)]) == 2
    assert "expected a folder" in capsys.readouterr().err
    assert main(["gate", "--kernel", spec("fp32"), "--tier", "smoke", "--quiet", "--baseline-dir",
                 str(tmp_path / "none")]) == 0  # a first run, before any baseline was committed
    assert "does not exist; growth not checked" in capsys.readouterr().out


def test_gate_json_dir_fits_long_kernel_names(tmp_path, capsys):
    # Before: a kernel name of 300 characters made NAME.json longer than NAME_MAX (255 bytes) and the
    # write failed after the run. Now the name is cut, with a digest of the whole name, and stays unique.
    k = write(tmp_path / "long_kernels.py", f"""
import dataclasses, sys
sys.path.insert(0, {str(KERNELS.parent)!r})
import gate_kernels
a = dataclasses.replace(gate_kernels.fp32, name="a" * 300 + "-one")
b = dataclasses.replace(gate_kernels.fp32, name="a" * 300 + "-two")
""")
    out = tmp_path / "out"
    assert main(["gate", "--kernel", f"{k}:a", "--kernel", f"{k}:b", "--tier", "smoke", "--quiet",
                 "--json-dir", str(out)]) == 0
    names = sorted(p.name for p in out.iterdir())
    assert len(names) == 2 and all(len(n.encode()) <= 255 and n.endswith(".json") for n in names)
    assert {json.loads((out / n).read_text())["kernel"]["name"][-4:] for n in names} == {"-one", "-two"}
    capsys.readouterr()


def test_profile_does_not_import_plan():
    # The import cycle plan <-> profile is gone: profile.py imports nothing from plan (checked on the source).
    import ast

    import conformance.gate.profile as prof_mod

    tree = ast.parse(Path(prof_mod.__file__).read_text())
    imported = {n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) and n.module}
    assert "plan" not in imported and not any(m.endswith(".plan") for m in imported)


def test_empty_paths_are_usage_errors_not_ignored(tmp_path, capsys):
    # Before: an empty --baseline or gate --profile was taken as "not given" without a word.
    assert main(["check", spec("fp32"), "--quiet", "--baseline", ""]) == 2
    assert "baseline" in capsys.readouterr().err
    assert main(["gate", "--kernel", spec("fp32"), "--quiet", "--profile", ""]) == 2
    assert "profile" in capsys.readouterr().err


def test_a_file_name_stdout_cannot_encode_is_escaped_not_a_crash(tmp_path, monkeypatch):
    # A kernel file whose name has a byte that is not UTF-8: os.fsdecode keeps it as a surrogate
    # (PEP 383), which a strict UTF-8 stdout cannot encode. The gate prints the spec; it must not crash.
    import io

    name = os.fsdecode(b"k\xff.py")
    k = tmp_path / name
    k.write_text(f"import sys\nsys.path.insert(0, {str(KERNELS.parent)!r})\nfrom gate_kernels import fp32\n")
    out = io.TextIOWrapper(io.BytesIO(), encoding="utf-8", errors="strict", write_through=True)
    monkeypatch.setattr(sys, "stdout", out)
    assert main(["gate", "--kernel", f"{k}:fp32", "--tier", "smoke", "--quiet"]) == 0
    assert b"k\\udcff.py" in out.buffer.getvalue() and b"gate: PASS" in out.buffer.getvalue()
