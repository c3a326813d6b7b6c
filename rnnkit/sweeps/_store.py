"""The run store: one embedded SQLite file, one committed row per finished run.

A run is keyed by ``run_key(config, fingerprint)``: sha256 of every Config
field and the data fingerprint. A row is committed (WAL journal, full sync)
before the sweep starts the next run, so a killed sweep loses at most the run
in flight, and a second sweep over the same store runs only the missing keys.
Only the process that opened the store writes to it; parallel workers send
their results back to it.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import os
import sqlite3
import threading
from pathlib import Path
from typing import Dict, Iterable, List, Optional, Union

import pandas as pd

from ..data._config import Config

LAYOUT = 1  # bump when the table below changes
_TABLE = """
CREATE TABLE IF NOT EXISTS runs (
    key TEXT PRIMARY KEY,       -- run_key(config, fingerprint)
    config TEXT NOT NULL,       -- JSON object of every Config field
    fingerprint TEXT NOT NULL,  -- "sha256:..." of the data the run used
    status TEXT NOT NULL,       -- "ok", "diverged at epoch N", "stopped early at epoch N", "failed"
    epochs INTEGER NOT NULL,    -- epochs run
    seconds REAL NOT NULL,      -- wall time of the run
    compiles INTEGER NOT NULL,  -- training programs compiled for this run
    metrics TEXT NOT NULL,      -- JSON object: column name -> number or null
    message TEXT NOT NULL,      -- why a run failed ("" otherwise)
    finished TEXT NOT NULL      -- ISO-8601 UTC
)"""
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
          "metrics", "message", "finished")


def run_key(config: Config, fingerprint: str) -> str:
    """sha256 hex of the run's full config and data fingerprint (canonical JSON)."""
    blob = json.dumps({"config": config.to_dict(), "data": fingerprint},
                      sort_keys=True, separators=(",", ":"), allow_nan=False)
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
            self.path.parent.mkdir(parents=True, exist_ok=True)
        # One connection, used under a lock, so a sweep may run in a background thread.
        self._lock = threading.Lock()
        self._db = sqlite3.connect(":memory:" if self.path is None else str(self.path),
                                   check_same_thread=False, timeout=30.0)
        try:
            with self._lock, self._db:
                if self.path is not None:
                    self._db.execute("PRAGMA journal_mode=WAL")
                self._db.execute("PRAGMA synchronous=FULL")
                self._db.execute(_TABLE)
                self._db.execute(_WEIGHTS)
                self._db.execute("CREATE TABLE IF NOT EXISTS layout (version INTEGER NOT NULL)")
                row = self._db.execute("SELECT version FROM layout").fetchone()
                if row is None:
                    self._db.execute("INSERT INTO layout VALUES (?)", (LAYOUT,))
                elif row[0] != LAYOUT:
                    raise ValueError(f"`store` {str(self.path)!r} has layout {row[0]}, this rnnkit "
                                     f"writes layout {LAYOUT}; use a new file for this sweep")
        except sqlite3.DatabaseError as e:
            self._db.close()
            raise ValueError(f"`store` {str(self.path)!r} is not an rnnkit run store ({e}); "
                             "give a new file name") from None

    # --- writing ---
    def put(self, record: dict) -> None:
        """Commit one finished run (replacing a row with the same key)."""
        missing = [f for f in FIELDS if f not in record and f != "finished"]
        if missing:
            raise ValueError(f"run record lacks {missing}; it needs {list(FIELDS)}")
        row = (record["key"], json.dumps(record["config"], allow_nan=False), record["fingerprint"],
               str(record["status"]), int(record["epochs"]), float(record["seconds"]),
               int(record["compiles"]),
               json.dumps({k: _json_number(v) for k, v in record["metrics"].items()}, allow_nan=False),
               str(record.get("message") or ""),
               record.get("finished") or _now())
        kept = None
        if record.get("params") is not None:
            kept = (record["key"], sqlite3.Binary(bytes(record["params"])),
                    str(record.get("history") or "{}"), int(record.get("best_epoch") or 0))
        with self._lock, self._db:  # the with-block commits both rows before returning
            self._db.execute(f"INSERT OR REPLACE INTO runs ({', '.join(FIELDS)}) "
                             f"VALUES ({', '.join('?' * len(FIELDS))})", row)
            if kept is not None:
                self._db.execute("INSERT OR REPLACE INTO weights VALUES (?, ?, ?, ?)", kept)

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
            row.update({k: (math.nan if v is None else v) for k, v in r["metrics"].items()})
            row["key"] = r["key"]
            rows.append(row)
        return pd.DataFrame(rows)

    @staticmethod
    def _record(row) -> dict:
        r = dict(zip(FIELDS, row))
        r["config"] = json.loads(r["config"])
        r["metrics"] = json.loads(r["metrics"])
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


def open_store(store) -> tuple:
    """(RunStore, owned): a RunStore as given, or a new one from a path / None (owned: close it)."""
    if isinstance(store, RunStore):
        return store, False
    return RunStore(store), True
