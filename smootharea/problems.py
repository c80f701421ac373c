"""Input problems: collected in one pass at the boundary, reported together.

Every problem names the file, the column and (where there is one) the area,
so an analyst can go straight to the offending row.
"""
from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True)
class Problem:
    """One thing wrong with the inputs."""

    file: str
    message: str
    column: str | None = None
    area_id: str | None = None

    def __str__(self) -> str:
        where = self.file
        if self.column:
            where += f", column '{self.column}'"
        if self.area_id is not None:
            where += f", area '{self.area_id}'"
        return f"{where}: {self.message}"


class InputError(Exception):
    """Raised once, with every problem found, before any model is built."""

    def __init__(self, problems: list[Problem]):
        self.problems = list(problems)
        super().__init__(self.render())

    def render(self) -> str:
        lines = [f"{len(self.problems)} problem(s) with the inputs:"]
        lines += [f"  - {problem}" for problem in self.problems]
        return "\n".join(lines)


@dataclass
class ProblemLog:
    """Accumulates problems and warnings while inputs are checked."""

    problems: list[Problem] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def add(self, file: str, message: str, column: str | None = None,
            area_id: str | None = None) -> None:
        self.problems.append(Problem(str(file), message, column, area_id))

    def add_per_area(self, file: str, column: str, area_ids, message: str,
                     limit: int = 20) -> None:
        """One problem per offending area, capped so a broken file stays readable."""
        area_ids = [str(a) for a in area_ids]
        for area_id in area_ids[:limit]:
            self.add(file, message, column, area_id)
        if len(area_ids) > limit:
            self.add(file, f"{message} (and {len(area_ids) - limit} more areas)", column)

    def warn(self, message: str) -> None:
        self.warnings.append(message)

    def raise_if_any(self) -> None:
        if self.problems:
            raise InputError(self.problems)
