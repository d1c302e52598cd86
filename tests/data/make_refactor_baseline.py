"""Write the before/after record of the standard tier (tests/refactor_capture.py) to tests/data/refactor_baseline/.

The stored record was produced by commit add45d7, the main branch before the op descriptions
moved into conformance/ops/ (issue 12), and regenerated for the range and declaration cases and
bounds and for the oracle's exact paths (issue 8; tests/test_refactor_baseline.py says what changed). Re-run it only when a change
is meant to alter the catalog, the inputs, the bounds or the verdicts, and say so in that commit:

    PYTHONPATH=. python tests/data/make_refactor_baseline.py [OP ...]
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import refactor_capture as rc  # noqa: E402


def main(argv: list[str]) -> int:
    ops = argv or list(rc.OPS)
    unknown = [o for o in ops if o not in rc.OPS]
    if unknown:
        print(f"unknown op(s) {unknown}, expected names from {', '.join(rc.OPS)}", file=sys.stderr)
        return 2
    for op in ops:
        t0 = time.perf_counter()
        rec = {dt: rc.capture(op, dt) for dt in rc.DTYPES}
        rc.write(rc.path_for(op), rec)
        n = sum(len(r["cases"]) for r in rec.values())
        print(f"{op}: {n} cases in {time.perf_counter() - t0:.1f} s, "
              f"{rc.path_for(op).stat().st_size / 1024:.0f} KiB")
    (rc.DATA / "versions.json").write_text(json.dumps(rc.versions(), indent=1, sort_keys=True) + "\n")
    if not argv:
        rc.write(rc.DATA / "catalogs.json.gz", rc.catalogs())
        print(f"catalogs: {(rc.DATA / 'catalogs.json.gz').stat().st_size / 1024:.0f} KiB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
