"""One process per run directory: an exclusively created lock file with holder, host and heartbeat.

flock-style locks are unreliable on network file systems (PITFALLS.md), so the lock is a file created
with O_EXCL that names its holder. A lock whose heartbeat is older than ``stale_after`` seconds, or
whose holder is a dead process on this host, is stale and is taken over.
"""
from __future__ import annotations

import json
import os
import socket
import threading
import time
from pathlib import Path
from ..errors import EXIT_LOCKED, SwathmillError

__all__ = ["RunLock", "RunLockedError"]


class RunLockedError(SwathmillError, RuntimeError):
    """Another process holds the run directory."""

    exit_code = EXIT_LOCKED


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class RunLock:
    def __init__(self, path: Path, heartbeat: float = 10.0, stale_after: float = 120.0):
        self.path = Path(path)
        self.heartbeat = heartbeat
        self.stale_after = stale_after
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._token = f"{socket.gethostname()}:{os.getpid()}:{time.time_ns()}"

    def _holder(self) -> dict | None:
        try:
            return json.loads(self.path.read_text())
        except (FileNotFoundError, json.JSONDecodeError):
            return None

    def _is_stale(self, holder: dict | None) -> bool:
        if holder is None:
            # created but not yet written, or corrupt: stale only when old
            try:
                return time.time() - self.path.stat().st_mtime > self.stale_after
            except FileNotFoundError:
                return True
        if holder.get("host") == socket.gethostname() and not _pid_alive(int(holder.get("pid", -1))):
            return True
        try:
            age = time.time() - self.path.stat().st_mtime
        except FileNotFoundError:
            return True
        return age > self.stale_after

    def acquire(self) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        for _ in range(3):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                holder = self._holder()
                if self._is_stale(holder):
                    self.path.unlink(missing_ok=True)
                    continue
                h = holder or {}
                raise RunLockedError(
                    f"run directory {self.path.parent} is in use by process {h.get('pid', '?')} on host "
                    f"{h.get('host', '?')} (since {h.get('started', '?')}); wait for it to finish, or, if that "
                    f"process is gone, delete {self.path}") from None
            with os.fdopen(fd, "w") as f:
                json.dump({"host": socket.gethostname(), "pid": os.getpid(), "token": self._token,
                           "started": time.strftime("%Y-%m-%dT%H:%M:%S%z")}, f)
            self._thread = threading.Thread(target=self._beat, name="swathmill-lock-heartbeat", daemon=True)
            self._thread.start()
            return
        raise RunLockedError(f"could not take the lock {self.path}")

    def _beat(self) -> None:
        while not self._stop.wait(self.heartbeat):
            try:
                os.utime(self.path)
            except FileNotFoundError:
                return

    def release(self) -> None:
        self._stop.set()
        holder = self._holder()
        if holder and holder.get("token") == self._token:
            self.path.unlink(missing_ok=True)

    def __enter__(self) -> "RunLock":
        self.acquire()
        return self

    def __exit__(self, *exc) -> None:
        self.release()
