"""The ``tocsin`` entry point: quick help, and the same commands however built."""

from __future__ import annotations

import subprocess
import sys

import pytest

from tocsin.cli import main as cli_main


def _one_line_helps(parser: object) -> dict[str, str]:
    sub = next(a for a in parser._actions if a.dest == "command")  # type: ignore[attr-defined]
    return {a.dest: a.help for a in sub._choices_actions}


def test_each_command_module_gives_the_one_line_help_listed_for_it() -> None:
    """``tocsin --help`` lists each command with the help kept in COMMANDS; the
    command's own module must give the same, or the two would drift apart."""
    full = _one_line_helps(cli_main.build_parser(every=True))
    listed = {name: one_line for name, (_, one_line) in cli_main.COMMANDS.items()}
    assert full == listed
    assert _one_line_helps(cli_main.build_parser()) == listed


def test_help_imports_no_command_module() -> None:
    """``tocsin --help`` prints every command without importing their modules (which
    pull in the engine, astropy and matplotlib); ``tocsin replay --help`` imports
    the replay module only."""
    probe = (
        "import sys\n"
        "from tocsin.cli.main import main\n"
        "try:\n"
        "    main(sys.argv[1:])\n"
        "except SystemExit:\n"
        "    pass\n"
        "mods = sorted(m for m in sys.modules if m.startswith('tocsin.cli.'))\n"
        "mods.remove('tocsin.cli.main')\n"
        "print('MODULES', ','.join(mods), 'astropy' in sys.modules)\n"
    )
    top = subprocess.run(
        [sys.executable, "-c", probe, "--help"], capture_output=True, text=True, check=True
    )
    assert all(name in top.stdout for name in cli_main.COMMANDS)
    assert top.stdout.strip().endswith("MODULES  False")
    one = subprocess.run(
        [sys.executable, "-c", probe, "replay", "--help"],
        capture_output=True,
        text=True,
        check=True,
    )
    assert "--candidate-far" in one.stdout or "recording" in one.stdout
    last = one.stdout.strip().splitlines()[-1]
    assert "tocsin.cli.replay" in last and "tocsin.cli.tune" not in last


@pytest.mark.parametrize(("argv", "code"), [(["--help", "replay"], 0), (["nosuch"], 2)])
def test_odd_command_lines_still_get_argparse_answers(argv: list[str], code: int) -> None:
    """Options before the command and an unknown command are answered by argparse
    as before (help or usage, and its exit code), not by an import error."""
    with pytest.raises(SystemExit) as exc:
        cli_main.main(argv)
    assert exc.value.code == code


def test_no_command_prints_help_and_is_a_usage_error(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli_main.main([]) == cli_main.EXIT_USAGE
    assert "COMMAND" in capsys.readouterr().out
