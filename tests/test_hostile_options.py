"""Generated hostile profiles and command lines: every one ends in an exit code by its meaning, none in a traceback.

Each input is a valid starting point (a profile or a command line that runs one fast case of the
correct float32 kernel of tests/gate_kernels.py) with one to three mutations drawn from pools of
good and bad values. A mutation's value is bad when the documented limits refuse it (docs/ci.md:
the key table, the limits of conformance.options, the destination rules); the expectation is
derived from the pools, never from running the code:

- any bad mutation: exit 2, and the message names the option, or the profile file and its key;
- none: exit 0 or 1 (the case ran; a valid tight tolerance, a tiny timeout or an expired waiver
  may fail it), and the results file, when one was asked for, is complete;
- raw damage to a profile's text (a cut, a stray byte), whose effect the generator cannot know:
  exit 0, 1 or 2, and a 2 names the file.

The pytest plugin's options go through the plugin's own pytest_addoption definitions and its
_State (what pytest_configure builds): a bad value is a usage error naming the option.

Everything runs in-process (conformance.cli.main); most inputs fail validation before any case
runs, so the whole set costs seconds. Seeded (SEED), so a failure is reproducible from its index.
Measured on a 2-core machine like CI's: 1,050 inputs (450 profiles, 450 command lines, 150 plugin
option sets) in about 20 s of one core (about 15 s of wall time under `-n 2`), no traceback.
"""

from __future__ import annotations

import argparse
import io
import json
import math
import os
import random
import sys
import time
from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path
from typing import Any

import pytest

from conformance.cases import catalog
from conformance.cli import main

SEED = 20_251_202
KERNELS = Path(__file__).with_name("gate_kernels.py")
K = f"{KERNELS}:fp32"  # the correct float32 layer norm
ONE = catalog(["layer_norm"], ["float32"], "smoke")[0].id
CHUNKS = 3  # profiles and command lines come in chunks, so that pytest-xdist can spread them
N_PROFILES, N_COMMANDS = 150, 150  # per chunk
N_PLUGIN = 150
LINUX_PROC = Path("/proc/self").is_dir()


class Big(int):
    """An integer written in full into TOML (a 400-digit integer is valid TOML and valid Python)."""


# ---------------------------------------------------------------- a small TOML writer for generated values
def toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(int(v))
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)  # a JSON string is a TOML basic string (TOML v1.0.0, "String")
    if isinstance(v, (datetime, date)):
        return v.isoformat()
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{json.dumps(k)} = {toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(type(v))


def toml_text(table: dict[str, Any]) -> str:
    return "".join(f"{json.dumps(k)} = {toml_value(v)}\n" for k, v in table.items())


# ---------------------------------------------------------------- pools: (value, good?) per profile key
FUTURE, PAST = date(2999, 12, 31), date(2000, 1, 1)
W = {"case": "layer_norm/*", "reason": "tracked", "expires": FUTURE}

PROFILE_POOLS: dict[str, tuple[list[Any], list[Any]]] = {  # key -> (good values, bad values)
    "seed": ([0, 7, 2 ** 63 - 1], [-1, 2 ** 63, 1.5, "3", True, [1], {"a": 1}, Big(10 ** 400), math.nan, math.inf]),
    "workers": ([1, 2, 256], [0, 257, 2.0, -1, Big(10 ** 30), "2", True]),
    "timeout": ([60, 0.5, 86400, 1e-300], [0, -1, 86400.5, 1e7, Big(99999999999999999999), Big(10 ** 400),
                                          math.nan, math.inf, -math.inf, "60", True, [60]]),
    "growth": ([1.5, 1e6, 3], [1, 0.5, 1000001, Big(10 ** 400), math.nan, math.inf, "2", False]),
    "growth_floor": ([0, 0.5, 0.999], [1, -0.1, Big(10 ** 400), math.nan, math.inf, "0"]),
    "tier": (["smoke", "standard"], ["fast", 1, [], "", "SMOKE"]),
    "dtypes": ([["float32"], "float32", ["float32", "float32"]], [["float24"], [], [1], 3, ["float16"]]),
    "ops": ([["layer_norm"], "layer_norm"], [["softmax"], [], "x", ["batch_norm"], 5]),
    # a module alone expands by the ops key (present in BASE_PROFILE); the command line's spec wins over the list
    "kernels": ([[K], K, ["nonexistent_mod_xyz:k"], [{"spec": K, "dtypes": ["float32"]}], "a_module_alone"],
                [[], [1], [""], [{"spec": 1}], [{"spec": K, "extra": 1}], [K, K], [{"spec": K, "baseline": ""}],
                 [{"dtypes": ["float32"]}]]),
    "tolerances": ([{"y": [1e-3, 1e-3]}, {"dx": {"atol": 0, "rtol": 0}}, {"layer_norm": {"y": [1, 1]}},
                    {"y": [1e100, 0]}],
                   [{"dz": [1, 1]}, {"y": [math.inf, 0]}, {"y": [math.nan, 0]}, {"y": [-1, 0]}, {"y": [1]},
                    {"y": "1,1"}, {"y": {"atol": 1}}, {"y": {"atol": 1, "rtol": 1, "btol": 2}},
                    {"y": [Big(10 ** 400), 0]}, {"layer_norm": [1]}, {"layer_norm": {"dz": [1, 1]}},
                    {"y": [1e101, 0]}, [1]]),
    "waivers": ([[W], [dict(W, expires=PAST)], [dict(W, output="y", kernel="gate-*")], [dict(W, expires="2999-01-01")]],
                [[{"case": "*"}], [dict(W, case="")], [dict(W, expires="2026-13-01")],
                 [dict(W, expires=datetime(2026, 1, 1, 10))], [dict(W, output="dz")], [dict(W, owner="me")], "x",
                 [1], [dict(W, kernel="")], [dict(W, reason="  ")]]),
}
#: bad values that the loader accepts and the plan refuses: a dtype the kernel does not declare, an op it is not
PLAN_ONLY = [("dtypes", ["float16"]), ("ops", ["batch_norm"])]
UNKNOWN_KEYS = ["tier2", "Seed", "kernel", "timeouts"]

BASE_PROFILE = {"kernels": [K], "tier": "smoke", "seed": 3, "workers": 1, "timeout": 60, "growth": 2.0,
                "growth_floor": 0.01, "dtypes": ["float32"], "ops": ["layer_norm"]}


@dataclass
class Outcome:
    """What an input must give: exit 2 naming one of ``words``, or (no words) 0/1; ``fuzz``: 0, 1 or 2."""

    words: list[str] = field(default_factory=list)
    plan_only: list[str] = field(default_factory=list)  # words of values only a plan refuses (not the loader)
    fuzz: bool = False
    results: Path | None = None  # a results file that a run must leave complete


def make_profile(rng: random.Random, d: Path, i: int) -> tuple[Path, Outcome]:
    table = dict(BASE_PROFILE)
    bad_keys: dict[str, bool] = {}  # key -> bad? (a later mutation of the same key replaces an earlier one)
    for _ in range(rng.randint(1, 3)):
        if rng.random() < 0.06:
            key = rng.choice(UNKNOWN_KEYS)
            table[key] = 1
            bad_keys[key] = True
            continue
        key = rng.choice(list(PROFILE_POOLS))
        good, bad = PROFILE_POOLS[key]
        is_bad = rng.random() >= 0.2
        table[key] = rng.choice(bad if is_bad else good)
        bad_keys[key] = is_bad
    out = Outcome(words=[k for k, b in bad_keys.items() if b])
    out.plan_only = [k for k in out.words if (k, table[k]) in PLAN_ONLY]
    raw = toml_text(table).encode()
    damage = rng.random()
    # Damage to the whole file is found before any key is looked at: it alone decides the message.
    if damage < 0.05:  # a byte that is not UTF-8 (TOML v1.0.0 files are UTF-8)
        pos = rng.randrange(len(raw) + 1)
        raw = raw[:pos] + rng.choice([b"\xff", b"\xc3\x28", b"\xed\xa0\x80", b"\x80"]) + raw[pos:]
        out.words, out.plan_only = ["UTF-8"], []
    elif damage < 0.09:  # nested too deeply for the parser, or not: then 'deep' is the first unknown key
        n = rng.choice([50, 600, 3000])
        raw += f"deep = {'[' * n}{']' * n}\n".encode()
        out.words, out.plan_only = ["unknown key 'deep'", "nested too deeply"], []
    elif damage < 0.12:  # an integer beyond CPython's 4300-digit limit of int(str)
        raw += ("big = " + "7" * 5000 + "\n").encode()
        out.words, out.plan_only = ["4300 digits"], []
    elif damage < 0.16:  # a cut anywhere, a NUL, a duplicate key, a byte-order mark: unknown effect
        kind = rng.randrange(4)
        if kind == 0:
            raw = raw[:rng.randrange(len(raw))]
        elif kind == 1:
            pos = rng.randrange(len(raw))
            raw = raw[:pos] + b"\x00" + raw[pos:]
        elif kind == 2:
            raw += b'tier = "smoke"\n'
        else:
            raw = b"\xef\xbb\xbf" + raw
        out.fuzz = True
    p = d / f"p{i}.toml"
    p.write_bytes(raw)
    return p, out


# ---------------------------------------------------------------- pools for command lines
def number_pools() -> dict[str, tuple[list[str], list[str]]]:
    return {
        "--timeout": (["60", "0.5", "86400", " 30 ", "1e-300"],
                      ["nan", "inf", "-inf", "0", "-1", "1e7", "86400.5", "1e400", "9" * 400, "", "abc", "1,5",
                       "0x10"]),
        "--seed": (["0", "7", str(2 ** 63 - 1), "1_000"], ["-1", str(2 ** 63), "1.5", "9" * 5000, "", "1e3", "nan"]),
        "--workers": (["1", "2", "256"], ["0", "257", "2.5", "-3", "", "9" * 400]),
        "--growth": (["1.5", "1e6", "3"], ["1", "0.5", "1000001", "nan", "inf", "-inf", "1e400", ""]),
        "--growth-floor": (["0", "0.5", "0.999"], ["1", "-0.1", "nan", "inf", "2"]),
    }


TOLERANCES = (["y=1e-3,1e-2", "dx=0,0", "mean=1,0", "y=1e100,0"],
              ["y=inf,0", "y=nan,0", "y=0,inf", "y=-1,0", "bogus=1,1", "y=1", "y=1,2,3", "y=1e101,0", "=1,1", "y",
               "y=,", "y=1e400,0"])
BAD_SPECS = ["nope_mod_xyz:k", "no_colon", f"{KERNELS}:nope", "/nonexistent/x.py:k", "n" * 300 + ".py:k",
             "x\x00y.py:k", f"{KERNELS}:", ":k", "\ud800.py:k"]


class Files:
    """The fixed files of one chunk's folder: things to point options at."""

    def __init__(self, d: Path, results: Path):
        self.d = d
        self.plain = d / "plain.txt"
        self.plain.write_text("not json\n")
        self.a_dir = d / "a_dir"
        self.a_dir.mkdir()
        self.results = results
        self.good_profile = d / "good.toml"
        self.good_profile.write_text(toml_text(dict(BASE_PROFILE, tolerances={"y": [1e-3, 1e-3]})))
        self.bad_profiles = []
        for name, raw in (("utf8.toml", b"tier = 'sm\xffoke'\n"), ("toml.toml", b"tier = \n"),
                          ("deep.toml", ("x = " + "[" * 3000 + "]" * 3000 + "\n").encode()),
                          ("huge.toml", ("timeout = " + "9" * 400 + "\n").encode())):
            (d / name).write_bytes(raw)
            self.bad_profiles.append(d / name)
        (d / "pp").mkdir()
        (d / "pp" / "pyproject.toml").write_text("[project]\nname = 'x'\n")
        self.bad_profiles += [d / "pp" / "pyproject.toml", d / "missing.toml", self.a_dir, d / ("n" * 300 + ".toml")]
        self.report_blocked = d / "rep_blocked"
        (self.report_blocked / "report.html").mkdir(parents=True)
        self.jd_blocked = d / "jd_blocked"
        (self.jd_blocked / "gate-fp32.json").mkdir(parents=True)
        self.fifo = d / "a_fifo" if hasattr(os, "mkfifo") else None
        if self.fifo is not None:
            os.mkfifo(self.fifo)
        self.bdir = d / "bdir"
        self.bdir.mkdir()
        (self.bdir / "gate-fp32.json").write_text(results.read_text())

    def bad_file_targets(self) -> list[str]:
        out = ["", str(self.a_dir), str(self.plain / "x"), str(self.d / ("n" * 300)), "a\x00b",
               str(self.a_dir / ("n" * 256 + ".json")), str(self.d / "\ud800.json")]
        if LINUX_PROC:
            out.append("/proc/refnorm-x.json")
        if self.fifo is not None:
            # Not a regular file: an atomic rename would replace the node itself. A FIFO of our own
            # stands for a device, so that a regression cannot replace a real one (as root, /dev/null).
            out.append(str(self.fifo))
        return out

    def bad_folders(self) -> list[str]:
        out = ["", str(self.plain), str(self.plain / "r"), str(self.d / ("n" * 300)), "a\x00b"]
        return out + (["/proc/refnorm-r"] if LINUX_PROC else [])

    def bad_inputs(self) -> list[str]:
        return [str(self.d / "missing.json"), str(self.a_dir), str(self.plain), str(self.d / ("n" * 300)), ""]


def make_command(rng: random.Random, f: Files, i: int) -> tuple[list[str], Outcome]:
    out = Outcome()
    which = rng.choices(["check", "gate", "diff", "report", "cases", "junk"], weights=[45, 25, 10, 8, 6, 6])[0]
    nums = number_pools()

    def pick(option: str, good: list[str], bad: list[str], p_good: float = 0.2) -> list[str]:
        if rng.random() < p_good:
            return [option, rng.choice(good)]
        out.words.append(option)
        return [option, rng.choice(bad)]

    if which == "junk":
        argv = rng.choice([[], ["check"], ["frobnicate"], ["check", "--json"], ["--seed", "1"], ["gate", "extra"],
                           ["diff", "one"], ["report", str(f.results)], ["check", K, "--bogus-opt", "1"]])
        out.words.append("usage:")  # argparse's own usage error: exit 2 and its usage line
        return argv, out
    if which == "cases":
        argv = ["cases"]
        if rng.random() < 0.5:
            argv += pick("--tier", ["smoke", "standard"], ["nope", ""])
        if rng.random() < 0.5:
            argv += pick("--op", ["layer_norm", "rms_norm"], ["softmax", ""])
        if rng.random() < 0.5:
            argv += pick("--dtype", ["float32", "bfloat16"], ["float24", ""])
        return argv, out
    if which == "diff":
        old = [str(f.results)] if rng.random() < 0.4 else [rng.choice(f.bad_inputs())]
        new = [str(f.results)] if rng.random() < 0.4 else [rng.choice(f.bad_inputs())]
        if old[0] != str(f.results):
            out.words.append("OLD")
        if new[0] != str(f.results):
            out.words.append("NEW")
        argv = ["diff", *old, *new]
        for opt in ("--growth", "--growth-floor"):
            if rng.random() < 0.4:
                argv += pick(opt, *nums[opt])
        return argv, out
    if which == "report":  # only failures: a good one would draw the plots (seconds)
        if rng.random() < 0.5:
            argv = ["report", rng.choice(f.bad_inputs()), "--out", str(f.d / f"rep{i}"), "--no-peers"]
            out.words.append("RESULTS.json")
        else:
            argv = ["report", str(f.results), "--out", rng.choice(f.bad_folders() + [str(f.report_blocked)]),
                    "--no-peers"]
            out.words.append("--out")
        return argv, out

    gate = which == "gate"
    argv = ["gate", "--kernel", K, "--tier", "smoke", "--quiet"] if gate else ["check", K, "--case", ONE, "--quiet"]
    options = ["--timeout", "--seed", "--workers", "--growth", "--growth-floor", "--junit", "--profile", "--dtype",
               "--spec"] + (["--json-dir", "--baseline-dir"] if gate else
                            ["--json", "--tolerance", "--tier", "--op", "--case", "--report", "--baseline",
                             "--unknown"])
    for _ in range(rng.randint(1, 3)):
        opt = rng.choice(options)
        if opt in nums:
            argv += pick(opt, *nums[opt])
        elif opt == "--tolerance":
            argv += pick(opt, *TOLERANCES)
        elif opt == "--tier":
            argv += pick(opt, ["smoke", "standard"], ["nope", "", "SMOKE"])
        elif opt == "--op":
            if rng.random() < 0.3:
                argv += ["--op", "layer_norm"]
            else:
                argv += ["--op", rng.choice(["batch_norm", "softmax", ""])]
                out.words.append("--op")
        elif opt == "--dtype":
            if rng.random() < 0.3:
                argv += ["--dtype", "float32"] + (["float32"] if rng.random() < 0.5 else [])
            else:
                argv += ["--dtype", rng.choice(["float16", "float24", ""])]
                out.words.append("dtype")
        elif opt == "--case":
            if rng.random() < 0.3:
                argv += ["--case", ONE]
            else:
                argv += ["--case", rng.choice(["layer_norm/float32/nope", "batch_norm/float32/x", "",
                                               "layer_norm/float24/x", "layer_norm", "layer_norm//", "/" * 5])]
                out.words.append("case")
        elif opt in ("--json", "--junit"):
            if rng.random() < 0.3:
                target = f.d / ("new" if rng.random() < 0.5 else f"n{i}/deeper") / f"{i}{opt[2:]}.out"
                argv += [opt, str(target)]
                if opt == "--json":
                    out.results = target
            else:
                argv += [opt, rng.choice(f.bad_file_targets())]
                out.words.append(opt)
        elif opt == "--report":
            argv += ["--report", rng.choice(f.bad_folders() + [str(f.report_blocked)])]
            out.words.append("--report")
        elif opt == "--json-dir":
            if rng.random() < 0.3:
                argv += [opt, str(f.d / f"jd{i}")]
                out.results = f.d / f"jd{i}" / "gate-fp32.json"
            else:
                argv += [opt, rng.choice(f.bad_folders() + [str(f.jd_blocked)])]
                out.words.append(opt)
        elif opt == "--baseline-dir":
            if rng.random() < 0.4:
                argv += [opt, rng.choice([str(f.bdir), str(f.d / f"none{i}")])]
            else:
                argv += [opt, rng.choice([str(f.plain), str(f.d / ("n" * 300)), "", "a\x00b"])]
                out.words.append(opt)
        elif opt == "--profile":
            if rng.random() < 0.3:
                argv += [opt, str(f.good_profile)]
            else:
                bad = rng.choice(f.bad_profiles)
                argv += [opt, str(bad)]
                out.words += [str(bad), "no such file"]
        elif opt == "--baseline":
            if rng.random() < 0.3:
                argv += [opt, str(f.results)]
            else:
                argv += [opt, rng.choice(f.bad_inputs())]
                out.words.append("baseline")
        elif opt == "--spec":
            bad = rng.choice(BAD_SPECS)
            if gate:
                argv[2] = bad
            else:
                argv[1] = bad
            out.words.append("kernel spec")
        elif opt == "--unknown":
            argv += [rng.choice(["--bogus-opt", "--jsn", "extra-positional"])]
            out.words.append("unrecognized")
    return argv, out


# ---------------------------------------------------------------- running and judging
def judge(rc: Any, err: str, out: Outcome, raised: BaseException | None, where: str) -> str | None:
    """The problem with one input's result, or None."""
    if raised is not None:
        return f"{where}: raised {type(raised).__name__}: {raised}"
    if "Traceback" in err or "Exception ignored" in err:
        return f"{where}: a traceback on stderr: {err[-400:]}"
    if rc not in (0, 1, 2, 3):
        return f"{where}: exit {rc!r}"
    if out.fuzz:
        return None if rc in (0, 1, 2) else f"{where}: exit {rc} on damaged text"
    if out.words:
        if rc != 2:
            return f"{where}: exit {rc}, expected 2 (bad: {out.words})"
        if not any(w in err for w in out.words):
            return f"{where}: the message names none of {out.words}: {err[-300:]}"
        return None
    if rc not in (0, 1):
        return f"{where}: exit {rc}, expected 0 or 1 (all values good): {err[-300:]}"
    if out.results is not None:
        try:
            doc = json.loads(out.results.read_text())
        except (OSError, ValueError) as e:
            return f"{where}: results file {out.results}: {e}"
        if doc.get("complete") is not True:
            return f"{where}: results file {out.results} is not complete"
    return None


def run_main(argv: list[str], monkeypatch) -> tuple[Any, str, BaseException | None]:
    """main(argv) with the interpreter's own kind of streams: UTF-8, stdout strict and stderr
    backslashreplace (the defaults of sys.stdout and sys.stderr in a UTF-8 locale, Python docs, sys)."""
    out = io.TextIOWrapper(io.BytesIO(), encoding="utf-8", errors="strict", write_through=True)
    err = io.TextIOWrapper(io.BytesIO(), encoding="utf-8", errors="backslashreplace", write_through=True)
    with monkeypatch.context() as m:
        m.setattr(sys, "stdout", out)
        m.setattr(sys, "stderr", err)
        try:
            rc = main(argv)
            raised = None
        except BaseException as e:  # noqa: BLE001 - any escape is the defect this test looks for
            rc, raised = None, e
    return rc, err.buffer.getvalue().decode("utf-8"), raised


@pytest.fixture(scope="module")
def results_file(tmp_path_factory) -> Path:
    """One real results document of the kernel, for --baseline, diff and report."""
    p = tmp_path_factory.mktemp("hostile-base") / "results.json"
    assert main(["check", K, "--case", ONE, "--quiet", "--json", str(p)]) == 0
    return p


class Tally:
    """The exit codes and the problems of one set of inputs, and how long it took."""

    def __init__(self, kind: str):
        self.kind, self.codes, self.problems, self.t0 = kind, {}, [], time.monotonic()

    def add(self, rc: Any, problem: str | None) -> None:
        self.codes[rc] = self.codes.get(rc, 0) + 1
        if problem:
            self.problems.append(problem)

    def check(self, n: int) -> None:
        assert sum(self.codes.values()) == n
        tally = ", ".join(f"exit {k}: {v}" for k, v in sorted(self.codes.items(), key=str))
        print(f"hostile {self.kind}: {n} inputs ({tally}), {time.monotonic() - self.t0:.1f} s, "
              f"{len(self.problems)} problems")
        assert not self.problems, (f"{len(self.problems)} of {n} inputs misbehaved:\n"
                                   + "\n".join(self.problems[:15]))


@pytest.fixture
def files(tmp_path, monkeypatch, results_file) -> Files:
    monkeypatch.chdir(tmp_path)  # a relative path lands here
    d = tmp_path / "f"
    d.mkdir()
    return Files(d, results_file)


@pytest.mark.parametrize("chunk", range(CHUNKS))
def test_generated_profiles(chunk, tmp_path, monkeypatch, results_file):
    from conformance.gate.profile import ProfileError, load_profile

    monkeypatch.chdir(tmp_path)  # a relative path in a profile lands here
    rng = random.Random(f"{SEED}/profiles/{chunk}")
    tally = Tally(f"profiles (chunk {chunk})")
    for i in range(N_PROFILES):
        p, out = make_profile(rng, tmp_path, i)
        where = f"profile chunk {chunk} #{i} ({p.read_bytes()[:200]!r})"
        if rng.random() < 0.55:  # the loader alone: a ProfileError naming the file (and the key)
            try:
                load_profile(p)
                rc, err, raised = 0, "", None
            except ProfileError as e:
                rc, err, raised = 2, str(e), None
            except BaseException as e:  # noqa: BLE001
                rc, err, raised = None, "", e
            for w in out.plan_only:  # the loader accepts what only a plan refuses
                out.words.remove(w)
        else:  # the whole command: `refnorm check K --case ONE --profile p`
            res = tmp_path / f"r{i}.json"
            rc, err, raised = run_main(["check", K, "--case", ONE, "--quiet", "--profile", str(p), "--json",
                                        str(res)], monkeypatch)
            out.results = None if (out.words or out.fuzz) else res
        problem = judge(rc, err, out, raised, where)
        if problem is None and rc == 2 and str(p) not in err:
            problem = f"{where}: the message does not name the file: {err[-300:]}"
        tally.add(rc, problem)
    tally.check(N_PROFILES)


@pytest.mark.parametrize("chunk", range(CHUNKS))
def test_generated_command_lines(chunk, files, monkeypatch):
    rng = random.Random(f"{SEED}/commands/{chunk}")
    tally = Tally(f"command lines (chunk {chunk})")
    for i in range(N_COMMANDS):
        argv, out = make_command(rng, files, i)
        where = f"command chunk {chunk} #{i}: {[a[:60] for a in argv]}"
        rc, err, raised = run_main(argv, monkeypatch)
        tally.add(rc, judge(rc, err, out, raised, where))
    tally.check(N_COMMANDS)


# ---------------------------------------------------------------- the pytest plugin's options
class _Usage(Exception):
    pass


class _Parser(argparse.ArgumentParser):
    """argparse as pytest uses it, raising instead of exiting."""

    def error(self, message):
        raise _Usage(message)


class _Group:
    def __init__(self, ap: argparse.ArgumentParser):
        self.ap = ap

    def addoption(self, *names, **kw):
        self.ap.add_argument(*names, **kw)


class _PluginParser:
    def __init__(self):
        self.ap = _Parser(add_help=False)

    def getgroup(self, *a, **kw):
        return _Group(self.ap)


class _Config:
    def __init__(self, ns: argparse.Namespace):
        self.ns = ns

    def getoption(self, name: str):
        return getattr(self.ns, name)


def make_plugin_args(rng: random.Random, f: Files) -> tuple[list[str], Outcome]:
    out = Outcome()
    argv = ["--refnorm-kernel", K]
    nums = number_pools()
    for _ in range(rng.randint(1, 3)):
        opt = rng.choice(["--timeout", "--seed", "--growth", "--growth-floor", "--tier", "--dtype", "--case",
                          "--profile", "--baseline", "--kernel"])
        good_now = rng.random() < 0.25
        name = "--refnorm-" + opt[2:]
        if opt in nums:
            good, bad = nums[opt]
            argv += [name, rng.choice(good if good_now else bad)]
        elif opt == "--tier":
            argv += [name, rng.choice(["smoke"] if good_now else ["nope", ""])]
        elif opt == "--dtype":
            argv += [name, rng.choice(["float32", "float32,float32"] if good_now else ["float16", "float24"])]
        elif opt == "--case":
            argv += [name, rng.choice([ONE] if good_now else ["batch_norm/float32/x", ""])]
        elif opt == "--profile":
            argv += [name, str(f.good_profile if good_now else rng.choice(f.bad_profiles))]
        elif opt == "--baseline":
            argv += [name, str(f.results) if good_now else rng.choice(f.bad_inputs()[:4])]
        elif opt == "--kernel":
            if good_now:
                argv += [name, K]
            else:
                argv += [name, rng.choice(BAD_SPECS)]
        if not good_now:
            out.words += {"--dtype": ["dtype"], "--case": ["case"], "--profile": [argv[-1], "no such file"],
                          "--baseline": ["baseline"], "--kernel": ["kernel spec"]}.get(opt, [name])
    return argv, out


def test_generated_plugin_options(files):
    import conformance.pytest_plugin as plugin
    from conformance.gate.plan import PlanError
    from conformance.gate.profile import ProfileError

    rng = random.Random(f"{SEED}/plugin")
    tally = Tally("plugin option sets")
    for i in range(N_PLUGIN):
        argv, out = make_plugin_args(rng, files)
        where = f"plugin #{i}: {[a[:60] for a in argv]}"
        pp = _PluginParser()
        plugin.pytest_addoption(pp)
        raised, err, rc = None, "", 0
        try:
            ns = pp.ap.parse_args(argv)
            state = plugin._State(_Config(ns))
            state.close()
        except (_Usage, ProfileError, PlanError, pytest.UsageError) as e:
            rc, err = 2, str(e)
        except BaseException as e:  # noqa: BLE001
            raised = e
        tally.add(rc, judge(rc, err, out, raised, where))
    tally.check(N_PLUGIN)


def test_the_generated_sets_are_as_large_as_promised():
    # Issue 13: at least 800 generated hostile profiles and command lines (this helper's share).
    assert CHUNKS * (N_PROFILES + N_COMMANDS) + N_PLUGIN >= 800
