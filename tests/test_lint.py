"""Lint, format and type checks of the code base (ruff and mypy, pinned in the test extras)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CODE = ["pipeline", "tests", "benchmarks"]


@pytest.mark.parametrize(
    "command",
    [
        ["ruff", "check", *CODE],
        ["ruff", "format", "--check", *CODE],
        ["mypy"],  # the files and settings are in pyproject.toml ([tool.mypy])
    ],
    ids=["ruff-check", "ruff-format", "mypy"],
)
def test_clean(command: list[str]) -> None:
    run = subprocess.run(
        [sys.executable, "-m", *command], cwd=ROOT, capture_output=True, text=True, timeout=600
    )
    assert run.returncode == 0, run.stdout + run.stderr
