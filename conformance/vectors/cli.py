"""The vectors commands (registered through conformance.cli.EXTENSIONS; docs/vectors.md).

refnorm export --op OP --dtype D [--tier T] [--case ID ...] [--declaration SPEC | --precision ...] --out DIR
refnorm score DIR OUTPUTS [--json PATH] [--report DIR] [--junit PATH] [--baseline OLD.json] [--profile PATH]

Exit codes as `refnorm check`: 0 conformant, 1 not conformant, 2 bad usage or a vectors folder that
cannot be trusted (a manifest or stored file whose sha256 does not match, a file that breaks the
format), 3 interrupted.
"""

from __future__ import annotations

import argparse
import shlex
from dataclasses import fields
from pathlib import Path
from typing import Any, Sequence

from .. import dtypes as _dtypes
from ..cases import TIERS
from ..kernel import ENTRY_POINTS, Conventions, Precision
from ..options import DEFAULTS, number_type, tolerance_type
from .manifest import EXPORTABLE_OPS

__all__ = ["add_commands", "cmd_export", "cmd_score", "parse_precision", "parse_conventions"]


def _usage(msg: str) -> Exception:
    from ..cli import UsageError

    return UsageError(msg)


def add_commands(subparsers: Any) -> None:
    e = subparsers.add_parser(
        "export", help="write portable test vectors (inputs, expected outputs, bounds) for a target without Python",
        description="Write, per case, the inputs a kernel consumes, the oracle's float64 expected outputs and the "
                    "per-element bounds of the declared precision, with DIR/manifest.json describing every case "
                    "(docs/vectors.md).")
    e.add_argument("--op", required=True, choices=EXPORTABLE_OPS, help="the op (multi-replica ops have no vectors)")
    e.add_argument("--dtype", required=True, nargs="+", choices=_dtypes.FORMATS, help="storage dtypes")
    e.add_argument("--tier", choices=TIERS, help=f"catalog tier (default: {DEFAULTS['tier']})")
    e.add_argument("--case", action="append", default=[], metavar="ID", help="export only this case id (repeatable)")
    e.add_argument("--seed", type=number_type("seed"), help=f"seed of the case data, 0 <= N < 2**63 "
                   f"(default {DEFAULTS['seed']})")
    e.add_argument("--declaration", metavar="SPEC", help="take the declaration (precision, conventions, entry points, "
                   "dtypes, layouts) from this kernel spec, as `refnorm check SPEC` would; its callables are not run")
    e.add_argument("--precision", metavar="KEY=VALUE,...", help="without --declaration: the precision, e.g. "
                   "params=float32,accumulate=float32,summation=probabilistic,lam=8,output_accumulate=dweight:bfloat16"
                   "+dbias:bfloat16 (storage is each --dtype)")
    e.add_argument("--conventions", metavar="KEY=VALUE,...", help="without --declaration: the conventions, e.g. "
                   "momentum_convention=new,running_var_estimator=unbiased,eps_placement=inside,saved=mean+rstd,"
                   "running=inplace")
    e.add_argument("--entry-points", nargs="+", choices=ENTRY_POINTS, metavar="ENTRY",
                   help="without --declaration: the target's entry points (default: every one of the op's)")
    e.add_argument("--name", help="without --declaration: the kernel's name in results and reports")
    e.add_argument("--tolerance", action="append", type=tolerance_type, default=[], metavar="OUTPUT=ATOL,RTOL",
                   help="store atol + rtol*|oracle| as the bound of one output instead of the derived one (repeatable)")
    e.add_argument("--out", required=True, metavar="DIR", help="an empty or new folder for the vectors")
    e.add_argument("--quiet", action="store_true", help="no progress output")
    e.set_defaults(func=cmd_export)

    s = subparsers.add_parser(
        "score", help="judge a target's outputs against exported vectors, as refnorm check judges a kernel",
        description="Compare the .npy files a target wrote into OUTPUTS (one folder per case, one file per output) "
                    "with the expected values and bounds stored in DIR; write the results document, summary, "
                    "report and JUnit XML that `refnorm check` writes.")
    s.add_argument("vectors", metavar="DIR", help="a folder written by refnorm export")
    s.add_argument("outputs", metavar="OUTPUTS", help="the target's outputs, laid out as DIR/manifest.json says")
    s.add_argument("--json", metavar="PATH", help="write the results document (JSON) here")
    s.add_argument("--junit", metavar="PATH", help="write JUnit XML here")
    s.add_argument("--baseline", metavar="OLD.json", help="fail a passed output whose budget used grew more than "
                   "--growth times over this earlier results file (same case id and output)")
    s.add_argument("--growth", type=number_type("growth"), metavar="F", help="allowed growth factor over the baseline")
    s.add_argument("--growth-floor", type=number_type("growth_floor"), metavar="B",
                   help="budgets below B count as B when measuring growth")
    s.add_argument("--profile", metavar="PATH", help="apply a gate profile's waivers and growth settings (its kernels, "
                   "tier, seed and tolerances were fixed at export)")
    s.add_argument("--quiet", action="store_true", help="no progress output")
    from ..report import cli as report_cli

    report_cli.add_check_arguments(s)
    s.set_defaults(func=cmd_score)


# ---------------------------------------------------------------- declarations on the command line
def _pairs(text: str, option: str) -> dict[str, str]:
    out: dict[str, str] = {}
    for part in text.split(","):
        key, eq, val = part.partition("=")
        key = key.strip()
        if not eq or not key:
            raise _usage(f"{option}: expected KEY=VALUE[,KEY=VALUE...], received {part[:80]!r}")
        if key in out:
            raise _usage(f"{option}: {key} is given twice")
        out[key] = val.strip()
    return out


def parse_precision(text: str, option: str = "--precision") -> dict[str, Any]:
    """Precision fields (all but storage) from KEY=VALUE,... (values are checked by the Kernel)."""
    allowed = [f.name for f in fields(Precision) if f.name != "storage"]
    out: dict[str, Any] = {}
    for key, val in _pairs(text, option).items():
        if key not in allowed:
            raise _usage(f"{option}: unknown key {key!r}, expected some of {', '.join(allowed)}")
        if key == "lam":
            try:
                out[key] = float(val)
            except ValueError:
                raise _usage(f"{option}: lam is {val[:40]!r}, expected a positive number") from None
            if not 0 < out[key] < float("inf"):
                raise _usage(f"{option}: lam is {val[:40]!r}, expected a positive finite number")
        elif key == "output_accumulate":
            acc: dict[str, str] = {}
            for item in filter(None, val.split("+")):
                name, colon, fmt = item.partition(":")
                if not colon:
                    raise _usage(f"{option}: output_accumulate wants OUTPUT:FORMAT+..., received {item[:40]!r}")
                acc[name] = fmt
            out[key] = acc
        else:
            out[key] = val or None
    return out


def parse_conventions(text: str, option: str = "--conventions") -> Conventions:
    allowed = [f.name for f in fields(Conventions)]
    kw: dict[str, Any] = {}
    for key, val in _pairs(text, option).items():
        if key not in allowed:
            raise _usage(f"{option}: unknown key {key!r}, expected some of {', '.join(allowed)}")
        kw[key] = tuple(v for v in val.split("+") if v) if key == "saved" and val not in ("none", "-") else (
            () if key == "saved" else val)
    return Conventions(**kw)


def _declared_kernel(args: argparse.Namespace):
    from ..cli import resolve_kernel
    from .export import target_kernel

    if args.declaration:
        given = [o for o, v in (("--precision", args.precision), ("--conventions", args.conventions),
                                ("--entry-points", args.entry_points), ("--name", args.name)) if v]
        if given:
            raise _usage(f"{', '.join(given)}: the declaration comes from --declaration {args.declaration}; "
                         "give one or the other")
        return resolve_kernel(args.declaration, args.op)
    prec = parse_precision(args.precision) if args.precision else {}
    conv = parse_conventions(args.conventions) if args.conventions else None
    precision = Precision(**prec)  # storage: each --dtype (Kernel.precision_for)
    kernel = target_kernel(args.op, args.dtype, precision=precision, conventions=conv,
                           entry_points=args.entry_points, name=args.name)
    return kernel, None


def _empty_folder(path: str) -> Path:
    from ..destinations import DestinationError, folder_target, input_folder

    try:
        existing = input_folder(path, "--out")
        if existing is not None and any(existing.iterdir()):
            raise _usage(f"--out {path}: the folder is not empty; give a new or empty folder (vectors are never "
                         "mixed with other files)")
        return folder_target(path, "--out")
    except DestinationError as e:
        raise _usage(str(e)) from None
    except OSError as e:
        raise _usage(f"--out {path}: cannot be listed: {e.strerror or e}") from None


def cmd_export(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from .. import cli
    from ..run import select_cases
    from .export import export_vectors

    out = _empty_folder(args.out)
    for k, v in DEFAULTS.items():
        if getattr(args, k, None) is None:
            setattr(args, k, v)
    kernel, spec = _declared_kernel(args)
    opts = cli.run_options(args, kernel, argv)
    try:
        cases = select_cases(kernel, opts)
    except KeyError as e:
        raise _usage(str(e.args[0]) if e.args else str(e)) from None
    tier = "selected" if opts.case_ids else opts.tier
    man = export_vectors(kernel, cases, out, seed=opts.seed, tier=tier, declaration=spec,
                         overrides=dict(opts.overrides), command=opts.command, quiet=args.quiet)
    run = [c for c in man["cases"] if c["skipped"] is None]
    files = sum(len(c["inputs"]) + 2 * len(c["outputs"]) for c in run)
    print(f"exported {len(run)} case(s) of {kernel.op} ({', '.join(man['dtypes'])}, {tier}, seed {opts.seed}) "
          f"to {out}: {files} files; {len(cases) - len(run)} skipped by the declaration")
    print(f"manifest: {out / 'manifest.json'}")
    print(f"next: run the target over {out / 'index.txt'} (or the manifest), then refnorm score {shlex.quote(str(out))} "
          "OUTPUTS")
    return cli.EXIT_OK


# ---------------------------------------------------------------- score
def cmd_score(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from .. import cli
    from ..destinations import DestinationError, input_folder
    from ..gate.cli import DocumentGate
    from ..report import cli as report_cli
    from .manifest import VectorsError, load_manifest, verify_files
    from .score import score_outputs

    hooks = [report_cli, DocumentGate("score", "at export (refnorm export --tolerance)")]
    cli.prepare_outputs(args, hooks)
    try:
        outputs = input_folder(args.outputs, "OUTPUTS")
    except DestinationError as e:
        raise _usage(str(e)) from None
    if outputs is None:
        raise _usage(f"OUTPUTS {args.outputs}: no such folder (the target's outputs go there, one folder per case)")
    try:
        man = load_manifest(args.vectors)
        verify_files(man)
        doc = score_outputs(man, outputs, command="refnorm " + shlex.join(argv), quiet=args.quiet)
    except VectorsError as e:
        raise _usage(str(e)) from None
    return cli.finish(args, doc, hooks)
