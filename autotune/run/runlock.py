"""One owner per run folder: an operating-system lock held for a command's whole life.

A command that writes a run folder (``calibrate``, ``retune``, ``track``, ``dry-run`` and each
``--resume``) takes the folder's lock before anything is sent to the rig and keeps it until it
exits::

    RUN_DIR/
      .autotune.lock     the locked file (empty); the lock is the kernel's (flock), not the file
      .autotune.holder   who holds it: pid, host, user, command line, since (UTC), JSON

A second command on a folder in use is refused at once (:class:`RunFolderInUse`, exit 2 in
the CLI), naming the holder from the holder file. The kernel releases the lock when its process
ends, however it ends (a kill, a crash, a power cut): a lock left by a process that died is
taken over without a question, and its stale holder file is overwritten. Readers (``report``)
never take the lock; :func:`holder_if_running` tells them whether a run is still going.

Only :func:`_try_lock` knows how the lock is taken (``fcntl.flock``, POSIX).
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
import socket
import sys
import time
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

from autotune.errors import JournalError, RunFolderInUse

__all__ = ["LOCK_NAME", "HOLDER_NAME", "RunLock", "hold_run_folder", "holder_if_running",
           "holder_text"]

LOCK_NAME = ".autotune.lock"
HOLDER_NAME = ".autotune.holder"

#: A free lock is retried this long before the folder is called in use, s: a ``report`` that
#: peeks at the lock (a shared lock for microseconds) never makes a starting command fail.
_GRACE_S = 0.5


def _try_lock(fd: int, *, shared: bool = False) -> bool:
    """Take the lock of an open file without waiting; False when another process holds it."""
    try:
        fcntl.flock(fd, (fcntl.LOCK_SH if shared else fcntl.LOCK_EX) | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    return True


def _holder_now(command: str) -> dict[str, Any]:
    from autotune.run.journal import utc_now

    try:
        user = os.getlogin()
    except OSError:
        user = os.environ.get("USER") or os.environ.get("LOGNAME") or str(os.getuid())
    argv = ["autotune", *sys.argv[1:]] if sys.argv else [command]
    return {"pid": os.getpid(), "host": socket.gethostname(), "user": user,
            "command": " ".join(argv), "since": utc_now()}


def _read_holder(run_dir: Path) -> dict[str, Any] | None:
    try:
        holder = json.loads((Path(run_dir) / HOLDER_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return holder if isinstance(holder, dict) else None


def holder_text(holder: Mapping[str, Any] | None) -> str:
    """The holder of a run folder in words: process id, host, user, command and since when."""
    if not holder:
        return "another process (its holder file is missing or unreadable)"
    return (f"process {holder.get('pid')} of {holder.get('user')} on {holder.get('host')}, "
            f"'{holder.get('command')}', since {holder.get('since')}")


class RunLock:
    """The held lock of one run folder (from :meth:`acquire`); :meth:`release` it at the end.

    Attributes
    ----------
    run_dir : Path
        The folder.
    holder : dict
        What this process wrote into the holder file.
    """

    def __init__(self, run_dir: Path, fd: int, holder: dict[str, Any], created: bool) -> None:
        self.run_dir = run_dir
        self.holder = holder
        self._fd: int | None = fd
        self._created = created

    @classmethod
    def acquire(cls, run_dir: Path, command: str) -> RunLock:
        """Take the lock of ``run_dir`` (created if missing) for this process.

        Raises
        ------
        RunFolderInUse
            Another live process holds it; the message names that process.
        JournalError
            The folder or its lock file cannot be created.
        """
        run_dir = Path(run_dir)
        path = run_dir / LOCK_NAME
        created = False
        deadline = time.monotonic() + _GRACE_S
        while True:
            try:
                # Inside the loop: a refused run may have removed the folder it had created.
                created = created or not run_dir.exists()
                run_dir.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise JournalError(f"cannot create run folder {run_dir}: {exc}") from exc
            try:
                fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
            except OSError as exc:
                raise JournalError(f"cannot open the lock file {path}: {exc}") from exc
            if _try_lock(fd):
                # The file may have been removed (a refused run cleaning its new folder) between
                # our open and our lock: a lock on a removed file guards nothing, so start over.
                try:
                    same = os.stat(path).st_ino == os.fstat(fd).st_ino
                except FileNotFoundError:
                    same = False
                if same:
                    break
            os.close(fd)
            if time.monotonic() > deadline:
                holder = _read_holder(run_dir)
                raise RunFolderInUse(
                    f"{run_dir} is in use by {holder_text(holder)}: one command at a time writes "
                    f"a run folder; nothing was sent to the rig. Wait for it to end (or stop it), "
                    f"or use another folder; 'autotune report {run_dir}' reads it meanwhile",
                    holder)
            time.sleep(0.05)
        holder = _holder_now(command)
        try:
            from autotune.run.journal import write_json_atomic

            write_json_atomic(run_dir / HOLDER_NAME, holder)
        except JournalError:
            os.close(fd)
            raise
        return cls(run_dir, fd, holder, created)

    def release(self) -> None:
        """Remove the holder file and let the lock go (a folder this lock created and nothing
        else wrote into is removed too: a refused run leaves nothing behind). Safe twice."""
        if self._fd is None:
            return
        with contextlib.suppress(OSError):
            (self.run_dir / HOLDER_NAME).unlink()
        if self._created:
            with contextlib.suppress(OSError):
                if {p.name for p in self.run_dir.iterdir()} <= {LOCK_NAME}:
                    # Removed while still held: a process that opened it meanwhile sees another
                    # file than the path's and starts over (see acquire).
                    (self.run_dir / LOCK_NAME).unlink()
                    self.run_dir.rmdir()
        os.close(self._fd)
        self._fd = None

    def __enter__(self) -> RunLock:
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


@contextlib.contextmanager
def hold_run_folder(run_dir: Path, command: str) -> Iterator[RunLock]:
    """Hold the lock of ``run_dir`` for the body of a ``with`` (see :meth:`RunLock.acquire`)."""
    lock = RunLock.acquire(run_dir, command)
    try:
        yield lock
    finally:
        lock.release()


def holder_if_running(run_dir: Path) -> dict[str, Any] | None:
    """The holder of ``run_dir`` while a live process holds its lock, else None; reads only.

    The lock is looked at with a shared lock taken and dropped at once (a writer starting in
    that instant retries, see :data:`_GRACE_S`); a reader may not be able to open the lock file
    (a folder of another user): the holder file alone then decides.
    """
    path = Path(run_dir) / LOCK_NAME
    try:
        fd = os.open(path, os.O_RDONLY | os.O_CLOEXEC)
    except FileNotFoundError:
        return None
    except OSError:
        return _read_holder(Path(run_dir))
    try:
        if _try_lock(fd, shared=True):
            return None
        return _read_holder(Path(run_dir)) or {}
    finally:
        os.close(fd)
