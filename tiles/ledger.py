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

__all__ = ["Ledger", "describe_changes"]

_SCHEMA = """
CREATE TABLE IF NOT EXISTS steps (name TEXT PRIMARY KEY, key TEXT NOT NULL, total INTEGER, info TEXT,
                                  updated REAL);
CREATE TABLE IF NOT EXISTS tiles (name TEXT, key TEXT, i INTEGER, j INTEGER, status TEXT, error TEXT,
                                  seconds REAL, finished REAL, PRIMARY KEY (name, key, i, j));
CREATE TABLE IF NOT EXISTS history (invocation TEXT, name TEXT, key TEXT, i INTEGER, j INTEGER,
                                    status TEXT, time REAL);
CREATE TABLE IF NOT EXISTS products (name TEXT, key TEXT, output TEXT, path TEXT, PRIMARY KEY (name, output));
CREATE TABLE IF NOT EXISTS timings (invocation TEXT, name TEXT, phase TEXT, seconds REAL, time REAL);
CREATE TABLE IF NOT EXISTS invocations (invocation TEXT PRIMARY KEY, mode TEXT, started REAL, finished REAL,
                                        seconds REAL, info TEXT);
CREATE TABLE IF NOT EXISTS campaign (invocation TEXT, line TEXT, fingerprint TEXT, event TEXT, time REAL);
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

    def step_info(self, name: str) -> dict | None:
        """The information recorded with the step's current key (parameters, inputs' keys, version...)."""
        row = self.db.execute("SELECT info FROM steps WHERE name=?", (name,)).fetchone()
        return json.loads(row[0] or "{}") if row else None

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

    # per-tile keys (incremental runs) -------------------------------------------------------------
    def tile_keys(self, name: str) -> dict[tuple[int, int], str]:
        """Finished tiles of step ``name`` and the per-tile key each was computed under."""
        rows = self.db.execute("SELECT i, j, key FROM tiles WHERE name=? AND status='done'", (name,))
        return {(i, j): k for i, j, k in rows}

    def mark_tile(self, name: str, key: str, index: tuple[int, int], status: str, seconds: float = 0.0,
                  error: str | None = None) -> None:
        """Record tile ``index`` of ``name`` under its own key, replacing its record under any other key."""
        now = time.time()
        with self._transaction():
            self.db.execute("DELETE FROM tiles WHERE name=? AND i=? AND j=?", (name, index[0], index[1]))
            self.db.execute("INSERT INTO tiles VALUES (?,?,?,?,?,?,?,?)",
                            (name, key, index[0], index[1], status, error, seconds, now))
            self.db.execute("INSERT INTO history VALUES (?,?,?,?,?,?,?)",
                            (self.invocation, name, key, index[0], index[1], status, now))

    def regrid_step(self, name: str, old_grid: dict, new_grid: dict, di: int, dj: int) -> bool:
        """Shift the tile indices of ``name`` by (di, dj) and record ``new_grid``, once, in one transaction.

        Does nothing (returns False) when the step's recorded grid is not ``old_grid`` any more (the
        shift was already made by an earlier, interrupted invocation).
        """
        with self._transaction():
            row = self.db.execute("SELECT info FROM steps WHERE name=?", (name,)).fetchone()
            info = json.loads(row[0] or "{}") if row else {}
            if info.get("grid") != old_grid:
                return False
            self.db.execute("UPDATE tiles SET i=i+?, j=j+? WHERE name=?", (di, dj, name))
            info["grid"] = new_grid
            self.db.execute("UPDATE steps SET info=? WHERE name=?", (json.dumps(info, default=str), name))
        return True

    # campaign history ------------------------------------------------------------------------------
    def start_invocation(self, mode: str, info: dict | None = None) -> None:
        self.db.execute("INSERT OR IGNORE INTO invocations VALUES (?,?,?,?,?,?)",
                        (self.invocation, mode, time.time(), None, None, json.dumps(info or {}, default=str)))

    def finish_invocation(self, info: dict | None = None) -> None:
        """Stamp the invocation's end and its duration since it started (called after each ``execute``)."""
        row = self.db.execute("SELECT info, started FROM invocations WHERE invocation=?", (self.invocation,)).fetchone()
        if row is None:
            return
        merged = {**json.loads(row[0] or "{}"), **(info or {})}
        now = time.time()
        self.db.execute("UPDATE invocations SET finished=?, seconds=?, info=? WHERE invocation=?",
                        (now, now - row[1], json.dumps(merged, default=str), self.invocation))

    def invocations(self) -> list[dict]:
        rows = self.db.execute("SELECT invocation, mode, started, finished, seconds, info FROM invocations "
                               "ORDER BY started").fetchall()
        return [{"invocation": r[0], "mode": r[1], "started": r[2], "finished": r[3], "seconds": r[4],
                 "info": json.loads(r[5] or "{}")} for r in rows]

    def lines(self) -> dict[str, str]:
        """The campaign's current lines: name -> fingerprint (from the recorded events)."""
        out: dict[str, str] = {}
        for line, fp, event in self.db.execute("SELECT line, fingerprint, event FROM campaign ORDER BY time, rowid"):
            if event == "removed":
                out.pop(line, None)
            else:
                out[line] = fp
        return out

    def record_lines(self, lines: dict[str, str]) -> list[dict]:
        """Compare ``lines`` (name -> fingerprint) with the recorded campaign, record and return the changes."""
        before = self.lines()
        now = time.time()
        events = []
        for name, fp in lines.items():
            if name not in before:
                events.append({"line": name, "fingerprint": fp, "event": "added"})
            elif before[name] != fp:
                events.append({"line": name, "fingerprint": fp, "event": "reflown"})
        events += [{"line": n, "fingerprint": fp, "event": "removed"} for n, fp in before.items() if n not in lines]
        with self._transaction():
            for e in events:
                self.db.execute("INSERT INTO campaign VALUES (?,?,?,?,?)",
                                (self.invocation, e["line"], e["fingerprint"], e["event"], now))
        return events

    def campaign(self) -> list[dict]:
        rows = self.db.execute("SELECT invocation, line, fingerprint, event, time FROM campaign ORDER BY time, rowid")
        return [dict(zip(("invocation", "line", "fingerprint", "event", "time"), r)) for r in rows]

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


def _flat(value: object, prefix: str) -> dict[str, object]:
    """Nested mappings as ``{"a.b.c": leaf}`` (lists stay leaves)."""
    if isinstance(value, dict) and value:
        out: dict[str, object] = {}
        for k, v in value.items():
            out.update(_flat(v, f"{prefix}.{k}" if prefix else str(k)))
        return out
    return {prefix: value}


def _show(v: object) -> str:
    return "(absent)" if v is _ABSENT else json.dumps(v, default=str)


_ABSENT = object()


def describe_changes(name: str, old: dict | None, new: dict, limit: int = 8) -> list[str]:
    """What differs between two recorded infos of step ``name``, one short phrase per change.

    Parameters are named by their dotted key with the old and new value (``sam.threshold: 0.12 -> 0.1``);
    a changed input names the input and whether its producer's key or its source changed; a new
    software version or a new fitted model are said as such. At most ``limit`` parameter changes are
    listed, then how many more.

    Parameters
    ----------
    name : str
        The step's name, the prefix of every parameter key.
    old, new : dict
        The ``info`` recorded by the run for the previous and the current key (``params``, ``inputs``,
        ``in_keys``, ``version``, ``model``, ``tile``).
    limit : int
        Most parameter changes listed one by one.

    Returns
    -------
    list of str
        Empty when nothing recorded differs (the key changed for a reason the info does not hold,
        e.g. the kernel's code).
    """
    old = old or {}
    changes: list[str] = []
    po, pn = _flat(old.get("params", {}), name), _flat(new.get("params", {}), name)
    diff = [k for k in sorted(set(po) | set(pn)) if po.get(k, _ABSENT) != pn.get(k, _ABSENT)]
    for k in diff[:limit]:
        changes.append(f"{k}: {_show(po.get(k, _ABSENT))} -> {_show(pn.get(k, _ABSENT))}")
    if len(diff) > limit:
        changes.append(f"and {len(diff) - limit} more parameters")
    io, inn = old.get("inputs", {}) or {}, new.get("inputs", {}) or {}
    ko, kn = old.get("in_keys", {}) or {}, new.get("in_keys", {}) or {}
    for alias in sorted(set(io) | set(inn)):
        if io.get(alias) != inn.get(alias):
            changes.append(f"input {alias}: {io.get(alias, '(absent)')} -> {inn.get(alias, '(absent)')}")
        elif ko.get(alias) != kn.get(alias):
            changes.append(f"input {alias} ({inn.get(alias)}) was recomputed")
    for field, what in (("version", "software version"), ("tile", "tile size")):
        if old.get(field) != new.get(field):
            changes.append(f"{what}: {old.get(field)} -> {new.get(field)}")
    if not changes and old.get("model") != new.get("model"):
        changes.append("its fitted model changed")
    return changes
