"""One writer per run folder: an exclusive lock file with the holder's host, PID and start time.

Two commands writing the same run folder at once interleave their outputs (a cube whose group metadata
one of them replaced, a class map from half of each), so every command that writes a run folder
(``run``, ``sample``, ``assess``, ``compare``, ``report``) holds :func:`run_folder_lock` while it works.
The lock is a small JSON file, ``.wetlandflow.lock``, created with ``O_CREAT | O_EXCL`` (atomic on a local
file system, and on NFS v3 and later).  A lock whose holder ran on this host and whose PID is gone
(or was reused by a process started later) is stale: the holder was killed, and the lock is removed
with a note.  A lock held by another host cannot be checked from here and is never broken.

Within one process the lock is re-entrant for the thread holding it (``demo`` runs and then assesses;
a command may call another), and refused to every other thread (a notebook running a project in the
background while a cell asks for an assessment of the same folder).
"""

from __future__ import annotations

import contextlib
import datetime as dt
import errno
import json
import os
import socket
import threading
from collections.abc import Iterator
from dataclasses import asdict, dataclass
from pathlib import Path

from ..errors import RunFolderLocked

LOCK_NAME = ".wetlandflow.lock"

_held: dict[Path, tuple[int, int]] = {}  # folder -> (thread id, depth) for the locks this process holds
_held_guard = threading.Lock()


@dataclass(frozen=True)
class LockHolder:
    """Who holds a run folder: host, process id, the process's start mark, the command, when it started."""

    host: str
    pid: int
    command: str
    started: str
    process_start: str = ""

    @classmethod
    def this_process(cls, command: str) -> LockHolder:
        return cls(host=socket.gethostname(), pid=os.getpid(), command=command,
                   started=dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
                   process_start=_process_start(os.getpid()))

    def describe(self) -> str:
        return f"`wetlandflow {self.command}` (PID {self.pid} on host {self.host}, started {self.started})"


def _process_start(pid: int) -> str:
    """The kernel's start time of ``pid`` (clock ticks since boot, from /proc), or '' where unknown.

    Compared with the lock's record it tells a reused PID from the holder itself."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return ""
    return stat.rsplit(")", 1)[-1].split()[19]  # field 22 of proc(5); the name in brackets may hold spaces


def _alive(holder: LockHolder) -> bool:
    """True unless the holder's process is surely gone (same host only; another host cannot be checked)."""
    if holder.host != socket.gethostname():
        return True
    try:
        os.kill(holder.pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by another user
        pass
    now = _process_start(holder.pid)
    return not (holder.process_start and now and now != holder.process_start)


def read_lock(run_dir: str | Path) -> LockHolder | None:
    """The holder recorded in a run folder's lock file (None when there is none or it is unreadable)."""
    try:
        data = json.loads((Path(run_dir) / LOCK_NAME).read_text())
        return LockHolder(**{k: data[k] for k in ("host", "pid", "command", "started")},
                          process_start=str(data.get("process_start", "")))
    except (OSError, ValueError, KeyError, TypeError):
        return None


def _try_create(path: Path, holder: LockHolder) -> bool:
    try:
        fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
    except FileExistsError:
        return False
    with os.fdopen(fd, "w") as fh:
        json.dump(asdict(holder), fh)
        fh.flush()
        os.fsync(fh.fileno())
    return True


@contextlib.contextmanager
def _breaking_guard(folder: Path) -> Iterator[None]:
    """Serialise the removal of stale locks: two processes that both found the same stale lock must not
    remove it one after the other (the second would remove the first's fresh lock)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX: no guard, the O_EXCL create still decides
        yield
        return
    with open(folder / f"{LOCK_NAME}.guard", "a") as fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh.fileno(), fcntl.LOCK_UN)


def _refusal(folder: Path, holder: LockHolder | None, command: str) -> RunFolderLocked:
    who = (holder.describe() if holder is not None
           else "another wetlandflow command (its lock file is unreadable)")
    other_host = holder is not None and holder.host != socket.gethostname()
    tail = (f"; it runs on another host, so this one cannot tell whether it is still alive: if you are sure "
            f"it is not, delete {folder / LOCK_NAME}" if other_host else
            f"; if that process is gone and the lock remains, delete {folder / LOCK_NAME}")
    return RunFolderLocked(
        f"cannot start `wetlandflow {command}`: the run folder {folder} is in use by {who}. One command at a "
        f"time writes a run folder. Wait until it finishes (or stop it), or give this project another "
        f"[project] output_dir{tail}", path=str(folder), holder=holder)


@contextlib.contextmanager
def run_folder_lock(run_dir: str | Path, command: str) -> Iterator[dict[str, str]]:
    """Hold the run folder's lock for the duration of the block; refuse if another command holds it.

    Yields a record for the manifest: ``{"lock": the lock file's name, "stale_lock_removed": what}`` (the
    second only when a stale lock of a killed process was removed; empty where nothing is locked: a
    folder that does not exist yet, or a read-only one).

    Raises
    ------
    RunFolderLocked
        The folder is held by a live process (on this host) or by a process on another host; the message
        names the folder, the holder (host, PID, command, start time) and what to do.
    """
    folder = Path(run_dir).resolve()
    if not folder.is_dir():  # nothing to protect yet: the command reports the missing folder itself
        yield {}
        return
    me = threading.get_ident()
    with _held_guard:
        owner = _held.get(folder)
        if owner is not None and owner[0] == me:
            _held[folder] = (me, owner[1] + 1)
            reentered = True
        elif owner is not None:
            raise _refusal(folder, read_lock(folder), command)
        else:
            reentered = False
    if reentered:
        try:
            yield {"lock": LOCK_NAME}
        finally:
            with _held_guard:
                thread, depth = _held[folder]
                _held[folder] = (thread, depth - 1)
        return

    try:
        record = _acquire(folder, command)
    except OSError as exc:
        if isinstance(exc, RunFolderLocked) or exc.errno not in (errno.EACCES, errno.EPERM, errno.EROFS):
            raise
        record = None
    if record is None:  # a read-only run folder: nobody can write it, so there is nothing to lock
        yield {}
        return
    with _held_guard:
        _held[folder] = (me, 1)
    try:
        yield record
    finally:
        with _held_guard:
            _held.pop(folder, None)
        (folder / LOCK_NAME).unlink(missing_ok=True)


def _acquire(folder: Path, command: str) -> dict[str, str]:
    path = folder / LOCK_NAME
    holder = LockHolder.this_process(command)
    record = {"lock": LOCK_NAME}
    if _try_create(path, holder):
        return record
    with _breaking_guard(folder):
        current = read_lock(folder)
        if current is not None and not _alive(current):
            path.unlink(missing_ok=True)
            record["stale_lock_removed"] = (f"a lock left by {current.describe()}, a process that is gone, "
                                            "was removed")
        elif current is None and path.exists():
            raise _refusal(folder, None, command)
        if _try_create(path, holder):
            return record
    raise _refusal(folder, read_lock(folder), command)
