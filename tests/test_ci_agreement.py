"""The README's two set-up commands and .ci/run agree (CI runs what the README says)."""

from __future__ import annotations

import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def readme_command(name: str) -> str:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    match = re.search(rf"<!-- setup:{name} -->\n```sh\n(.+)\n```", text)
    assert match, f"README.md has no setup:{name} block"
    return match.group(1)


def test_ci_runs_the_readmes_test_command():
    printed = subprocess.run(["bash", str(ROOT / ".ci" / "run"), "--print"], capture_output=True, text=True, timeout=30)
    assert printed.returncode == 0, printed.stderr
    assert printed.stdout.strip() == readme_command("test")


def test_both_commands_make_a_venv_and_install_the_project():
    for name in ("demo", "test"):
        command = readme_command(name)
        assert command.startswith("python3 -m venv .venv && . .venv/bin/activate && pip install ")
    assert readme_command("demo").endswith("rigside demo")
    assert "pytest" in readme_command("test") and '".[test]"' in readme_command("test")


def test_ci_makes_a_fresh_venv():
    script = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert "rm -rf .venv" in script


@pytest.mark.slow
@pytest.mark.parametrize("tests, expected", [
    ("def test_ok():\n    assert True\n", 0),
    ("def test_broken():\n    assert False\n", 1),
    ("", 1),  # no test collected: pytest exits 5, CI must fail
])
def test_ci_exit_code_follows_the_test_run(tmp_path, tests, expected):
    """.ci/run itself, on a tiny project whose README test command runs pytest on one file."""
    (tmp_path / ".ci").mkdir()
    (tmp_path / ".ci" / "run").write_text((ROOT / ".ci" / "run").read_text(encoding="utf-8"), encoding="utf-8")
    (tmp_path / "test_one.py").write_text(tests, encoding="utf-8")
    command = f"{shlex.quote(sys.executable)} -m pytest -q -p no:cacheprovider test_one.py"
    (tmp_path / "README.md").write_text(f"# x\n\n<!-- setup:test -->\n```sh\n{command}\n```\n", encoding="utf-8")
    done = subprocess.run(["bash", str(tmp_path / ".ci" / "run")], capture_output=True, text=True, timeout=120)
    assert (done.returncode != 0) == bool(expected), done.stdout + done.stderr


def test_readme_opens_with_the_job():
    first = (ROOT / "README.md").read_text(encoding="utf-8").split("\n\n")[1]
    for duty in ("plateau", "consolidation", "eligible", "water", "export", "advisory"):
        assert duty in first
