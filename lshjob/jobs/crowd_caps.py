"""The cap on a bucket's members a run's join works with, and the warning when pairs of
buckets over it are left out (the local run, :mod:`lshjob.jobs.run`, and the run on Spark,
:mod:`lshjob.jobs.run_spark`, give the same words)."""

from __future__ import annotations

from lshjob.jobs.options import RunOptions


def crowd_cap(options: RunOptions, in_parts: bool) -> int:
    """``--max-crowd`` where the local verification pairs crowds of one part, whose kernel
    writes only the pairs found; else ``--max-bucket`` (between parts, or by another engine,
    every pair of a crowd is visited, with a slot of its own, whether found or not)."""
    if in_parts or options.engine_names()["verify"] != "local":
        return options.max_bucket
    return max(options.max_bucket, options.max_crowd)


# the largest bucket over the cap held in reserve for verification to judge (lshjob.index.verify._reserve)
RESERVE_MEMBERS = 1_000_000


def reserve_cap(options: RunOptions, in_parts: bool) -> int:
    """How large a bucket over the cap the join holds in reserve: none in parts or where
    verification is not the local kernel (the reserve is judged and compared within one part)."""
    return 0 if in_parts or options.engine_names()["verify"] != "local" else RESERVE_MEMBERS


def skipped_warning(skew: dict, options: RunOptions, in_parts: bool, rows_per_band: bool,
                    reserve: dict | None = None) -> str | None:
    """The warning for pairs of oversize buckets left out: how many, and the cap that would
    compare them. The planner's expected recall does not count them; where many tiny sets
    hold one popular element (a bestseller and one other title) they are most of some lists'
    pairs (bench/RESULTS.md, "A bestseller's buckets"). A large join (a row per band) leaves
    buckets of ``crowd_size`` members or more to verification as crowds, up to --max-crowd;
    a small one writes the pairs of buckets up to --max-bucket (module docstring of
    :mod:`lshjob.index.join.duckdb`). ``reserve``: what verification did with the buckets held
    in reserve (``buckets``, ``compared``, ``pairs_compared``; :mod:`lshjob.index.verify._reserve`);
    None when every skipped pair was compared there."""
    left = skew["skipped_pairs"] - (reserve["pairs_compared"] if reserve else 0)
    if left <= 0:
        return None
    flag = "--max-bucket" if skew["max_bucket"] == options.max_bucket else "--max-crowd"
    largest = skew["largest_bucket"]
    text = (f"{left} pairs of oversize buckets (over {flag} {skew['max_bucket']}, still over it once split) were not "
            "compared; the expected recall does not count them")
    if reserve:
        text += (f"; verification judged {reserve['buckets']} such buckets by a sample of their members and compared "
                 f"{reserve['compared']} (those whose pairs would fill lists, within a budget of work)")
    if in_parts or options.engine_names()["verify"] != "local":
        return text + f"; crowds up to --max-crowd {largest} would compare them in a run of one part, verified locally"
    if rows_per_band:
        return text + f"; to compare them as crowds, run with --max-crowd {largest}"
    return text + f"; to compare them, run with --max-bucket {largest}"
