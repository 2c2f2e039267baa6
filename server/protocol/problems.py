"""Validation problems: every one names a place, and all are reported together."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from server.protocol.marked import Mark


@dataclass(frozen=True, slots=True)
class Problem:
    mark: Mark
    message: str

    def __str__(self) -> str:
        return f"{self.mark.file}:{self.mark.line}:{self.mark.col}: {self.message}"


class InvalidFile(Exception):
    """Raised with every problem found in one or more files."""

    def __init__(self, problems: list[Problem]):
        self.problems = sorted(problems, key=lambda p: (p.mark.file, p.mark.line, p.mark.col))
        super().__init__("\n".join(str(p) for p in self.problems))
