"""Problems found in a record: where they are and what to do about them."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, kw_only=True, slots=True)
class RecordProblem:
    """One thing wrong with a record file.

    ``line`` and ``column`` are 1-based (0 when the problem concerns the whole file);
    ``key`` is the dotted key path inside the record (``controller.pid.kp``, ``''`` for the
    document); ``message`` says what is wrong and how to fix it.
    """

    path: str
    line: int
    column: int
    key: str
    message: str

    def __str__(self) -> str:
        where = f"{self.path}:{self.line}:{self.column}" if self.line else self.path
        return f"{where}: {self.key}: {self.message}" if self.key else f"{where}: {self.message}"

    def to_json(self) -> dict[str, object]:
        text = f"{self.key}: {self.message}" if self.key else self.message
        return {"path": self.path, "line": self.line, "column": self.column, "key": self.key,
                "message": text}


class RecordInvalid(Exception):
    """Raised with every problem of one record at once."""

    def __init__(self, problems: list[RecordProblem]):
        super().__init__("\n".join(str(p) for p in problems))
        self.problems = problems
