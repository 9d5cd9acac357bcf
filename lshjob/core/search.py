"""The binary search the compiled kernels share (numba's ``np.searchsorted`` costs about a
second to compile; this loop, inlined into each caller, costs nothing)."""

from lshjob.core._jit import numba


@numba.njit(inline="always")
def first_at_least(values, lo, hi, x):
    """The first position in ``values[lo:hi]`` (ascending) holding at least ``x`` (or hi)."""
    while lo < hi:
        mid = (lo + hi) >> 1
        if values[mid] < x:
            lo = mid + 1
        else:
            hi = mid
    return lo
