"""The docs' command pages match the real `--help`, so they cannot drift."""

from __future__ import annotations

import contextlib
import io
import os
import subprocess
import sys
from pathlib import Path

import pytest

from calib.cli import HELP_WIDTH, command_names, command_page, main

PAGES = Path(__file__).resolve().parent.parent / "docs" / "commands"


def _printed_help(argv, monkeypatch) -> str:
    monkeypatch.setenv("COLUMNS", str(HELP_WIDTH))
    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer), pytest.raises(SystemExit) as stop:
        main(argv)
    assert stop.value.code == 0
    return buffer.getvalue()


@pytest.mark.parametrize("command", [None, *command_names()])
def test_command_page_matches_help(command, monkeypatch):
    path = PAGES / ("README.md" if command is None else f"{command}.md")
    assert path.is_file(), f"{path} missing: run python docs/commands/update.py"
    page = path.read_text()
    assert page == command_page(command), f"{path} is out of date: run python docs/commands/update.py"
    printed = _printed_help(([] if command is None else [command]) + ["--help"], monkeypatch)
    assert printed.rstrip("\n") in page


def test_no_stray_command_pages():
    expected = {"README.md", "update.py"} | {f"{c}.md" for c in command_names()}
    assert {p.name for p in PAGES.iterdir() if not p.name.startswith(".")} <= expected | {"__pycache__"}


def test_console_script_prints_the_same_help():
    env = {**os.environ, "COLUMNS": str(HELP_WIDTH)}
    done = subprocess.run([sys.executable, "-m", "calib", "report", "--help"], capture_output=True, text=True,
                          env=env, timeout=60)
    assert done.returncode == 0
    assert done.stdout.rstrip("\n") in (PAGES / "report.md").read_text()


def test_validation_page_names_only_tests_that_exist():
    """docs/validation.md points at real tests: every `tests/file.py::test_name` it cites is defined."""
    import re

    root = PAGES.parent.parent
    page = (root / "docs" / "validation.md").read_text()
    cited = re.findall(r"`(tests/test_\w+\.py)::(test_\w+)`", page)
    assert len(cited) >= 30
    for file, name in cited:
        source = (root / file).read_text()
        assert re.search(rf"^def {name}\(", source, re.M), f"docs/validation.md cites {file}::{name}, which is gone"
