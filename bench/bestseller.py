"""A bestseller's buckets: many patrons whose loans are one bestselling title and one other.

    python bench/bestseller.py [--entities 200000] [--sample 500] [--baseline DIR] [--seeds 2 3] [--no-write]

Data (invented; the demo's library scenario): a tenth of the patrons borrowed the bestseller
alone, six tenths the bestseller and one title of their own choosing among 100,000, three
tenths 3-10 titles of a steep long tail (no bestseller). A holder of two titles is at Jaccard
0.5 with every patron of the bestseller alone, and at 1/3 with another holder: its true
top-50 is 50 of those patrons, tied. The pair collides in a band where the bestseller is the
minimum of the holder at all r rows; that bucket holds every such holder (tens of thousands
of sets), over --max-bucket, and is split by the next band, where again it is over: the pair
is skipped in every band.

Whole processes, run from outside the repository (kernels compiled by an untimed run first):
``lshjob run --threshold 0.5`` at its defaults (and another checkout's, ``--baseline``), at
other seeds of the hash family (every holder's pair hangs on the one bestseller's hash
values, so its recall is one draw per seed), and with the --max-crowd its warning names, if
it names one. Recall of the true top-50 by brute force on a
sample of patrons against all (bench/longtail.py ``recall``: exact Jaccard by sparse
intersection counts, scipy; a neighbour at the k-th value counts as correct).
"""

from __future__ import annotations

import argparse
import re
import sys
import tempfile
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import CACHE, compile_bytecode, finish, machine  # noqa: E402
from longtail import _lshjob, recall  # noqa: E402


def bestseller_events(entities: int, seed: int = 3) -> Path:
    """The events above, cached under bench/cache/ (entity, element; element 0 the bestseller)."""
    CACHE.mkdir(exist_ok=True)
    path = CACHE / f"bestseller_{entities}_{seed}.parquet"
    if path.exists():
        return path
    rng = np.random.default_rng(seed)
    kind = rng.choice(3, entities, p=[0.1, 0.6, 0.3])
    alone, two, many = (np.flatnonzero(kind == k) for k in range(3))
    sizes = rng.integers(3, 11, len(many))
    tail = np.minimum(100_000, np.floor(rng.random(int(sizes.sum())) ** (-1 / 0.3)))  # steep: title 1 most
    frame = pl.DataFrame({
        "entity": np.concatenate([alone, two, two, np.repeat(many, sizes)]),
        "element": np.concatenate([np.zeros(len(alone) + len(two), dtype=np.int64),
                                   rng.integers(1, 100_000, len(two)), tail.astype(np.int64)]),
    }).unique()
    frame.write_parquet(path)
    return path


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--entities", type=int, default=200_000)
    parser.add_argument("--sample", type=int, default=500)
    parser.add_argument("--baseline", type=Path, default=None,
                        help="another checkout of lshjob, run at its defaults beside this tree")
    parser.add_argument("--seeds", type=int, nargs="*", default=[2, 3],
                        help="seeds of the hash family to run at besides the default")
    parser.add_argument("--no-write", action="store_true")
    args = parser.parse_args()
    events = bestseller_events(args.entities)
    compile_bytecode()
    runs = [("defaults", None, ())]
    if args.baseline is not None:
        compile_bytecode(args.baseline)
        runs.append((f"defaults, baseline {args.baseline.name}", args.baseline, ()))
    runs += [(f"--seed {seed}", None, ("--seed", str(seed))) for seed in args.seeds]
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for tree in {tree for _, tree, _ in runs}:  # kernels compiled, files cached
            _lshjob(events, tmp / "warm", tree=tree)
        for n, (name, tree, extra) in enumerate(runs):
            wall, manifest = _lshjob(events, tmp / f"run-{n}", tree=tree, extra=extra)
            rows.append((name, wall, manifest, recall(events, tmp / f"run-{n}" / "neighbours.parquet", args.sample)))
        hint = next((w for w in rows[0][2]["warnings"] if "--max-crowd" in w), "")
        cap = re.search(r"run with --max-crowd (\d+)", hint)
        if cap:
            options = ("--max-crowd", cap.group(1))
            wall, named = _lshjob(events, tmp / "named", extra=options)
            rows.append((" ".join(options), wall, named, recall(events, tmp / "named" / "neighbours.parquet",
                                                                args.sample)))
    n_events = pl.scan_parquet(events).select(pl.len()).collect().item()
    baseline = f" --baseline {args.baseline}" if args.baseline else ""
    lines = [f"Machine: {machine()}",
             f"Command: `python bench/bestseller.py --entities {args.entities} --sample {args.sample}{baseline}`",
             f"Data: bench/bestseller.py (module docstring); {args.entities:,} patrons, {n_events:,} events; "
             "threshold 0.5, top-50. Whole processes, warm.", "",
             "| run | wall s | plan k, b, r | expected recall | buckets over the cap (compared) | pairs left out | "
             "recall (true top-50) |",
             "| --- | ---: | --- | --- | --- | ---: | --- |"]
    for name, wall, m, (rec, true_pairs, sampled, err) in rows:
        plan, skew = m["plan"], m["skew"]
        compared = m["counts"].get("oversize_buckets_compared")
        left = next((int(w.split()[0]) for w in m["warnings"] if "not compared" in w), 0)
        lines.append(f"| {name} | {wall:.2f} | {plan['perms']}, {plan['bands']}, {plan['rows']} | "
                     f"{plan['predicted']['expected_recall']:.3f} | {skew['oversize_buckets']}"
                     f" ({'-' if compared is None else compared}) | {left:,} | "
                     f"{rec:.3f} ± {err:.3f} ({sampled} patrons, {true_pairs:,} true pairs) |")
    lines += ["", "Warning of the run at its defaults: " + (rows[0][2]["warnings"] or ["none"])[0]]
    finish("A bestseller's buckets", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
