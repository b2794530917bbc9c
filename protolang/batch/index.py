"""Result index: a results folder in, its embedded SQLite run list (``index.sqlite``) out, safe for many writers.

One row per run (``runs``), keyed by the run's content key; a cheap pre-key -> key map
(``aliases``); the schema version and the protolang version that created the file (``meta``).
The database runs in WAL mode so that readers never wait for writers, and every write is one
short ``BEGIN IMMEDIATE`` transaction retried while another process holds the write lock, so
the workers of a batch (processes of a pool, or of a Dask cluster sharing the folder on a local
disk) may record their runs at the same time.
"""

from __future__ import annotations

import json
import os
import sqlite3
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterable

try:   # POSIX: batch liveness through flock (see BatchLock)
    from fcntl import LOCK_EX as _LOCK_EX, LOCK_NB as _LOCK_NB, flock as _flock
except ImportError:  # pragma: no cover - not a POSIX system
    _flock, _LOCK_EX, _LOCK_NB = None, 0, 0

from ..api import __version__
from ..language.errors import ProtocolError, error

if TYPE_CHECKING:   # pandas only when a run list is asked for
    import pandas as pd

SCHEMA_VERSION = 1
INDEX_NAME = "index.sqlite"

STATUSES = ("queued", "running", "ok", "failed", "crashed", "invalid", "interrupted")
UNFINISHED = ("queued", "running")

# Column name -> SQLite type, in table order.
RUN_COLUMNS: dict[str, str] = {
    "key": "TEXT PRIMARY KEY",
    "pre_key": "TEXT",
    "protocol": "TEXT",
    "title": "TEXT",
    "point": "INTEGER",
    "params": "TEXT",
    "status": "TEXT",
    "batch": "TEXT",
    "started": "REAL",
    "ended": "REAL",
    "wall_s": "REAL",
    "error": "TEXT",
    "folder": "TEXT",
    "target": "TEXT",
}

_SCHEMA = (
    "CREATE TABLE IF NOT EXISTS meta (name TEXT PRIMARY KEY, value TEXT)",
    "CREATE TABLE IF NOT EXISTS runs (" + ", ".join(f"{c} {t}" for c, t in RUN_COLUMNS.items()) + ")",
    "CREATE TABLE IF NOT EXISTS aliases (pre_key TEXT PRIMARY KEY, key TEXT)",
    "CREATE INDEX IF NOT EXISTS runs_status ON runs (status)",
    "CREATE INDEX IF NOT EXISTS runs_protocol ON runs (protocol)",
)

# SQLite's own wait for a lock per attempt, and the total time a write keeps retrying.
BUSY_TIMEOUT_MS = 10_000
LOCK_PATIENCE_S = 120.0


def _is_lock_error(exc: BaseException) -> bool:
    text = str(exc).lower()
    return isinstance(exc, sqlite3.OperationalError) and ("locked" in text or "busy" in text)


def _reopen(results_dir: str) -> "ResultIndex":
    return ResultIndex(results_dir, create=False)


class ResultIndex:
    """The run list of one results folder (``RESULTS/index.sqlite``).

    Use one instance per process; an instance carried into a forked or spawned worker (pickled)
    opens its own connection there.
    """

    def __init__(self, results_dir: str | os.PathLike, *, create: bool = True):
        """Open (and with ``create`` make) the index of ``results_dir``.

        Args:
            results_dir: the results folder; created when missing and ``create`` is true.
            create: make the folder and an empty index if there is none.

        Raises:
            ProtocolError: the folder is not a results folder (``create=False``), ``index.sqlite``
                is not an SQLite database or not a protolang result index, or its schema version
                differs from :data:`SCHEMA_VERSION`.
        """
        self.results_dir = Path(results_dir)
        self.path = self.results_dir / INDEX_NAME
        self._create = create
        self._conn: sqlite3.Connection | None = None
        self._pid = os.getpid()
        self._inherited: list[sqlite3.Connection] = []
        if self.results_dir.exists() and not self.results_dir.is_dir():
            raise error(f"results folder {str(self.results_dir)!r} is a file, not a folder", None,
                        expected="a results folder written by 'protolang batch'",
                        hint="give the folder that holds index.sqlite and runs/")
        if not create and not self.path.is_file():
            if not self.results_dir.is_dir():
                raise error(f"results folder {str(self.results_dir)!r} does not exist", None,
                            expected="a results folder written by 'protolang batch'",
                            hint="check the path, or run 'protolang batch' first")
            raise error(f"{str(self.results_dir)!r} is not a results folder (it has no {INDEX_NAME})", None,
                        expected=f"a results folder written by 'protolang batch' (it holds {INDEX_NAME} and runs/)",
                        hint="give the folder that 'protolang batch' wrote its results to")
        if create:
            self.results_dir.mkdir(parents=True, exist_ok=True)
        self._connection()

    # -- connection and transactions ------------------------------------------------------

    def _connection(self) -> sqlite3.Connection:
        if self._conn is not None and self._pid != os.getpid():
            # A connection must not cross a fork: keep the parent's object alive (closing it here
            # could disturb the parent's locks) and open our own.
            self._inherited.append(self._conn)
            self._conn = None
            self._pid = os.getpid()
        if self._conn is None:
            self._conn = self._open()
        return self._conn

    def _open(self) -> sqlite3.Connection:
        # isolation_level=None: no implicit transactions; every write says BEGIN IMMEDIATE itself.
        conn = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_MS / 1000, isolation_level=None)
        try:
            conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
            if self._create:
                self._retry(lambda: conn.execute("PRAGMA journal_mode = WAL").fetchone())
            # WAL with NORMAL sync cannot corrupt the file; it only may lose the last commits on power loss.
            conn.execute("PRAGMA synchronous = NORMAL")
            if self._create:
                # Check and create in one write transaction, so that workers opening a new
                # folder at the same moment create the schema once.
                self._transaction(conn, self._check_schema)
            else:
                self._retry(lambda: self._check_schema(conn))
        except sqlite3.DatabaseError as exc:
            conn.close()
            if _is_lock_error(exc):
                raise self._lock_failure(exc) from None
            raise error(f"{str(self.path)!r} is not an SQLite database ({exc})", None,
                        expected="a result index written by 'protolang batch'",
                        hint="move that file away, or use a new results folder") from None
        except BaseException:
            conn.close()
            raise
        return conn

    def _check_schema(self, conn: sqlite3.Connection) -> None:
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        if "meta" in tables:
            meta = dict(conn.execute("SELECT name, value FROM meta").fetchall())
            found = meta.get("schema_version")
            if found is None:
                raise self._not_an_index("its meta table has no schema_version")
            if str(found) != str(SCHEMA_VERSION):
                made_by = meta.get("protolang_version", "an unknown version")
                raise error(f"results folder {str(self.results_dir)!r} has a result index of schema version "
                            f"{found} (made by protolang {made_by}); this protolang {__version__} reads schema "
                            f"version {SCHEMA_VERSION}", None,
                            expected=f"a result index of schema version {SCHEMA_VERSION}",
                            hint=f"use a new results folder for this protolang (for example "
                                 f"'{self.results_dir.name}-v{SCHEMA_VERSION}'); the old folder stays readable "
                                 f"with protolang {made_by}")
            missing = {"runs", "aliases"} - tables
            if missing:
                raise self._not_an_index(f"it has no {' or '.join(sorted(missing))} table")
            return
        if tables:
            raise self._not_an_index("it holds other tables (" + ", ".join(sorted(tables)) + ")")
        if not self._create:
            raise self._not_an_index("it is empty")
        for statement in _SCHEMA:
            conn.execute(statement)
        conn.executemany("INSERT OR IGNORE INTO meta (name, value) VALUES (?, ?)",
                         [("schema_version", str(SCHEMA_VERSION)), ("protolang_version", __version__)])

    def _not_an_index(self, why: str) -> ProtocolError:
        return error(f"{str(self.path)!r} is an SQLite database but not a protolang result index: {why}", None,
                     expected="a result index written by 'protolang batch'",
                     hint="move that file away, or use a new results folder")

    def _lock_failure(self, exc: BaseException) -> ProtocolError:
        return error(f"result index {str(self.path)!r} stayed locked for {LOCK_PATIENCE_S:g} s ({exc})", None,
                     expected="a result index that other processes write in short transactions",
                     hint="another program may hold it open in a long transaction; SQLite locking also fails "
                          "on some network file systems, so keep results folders on a local disk")

    def _retry(self, attempt: Callable[[], Any]) -> Any:
        """Call ``attempt`` until it does not fail with a lock error (at most LOCK_PATIENCE_S)."""
        deadline = time.monotonic() + LOCK_PATIENCE_S
        delay = 0.002
        while True:
            try:
                return attempt()
            except sqlite3.OperationalError as exc:
                if not _is_lock_error(exc):
                    raise
                if time.monotonic() >= deadline:
                    raise self._lock_failure(exc) from None
                time.sleep(delay)
                delay = min(delay * 2, 0.25)

    def _transaction(self, conn: sqlite3.Connection, body: Callable[[sqlite3.Connection], Any]) -> Any:
        """Run ``body(conn)`` in one BEGIN IMMEDIATE transaction, retried while the file is locked."""
        def attempt():
            if conn.in_transaction:
                # An interrupt between an earlier BEGIN and its try block left it open.
                conn.execute("ROLLBACK")
            conn.execute("BEGIN IMMEDIATE")
            try:
                result = body(conn)
                conn.execute("COMMIT")
            except BaseException:
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
                raise
            return result
        return self._retry(attempt)

    def _write(self, body: Callable[[sqlite3.Connection], Any]) -> Any:
        return self._transaction(self._connection(), body)

    def _read(self, sql: str, params: Iterable = ()) -> list[tuple]:
        conn = self._connection()
        return self._retry(lambda: conn.execute(sql, tuple(params)).fetchall())

    # -- rows ---------------------------------------------------------------------------

    @staticmethod
    def _encode(fields: dict) -> dict:
        unknown = set(fields) - set(RUN_COLUMNS)
        if unknown:
            raise AssertionError(f"internal error: unknown result index columns {sorted(unknown)}; "
                                 f"the runs table has {list(RUN_COLUMNS)}")
        out = dict(fields)
        status = out.get("status")
        if status is not None and status not in STATUSES:
            raise AssertionError(f"internal error: run status {status!r} is not one of {STATUSES}")
        params = out.get("params")
        if isinstance(params, dict):
            out["params"] = json.dumps({str(k): str(v) for k, v in params.items()})
        elif isinstance(params, str):
            if not isinstance(json.loads(params), dict):
                raise AssertionError(f"internal error: run params must be a JSON object, got {params!r}")
        elif params is not None:
            raise AssertionError(f"internal error: run params must be a dict or JSON text, got {type(params).__name__}")
        for col in ("protocol", "folder"):
            if isinstance(out.get(col), os.PathLike):
                out[col] = os.fspath(out[col])
        return out

    def upsert(self, row: dict) -> None:
        """Insert ``row`` or replace the whole stored row with the same key.

        Args:
            row: column -> value (columns in :data:`RUN_COLUMNS`; missing ones are stored empty).
                ``params`` may be a dict (stored as a JSON object of text values) or JSON text.

        Raises:
            AssertionError: an unknown column, no key, or a status not in :data:`STATUSES`.
        """
        fields = self._encode(row)
        if not fields.get("key"):
            raise AssertionError(f"internal error: a result index row needs a key, got {row!r}")
        cols = list(RUN_COLUMNS)
        sql = f"INSERT OR REPLACE INTO runs ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})"
        values = tuple(fields.get(c) for c in cols)
        self._write(lambda conn: conn.execute(sql, values))

    def update(self, key: str, **fields) -> None:
        """Set some columns of the run ``key``.

        Raises:
            KeyError: no run has that key.
            AssertionError: an unknown column (or ``key``) or an unknown status.
        """
        if "key" in fields:
            raise AssertionError("internal error: update() cannot change a run's key; upsert a new row")
        fields = self._encode(fields)
        if not fields:
            return
        sql = f"UPDATE runs SET {', '.join(f'{c} = ?' for c in fields)} WHERE key = ?"
        values = (*fields.values(), key)
        changed = self._write(lambda conn: conn.execute(sql, values).rowcount)
        if changed == 0:
            raise KeyError(f"no run with key {key!r} in {self.path}")

    def get(self, key: str) -> dict | None:
        """The stored row of run ``key`` (``params`` decoded to a dict), or None."""
        rows = self._read(f"SELECT {', '.join(RUN_COLUMNS)} FROM runs WHERE key = ?", (key,))
        if not rows:
            return None
        row = dict(zip(RUN_COLUMNS, rows[0]))
        row["params"] = json.loads(row["params"]) if row["params"] else {}
        return row

    def alias(self, pre_key: str) -> str | None:
        """The run key recorded for ``pre_key``, or None."""
        rows = self._read("SELECT key FROM aliases WHERE pre_key = ?", (pre_key,))
        return rows[0][0] if rows else None

    def add_alias(self, pre_key: str, key: str) -> None:
        """Record (or replace) the run key of ``pre_key``."""
        self._write(lambda conn: conn.execute("INSERT OR REPLACE INTO aliases (pre_key, key) VALUES (?, ?)",
                                              (pre_key, key)))

    def runs(self, status: str | Iterable[str] | None = None, protocol: str | None = None,
             batch: str | None = None) -> "pd.DataFrame":
        """The run list, ordered by protocol, point and key.

        Args:
            status: keep runs with this status (or any of these statuses).
            protocol: keep runs whose protocol path or title contains this text (case-insensitive).
            batch: keep runs of this batch id.

        Returns:
            A DataFrame with the columns of :data:`RUN_COLUMNS` (``params`` as JSON text).
        """
        import pandas as pd

        where, params = [], []
        if status is not None:
            wanted = [status] if isinstance(status, str) else list(status)
            where.append(f"status IN ({', '.join('?' * len(wanted))})")
            params.extend(wanted)
        if batch is not None:
            where.append("batch = ?")
            params.append(batch)
        sql = (f"SELECT {', '.join(RUN_COLUMNS)} FROM runs" + (" WHERE " + " AND ".join(where) if where else "")
               + " ORDER BY protocol, point, key")
        df = pd.DataFrame(self._read(sql, params), columns=list(RUN_COLUMNS))
        if protocol is not None:
            # SQLite's lower() and LIKE fold ASCII only, and LIKE treats % and _ as wildcards.
            needle = protocol.casefold()
            hit = [needle in str(p or "").casefold() or needle in str(t or "").casefold()
                   for p, t in zip(df["protocol"], df["title"])]
            df = df[hit].reset_index(drop=True)
        for col in ("started", "ended", "wall_s"):
            df[col] = df[col].astype("float64")
        df["point"] = df["point"].astype("Int64")
        return df

    def unfinished_batches(self) -> list[str]:
        """Ids of the batches that have queued or running runs (live, or killed before they could say)."""
        rows = self._read("SELECT DISTINCT batch FROM runs WHERE status IN ('queued', 'running') AND batch IS NOT NULL")
        return sorted(str(r[0]) for r in rows)

    def mark_unfinished(self, status: str = "interrupted", *, batch: str | None = None) -> int:
        """Give every queued or running run ``status`` (after a batch was stopped or crashed).

        Args:
            status: the new status (a finished one).
            batch: only runs of this batch id (other batches may still be running).

        Returns:
            How many runs changed.
        """
        if status not in STATUSES or status in UNFINISHED:
            raise AssertionError(f"internal error: mark_unfinished needs a finished status, got {status!r}")
        sql = "UPDATE runs SET status = ? WHERE status IN ('queued', 'running')"
        values: tuple = (status,)
        if batch is not None:
            sql += " AND batch = ?"
            values += (batch,)
        return self._write(lambda conn: conn.execute(sql, values).rowcount)

    # -- lifetime -------------------------------------------------------------------------

    def close(self) -> None:
        """Close this process's connection (the instance reopens it if used again)."""
        if self._conn is not None and self._pid == os.getpid():
            self._conn.close()
        self._conn = None

    def __enter__(self) -> "ResultIndex":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __reduce__(self):
        return (_reopen, (str(self.results_dir),))

    def __repr__(self) -> str:
        return f"ResultIndex({str(self.results_dir)!r})"


# -- which batches are alive ----------------------------------------------------------------
LOCK_FOLDER = "batches"


class BatchLock:
    """An exclusive lock on ``RESULTS/batches/<id>.lock`` held while a batch runs.

    The lock is an advisory ``flock`` on an open file: the operating system releases it when the
    process ends, however it ends (SIGKILL included), so a later batch can tell a batch that is
    still running from one that died with runs marked queued or running. Local file systems
    only: on a network file system without ``flock`` every other batch looks dead (the former
    behaviour: its unfinished runs are marked interrupted).
    """

    def __init__(self, results_dir: str | os.PathLike, batch: str):
        self.path = Path(results_dir) / LOCK_FOLDER / f"{batch}.lock"
        self._fh = None

    def __enter__(self) -> "BatchLock":
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._fh = open(self.path, "a+")
        if _flock is not None:
            _flock(self._fh.fileno(), _LOCK_EX | _LOCK_NB)   # a fresh id: nobody else holds it
        self._fh.write(f"{os.getpid()}\n")
        self._fh.flush()
        return self

    def __exit__(self, *exc) -> None:
        if self._fh is not None:
            try:
                self.path.unlink()
            except FileNotFoundError:
                pass
            self._fh.close()   # closing releases the lock
            self._fh = None


def batch_alive(results_dir: str | os.PathLike, batch: str) -> bool:
    """Whether a process still holds ``batch``'s :class:`BatchLock` (False when its file is gone)."""
    path = Path(results_dir) / LOCK_FOLDER / f"{batch}.lock"
    if _flock is None:
        return False
    try:
        fh = open(path, "r")
    except FileNotFoundError:
        return False
    with fh:
        try:
            _flock(fh.fileno(), _LOCK_EX | _LOCK_NB)
        except BlockingIOError:
            return True
        return False    # closing the file releases the lock we just took
