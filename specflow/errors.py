"""specflow's own error types: every problem a user can cause is one of these, one line each."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Problem:
    """One problem in a spec file or its data: where (key path, line) and what."""

    message: str
    path: str = ""  # dotted TOML key path, e.g. "axes.instruments.variants.canal.add_controls"
    line: int | None = None
    file: str = ""

    def __str__(self) -> str:
        where = self.file or "spec"
        if self.line:
            where += f":{self.line}"
        key = f" {self.path}:" if self.path else ""
        return f"{where}:{key} {self.message}"


class SpecflowError(Exception):
    """Base of every error specflow reports to a user (exit code 2, no traceback)."""

    exit_code = 2

    def lines(self) -> list[str]:
        return [str(self)]


class SpecError(SpecflowError):
    """A spec file (or its data) has one or more problems; all are reported at once."""

    def __init__(self, problems: list[Problem]):
        self.problems = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))

    def lines(self) -> list[str]:
        return [str(p) for p in self.problems]


class DataError(SpecflowError):
    """A data file cannot be read or does not match what the spec says about it."""


class FitFailure(Exception):
    """A numerical reason why one specification cannot be fitted (recorded, grid goes on)."""


class RunError(SpecflowError):
    """The workflow could not run or finish (lock held, crash in a job, missing outputs)."""
