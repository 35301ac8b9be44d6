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

#: sub-command name -> (module under tocsin.cli providing add_parser(sub) and
#: run(args) -> int, its one-line help as that module's add_parser gives it)
COMMANDS: dict[str, tuple[str, str]] = {
    "simulate": (
        "tocsin.cli.simulate",
        "write a recording of an invented network, with a truth file",
    ),
    "replay": (
        "tocsin.cli.replay",
        "run the trigger engine over a recording",
    ),
    "serve": (
        "tocsin.cli.serve",
        "the always-on service: MQTT in, candidates out",
    ),
    "demo": (
        "tocsin.cli.demo",
        "the whole chain on one machine: broker, 40 simulated sites, service, an event",
    ),
    "agent": (
        "tocsin.cli.agent",
        "publish one site's hits over MQTT (with a disk spool)",
    ),
    "alerts": (
        "tocsin.cli.alerts",
        "list archived alerts, or show one as XML",
    ),
    "retract": (
        "tocsin.cli.retract",
        "withdraw an alert we sent (VOEvent retraction)",
    ),
    "tune": (
        "tocsin.cli.tune",
        "time-slide background, injection efficiency and recommended thresholds",
    ),
    "followup": (
        "tocsin.cli.followup",
        "search a recording around an outside alert packet",
    ),
}


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # type: ignore[override]
        self.print_usage(sys.stderr)
        print(f"tocsin: error: {message}", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)


def build_parser(command: str | None = None, *, every: bool = False) -> argparse.ArgumentParser:
    """The ``tocsin`` parser. Only the module of ``command`` (every module with
    ``every``) is imported and adds its full sub-parser; the others appear with
    their one-line help only. The command modules import the engine, astropy and
    matplotlib, so ``tocsin --help`` and a command's own start stay quick."""
    parser = _Parser(
        prog="tocsin",
        description="Coincidence and excess search over networks of particle detectors.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, (module, one_line) in COMMANDS.items():
        if every or name == command:
            importlib.import_module(module).add_parser(sub)
        else:
            sub.add_parser(name, help=one_line)
    return parser


def _command_in(argv: Sequence[str]) -> str | None:
    """The sub-command named in ``argv``: its first word that is not an option (the
    top-level parser has no option taking a value)."""
    for word in argv:
        if not word.startswith("-"):
            return word if word in COMMANDS else None
    return None


def main(argv: Sequence[str] | None = None) -> int:
    args_in = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser(_command_in(args_in))
    args = parser.parse_args(args_in)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    try:
        code: int = importlib.import_module(COMMANDS[args.command][0]).run(args)
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
