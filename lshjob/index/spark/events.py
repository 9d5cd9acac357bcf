"""A run on Spark reads its events with Spark and groups them into sets in a shuffle.

:func:`read_events` is ``spark.read.parquet`` on the given path (any URI Spark reads: a
local path, ``file://``, ``hdfs://``, ``s3a://``...) with the local ingest's checks, as
Spark aggregates (the driver gets counts, never rows): the named columns exist and hold
keys, counts are finite and >= 0, nulls are refused or dropped (``--on-null``).
:func:`element_sets` hashes each distinct element once on the executors (the local XXH64 of
the canonical text, NFC applied as the local ingest does, :mod:`lshjob.index.spark._events`)
and joins the hashes back to the events in the JVM (a broadcast join when the distinct
elements' lookup is small enough, :data:`BROADCAST_BYTES`), so the events never pass through
Python; text entity keys holding a non-ASCII character (counted while reading) are put in
NFC on the executors, the others left as they are. Each entity's set is then its distinct
hashes, sorted, in one shuffle by entity; with ``--count`` or ``--min-count`` above 1 each
(entity, element)'s weight is summed first and what reaches ``--min-count`` kept.
:func:`signature_frame` signs those sets on the executors: the SIGNATURES rows the local
signing makes, bit for bit.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial

from lshjob.errors import InputError
from lshjob.index.spark import _events
from lshjob.index.spark.session import quiet_pandas_warning
from lshjob.ingest.spec import EventSpec

ELEMENT_DDL = "element {element}, canonical {element}, hash long"
# the distinct elements' lookup (element, hash) is sent whole to every executor for the join up
# to this size (about 32 bytes a row besides the text of text keys), else joined by a shuffle
BROADCAST_BYTES = 256 << 20
KEY_TYPES = ("string", "tinyint", "smallint", "int", "bigint")


@dataclass
class EventFacts:
    """What reading the events found (the manifest's counts and inputs)."""

    where: str
    files: list[str]
    rows_read: int
    null_rows_dropped: int = 0
    membership_rows: int = 0
    entities: int = 0
    empty_after_filter: int = 0
    odd_entities: int = 0  # rows whose text entity key holds a non-ASCII character (NFC may change it)


def read_events(spark, path: str, spec: EventSpec):
    """(events, facts): the events as a DataFrame of ``entity``, ``element``, ``weight``
    (module docstring); ``spec``'s segment and period are not read here."""
    from pyspark.sql import functions as F  # noqa: N812

    try:
        raw = spark.read.parquet(path)
    except Exception as exc:  # Spark's AnalysisException: one line, the path named
        raise InputError(f"{path}: Spark could not read Parquet there: {str(exc).splitlines()[0]}") from exc
    where = path
    types = dict(raw.dtypes)
    named = [("--entity", spec.entity), ("--element", spec.element)]
    if spec.count is not None:
        named.append(("--count", spec.count))
    for option, name in named:
        if name not in types:
            raise InputError(f"{where}: column {name!r} (from {option}) not found; columns are: {', '.join(types)}")
        if option != "--count" and types[name] not in KEY_TYPES:
            raise InputError(f"{where}: column {name!r} ({option}) has type {types[name]}; "
                             "expected text or integer keys")
    if spec.count is not None and not any(types[spec.count].startswith(t) for t in
                                          ("tinyint", "smallint", "int", "bigint", "float", "double", "decimal")):
        raise InputError(f"{where}: column {spec.count!r} (--count) has type {types[spec.count]}; expected a number")
    weight = F.col(spec.count).cast("double") if spec.count is not None else F.lit(1.0)
    events = raw.select(F.col(spec.entity).alias("entity"), F.col(spec.element).alias("element"),
                        weight.alias("weight"))
    keys = ["entity", "element"] + (["weight"] if spec.count is not None else [])
    null = F.col("entity").isNull() | F.col("element").isNull()
    if spec.count is not None:
        null = null | F.col("weight").isNull()
    stats = events.agg(
        F.count("*").alias("rows"),
        *[F.count(F.when(F.col(c).isNull(), 1)).alias(c) for c in keys],
        F.count(F.when(null, 1)).alias("any_null"),
        F.count(F.when(F.isnan("weight") | (F.col("weight") < 0) | F.col("weight").isin(float("inf")), 1))
        .alias("bad_count"),
        (F.count(F.when(_non_ascii("entity"), 1)) if types[spec.entity] == "string" else F.lit(0)).alias("odd"),
    ).collect()[0]
    facts = EventFacts(where, list(raw.inputFiles()), int(stats["rows"]), odd_entities=int(stats["odd"]))
    if facts.rows_read == 0:
        raise InputError(f"{where}: no events (0 rows)")
    if spec.count is not None and stats["bad_count"]:
        raise InputError(f"{where}: column {spec.count!r} (--count) has {stats['bad_count']} value(s) that are "
                         "negative, NaN or infinite; counts must be finite and >= 0")
    nulls = {name: int(stats[c]) for c, (_, name) in zip(keys, named) if stats[c]}
    if nulls:
        name, count = next(iter(nulls.items()))
        if spec.on_null == "error":
            raise InputError(f"{where}: column {name!r} has {count} null value(s); "
                             "clean the data or pass --on-null drop to skip such rows")
        facts.null_rows_dropped = int(stats["any_null"])
        if facts.null_rows_dropped == facts.rows_read:
            raise InputError(f"{where}: every row had a null key and was dropped (--on-null drop); nothing to sign")
        events = events.where(~null)
    return events, facts


def element_sets(events, spec: EventSpec, facts: EventFacts):
    """Each entity's set: ``entity`` and ``hashes``, its elements' XXH64 (Int64 bits) sorted,
    after ``--min-count``; fills ``facts``' membership counts (module docstring)."""
    from pyspark import StorageLevel
    from pyspark.sql import functions as F  # noqa: N812

    quiet_pandas_warning()
    nfc = spec.unicode == "nfc"
    types = dict(events.dtypes)
    elements = (events.select("element").distinct()
                .mapInArrow(partial(_events.hashed_elements, nfc), ELEMENT_DDL.format(element=types["element"]))
                .persist(StorageLevel.MEMORY_AND_DISK))
    try:
        check_distinct_hashes(elements, facts.where)
        lookup = elements.select("element", "hash")
        text = F.sum(F.octet_length("element")) if types["element"] == "string" else F.lit(0)
        size = elements.agg(F.count("*").alias("n"), text.alias("text")).collect()[0]
        if size["n"] * 32 + (size["text"] or 0) <= BROADCAST_BYTES:
            lookup = F.broadcast(lookup)
        if nfc and facts.odd_entities:  # only those rows pass through Python
            odd = _non_ascii("entity")
            events = events.where(~odd).unionByName(
                events.where(odd).mapInArrow(_events.nfc_entities, ", ".join(f"{c} {t}" for c, t in events.dtypes)))
        hashed = events.join(lookup, "element").select("entity", "hash", "weight")
        # an event weighs 1 without --count: --min-count 1 or less leaves every element it names
        filtered = spec.count is not None and spec.min_count > 0 or spec.min_count > 1
        if filtered:
            summed = hashed.groupBy("entity", "hash").agg(F.sum("weight").alias("weight"))
            grouped = summed.where(F.col("weight") >= spec.min_count).groupBy("entity").agg(
                F.sort_array(F.collect_list("hash")).alias("hashes"))
        else:
            grouped = hashed.groupBy("entity").agg(F.sort_array(F.collect_set("hash")).alias("hashes"))
        sets = grouped.persist(StorageLevel.MEMORY_AND_DISK)
        counts = sets.agg(F.count("*").alias("entities"), F.sum(F.size("hashes")).alias("rows")).collect()[0]
        facts.entities, facts.membership_rows = int(counts["entities"]), int(counts["rows"] or 0)
        before = hashed.select("entity").distinct().count() if filtered else facts.entities
        facts.empty_after_filter = before - facts.entities
        if facts.membership_rows == 0:
            sets.unpersist()
            raise InputError(f"{facts.where}: no element is left after filtering (--min-count {spec.min_count}); "
                             "nothing to sign")
        return sets
    finally:
        elements.unpersist()


def _non_ascii(column: str):
    """True where the text ``column`` holds a character outside ASCII (more bytes than characters)."""
    from pyspark.sql import functions as F  # noqa: N812

    return F.octet_length(column) != F.length(column)


def check_distinct_hashes(elements, where: str) -> None:
    """Refuse to go on when two distinct elements share an XXH64 (about n^2 / 2^65 for n
    distinct elements): the hash stands for the element from here on, and the exact Jaccard
    the local engine counts on element codes would differ. ``elements``: each element as
    read, its ``canonical`` text (NFC) and ``hash``."""
    from pyspark.sql import functions as F  # noqa: N812

    shared = (elements.select("canonical", "hash").distinct().groupBy("hash").count()
              .where(F.col("count") > 1).limit(1).collect())
    if shared:
        raise InputError(f"{where}: two distinct elements share the XXH64 {shared[0]['hash'] & (2**64 - 1):#018x}; "
                         "run this input with --engine local")


def signature_frame(sets, params):
    """SIGNATURES rows (``entity``, ``signature`` as the Int64 bits of its UInt64 values,
    ``set_size``) of ``sets`` (:func:`element_sets`), signed on the executors."""
    types = dict(sets.dtypes)
    ddl = f"entity {types['entity']}, signature array<long>, set_size int"
    return sets.mapInArrow(partial(_events.signed_sets, params), ddl)


def planning_sample(sets, entities: int, sample_size: int):
    """The sets the driver plans on, as a polars table (``entity``, ``hashes``) sorted by
    entity: every set when there are at most ``sample_size`` entities, else about
    ``sample_size`` drawn by Spark's XXH64 of the key (uniform, and the same every run)."""
    import polars as pl
    from pyspark.sql import functions as F  # noqa: N812

    picked = sets
    if entities > sample_size:
        scale = 1 << 20
        picked = sets.where(F.pmod(F.xxhash64("entity"), F.lit(scale)) < int(scale * sample_size / entities) + 1)
    return pl.from_arrow(picked.select("entity", "hashes").orderBy("entity").toArrow())


def key_dtype(sets):
    """The polars type of the entity keys of ``sets``."""
    import polars as pl

    return pl.from_arrow(sets.select("entity").limit(0).toArrow()).schema["entity"]
