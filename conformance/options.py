"""Run options that every route shares: their defaults and the limits of every number a user gives.

The command line (`refnorm check`, `refnorm gate`), the profile (refnorm.toml / [tool.refnorm])
and the pytest plugin all check numbers here, against one table, so that a value one of them
accepts the others accept too, and a value that would crash the run later (a timeout the
worker pool cannot wait for, a 400-digit factor that overflows a float) is refused at once
with the limit in the message.
"""

from __future__ import annotations

import argparse
import math
import reprlib
from dataclasses import dataclass
from typing import Any, Callable

from .tolerances.bounds import OUTPUTS

__all__ = ["DEFAULTS", "LIMITS", "Limit", "OptionError", "check_number", "parse_number", "number_type",
           "parse_tolerance", "tolerance_type", "parse_shard", "shard_type", "shown", "OUTPUT_NAMES"]

#: Defaults of the run options a profile or the command line may set (tier, seed, workers, timeout).
DEFAULTS: dict[str, Any] = {"tier": "standard", "seed": 0, "workers": 1, "timeout": 120.0}

#: The outputs a tolerance override (or a waiver) may name.
OUTPUT_NAMES = OUTPUTS


class OptionError(ValueError):
    """A value outside its option's limits; the message says what was expected and what was received."""


@dataclass(frozen=True)
class Limit:
    """The values one number may take: low < or <= v < or <= high, an integer or any finite float.

    ``why`` says where the upper limit comes from, for the error message.
    """

    what: str
    integer: bool
    low: float
    high: float
    low_open: bool = False
    high_open: bool = False
    why: str = ""

    def describe(self) -> str:
        lo = f"> {self.low:g}" if self.low_open else f">= {self.low:g}"
        hi = f"< {_num(self.high)}" if self.high_open else f"<= {_num(self.high)}"
        kind = "an integer" if self.integer else "a finite number"
        return f"{self.what}: {kind} {lo} and {hi}" + (f" ({self.why})" if self.why else "")

    def admits(self, v: int | float) -> bool:
        # Python compares int with float exactly, so a 400-digit integer is compared without overflow.
        above = v > self.low if self.low_open else v >= self.low
        below = v < self.high if self.high_open else v <= self.high
        return above and below


def _num(x: float) -> str:
    return "2**63" if x == 2 ** 63 else f"{x:g}"


#: One entry per number a user can give. The upper limits:
#: - timeout: the worker pool waits with poll(2), whose timeout is a C int of milliseconds
#:   (about 24.8 days, POSIX.1-2017 poll()); one day is far below that and above any case's needs.
#: - seed: a signed 64-bit integer, so that results files read back in any JSON library
#:   (RFC 8259 section 6 warns about integers beyond what IEEE doubles or int64 hold).
#: - workers: a process each; more than 256 on one machine is a typo (common practice).
#: - growth: a passing output's budget used is at most 1, so with the default floor of 0.01 no
#:   growth can exceed 100; a factor above 10^6 accepts any change whatever the floor.
#: - growth_floor: budgets of passing outputs are at most 1, so a floor of 1 or more would count
#:   every passing budget as the floor and no growth could ever show.
#: - shards: one CI job each; GitHub Actions runs at most 256 jobs from one matrix (from memory),
#:   and the assignment of cases to shards costs cases x shards hashes.
#: - atol, rtol: far above any meaningful tolerance, low enough that atol + rtol |oracle| stays
#:   finite in float64 (max about 1.8e308, IEEE 754-2019 binary64) for every |oracle| below 1e200.
LIMITS: dict[str, Limit] = {
    "seed": Limit("the seed of the case data", integer=True, low=0, high=2 ** 63, high_open=True,
                  why="a signed 64-bit integer"),
    "workers": Limit("worker processes", integer=True, low=1, high=256),
    "timeout": Limit("seconds per case", integer=False, low=0, high=86400.0, low_open=True, why="one day"),
    "growth": Limit("the allowed growth factor over the baseline", integer=False, low=1, high=1e6,
                    low_open=True),
    "growth_floor": Limit("a fraction of the bound", integer=False, low=0, high=1, high_open=True,
                          why="passing budgets are at most 1"),
    "shards": Limit("the number of shards", integer=True, low=1, high=256,
                    why="one CI job each; a matrix of more is a typo"),
    "evaluations": Limit("kernel evaluations of a search", integer=True, low=1, high=1_000_000,
                         why="each runs the kernel once; a million is days of a slow kernel"),
    "atol": Limit("an absolute tolerance", integer=False, low=0, high=1e100),
    "rtol": Limit("a relative tolerance", integer=False, low=0, high=1e100),
}

_repr = reprlib.Repr()
_repr.maxstring = 60
_repr.maxother = 60
_repr.maxlevel = 3
_repr.maxlist = _repr.maxdict = 4


def shown(v: Any) -> str:
    """A short repr of a received value (deep or long values are cut, so a message stays a line)."""
    if isinstance(v, int) and not isinstance(v, bool) and abs(v) >= 10 ** 30:
        return f"an integer of {len(str(abs(v))) if abs(v) < 10 ** 4000 else 'over 4000'} digits"
    try:
        return _repr.repr(v)
    except (RecursionError, ValueError):
        return f"a {type(v).__name__}"


def check_number(kind: str, v: Any) -> int | float:
    """Check a number already parsed (from TOML, argparse or a caller) against LIMITS[kind].

    Returns an int for integer kinds, a float otherwise. Raises OptionError.
    """
    lim = LIMITS[kind]
    ok = isinstance(v, int) if lim.integer else isinstance(v, (int, float))
    if isinstance(v, bool) or not ok:
        raise OptionError(f"expected {lim.describe()}, received {shown(v)}")
    if isinstance(v, float) and not math.isfinite(v):
        raise OptionError(f"expected {lim.describe()}, received {shown(v)}")
    if not lim.admits(v):
        raise OptionError(f"expected {lim.describe()}, received {shown(v)}")
    return int(v) if lim.integer else float(v)


def parse_number(kind: str, text: str) -> int | float:
    """Parse command-line text as LIMITS[kind] wants it (an integer, or a float) and check it."""
    lim = LIMITS[kind]
    try:
        v: int | float = int(text) if lim.integer else float(text)
    except (ValueError, TypeError):  # ValueError also for an integer beyond Python's 4300-digit limit
        raise OptionError(f"expected {lim.describe()}, received {shown(text)}") from None
    if isinstance(v, float) and not math.isfinite(v) and text.strip().lower().lstrip("+-") not in (
            "inf", "infinity", "nan"):
        raise OptionError(f"expected {lim.describe()}, received {shown(text)} (beyond float64's range)")
    return check_number(kind, v)


def number_type(kind: str) -> Callable[[str], int | float]:
    """An argparse ``type=`` for LIMITS[kind]: a bad value is argparse's usage error (exit 2)."""

    def convert(text: str) -> int | float:
        try:
            return parse_number(kind, text)
        except OptionError as e:
            raise argparse.ArgumentTypeError(str(e)) from None

    convert.__name__ = kind
    return convert


def parse_tolerance(text: str) -> tuple[str, tuple[float, float]]:
    """OUTPUT=ATOL,RTOL with OUTPUT from OUTPUT_NAMES and ATOL, RTOL within LIMITS."""
    name, eq, rest = text.partition("=")
    parts = rest.split(",")
    if not eq or len(parts) != 2:
        raise OptionError(f"expected OUTPUT=ATOL,RTOL (e.g. dx=1e-3,1e-2), received {shown(text)}")
    if name not in OUTPUT_NAMES:
        raise OptionError(f"{shown(name)} is not an output: expected one of {', '.join(OUTPUT_NAMES)}, "
                          f"received {shown(text)}")
    out = []
    for k, t in zip(("atol", "rtol"), parts):
        try:
            out.append(float(parse_number(k, t)))
        except OptionError as e:
            raise OptionError(f"{k} of {shown(text)}: {e}") from None
    return name, (out[0], out[1])


def tolerance_type(text: str) -> tuple[str, tuple[float, float]]:
    """argparse ``type=`` of --tolerance."""
    try:
        return parse_tolerance(text)
    except OptionError as e:
        raise argparse.ArgumentTypeError(str(e)) from None


def parse_shard(text: str) -> tuple[int, int]:
    """K/N: run the K-th of N shards of the selected cases, 1 <= K <= N, N within LIMITS["shards"]."""
    k_text, slash, n_text = str(text).partition("/")
    if not slash:
        raise OptionError(f"expected K/N (shard K of N, e.g. 2/4), received {shown(text)}")
    try:
        n = parse_number("shards", n_text.strip())
    except OptionError as e:
        raise OptionError(f"N of {shown(text)}: {e}") from None
    try:
        k = int(k_text.strip())
    except ValueError:  # also an integer beyond Python's 4300-digit limit
        raise OptionError(f"K of {shown(text)}: expected an integer from 1 to N={n}, received "
                          f"{shown(k_text)}") from None
    if not 1 <= k <= n:
        raise OptionError(f"K of {shown(text)}: expected an integer from 1 to N={n} (shards are counted from 1), "
                          f"received {shown(k)}")
    return int(k), int(n)


def shard_type(text: str) -> tuple[int, int]:
    """argparse ``type=`` of --shard."""
    try:
        return parse_shard(text)
    except OptionError as e:
        raise argparse.ArgumentTypeError(str(e)) from None
