"""The project's own checks run with the tests: ruff (lint, format) and mypy --strict."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize(
    "command",
    [
        ["ruff", "check", "barsmith", "tests", "deploy"],
        ["ruff", "format", "--check", "barsmith", "tests", "deploy"],
        [sys.executable, "-m", "mypy"],
    ],
    ids=["ruff-check", "ruff-format", "mypy"],
)
def test_checks_pass(command: list[str]) -> None:
    if command[0] == "ruff" and shutil.which("ruff") is None:
        pytest.fail("ruff is not installed: pip install '.[test]'")
    done = subprocess.run(command, cwd=ROOT, capture_output=True, text=True, check=False)
    assert done.returncode == 0, done.stdout + done.stderr
