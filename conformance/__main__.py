"""The `refnorm` command's process entry (``python -m conformance`` and the console script).

Signal handling starts before anything heavy is imported, so that Ctrl-C, SIGTERM or
SIGHUP during start-up (imports, argument parsing, kernel loading) ends the command with
exit 3 and one line, as it does later (conformance.stop); only a signal within the
interpreter's own start-up, before this module runs, is Python's to handle.
"""

import sys


def entry() -> int:
    from .stop import handle_stops

    with handle_stops():
        try:
            from .cli import main
        except KeyboardInterrupt as e:
            name = getattr(e, "signal", None)
            print(f"refnorm: interrupted{f' by {name}' if name else ''}", file=sys.stderr)
            return 3  # conformance.cli.EXIT_INTERRUPTED (not imported: the import was what got interrupted)
        return main()


if __name__ == "__main__":
    sys.exit(entry())
