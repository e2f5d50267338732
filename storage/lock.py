"""One writer at a time per store: a lock file naming its holder.

``lock.json`` is created with O_EXCL (atomic on local and cluster file
systems that honour it) and holds the holder's host, pid, start time and a
heartbeat refreshed by a background thread. A second writer gets a
:class:`LockHeldError` naming the holder; a lock whose heartbeat is older
than the timeout, or whose holder process is gone on this host, is called
stale and can be cleared with ``descatter lock STORE --clear``.

The lock is reentrant within one process: a stage that takes it while an
enclosing operation of the same process holds it (``swath replace``, a whole
run) shares that hold, so no other writer can slip in between the stages.
"""

from __future__ import annotations

import json
import logging
import os
import socket
import threading
import time
from pathlib import Path
from typing import Any

from descatter.tasks.errors import LockHeldError

log = logging.getLogger(__name__)

LOCK_NAME = "lock.json"
HEARTBEAT_S = 10.0
STALE_AFTER_S = 120.0

# lock file -> depth of the holds this process has on it
_HELD: dict[Path, int] = {}
_HELD_GUARD = threading.Lock()


def _now() -> float:
    return time.time()


def _stamp(t: float) -> str:
    return time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(t))


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def read_lock(store_path: str | Path) -> dict[str, Any] | None:
    """The current holder's record, or None when the store is unlocked."""
    try:
        return json.loads((Path(store_path) / LOCK_NAME).read_bytes())
    except FileNotFoundError:
        return None
    except ValueError:
        return {"host": "?", "pid": -1, "started": 0, "heartbeat": 0, "torn": True}


def _dead_on_this_host(holder: dict[str, Any]) -> bool:
    return (
        not holder.get("torn")
        and holder.get("host") == socket.gethostname()
        and not _pid_alive(int(holder.get("pid", -1)))
    )


def lock_is_stale(holder: dict[str, Any], *, stale_after_s: float = STALE_AFTER_S) -> str | None:
    """Why the holder looks gone (a sentence), or None if it looks alive."""
    if holder.get("torn"):
        return "the lock file is unreadable"
    if holder.get("host") == socket.gethostname() and not _pid_alive(int(holder.get("pid", -1))):
        return f"process {holder.get('pid')} no longer runs on {holder.get('host')}"
    age = _now() - float(holder.get("heartbeat", 0))
    if age > stale_after_s:
        return f"its last heartbeat is {age:.0f} s old (stale after {stale_after_s:.0f} s)"
    return None


def describe_holder(holder: dict[str, Any]) -> str:
    return (
        f"host {holder.get('host')}, pid {holder.get('pid')}, "
        f"started {_stamp(float(holder.get('started', 0)))}, "
        f"last heartbeat {_stamp(float(holder.get('heartbeat', 0)))}"
        + (f", running {holder['command']!r}" if holder.get("command") else "")
    )


def clear_lock(store_path: str | Path, *, force: bool = False) -> dict[str, Any] | None:
    """Remove a stale lock. Refused while the holder looks alive unless ``force``."""
    holder = read_lock(store_path)
    if holder is None:
        return None
    why = lock_is_stale(holder)
    if why is None and not force:
        raise LockHeldError(
            f"{store_path}: the lock is held by a live writer ({describe_holder(holder)}); "
            "not clearing it"
        )
    (Path(store_path) / LOCK_NAME).unlink(missing_ok=True)
    log.warning("cleared lock of %s (%s)", store_path, why or "forced")
    return holder


class StoreLock:
    """Context manager holding the store's writer lock, with a heartbeat."""

    def __init__(self, store_path: str | Path, *, command: str = "", heartbeat_s: float = HEARTBEAT_S):
        self.path = Path(store_path) / LOCK_NAME
        self.command = command
        self.heartbeat_s = heartbeat_s
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._record: dict[str, Any] = {}
        self._nested = False

    def acquire(self) -> "StoreLock":
        key = self.path.resolve()
        with _HELD_GUARD:
            if _HELD.get(key, 0) > 0:
                _HELD[key] += 1
                self._nested = True
                return self
        self._acquire_file()
        with _HELD_GUARD:
            _HELD[key] = 1
        return self

    def _acquire_file(self) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        t = _now()
        self._record = {
            "host": socket.gethostname(), "pid": os.getpid(), "started": t,
            "heartbeat": t, "command": self.command,
        }
        try:
            fd = self._create()
        except FileExistsError:
            holder = read_lock(self.path.parent) or {}
            if _dead_on_this_host(holder):
                # The holder was killed: its process is provably gone, so the
                # lock protects nothing. Take it over, and say so.
                log.warning("taking over the lock of %s from dead %s", self.path.parent, describe_holder(holder))
                self.path.unlink(missing_ok=True)
                return self._acquire_file()
            why = lock_is_stale(holder)
            hint = (
                f" It looks stale ({why}): check, then run 'descatter lock {self.path.parent} --clear'."
                if why else " Wait for it to finish, or stop it first."
            )
            raise LockHeldError(
                f"{self.path.parent}: another descatter run holds the writer lock "
                f"({describe_holder(holder)}).{hint}"
            ) from None
        with os.fdopen(fd, "w") as fh:
            json.dump(self._record, fh)
        self._thread = threading.Thread(target=self._beat, name="descatter-lock-heartbeat", daemon=True)
        self._thread.start()

    def _create(self) -> int:
        return os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)

    def _beat(self) -> None:
        while not self._stop.wait(self.heartbeat_s):
            self._record["heartbeat"] = _now()
            tmp = self.path.with_name(f"{self.path.name}.{os.getpid()}.beat")
            try:
                tmp.write_text(json.dumps(self._record))
                os.replace(tmp, self.path)
            except OSError as exc:  # the store went away: stop beating, say so
                log.warning("lock heartbeat failed on %s: %s", self.path, exc)
                return

    def release(self) -> None:
        key = self.path.resolve()
        with _HELD_GUARD:
            depth = _HELD.get(key, 0) - 1
            if depth > 0:
                _HELD[key] = depth
                return
            _HELD.pop(key, None)
        if self._nested:  # the outer hold went first: nothing of ours to remove
            return
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
        holder = read_lock(self.path.parent)
        if holder and holder.get("pid") == os.getpid() and holder.get("host") == socket.gethostname():
            self.path.unlink(missing_ok=True)

    def __enter__(self) -> "StoreLock":
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()
