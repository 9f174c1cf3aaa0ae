"""The lab tests cannot be skipped silently in CI: .ci/run asks for them when a PostgreSQL server answers,
and the `lab_url` fixture then fails instead of skipping when it cannot reach one."""

from __future__ import annotations

import shlex
import socket
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
USES_LAB = "def test_lab(lab_url):\n    assert lab_url\n"


def dead_url() -> str:
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    sock.close()
    return f"postgresql://postgres@127.0.0.1:{port}/test"


def run_tiny(tmp_path: Path, env: dict[str, str]) -> subprocess.CompletedProcess:
    """pytest on one test using the project's conftest (and its fixture plugins), with this environment."""
    (tmp_path / "conftest.py").write_text((ROOT / "tests" / "conftest.py").read_text(encoding="utf-8"))
    (tmp_path / "test_one.py").write_text(USES_LAB, encoding="utf-8")
    return subprocess.run([sys.executable, "-m", "pytest", "-q", "-rs", "-p", "no:cacheprovider", "test_one.py"],
                          capture_output=True, text=True, timeout=120, cwd=tmp_path,
                          env={"PATH": "/usr/bin:/bin", "PYTHONPATH": str(ROOT / "tests"), **env})


@pytest.mark.slow  # pytest in a child process, twice
@pytest.mark.parametrize("required, outcome", [("", "1 skipped"), ("1", "1 error")])
def test_no_server_skips_with_a_reason_or_fails_when_required(tmp_path, required, outcome):
    done = run_tiny(tmp_path, {"RIGSIDE_TEST_PG": dead_url(), "RIGSIDE_REQUIRE_PG": required})
    assert outcome in done.stdout, done.stdout
    assert "no PostgreSQL server for the lab tests" in done.stdout


@pytest.mark.slow  # pytest in a child process
def test_ci_requires_the_lab_tests_when_a_server_answers(tmp_path):
    """.ci/run itself on a tiny project whose test prints what CI exported."""
    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen(1)  # something answers on this port
    port = server.getsockname()[1]
    try:
        (tmp_path / ".ci").mkdir()
        (tmp_path / ".ci" / "run").write_text((ROOT / ".ci" / "run").read_text(encoding="utf-8"))
        (tmp_path / "test_env.py").write_text("import os\n\ndef test_env():\n"
                                              "    assert os.environ.get('RIGSIDE_REQUIRE_PG') == os.environ['WANT']\n")
        command = f"{shlex.quote(sys.executable)} -m pytest -q -p no:cacheprovider test_env.py"
        (tmp_path / "README.md").write_text(f"# x\n\n<!-- setup:test -->\n```sh\n{command}\n```\n")
        for url, want in ((f"postgresql://postgres@127.0.0.1:{port}/test", "1"), (dead_url(), "")):
            env = {"PATH": "/usr/bin:/bin", "RIGSIDE_TEST_PG": url, "WANT": want or "none"}
            if not want:
                env["RIGSIDE_REQUIRE_PG"] = "none"  # left as it was when no server answers
            done = subprocess.run(["bash", str(tmp_path / ".ci" / "run")], capture_output=True, text=True,
                                  timeout=120, env=env)
            assert done.returncode == 0, (url, done.stdout + done.stderr)
    finally:
        server.close()
