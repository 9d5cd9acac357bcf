"""Memory sizes, the machine's memory, and per-stage peak resident memory (Linux)."""

from __future__ import annotations

import ctypes
import os
import re
import resource

from lshjob.errors import ParameterError

_UNITS = {"": 1, "B": 1, "KB": 10**3, "MB": 10**6, "GB": 10**9, "TB": 10**12,
          "KIB": 2**10, "MIB": 2**20, "GIB": 2**30, "TIB": 2**40,
          "K": 2**10, "M": 2**20, "G": 2**30, "T": 2**40}  # a bare letter is binary, as in 8g (common practice)


MIN_BUDGET = 512 * 2**20  # at 100k entities a run peaks at 0.39 GiB whatever its budget (measured)


def parse_size(text: str) -> int:
    """'8GB' -> 8e9 bytes; '512MiB' and '512M' -> 512 * 2**20; '1.5GB'; plain bytes. Any case.

    A budget below 512MiB or above the machine's memory is refused: the first could not be
    kept, the second would let the job grow until the system swaps or kills it."""
    match = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([A-Za-z]*)\s*", str(text))
    if not match or match.group(2).upper() not in _UNITS:
        raise ParameterError(f"--memory must be a size like 8GB, 8GiB, 8G or 512MiB; got {text!r}")
    value = float(match.group(1)) * _UNITS[match.group(2).upper()]
    if value < MIN_BUDGET:
        raise ParameterError(
            f"--memory must be at least 512MiB; got {text!r}: the process itself, with polars, numba "
            "and DuckDB loaded, takes about 200 MiB, so a smaller budget could not be kept"
        )
    machine = physical_memory()
    if value > machine:
        raise ParameterError(f"--memory {str(text).strip()} is more than this machine's {machine / 2**30:.1f} GiB")
    return int(value)


def physical_memory() -> int:
    return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")


def default_memory() -> int:
    """Half the machine's memory (common practice for a job sharing its host)."""
    return physical_memory() // 2


def reset_peak() -> bool:
    """Reset the kernel's resident-memory high-water mark (Linux clear_refs '5'), so each stage
    records its own peak. The reset also clears what ``getrusage`` reports of the process once
    it has ended; with ``LSHJOB_PEAK_PER_STAGE=0`` in the environment nothing is reset, so that
    figure is the whole process's peak (the memory tests measure runs so) and each stage
    records the peak so far."""
    if os.environ.get("LSHJOB_PEAK_PER_STAGE") == "0":
        return False
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def _status_bytes(field: str) -> int | None:
    """A memory line of /proc/self/status (in kB there) as bytes; None where unavailable."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith(field + ":"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def peak_bytes() -> int:
    """Peak resident memory since the last reset (VmHWM), else the process's lifetime peak."""
    peak = _status_bytes("VmHWM")
    return peak if peak is not None else resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def release_freed() -> None:
    """Hand memory freed in the process back to the system (glibc's ``malloc_trim``), so
    what is resident is what is held; nothing where that call is unavailable."""
    try:
        ctypes.CDLL(None).malloc_trim(0)
    except (OSError, AttributeError):
        pass


def current_bytes() -> int:
    """Resident memory now (VmRSS), 0 where /proc is unavailable."""
    return _status_bytes("VmRSS") or 0
