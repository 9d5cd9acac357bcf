"""How a command ends when it fails: one line on stderr (under ``--json`` the same message as
a JSON record on stdout too), and the exit code of the error's class (:mod:`lshjob.errors`). An exception
lshjob did not expect is a bug: its traceback goes to a log file, the line says what failed
and where the traceback is, and the exit code is 70."""

from __future__ import annotations

import json
import os
import sys
import tempfile
import time
import traceback
from functools import wraps
from pathlib import Path

import typer

from lshjob._version import __version__
from lshjob.errors import EXIT_BAD_INPUT, EXIT_INTERNAL, LshjobError, ParameterError
from lshjob.runtime import stopping

EXIT_CODES = (  # "\b" keeps the lines as they are in --help
    "\b\nExit codes:\n"
    "  0   done\n"
    "  1   a check failed (audit)\n"
    "  2   bad input or options\n"
    "  70  internal error (the traceback goes to a log file; its path is printed)\n"
    "  75  busy (try again later)\n"
    "  129, 130, 143  stopped by SIGHUP, SIGINT or SIGTERM"
)
LARGEST_WHOLE_NUMBER = 2**63 - 1  # what a 64-bit integer column or kernel argument holds
LARGEST_OF = {"seed": 2**64 - 1}  # seeds are unsigned 64-bit


def one_line(text: object) -> str:
    """A message on one line that a terminal shows as it is: its lines joined with "; ", and
    any other character that does not print (NUL, ESC, other control bytes read from a
    damaged file) written as a Python escape (``\\x00``)."""
    joined = "; ".join(part.strip() for part in str(text).splitlines() if part.strip())
    return "".join(ch if ch.isprintable() else ascii(ch)[1:-1] for ch in joined)


def to_stdout(text: str) -> None:
    """Print ``text`` on stdout. A reader that went away (``lshjob ... | head``) does not make
    the command fail: the rest of its output is dropped and its work decides the exit code."""
    try:
        typer.echo(text)
    except BrokenPipeError:
        drop_stdout()


def drop_stdout() -> None:
    """Send what is left for stdout (buffered or still to come) nowhere."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):
        pass


def log_folder() -> Path:
    """Where tracebacks of internal errors go: ``$XDG_STATE_HOME/lshjob``, else
    ``~/.local/state/lshjob``; the system's temporary folder when that cannot be made."""
    state = os.environ.get("XDG_STATE_HOME") or os.path.join(os.path.expanduser("~"), ".local", "state")
    folder = Path(state) / "lshjob"
    try:
        folder.mkdir(parents=True, exist_ok=True)
        if os.access(folder, os.W_OK):
            return folder
    except OSError:
        pass
    return Path(tempfile.gettempdir())


def write_traceback(exc: BaseException, command: str) -> Path:
    """Write the command line, the version and ``exc``'s traceback to a new log file named
    by the UTC time and the process id; return its path."""
    stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime())
    path = log_folder() / f"lshjob-{stamp}-{os.getpid()}.log"
    text = (f"lshjob {__version__}, command: {' '.join(sys.argv)}\n"
            f"lshjob {command} failed at {stamp}\n\n"
            + "".join(traceback.format_exception(type(exc), exc, exc.__traceback__)))
    path.write_text(text)
    return path


def fail(message: str, code: int, as_json: bool, log: Path | None = None) -> typer.Exit:
    """Print ``error: message`` on stderr (and ``{"error", "exit"[, "log"]}`` on stdout under
    ``--json``); return the exit to raise."""
    message = one_line(message)
    try:
        typer.echo(f"error: {message}", err=True)
    except OSError:  # no stderr to write to: the exit code still says it
        pass
    if as_json:
        record = {"error": message, "exit": code}
        if log is not None:
            record["log"] = str(log)
        to_stdout(json.dumps(record))
    return typer.Exit(code)


def failure(exc: Exception, command: str, as_json: bool) -> typer.Exit:
    """The exit for an exception that ended ``lshjob command``: lshjob's own errors and files
    that cannot be read or written are bad input (or the code their class carries); anything
    else is an internal error, logged."""
    if isinstance(exc, LshjobError):
        return fail(str(exc), getattr(exc, "exit_code", EXIT_BAD_INPUT), as_json)
    if isinstance(exc, OSError):  # an output folder that cannot be made, a full disk, no permission
        where = exc.filename if exc.filename is not None else "a file"
        return fail(f"{where}: {exc.strerror or exc}", EXIT_BAD_INPUT, as_json)
    try:
        log = write_traceback(exc, command)
        where = f"the traceback is in {log}"
    except OSError as err:  # nowhere to write: say so, still on one line
        log, where = None, f"the traceback could not be written ({err.strerror or err})"
    what = f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
    return fail(f"internal error in lshjob {command} ({what}); {where}", EXIT_INTERNAL, as_json, log)


def check_whole_numbers(options: dict) -> None:
    """Refuse a whole-number option too large for a 64-bit integer, before it reaches a
    column or a compiled kernel (there it would overflow with a traceback)."""
    for name, value in options.items():
        largest = LARGEST_OF.get(name, LARGEST_WHOLE_NUMBER)
        if isinstance(value, int) and not isinstance(value, bool) and abs(value) > largest:
            flag = "--" + name.replace("_", "-")
            raise ParameterError(f"{flag} {value} is out of range; the largest accepted is {largest}")


def run_app(app: typer.Typer, args: list[str]) -> int:
    """Run the command line ``args``; return the exit code. Usage errors of the option parser
    (an unknown option, a missing argument) are one line, ``error: ...; see lshjob COMMAND
    --help``, code 2 (under ``--json`` also the message as a JSON record on stdout); ``lshjob`` alone prints
    the help on stdout and exits 2. A stop signal ends the command with one line and 128 + its
    number (:mod:`lshjob.runtime.stopping`)."""
    as_json = "--json" in args
    command = args[0] if args and not args[0].startswith("-") else ""
    try:
        code = app(args=args, prog_name="lshjob", standalone_mode=False)
    except typer.Exit as exc:
        code = exc.exit_code
    except typer.Abort:
        typer.echo("Aborted!", err=True)
        code = 1
    except typer.TyperException as exc:  # the parser's usage errors
        code = getattr(exc, "exit_code", EXIT_BAD_INPUT)
        ctx = getattr(exc, "ctx", None)
        if type(exc).__name__ == "NoArgsIsHelpError":  # `lshjob` alone: the help, on stdout
            to_stdout(exc.format_message())
        else:
            where = "lshjob" + (f" {ctx.info_name}" if ctx is not None and ctx.parent is not None else "")
            text = one_line(exc.format_message().rstrip("."))
            fail(f"{text}; see {where} --help", code, False)
            if as_json:  # the record keeps the parser's message alone
                to_stdout(json.dumps({"error": text, "exit": code}))
    except SystemExit as exc:
        code = exc.code
        if isinstance(exc.__context__, BrokenPipeError):  # the parser's help, to a reader gone
            drop_stdout()
            code = 0
        if code is not None and not isinstance(code, int):
            print(code, file=sys.stderr)
            code = 1
    except BrokenPipeError:  # the help or the version, printed to a reader that went away
        drop_stdout()
        code = 0
    except BaseException as exc:  # outside any command (the commands handle their own), or a stop
        stop = stopping.stopped_by(exc)
        if stop is None and not isinstance(exc, Exception):
            raise
        if stop is not None:
            code = fail(stopping.message(command, stop), stop.exit_code, as_json).exit_code
        else:
            code = failure(exc, command, as_json).exit_code
    return code if isinstance(code, int) else 0


def ends_cleanly(func):
    """End a command that fails with one line on stderr (and a JSON record under --json) and
    the exit code of the error (lshjob.cli.failures): 2 for bad input or options and files that
    cannot be read or written, 70 with the traceback logged for anything unexpected."""

    @wraps(func)
    def wrapper(*args, **kwargs):
        try:
            check_whole_numbers(kwargs)
            return func(*args, **kwargs)
        except (typer.Exit, typer.Abort):
            raise
        except Exception as exc:
            stop = stopping.stopped_by(exc)  # numba's or DuckDB's error for a stop signal
            if stop is not None:
                raise stop from None
            raise failure(exc, func.__name__, kwargs.get("as_json", False)) from None

    return wrapper
