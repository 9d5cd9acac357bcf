"""Numba's BLAS probe, skipped in the ``lshjob`` process (:func:`skip_blas_probe`)."""

from __future__ import annotations

import importlib
import sys


def skip_blas_probe() -> None:
    """Spare this process numba's check for a BLAS. When numba first compiles or loads compiled
    code, it imports ``scipy.linalg`` (when scipy is installed, as datasketch requires) only to
    learn whether ``np.dot`` can use a BLAS: 0.2 s of every command, measured, and on the path
    of the first compiled call. lshjob's compiled code does no linear algebra, so the module
    that probes is loaded here with that import made to fail; numba then takes its plain loops
    for the two functions that ask (``np.correlate``, ``np.convolve``), and any other linear
    algebra still finds scipy as usual. Only in the ``lshjob`` process: a program that imports
    lshjob keeps numba as it is."""
    probe, blas = "numba.np.arraymath", "scipy.linalg.cython_blas"
    if probe in sys.modules or blas in sys.modules:
        return
    sys.modules[blas] = None  # a None entry makes `import` raise ImportError
    try:
        importlib.import_module(probe)
    except Exception:  # a numba that probes elsewhere or fails here: it loads as usual later
        pass
    finally:
        if sys.modules.get(blas, 0) is None:
            del sys.modules[blas]
