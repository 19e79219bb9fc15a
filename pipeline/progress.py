"""How the stages of a cycle say what they are doing: a reporter of stages and warnings."""

from __future__ import annotations

from typing import Protocol


class Reporter(Protocol):
    """Receives a line per stage and every warning (the command line prints them)."""

    def stage(self, text: str) -> None: ...
    def warn(self, text: str) -> None: ...


class SilentReporter:
    """Reports nothing (library use and tests)."""

    def stage(self, text: str) -> None:
        pass

    def warn(self, text: str) -> None:
        pass


SILENT = SilentReporter()
