"""Exception types and exit codes shared by every stage.

Expected failures (a file that is not a capture, a port that vanished) are raised as
one of these, with a message a technician can act on; the command line prints the message
on one line and exits with the code attached to the class. Anything else is a bug.
"""

from __future__ import annotations

EXIT_OK = 0
EXIT_USAGE = 2
EXIT_BAD_INPUT = 3
EXIT_DEVICE = 4


class BuswitnessError(Exception):
    """Base of every expected error; ``exit_code`` is what the command line returns."""

    exit_code = 1


class UsageError(BuswitnessError, ValueError):
    """The user asked for something that does not make sense (a bad option value)."""

    exit_code = EXIT_USAGE


class SerialFormatError(UsageError):
    """A baud rate or character format such as ``9Q1`` that no serial line can have."""


class InputFileError(BuswitnessError):
    """An input file cannot be read or is not what it claims to be."""

    exit_code = EXIT_BAD_INPUT

    def __init__(self, path: object, problem: str, hint: str = "") -> None:
        self.path = str(path)
        self.problem = problem
        self.hint = hint
        text = f"{self.path}: {problem}"
        if hint:
            text += f" ({hint})"
        super().__init__(text)


class NotACaptureError(InputFileError):
    """The file does not start with the capture-file magic bytes."""


class UnsupportedVersionError(InputFileError):
    """The file is a capture, but of a format version this build cannot read."""


class DeviceError(BuswitnessError):
    """A serial device could not be opened, configured or read."""

    exit_code = EXIT_DEVICE


class OutputError(BuswitnessError):
    """An output file or directory cannot be written (disk full, no permission)."""

    exit_code = EXIT_BAD_INPUT


class NotBuiltYet(BuswitnessError):
    """A verb whose capability has not been built in this version."""

    exit_code = EXIT_USAGE
