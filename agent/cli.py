"""The ``lethe`` command: argument parsing and dispatch only.

Each command group lives in ``agent/commands/<group>.py`` and exposes
``register(subparsers)``; handlers import their heavy dependencies lazily so that
``lethe --help`` and ``lethe status`` start quickly.  Exit codes are defined in
:mod:`agent.errors` and documented in ``docs/cli.md``.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from . import __version__
from .errors import EXIT_USAGE, LetheError

COMMAND_MODULES = (
    "policy",       # lethe policy show|check|fingerprint
    "intake",       # lethe run
    "participant",  # lethe init|status|places|quiz|pause|resume|withdraw|service
    "graph",        # lethe codebook|graph
    "fit",          # lethe fit
    "export",       # lethe export
    "upload",       # lethe upload
    "study",        # lethe study keygen|card|enroll|open|merge|report|serve|invite|analyse|plan|verify-withdrawal
    "audit",        # lethe audit policy|diff|verify|report
    "demo",         # lethe demo
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="lethe",
        description="On-device agent for experience-sampling memory studies: raw drops in, "
                    "coarse codes kept, originals destroyed, sealed aggregates out.",
        epilog="Exit codes: 0 ok, 1 check failed, 2 usage, 3 bad data, 4 integrity, "
               "5 wrong state, 6 privacy budget. See docs/cli.md.",
    )
    parser.add_argument("--version", action="version", version=f"lethe {__version__}")
    parser.add_argument("--home", metavar="DIR",
                        help="the agent's home directory (default: $LETHE_HOME or the per-user data dir)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(f"agent.commands.{name}")
        except ModuleNotFoundError as e:
            if e.name == f"agent.commands.{name}":
                continue  # a command group not built yet
            raise
        module.register(sub)
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USAGE if argv is None and len(sys.argv) > 1 else 0
    try:
        rc = args.func(args)
    except LetheError as e:
        print(f"lethe: error: {e}", file=sys.stderr)
        return e.exit_code
    except KeyboardInterrupt:
        print("lethe: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader went away (``lethe places --json | head``): stop quietly, as
        # the Python documentation's note on SIGPIPE advises; 141 = 128 + SIGPIPE.
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 141
    return int(rc or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
