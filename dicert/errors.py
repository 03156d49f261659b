"""The exception tree of dicert.

Every error a user can cause derives from :class:`DicertError`; the CLI maps these to a
one-line message on stderr and exit code 2 (bad input) or 1 (verification failure).
Subclasses also inherit the builtin they refine, so ``except ValueError`` keeps working.
"""

from __future__ import annotations


class DicertError(Exception):
    """Base class of all errors raised by dicert."""

    exit_code = 2


class LogFormatError(DicertError, ValueError):
    """A trial log is missing, malformed or truncated.

    The message names the file and the line number (text formats) or the byte offset
    (binary formats) of the first problem.
    """

    def __init__(self, path: object, where: str, problem: str) -> None:
        self.path = str(path)
        self.where = where
        self.problem = problem
        loc = f"{self.path}, {where}" if where else self.path
        super().__init__(f"{loc}: {problem}")


class ProtocolError(DicertError, ValueError):
    """A protocol file is invalid; the message names the file and the offending key."""


class ParameterError(DicertError, ValueError):
    """A parameter given to a public function or command is out of its valid range."""


class SeedError(DicertError, ValueError):
    """An extractor seed is missing or too short; the message says how many bytes are needed."""


class SolverError(DicertError, RuntimeError):
    """A numerical solver failed; ``status`` carries the solver's own status string."""

    def __init__(self, message: str, status: str | None = None) -> None:
        self.status = status
        super().__init__(message if status is None else f"{message} (solver status: {status})")


class VerificationError(DicertError):
    """An audit record, chain, log, seed or bits file does not match what was claimed.

    ``field`` names the first field that disagrees.
    """

    exit_code = 1

    def __init__(self, message: str, field: str | None = None) -> None:
        self.field = field
        super().__init__(message if field is None else f"{field}: {message}")


__all__ = [
    "DicertError",
    "LogFormatError",
    "ParameterError",
    "ProtocolError",
    "SeedError",
    "SolverError",
    "VerificationError",
]
