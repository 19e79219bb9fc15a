"""Typed errors. The library raises these; only ``pipeline.cli`` prints them and sets exit codes."""

from __future__ import annotations

from dataclasses import dataclass


class FairgaugeError(Exception):
    """Base of every error fairgauge raises on purpose."""

    exit_code = 1


@dataclass(frozen=True)
class Problem:
    """One thing wrong with the input, located as precisely as we can."""

    where: str  # config key, or "file, column"
    message: str  # what is wrong, what is allowed, what to do

    def __str__(self) -> str:
        return f"{self.where}: {self.message}"


class ProblemsError(FairgaugeError):
    """Several problems found in one pass, reported together."""

    exit_code = 2
    heading = "problems"

    def __init__(self, problems: list[Problem]):
        self.problems = list(problems)
        lines = "\n".join(f"  - {p}" for p in self.problems)
        super().__init__(f"{len(self.problems)} {self.heading}:\n{lines}")


class ConfigError(ProblemsError):
    """The cycle config is invalid; nothing has been read yet."""

    heading = "problem(s) in the cycle config; no data were read"


class InputError(ProblemsError):
    """The cohort or unit table is unusable as given."""

    heading = "problem(s) in the input data; nothing was fitted"


class FitError(FairgaugeError):
    """A model fit failed or did not pass its checks; nothing is published."""

    exit_code = 3


class RenderError(FairgaugeError):
    """Turning pages into a site failed; the previous site is untouched."""

    exit_code = 4


class ToolError(RenderError):
    """An external tool exited with an error; its captured output is attached."""

    def __init__(self, command: list[str], returncode: int, output: str):
        self.command = command
        self.returncode = returncode
        self.output = output
        super().__init__(
            f"'{' '.join(command)}' exited with code {returncode}. Its output:\n{output.rstrip()}"
        )


class StrictError(FairgaugeError):
    """Warnings were raised and --strict makes them fatal."""

    exit_code = 5


class ReviewError(FairgaugeError):
    """Staging, sign-off or promotion was refused (nothing was published or changed)."""

    exit_code = 6
