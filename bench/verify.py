"""Verification throughput: exact Jaccard of candidate pairs from the element sets.

    python bench/verify.py --entities 100000 --pairs 2000000

Side by side on the same pairs: lshjob's compiled merge (no filter, and with the size
and positional filters used in runs at threshold 0.5), and Python set intersection on a
slice of the pairs (scaled to pairs/s).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from common import events_with_similar_pairs, finish, machine  # noqa: E402

from lshjob import EventSpec, load_sets  # noqa: E402
from lshjob.core.sets import ElementSets  # noqa: E402
from lshjob.index.verify import exact_jaccard, jaccard_at_least  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--entities", type=int, default=100_000)
    ap.add_argument("--pairs", type=int, default=2_000_000)
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    path = events_with_similar_pairs(args.entities)
    sets = ElementSets.from_sets(load_sets(path, EventSpec(entity="entity", element="element"))[0])
    rng = np.random.default_rng(0)
    left = rng.integers(0, sets.size, args.pairs)
    right = rng.integers(0, sets.size, args.pairs)
    exact_jaccard(sets.offsets, sets.elements, left[:10], right[:10])
    jaccard_at_least(sets.offsets, sets.elements, left[:10], right[:10], 0.5)
    t = {}
    start = time.perf_counter()
    exact_jaccard(sets.offsets, sets.elements, left, right)
    t["lshjob exact_jaccard (no filter)"] = (time.perf_counter() - start, args.pairs)
    start = time.perf_counter()
    jaccard_at_least(sets.offsets, sets.elements, left, right, 0.5)
    t["lshjob jaccard_at_least (t=0.5, filters)"] = (time.perf_counter() - start, args.pairs)
    py_sets = [set(sets.elements[sets.offsets[i] : sets.offsets[i + 1]].tolist()) for i in range(sets.size)]
    n_py = min(200_000, args.pairs)
    start = time.perf_counter()
    for a, b in zip(left[:n_py], right[:n_py]):
        x, y = py_sets[a], py_sets[b]
        inter = len(x & y)
        _ = inter / (len(x) + len(y) - inter)
    t["Python set intersection"] = (time.perf_counter() - start, n_py)
    ref = args.pairs / t["lshjob exact_jaccard (no filter)"][0]
    lines = [
        f"Machine: {machine()}",
        f"Data: {sets.size} entities, {len(sets.elements)} memberships (mean set size "
        f"{len(sets.elements) / sets.size:.1f}, long-tailed); {args.pairs} random pairs",
        f"Command: `python bench/verify.py --entities {args.entities} --pairs {args.pairs}`",
        "",
        "| method | pairs | seconds | pairs/s | vs exact_jaccard |",
        "| --- | ---: | ---: | ---: | ---: |",
    ]
    for name, (secs, n) in t.items():
        lines.append(f"| {name} | {n:,} | {secs:.2f} | {n / secs:,.0f} | {(n / secs) / ref:.2f}x |")
    finish("Verification throughput", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
