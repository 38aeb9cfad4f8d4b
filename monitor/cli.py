"""The `lotwarden` command: parses arguments, dispatches to a command module, turns errors into exit 2.

Each command lives in ``monitor/commands/<name>.py`` with ``register(subparsers)`` and ``run(args) -> int``.
This is the one place where a LotwardenError becomes a one-line message on stderr and exit code 2.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence
from typing import NoReturn

from monitor import __version__
from monitor.errors import LotwardenError

COMMANDS = ("check", "plan", "run", "validate", "demo", "lots", "show", "dispose", "report", "replay")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:  # usage errors -> exit 2 with one line, as argparse does
        self.print_usage(sys.stderr)
        self.exit(2, f"lotwarden: error: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="lotwarden", description="Screen each lot's mean fill against its target.")
    parser.add_argument("--version", action="version", version=f"lotwarden {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for name in COMMANDS:
        module = importlib.import_module(f"monitor.commands.{name}")
        p = module.register(sub)
        p.set_defaults(_run=module.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args._run(args))
    except LotwardenError as exc:
        print(f"lotwarden: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
