"""Per-output error bounds of a correct kernel, propagated to first order from the statistics.

Symbols (per element, with the statistics of its group; docs/tolerances.md derives each line):
u_s, u_p, u_a unit roundoffs of the storage, params and accumulation formats; u_o that of the
output's own arithmetic (Precision.accumulate_for(output)); gamma_n, gamma_m the
declared summation model's constants for the forward length n and the parameter-gradient
length m; r, mu, v the float64 statistics, B_mu, dr = |r^ - r|, dbeta their error bounds
(stats.py); g = dy w, m1 = mean(g), m2 = mean(g xhat), gc = g - m1 (g for RMS norm);
eta_f = half the smallest subnormal of format f (rounding in the subnormal range).

    y        |w| (r+dr) B_mu + |w| |x-mu| dr + u_o (3 |w| (r+dr) (|x| + |mu| + |x-mu|) + |b| + 2|y|)
             (training: covers the centred and the folded form alike)
    y eval   |w| (r+dr) B_mu + |w| |x-mu| dr + u_o (3 |w| (r+dr) (|x-mu| + B_mu) + |b| + 2|y|) + u_cv |w| (r+dr) |x|
             centred (Conventions.y_form); folded adds u_o 3 |w| (r+dr) (|x| + |mu|)
    dx       dr (|gc| + 2 (beta/r) |xhat m2|) + dbeta |xhat m2| + beta r B_mu (|m2| + |xhat| |m1|)
             + beta r^2 B_mu^2 |m1| + r dm1 + beta r |x-mu| dm2 + u_o (3 r (|g| + |m1|) + 3 beta r |x-mu| |m2| + 2 |dx|),
             dm1 = (gamma_n + 2u_o) mean|g| + u_o |m1|,  dm2 = (gamma_n + 4u_o) mean|g xhat| + u_o |m2|
    dx eval  |g| dr + 2 u_o r |g|
    dweight  sum_g (dr |sum_gm dy (x-mu)| + (r+dr) B_mu |sum_gm dy|) + (gamma_m + u_o + 2u_a) sum_m |dy xhat|
             + u_o |dweight|   (sum_gm: the elements of group g in the parameter's sum)
    dbias    gamma_m sum_m |dy| + u_o |dbias|
    running  |c_s| B_s + 3 u_o (|running| + |s|) + u_o |new|  for new = c_r running + c_s s

and every output gets its final rounding: value (1 + u_f) + u_f |output| + eta_f, with f the
storage format for y and dx, the saved format (Precision.saved) for saved statistics, the params
format for the others. With Precision.subnormals = "flush", eta_f is f's smallest normal value
(a result below it may be flushed to zero) and inputs below the smallest normal value are read
as zero, an input error d = |input| that propagates like any other (_Context.flushed, stats.py).
Statistics rounded before use (Precision.statistics) widen B_mu and dr (stats.StatModel.rounded);
a per-output summation model (Precision.output_summation) replaces gamma for that output's sums.
Where a result may lie outside its output format's range, or a NaN mean is a correct kernel's
(a group holding +-Inf), the Bound carries accepted alternatives (bound.Accept, ranges.py).
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np

from .. import blockwise, dtypes, ops
from ..cases.model import Case
from ..kernel import Conventions, Precision
from . import ranges
from .bound import Accept, Bound
from .grouping import Grouping, grouping
from .stats import ELEM, StatModel, batch_stats, eta, fixed_stats
from .summation import capped, gamma

__all__ = ["derive_bounds", "finish_bound", "output_dtype", "OUTPUTS", "STAT_OUTPUTS"]

STAT_OUTPUTS = ("mean", "rstd", "var", "var_unbiased", "std")
OUTPUTS = ("y", "h") + STAT_OUTPUTS + ("running_mean", "running_var", "dx", "dweight", "dbias")
_INPUTS = ("x", "dy", "weight", "bias", "running_mean", "running_var")


def output_dtype(output: str, precision: Precision) -> str:
    """The format an output is stored in: storage for y, h and dx, params for statistics and parameter gradients."""
    if output not in OUTPUTS:
        raise ValueError(f"output is {output!r}, expected one of {', '.join(OUTPUTS)}")
    p = precision.resolved()
    if output in ("y", "h", "dx"):
        return p.storage
    return p.saved if output in STAT_OUTPUTS else p.params


_STATS_TXT = ("B_mu = (gamma_n + u_cv) mean|x| + 2 u_a |mu|; v^ in [v - B_v-, v + B_v+], "
              "B_v- = (gamma_n + 4u_a) v + W, B_v+ = (gamma_n + 4u_a)(v + B_mu^2) + B_mu^2 + W, "
              "W = {w}; dr from v^'s interval through {r} with (1+-u_a) on + eps and (1+-{e:g}u_a) "
              "on each root or reciprocal")
_STATS_RMS = ("v = mean(x^2), v^ within (gamma_n + 3u_a) v; dr from v^'s interval through {r} with "
              "(1+-u_a) on + eps and (1+-{e:g}u_a) on each root or reciprocal")
_STATS_EVAL = ("mu, v = running_mean, running_var (exact inputs), B_mu = 0; dr from {r} with "
               "(1+-u_a) on + eps and (1+-{e:g}u_a) on each root or reciprocal")


class _Context:
    """Everything the per-output bounds share for one case."""

    def __init__(self, case: Case, precision: Precision, conventions: Conventions,
                 inputs64: dict[str, np.ndarray | None],
                 input_errors: dict[str, np.ndarray] | None = None):
        self.case = case
        self.p = precision.resolved()
        self.conv = conventions
        self.grp: Grouping = grouping(case)
        self.u_s = dtypes.unit_roundoff(self.p.storage)
        self.u_p = dtypes.unit_roundoff(self.p.params)
        self.u_a = dtypes.unit_roundoff(self.p.accumulate)
        self.flush = self.p.subnormals == "flush"
        self.eta_s = self.floor(self.p.storage)
        self.eta_p = self.floor(self.p.params)
        self.eta_a = self.floor(self.p.accumulate)
        self.u_st = dtypes.unit_roundoff(self.p.statistics)
        self.eta_st = self.floor(self.p.statistics)
        self.u_sv = dtypes.unit_roundoff(self.p.saved)
        self.eta_sv = self.floor(self.p.saved)
        self.model = self.p.summation
        self.lam = float(self.p.lam)
        self.spec = ops.get(case.op)
        self.center = self.spec.centered
        self.train = case.mode == "train" or not self.spec.has_eval
        self.eps = float(case.eps)
        self.placement = conventions.eps_placement
        self.inp = inputs64
        self.xv = self.grp.view(self._need("x", case.shape))
        self.w = self._param("weight")
        self.b = self._param("bias")
        self._stats: dict[tuple[float, str], StatModel] = {}
        self._cache: dict[str, np.ndarray | float] = {}  # flushed inputs by name, and the range used
        self.accepts: dict[str, tuple[Accept, ...]] = {}
        # Declared input errors (a residual add's rounding, a weight offset's): |input^ - input| elementwise,
        # propagated as a flushed input's is; x and dy in the view, weight and bias as parameters.
        self.errs = {k: (self.grp.view(np.asarray(v, np.float64)) if k in ("x", "dy") else self.grp.param_in(
            np.asarray(v, np.float64))) for k, v in (input_errors or {}).items() if v is not None}
        self.perturbed = self.flush or bool(self.errs)

    def floor(self, fmt: str) -> float:
        """The absolute error of one rounding into ``fmt`` near zero: half its smallest subnormal
        (gradual underflow, IEEE 754-2019 §3.3), or its smallest normal value when subnormals are
        flushed (a result below it may become zero)."""
        return float(dtypes.finfo(fmt).smallest_normal) if self.flush else eta(fmt)

    def flushed(self, name: str) -> np.ndarray | float:
        """|input| where a kernel that flushes subnormals reads the input as zero (below the smallest
        normal value of its own format or of the accumulation format), else 0; 0.0 when subnormals
        are kept (the view's shape for x and dy, the parameters' for weight and bias)."""
        extra = self.errs.get(name)
        if not self.flush:
            return 0.0 if extra is None else extra
        if name not in self._cache:
            fmt = self.p.storage if name in ("x", "dy") else self.p.params
            thr = max(float(dtypes.finfo(fmt).smallest_normal), float(dtypes.finfo(self.p.accumulate).smallest_normal))
            a = {"x": lambda: self.xv, "dy": self.dyv, "weight": lambda: self.w, "bias": lambda: self.b}[name]()
            if a is None:
                self._cache[name] = 0.0
            else:
                aa = np.abs(a)
                self._cache[name] = np.where(np.isfinite(aa) & (aa < thr), aa, 0.0)
        return self._cache[name] if extra is None else self._cache[name] + extra

    def model_for(self, output: str) -> str:
        return self.p.summation_for(output)

    def range_used(self) -> float:
        """max over statistics of max(sum |x|, sum (x - mu)^2) / the accumulation format's largest value
        (ranges.py): above 1 the data is beyond what a correct kernel of this precision must handle."""
        if "range" not in self._cache:
            # From the statistics already computed: S_1 = n mean|x|, S_2 = n v (v the mean square for RMS).
            st = self.stats()
            with np.errstate(invalid="ignore", over="ignore"):
                used = np.fmax(st.n * st.A, st.n * st.v) / float(dtypes.finfo(self.p.accumulate).max)
            used = np.where(np.isfinite(st.v) & np.isfinite(st.A), used, np.nan)
            self._cache["range"] = float(np.nanmax(used)) if np.isfinite(used).any() else 0.0
        return float(self._cache["range"])

    # ------------------------------------------------------------- inputs
    def _need(self, name: str, shape: tuple[int, ...]) -> np.ndarray:
        a = self.inp.get(name)
        if a is None:
            raise ValueError(f"inputs64[{name!r}] is None, expected a float64 array of shape {shape} "
                             f"for case {self.case.id}")
        a = np.asarray(a)
        if a.shape != tuple(shape):
            raise ValueError(f"inputs64[{name!r}] has shape {a.shape}, expected {tuple(shape)} "
                             f"(the logical layout of case {self.case.id})")
        return a.astype(np.float64, copy=False)

    def _param(self, name: str) -> np.ndarray | None:
        a = self.inp.get(name)
        if a is None:
            return None
        return self.grp.param_in(self._need(name, self.grp.param_shape))

    def dyv(self) -> np.ndarray:
        return self.grp.view(self._need("dy", self.case.shape))

    def w_abs(self):
        return 1.0 if self.w is None else np.abs(self.w)

    def b_abs(self):
        return 0.0 if self.b is None else np.abs(self.b)

    def u_out(self, name: str) -> float:
        """Unit roundoff of an output's own arithmetic: Precision.accumulate_for(name)."""
        return dtypes.unit_roundoff(self.p.accumulate_for(name))

    # ------------------------------------------------------------- statistics
    def stats(self, u: float | None = None, model: str | None = None) -> StatModel:
        """The statistics' model with sums in unit roundoff u under summation ``model``, rounded to the
        statistics format where the kernel declares one (Precision.statistics)."""
        u = self.u_a if u is None else u
        model = model or self.model
        key = (u, model)
        if key not in self._stats:
            if self.train:
                u_cv = u if u > self.u_s else 0.0
                eta_a = max(self.eta_a, self._floor_for(u))
                fl = self.flushed("x")
                st = batch_stats(self.xv, self.grp, center=self.center, eps=self.eps, placement=self.placement,
                                 u=u, model=model, lam=self.lam, u_cv=u_cv, eta_a=eta_a,
                                 flushed=None if np.isscalar(fl) else fl)
            else:
                c = self.grp.param_shape
                rm = self.grp.param_in(self._need("running_mean", c))
                rv = self.grp.param_in(self._need("running_var", c))
                st = fixed_stats(rm, rv, eps=self.eps, placement=self.placement, u=u,
                                 u_cv=u if u > self.u_p else 0.0)
            if self.u_st > u:
                st = st.rounded(self.u_st, self.eta_st)
            self._stats[key] = st
        return self._stats[key]

    def _floor_for(self, u: float) -> float:
        for name in dtypes.FORMATS:
            if dtypes.unit_roundoff(name) == u:
                return self.floor(name)
        return 0.0

    def backward_stats(self) -> StatModel:
        """The statistics a backward pass uses: its own, or the forward's saved ones in the saved format."""
        st = self.stats()
        saved = set(self.conv.saved) if self.train else set()
        if saved:
            st = st.widened(self.u_sv, self.eta_sv, mean="mean" in saved, disp=bool(saved - {"mean"}))
        return st

    def r_text(self) -> str:
        return "r = 1/sqrt(v + eps)" if self.placement == "inside" else "r = 1/(sqrt(v) + eps)"

    def gamma_text(self, k: str = "n", model: str | None = None) -> str:
        """The declared summation model's gamma for a sum of ``k`` terms, in words."""
        model = model or self.model
        words = {"probabilistic": f"exp(lam sqrt({k}) u + {k} u^2/(1-u)) - 1 (probabilistic, lam = {self.lam:g})",
                 "pairwise": f"j u/(1 - j u), j = ceil(log2 {k}) (pairwise)",
                 "worst": f"{k} u/(1 - {k} u) (worst case)"}[model]
        return f"gamma_{k} = min({k} u/(1 - {k} u), {words})"

    def stats_text(self, st: StatModel, model: str | None = None) -> str:
        model = model or self.model
        extra = ""
        if self.u_st > st.u:
            extra += (f"; statistics rounded to {self.p.statistics} before use: B_mu + u_st |mu|, v^ twice, "
                      "r^ once more (u_st)")
        if self.flush:
            extra += "; subnormals flushed: inputs below the smallest normal value read as 0, eta_f = smallest normal"
        if not self.train:
            return _STATS_EVAL.format(r=self.r_text(), e=ELEM) + extra
        if not self.center:
            return _STATS_RMS.format(r=self.r_text(), e=ELEM) + "; " + self.gamma_text(model=model) + extra
        w = ("min(2 gamma_worst(n) |mu| mean|x-mu|, lam u_a |mu| sqrt(v))" if model == "probabilistic"
             else "2 gamma_n |mu| mean|x-mu|")
        return _STATS_TXT.format(w=w, r=self.r_text(), e=ELEM) + "; " + self.gamma_text(model=model) + extra

    # ------------------------------------------------------------- reporting
    def worst_group(self, st: StatModel) -> tuple[int, ...] | None:
        """Index (keepdims) of the worst-conditioned statistic: largest kappa, else largest dr/r."""
        ok = np.isfinite(st.mu) & np.isfinite(st.v) & np.isfinite(st.r) & (st.r > 0)
        if not ok.any():
            return None
        with np.errstate(invalid="ignore", divide="ignore"):
            key = st.kappa if (self.center and self.train) else st.dr / st.r
        key = np.where(ok & ~np.isnan(key), key, -1.0)
        return np.unravel_index(int(np.argmax(key)), key.shape)

    def terms(self, st: StatModel, u_o: float, **extra: float) -> dict[str, float]:
        t: dict[str, float] = {
            "u_s": self.u_s, "u_p": self.u_p, "u_a": self.u_a, "u_o": u_o,
            "n": float(st.n if self.train else self.grp.n), "gamma_n": st.gamma, "lam": self.lam,
            "eps": self.eps,
        }
        gi = self.worst_group(st)
        if gi is not None:
            # Reduced dims have length 1, so the keepdims order is the public statistic order.
            flat = int(np.ravel_multi_index(gi, st.v.shape))
            with np.errstate(invalid="ignore", divide="ignore"):
                t.update({
                    "statistic": float(flat),
                    "kappa": float(np.broadcast_to(st.kappa, st.v.shape)[gi]),
                    "mean": float(np.broadcast_to(st.mu, st.v.shape)[gi]),
                    "var": float(st.v[gi]),
                    "rstd": float(st.r[gi]),
                    "mean_abs_x": float(np.broadcast_to(st.A, st.v.shape)[gi]),
                    "B_mu": float(np.broadcast_to(st.b_mu, st.v.shape)[gi]),
                    "B_var": float(np.broadcast_to(st.b_var, st.v.shape)[gi]),
                    "W": float(np.broadcast_to(st.w_term, st.v.shape)[gi]),
                    "dr_over_r": float(st.dr[gi] / st.r[gi]),
                })
        t["vacuous_groups"] = float(np.count_nonzero(st.vacuous & np.isfinite(st.v)))
        if self.train:
            t["range_used"] = self.range_used()
        t.update({k: float(v) for k, v in extra.items()})
        return t


def _finite_max(a: np.ndarray) -> float:
    f = a[np.isfinite(a)]
    return float(f.max()) if f.size else math.nan


def _final(pre: np.ndarray, value: np.ndarray, u_f: float, eta_f: float, out: np.ndarray | None = None) -> np.ndarray:
    """Rounding to the output format: the pre-rounding bound grows by u_f and the value adds u_f |value| + eta_f."""
    return np.add(pre * (1.0 + u_f) + u_f * np.abs(value), eta_f, out=out)


# ----------------------------------------------------------------- forward
def _y(ctx: _Context, expected: np.ndarray):
    model = ctx.model_for("y")
    st = ctx.stats(model=model)
    u_o = ctx.u_out("y")
    grp = ctx.grp
    train, perturbed, folded = ctx.train, ctx.perturbed, ctx.conv.y_form == "folded"
    u_s, eta_s, eta_a = ctx.u_s, ctx.eta_s, ctx.eta_a
    u_cv = u_o if u_o > ctx.u_s else 0.0  # x converted to an accumulation format narrower than storage

    def formula(out, e, x, mu, r, dr, b_mu, w, b, fx, fw, fb):
        y = np.abs(e)
        r_up = r + dr
        d = np.abs(x - mu)
        fl = (w * r_up * fx + r_up * d * fw + fb
              if perturbed else 0.0)  # inputs read as zero: x moves by |x|, weight by |w|, bias by |b|
        if train:
            # The mean's own error B_mu >= 2 u_a |mu| + gamma_n mean|x| is of the size of the folded form's
            # roundings, so training keeps one bound for both forms.
            pre = (w * r_up * b_mu + w * d * dr
                   + u_o * (3.0 * w * r_up * (np.abs(x) + np.abs(mu) + d) + b + 2.0 * y) + 4.0 * eta_a) + fl
            return _final(pre, y, u_s, eta_s, out=out)
        common = w * r_up * b_mu + w * d * dr + u_o * (b + 2.0 * y) + 4.0 * eta_a + fl
        centred = common + u_o * 3.0 * w * r_up * (d + b_mu) + u_cv * w * r_up * np.abs(x)
        fold = (common + u_o * 3.0 * w * r_up * (np.abs(x) + np.abs(mu) + d)
                + u_cv * w * r_up * np.abs(x))
        fin = np.isfinite(fold) & np.isfinite(centred) & (centred > 0)
        ratio = float(np.max(fold[fin] / centred[fin])) if fin.any() else None
        return _final(fold if folded else centred, y, u_s, eta_s, out=out), ratio

    with np.errstate(invalid="ignore", over="ignore"):
        flushed = [ctx.flushed(k) for k in ("x", "weight", "bias")] if perturbed else [0.0, 0.0, 0.0]
        vals, ratios = blockwise.evaluate(
            grp.view_shape, formula, e=grp.view(expected), x=ctx.xv, mu=st.mu, r=st.r, dr=st.dr, b_mu=st.b_mu,
            w=ctx.w_abs(), b=ctx.b_abs(), fx=flushed[0], fw=flushed[1], fb=flushed[2])
    if train:
        f_form, ratio = "", None
    else:
        ratio = max((q for q in ratios if q is not None), default=1.0)
        if folded:
            f_form = (f" [folded form x scale + shift declared: its roundings of |x| scale and |mu| scale "
                      f"allow up to {ratio:.3g} times the centred form's bound here; large where |mean| is "
                      "large against |x - mean|]")
        else:
            f_form = (f" [centred form (x - mean) scale + b; a kernel that folds it into x scale + shift "
                      f"declares y_form='folded' and may err {ratio:.3g} times more here]")
    if not ctx.center:
        f = "|w| |x| dr + u_o (3 |w| (r+dr) 2|x| + |b| + 2|y|) + final u_s |y|"
    elif ctx.train:
        f = ("|w| (r+dr) B_mu + |w| |x-mu| dr + u_o (3 |w| (r+dr) (|x| + |mu| + |x-mu|) + |b| + 2|y|)"
             " + final u_s |y|")
    elif ctx.conv.y_form == "folded":
        f = ("|w| (r+dr) B_mu + |w| |x-mu| dr + u_o (3 |w| (r+dr) (|x| + |mu| + |x-mu|) + |b| + 2|y|)"
             " + u_cv |w| (r+dr) |x| + final u_s |y|")
    else:
        f = ("|w| (r+dr) B_mu + |w| |x-mu| dr + u_o (3 |w| (r+dr) (|x-mu| + B_mu) + |b| + 2|y|)"
             " + u_cv |w| (r+dr) |x| + final u_s |y|")
    if ctx.perturbed:
        f += " + |w| (r+dr) |x flushed| + (r+dr) |x-mu| |w flushed| + |b flushed|"
    extra = {} if ratio is None else {"folded_over_centred": ratio}
    return grp.unview(vals), f + f_form + "; " + ctx.stats_text(st, model), ctx.terms(st, u_o, **extra)


def _stat_output(name: str):
    def build(ctx: _Context, expected: np.ndarray):
        if not ctx.train:
            raise ValueError(f"output {name!r} is a saved batch statistic; case {ctx.case.id} is in eval mode")
        if name == "mean" and not ctx.center:
            raise ValueError(f"output 'mean' is not defined for {ctx.case.op} (no centering)")
        u_o = ctx.u_out(name)
        model = ctx.model_for(name)
        st = ctx.stats(u_o, model)
        n = st.n
        up, ep = ctx.u_sv, ctx.eta_sv  # saved statistics are returned in the saved format
        u_f = "u_p" if ctx.p.saved == ctx.p.params else "u_sv"
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            if name == "mean":
                vals = _final(st.b_mu, st.mu, up, ep)
                f = f"B_mu + final {u_f} |mean|"
                ctx.accepts[name] = _inf_group_mean(ctx, st, expected)
            elif name == "rstd":
                vals = _final(st.dr, st.r, up, ep)
                f = f"dr + final {u_f} r"
            elif name == "var":
                vals = _final(st.b_var, st.v, up, ep)
                f = f"max(B_v-, B_v+) + final {u_f} v"
            elif name == "var_unbiased":
                c = n / (n - 1) if n > 1 else math.nan
                vals = _final(c * st.b_var + 2.0 * u_o * c * st.v, c * st.v, up, ep)
                f = f"n/(n-1) (max(B_v-, B_v+) + 2 u_o v) + final {u_f} n v/(n-1)"
            else:  # std = sqrt(v + eps) or sqrt(v) + eps: 1/rstd
                e = ELEM * u_o
                v_lo = np.maximum(st.v - st.v_dn, 0.0)
                v_hi = st.v + st.v_up
                if ctx.placement == "inside":
                    s = np.sqrt(st.v + ctx.eps)
                    s_lo = np.sqrt((v_lo + ctx.eps) * (1 - u_o)) * (1 - e)
                    s_hi = np.sqrt((v_hi + ctx.eps) * (1 + u_o)) * (1 + e)
                    f = f"|sqrt(v^ + eps) - sqrt(v + eps)| over v^'s interval + final {u_f} std"
                else:
                    s = np.sqrt(st.v) + ctx.eps
                    s_lo = (np.sqrt(v_lo) * (1 - e) + ctx.eps) * (1 - u_o)
                    s_hi = (np.sqrt(v_hi) * (1 + e) + ctx.eps) * (1 + u_o)
                    f = f"|sqrt(v^) - sqrt(v)| + eps rounding over v^'s interval + final {u_f} std"
                vals = _final(np.maximum(s_hi - s, s - s_lo), s, up, ep)
        if u_f == "u_sv":
            f += f" (u_sv: the saved format {ctx.p.saved})"
        return ctx.grp.stat_out(vals), f + "; " + ctx.stats_text(st, model), ctx.terms(st, u_o)

    return build


_INF_GROUP = ("a group holding +-Inf: a kernel that merges partial results (Welford or Chan updates) gives "
              "NaN (Inf - Inf) for its mean where two passes give +-Inf, and every normalized output of "
              "the group is NaN either way")


def _inf_group_mean(ctx: _Context, st: StatModel, expected: np.ndarray) -> tuple[Accept, ...]:
    """NaN accepted for a mean that is +-Inf where the group's variance, so every y of the group, is NaN."""
    e = np.asarray(expected, dtype=np.float64)
    nan_v = ctx.grp.stat_out(np.broadcast_to(np.isnan(st.v), st.v.shape))
    mask = np.isinf(e) & nan_v
    return (Accept(mask, np.full(e.shape, np.nan), _INF_GROUP),) if mask.any() else ()


def _running(name: str):
    def build(ctx: _Context, expected: np.ndarray):
        case, conv, grp = ctx.case, ctx.conv, ctx.grp
        if not ctx.spec.has_eval or not ctx.train:
            raise ValueError(f"output {name!r} needs a training-mode {' or '.join(ops.with_eval())} case, "
                             f"received {case.id}")
        u_o = ctx.u_out(name)
        model = ctx.model_for(name)
        st = ctx.stats(u_o, model)
        n = st.n
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            if name == "running_mean":
                s, bs = st.mu, st.b_mu
            elif conv.running_var_estimator == "unbiased":
                c = n / (n - 1) if n > 1 else math.nan
                s, bs = c * st.v, c * st.b_var + 2.0 * u_o * c * st.v
            else:
                s, bs = st.v, st.b_var
            s = np.broadcast_to(s, st.v.shape)
            bs = np.broadcast_to(bs, st.v.shape)
            if ctx.spec.running_from_samples:
                # Per-channel average over the N instances (axis 0 of the view).
                nb = st.v.shape[0]
                s_avg = np.mean(s, axis=0, keepdims=True)
                bs = (np.mean(bs, axis=0, keepdims=True)
                      + capped(gamma(nb, u_o, model, ctx.lam)) * np.mean(np.abs(s), axis=0, keepdims=True)
                      + u_o * np.abs(s_avg))
                s = s_avg
            run = grp.param_in(ctx._need(name, grp.param_shape))
            new = grp.param_in(np.asarray(expected))
            if case.momentum is None:
                k = int(case.batches_seen)
                c_s = 1.0 / (k + 1)
                f_c = "c_s = 1/(batches_seen + 1)"
            else:
                mom = float(case.momentum)
                c_s = mom if conv.momentum_convention == "new" else 1.0 - mom
                f_c = "c_s = momentum" if conv.momentum_convention == "new" else "c_s = 1 - momentum"
            pre = abs(c_s) * bs + 3.0 * u_o * (np.abs(run) + np.abs(s)) + u_o * np.abs(new)
            vals = _final(pre, new, ctx.u_p, ctx.eta_p)
            if name == "running_mean":
                # The running mean of a channel whose batch mean is +-Inf: NaN from a merging kernel.
                nan_v = np.isnan(st.v)
                if ctx.spec.running_from_samples:
                    nan_v = np.any(nan_v, axis=0, keepdims=True)
                mask = grp.param_out(np.isinf(new) & np.broadcast_to(nan_v, np.broadcast_shapes(nan_v.shape,
                                                                                             np.shape(new))))
                if mask.any():
                    ctx.accepts[name] = (Accept(mask, np.full(mask.shape, np.nan), _INF_GROUP),)
        what = "B_mu" if name == "running_mean" else (
            "n/(n-1) (max(B_v-, B_v+) + 2 u_o v)" if conv.running_var_estimator == "unbiased" else "max(B_v-, B_v+)")
        if ctx.spec.running_from_samples:
            what = f"mean over N of {what} + gamma_N mean|s| + u_o |s|"
        f = (f"|c_s| B_s + 3 u_o (|running| + |s|) + u_o |new| + final u_p |new|, B_s = {what}, {f_c}; "
             + ctx.stats_text(st, model))
        return grp.param_out(vals), f, ctx.terms(st, u_o, momentum_weight=c_s)

    return build


# ----------------------------------------------------------------- backward
def _dx(ctx: _Context, expected: np.ndarray):
    grp = ctx.grp
    st = ctx.backward_stats() if ctx.train else ctx.stats()
    u_o = ctx.u_out("dx")
    dy = ctx.dyv()
    g = dy if ctx.w is None else dy * ctx.w
    dr = st.dr
    r_up = st.r + dr
    model = ctx.model_for("dx")
    # Inputs a flushing kernel reads as zero: g = dy w moves by |w| d_dy + |dy| d_w (0 when kept).
    dg = ctx.w_abs() * ctx.flushed("dy") + np.abs(dy) * ctx.flushed("weight") if ctx.perturbed else 0.0
    fl_txt = " + flushed inputs' terms" if ctx.perturbed else ""
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        if not ctx.train:
            dx = np.abs(grp.view(expected))
            pre = np.abs(g) * dr + 2.0 * u_o * r_up * np.abs(g) + 2.0 * ctx.eta_a + r_up * dg
            vals = _final(pre, dx, ctx.u_s, ctx.eta_s)
            f = "|g| dr + 2 u_o (r+dr) |g| + final u_s |dx|, g = dy w" + fl_txt + "; " + ctx.stats_text(st)
            return grp.unview(vals), f, ctx.terms(st, u_o)
        gam = capped(gamma(grp.n, u_o, model, ctx.lam))
        xc = ctx.xv - st.mu
        xhat = xc * st.r
        gxh = g * xhat
        m1 = grp.gmean(g) if ctx.center else np.zeros_like(st.v)
        m2 = grp.gmean(gxh)
        ag = grp.gmean(np.abs(g))
        agx = grp.gmean(np.abs(gxh))
        del gxh
        dm1 = (gam + 2.0 * u_o) * ag + u_o * np.abs(m1)
        dm2 = (gam + 4.0 * u_o) * agx + u_o * np.abs(m2)
        beta_up = st.beta + st.dbeta
        center, perturbed, u_s, eta_s, eta_a = ctx.center, ctx.perturbed, ctx.u_s, ctx.eta_s, ctx.eta_a
        fx = ctx.flushed("x") if perturbed else 0.0
        # x read as zero moves xhat by r |x| (and m2 with it); g moves by dg (and m1, m2 with it).
        dm2_f = r_up * grp.gmean(np.abs(g) * fx) + grp.gmean(dg * np.abs(xhat)) if perturbed else 0.0
        mdg = grp.gmean(dg) if perturbed and center else 0.0

        def formula(out, e, g, xc, xhat, dr, r, r_up, beta_up, dbeta, b_mu, m1, m2, dm1, dm2, fx, dg, dm2_f, mdg):
            dx = np.abs(e)
            d = np.abs(xc)
            xm2 = np.abs(xhat * m2)
            pre = dr * (np.abs(g - m1) + 2.0 * (beta_up / r) * xm2) + dbeta * xm2 + beta_up * r_up * d * dm2
            if center:
                pre = pre + beta_up * r_up * b_mu * (np.abs(m2) + np.abs(xhat) * np.abs(m1)) + r_up * dm1
                # Second order in the mean's error d: xhat moves by r d and m2 by -r d m1, so xhat m2 moves by
                # r d m2 - r d xhat m1 - r^2 d^2 m1; the last term matters where r B_mu is not small (data of
                # kappa ~ 64 whose saved mean is rounded to bfloat16: r B_mu ~ 0.3).
                # (r B_mu clamped at 1e100 inside the square: beyond it gamma is GAMMA_CAP-sized, "no bound",
                # and the first-order terms already carry that; the clamp keeps the square finite.)
                rb = np.minimum(r_up * b_mu, 1e100)
                pre = pre + beta_up * rb * rb * np.abs(m1)
            pre = pre + u_o * (3.0 * r_up * (np.abs(g) + np.abs(m1)) + 3.0 * beta_up * r_up * d * np.abs(m2)
                               + 2.0 * dx) + 6.0 * eta_a
            if perturbed:
                pre = pre + beta_up * r_up * fx * np.abs(m2) + beta_up * np.abs(xhat) * dm2_f + r_up * dg
                if center:
                    pre = pre + r_up * mdg
            return _final(pre, dx, u_s, eta_s, out=out)

        vals, _ = blockwise.evaluate(grp.view_shape, formula, e=grp.view(expected), g=g, xc=xc, xhat=xhat, dr=dr,
                                     r=st.r, r_up=r_up, beta_up=beta_up, dbeta=st.dbeta, b_mu=st.b_mu, m1=m1,
                                     m2=m2, dm1=dm1, dm2=dm2, fx=fx, dg=dg, dm2_f=dm2_f, mdg=mdg)
    beta = "beta = r" if ctx.placement == "inside" else "beta = 1/sqrt(v)"
    if ctx.center:
        f = ("dr (|gc| + 2 (beta/r) |xhat m2|) + dbeta |xhat m2| + beta r B_mu (|m2| + |xhat| |m1|)"
             " + beta r^2 B_mu^2 |m1| + r dm1"
             " + beta r |x-mu| dm2 + u_o (3 r (|g| + |m1|) + 3 beta r |x-mu| |m2| + 2|dx|) + final u_s |dx|,"
             " g = dy w, gc = g - m1, m1 = mean(g), m2 = mean(g xhat), dm1 = (gamma_n + 2u_o) mean|g| + u_o |m1|,"
             f" dm2 = (gamma_n + 4u_o) mean|g xhat| + u_o |m2|, {beta}")
    else:
        f = ("dr (|g| + 2 (beta/r) |xhat m2|) + dbeta |xhat m2| + beta r |x| dm2 + u_o (3 r |g| + 3 beta r |x| |m2|"
             " + 2|dx|) + final u_s |dx|, g = dy w, m2 = mean(g xhat), dm2 = (gamma_n + 4u_o) mean|g xhat|"
             f" + u_o |m2|, {beta}")
    saved = ""
    if ctx.train and ctx.conv.saved:
        saved = (" (statistics saved in the params format: + u_p)" if ctx.p.saved == ctx.p.params
                 else f" (statistics saved in {ctx.p.saved}: + u_sv)")
    f += fl_txt
    wg = ctx.worst_group(st)
    extra = {}
    if wg is not None:
        extra = {"mean_abs_g": float(np.broadcast_to(ag, st.v.shape)[wg]),
                 "mean_abs_g_xhat": float(np.broadcast_to(agx, st.v.shape)[wg])}
    f += "; " + ctx.gamma_text(model=model) if model != ctx.model else ""
    return grp.unview(vals), f + saved + "; " + ctx.stats_text(st), ctx.terms(st, u_o, **extra)


def _dweight(ctx: _Context, expected: np.ndarray):
    grp = ctx.grp
    st = ctx.backward_stats() if ctx.train else ctx.stats()
    u_w = ctx.u_out("dweight")
    m = int(ctx.case.param_length)
    model = ctx.model_for("dweight")
    gam = capped(gamma(m, u_w, model, ctx.lam))
    dw = np.abs(grp.param_in(np.asarray(expected)))
    dy = ctx.dyv()
    # A kernel's statistics errors are one number per group, so to first order they move dweight by
    # sum over groups of dr |sum_{group and parameter} dy (x-mu)| + (r+dr) B_mu |sum_{group and parameter} dy|:
    # signed sums over the axes the group and the parameter share (all of them for batch norm, the
    # spatial axes for group/instance norm, none for layer norm).
    inner = tuple(a for a in grp.param_red if a in grp.red)
    outer = tuple(a for a in grp.param_red if a not in grp.red)
    with np.errstate(invalid="ignore", over="ignore"):
        xc = ctx.xv - st.mu
        dyx = dy * xc
        s_dyx = np.sum(dyx, axis=inner, keepdims=True) if inner else dyx
        s_dy = np.sum(dy, axis=inner, keepdims=True) if inner else dy
        per = st.dr * np.abs(s_dyx) + (st.r + st.dr) * st.b_mu * np.abs(s_dy)
        per = np.sum(np.broadcast_to(per, np.broadcast_shapes(per.shape, st.v.shape)), axis=outer, keepdims=True) \
            if outer else per
        np.abs(dyx, out=dyx)  # |dy (x - mu)|, for this sum and the overflow check below
        sxh = grp.psum(dyx * st.r)
        pre = per + (gam + u_w + 2.0 * ctx.u_a) * sxh + u_w * dw + m * ctx.eta_a
        if ctx.perturbed:  # dy and x read as zero where subnormal: each term dy xhat moves by d_dy |xhat| + |dy| r d_x
            pre = pre + grp.psum(ctx.flushed("dy") * np.abs(xc) * (st.r + st.dr)
                                 + np.abs(dy) * (st.r + st.dr) * ctx.flushed("x"))
        vals = _final(pre, dw, ctx.u_p, ctx.eta_p)
    # A kernel may sum dy (x - mu) before scaling by r: whichever sum reaches beyond its declared format.
    reach = np.maximum(sxh, grp.psum(dyx))
    ctx.accepts["dweight"] = ranges.sum_overflow_accepts(grp.param_out(reach), ctx.p.accumulate_for("dweight"))

    f = ("sum_g (dr |sum_gm dy (x-mu)| + (r+dr) B_mu |sum_gm dy|) + (gamma_m + u_w + 2u_a) sum_m |dy xhat|"
         " + u_w |dweight| + final u_p |dweight|, sum_gm over the elements of group g in the parameter's sum,"
         " u_w = accumulation of dweight" + (" + flushed inputs' terms" if ctx.perturbed else "") + "; "
         + ctx.gamma_text("m", model) + "; " + ctx.stats_text(st))
    return grp.param_out(vals), f, ctx.terms(st, u_w, m=float(m), gamma_m=gamma(m, u_w, model, ctx.lam),
                                             sum_abs_dy_xhat=_finite_max(sxh))


def _dbias(ctx: _Context, expected: np.ndarray):
    grp = ctx.grp
    st = ctx.stats()
    u_b = ctx.u_out("dbias")
    m = int(ctx.case.param_length)
    model = ctx.model_for("dbias")
    gam = capped(gamma(m, u_b, model, ctx.lam))
    db = np.abs(grp.param_in(np.asarray(expected)))
    with np.errstate(invalid="ignore", over="ignore"):
        s = grp.psum(np.abs(ctx.dyv()))
        pre = gam * s + u_b * db
        if ctx.perturbed:
            pre = pre + grp.psum(ctx.flushed("dy"))
        vals = _final(pre, db, ctx.u_p, ctx.eta_p)
    ctx.accepts["dbias"] = ranges.sum_overflow_accepts(grp.param_out(s), ctx.p.accumulate_for("dbias"))
    f = ("gamma_m sum_m |dy| + u_b |dbias| + final u_p |dbias|, u_b = accumulation of dbias"
         + (" + sum of flushed |dy|" if ctx.perturbed else "") + "; " + ctx.gamma_text("m", model))
    return grp.param_out(vals), f, ctx.terms(st, u_b, m=float(m), gamma_m=gamma(m, u_b, model, ctx.lam),
                                             sum_abs_dy=_finite_max(s))


_BUILDERS: dict[str, Callable] = {"y": _y, "dx": _dx, "dweight": _dweight, "dbias": _dbias,
                                  "running_mean": _running("running_mean"), "running_var": _running("running_var")}
_BUILDERS.update({s: _stat_output(s) for s in STAT_OUTPUTS})


def derive_bounds(case: Case, precision: Precision, conventions: Conventions,
                  inputs64: dict[str, np.ndarray | None],
                  expected: dict[str, np.ndarray],
                  input_errors: dict[str, np.ndarray] | None = None) -> dict[str, Bound]:
    """One derived Bound per output in ``expected`` (see the module docstring and docs/tolerances.md).

    Parameters
    ----------
    case : the case (op, shape, layout, eps, mode, momentum, ...).
    precision : the kernel's Precision for the case's dtype (resolved or not).
    conventions : the kernel's Conventions (eps placement, saved statistics, running-variance estimator).
    inputs64 : x, dy, weight, bias, running_mean, running_var as float64, exactly the values the kernel
        received, in the logical layout of ``case.shape`` (None where absent).
    expected : the oracle's values of the outputs to check, by name.
    input_errors : declared errors of inputs as the kernel uses them, |input^ - input| elementwise by
        input name (x, dy, weight, bias), propagated as a flushed input's (a residual add's and a
        weight offset's roundings: conformance/tolerances/residual.py).

    Returns
    -------
    dict name -> Bound whose values have the expected output's shape; 0 where the oracle's
    value is NaN or infinite (the comparison judges those positions by their class).
    """
    if not isinstance(expected, dict) or not expected:
        raise ValueError(f"expected is {type(expected).__name__}, expected a non-empty dict of oracle outputs")
    if ops.get(case.op).residual or conventions.weight_offset:
        from .residual import derive_fused_bounds

        return derive_fused_bounds(case, precision, conventions, inputs64, expected, _derive)
    return _derive(case, precision, conventions, inputs64, expected, input_errors)


def _derive(case: Case, precision: Precision, conventions: Conventions, inputs64: dict[str, np.ndarray | None],
            expected: dict[str, np.ndarray], input_errors: dict[str, np.ndarray] | None) -> dict[str, Bound]:
    unknown = [k for k in expected if k not in _BUILDERS]
    if unknown:
        raise ValueError(f"expected has outputs {unknown}, expected names from {', '.join(OUTPUTS)}")
    bad = [k for k in inputs64 if k not in _INPUTS]
    if bad:
        raise ValueError(f"inputs64 has keys {bad}, expected names from {', '.join(_INPUTS)}")
    ctx = _Context(case, precision, conventions, inputs64, input_errors)
    out: dict[str, Bound] = {}
    for name, exp in expected.items():
        e = np.asarray(exp, dtype=np.float64)
        vals, formula, terms = _BUILDERS[name](ctx, e)
        out[name] = finish_bound(name, e, vals, formula, terms, ctx.accepts.get(name, ()), ctx.p)
    return out


def finish_bound(name: str, e: np.ndarray, vals, formula: str, terms: dict[str, float],
                 accepts: tuple[Accept, ...], precision: Precision) -> Bound:
    """The Bound of output ``name`` from its elementwise values: 0 where the oracle's value is not
    finite, float64's largest value where the bound itself overflowed, and the accepted alternatives
    (``accepts`` and the overflow convention's, ranges.py)."""
    vals = np.asarray(vals, dtype=np.float64)
    if vals.shape != e.shape:
        vals = np.broadcast_to(vals, e.shape) if vals.size == 1 else vals.reshape(e.shape)
    fin = np.isfinite(e)
    if fin.all() and np.isfinite(vals).all():  # the common case: no masks, no copies of the finite elements
        if not vals.flags.writeable:  # a broadcast: the Bound owns its values
            vals = vals.copy()
        terms["nonfinite_bound_elements"] = 0.0
        scale = float(max(np.max(e), -np.min(e))) if e.size else 0.0  # max |e|
        terms["bound_over_scale"] = float(np.max(vals) / scale) if scale > 0 else 0.0
    else:
        bad_b = fin & ~np.isfinite(vals)
        vals = np.where(fin, vals, 0.0)
        if bad_b.any():  # overflow inside the bound itself (values near float64's range): no bound
            vals = np.where(bad_b, np.finfo(np.float64).max, vals)
        terms["nonfinite_bound_elements"] = float(np.count_nonzero(bad_b))
        scale = float(np.max(np.abs(e[fin]))) if fin.any() else 0.0
        terms["bound_over_scale"] = float(np.max(vals[fin]) / scale) if scale > 0 else 0.0
    p = precision.resolved()
    accept = tuple(accepts) + ranges.overflow_accepts(e, vals, output_dtype(name, p), p.overflow)
    if accept:
        terms["accept_elements"] = float(sum(int(np.count_nonzero(a.mask)) for a in accept))
    return Bound(output=name, values=np.ascontiguousarray(vals), formula=formula, terms=terms, accept=accept)
