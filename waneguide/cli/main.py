"""The ``waneguide`` command: one subcommand per job, each a thin layer over a library call.

Subcommands live in ``waneguide/cli/cmd_<name>.py``; each module exposes
``ORDER`` (an int: its place in ``--help``) and ``register(subparsers)``, which
adds its parser and sets ``func``. Modules are found by name, so adding a
command never edits this file. Library imports stay inside the command bodies so that
``waneguide --help`` is fast: that is the project's one lazy-import mechanism besides the
package ``__getattr__`` of :mod:`waneguide.models` and :mod:`waneguide.simulation`.

Options every subcommand takes, before or after its name: ``--debug`` (tracebacks instead of
one-line errors) and ``--no-progress`` (no progress bars).

Errors that waneguide raises on purpose (:class:`waneguide.core.errors.WaneguideError`) and
operating-system errors (a missing file, a full disk, no permission) go to stderr as one line
with exit code 2; ``--debug`` shows the traceback instead. Anything else is a defect and shows
its traceback. A closed output pipe (``waneguide materials --csv | head -3``) ends quietly.
"""
from __future__ import annotations

import argparse
import importlib
import os
import pkgutil
import sys
from pathlib import Path
from typing import Sequence

from waneguide.core.caution import CAUTION
from waneguide.core.errors import WaneguideError
from waneguide.core.settings import mask_credentials, offline_defaults

__all__ = ["main", "build_parser", "command_modules"]

#: Exit code for errors in the user's input or environment.
EXIT_USER_ERROR = 2


def command_modules() -> list[str]:
    """Names of the ``cmd_*`` modules of this package, sorted by their ``ORDER``."""
    names = [m.name for m in pkgutil.iter_modules([str(Path(__file__).parent)]) if m.name.startswith("cmd_")]
    mods = [importlib.import_module(f"waneguide.cli.{n}") for n in names]
    return [m.__name__ for m in sorted(mods, key=lambda m: (getattr(m, "ORDER", 100), m.__name__))]


def _common_options() -> argparse.ArgumentParser:
    """Options shared by every subcommand (defaults suppressed so the top-level value stands)."""
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                        help="show tracebacks on errors")
    common.add_argument("--no-progress", action="store_true", default=argparse.SUPPRESS,
                        help="no progress bars")
    return common


class _Subcommands:
    """``add_subparsers()`` result that gives every subcommand the common options."""

    def __init__(self, sub, common: argparse.ArgumentParser):
        self._sub = sub
        self._common = common

    def add_parser(self, name: str, **kwargs) -> argparse.ArgumentParser:
        kwargs["parents"] = [*kwargs.get("parents", []), self._common]
        return self._sub.add_parser(name, **kwargs)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="waneguide",
        description="Wall-loss estimation from guided-wave captures on aluminium stiffeners. " + CAUTION,
    )
    parser.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    parser.add_argument("--no-progress", action="store_true", help="no progress bars")
    sub = _Subcommands(parser.add_subparsers(dest="command", metavar="COMMAND"), _common_options())
    for name in command_modules():
        importlib.import_module(name).register(sub)
    return parser


def _report(command: str, exc: BaseException) -> None:
    msg = mask_credentials(str(exc)).strip().splitlines() or [type(exc).__name__]
    print(f"waneguide {command}: error: {msg[0]}", file=sys.stderr)
    for extra in msg[1:6]:
        print(f"  {extra}", file=sys.stderr)


def main(argv: Sequence[str] | None = None) -> int:
    offline_defaults()
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return EXIT_USER_ERROR
    try:
        rc = args.func(args)
        sys.stdout.flush()
    except BrokenPipeError:
        # The reader closed the pipe (``| head``): stop writing, say nothing.
        # Python docs, "Note on SIGPIPE" (signal module): point stdout at devnull before exit.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1
    except (WaneguideError, OSError) as exc:
        if args.debug:
            raise
        _report(args.command, exc)
        return EXIT_USER_ERROR
    except KeyboardInterrupt:
        print(f"waneguide {args.command}: interrupted", file=sys.stderr)
        return 130
    return int(rc or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
