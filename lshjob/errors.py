"""Errors lshjob raises for bad input, and the exit codes a command ends with.

Exit codes follow sysexits.h where it has one: 0 done, 1 a check failed (an audit below its
gate, wrong pairs), 2 bad input or options (EX_USAGE's role; 2 is also what the option parser
gives), 70 internal error (EX_SOFTWARE: a bug; the traceback goes to a log file), 75 busy
(EX_TEMPFAIL: try again later). An error class carries its code as ``exit_code``.
"""

EXIT_DONE, EXIT_CHECK_FAILED, EXIT_BAD_INPUT, EXIT_INTERNAL, EXIT_BUSY = 0, 1, 2, 70, 75


class LshjobError(Exception):
    """Base class: the message says what was expected, what was given, and where."""

    exit_code = EXIT_BAD_INPUT


class InputError(LshjobError):
    """The input data (a file, a column, a value) is not what the job can use."""


class ParameterError(LshjobError):
    """An option or argument is out of range or inconsistent with another."""


class IncompatibleSignatures(LshjobError):
    """Signatures of different scheme, length or seed cannot be combined."""


class Busy(LshjobError):
    """Another run holds the lock on the output folder; try again later (exit code 75)."""

    exit_code = EXIT_BUSY


def key_text(values: tuple) -> str:
    """A set's key as messages and reports show it: ``bob`` or ``bob, Harbour, 2026-02-01``
    (no Python reprs: dates in ISO form, a missing value as 'null')."""
    return ", ".join(_text(v) for v in values)


def _text(value) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return str(value).lower()
    return value.isoformat() if hasattr(value, "isoformat") else str(value)
