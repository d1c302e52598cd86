"""Speed and memory of the refnorm oracle next to torch float64, measured side by side in one process.

For each case the oracle's forward + backward (backward recomputing the batch
statistics from x, the oracle's accurate default) and torch's autograd
forward + backward run in alternating blocks of repetitions in the same
process. Each side's median (and minimum) wall time, their ratio
(oracle / torch), the oracle's peak extra memory in float64 copies of the
input, and the largest relative difference of y and dx from torch are printed
as a table; ``--json PATH`` also writes them with the versions and settings.

Peak memory: tracemalloc, to which NumPy reports every array data buffer it
allocates; the peak above the level before the forward call, over forward and
backward, with y kept alive during the backward as in a training step,
divided by x.nbytes. It counts the outputs (y, dx) and every temporary.

This is a benchmark, not a test: it asserts nothing and the ratios depend on
the machine and on what else runs on it (the CPU load before measuring is
reported). Run with ``make bench``.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import statistics
import sys
import time
import tracemalloc
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import refnorm  # noqa: E402

TARGET_RATIO = 2.0


@dataclass
class Case:
    name: str
    shape: tuple[int, ...]
    params: int
    oracle: Callable[..., tuple]
    torch_fn: Callable[..., object]


def _cases() -> list[Case]:
    import torch.nn.functional as F

    return [
        Case("batch norm", (32, 64, 56, 56), 64,
             lambda x, w, b, dy: (refnorm.batch_norm_forward(x, w, b),
                                  refnorm.batch_norm_backward(dy, x, w)),
             lambda x, w, b: F.batch_norm(x, None, None, w, b, training=True, eps=1e-5)),
        Case("layer norm", (4096, 1024), 1024,
             lambda x, w, b, dy: (refnorm.layer_norm_forward(x, 1024, w, b),
                                  refnorm.layer_norm_backward(dy, x, 1024, w)),
             lambda x, w, b: F.layer_norm(x, (1024,), w, b, eps=1e-5)),
        Case("group norm (8 groups)", (16, 64, 32, 32), 64,
             lambda x, w, b, dy: (refnorm.group_norm_forward(x, 8, w, b),
                                  refnorm.group_norm_backward(dy, x, 8, w)),
             lambda x, w, b: F.group_norm(x, 8, w, b, eps=1e-5)),
    ]


def cpu_busy_fraction(seconds: float = 0.5) -> float | None:
    """Fraction of all CPUs busy over ``seconds`` (Linux /proc/stat; None elsewhere)."""
    def read() -> tuple[int, int]:
        with open("/proc/stat") as f:
            v = [int(t) for t in f.readline().split()[1:]]
        return sum(v), v[3] + v[4]

    try:
        t0, i0 = read()
        time.sleep(seconds)
        t1, i1 = read()
    except OSError:
        return None
    return 1.0 - (i1 - i0) / max(1, t1 - t0)


def _time_once(fn: Callable[[], object]) -> float:
    t = time.perf_counter()
    fn()
    return time.perf_counter() - t


def side_by_side(a: Callable[[], object], b: Callable[[], object], rounds: int, block: int) -> tuple[list, list]:
    """Alternate blocks of ``block`` timed runs of a and of b, ``rounds`` times; the first run of a block is a warm-up."""
    ta: list[float] = []
    tb: list[float] = []
    for _ in range(rounds):
        for fn, out in ((a, ta), (b, tb)):
            fn()
            out.extend(_time_once(fn) for _ in range(block))
    return ta, tb


def peak_copies(fn: Callable[[], object], nbytes: int) -> float:
    """Peak traced allocation during fn(), above the level before it, in units of nbytes."""
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        result = fn()
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    del result
    return (peak - base) / nbytes


def max_rel(a: np.ndarray, ref: np.ndarray) -> float:
    return float(np.max(np.abs(a - ref)) / np.max(np.abs(ref)))


def run(rounds: int, block: int, torch_threads: int, seed: int) -> dict:
    import torch

    torch.set_num_threads(torch_threads)
    rng = np.random.default_rng(seed)
    busy = cpu_busy_fraction()
    rows = []
    for case in _cases():
        x = rng.standard_normal(case.shape)
        dy = rng.standard_normal(case.shape)
        w = rng.standard_normal(case.params)
        b = rng.standard_normal(case.params)
        xt = torch.from_numpy(x).requires_grad_()
        wt = torch.from_numpy(w).requires_grad_()
        bt = torch.from_numpy(b).requires_grad_()
        dyt = torch.from_numpy(dy)

        def oracle():
            return case.oracle(x, w, b, dy)

        def torch_step():
            xt.grad = wt.grad = bt.grad = None
            y = case.torch_fn(xt, wt, bt)
            y.backward(dyt)
            return y

        fwd, bwd = oracle()
        y_t = torch_step()
        diff_y = max_rel(fwd.y, y_t.detach().numpy())
        diff_dx = max_rel(bwd.dx, xt.grad.numpy())
        copies = peak_copies(oracle, x.nbytes)
        to, tt = side_by_side(oracle, torch_step, rounds, block)
        mo, mt = statistics.median(to), statistics.median(tt)
        rows.append({
            "case": case.name, "shape": list(case.shape),
            "oracle_ms_median": mo * 1e3, "oracle_ms_min": min(to) * 1e3,
            "torch_ms_median": mt * 1e3, "torch_ms_min": min(tt) * 1e3,
            "ratio_median": mo / mt, "ratio_min": min(to) / min(tt),
            "peak_extra_input_copies": copies,
            "max_rel_diff_y_vs_torch": diff_y, "max_rel_diff_dx_vs_torch": diff_dx,
            "oracle_ms_all": [t * 1e3 for t in to], "torch_ms_all": [t * 1e3 for t in tt],
        })
    return {
        "date": _dt.datetime.now().astimezone().isoformat(timespec="seconds"),
        "command": " ".join([Path(sys.executable).name] + sys.argv),
        "python": platform.python_version(), "numpy": np.__version__, "torch": torch.__version__,
        "refnorm": refnorm.__version__, "machine": platform.machine(), "cpus": os.cpu_count(),
        "oracle_threads": _oracle_threads(), "torch_threads": torch_threads,
        "rounds": rounds, "block": block, "seed": seed,
        "cpu_busy_before": busy, "target_ratio": TARGET_RATIO, "cases": rows,
    }


def _oracle_threads() -> int:
    try:
        from refnorm import _parallel
    except ImportError:  # an oracle without the threaded core
        return 1
    return _parallel.max_threads()


def table(res: dict) -> str:
    head = (f"{'case':<22} {'shape':<18} {'oracle ms':>10} {'torch ms':>9} {'ratio':>6} "
            f"{'(min)':>6} {'peak mem':>9} {'y diff':>10} {'dx diff':>9}")
    lines = [head, "-" * len(head)]
    for r in res["cases"]:
        flag = "" if r["ratio_median"] <= res["target_ratio"] else "  > target"
        lines.append(
            f"{r['case']:<22} {'x'.join(map(str, r['shape'])):<18} {r['oracle_ms_median']:>10.2f} "
            f"{r['torch_ms_median']:>9.2f} {r['ratio_median']:>6.2f} {r['ratio_min']:>6.2f} "
            f"{r['peak_extra_input_copies']:>8.2f}x {r['max_rel_diff_y_vs_torch']:>10.1e} "
            f"{r['max_rel_diff_dx_vs_torch']:>9.1e}{flag}")
    busy = res["cpu_busy_before"]
    lines += [
        "",
        "ratio: oracle median / torch median (forward + backward, float64); (min): the same for the fastest runs;",
        f"target <= {res['target_ratio']:g}. peak mem: peak extra memory of the oracle (tracemalloc) in copies of x.",
        "diff: max |oracle - torch| / max |torch| for y and dx.",
        f"threads: oracle {res['oracle_threads']}, torch {res['torch_threads']}; cpus {res['cpus']}; "
        f"numpy {res['numpy']}, torch {res['torch']}, python {res['python']}.",
    ]
    if busy is not None:
        note = "  (other processes were using the CPU: ratios may be unreliable)" if busy > 0.2 else ""
        lines.append(f"CPU busy before measuring: {busy:.0%}{note}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=4, help="alternating rounds (default 4)")
    ap.add_argument("--block", type=int, default=5, help="timed runs per side per round (default 5)")
    ap.add_argument("--torch-threads", type=int, default=2, help="torch.set_num_threads (default 2)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", type=Path, metavar="PATH", help="also write the results as JSON")
    args = ap.parse_args(argv)
    res = run(args.rounds, args.block, args.torch_threads, args.seed)
    print(table(res))
    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(res, indent=2) + "\n")
        print(f"wrote {args.json}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
