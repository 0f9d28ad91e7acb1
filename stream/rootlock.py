"""One writer per snapshot root: an exclusive advisory lock on ``ROOT/writer.lock``.

Every command that writes snapshots (``run``, ``replay``, ``demo``) holds
``fcntl.flock(LOCK_EX)`` on the lock file for as long as it may write. The
kernel drops the lock when the process ends, however it ends (``kill -9``
included), so a stale lock never blocks a restart. The file itself stays and
holds the last holder's pid, command and group as JSON, to name the holder in
the refusal of a second writer. Advisory locks bind only the processes that
ask for them, and on network file systems only where the server supports
``flock``: put the root on a local or block-storage file system.

A Kafka ``run`` takes the lock when it becomes the owner of its group's graph
and gives it back when it hands ownership over, so a standby of the same
group may wait beside the owner (see :meth:`RootLock.wait`).
"""

from __future__ import annotations

import fcntl
import json
import os
import time
from pathlib import Path

from ranktide.stream.snapshots import OutputError, SnapshotError

LOCK_NAME = "writer.lock"


class RootLocked(SnapshotError):
    """Another process holds the root's writer lock; ``holder`` is its record (may be empty)."""

    def __init__(self, root: Path, holder: dict) -> None:
        self.holder = holder
        pid = holder.get("pid", "unknown")
        what = holder.get("command", "another ranktide command")
        super().__init__(f"{root} is being written by pid {pid} ({what}); one writer per snapshot root: "
                         f"stop that process or write elsewhere")


def _read_holder(fh) -> dict:
    try:
        fh.seek(0)
        data = json.loads(fh.read() or "{}")
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


class RootLock:
    """The writer lock of one snapshot root, held by this process until :meth:`release`."""

    def __init__(self, root: Path, fh) -> None:
        self.root = root
        self._fh = fh

    @staticmethod
    def _open(root: Path):
        root = Path(root)
        try:
            root.mkdir(parents=True, exist_ok=True)
            return open(root / LOCK_NAME, "a+", encoding="utf-8")
        except OSError as exc:
            raise OutputError(f"cannot write the snapshot root {root}: {exc.strerror or exc}") from exc

    @classmethod
    def _try(cls, root: Path):
        """The open lock file, locked by this process; RootLocked when another holds it."""
        fh = cls._open(root)
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read_holder(fh)
            fh.close()
            raise RootLocked(Path(root), holder) from None
        except OSError as exc:
            fh.close()
            raise SnapshotError(f"cannot lock {Path(root) / LOCK_NAME}: {exc.strerror or exc}") from exc
        return fh

    @classmethod
    def acquire(cls, root: Path, command: str, **about: str) -> "RootLock":
        """Take the lock now or raise :class:`RootLocked` naming the holder.

        Parameters
        ----------
        root : Path
            Snapshot root (created when missing).
        command : str
            What this process is, for the refusal another writer sees
            (e.g. ``"ranktide run"``).
        about : str
            More of the record, e.g. ``group`` for a Kafka run.

        Raises
        ------
        RootLocked
            Another process holds the lock.
        OutputError
            The root or the lock file cannot be created (exit code 3).
        """
        fh = cls._try(root)
        fh.seek(0)
        fh.truncate()
        fh.write(json.dumps({"pid": os.getpid(), "command": command, **about}) + "\n")
        fh.flush()
        return cls(Path(root), fh)

    @classmethod
    def wait(cls, root: Path, command: str, timeout: float, stop=None, **about: str) -> "RootLock":
        """Take the lock, waiting up to ``timeout`` seconds for the holder to let it go.

        ``stop`` (a ``threading.Event``) ends the wait early. Raises
        :class:`RootLocked` when the lock is still held at the end.
        """
        deadline = time.monotonic() + timeout
        while True:
            try:
                return cls.acquire(root, command, **about)
            except RootLocked:
                if time.monotonic() >= deadline or (stop is not None and stop.is_set()):
                    raise
            time.sleep(0.1)

    @classmethod
    def holder(cls, root: Path) -> dict | None:
        """The record of the process holding the lock of ``root``, or None when it is free."""
        if not (Path(root) / LOCK_NAME).exists():
            return None
        try:
            fh = cls._try(root)
        except RootLocked as exc:
            return exc.holder
        fh.close()  # closing drops the lock; the last holder's record stays as it was
        return None

    def release(self) -> None:
        """Give the lock back (the file stays)."""
        if self._fh is not None:
            fcntl.flock(self._fh.fileno(), fcntl.LOCK_UN)
            self._fh.close()
            self._fh = None
