"""The one place fairgauge runs an external program (Quarto; R in benchmarks).

Output is captured and returned; on failure it is attached to the raised
:class:`~pipeline.errors.ToolError` so the user sees exactly what the tool said.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

from pipeline.errors import ToolError


def find_tool(name: str) -> str | None:
    """Full path of ``name`` on PATH, or None."""
    return shutil.which(name)


def run_tool(command: list[str], cwd: Path | None = None, timeout: float | None = None) -> str:
    """Run ``command``, return its combined output; raise ToolError if it fails."""
    try:
        done = subprocess.run(
            command,
            cwd=cwd,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
            errors="replace",
            timeout=timeout,
            check=False,
            stdin=subprocess.DEVNULL,
        )
    except FileNotFoundError:
        raise ToolError(command, 127, f"'{command[0]}' was not found on PATH.") from None
    except subprocess.TimeoutExpired as exc:
        raise ToolError(command, -1, f"timed out after {timeout} s.\n{exc.output or ''}") from None
    if done.returncode != 0:
        raise ToolError(command, done.returncode, done.stdout)
    return done.stdout
