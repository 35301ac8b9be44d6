"""Entry point of the ``tocsin`` command.

Exit codes (contract §6): 0 success, 2 bad usage or bad input (one-line reason
on stderr), 1 internal failure.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from tocsin.errors import TocsinError

EXIT_OK, EXIT_FAILURE, EXIT_USAGE = 0, 1, 2

#: sub-command name -> module under tocsin.cli providing add_parser(sub) and run(args) -> int
COMMANDS: dict[str, str] = {
    "simulate": "tocsin.cli.simulate",
    "replay": "tocsin.cli.replay",
    "serve": "tocsin.cli.serve",
    "demo": "tocsin.cli.demo",
    "agent": "tocsin.cli.agent",
    "alerts": "tocsin.cli.alerts",
    "retract": "tocsin.cli.retract",
    "tune": "tocsin.cli.tune",
    "followup": "tocsin.cli.followup",
}


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # type: ignore[override]
        self.print_usage(sys.stderr)
        print(f"tocsin: error: {message}", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="tocsin",
        description="Coincidence and excess search over networks of particle detectors.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for module in COMMANDS.values():
        importlib.import_module(module).add_parser(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    try:
        code: int = importlib.import_module(COMMANDS[args.command]).run(args)
        return code
    except (TocsinError, FileNotFoundError, ValueError) as exc:
        print(f"tocsin {args.command}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(f"tocsin {args.command}: interrupted", file=sys.stderr)
        return EXIT_FAILURE
    except Exception as exc:
        print(
            f"tocsin {args.command}: internal error: {type(exc).__name__}: {exc}", file=sys.stderr
        )
        return EXIT_FAILURE


if __name__ == "__main__":
    raise SystemExit(main())
