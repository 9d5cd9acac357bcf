"""The store's catalog: one DuckDB database file, ``STORE/catalog.duckdb``, changed only in
one transaction per refresh.

It says which files make the store (everything else under the store folder is a dead
refresh's and is removed by the next one), with their SHA-256, and holds the kept plan, the
periods of the window and the record of every refresh. DuckDB's write-ahead log makes the
transaction all or nothing, so a refresh killed at any moment leaves the catalog of the
previous refresh, or of this one, never a mixture.

Tables (all written whole by :func:`commit`, except ``runs`` which only grows):

* ``facts(key, value)``: what the store was made with (columns, period unit, key types),
  text or JSON;
* ``plan(perms, bands, rows, seed, scheme, mode, threshold, recall, chosen_by)``: the kept
  plan, one row or none;
* ``periods(period, sets_file, signatures_file, entities, membership_rows, run_id)``: one
  row per period of the window;
* ``period_deltas(period, kind, path, position)``: files added to a period's sets (``sets``)
  or signatures (``signatures``) since its file of that kind was written: a period's set of an
  entity is the union of its rows in the file and its deltas, its signature the element-wise
  minimum of its rows (a delta signs the rows its sets delta added);
* ``files(path, kind, sha256, bytes, run_id)``: every file of the store (paths relative to
  the store folder);
* ``versions(run_id, folder, sha256, rows)``: the published indexes kept (``--keep``);
* ``runs(...)``: one row per refresh (:data:`RUN_COLUMNS`), ``diff`` the summary of
  :func:`lshjob.jobs.diff.diff_indexes` between the previous published version and this one
  (JSON; null on a store's first refresh).
"""

from __future__ import annotations

import json
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path

import duckdb

from lshjob.errors import Busy, InputError

CATALOG = "catalog.duckdb"
OPEN_ATTEMPTS = 50  # a reader meeting a writer's file lock tries again for about 5 s

SCHEMA = """
CREATE TABLE IF NOT EXISTS facts (key VARCHAR NOT NULL, value VARCHAR);
CREATE TABLE IF NOT EXISTS plan (perms INTEGER, bands INTEGER, "rows" INTEGER, seed BIGINT, scheme VARCHAR,
                                 mode VARCHAR, threshold DOUBLE, recall DOUBLE, chosen_by VARCHAR);
CREATE TABLE IF NOT EXISTS periods (period DATE NOT NULL, sets_file VARCHAR NOT NULL, signatures_file VARCHAR,
                                    entities BIGINT, membership_rows BIGINT, run_id VARCHAR);
CREATE TABLE IF NOT EXISTS period_deltas (period DATE NOT NULL, kind VARCHAR NOT NULL, path VARCHAR NOT NULL,
                                          "position" BIGINT);
CREATE TABLE IF NOT EXISTS files (path VARCHAR NOT NULL, kind VARCHAR, sha256 VARCHAR, bytes BIGINT, run_id VARCHAR);
CREATE TABLE IF NOT EXISTS versions (run_id VARCHAR NOT NULL, folder VARCHAR, sha256 VARCHAR, "rows" BIGINT,
                                     "position" BIGINT);
CREATE TABLE IF NOT EXISTS runs (run_id VARCHAR NOT NULL, started_at VARCHAR, finished_at VARCHAR,
                                 window_first DATE, window_last DATE, window_periods INTEGER,
                                 batch_rows BIGINT, rows_older_than_window BIGINT, changed_entities BIGINT,
                                 pairs_added BIGINT, pairs_removed BIGINT,
                                 periods_changed INTEGER, periods_expired INTEGER, entities BIGINT,
                                 rebuilt BOOLEAN, why VARCHAR, seconds DOUBLE, stage_seconds VARCHAR,
                                 peak_memory_bytes VARCHAR, plan VARCHAR, output_sha256 VARCHAR,
                                 published_rows BIGINT, published BOOLEAN, out VARCHAR);
ALTER TABLE runs ADD COLUMN IF NOT EXISTS diff VARCHAR;
"""
RUN_COLUMNS = ("run_id", "started_at", "finished_at", "window_first", "window_last", "window_periods",
               "batch_rows", "rows_older_than_window", "changed_entities", "pairs_added", "pairs_removed",
               "periods_changed", "periods_expired",
               "entities", "rebuilt", "why", "seconds", "stage_seconds", "peak_memory_bytes", "plan",
               "output_sha256", "published_rows", "published", "out", "diff")
JSON_COLUMNS = ("stage_seconds", "peak_memory_bytes", "plan", "diff")


@dataclass(frozen=True)
class Period:
    period: date
    sets_file: str
    signatures_file: str | None
    entities: int
    membership_rows: int
    run_id: str
    signature_deltas: tuple[str, ...] = ()  # oldest first
    set_deltas: tuple[str, ...] = ()  # oldest first

    def row(self) -> list:
        return [self.period, self.sets_file, self.signatures_file, self.entities, self.membership_rows, self.run_id]


@dataclass(frozen=True)
class StoredFile:
    path: str
    kind: str
    sha256: str
    bytes: int
    run_id: str


@dataclass(frozen=True)
class Version:
    run_id: str
    folder: str
    sha256: str
    rows: int


@dataclass
class State:
    """What the catalog holds (an empty store: all empty)."""

    facts: dict[str, str] = field(default_factory=dict)
    plan: dict | None = None
    periods: list[Period] = field(default_factory=list)
    files: list[StoredFile] = field(default_factory=list)
    versions: list[Version] = field(default_factory=list)


@contextmanager
def connection(store: Path, read_only: bool = False):
    """A connection to the store's catalog, closed on leaving. A reader waits a few seconds
    while a refresh holds the file (DuckDB lets one process write it at a time)."""
    path = Path(store) / CATALOG
    if read_only and not path.is_file():
        raise InputError(f"{store}: no {CATALOG}; is this a store made by lshjob refresh?")
    for attempt in range(OPEN_ATTEMPTS):
        try:
            con = duckdb.connect(str(path), read_only=read_only)
            break
        except duckdb.IOException as exc:
            if "lock" not in str(exc).lower() or attempt == OPEN_ATTEMPTS - 1:
                if "lock" in str(exc).lower():
                    raise Busy(f"{path}: the catalog is held by a refresh; retry later") from None
                raise InputError(f"{path}: not a readable catalog ({exc})") from None
            time.sleep(0.1)
    try:
        if not read_only:
            con.execute(SCHEMA)
        yield con
    finally:
        con.close()


def read_state(store: Path) -> State:
    """The catalog's state; an empty State when the store has no catalog yet."""
    if not (Path(store) / CATALOG).is_file():
        return State()
    with connection(store, read_only=True) as con:
        return _state(con)


def _state(con) -> State:
    state = State()
    state.facts = dict(con.execute("SELECT key, value FROM facts").fetchall())
    plan = con.execute('SELECT perms, bands, "rows", seed, scheme, mode, threshold, recall, chosen_by FROM plan'
                       ).fetchall()
    if plan:
        state.plan = dict(zip(("perms", "bands", "rows", "seed", "scheme", "mode", "threshold", "recall",
                               "chosen_by"), plan[0]))
    deltas: dict = {}
    if con.execute("SELECT count(*) FROM information_schema.tables WHERE table_name = 'period_deltas'"
                   ).fetchone()[0]:  # a store made before them has none
        for period, kind, path in con.execute(
                'SELECT period, kind, path FROM period_deltas ORDER BY period, kind, "position"').fetchall():
            deltas.setdefault((period, kind), []).append(path)
    state.periods = [Period(*row, signature_deltas=tuple(deltas.get((row[0], "signatures"), ())),
                            set_deltas=tuple(deltas.get((row[0], "sets"), ()))) for row in con.execute(
        "SELECT period, sets_file, signatures_file, entities, membership_rows, run_id FROM periods ORDER BY period"
    ).fetchall()]
    state.files = [StoredFile(*row) for row in con.execute(
        "SELECT path, kind, sha256, bytes, run_id FROM files ORDER BY path").fetchall()]
    state.versions = [Version(*row) for row in con.execute(
        'SELECT run_id, folder, sha256, "rows" FROM versions ORDER BY "position"').fetchall()]
    return state


def commit(store: Path, state: State, run: dict) -> None:
    """Replace the catalog's state by ``state`` and add ``run`` to the runs, in one transaction."""
    with connection(store) as con:
        con.execute("BEGIN TRANSACTION")
        try:
            for table in ("facts", "plan", "periods", "period_deltas", "files", "versions"):
                con.execute(f"DELETE FROM {table}")  # noqa: S608 (fixed names)
            if state.facts:
                con.executemany("INSERT INTO facts VALUES (?, ?)", list(state.facts.items()))
            if state.plan is not None:
                p = state.plan
                con.execute("INSERT INTO plan VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                            [p["perms"], p["bands"], p["rows"], p["seed"], p["scheme"], p["mode"], p["threshold"],
                             p["recall"], p["chosen_by"]])
            if state.periods:
                con.executemany("INSERT INTO periods VALUES (?, ?, ?, ?, ?, ?)", [p.row() for p in state.periods])
            deltas = [[p.period, kind, path, i] for p in state.periods
                      for kind, paths in (("signatures", p.signature_deltas), ("sets", p.set_deltas))
                      for i, path in enumerate(paths)]
            if deltas:
                con.executemany("INSERT INTO period_deltas VALUES (?, ?, ?, ?)", deltas)
            if state.files:
                con.executemany("INSERT INTO files VALUES (?, ?, ?, ?, ?)",
                                [list(f.__dict__.values()) for f in state.files])
            if state.versions:
                # in publishing order: two runs in one second have run ids that do not sort by time
                con.executemany("INSERT INTO versions VALUES (?, ?, ?, ?, ?)",
                                [[*v.__dict__.values(), i] for i, v in enumerate(state.versions)])
            row = [json.dumps(run[c], sort_keys=True) if c in JSON_COLUMNS else run.get(c) for c in RUN_COLUMNS]
            con.execute(f"INSERT INTO runs ({', '.join(_quoted(c) for c in RUN_COLUMNS)}) "  # noqa: S608 (fixed names)
                        f"VALUES ({', '.join('?' * len(RUN_COLUMNS))})", row)
            con.execute("COMMIT")
        except BaseException:
            con.execute("ROLLBACK")
            raise


def mark_published(store: Path, run_id: str) -> None:
    """Record that ``run_id``'s index is in place in its output folder."""
    with connection(store) as con:
        con.execute("UPDATE runs SET published = TRUE WHERE run_id = ?", [run_id])


def runs(store: Path) -> list[dict]:
    """Every refresh recorded, oldest first (JSON columns decoded, dates in ISO form); runs of
    one second in the order they were recorded (the table is only appended to)."""
    with connection(store, read_only=True) as con:
        present = {row[1] for row in con.execute("PRAGMA table_info('runs')").fetchall()}
        columns = [_quoted(c) if c in present else f"NULL AS {_quoted(c)}" for c in RUN_COLUMNS]  # older stores
        rows = con.execute(f"SELECT {', '.join(columns)} FROM runs ORDER BY started_at, rowid").fetchall()
    found = []
    for row in rows:
        record = dict(zip(RUN_COLUMNS, row))
        for c in JSON_COLUMNS:
            record[c] = json.loads(record[c]) if record[c] is not None else None
        for c in ("window_first", "window_last"):
            record[c] = record[c].isoformat() if record[c] is not None else None
        found.append(record)
    return found


def _quoted(name: str) -> str:
    return f'"{name}"'
