"""Typed errors of lightloom, each carrying a message a user can act on, and the exit statuses."""

from __future__ import annotations

EXIT_OK = 0
EXIT_BAD_INPUT = 2
EXIT_FAULT = 3
EXIT_INTERRUPTED = 130


class LightloomError(Exception):
    """Base class of every error lightloom reports to a user (never a bug)."""

    exit_status: int = EXIT_FAULT

    def one_line(self) -> str:
        """The message as the command line prints it: a single line."""
        return " ".join(str(self).split())


class InputError(LightloomError):
    """Bad input in a file the user wrote: reported as ``FILE:LINE: message``, exit status 2."""

    exit_status = EXIT_BAD_INPUT

    def __init__(self, message: str, file: str | None = None, line: int | None = None) -> None:
        self.message = message
        self.file = file
        self.line = line
        super().__init__(self._format())

    def _format(self) -> str:
        if self.file is None:
            return self.message
        return f"{self.file}:{self.line if self.line is not None else 1}: {self.message}"


class ProtocolError(InputError):
    """A protocol file that cannot be understood or is physically impossible."""


class BenchError(InputError):
    """A bench file that cannot be understood, or a bench that cannot do what a protocol asks."""


class UsageError(InputError):
    """A bad command-line request (missing file, existing output, ...): exit status 2."""


class OpticsError(LightloomError):
    """A request the optics model cannot satisfy, e.g. a target state the analyzer cannot reach."""

    exit_status = EXIT_BAD_INPUT


class RunFault(LightloomError):
    """A hardware or run fault that stopped a run after a safe stop: exit status 3."""

    exit_status = EXIT_FAULT


class StorageError(LightloomError):
    """A run file or journal that cannot be read or written."""

    exit_status = EXIT_BAD_INPUT
