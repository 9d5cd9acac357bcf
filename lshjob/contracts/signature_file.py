"""The signature file: a Parquet file of SIGNATURES rows (:mod:`lshjob.contracts.tables`) whose
key-value metadata ``lshjob`` holds a JSON record, typed here as :class:`SignatureMeta`."""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, fields

from lshjob.errors import InputError

FORMAT_NAME = "lshjob-signatures"
FORMAT_VERSION = 1
METADATA_KEY = "lshjob"
HASH_FAMILY = "xxh64-seed0+fmix64-xor-splitmix64-salt"
SET_SIZES = ("exact", "estimated")
PERIOD_UNITS = (None, "day", "week", "month")


@dataclass(frozen=True)
class SignatureMeta:
    """``scheme`` (kperm or oph), ``hash`` (the hash family), ``k`` (values a signature),
    ``seed``, ``keys`` (the key columns), ``set_size`` (``exact``, or ``estimated`` after a
    merge), ``period_unit`` (day, week, month or null; a file without it has no periods)."""

    scheme: str
    hash: str
    k: int
    seed: int
    keys: list[str]
    set_size: str = "exact"
    period_unit: str | None = None
    format: str = FORMAT_NAME
    format_version: int = FORMAT_VERSION

    def to_json(self) -> dict:
        return asdict(self)

    @classmethod
    def from_json(cls, record: dict, where: str) -> SignatureMeta:
        """The metadata of ``record`` (of the file ``where``), or a one-line InputError."""
        if record.get("format") != FORMAT_NAME or record.get("format_version") != FORMAT_VERSION:
            raise InputError(
                f"{where}: signature format {record.get('format')!r} version {record.get('format_version')!r} "
                f"is not supported; expected {FORMAT_NAME!r} version {FORMAT_VERSION}")
        names = [f.name for f in fields(cls) if f.name in record or f.name != "period_unit"]
        missing = [n for n in names if n not in record]
        if missing:
            raise InputError(f"{where}: signature metadata has no '{missing[0]}' entry")
        meta = cls(**{n: record[n] for n in names})
        for name, value, allowed in (("set_size", meta.set_size, SET_SIZES),
                                     ("period_unit", meta.period_unit, PERIOD_UNITS)):
            if value not in allowed:
                raise InputError(f"{where}: signature metadata '{name}' is {value!r}; expected one of "
                                 f"{', '.join(map(str, allowed))}")
        if not (isinstance(meta.k, int) and meta.k >= 1 and meta.keys and meta.keys[0] == "entity"):
            raise InputError(f"{where}: signature metadata k={meta.k!r}, keys={meta.keys!r}; expected k >= 1 "
                             "and keys starting with 'entity'")
        return meta


def file_meta(raw: dict[str, str], where: str) -> SignatureMeta:
    """The typed metadata of a signature file from its Parquet key-value metadata ``raw``."""
    if METADATA_KEY not in raw:
        raise InputError(f"{where}: not an lshjob signature file (no '{METADATA_KEY}' metadata)")
    return SignatureMeta.from_json(json.loads(raw[METADATA_KEY]), where)
