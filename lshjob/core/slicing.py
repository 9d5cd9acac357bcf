"""Working through many rows a slice at a time: the one slice size and the one loop."""

from __future__ import annotations

from collections.abc import Iterator

SLICE_ROWS = 1 << 16  # rows (sets, signatures) a slice: 64 MB of signatures at k=128; a signature file's row group


def slice_bounds(n: int, rows: int) -> Iterator[tuple[int, int]]:
    """(lo, hi) of consecutive slices of at most ``rows`` rows covering 0..n-1, in order;
    none when ``n`` is 0."""
    step = max(int(rows), 1)
    for lo in range(0, n, step):
        yield lo, min(n, lo + step)
