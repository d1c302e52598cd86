"""Command-line hooks of the built-in adapters (see conformance.cli.EXTENSIONS).

`refnorm check` gains --device (a torch device, for conformance.adapters.torch_device) and
--provider (an ONNX Runtime execution provider, for conformance.adapters.onnxruntime_ep). Each is
shorthand for a spec parameter: ``--device cuda`` turns ``SPEC`` into ``SPEC?device=cuda``, so
that worker processes, the results document and every rerun command carry the choice.
"""

from __future__ import annotations

import argparse

__all__ = ["add_check_arguments", "prepare", "SPEC_OPTIONS"]

#: option name -> the factory parameter it sets
SPEC_OPTIONS = {"device": "device", "provider": "provider"}


def add_check_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--device", metavar="NAME",
                        help="torch device for conformance.adapters.torch_device kernels: cpu, cuda, cuda:1, xpu, "
                             "mps or a custom backend's name (the same as SPEC?device=NAME)")
    parser.add_argument("--provider", metavar="NAME",
                        help="ONNX Runtime execution provider for conformance.adapters.onnxruntime_ep kernels, "
                             "e.g. CPUExecutionProvider (the same as SPEC?provider=NAME)")


def prepare(args: argparse.Namespace) -> None:
    """Fold --device/--provider into the kernel spec, before anything loads it."""
    from ..cli import UsageError, check_spec
    from ..kernel import KernelError, with_spec_params

    given = {param: getattr(args, opt) for opt, param in SPEC_OPTIONS.items() if getattr(args, opt, None) is not None}
    if not given:
        return
    for param, value in given.items():
        if not value.strip() or any(ch in value for ch in ",?=") or value != value.strip():
            raise UsageError(f"--{param} is {value!r}, expected a name without spaces, ',', '?' or '='")
    if getattr(args, "profile", None):
        raise UsageError(f"--{next(iter(given))} cannot be combined with --profile: put it in the profile's kernel "
                         f"spec instead (for example SPEC?{next(iter(given))}=NAME)")
    try:
        args.spec = with_spec_params(check_spec(args.spec, args.op), **given)
    except KernelError as e:
        raise UsageError(str(e)) from None
