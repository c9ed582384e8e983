"""Exceptions with a user-facing message, a hint and an exit code.

Free of CLI imports: the library raises these, ``fleetwatch.cli`` maps them to
``Error: <message>`` / ``Hint: <hint>`` lines and the process exit code.

Exit codes (design.md section 7): 0 ok; 1 bad input or data; 2 usage;
3 a ``--fail-on`` condition met (status).
"""
from __future__ import annotations

__all__ = [
    "EXIT_OK", "EXIT_BAD_INPUT", "EXIT_USAGE", "EXIT_FAIL_ON",
    "FleetwatchError", "UsageError", "ConfigError", "InputError", "IngestError",
    "LakeError", "LockHeldError", "QueryError", "ModelError", "ReportError",
]

EXIT_OK = 0
EXIT_BAD_INPUT = 1
EXIT_USAGE = 2
EXIT_FAIL_ON = 3


class FleetwatchError(Exception):
    """Base class: an expected failure the user can act on.

    ``message`` says what went wrong (name the file, line, column and value
    where there is one); ``hint`` says what to do next.
    """

    exit_code: int = EXIT_BAD_INPUT

    def __init__(self, message: str, hint: str | None = None, exit_code: int | None = None):
        super().__init__(message)
        self.message = message
        self.hint = hint
        if exit_code is not None:
            self.exit_code = exit_code

    def __str__(self) -> str:  # pragma: no cover - trivial
        return self.message


class UsageError(FleetwatchError):
    """Wrong command-line use: bad option value, missing argument (exit 2)."""

    exit_code = EXIT_USAGE


class ConfigError(FleetwatchError):
    """A setting or configuration file is invalid (exit 2: fix the call or the file)."""

    exit_code = EXIT_USAGE


class InputError(FleetwatchError):
    """Input data or a mapping file cannot be used (exit 1)."""


class IngestError(InputError):
    """A file was refused during ingest (exit 1); other files may still have gone in."""


class LakeError(FleetwatchError):
    """The lake is missing, damaged or cannot be written (exit 1)."""


class LockHeldError(LakeError):
    """Another fleetwatch process holds the lake's writer lock."""


class QueryError(FleetwatchError):
    """An ad-hoc SQL query was refused or failed (exit 1)."""


class ModelError(FleetwatchError):
    """A model cannot be fitted or used (not enough data, not fitted) (exit 1)."""


class ReportError(FleetwatchError):
    """A report cannot be built or printed (exit 1)."""
