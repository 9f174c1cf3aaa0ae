"""The README's two set-up commands and .ci/run agree (CI runs what the README says)."""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

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


def test_ci_fails_on_zero_tests_and_makes_a_fresh_venv():
    script = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert "rm -rf .venv" in script and '"$rc" -eq 5' in script


def test_readme_opens_with_the_job():
    first = (ROOT / "README.md").read_text(encoding="utf-8").split("\n\n")[1]
    for duty in ("plateau", "consolidation", "eligible", "water", "export", "advisory"):
        assert duty in first
