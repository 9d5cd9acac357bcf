"""The binary search and the selection the compiled kernels share (numba's ``np.searchsorted``
costs about a second to compile, its ``np.partition`` about 14 s; these loops, inlined into
each caller, cost little)."""

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


@numba.njit(inline="always")
def kth_smallest(values, k):
    """The k-th smallest of ``values`` (k from 0), reordering them in place: what
    ``np.partition(values, k)[k]`` gives, in linear expected time (Hoare's selection, "FIND",
    CACM 4(7), 1961, with the median of three as the pivot)."""
    lo, hi = 0, len(values) - 1
    while lo < hi:
        mid = (lo + hi) >> 1
        a, b, c = values[lo], values[mid], values[hi]
        pivot = max(min(a, b), min(max(a, b), c))
        i, j = lo, hi
        while i <= j:
            while values[i] < pivot:
                i += 1
            while pivot < values[j]:
                j -= 1
            if i <= j:
                values[i], values[j] = values[j], values[i]
                i += 1
                j -= 1
        if k <= j:
            hi = j
        elif k >= i:
            lo = i
        else:
            break  # values[j + 1 .. i - 1] all equal the pivot
    return values[k]
