"""The project's error hierarchy.

Every error a user can cause is one of these. Each carries *where* (file, line, column, or a row
or analysis id), *what* is wrong, and *what to do*, so that the command line can print one clear
line and map the kind to an exit code (see `planrunner.cli.main`).
"""

from __future__ import annotations


class PlanrunnerError(Exception):
    """Base of every error that planrunner raises on purpose."""

    def __init__(self, message: str, *, where: str | None = None, hint: str | None = None):
        super().__init__(message)
        self.message = message
        self.where = where
        self.hint = hint

    def __str__(self) -> str:
        text = f"{self.where}: {self.message}" if self.where else self.message
        return f"{text} ({self.hint})" if self.hint else text


class PlanError(PlanrunnerError):
    """The plan file is wrong: syntax, schema or cross references."""

    def __init__(self, message: str, *, where: str | None = None, hint: str | None = None,
                 problems: list[str] | None = None):
        super().__init__(message, where=where, hint=hint)
        self.problems = problems or []

    def __str__(self) -> str:
        if self.problems:
            return "\n".join(self.problems)
        return super().__str__()


class DataError(PlanrunnerError):
    """A data file is missing, changed, or does not match what the plan declares.

    ``problems`` holds every problem found in one file (each a DataError), reported together."""

    def __init__(self, message: str, *, where: str | None = None, hint: str | None = None,
                 problems: list[DataError] | None = None):
        super().__init__(message, where=where, hint=hint)
        self.problems = problems or []

    @classmethod
    def of_all(cls, problems: list[DataError], where: str | None) -> DataError:
        """One error for every problem found in a file (the problem itself when there is one)."""
        if len(problems) == 1:
            return problems[0]
        return cls(f"{len(problems)} problems in the data (each column's first one)", where=where,
                   problems=problems)

    def __str__(self) -> str:
        if not self.problems:
            return super().__str__()
        lines = [f"{self.where}: {self.message}:" if self.where else f"{self.message}:"]
        for problem in self.problems:
            text = f"{problem.message} ({problem.hint})" if problem.hint else problem.message
            lines.append(f"  {text}")
        return "\n".join(lines)


class EngineError(PlanrunnerError):
    """The data reach an engine but the method cannot be applied to them (too few rows, ...)."""


class ExpressionError(PlanrunnerError):
    """A row filter expression cannot be parsed or evaluated.

    `position` is the 0-based character offset in the expression text where the problem is;
    `rows` the rows where the expression has no defined value (log of a negative number, ...).
    """

    def __init__(self, message: str, *, position: int = 0, text: str = "", hint: str | None = None,
                 rows: tuple[int, ...] = ()):
        super().__init__(message, hint=hint)
        self.position = position
        self.text = text
        self.rows = rows  # 0-based rows (of the arrays evaluated) where a value is undefined

    def excerpt(self) -> str:
        """The expression with a caret under the offending character."""
        return f"{self.text}\n{' ' * self.position}^"


class OutputError(PlanrunnerError):
    """A new file or folder cannot be written: no space, no permission, or its name is taken
    (planrunner never replaces a file).

    Nothing partial is left where a complete file or run is expected: the staging copy is removed.
    """


class RecordError(PlanrunnerError):
    """A file that planrunner wrote and now reads back is missing, unreadable or damaged: a record,
    a lock, a run history or a self-check report (not JSON, another format, fields missing).

    The plan is not at fault; the message names the file (with line and column for broken JSON).
    """


class SigningError(PlanrunnerError):
    """A key, a passphrase, a signers file or a file to sign cannot be used (exit 2).

    A signature that does not hold is not an error but a finding: `verify` and `history` report it
    and exit with 3.
    """


class Terminated(KeyboardInterrupt):
    """The process was asked to stop (SIGTERM, SIGHUP). Raised like Ctrl-C's KeyboardInterrupt, so
    that every cleanup an interrupt runs (stopping workers, removing a staging folder) runs too."""

    def __init__(self, signal_number: int, name: str):
        super().__init__(name)
        self.signal_number = signal_number
        self.name = name
