"""One driver per store: a lock file beside the store with its holder and a heartbeat.

A driver that opens a store to compute samples takes ``<store>.lock`` (``samples.zarr.lock``)
and holds it until its session ends. The file is JSON::

    {"host": "node12", "pid": 4711, "user": "ana", "started": "<UTC>", "heartbeat": "<UTC>",
     "heartbeat_unix": 1796300000.0, "store": "/abs/path/samples.zarr"}

written through a temporary file and a rename; a background thread renews the heartbeat every
:data:`HEARTBEAT_S` seconds. A second driver is refused with who holds the lock and since
when. A lock is *stale*, and is taken over with a message, when its holder cannot be running:
on this host its process no longer exists; from another host its heartbeat is older than
:data:`STALE_S` seconds (a host that cannot be asked). The holder's own process may take its
lock again (a notebook that re-runs after an error). Reading (``status``, ``report`` without
``--run``) never takes or waits for the lock.
"""

from __future__ import annotations

import getpass
import json
import os
import socket
import sys
import threading
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

from pipeline.errors import StoreError

__all__ = ['HEARTBEAT_S', 'STALE_S', 'StoreLock', 'lock_path', 'read_lock', 'describe_lock',
           'check_unlocked']

#: seconds between heartbeats of a held lock
HEARTBEAT_S = 30.0
#: a lock of another host whose heartbeat is older than this many seconds is stale
STALE_S = 300.0


def lock_path(store_path: str | Path) -> Path:
    """The lock file of a store (beside it, so that the store itself holds only data)."""
    p = Path(store_path)
    return p.with_name(p.name + ".lock")


def read_lock(store_path: str | Path) -> dict | None:
    """The lock's content, or None when the store is not locked (or the file is unreadable
    half-way through a rename, which counts as not locked only for display)."""
    try:
        return json.loads(lock_path(store_path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def _utc(unix: float) -> str:
    return datetime.fromtimestamp(unix, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def describe_lock(info: dict, now: float | None = None) -> str:
    """``host``, ``pid``, user, start and heartbeat age of a lock, as one phrase."""
    now = time.time() if now is None else now
    age = now - float(info.get("heartbeat_unix", 0.0))
    return (f"process {info.get('pid')} of {info.get('user', '?')} on host {info.get('host')!r} "
            f"since {info.get('started')} (last heartbeat {age:,.0f} s ago)")


def _process_exists(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


def _stale_reason(info: dict, now: float) -> str | None:
    """Why a lock cannot be held any more, or None when its holder may be running."""
    host, pid = info.get("host"), int(info.get("pid", -1))
    if host == socket.gethostname():
        if pid == os.getpid():
            return "held by this process"
        if not _process_exists(pid):
            return f"its process {pid} no longer exists on this host"
        return None
    age = now - float(info.get("heartbeat_unix", 0.0))
    if age > STALE_S:
        return (f"its heartbeat from host {host!r} is {age:,.0f} s old (more than "
                f"{STALE_S:,.0f} s)")
    return None


def _in_use(store_path: Path, held: dict) -> StoreError:
    return StoreError(
        f"the store {str(store_path)!r} is in use by another helisweep run: "
        f"{describe_lock(held)}. Two drivers would compute the same samples twice. Wait for "
        f"it to finish (`helisweep status` shows its progress), or stop it; a lock whose "
        f"holder is gone is taken over automatically (at once on the same host, after "
        f"{STALE_S:,.0f} s without heartbeat from another host). The lock file is "
        f"{str(lock_path(store_path))!r}")


def check_unlocked(store_path: str | Path) -> None:
    """Refuse early (before a cluster starts) when another live driver holds the store's lock;
    a stale lock passes (it is taken over when the run opens the store)."""
    store_path = Path(store_path).resolve()
    held = read_lock(store_path)
    if held is not None and _stale_reason(held, time.time()) is None:
        raise _in_use(store_path, held)


@dataclass
class StoreLock:
    """A held lock on a store (from :meth:`acquire`); :meth:`release` ends it."""

    store_path: Path
    info: dict
    _stop: threading.Event = field(default_factory=threading.Event, repr=False)
    _thread: threading.Thread | None = field(default=None, repr=False)

    @classmethod
    def acquire(cls, store_path: str | Path, *, heartbeat_s: float = HEARTBEAT_S,
                say=None) -> "StoreLock":
        """Take the store's lock, or refuse with who holds it.

        Parameters
        ----------
        store_path : str or Path
            The store (need not exist yet).
        heartbeat_s : float
            Seconds between heartbeats.
        say : callable, optional
            Where the takeover message goes (default: standard error).

        Raises
        ------
        StoreError
            When another driver that may still be running holds the lock.
        """
        store_path = Path(store_path).resolve()
        path = lock_path(store_path)
        path.parent.mkdir(parents=True, exist_ok=True)
        now = time.time()
        info = {"host": socket.gethostname(), "pid": os.getpid(), "user": _user(),
                "started": _utc(now), "heartbeat": _utc(now), "heartbeat_unix": now,
                "store": str(store_path)}
        for _ in range(3):
            try:
                fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
            except FileExistsError:
                held = read_lock(store_path)
                if held is None:  # vanished or half-written: look again
                    time.sleep(0.05)
                    continue
                why = _stale_reason(held, time.time())
                if why is None:
                    raise _in_use(store_path, held) from None
                if why != "held by this process":
                    (say or _stderr)(f"helisweep: taking over the stale lock of "
                                     f"{str(store_path)!r} ({describe_lock(held)}): {why}")
                path.unlink(missing_ok=True)
                continue
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                json.dump(info, fh)
            lock = cls(store_path, info)
            lock._start(heartbeat_s)
            return lock
        raise StoreError(f"could not take the lock {str(path)!r} (it keeps changing); another "
                         f"run is starting on the same store at the same time: try again")

    def _start(self, heartbeat_s: float) -> None:
        def beat():
            while not self._stop.wait(heartbeat_s):
                try:
                    self.heartbeat()
                except OSError:  # the store's directory is gone (moved or deleted): stop
                    return

        self._thread = threading.Thread(target=beat, name="helisweep-lock-heartbeat",
                                        daemon=True)
        self._thread.start()

    def heartbeat(self) -> None:
        """Renew the heartbeat (written through a temporary file and a rename); a lock taken
        over by someone else in the meantime is left alone."""
        held = read_lock(self.store_path)
        if held is not None and (held.get("pid"), held.get("host")) != (
                self.info["pid"], self.info["host"]):
            return
        now = time.time()
        self.info.update(heartbeat=_utc(now), heartbeat_unix=now)
        path = lock_path(self.store_path)
        tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(self.info, fh)
        os.replace(tmp, path)

    def release(self) -> None:
        """Stop the heartbeat and remove the lock file (only if it is still ours)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
        held = read_lock(self.store_path)
        if held is not None and (held.get("pid"), held.get("host")) == (
                self.info["pid"], self.info["host"]):
            lock_path(self.store_path).unlink(missing_ok=True)


def _user() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "?"


def _stderr(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)
