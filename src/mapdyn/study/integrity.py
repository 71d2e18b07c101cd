"""Integrity of a study folder (docs/architecture.md#study-folder): the input seal, the manifest
checksum, the one-writer lock and the clean-up of temporaries left by an interrupted write.

* Seal: the manifest stores the study input text it was created from (``sealed_input``) and its
  SHA-256 (``source_sha256``).  :func:`first_difference` names the first key whose value differs
  between the sealed text and the ``study.toml`` found in the folder.
* Manifest checksum: ``manifest_sha256`` is the SHA-256 of the canonical JSON of every other
  manifest entry (sorted keys); a manifest edited or damaged on disk no longer matches.
* Lock: ``<folder>/.lock`` held with ``fcntl.flock`` (exclusive, non-blocking).  The kernel drops
  the lock when the holder exits or is killed, so a lock is never stale on the host that holds it;
  the file keeps the holder's pid, host and command for the refusal message.
"""

from __future__ import annotations

import errno
import fcntl
import hashlib
import json
import os
import shutil
import socket
import time
import tomllib
from typing import Any

__all__ = ["LOCK_FILE", "StudyLock", "LockedError", "manifest_checksum", "first_difference",
           "remove_temporaries", "disk_full_message", "is_disk_full",
           "is_environment_fault"]

LOCK_FILE = ".lock"


class LockedError(RuntimeError):
    """Another process holds the study folder's lock (one-line message naming the holder)."""


def manifest_checksum(manifest: dict) -> str:
    """SHA-256 of the canonical JSON of ``manifest`` without its ``manifest_sha256`` entry."""
    body = {k: v for k, v in manifest.items() if k != "manifest_sha256"}
    return hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()


def _flatten(data: Any, prefix: str = "") -> list[tuple[str, Any]]:
    out: list[tuple[str, Any]] = []
    if isinstance(data, dict):
        for k, v in data.items():
            out.extend(_flatten(v, f"{prefix}.{k}" if prefix else str(k)))
    else:
        out.append((prefix, data))
    return out


def first_difference(sealed_text: str, current_text: str) -> str:
    """Describe the first key (in the sealed file's order) whose value differs, e.g.
    ``method.window (sealed "triangle", now "square")``; ``"the text (comments or layout)"`` when
    only formatting differs; ``"the file (not valid TOML)"`` when the current text does not parse."""
    try:
        cur = dict(_flatten(tomllib.loads(current_text)))
    except (tomllib.TOMLDecodeError, UnicodeError):
        return "the file (no longer valid TOML)"
    old = _flatten(tomllib.loads(sealed_text))
    for k, v in old:
        if k not in cur:
            return f"{k} (sealed {json.dumps(v, default=str)}, now absent)"
        if cur[k] != v:
            return f"{k} (sealed {json.dumps(v, default=str)}, now {json.dumps(cur[k], default=str)})"
    old_keys = {k for k, _ in old}
    for k, v in cur.items():
        if k not in old_keys:
            return f"{k} (absent when sealed, now {json.dumps(v, default=str)})"
    return "the text only (comments or layout)"


class StudyLock:
    """Exclusive lock on a study folder: ``with StudyLock(folder, "run"): ...`` or acquire()/release().

    Raises :class:`LockedError` naming the holder when another live process holds it.
    """

    def __init__(self, folder: str, command: str = "mapdyn"):
        self.folder = os.path.abspath(folder)
        self.path = os.path.join(self.folder, LOCK_FILE)
        self.command = command
        self._fd: int | None = None

    def acquire(self) -> "StudyLock":
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as err:
            os.close(fd)
            if err.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise
            raise LockedError(f"{self.folder} is in use by {self.holder()}; wait for it to finish or stop it "
                              f"(Ctrl-C), then try again") from None
        info = {"pid": os.getpid(), "host": socket.gethostname(), "command": self.command,
                "started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
        os.ftruncate(fd, 0)
        os.pwrite(fd, json.dumps(info).encode(), 0)
        self._fd = fd
        return self

    def holder(self) -> str:
        """'pid 1234 on host (mapdyn run since ...)' from the lock file, or 'another process'."""
        try:
            with open(self.path, encoding="utf-8") as fh:
                info = json.load(fh)
            return (f"pid {info['pid']} on {info['host']} ({info.get('command', 'mapdyn')} since "
                    f"{info.get('started', '?')})")
        except (OSError, ValueError, KeyError, TypeError):
            return "another process"

    def release(self) -> None:
        if self._fd is not None:
            try:
                fcntl.flock(self._fd, fcntl.LOCK_UN)
            finally:
                os.close(self._fd)
                self._fd = None

    def __enter__(self) -> "StudyLock":
        return self.acquire() if self._fd is None else self

    def __exit__(self, *exc) -> None:
        self.release()


def remove_temporaries(folder: str) -> list[str]:
    """Delete ``*.tmp`` files (interrupted atomic writes) under ``folder``; call with the lock held.
    Returns the removed paths."""
    removed = []
    for root, _dirs, files in os.walk(folder):
        for name in files:
            if name.endswith(".tmp"):
                path = os.path.join(root, name)
                try:
                    os.unlink(path)
                    removed.append(path)
                except OSError:
                    pass
    return removed


def is_environment_fault(err: BaseException) -> bool:
    """A file-system condition no retry of the same task can fix (full disk, permissions, a file
    where a folder belongs, read-only file system): the run stops with one line instead of
    recording every task as failed."""
    if is_disk_full(err):
        return True
    return isinstance(err, OSError) and err.errno in (errno.EACCES, errno.EPERM, errno.EROFS, errno.ENOTDIR,
                                                      errno.EISDIR, errno.EEXIST)


def is_disk_full(err: BaseException) -> bool:
    """True for "no space left on device" (ENOSPC or EDQUOT), also when HDF5 only says it in words."""
    if not isinstance(err, OSError):
        return False
    text = str(err)
    return err.errno in (errno.ENOSPC, errno.EDQUOT) or "No space left" in text or "errno = 28" in text


def _size(n: float) -> str:
    return f"{n / 1e6:.1f} MB" if n >= 1e6 else f"{n / 1e3:.0f} kB"


def disk_full_message(path: str, needed_bytes: int | None = None) -> str:
    """'no space left on device writing PATH (free: X MB on its file system)'."""
    probe = path
    while probe and not os.path.exists(probe):
        probe = os.path.dirname(probe)
    try:
        free = shutil.disk_usage(probe or ".").free
        room = f"free: {_size(free)} on its file system"
    except OSError:
        room = "free space unknown"
    need = f"; this file alone needs {_size(needed_bytes)}" if needed_bytes else ""
    return f"no space left on the device writing {path} ({room}{need}); free some space and run 'mapdyn resume'"
