"""Problems found in input tables, reported all at once.

Every check in calib reports a :class:`Problem` naming the file, the row, the column,
what is wrong and how to fix it. A command collects all problems it can find, raises
one :class:`InputError`, exits 1 and writes nothing.
"""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an input table.

    ``row`` is the 1-based data row (the first record under the header is row 1);
    for CSV files the text also gives the line number in the file (row + 1).
    ``row`` and ``column`` are None when the problem concerns a whole file or table.
    """

    file: str
    row: int | None
    column: str | None
    message: str
    fix: str
    is_csv: bool = True

    def __str__(self) -> str:
        where = [self.file]
        if self.row is not None:
            where.append(f"row {self.row}" + (f" (line {self.row + 1})" if self.is_csv else ""))
        if self.column is not None:
            where.append(f"column '{self.column}'")
        return f"{', '.join(where)}: {self.message}. Fix: {self.fix}"


@dataclass(frozen=True)
class Warning_:
    """Something worth knowing that does not stop the command (``check`` prints these)."""

    message: str
    file: str | None = None
    row: int | None = None
    column: str | None = None

    def __str__(self) -> str:
        where = [w for w in (self.file, f"row {self.row}" if self.row else None,
                             f"column '{self.column}'" if self.column else None) if w]
        return (", ".join(where) + ": " if where else "") + self.message


class InputError(Exception):
    """Raised when input tables cannot be used; carries every problem found."""

    def __init__(self, problems: list[Problem]):
        self.problems = list(problems)
        super().__init__(self.format())

    def format(self, limit: int = 50) -> str:
        lines = [f"{len(self.problems)} problem(s) found in the input:"]
        for p in self.problems[:limit]:
            lines.append(f"  - {p}")
        if len(self.problems) > limit:
            lines.append(f"  ... and {len(self.problems) - limit} more of the same kinds")
        return "\n".join(lines)


@dataclass
class ProblemList:
    """Collects problems while checks run; raise at the end with :meth:`raise_if_any`."""

    problems: list[Problem] = field(default_factory=list)

    def add(self, *args, **kwargs) -> None:
        self.problems.append(Problem(*args, **kwargs))

    def extend(self, problems) -> None:
        self.problems.extend(problems)

    def raise_if_any(self) -> None:
        if self.problems:
            raise InputError(self.problems)
