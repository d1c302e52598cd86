"""Drawn values: x from a recipe of distribution parameters written into the case's value kind.

The worst-case search (conformance.search) varies what the catalog's fixed value kinds hold
constant. A recipe is the value kind ``drawn:loc=L,spread=S,tail=T,flat=F,run=R,special=K*C,at=A,s=N``:

    x = loc + spread * z,   z ~ tail (normal: N(0, 1); uniform: U(-sqrt 3, sqrt 3), unit variance;
                                      t2: Student t with 2 degrees of freedom, clipped to +-TAIL_CLIP)

then, in this order: ``run`` > 1 makes runs of ``run`` equal consecutive values (in the logical
C order of x); ``flat`` percent of the normalization groups are made constant (their first value
everywhere: zero variance); ``special`` K*C puts C elements of kind K (nan, inf, ninf, zero, max)
at positions drawn from the stream: anywhere (``at=any``), or at the first or the last element (in C
order) of C normalization groups (``at=first``, ``at=last``), where a kernel's loop starts or ends. ``s`` selects the random stream (with the run's seed and the
case id, Case.seed_for). loc and spread are written as signed powers of two (``-2^10``, ``2^-3``)
or 0, so the id reads back exactly. The value kind is part of the case id like every other field,
so a drawn case's id reproduces its data (docs/search.md).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Recipe", "PREFIX", "TAILS", "SPECIALS", "PLACES", "TAIL_CLIP", "parse_recipe", "drawn_values"]

PREFIX = "drawn:"
TAILS = ("normal", "uniform", "t2")
SPECIALS = ("none", "nan", "inf", "ninf", "zero", "max")
PLACES = ("any", "first", "last")
#: |z| of the t2 tail is clipped here, so that loc and spread alone bound the magnitude of x.
TAIL_CLIP = 64.0


def _pow2(text: str) -> float:
    """'0', '2^k' or '-2^k' (k an integer) as a float, exactly."""
    if text == "0":
        return 0.0
    sign = -1.0 if text.startswith("-") else 1.0
    base, caret, k = text.lstrip("-").partition("^")
    if base != "2" or not caret:
        raise ValueError(f"expected 0, 2^K or -2^K, received {text!r}")
    return sign * 2.0 ** int(k)


def _show_pow2(sign: int, k: int | None) -> str:
    return "0" if k is None else f"{'-' if sign < 0 else ''}2^{k}"


@dataclass(frozen=True)
class Recipe:
    """The parameters of drawn values (see the module docstring). loc_exp None: loc = 0."""

    loc_sign: int = 1
    loc_exp: int | None = None
    spread_exp: int = 0
    tail: str = "normal"
    flat: int = 0          # percent of groups made constant, 0..100
    run: int = 1
    special: str = "none"
    special_count: int = 0
    at: str = "any"
    stream: int = 0

    def __post_init__(self) -> None:
        if self.tail not in TAILS:
            raise ValueError(f"tail must be one of {', '.join(TAILS)}, received {self.tail!r}")
        if self.at not in PLACES:
            raise ValueError(f"at must be one of {', '.join(PLACES)}, received {self.at!r}")
        if self.special not in SPECIALS:
            raise ValueError(f"special must be one of {', '.join(SPECIALS)}, received {self.special!r}")
        if not 0 <= self.flat <= 100 or self.run < 1 or self.special_count < 0 or self.stream < 0:
            raise ValueError(f"recipe out of range: flat={self.flat} (0..100), run={self.run} (>= 1), "
                             f"special count {self.special_count} (>= 0), s={self.stream} (>= 0)")

    @property
    def loc(self) -> float:
        return 0.0 if self.loc_exp is None else self.loc_sign * 2.0 ** self.loc_exp

    @property
    def spread(self) -> float:
        return 2.0 ** self.spread_exp

    @property
    def kind(self) -> str:
        """The value kind that names this recipe in a case id."""
        sp = "none" if self.special == "none" or not self.special_count else f"{self.special}*{self.special_count}"
        return (f"{PREFIX}loc={_show_pow2(self.loc_sign, self.loc_exp)},spread=2^{self.spread_exp},tail={self.tail},"
                f"flat={self.flat},run={self.run},special={sp},at={self.at},s={self.stream}")


def parse_recipe(kind: str) -> Recipe:
    """The Recipe of a value kind ``drawn:...``; raises ValueError naming what is wrong."""
    if not kind.startswith(PREFIX):
        raise ValueError(f"a drawn value kind starts with {PREFIX!r}, received {kind[:80]!r}")
    fields = dict(p.partition("=")[::2] for p in kind[len(PREFIX):].split(","))
    want = ("loc", "spread", "tail", "flat", "run", "special", "at", "s")
    if sorted(fields) != sorted(want):
        raise ValueError(f"a drawn value kind has the fields {', '.join(want)}, received {kind[:200]!r}")
    loc = _pow2(fields["loc"])
    spread = _pow2(fields["spread"])
    if spread <= 0:
        raise ValueError(f"spread must be 2^K, received {fields['spread']!r}")
    special, _, count = fields["special"].partition("*")
    r = Recipe(loc_sign=-1 if loc < 0 else 1, loc_exp=None if loc == 0 else int(np.log2(abs(loc))),
               spread_exp=int(np.log2(spread)), tail=fields["tail"], flat=int(fields["flat"]), run=int(fields["run"]),
               special=special, special_count=int(count or 0), at=fields["at"], stream=int(fields["s"]))
    if r.kind != kind:
        raise ValueError(f"drawn value kind {kind[:200]!r} is not in its canonical form {r.kind!r}")
    return r


def drawn_values(kind: str, shape: tuple[int, ...], group_index: np.ndarray, big: float,
                 rng: np.random.Generator) -> np.ndarray:
    """float64 x of ``shape`` from the recipe ``kind``; ``group_index`` maps each element to its
    normalization statistic; ``big`` is the storage format's largest finite value (special "max")."""
    r = parse_recipe(kind)
    n = int(np.prod(shape))
    m = -(-n // r.run)  # one draw per run
    if r.tail == "normal":
        z = rng.standard_normal(m)
    elif r.tail == "uniform":
        z = rng.uniform(-np.sqrt(3.0), np.sqrt(3.0), size=m)
    else:
        z = np.clip(rng.standard_t(2.0, size=m), -TAIL_CLIP, TAIL_CLIP)
    x = (r.loc + r.spread * np.repeat(z, r.run)[:n]).reshape(shape)
    if r.flat:
        gi = group_index.reshape(-1)
        groups = int(gi.max()) + 1
        chosen = rng.random(groups) < r.flat / 100.0
        flat = x.reshape(-1)
        first = np.full(groups, np.nan)
        order = np.arange(n)[::-1]  # the first element of each group wins the assignment below
        first[gi[order]] = flat[order]
        x = np.where(chosen[gi], first[gi], flat).reshape(shape)
    if r.special != "none" and r.special_count:
        value = {"nan": np.nan, "inf": np.inf, "ninf": -np.inf, "zero": 0.0, "max": big}[r.special]
        if r.at == "any":
            pos = rng.choice(n, size=min(r.special_count, n), replace=False)
        else:  # the first (last) element in C order of special_count groups
            gi = group_index.reshape(-1)
            ends = np.unique(gi if r.at == "first" else gi[::-1], return_index=True)[1]
            ends = ends if r.at == "first" else n - 1 - ends
            pos = rng.choice(ends, size=min(r.special_count, ends.size), replace=False)
        x = x.copy()
        x.reshape(-1)[pos] = value
    return x
