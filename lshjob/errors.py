"""Errors lshjob raises for bad input or a busy output; the CLI prints the message and exits
non-zero (2, or the class's ``exit_code``)."""


class LshjobError(Exception):
    """Base class: the message says what was expected, what was given, and where."""


class InputError(LshjobError):
    """The input data (a file, a column, a value) is not what the job can use."""


class ParameterError(LshjobError):
    """An option or argument is out of range or inconsistent with another."""


class IncompatibleSignatures(LshjobError):
    """Signatures of different scheme, length or seed cannot be combined."""


class Busy(LshjobError):
    """Another run holds the lock on the output folder; try again later (exit code 75)."""

    exit_code = 75
