"""The ``waneguide`` command: one subcommand per job, each a thin layer over a library call.

Subcommands live in ``waneguide/cli/cmd_<name>.py``; each module exposes
``ORDER`` (an int: its place in ``--help``) and ``register(subparsers)``, which
adds its parser and sets ``func``. Modules are found by name, so adding a
command never edits this file. Heavy imports
stay inside the command bodies so that ``waneguide --help`` is fast.

User errors (bad input: ``ValueError``, ``FileNotFoundError``, ...) go to stderr as one
line with exit code 2; ``--debug`` shows the traceback instead.
"""
from __future__ import annotations

import argparse
import importlib
import sys
from typing import Sequence

from waneguide.core.caution import CAUTION
from waneguide.core.settings import offline_defaults



def command_modules() -> list[str]:
    """Names of the ``cmd_*`` modules of this package, sorted by their ``ORDER``."""
    import pkgutil
    from pathlib import Path

    names = [m.name for m in pkgutil.iter_modules([str(Path(__file__).parent)]) if m.name.startswith("cmd_")]
    mods = [importlib.import_module(f"waneguide.cli.{n}") for n in names]
    return [m.__name__ for m in sorted(mods, key=lambda m: (getattr(m, "ORDER", 100), m.__name__))]



class UserError(Exception):
    """An error caused by the user's input; printed as one line, exit code 2."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="waneguide",
        description="Wall-loss estimation from guided-wave captures on aluminium stiffeners. " + CAUTION,
    )
    parser.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in command_modules():
        importlib.import_module(name).register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    offline_defaults()
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    try:
        rc = args.func(args)
    except (UserError, ValueError, FileNotFoundError, PermissionError, KeyError) as exc:
        if args.debug:
            raise
        msg = str(exc).strip().splitlines() or [type(exc).__name__]
        print(f"waneguide {args.command}: error: {msg[0]}", file=sys.stderr)
        for extra in msg[1:6]:
            print(f"  {extra}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"waneguide {args.command}: interrupted", file=sys.stderr)
        return 130
    return int(rc or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
