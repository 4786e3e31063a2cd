"""The ledger: which tiles of which step key are finished, kept in SQLite inside the run directory.

Only the client process writes it, and only after a tile's region is written, so a record always
means the data is there. Every completion is also appended to ``history`` with the invocation id, so
a resumed run can show exactly which tiles it computed.
"""
from __future__ import annotations

import json
import sqlite3
import time
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

__all__ = ["Ledger"]

_SCHEMA = """
CREATE TABLE IF NOT EXISTS steps (name TEXT PRIMARY KEY, key TEXT NOT NULL, total INTEGER, info TEXT,
                                  updated REAL);
CREATE TABLE IF NOT EXISTS tiles (name TEXT, key TEXT, i INTEGER, j INTEGER, status TEXT, error TEXT,
                                  seconds REAL, finished REAL, PRIMARY KEY (name, key, i, j));
CREATE TABLE IF NOT EXISTS history (invocation TEXT, name TEXT, key TEXT, i INTEGER, j INTEGER,
                                    status TEXT, time REAL);
CREATE TABLE IF NOT EXISTS products (name TEXT, key TEXT, output TEXT, path TEXT, PRIMARY KEY (name, output));
CREATE TABLE IF NOT EXISTS timings (invocation TEXT, name TEXT, phase TEXT, seconds REAL, time REAL);
"""


class Ledger:
    def __init__(self, path: Path, invocation: str | None = None):
        self.path = Path(path)
        self.invocation = invocation or time.strftime("%Y%m%dT%H%M%S")
        self.db = sqlite3.connect(str(self.path), timeout=30, isolation_level=None)
        self.db.execute("PRAGMA journal_mode=DELETE")
        # NORMAL: a committed record survives the process being killed (only an OS crash could lose
        # the last records, and then the tiles are simply recomputed); FULL cost 26-55 ms per tile.
        self.db.execute("PRAGMA synchronous=NORMAL")
        self.db.executescript(_SCHEMA)

    def close(self) -> None:
        self.db.close()

    @contextmanager
    def _transaction(self) -> Iterator[None]:
        """One explicit transaction (the connection autocommits each statement otherwise)."""
        self.db.execute("BEGIN IMMEDIATE")
        try:
            yield
        except BaseException:
            self.db.execute("ROLLBACK")
            raise
        self.db.execute("COMMIT")

    # steps ---------------------------------------------------------------------------------------
    def step_key(self, name: str) -> str | None:
        row = self.db.execute("SELECT key FROM steps WHERE name=?", (name,)).fetchone()
        return row[0] if row else None

    def set_step(self, name: str, key: str, total: int, info: dict) -> None:
        self.db.execute("INSERT OR REPLACE INTO steps VALUES (?,?,?,?,?)",
                        (name, key, total, json.dumps(info, default=str), time.time()))

    def forget_step(self, name: str) -> None:
        with self._transaction():
            self.db.execute("DELETE FROM tiles WHERE name=?", (name,))
            self.db.execute("DELETE FROM steps WHERE name=?", (name,))
            self.db.execute("DELETE FROM products WHERE name=?", (name,))

    def steps(self) -> list[dict]:
        rows = self.db.execute("SELECT name, key, total, info, updated FROM steps ORDER BY updated").fetchall()
        return [{"name": r[0], "key": r[1], "total": r[2], "info": json.loads(r[3] or "{}"), "updated": r[4]}
                for r in rows]

    # tiles ---------------------------------------------------------------------------------------
    def done(self, name: str, key: str) -> set[tuple[int, int]]:
        rows = self.db.execute("SELECT i, j FROM tiles WHERE name=? AND key=? AND status='done'", (name, key))
        return {(i, j) for i, j in rows}

    def failed(self, name: str, key: str) -> dict[tuple[int, int], str]:
        rows = self.db.execute("SELECT i, j, error FROM tiles WHERE name=? AND key=? AND status='failed'",
                               (name, key))
        return {(i, j): e for i, j, e in rows}

    def mark(self, name: str, key: str, index: tuple[int, int], status: str, seconds: float = 0.0,
             error: str | None = None) -> None:
        now = time.time()
        with self._transaction():
            self.db.execute("INSERT OR REPLACE INTO tiles VALUES (?,?,?,?,?,?,?,?)",
                            (name, key, index[0], index[1], status, error, seconds, now))
            self.db.execute("INSERT INTO history VALUES (?,?,?,?,?,?,?)",
                            (self.invocation, name, key, index[0], index[1], status, now))

    def history(self, name: str | None = None) -> list[dict]:
        q = "SELECT invocation, name, key, i, j, status, time FROM history"
        rows = self.db.execute(q + (" WHERE name=?" if name else "") + " ORDER BY time", (name,) if name else ())
        return [dict(zip(("invocation", "name", "key", "i", "j", "status", "time"), r)) for r in rows]

    # products and timings ------------------------------------------------------------------------
    def product(self, name: str, output: str) -> tuple[str, str] | None:
        row = self.db.execute("SELECT key, path FROM products WHERE name=? AND output=?", (name, output)).fetchone()
        return (row[0], row[1]) if row else None

    def set_product(self, name: str, key: str, output: str, path: str) -> None:
        self.db.execute("INSERT OR REPLACE INTO products VALUES (?,?,?,?)", (name, key, output, path))

    def add_timing(self, name: str, phase: str, seconds: float) -> None:
        self.db.execute("INSERT INTO timings VALUES (?,?,?,?,?)", (self.invocation, name, phase, seconds, time.time()))

    def timings(self, invocation: str | None = None) -> list[dict]:
        rows = self.db.execute("SELECT invocation, name, phase, seconds FROM timings"
                               + (" WHERE invocation=?" if invocation else ""), (invocation,) if invocation else ())
        return [dict(zip(("invocation", "name", "phase", "seconds"), r)) for r in rows]
