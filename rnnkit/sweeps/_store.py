"""The run store: one embedded SQLite file, one committed row per finished run.

A run is keyed by ``run_key(config, fingerprint, fold)``: sha256 of every
Config field, the data fingerprint and, for a backtest sweep, the fold (its
number and how the folds were made), so a killed sweep resumes fold by fold. A row is committed (WAL journal, full sync)
before the sweep starts the next run, so a killed sweep loses at most the run
in flight, and a second sweep over the same store runs only the missing keys.
Only the process that opened the store writes to it; parallel workers send
their results back to it.

Our files carry SQLite's application_id (``APPLICATION_ID``), so a database
that is not a run store is refused before anything is written to it. Two
sweeps (two processes) on one store share the work: a run is *claimed*
(a row in ``claims``) before it starts, and a run claimed by a live process
is left to it. A claim dies with its process (same host: the process is
gone) or after ``LEASE`` seconds.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import os
import socket
import sqlite3
import threading
import time
import uuid
from pathlib import Path
from typing import Dict, Iterable, List, Optional, Union

import pandas as pd

from ..data._config import Config

LAYOUT = 2  # bump when the table below changes (2: the fold column; layout-1 files gain it on opening)
APPLICATION_ID = 0x524E4E4B  # "RNNK": PRAGMA application_id of every run store we write
LEASE = 24 * 3600.0  # seconds after which a claim of a process on another host is taken over
_TABLE = """
CREATE TABLE IF NOT EXISTS runs (
    key TEXT PRIMARY KEY,       -- run_key(config, fingerprint, fold)
    config TEXT NOT NULL,       -- JSON object of every Config field
    fingerprint TEXT NOT NULL,  -- "sha256:..." of the data the run used
    status TEXT NOT NULL,       -- "ok", "diverged at epoch N", "stopped early at epoch N", "failed"
    epochs INTEGER NOT NULL,    -- epochs run
    seconds REAL NOT NULL,      -- wall time of the run
    compiles INTEGER NOT NULL,  -- training programs compiled for this run
    metrics TEXT NOT NULL,      -- JSON object: column name -> number or null
    message TEXT NOT NULL,      -- why a run failed ("" otherwise)
    finished TEXT NOT NULL,     -- ISO-8601 UTC
    fold TEXT NOT NULL DEFAULT ''  -- JSON {"fold": k, "folds": K, "scheme": ...} of a backtest run; '' otherwise
)"""
_CLAIMS = """
CREATE TABLE IF NOT EXISTS claims (
    key TEXT PRIMARY KEY,  -- run_key of a run some process is running now
    owner TEXT NOT NULL,   -- that process's RunStore (random id)
    host TEXT NOT NULL,    -- its host name
    pid INTEGER NOT NULL,  -- its process id
    at REAL NOT NULL       -- when it claimed the run (seconds since the epoch)
)"""
_OURS = {"runs", "layout", "claims", "weights"}
# The weights a run ended with, so that a finished sweep can show any run without training
# it again. A table of its own: stores written before it existed gain it on opening.
_WEIGHTS = """
CREATE TABLE IF NOT EXISTS weights (
    key TEXT PRIMARY KEY,       -- the run's key in runs
    params BLOB NOT NULL,       -- compressed .npz of U, V, b, W, c (read with allow_pickle=False)
    history TEXT NOT NULL,      -- JSON object: history column -> list of values (null for NaN)
    best_epoch INTEGER NOT NULL -- the epoch whose weights these are (0: the initial ones)
)"""
KEPT = ("params", "history", "best_epoch")  # a record's optional fields that go to `weights`
FIELDS = ("key", "config", "fingerprint", "status", "epochs", "seconds", "compiles",
          "metrics", "message", "finished", "fold")


def run_key(config: Config, fingerprint: str, fold: Optional[dict] = None) -> str:
    """sha256 hex of the run's full config, data fingerprint and fold (canonical JSON).

    ``fold`` None (a run on the config's own split) gives the key the store has
    always used, so stores of earlier sweeps resume.
    """
    what = {"config": config.to_dict(), "data": fingerprint}
    if fold is not None:
        what["fold"] = fold
    blob = json.dumps(what, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(blob.encode("utf-8")).hexdigest()


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _json_number(v):
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


class RunStore:
    """Finished runs in an SQLite file (or in memory when `path` is None).

    Args:
        path: database file (created with its folder if missing); None keeps
            the rows in memory only, for a sweep that need not survive.

    Example:
        >>> with RunStore("sweep.db") as store:
        ...     print(len(store), "runs stored")
    """

    def __init__(self, path: Optional[Union[str, os.PathLike]] = None):
        if path is not None and not isinstance(path, (str, os.PathLike)):
            raise TypeError(f"`store` (={path!r}) must be a file path, a RunStore or None")
        self.path = None if path is None else Path(path)
        if self.path is not None:
            if self.path.is_dir():
                raise ValueError(f"`store` ({str(self.path)!r}) is a folder; give a file name, "
                                 f"for example {str(self.path / 'sweep.sqlite')!r}")
            try:
                self.path.parent.mkdir(parents=True, exist_ok=True)
            except OSError as e:
                raise ValueError(f"`store` ({str(self.path)!r}): its folder cannot be made ({e.strerror}); "
                                 "choose a writable folder") from None
        # One connection, used under a lock, so a sweep may run in a background thread.
        self._lock = threading.Lock()
        self._owner = uuid.uuid4().hex
        where = "an in-memory store" if self.path is None else repr(str(self.path))
        try:
            self._db = sqlite3.connect(":memory:" if self.path is None else str(self.path),
                                       check_same_thread=False, timeout=30.0)
        except sqlite3.Error as e:
            raise ValueError(f"`store` {where} cannot be opened ({e}); choose a writable folder") from None
        try:
            with self._lock:
                self._check_ours(where)  # before anything is written to the file
                self._check_writable(where)
                with self._db:
                    if self.path is not None:
                        self._db.execute("PRAGMA journal_mode=WAL")
                    self._db.execute("PRAGMA synchronous=FULL")
                    self._db.execute(f"PRAGMA application_id={APPLICATION_ID}")
                    self._db.execute(_TABLE)
                    self._db.execute(_CLAIMS)
                    self._db.execute(_WEIGHTS)
                    self._db.execute("CREATE TABLE IF NOT EXISTS layout (version INTEGER NOT NULL)")
                    row = self._db.execute("SELECT version FROM layout").fetchone()
                    if row is None:
                        self._db.execute("INSERT INTO layout VALUES (?)", (LAYOUT,))
                    elif row[0] == 1:  # a store of plain runs: add the fold column, keep every row
                        columns = {r[1] for r in self._db.execute("PRAGMA table_info(runs)")}
                        if "fold" not in columns:
                            self._db.execute("ALTER TABLE runs ADD COLUMN fold TEXT NOT NULL DEFAULT ''")
                        self._db.execute("UPDATE layout SET version = ?", (LAYOUT,))
        except sqlite3.DatabaseError as e:
            self._db.close()
            raise ValueError(f"`store` {where} cannot be used as an rnnkit run store ({e}); "
                             "give a new file name in a writable folder") from None
        except BaseException:
            self._db.close()
            raise

    def _check_ours(self, where: str) -> None:
        """Refuse a database that is not a run store of this layout, reading only."""
        try:
            app = self._db.execute("PRAGMA application_id").fetchone()[0]
            tables = {n for (n,) in self._db.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        except sqlite3.OperationalError as e:
            raise ValueError(f"`store` {where} cannot be opened ({e}); choose a file in a folder "
                             "you may write to") from None
        except sqlite3.DatabaseError as e:
            raise ValueError(f"`store` {where} is not an rnnkit run store ({e}); give a new file "
                             "name") from None
        # application_id 0 with only our tables: a store from before the id was written
        if not tables and app == 0:
            return  # a new (or empty) database
        if app != APPLICATION_ID and not (app == 0 and tables and tables <= _OURS and "runs" in tables):
            raise ValueError(f"`store` {where} is an SQLite database that is not an rnnkit run store "
                             f"(application_id {app}, tables {sorted(tables)}); it was left unchanged: "
                             "give a new file name")
        if "layout" in tables:
            row = self._db.execute("SELECT version FROM layout").fetchone()
            if row is not None and row[0] not in (1, LAYOUT):  # layout 1 gains the fold column
                raise ValueError(f"`store` {where} has layout {row[0]}, this rnnkit writes layout "
                                 f"{LAYOUT}; use a new file for this sweep")

    def _check_writable(self, where: str) -> None:
        """Take SQLite's write lock once, so an unwritable file or folder is refused before any run."""
        if self.path is None:
            return
        try:
            self._db.execute("BEGIN IMMEDIATE")
            self._db.execute("CREATE TABLE IF NOT EXISTS _rnnkit_write_probe (x)")
            self._db.execute("DROP TABLE _rnnkit_write_probe")
            self._db.rollback()
        except sqlite3.OperationalError as e:
            if self._db.in_transaction:
                self._db.rollback()
            raise ValueError(f"`store` {where} cannot be written ({e}); choose a file in a folder "
                             "you may write to") from None

    # --- writing ---
    def put(self, record: dict) -> None:
        """Commit one finished run (replacing a row with the same key)."""
        missing = [f for f in FIELDS if f not in record and f not in ("finished", "fold")]
        if missing:
            raise ValueError(f"run record lacks {missing}; it needs {list(FIELDS)}")
        row = (record["key"], json.dumps(record["config"], allow_nan=False), record["fingerprint"],
               str(record["status"]), int(record["epochs"]), float(record["seconds"]),
               int(record["compiles"]),
               json.dumps({k: _json_number(v) for k, v in record["metrics"].items()}, allow_nan=False),
               str(record.get("message") or ""),
               record.get("finished") or _now(),
               "" if record.get("fold") is None else json.dumps(record["fold"], sort_keys=True))
        kept = None
        if record.get("params") is not None:
            kept = (record["key"], sqlite3.Binary(bytes(record["params"])),
                    str(record.get("history") or "{}"), int(record.get("best_epoch") or 0))
        with self._lock, self._db:  # the with-block commits every row before returning
            self._db.execute(f"INSERT OR REPLACE INTO runs ({', '.join(FIELDS)}) "
                             f"VALUES ({', '.join('?' * len(FIELDS))})", row)
            if kept is not None:
                self._db.execute("INSERT OR REPLACE INTO weights VALUES (?, ?, ?, ?)", kept)
            self._db.execute("DELETE FROM claims WHERE key = ?", (record["key"],))

    # --- sharing the work between processes ---
    def claim(self, key: str) -> bool:
        """Claim run `key` for this store's process: False when it is stored already or a live
        process has claimed it (a claim of a process that is gone, or older than LEASE
        seconds on another host, is taken over)."""
        if self.path is None:
            return True
        with self._lock:
            self._db.execute("BEGIN IMMEDIATE")  # the write lock: one claimer at a time
            won = False
            try:
                stored = self._db.execute("SELECT 1 FROM runs WHERE key = ?", (key,)).fetchone()
                row = self._db.execute("SELECT owner, host, pid, at FROM claims WHERE key = ?",
                                       (key,)).fetchone()
                if not stored and (row is None or row[0] == self._owner or _stale(*row[1:])):
                    self._db.execute("INSERT OR REPLACE INTO claims VALUES (?, ?, ?, ?, ?)",
                                     (key, self._owner, socket.gethostname(), os.getpid(), time.time()))
                    won = True
            finally:
                if won:
                    self._db.commit()
                else:
                    self._db.rollback()
            return won

    def claimed_elsewhere(self, keys: Iterable[str]) -> set:
        """The keys among `keys` that a live process other than this one has claimed."""
        keys = list(keys)
        with self._lock:
            rows = self._db.execute("SELECT key, owner, host, pid, at FROM claims").fetchall()
        wanted = set(keys)
        return {k for k, owner, host, pid, at in rows
                if k in wanted and owner != self._owner and not _stale(host, pid, at)}

    def release(self) -> None:
        """Drop this store's claims on runs it did not finish (a stopped sweep)."""
        if self.path is None:
            return
        with self._lock, self._db:
            self._db.execute("DELETE FROM claims WHERE owner = ?", (self._owner,))

    # --- reading ---
    def keys(self) -> set:
        """Keys of every stored run."""
        with self._lock:
            return {k for (k,) in self._db.execute("SELECT key FROM runs")}

    def get(self, keys: Iterable[str]) -> Dict[str, dict]:
        """Stored records of the given keys (absent keys are left out)."""
        keys = list(keys)
        out = {}
        with self._lock:
            for at in range(0, len(keys), 500):  # SQLite caps bound parameters per query
                part = keys[at:at + 500]
                q = f"SELECT {', '.join(FIELDS)} FROM runs WHERE key IN ({', '.join('?' * len(part))})"
                for row in self._db.execute(q, part):
                    out[row[0]] = self._record(row)
        return out

    def kept(self, keys: Iterable[str]) -> Dict[str, dict]:
        """The kept weights of the given keys: {key: {"params": npz bytes, "history": JSON
        text, "best_epoch": int}} (runs stored without weights are left out)."""
        keys = list(keys)
        out = {}
        with self._lock:
            for at in range(0, len(keys), 500):
                part = keys[at:at + 500]
                q = f"SELECT key, params, history, best_epoch FROM weights WHERE key IN ({', '.join('?' * len(part))})"
                for k, params, history, best in self._db.execute(q, part):
                    out[k] = {"params": bytes(params), "history": history, "best_epoch": int(best)}
        return out

    def records(self) -> List[dict]:
        """Every stored record, in the order they finished."""
        with self._lock:
            rows = self._db.execute(f"SELECT {', '.join(FIELDS)} FROM runs ORDER BY rowid").fetchall()
        return [self._record(r) for r in rows]

    def table(self) -> pd.DataFrame:
        """Every stored run as a DataFrame: config fields, status, epochs, seconds, compiles,
        metrics."""
        rows = []
        for r in self.records():
            row = dict(r["config"])
            row.update({k: r[k] for k in ("status", "epochs", "seconds", "compiles", "message")})
            if r["fold"] is not None:
                row["fold"] = r["fold"]["fold"]
            row.update({k: (math.nan if v is None else v) for k, v in r["metrics"].items()})
            row["key"] = r["key"]
            rows.append(row)
        return pd.DataFrame(rows)

    def _record(self, row) -> dict:
        r = dict(zip(FIELDS, row))
        try:
            r["config"] = json.loads(r["config"])
            r["metrics"] = json.loads(r["metrics"])
            if not isinstance(r["config"], dict) or not isinstance(r["metrics"], dict):
                raise ValueError("config and metrics must be JSON objects")
            for k in ("epochs", "compiles"):
                r[k] = int(r[k])
            r["seconds"] = float(r["seconds"])
            r["status"], r["message"] = str(r["status"]), str(r["message"])
            r["fold"] = json.loads(r["fold"]) if r["fold"] else None
        except (ValueError, TypeError) as e:
            where = "the in-memory store" if self.path is None else repr(str(self.path))
            raise ValueError(f"run {r['key']!r} in the store {where} is damaged ({e}); delete that "
                             "row (DELETE FROM runs WHERE key = '...') and run the sweep again to "
                             "redo it") from None
        return r

    def __len__(self) -> int:
        with self._lock:
            return self._db.execute("SELECT COUNT(*) FROM runs").fetchone()[0]

    def close(self) -> None:
        """Close the database (the rows are already committed)."""
        with self._lock:
            self._db.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def __repr__(self) -> str:
        return f"RunStore({None if self.path is None else str(self.path)!r})"


def process_alive(pid: int) -> bool:
    """Whether a process with this id runs on this host (one we may not signal counts as running)."""
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, ValueError):
        return True
    return True


def _stale(host: str, pid: int, at: float) -> bool:
    """Whether a claim no longer holds: its process is gone (same host) or it is older than LEASE."""
    if host == socket.gethostname() and not process_alive(pid):
        return True
    return time.time() - float(at) > LEASE


def open_store(store) -> tuple:
    """(RunStore, owned): a RunStore as given, or a new one from a path / None (owned: close it)."""
    if isinstance(store, RunStore):
        return store, False
    return RunStore(store), True
