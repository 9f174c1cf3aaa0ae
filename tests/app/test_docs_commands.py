"""Every `rigside ...` line of docs/guide.md and docs/cli.md works as written.

Each command line (fenced or inline) is checked against the real parser: its
subcommands exist, `--help` of that command exits 0, and every option it names
is one that command accepts (so `rigside --db FILE`, which argparse refuses,
cannot stand in the docs). A line with no placeholder whose command works on a
store is also run as written, through bash in a folder holding a demo store
(the demo cohort's generated history imported into `lab.sqlite3` and into the
default database); window, demo and record need a screen or a device and run
until stopped, so they are checked through `--help` only. New commands in the
docs are picked up without changing this file.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import os
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from monitor.app import cli

ROOT = Path(__file__).resolve().parents[2]
DOCS = ("docs/guide.md", "docs/cli.md")
RUN_AS_WRITTEN = {"report", "export", "decide", "assign", "log", "care", "import"}
PLACEHOLDER = re.compile(r"^[A-Z][A-Z0-9_:]*(\.[a-z]+)?/?$|[\[\]|…]|\.\.\.|^<.*>$")
FENCE = re.compile(r"```[a-z]*\n(.*?)```", re.S)


def doc_commands(text: str) -> list[str]:
    """Every `rigside` command line of a Markdown text: fenced lines (with their continuations)
    and inline code spans."""
    found = []
    for block in FENCE.findall(text):
        lines: list[str] = []
        for raw in block.splitlines():
            if lines and (lines[-1].endswith("\\") or (raw.startswith(" ") and lines[-1].startswith("rigside"))):
                lines[-1] = lines[-1].rstrip("\\").rstrip() + " " + raw.strip()
            else:
                lines.append(raw.strip())
        found += [re.sub(r"\s+#.*$", "", line) for line in lines if re.match(r"rigside(\s|$)", line)]
    for span in re.findall(r"`([^`]+)`", FENCE.sub("", text)):
        span = " ".join(span.split())
        if re.match(r"rigside(\s|$)", span):
            found.append(span)
    return found


def all_commands() -> list[str]:
    """The docs' commands; `rigside CMD: error: ...` is the form of a message, not a command."""
    found = {c for doc in DOCS for c in doc_commands((ROOT / doc).read_text(encoding="utf-8"))}
    return sorted(c for c in found if not re.match(r"rigside [A-Z]+\b", c))


def subcommands(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return dict(action.choices)
    return {}


def resolve(command: str) -> tuple[list[str], argparse.ArgumentParser, list[str], bool]:
    """(subcommand path, its parser, the options named, whether the line has placeholders)."""
    words = shlex.split(command)[1:]
    parser, path, placeholders = cli.build_parser(), [], False
    options = []
    for word in words:
        bare = word.strip("[]")
        if not options and bare in subcommands(parser):     # `[window]` too: an optional command
            path.append(bare)
            parser = subcommands(parser)[bare]
            placeholders |= bare != word
            continue
        if PLACEHOLDER.search(word):
            placeholders = True
        for option in re.findall(r"(?:^|\[)(--?[a-z][a-z0-9-]*)", word):
            options.append(option)
        if not word.startswith(("-", "[")) and not options and not PLACEHOLDER.search(word):
            options.append("")          # a positional argument (files to import, say)
    return path, parser, [o for o in options if o], placeholders


def help_exit(path: list[str]) -> tuple[int, str]:
    out = io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
        try:
            code = cli.main([*path, "--help"])
        except SystemExit as exc:
            code = exc.code
    return code, out.getvalue()


def test_the_docs_have_commands_and_the_extractor_reads_both_forms():
    text = "x `rigside care weigh|\nsupplement|note` y\n```sh\nrigside record --a 1 \\\n  --b 2   # c\n```\n"
    assert doc_commands(text) == ["rigside record --a 1 --b 2", "rigside care weigh| supplement|note"]
    assert len(all_commands()) > 20
    path, parser, options, _ = resolve("rigside --db FILE")      # what argparse refuses: the top level has no --db
    assert path == [] and options == ["--db"] and "--db" not in parser._option_string_actions
    assert resolve("rigside [window] [--db DB]")[:3:2] == (["window"], ["--db"])


@pytest.mark.parametrize("command", all_commands())
def test_each_documented_command_parses(command):
    path, parser, options, _ = resolve(command)
    code, text = help_exit(path)
    assert code == 0 and "usage: rigside" in text, f"{command}: `rigside {' '.join(path)} --help` failed"
    known = set(parser._option_string_actions)
    unknown = [o for o in options if o not in known]
    assert not unknown, f"{command}: `rigside {' '.join(path)}` has no option {', '.join(unknown)}"


@pytest.fixture(scope="module")
def demo_store(tmp_path_factory):
    """A folder with hist/ (the demo cohort's generated history), lab.sqlite3 and the default database."""
    from mock_rig.demo import prepare_demo

    folder = tmp_path_factory.mktemp("docs")
    prepare_demo(folder / "hist", stages=(("naive", "alder", 1), ("learning", "birch", 1),
                                          ("plateaued", "cedar", 2), ("consolidated", "damson", 2)))
    env = {**os.environ, "HOME": str(folder / "home"), "XDG_DATA_HOME": str(folder / "data"),
           "XDG_CONFIG_HOME": str(folder / "config"), "XDG_STATE_HOME": str(folder / "state"),
           "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}"}
    for name, db in (("alder", "default.sqlite3"), ("birch", "lab.sqlite3"), ("cedar", "lab.sqlite3"),
                     ("damson", "lab.sqlite3")):      # the docs' own import line brings alder into lab.sqlite3
        done = subprocess.run(["rigside", "import", *sorted(str(p) for p in (folder / "hist").glob(f"{name}_s*.rsw")),
                               "--protocol", str(folder / "hist" / f"{name}.protocol.toml"),
                               "--db", str(folder / db)], env=env, capture_output=True, text=True,
                              timeout=300, cwd=folder)
        assert done.returncode == 0, done.stderr
    default = subprocess.run([sys.executable, "-c", "from monitor.app.paths import default_db_path as d; print(d())"],
                             env=env, capture_output=True, text=True, timeout=60).stdout.strip()
    Path(default).parent.mkdir(parents=True, exist_ok=True)
    for name in ("birch", "cedar", "damson"):         # the default database holds all four
        done = subprocess.run(["rigside", "import", *sorted(str(p) for p in (folder / "hist").glob(f"{name}_s*.rsw")),
                               "--protocol", str(folder / "hist" / f"{name}.protocol.toml"),
                               "--db", str(folder / "default.sqlite3")], env=env, capture_output=True, text=True,
                              timeout=300, cwd=folder)
        assert done.returncode == 0, done.stderr
    shutil.move(folder / "default.sqlite3", default)
    (folder / "nwb").mkdir()
    return folder, env


def runnable() -> list[str]:
    """Concrete commands of RUN_AS_WRITTEN, imports first (the later lines use what they store).

    A bare mention such as `rigside care` names a command in prose and is left to the --help check, and
    so is a line that reads a lab's own PostgreSQL server (`--lab URL`; the lab tests run those).
    """
    out = []
    for command in all_commands():
        path, _, _, placeholders = resolve(command)
        mention = shlex.split(command) == ["rigside", *path] and len(path) == 1
        lab = "--lab" in shlex.split(command)
        if path and path[0] in RUN_AS_WRITTEN and not placeholders and not mention and not lab:
            out.append(command)
    return sorted(out, key=lambda c: (shlex.split(c)[1] != "import", c))


INPUTS = ("--protocol", "--mapping", "--settings", "--rigs")


def missing_inputs(command: str, folder: Path) -> list[str]:
    """Input files the line names that the demo folder does not have (a lab's own files)."""
    words = shlex.split(command)[1:]
    words = words[:words.index(">")] if ">" in words else words     # what follows a redirection is output
    path, _, _, _ = resolve(command)
    names = [w for prev, w in zip([""] + words, words) if prev in INPUTS]
    names += [w for prev, w in zip([""] + words, words)
              if w not in path and not w.startswith("-") and not prev.startswith("-") and "." in w]
    return [n for n in names if not list(folder.glob(n))]


def test_some_documented_commands_are_run_as_written():
    assert len(runnable()) >= 8


@pytest.mark.slow  # a simulated history imported, then each command in turn
@pytest.mark.parametrize("command", runnable())
def test_each_concrete_command_runs_on_a_demo_store(demo_store, command):
    folder, env = demo_store
    absent = missing_inputs(command, folder)
    if absent:
        pytest.skip(f"names the lab's own files {absent}: checked through --help only")
    done = subprocess.run(["bash", "-c", command], cwd=folder, env=env, capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, f"{command}\n{done.stderr[-1500:]}"
    assert "Traceback" not in done.stderr
