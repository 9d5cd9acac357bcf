"""The index's manifest (``manifest.json`` beside ``neighbours.parquet``): typed and versioned.

What ``lshjob run`` writes is what it returns and what ``lshjob run --json`` prints
(:meth:`Manifest.to_json`), including ``seconds["total"]``. :func:`read_manifest` refuses, in
one line naming the file, a file cut short, another format, a version this lshjob does not
read, or a missing entry.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, fields
from pathlib import Path

from lshjob.errors import InputError

FORMAT_NAME = "lshjob-index"
FORMAT_VERSION = 1
READS_VERSIONS = (1,)
# entries of ``options`` and ``inputs`` that lshjob audit reads
OPTIONS_READ = ("threshold", "top_k")
INPUTS_READ = ("source",)


@dataclass
class Manifest:
    """One run's record. Nested records stay JSON objects: ``inputs`` (source, files with
    path, bytes, mtime and sha256, sha256 of them all, time_range), ``spec`` (the EventSpec),
    ``options`` (the RunOptions), ``plan`` (mode, why, and for a banded plan perms, bands,
    rows and the predicted recall and candidates), ``counts`` (rows and pairs at each stage),
    ``skew`` (the bucket-size profile of the join, null without bands), ``seconds`` and
    ``peak_memory_bytes`` (per stage; ``seconds`` also ``total``: from the run's start to the
    index staged; ``cpu_seconds`` the same in CPU time of the process), ``versions`` (of
    lshjob and its libraries), ``output`` (the neighbours
    file: name, rows, sha256, bytes)."""

    run_id: str
    started_at: str
    finished_at: str
    host: str
    command: list[str] | None
    inputs: dict
    spec: dict
    options: dict
    top_k_effective: int
    memory_budget_bytes: int
    plan: dict
    counts: dict
    skew: dict | None
    seconds: dict
    peak_memory_bytes: dict
    versions: dict
    output: dict
    out: str
    warnings: list[str]
    engines: dict | None = None  # engine of each engine-dependent stage (band, join, verify)
    cpu_seconds: dict | None = None  # CPU seconds of the process (all threads) per stage, as ``seconds``
    format: str = FORMAT_NAME
    format_version: int = FORMAT_VERSION

    def __post_init__(self) -> None:
        if "total" not in self.seconds:
            raise ValueError("a manifest's seconds hold the stages and 'total'")

    def to_json(self) -> dict:
        """The record as written to ``manifest.json`` (JSON types only: a path becomes text)."""
        return json.loads(json.dumps(asdict(self), default=str))

    def write(self, path: Path) -> None:
        Path(path).write_text(json.dumps(self.to_json(), indent=2, sort_keys=True) + "\n")

    @classmethod
    def from_json(cls, record: dict, where: str) -> Manifest:
        """The manifest of ``record`` (read from ``where``), or a one-line InputError."""
        if not isinstance(record, dict):
            raise InputError(f"{where}: not an lshjob manifest (not a JSON object); run lshjob run again")
        if record.get("format") != FORMAT_NAME:
            raise InputError(f"{where}: not an lshjob manifest (format {record.get('format')!r}; "
                             f"expected {FORMAT_NAME!r}); run lshjob run again")
        version = record.get("format_version")
        if version not in READS_VERSIONS:
            raise InputError(f"{where}: manifest format version {version!r} is not supported; this lshjob "
                             f"reads version {', '.join(map(str, READS_VERSIONS))}; run lshjob run again")
        optional = ("engines", "cpu_seconds")  # entries added since version 1 was first written
        names = [f.name for f in fields(cls) if f.name in record or f.name not in optional]
        for name in names:
            if name not in record:
                raise InputError(f"{where}: not an lshjob manifest (no '{name}' entry); run lshjob run again")
        for entry, keys in (("options", OPTIONS_READ), ("inputs", INPUTS_READ), ("seconds", ("total",))):
            if not isinstance(record[entry], dict):
                raise InputError(f"{where}: not an lshjob manifest ('{entry}' is not a JSON object); "
                                 "run lshjob run again")
            for key in keys:
                if key not in record[entry]:
                    raise InputError(f"{where}: not an lshjob manifest (no '{key}' entry in '{entry}'); "
                                     "run lshjob run again")
        return cls(**{name: record[name] for name in names})


def read_manifest(path: str | Path) -> Manifest:
    """The manifest in the file ``path`` (module docstring)."""
    path = Path(path)
    try:
        record = json.loads(path.read_text())
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}: not valid JSON ({exc.msg} at line {exc.lineno}, column {exc.colno}); "
                         "the file is cut short or damaged; run lshjob run again") from None
    except UnicodeDecodeError:
        raise InputError(f"{path}: not UTF-8 text; the file is damaged; run lshjob run again") from None
    return Manifest.from_json(record, str(path))


def fields_doc() -> list[tuple[str, str]]:
    """(entry, type) of every entry of the manifest, in the order of the class."""
    return [(f.name, str(f.type)) for f in fields(Manifest)]
