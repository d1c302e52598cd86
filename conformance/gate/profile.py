"""A port's gate profile: what to check and under which rules, read from TOML.

The profile lives in ``[tool.refnorm]`` of the port's pyproject.toml or at the top
level of a ``refnorm.toml`` (see docs/ci.md for every key). Relative paths in it
(kernel files, baselines) are relative to the profile file's folder.

Every key is validated once, here: an unknown key or a bad value raises
ProfileError naming the file, the key, what was expected and what was received.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from typing import Any, Mapping, NoReturn

from .. import dtypes as _dtypes
from ..cases.model import TIERS
from ..kernel import OPS
from ..options import OUTPUT_NAMES, OptionError, check_number, shown

__all__ = ["Profile", "KernelEntry", "Waiver", "ProfileError", "load_profile", "find_profile", "loadable_spec",
           "PROFILE_FILES", "DEFAULT_GROWTH", "DEFAULT_GROWTH_FLOOR"]

#: Searched in this order by find_profile.
PROFILE_FILES = ("refnorm.toml", "pyproject.toml")
#: A passing output fails the gate when its budget used grows by more than this factor over the baseline.
DEFAULT_GROWTH = 2.0
#: Budgets below this fraction of the bound are treated as this value when measuring growth, so that
#: the rounding noise of a near-exact kernel (a few thousandths of its bound) cannot count as growth.
DEFAULT_GROWTH_FLOOR = 0.01



class ProfileError(ValueError):
    """A profile that cannot be used; the message names the file and the key."""


@dataclass(frozen=True)
class Waiver:
    """A known failure accepted until ``expires`` (inclusive, compared with today's UTC date).

    case : fnmatch glob on the case id ("*" also matches "/").
    output : the one output it covers; None covers the whole case, including a crash.
    kernel : fnmatch glob on the kernel's name; None: every kernel.
    """

    index: int
    case: str
    reason: str
    expires: date
    output: str | None = None
    kernel: str | None = None

    def matches(self, case_id: str, kernel_name: str) -> bool:
        from fnmatch import fnmatchcase

        return fnmatchcase(case_id, self.case) and (self.kernel is None or fnmatchcase(kernel_name, self.kernel))

    def expired(self, today: date) -> bool:
        return today > self.expires

    def label(self) -> str:
        what = f"case {self.case!r}" + (f" output {self.output}" if self.output else "")
        who = f" kernel {self.kernel!r}" if self.kernel else ""
        return f"waiver #{self.index} ({what}{who}, until {self.expires.isoformat()}: {self.reason})"

    def as_dict(self) -> dict[str, Any]:
        return {"index": self.index, "case": self.case, "output": self.output, "kernel": self.kernel,
                "reason": self.reason, "expires": self.expires.isoformat()}


@dataclass(frozen=True)
class KernelEntry:
    """One kernel of the profile: its spec and what it overrides of the profile's defaults."""

    spec: str
    dtypes: tuple[str, ...] | None = None
    baseline: Path | None = None


@dataclass(frozen=True)
class Profile:
    """A validated profile. ``None`` means "not set here": the command line or the default applies."""

    path: Path | None = None
    kernels: tuple[KernelEntry, ...] = ()
    ops: tuple[str, ...] | None = None
    dtypes: tuple[str, ...] | None = None
    tier: str | None = None
    seed: int | None = None
    workers: int | None = None
    timeout: float | None = None
    #: op (or "*" for every op) -> output -> (atol, rtol)
    tolerances: Mapping[str, Mapping[str, tuple[float, float]]] = field(default_factory=dict)
    waivers: tuple[Waiver, ...] = ()
    growth: float | None = None
    growth_floor: float | None = None
    #: outputs whose inconclusive passes are accepted (check's --accept-inconclusive)
    accept_inconclusive: tuple[str, ...] = ()

    def overrides_for(self, op: str) -> dict[str, tuple[float, float]]:
        """The tolerance overrides that apply to a kernel of this op (op-specific ones win)."""
        out = dict(self.tolerances.get("*", {}))
        out.update(self.tolerances.get(op, {}))
        return out

    def entry_for(self, spec: str) -> KernelEntry | None:
        """The kernel entry of this spec (file paths compared once made absolute)."""
        want = loadable_spec(spec)
        for k in self.kernels:
            if loadable_spec(k.spec) == want:
                return k
        return None


def _is_path_target(target: str) -> bool:
    """A spec's target is a file path (not a module) when it ends in .py or has a path separator."""
    return target.endswith(".py") or "/" in target or "\\" in target


def loadable_spec(spec: str) -> str:
    """The spec with a file path made absolute (for comparing specs, and for worker processes)."""
    base, q, query = spec.partition("?")  # parameters may hold a colon (device=cuda:0)
    target, sep, attr = base.rpartition(":")
    if sep and _is_path_target(target):
        try:
            return f"{Path(target).resolve()}:{attr}{q}{query}"
        except (OSError, ValueError, RuntimeError):  # a NUL, a name too long, a symlink loop: kept as given
            return spec
    return spec


def _toml_loads(text: str, where: str) -> dict[str, Any]:
    if sys.version_info >= (3, 11):
        import tomllib
    else:  # pragma: no cover - exercised on Python 3.10 only
        try:
            import tomli as tomllib
        except ModuleNotFoundError:
            raise ProfileError(f"{where}: reading a profile needs Python 3.11 (tomllib) or the tomli package on "
                               "Python 3.10 (pip install tomli)") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ProfileError(f"{where}: not valid TOML: {e}") from None
    except RecursionError:
        raise ProfileError(f"{where}: not readable as TOML: arrays or tables nested too deeply") from None
    except ValueError as e:  # an integer beyond Python's limit of 4300 digits for int(str)
        raise ProfileError(f"{where}: not readable as TOML: {e}") from None


def _read_toml(p: Path) -> dict[str, Any]:
    """The parsed TOML of a file; any reason it cannot be read (a folder, not UTF-8 (TOML v1.0.0:
    "A TOML file must be a valid UTF-8 encoded Unicode document"), not TOML, nested too deeply)
    is a ProfileError naming the file."""
    try:
        raw = p.read_bytes()
    except OSError as e:
        raise ProfileError(f"profile {p}: cannot be read: {e.strerror or e}") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as e:
        raise ProfileError(f"{p}: not valid UTF-8 (byte {e.start} is {raw[e.start]:#04x}); TOML files are "
                           "UTF-8") from None
    return _toml_loads(text, str(p))


def _exists(p: Path) -> bool:
    try:
        return p.is_file()
    except (OSError, ValueError):  # a name too long, a NUL: no such file
        return False


def find_profile(start: str | Path = ".", notes: list[str] | None = None) -> Path | None:
    """refnorm.toml in ``start``, else a pyproject.toml there with a [tool.refnorm] table, else None.

    A pyproject.toml that cannot be read as TOML is no profile (it may belong to something else);
    why is appended to ``notes``. A refnorm.toml is returned as it is (loading it says what is wrong).
    """
    d = Path(start)
    rt = d / "refnorm.toml"
    if _exists(rt):
        return rt
    pp = d / "pyproject.toml"
    if _exists(pp):
        try:
            data = _read_toml(pp)
        except ProfileError as e:
            if notes is not None:
                notes.append(f"{e}; not used as a profile")
            return None
        if isinstance(data.get("tool"), dict) and "refnorm" in data["tool"]:
            return pp
    return None


def load_profile(path: str | Path) -> Profile:
    """Read and validate a profile file (pyproject.toml: its [tool.refnorm] table; else the whole file)."""
    p = Path(path)
    if not _exists(p):
        name = str(p) if len(str(p)) <= 300 else shown(str(p))
        try:
            folder = p.is_dir()
        except (OSError, ValueError):
            folder = False
        raise ProfileError(f"profile {name}: " + ("is a folder, expected a profile file (refnorm.toml or "
                                                   "pyproject.toml)" if folder else "no such file"))
    data = _read_toml(p)
    if p.name == "pyproject.toml":
        tool = data.get("tool")
        if not isinstance(tool, dict) or "refnorm" not in tool:
            raise ProfileError(f"{p}: has no [tool.refnorm] table (see docs/ci.md)")
        table, where = tool["refnorm"], f"{p} [tool.refnorm]"
    else:
        table, where = data, str(p)
    if not isinstance(table, dict):
        raise ProfileError(f"{where}: expected a table, received {type(table).__name__}")
    return parse_profile(table, where=where, base=p.parent, path=p)


# ---------------------------------------------------------------- validation
_TOP_KEYS = ("kernels", "ops", "dtypes", "tier", "seed", "workers", "timeout", "tolerances", "waivers",
             "growth", "growth_floor", "accept_inconclusive")
_KERNEL_KEYS = ("spec", "dtypes", "baseline")
_WAIVER_KEYS = ("case", "output", "kernel", "reason", "expires")


class _Ctx:
    def __init__(self, where: str):
        self.where = where

    def fail(self, key: str, expected: str, got: Any) -> NoReturn:
        raise ProfileError(f"{self.where}: {key}: expected {expected}, received {shown(got)}")

    def unknown(self, table: Mapping[str, Any], allowed: tuple[str, ...], prefix: str) -> None:
        bad = [k for k in table if k not in allowed]
        if bad:
            raise ProfileError(f"{self.where}: unknown key '{prefix}{bad[0]}' (allowed: {', '.join(allowed)})")

    def choices(self, key: str, v: Any, allowed: tuple[str, ...]) -> tuple[str, ...]:
        if isinstance(v, str):
            v = [v]
        if not isinstance(v, list) or not v or not all(isinstance(x, str) for x in v):
            self.fail(key, f"a non-empty list of names from {', '.join(allowed)}", v)
        for x in v:
            if x not in allowed:
                self.fail(key, f"names from {', '.join(allowed)}", x)
        return tuple(dict.fromkeys(v))

    def number(self, key: str, v: Any, kind: str) -> Any:
        """A number within conformance.options.LIMITS[kind] (the command line's limits)."""
        try:
            return check_number(kind, v)
        except OptionError as e:
            raise ProfileError(f"{self.where}: {key}: {e}") from None


def _resolve_spec(spec: str, base: Path, ops: tuple[str, ...] | None, ctx: _Ctx, key: str) -> list[str]:
    """File paths relative to the profile's folder; a module alone expands to module:OP per op."""
    if not isinstance(spec, str) or not spec.strip():
        ctx.fail(key, "a kernel spec (module:attr or path/file.py:attr)", spec)
    if ":" not in spec:
        if not ops:
            ctx.fail(key, "module:attr or path/file.py:attr (a module alone needs the ops key)", spec)
        return [f"{spec}:{op}" for op in ops]
    target, _, attr = spec.rpartition(":")
    if _is_path_target(target):
        t = Path(target)
        if not t.is_absolute():
            t = base / t
        return [f"{t}:{attr}"]
    return [spec]


def _tolerance(ctx: _Ctx, key: str, v: Any) -> tuple[float, float]:
    if isinstance(v, dict):
        ctx.unknown(v, ("atol", "rtol"), f"{key}.")
        if "atol" not in v or "rtol" not in v:
            ctx.fail(key, "a table with both atol and rtol", v)
        a, r = v["atol"], v["rtol"]
    elif isinstance(v, list) and len(v) == 2:
        a, r = v
    else:
        ctx.fail(key, "{ atol = A, rtol = R } or [A, R]", v)
    return ctx.number(f"{key}.atol", a, "atol"), ctx.number(f"{key}.rtol", r, "rtol")


def _tolerances(ctx: _Ctx, v: Any) -> dict[str, dict[str, tuple[float, float]]]:
    if not isinstance(v, dict):
        ctx.fail("tolerances", "a table of output = { atol, rtol } (optionally under an op name)", v)
    out: dict[str, dict[str, tuple[float, float]]] = {}
    for k, val in v.items():
        if k in OPS:
            if not isinstance(val, dict):
                ctx.fail(f"tolerances.{k}", "a table of output = { atol, rtol }", val)
            for name, tol in val.items():
                if name not in OUTPUT_NAMES:
                    ctx.fail(f"tolerances.{k}.{name}", f"an output name from {', '.join(OUTPUT_NAMES)}", name)
                out.setdefault(k, {})[name] = _tolerance(ctx, f"tolerances.{k}.{name}", tol)
        elif k in OUTPUT_NAMES:
            out.setdefault("*", {})[k] = _tolerance(ctx, f"tolerances.{k}", val)
        else:
            raise ProfileError(f"{ctx.where}: unknown key 'tolerances.{k}' (expected an output name from "
                               f"{', '.join(OUTPUT_NAMES)} or an op name from {', '.join(OPS)})")
    return out


def _date(ctx: _Ctx, key: str, v: Any) -> date:
    from datetime import datetime

    if isinstance(v, datetime):
        ctx.fail(key, "a date (YYYY-MM-DD), not a date and time", v.isoformat())
    if isinstance(v, date):
        return v
    if isinstance(v, str):
        try:
            return date.fromisoformat(v)
        except ValueError:
            pass
    ctx.fail(key, "an ISO date YYYY-MM-DD", v)


def _waivers(ctx: _Ctx, v: Any) -> tuple[Waiver, ...]:
    if not isinstance(v, list):
        ctx.fail("waivers", "an array of tables ([[waivers]] with case, reason, expires)", v)
    out = []
    for i, w in enumerate(v):
        key = f"waivers[{i}]"
        if not isinstance(w, dict):
            ctx.fail(key, "a table with case, reason, expires", w)
        ctx.unknown(w, _WAIVER_KEYS, f"{key}.")
        for req in ("case", "reason", "expires"):
            if req not in w:
                raise ProfileError(f"{ctx.where}: {key}: missing key {req!r} (a waiver needs case, reason "
                                   "and expires)")
        case, reason = w["case"], w["reason"]
        if not isinstance(case, str) or not case:
            ctx.fail(f"{key}.case", "a non-empty glob on the case id", case)
        if not isinstance(reason, str) or not reason.strip():
            ctx.fail(f"{key}.reason", "a non-empty string saying why the failure is accepted", reason)
        output = w.get("output")
        if output is not None and output not in OUTPUT_NAMES:
            ctx.fail(f"{key}.output", f"an output name from {', '.join(OUTPUT_NAMES)}", output)
        kernel = w.get("kernel")
        if kernel is not None and (not isinstance(kernel, str) or not kernel):
            ctx.fail(f"{key}.kernel", "a non-empty glob on the kernel's name", kernel)
        out.append(Waiver(index=i, case=case, reason=reason.strip(), expires=_date(ctx, f"{key}.expires",
                                                                                   w["expires"]),
                          output=output, kernel=kernel))
    return tuple(out)


def parse_profile(table: Mapping[str, Any], *, where: str = "profile", base: Path | None = None,
                  path: Path | None = None) -> Profile:
    """Validate a profile table (already parsed from TOML)."""
    ctx = _Ctx(where)
    base = base or Path(".")
    ctx.unknown(table, _TOP_KEYS, "")
    kw: dict[str, Any] = {}
    if "ops" in table:
        kw["ops"] = ctx.choices("ops", table["ops"], OPS)
    if "dtypes" in table:
        kw["dtypes"] = ctx.choices("dtypes", table["dtypes"], _dtypes.FORMATS)
    if "tier" in table:
        if table["tier"] not in TIERS:
            ctx.fail("tier", f"one of {', '.join(TIERS)}", table["tier"])
        kw["tier"] = table["tier"]
    if "seed" in table:
        kw["seed"] = ctx.number("seed", table["seed"], "seed")
    if "workers" in table:
        kw["workers"] = ctx.number("workers", table["workers"], "workers")
    if "timeout" in table:
        kw["timeout"] = ctx.number("timeout", table["timeout"], "timeout")
    if "growth" in table:
        kw["growth"] = ctx.number("growth", table["growth"], "growth")
    if "growth_floor" in table:
        kw["growth_floor"] = ctx.number("growth_floor", table["growth_floor"], "growth_floor")
    if "tolerances" in table:
        kw["tolerances"] = _tolerances(ctx, table["tolerances"])
    if "accept_inconclusive" in table:
        kw["accept_inconclusive"] = ctx.choices("accept_inconclusive", table["accept_inconclusive"], OUTPUT_NAMES)
    if "waivers" in table:
        kw["waivers"] = _waivers(ctx, table["waivers"])
    kernels: list[KernelEntry] = []
    if "kernels" in table:
        ks = table["kernels"]
        if isinstance(ks, str):
            ks = [ks]
        if not isinstance(ks, list) or not ks:
            ctx.fail("kernels", "a non-empty list of kernel specs or tables { spec, dtypes, baseline }", ks)
        for i, k in enumerate(ks):
            key = f"kernels[{i}]"
            dts, bl = None, None
            if isinstance(k, dict):
                ctx.unknown(k, _KERNEL_KEYS, f"{key}.")
                if "spec" not in k:
                    raise ProfileError(f"{where}: {key}: missing key 'spec'")
                spec = k["spec"]
                if "dtypes" in k:
                    dts = ctx.choices(f"{key}.dtypes", k["dtypes"], _dtypes.FORMATS)
                if "baseline" in k:
                    if not isinstance(k["baseline"], str) or not k["baseline"]:
                        ctx.fail(f"{key}.baseline", "a path to a results JSON file", k["baseline"])
                    bl = Path(k["baseline"])
                    bl = bl if bl.is_absolute() else base / bl
            else:
                spec = k
            for s in _resolve_spec(spec, base, kw.get("ops"), ctx, f"{key}" + (".spec" if isinstance(k, dict)
                                                                                 else "")):
                if any(e.spec == s for e in kernels):
                    ctx.fail(key, "each kernel once", s)
                kernels.append(KernelEntry(spec=s, dtypes=dts, baseline=bl))
    kw["kernels"] = tuple(kernels)
    return Profile(path=path, **kw)
