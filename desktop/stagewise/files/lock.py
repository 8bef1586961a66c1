"""Edit locks: ``NAME.stagewise.json.lock`` beside a project while it is open for editing.

The lock file is a small JSON object ``{"program", "owner", "host", "pid", "time"}`` (``time`` in
UTC, ISO 8601). It is created atomically and complete: the content is written to a temporary
file first and then hard-linked to the lock name, which fails when a lock exists, so no other
process ever reads a half-written lock. Where hard links are not available, exclusive creation
(``O_CREAT | O_EXCL``) is the fallback. The lock file gets the project file's permission bits
(without execute), so every user who can read the project can read who holds it. A project
reached through a symbolic link is locked beside the real file (:func:`lock_path` resolves it),
so two people opening it by different names see one lock.

A lock is **stale**, and may be taken over, when

- it was written on this host and its process no longer runs, or
- it is older than a limit (:data:`DEFAULT_MAX_AGE_S`; a holder that stays open longer calls
  :meth:`ProjectLock.refresh` now and then). The age runs from the time written in the lock;
  a time more than :data:`MAX_CLOCK_AHEAD_S` ahead of this host's clock is not believed (no
  two hosts' clocks differ that much) and the age runs from the lock file's modification time
  instead; when that too lies ahead, the lock is stale, since nothing can tell when it was
  taken, or
- its content is not a lock (garbled) and its file is older than a grace period (a lock being
  written by another program right now is left alone), or
- it is a symbolic link to nothing.

A lock that exists but cannot be read (no permission, an I/O error) is **held**: nothing says
its holder is gone. It turns stale only by the age of its file. A lock that is a folder, or a
symbolic link to something, is never removed: :func:`inspect_lock` refuses it with one sentence
saying what to do.

A lock is advisory: it tells a second user that someone is editing, it does not stop a program
that ignores it. Every command that writes a project takes the lock, and takes over a stale
one, saying so (:attr:`ProjectLock.took_over`); the GUI asks for it when it opens a file for
editing and offers read-only when it is held.

Public API: :func:`lock_path`, :func:`inspect_lock`, :func:`acquire_lock`, :func:`release_lock`
and the :class:`ProjectLock` handle (a context manager).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import getpass
import json
import os
import socket
import stat
import time as _time
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import Any, Final

from stagewise.files.atomic import remove_leftover_temporaries, write_temporary

__all__ = [
    "DEFAULT_MAX_AGE_S",
    "LOCK_SUFFIX",
    "MAX_CLOCK_AHEAD_S",
    "LockError",
    "LockInfo",
    "LockState",
    "ProjectLock",
    "acquire_lock",
    "inspect_lock",
    "lock_path",
    "release_lock",
]

LOCK_SUFFIX: Final = ".lock"
PROGRAM: Final = "stagewise"
DEFAULT_MAX_AGE_S: Final = 24 * 3600.0
# A lock file that cannot be parsed is left alone this long: it may be being written right now.
UNREADABLE_GRACE_S: Final = 10.0
MAX_LOCK_BYTES: Final = 64 * 1024
# A lock time this far ahead of this host's clock is not believed (see the module docstring).
MAX_CLOCK_AHEAD_S: Final = 3600.0


class LockError(ValueError):
    """The project is locked by someone else (or the lock cannot be written); one sentence."""

    def __init__(self, message: str, state: LockState | None = None) -> None:
        super().__init__(message)
        self.state = state


@dataclass(frozen=True, slots=True)
class LockInfo:
    """Who holds a lock: user name, host name, process id and when it was taken (UTC, ISO 8601)."""

    owner: str
    host: str
    pid: int
    time: str

    def to_json(self) -> str:
        document = {"program": PROGRAM, "owner": self.owner, "host": self.host, "pid": self.pid, "time": self.time}
        return json.dumps(document, indent=2, ensure_ascii=False) + "\n"

    def describe(self) -> str:
        """``alice on host lab-3 (process 1234) since 2026-12-01T22:10:00Z``."""
        return f"{self.owner} on host {self.host} (process {self.pid}) since {self.time}"


@dataclass(frozen=True, slots=True)
class LockState:
    """What :func:`inspect_lock` found.

    ``info`` is ``None`` when the lock file exists but cannot be read as a lock. ``stale`` says
    whether it may be taken over and ``reason`` why, in words for the user.
    """

    path: Path
    info: LockInfo | None
    stale: bool
    reason: str
    age_s: float
    mine: bool

    def describe(self) -> str:
        holder = self.info.describe() if self.info is not None else "an unreadable lock file"
        return f"{holder}; {self.reason}"


def lock_path(project_path: str | os.PathLike[str]) -> Path:
    """``NAME.stagewise.json.lock`` for ``NAME.stagewise.json``, beside the real file when
    ``project_path`` is a symbolic link."""
    path = real_path(project_path)
    return path.with_name(path.name + LOCK_SUFFIX)


def real_path(project_path: str | os.PathLike[str]) -> Path:
    """``project_path`` with symbolic links resolved (a missing file is fine): where the
    project, its ``.bak`` and its lock really are."""
    return Path(os.path.realpath(project_path))


def _mode_like(project: Path) -> int:
    """Permission bits for a lock: the project file's without execute, else the umask's default."""
    try:
        return stat.S_IMODE(project.stat().st_mode) & 0o666
    except OSError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask


def _now_utc() -> _dt.datetime:
    return _dt.datetime.now(_dt.UTC)


def _format_time(moment: _dt.datetime) -> str:
    return moment.astimezone(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _parse_time(text: str) -> _dt.datetime | None:
    try:
        moment = _dt.datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=_dt.UTC)
    return moment


def _user() -> str:
    try:
        return getpass.getuser()
    except (OSError, KeyError):
        return "unknown user"


def _host() -> str:
    return socket.gethostname() or "unknown host"


def _process_alive(pid: int) -> bool:
    """Whether a process with ``pid`` runs on this host (signal 0 probes without signalling)."""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # it exists, under another user
    except OSError:
        return True  # cannot tell: assume it runs, never take a live lock
    return True


class _Unreadable(Exception):
    """The lock file exists but cannot be read (permission, I/O): its holder is unknown."""


def _read_info(path: Path) -> LockInfo | None:
    """The lock's content; ``None`` when it is not a lock (garbled, too large, not ours).

    Raises
    ------
    _Unreadable
        The file cannot be read at all (no permission, an I/O error).
    """
    try:
        if path.stat().st_size > MAX_LOCK_BYTES:
            return None
        data = path.read_bytes()
    except FileNotFoundError:
        return None
    except OSError as error:
        raise _Unreadable(error.strerror or str(error)) from error
    try:
        document: Any = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError):
        return None
    if not isinstance(document, dict) or document.get("program") != PROGRAM:
        return None
    owner, host, pid, moment = (document.get(key) for key in ("owner", "host", "pid", "time"))
    if not (isinstance(owner, str) and isinstance(host, str) and isinstance(moment, str)):
        return None
    if isinstance(pid, bool) or not isinstance(pid, int):
        return None
    return LockInfo(owner=owner, host=host, pid=pid, time=moment)


def _read_info_quietly(path: Path) -> LockInfo | None:
    try:
        return _read_info(path)
    except _Unreadable:
        return None


def inspect_lock(project_path: str | os.PathLike[str], max_age_s: float = DEFAULT_MAX_AGE_S) -> LockState | None:
    """The lock on ``project_path``, or ``None`` when there is none.

    Parameters
    ----------
    project_path : path
        The project file (not the lock file).
    max_age_s : float
        A lock older than this (seconds) is stale whoever holds it.
    """
    path = lock_path(project_path)
    try:
        status = path.lstat()
    except FileNotFoundError:
        return None
    except OSError as error:
        raise LockError(f"{path}: the lock file cannot be examined ({error.strerror}); it is left alone") from error
    now_s = _time.time()
    if stat.S_ISLNK(status.st_mode):
        target = os.readlink(path)
        if not path.exists():
            return LockState(path, None, True, f'it is a symbolic link to "{target}", which does not exist, '
                             "so it is stale", 0.0, mine=False)
        raise LockError(f'{path} is a symbolic link to "{target}", not a lock file Stagewise writes; it is left '
                        "alone: remove it if no one has the project open")
    if stat.S_ISDIR(status.st_mode):
        raise LockError(f"{path} is a folder, not a lock file; it is left alone: remove or rename it if no one "
                        "has the project open")
    file_age = now_s - status.st_mtime
    try:
        info = _read_info(path)
    except _Unreadable as error:
        # Nothing says its holder is gone: held, until the file itself is past the age limit.
        if file_age > max_age_s:
            return LockState(path, None, True, f"it cannot be read ({error}) and its file is "
                             f"{file_age / 3600.0:.1f} h old, past the {max_age_s / 3600.0:g} h limit, so it is "
                             "stale", file_age, mine=False)
        return LockState(path, None, False, f"it cannot be read ({error}), so it is held by someone this "
                         "program cannot name", file_age, mine=False)
    if info is None:
        age = max(file_age, 0.0)
        stale = age > UNREADABLE_GRACE_S
        reason = ("the lock file is not a lock Stagewise wrote and is older than "
                  f"{UNREADABLE_GRACE_S:g} s, so it is stale") if stale else "the lock file is being written"
        return LockState(path, None, stale, reason, age, mine=False)
    taken = _parse_time(info.time)
    mine = info.host == _host() and info.pid == os.getpid()
    if taken is None:
        return LockState(path, info, True, f'its time "{info.time}" cannot be read, so it is stale', file_age, mine)
    age = (_now_utc() - taken).total_seconds()
    if info.host == _host() and not _process_alive(info.pid):
        return LockState(path, info, True, f"process {info.pid} no longer runs on this host, so it is stale", age, mine)
    if age < -MAX_CLOCK_AHEAD_S:
        # A time far ahead of our clock: not believed; the file's own time decides.
        if file_age < -MAX_CLOCK_AHEAD_S:
            return LockState(path, info, True, f"its time {info.time} and its file's time both lie more than "
                             f"{MAX_CLOCK_AHEAD_S / 3600.0:g} h ahead of this host's clock, so nothing tells when "
                             "it was taken and it is stale", file_age, mine)
        age = file_age
    if age > max_age_s:
        hours = age / 3600.0
        return LockState(path, info, True, f"it is {hours:.1f} h old, past the {max_age_s / 3600.0:g} h limit, "
                         "so it is stale", age, mine)
    return LockState(path, info, False, "it is held", age, mine)


@dataclass(slots=True)
class ProjectLock:
    """A lock this process holds. Release it with :meth:`release` (or use ``with``)."""

    project_path: Path
    info: LockInfo
    released: bool = False
    took_over: LockState | None = None

    @property
    def note(self) -> str | None:
        """One line for the user when a stale lock was taken over (``None`` otherwise)."""
        if self.took_over is None:
            return None
        return f"took over the stale lock {self.took_over.path.name} of {self.took_over.describe()}"

    @property
    def path(self) -> Path:
        return lock_path(self.project_path)

    def _still_ours(self) -> bool:
        return _read_info_quietly(self.path) == self.info

    def refresh(self) -> None:
        """Rewrite the lock's time, so that a long editing session does not look stale."""
        if self.released:
            raise LockError(f"{self.path}: this lock was released")
        if not self._still_ours():
            raise LockError(f"{self.path}: the lock is no longer ours; someone took it over")
        info = LockInfo(self.info.owner, self.info.host, self.info.pid, _format_time(_now_utc()))
        _replace_atomically(self.path, info.to_json(), _mode_like(self.project_path))
        self.info = info

    def release(self) -> None:
        """Remove the lock file if it is still ours (idempotent)."""
        if self.released:
            return
        self.released = True
        if self._still_ours():
            with contextlib.suppress(FileNotFoundError):
                self.path.unlink()

    def __enter__(self) -> ProjectLock:
        return self

    def __exit__(self, kind: type[BaseException] | None, error: BaseException | None,
                 trace: TracebackType | None) -> None:
        self.release()


def _replace_atomically(path: Path, text: str, mode: int) -> None:
    temporary = write_temporary(path.parent, path.name, text.encode("utf-8"), mode)
    try:
        os.replace(temporary, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(temporary)
        raise


def _create_exclusively(path: Path, text: str, mode: int) -> bool:
    """Create ``path`` holding ``text`` only if it does not exist; False when it exists."""
    temporary = write_temporary(path.parent, path.name, text.encode("utf-8"), mode)
    try:
        try:
            os.link(temporary, path)
            return True
        except FileExistsError:
            return False
        except OSError:
            pass  # no hard links here: fall back to exclusive creation
        try:
            descriptor = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
        except FileExistsError:
            return False
        with os.fdopen(descriptor, "w", encoding="utf-8") as stream:
            stream.write(text)
            stream.flush()
            os.fsync(stream.fileno())
        return True
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(temporary)


def acquire_lock(
    project_path: str | os.PathLike[str],
    owner: str | None = None,
    *,
    take_stale: bool = True,
    max_age_s: float = DEFAULT_MAX_AGE_S,
) -> ProjectLock:
    """Lock ``project_path`` for editing by this process.

    Parameters
    ----------
    project_path : path
        The project file; its folder must be writable.
    owner : str, optional
        The name recorded in the lock (default: the login name).
    take_stale : bool
        Take over a stale lock (see the module docstring); the returned lock's
        :attr:`ProjectLock.took_over` then holds what was found and :attr:`ProjectLock.note`
        one line to show the user. With False a stale lock is refused like a live one, so the
        caller can ask the user first.
    max_age_s : float
        Age (seconds) past which a lock is stale.

    Raises
    ------
    LockError
        Held by someone else (the message names who, where and since when), the lock is a
        folder or a link to something, or the lock file cannot be written.
    """
    project = real_path(project_path)
    path = lock_path(project)
    remove_leftover_temporaries(path)
    mode = _mode_like(project)
    took_over: LockState | None = None
    info = LockInfo(owner=(owner or _user()).strip() or "unknown user", host=_host(), pid=os.getpid(),
                    time=_format_time(_now_utc()))
    for _attempt in range(3):
        try:
            if _create_exclusively(path, info.to_json(), mode):
                return ProjectLock(project, info, took_over=took_over)
        except OSError as error:
            raise LockError(f"{path}: the lock file cannot be written ({error.strerror})") from error
        state = inspect_lock(project, max_age_s)
        if state is None:
            continue  # released meanwhile: try again
        if state.mine and state.info is not None:
            raise LockError(f"{project} is already open for editing in this process", state)
        if not (state.stale and take_stale):
            raise LockError(f"{project} is open for editing by {state.describe()}", state)
        # Take over only the stale lock we inspected, not one written since.
        if _read_info_quietly(path) == state.info:
            try:
                path.unlink()
            except FileNotFoundError:
                pass
            except OSError as error:
                raise LockError(f"{path}: the stale lock cannot be removed ({error.strerror}); {state.reason}",
                                state) from error
            took_over = state
    raise LockError(f"{project}: the lock changed hands while it was being taken; try again")


def release_lock(lock: ProjectLock) -> None:
    """Release ``lock`` (same as ``lock.release()``)."""
    lock.release()
