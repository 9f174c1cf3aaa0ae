"""The `rigside` command line: subcommands per docs/cli.md, one-line errors, exit 2."""

from __future__ import annotations

import subprocess
import sys

import pytest

from monitor.app.cli import COMMANDS, build_parser, main


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "monitor.app", *args], capture_output=True, text=True, timeout=60)


def test_contract_commands_are_declared():
    # the documented commands (docs/cli.md); more may be added, none dropped
    assert set(COMMANDS) >= {"demo", "record", "import", "report", "export", "decide", "log", "care"}


def test_help_lists_the_commands_that_exist():
    result = run_cli("--help")
    assert result.returncode == 0 and "rigside" in result.stdout


def test_unknown_command_is_one_line_and_exit_2():
    result = run_cli("frobnicate")
    assert result.returncode == 2
    assert len(result.stderr.strip().splitlines()) == 1 and "frobnicate" in result.stderr


def test_parser_builds_without_importing_qt_or_scipy():
    code = "import sys; from monitor.app.cli import build_parser; build_parser(); " \
           "print(sorted(m for m in sys.modules if m.split('.')[0] in ('PySide6', 'scipy', 'pyqtgraph')))"
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "[]"


def test_a_command_imports_its_own_module_only_and_help_still_names_every_command():
    code = ("import sys; from monitor.app.cli import build_parser; parser = build_parser('report'); "
            "print(sorted(m.rsplit('.', 1)[1] for m in sys.modules if m.startswith('monitor.app.commands.'))); "
            "parser.parse_args(['--help'])")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    imported, usage = result.stdout.split("\n", 1)
    assert imported == "['report']"
    assert all(name in usage for name in COMMANDS)


def test_version_names_the_installed_release():
    from monitor.app.cli import installed_version

    result = run_cli("--version")
    assert result.returncode == 0 and result.stdout.strip() == f"rigside {installed_version()}"


def test_bad_flag_exits_2_with_one_line(capsys):
    assert build_parser().prog == "rigside"
    with pytest.raises(SystemExit) as caught:
        main(["--no-such-flag"])
    assert caught.value.code == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


def test_plain_rigside_opens_the_window(monkeypatch):
    import monitor.app.commands.window as window

    opened = []
    monkeypatch.setattr(window, "run", lambda args: opened.append(args.command) or 0)
    assert main([]) == 0 and opened == ["window"]


def test_a_reader_that_goes_away_gives_no_traceback(tmp_path):
    """`rigside report --json | head -1`: the pipe closes before the command is done."""
    script = ("import sys; from monitor.app import cli; from monitor.app.commands import report\n"
              "def run(args):\n    for _ in range(100000):\n        print('x' * 80)\n    return 0\n"
              "report.run = run\nsys.exit(cli.main(['report', '--json']))\n")
    child = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    child.stdout.read(100)
    child.stdout.close()
    err = child.stderr.read().decode()
    assert child.wait(timeout=60) == 1 and "Traceback" not in err, err
