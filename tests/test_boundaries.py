"""Package boundaries (DEVELOPERS.md): the import-linter contracts in pyproject.toml hold.

The contracts (core pure and its areas independent, drivers and the simulator
apart from the monitor, a plain ui, Qt only in ui and app.window, sqlite3 only in the
store) are read from every import statement, the lazy ones inside functions
too; a test below proves that on a small package of its own. Core must also
never open a file, which no import shows: that is checked on the source.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
LINT = [sys.executable, "-c", "import sys; from importlinter.cli import lint_imports_command; sys.exit(lint_imports_command())"]


def lint(folder: Path) -> subprocess.CompletedProcess:
    return subprocess.run(LINT + ["--no-cache"], cwd=folder, capture_output=True, text=True, timeout=120,
                          env={"PYTHONPATH": str(folder), "PATH": "/usr/bin:/bin"})


def calls_open(source: str) -> list[int]:
    return [n.lineno for n in ast.walk(ast.parse(source))
            if isinstance(n, ast.Call) and isinstance(n.func, ast.Name) and n.func.id == "open"]


def test_the_contracts_hold():
    done = lint(ROOT)
    assert done.returncode == 0, done.stdout[-4000:] + done.stderr[-2000:]
    assert "0 broken" in done.stdout


def test_core_opens_no_files():
    found = [f"{p.relative_to(ROOT)}:{line}" for p in sorted((ROOT / "monitor" / "core").rglob("*.py"))
             for line in calls_open(p.read_text(encoding="utf-8"))]
    assert found == []


def test_a_lazy_import_breaks_a_contract(tmp_path):
    """import-linter sees an import inside a function (the way heavy modules are imported here)."""
    core = tmp_path / "pkg" / "core"
    core.mkdir(parents=True)
    (tmp_path / "pkg" / "__init__.py").write_text("")
    (core / "__init__.py").write_text("")
    (core / "sneaky.py").write_text("import math\n\ndef save(rows):\n    import sqlite3\n    return sqlite3\n")
    (tmp_path / "pyproject.toml").write_text(
        '[tool.importlinter]\nroot_packages = ["pkg"]\ninclude_external_packages = true\n\n'
        '[[tool.importlinter.contracts]]\nname = "core pure"\ntype = "forbidden"\n'
        'source_modules = ["pkg.core"]\nforbidden_modules = ["sqlite3"]\n')
    done = lint(tmp_path)
    assert done.returncode != 0 and "pkg.core.sneaky -> sqlite3" in done.stdout, done.stdout + done.stderr
    (core / "sneaky.py").write_text("import math\n")
    assert lint(tmp_path).returncode == 0


def test_every_app_module_outside_the_window_is_kept_free_of_qt():
    """The Qt contract lists app's modules one by one: a new module outside app.window must be added to it."""
    import tomllib

    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    contract = next(c for c in config["tool"]["importlinter"]["contracts"] if c["id"] == "qt-in-ui-and-window")
    listed = contract["source_modules"]
    allowed_qt = ("monitor.app.window", "monitor.app.commands.window", "monitor.app.commands.demo")
    app = ROOT / "monitor" / "app"
    modules = [".".join(("monitor", "app", *p.relative_to(app).with_suffix("").parts)) for p in app.rglob("*.py")
               if p.name != "__init__.py"]
    missing = [m for m in modules
               if not any(m == a or m.startswith(a + ".") for a in allowed_qt)
               and not any(m == s or m.startswith(s + ".") for s in listed)]
    assert missing == []
